"""The one escaping of text danpack shows: whatever reaches a terminal, a Markdown report, a TSV cell or a JSON
string goes through `escape_text`, whatever its source (a bundle's labels, a model folder, an input id).

Unsafe characters are those `str.isprintable()` refuses except the space separators (Unicode category Zs):
control (Cc: ESC, CSI U+009B ...), format (Cf: bidi overrides, zero-width characters), line and paragraph
separators (Zl, Zp), surrogates (Cs), private use (Co) and unassigned code points (Cn, Unicode 14.0.0 here).
Each becomes a JSON-style escape, \\uXXXX (astral characters as their UTF-16 surrogate pair), so the same text is
valid inside a JSON string and inert on a terminal. `is_clean` says whether a string has none (labels must not).
"""

from __future__ import annotations

import unicodedata


def _unsafe(ch: str) -> bool:
    return not ch.isprintable() and unicodedata.category(ch) != "Zs"


def _escape(ch: str) -> str:
    code = ord(ch)
    if code < 0x10000:
        return f"\\u{code:04x}"
    code -= 0x10000
    return f"\\u{0xD800 + (code >> 10):04x}\\u{0xDC00 + (code & 0x3FF):04x}"


def is_clean(text: str) -> bool:
    """True when `text` holds no character `escape_text` would change."""
    return text.isprintable() or not any(_unsafe(ch) for ch in text)


def escape_text(text: str, keep: str = "") -> str:
    """`text` with every unsafe character written as \\uXXXX (printable text is returned as it is, at C speed);
    the characters in `keep` (a terminal's or Markdown file's "\\n") stay as they are."""
    if text.isprintable():
        return text
    return "".join(_escape(ch) if _unsafe(ch) and ch not in keep else ch for ch in text)


def first_unsafe(text: str) -> str | None:
    """The first unsafe character of `text` as U+XXXX with its category (for messages), or None."""
    for ch in text:
        if _unsafe(ch):
            return f"U+{ord(ch):04X} ({unicodedata.category(ch)})"
    return None


# Bounds on the strings a model folder or bundle names (README, "Bounds"); the packer and the reader both apply them.
MAX_LABELS = 1024  # classes of one classifier
MAX_LABEL_CHARS = 100  # characters of one label
MAX_TOKEN_CHARS = 256  # characters of one vocabulary token (GloVe 6B's longest is far shorter)


def labels_problem(labels: object) -> str | None:
    """What is wrong with a label list (None when it is fine): 2 to MAX_LABELS labels, each a non-empty string of
    at most MAX_LABEL_CHARS characters with no unsafe character (see `escape_text`), no two alike."""
    if not isinstance(labels, (list, tuple)) or not all(isinstance(x, str) for x in labels):
        return "must be a list of label strings"
    if not 2 <= len(labels) <= MAX_LABELS:
        return f"holds {len(labels)} labels, expected 2 to {MAX_LABELS}"
    for i, label in enumerate(labels):
        if not label:
            return f"label {i + 1} is empty"
        if len(label) > MAX_LABEL_CHARS:
            return f"label {i + 1} is {len(label)} characters long, at most {MAX_LABEL_CHARS} allowed"
        bad = first_unsafe(label)
        if bad is not None:
            return (f"label {i + 1} ({escape_text(label)!r}) holds {bad}; control, format, line-separator and "
                    "unassigned characters are not allowed in labels")
    if len(set(labels)) != len(labels):
        seen: set[str] = set()
        twice = next(label for label in labels if label in seen or seen.add(label))
        return f"repeats the label {escape_text(twice)!r}; labels must be unique"
    return None


def token_problem(tokens) -> str | None:
    """What is wrong with a vocabulary's token lengths (None when each has at most MAX_TOKEN_CHARS characters)."""
    for i, token in enumerate(tokens):
        if len(token) > MAX_TOKEN_CHARS:
            return (f"token {i + 1} ({escape_text(token[:20])!r}...) is {len(token)} characters long, at most "
                    f"{MAX_TOKEN_CHARS} allowed")
    return None
