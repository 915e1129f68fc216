"""The one tokenizer: training, the float reference, the packer and the device share it.

It is driven entirely by a `TokenizerSpec`, stored in the model's dan.json and
later in the bundle's manifest, so every stage splits a text the same way.
"""

from __future__ import annotations

import bisect
import itertools
import re
import unicodedata
from dataclasses import asdict, dataclass

from .errors import TokenizerError
from .unicode_pinned import UNASSIGNED, UNICODE_VERSION

# --- the pinned Unicode version -----------------------------------------------------------------------
# The tokenizer is defined against Unicode UNICODE_VERSION (14.0.0): before normalisation every code point
# unassigned in it becomes U+0020 (a separator), so an interpreter with newer tables (Python 3.12: 15.0,
# 3.13: 15.1) sees only characters whose NFKC, case and \w it agrees on. An interpreter with OLDER tables
# (Python 3.10: 13.0.0) refuses each text holding a character assigned in the pinned version that its
# tables do not know (TokenizerError), rather than tokenizing it differently. UNASSIGNED comes from
# runtime/gen_unicode.py. The BMP part is one regex class (a bitmap in `re`); astral candidates are
# checked against the table by bisection, since `re` scans astral ranges one by one.
_ucd = unicodedata  # the interpreter's tables (tests substitute unicodedata.ucd_3_2_0 to simulate an old one)
_ASTRAL_FIRST = [max(a, 0x10000) for a, b in UNASSIGNED if b >= 0x10000]
_ASTRAL_LAST = [b for a, b in UNASSIGNED if b >= 0x10000]
_PIN_CANDIDATES = re.compile(
    "[" + "".join(f"\\u{a:04x}-\\u{min(b, 0xFFFF):04x}" for a, b in UNASSIGNED if a < 0x10000)
    + "\\U00010000-\\U0010ffff]"
)
_NOT_WORD_OR_SPACE = re.compile(r"[^\w\s]")  # where an interpreter's unassigned characters can be


def _pin_one(match: re.Match) -> str:
    c = match.group()
    if c < "\U00010000":
        return " "  # the regex class holds only unassigned BMP code points
    i = bisect.bisect_right(_ASTRAL_FIRST, ord(c)) - 1
    return " " if i >= 0 and ord(c) <= _ASTRAL_LAST[i] else c


def pin_unassigned(text: str) -> str:
    """Every code point unassigned in the pinned Unicode version replaced by U+0020 (ASCII is returned as is)."""
    return text if text.isascii() else _PIN_CANDIDATES.sub(_pin_one, text)


def version_tuple(version: str) -> tuple[int, ...]:
    return tuple(int(part) for part in version.split("."))


def tables_are_older() -> bool:
    """True when this interpreter's Unicode tables are older than the pinned version (Python 3.10)."""
    return version_tuple(_ucd.unidata_version) < version_tuple(UNICODE_VERSION)


def check_known(pinned: str) -> None:
    """Refuse a (pinned) text holding a character this interpreter's older tables do not know."""
    for match in _NOT_WORD_OR_SPACE.finditer(pinned):
        if _ucd.category(match.group()) == "Cn":
            raise TokenizerError(
                f"text holds U+{ord(match.group()):04X} at index {match.start()}, assigned in Unicode "
                f"{UNICODE_VERSION} (the version the tokenizer pins) but unknown to this Python's Unicode tables "
                f"({_ucd.unidata_version}): it would tokenize differently here than on every other host, so the text "
                "is refused; run danpack on Python 3.11 or newer")


# Combining marks (Unicode categories Mn, Mc, Me) continue a word, so "café" in NFD form or
# Devanagari and Thai words stay whole. Generated once from unicodedata 14.0.0
# and written out, so the pattern does not change with the Python build.
MARKS = (
    "\u0300-\u036f\u0483-\u0489\u0591-\u05bd\u05bf\u05c1-\u05c2\u05c4-\u05c5\u05c7\u0610-\u061a"
    "\u064b-\u065f\u0670\u06d6-\u06dc\u06df-\u06e4\u06e7-\u06e8\u06ea-\u06ed\u0711\u0730-\u074a"
    "\u07a6-\u07b0\u07eb-\u07f3\u07fd\u0816-\u0819\u081b-\u0823\u0825-\u0827\u0829-\u082d\u0859-"
    "\u085b\u0898-\u089f\u08ca-\u08e1\u08e3-\u0903\u093a-\u093c\u093e-\u094f\u0951-\u0957\u0962-"
    "\u0963\u0981-\u0983\u09bc\u09be-\u09c4\u09c7-\u09c8\u09cb-\u09cd\u09d7\u09e2-\u09e3\u09fe\u0a01-"
    "\u0a03\u0a3c\u0a3e-\u0a42\u0a47-\u0a48\u0a4b-\u0a4d\u0a51\u0a70-\u0a71\u0a75\u0a81-\u0a83\u0abc"
    "\u0abe-\u0ac5\u0ac7-\u0ac9\u0acb-\u0acd\u0ae2-\u0ae3\u0afa-\u0aff\u0b01-\u0b03\u0b3c\u0b3e-"
    "\u0b44\u0b47-\u0b48\u0b4b-\u0b4d\u0b55-\u0b57\u0b62-\u0b63\u0b82\u0bbe-\u0bc2\u0bc6-\u0bc8"
    "\u0bca-\u0bcd\u0bd7\u0c00-\u0c04\u0c3c\u0c3e-\u0c44\u0c46-\u0c48\u0c4a-\u0c4d\u0c55-\u0c56"
    "\u0c62-\u0c63\u0c81-\u0c83\u0cbc\u0cbe-\u0cc4\u0cc6-\u0cc8\u0cca-\u0ccd\u0cd5-\u0cd6\u0ce2-"
    "\u0ce3\u0d00-\u0d03\u0d3b-\u0d3c\u0d3e-\u0d44\u0d46-\u0d48\u0d4a-\u0d4d\u0d57\u0d62-\u0d63"
    "\u0d81-\u0d83\u0dca\u0dcf-\u0dd4\u0dd6\u0dd8-\u0ddf\u0df2-\u0df3\u0e31\u0e34-\u0e3a\u0e47-\u0e4e"
    "\u0eb1\u0eb4-\u0ebc\u0ec8-\u0ecd\u0f18-\u0f19\u0f35\u0f37\u0f39\u0f3e-\u0f3f\u0f71-\u0f84\u0f86-"
    "\u0f87\u0f8d-\u0f97\u0f99-\u0fbc\u0fc6\u102b-\u103e\u1056-\u1059\u105e-\u1060\u1062-\u1064"
    "\u1067-\u106d\u1071-\u1074\u1082-\u108d\u108f\u109a-\u109d\u135d-\u135f\u1712-\u1715\u1732-"
    "\u1734\u1752-\u1753\u1772-\u1773\u17b4-\u17d3\u17dd\u180b-\u180d\u180f\u1885-\u1886\u18a9\u1920-"
    "\u192b\u1930-\u193b\u1a17-\u1a1b\u1a55-\u1a5e\u1a60-\u1a7c\u1a7f\u1ab0-\u1ace\u1b00-\u1b04"
    "\u1b34-\u1b44\u1b6b-\u1b73\u1b80-\u1b82\u1ba1-\u1bad\u1be6-\u1bf3\u1c24-\u1c37\u1cd0-\u1cd2"
    "\u1cd4-\u1ce8\u1ced\u1cf4\u1cf7-\u1cf9\u1dc0-\u1dff\u20d0-\u20f0\u2cef-\u2cf1\u2d7f\u2de0-\u2dff"
    "\u302a-\u302f\u3099-\u309a\ua66f-\ua672\ua674-\ua67d\ua69e-\ua69f\ua6f0-\ua6f1\ua802\ua806\ua80b"
    "\ua823-\ua827\ua82c\ua880-\ua881\ua8b4-\ua8c5\ua8e0-\ua8f1\ua8ff\ua926-\ua92d\ua947-\ua953"
    "\ua980-\ua983\ua9b3-\ua9c0\ua9e5\uaa29-\uaa36\uaa43\uaa4c-\uaa4d\uaa7b-\uaa7d\uaab0\uaab2-\uaab4"
    "\uaab7-\uaab8\uaabe-\uaabf\uaac1\uaaeb-\uaaef\uaaf5-\uaaf6\uabe3-\uabea\uabec-\uabed\ufb1e"
    "\ufe00-\ufe0f\ufe20-\ufe2f\U000101fd\U000102e0\U00010376-\U0001037a\U00010a01-\U00010a03"
    "\U00010a05-\U00010a06\U00010a0c-\U00010a0f\U00010a38-\U00010a3a\U00010a3f\U00010ae5-\U00010ae6"
    "\U00010d24-\U00010d27\U00010eab-\U00010eac\U00010f46-\U00010f50\U00010f82-\U00010f85\U00011000-"
    "\U00011002\U00011038-\U00011046\U00011070\U00011073-\U00011074\U0001107f-\U00011082\U000110b0-"
    "\U000110ba\U000110c2\U00011100-\U00011102\U00011127-\U00011134\U00011145-\U00011146\U00011173"
    "\U00011180-\U00011182\U000111b3-\U000111c0\U000111c9-\U000111cc\U000111ce-\U000111cf\U0001122c-"
    "\U00011237\U0001123e\U000112df-\U000112ea\U00011300-\U00011303\U0001133b-\U0001133c\U0001133e-"
    "\U00011344\U00011347-\U00011348\U0001134b-\U0001134d\U00011357\U00011362-\U00011363\U00011366-"
    "\U0001136c\U00011370-\U00011374\U00011435-\U00011446\U0001145e\U000114b0-\U000114c3\U000115af-"
    "\U000115b5\U000115b8-\U000115c0\U000115dc-\U000115dd\U00011630-\U00011640\U000116ab-\U000116b7"
    "\U0001171d-\U0001172b\U0001182c-\U0001183a\U00011930-\U00011935\U00011937-\U00011938\U0001193b-"
    "\U0001193e\U00011940\U00011942-\U00011943\U000119d1-\U000119d7\U000119da-\U000119e0\U000119e4"
    "\U00011a01-\U00011a0a\U00011a33-\U00011a39\U00011a3b-\U00011a3e\U00011a47\U00011a51-\U00011a5b"
    "\U00011a8a-\U00011a99\U00011c2f-\U00011c36\U00011c38-\U00011c3f\U00011c92-\U00011ca7\U00011ca9-"
    "\U00011cb6\U00011d31-\U00011d36\U00011d3a\U00011d3c-\U00011d3d\U00011d3f-\U00011d45\U00011d47"
    "\U00011d8a-\U00011d8e\U00011d90-\U00011d91\U00011d93-\U00011d97\U00011ef3-\U00011ef6\U00016af0-"
    "\U00016af4\U00016b30-\U00016b36\U00016f4f\U00016f51-\U00016f87\U00016f8f-\U00016f92\U00016fe4"
    "\U00016ff0-\U00016ff1\U0001bc9d-\U0001bc9e\U0001cf00-\U0001cf2d\U0001cf30-\U0001cf46\U0001d165-"
    "\U0001d169\U0001d16d-\U0001d172\U0001d17b-\U0001d182\U0001d185-\U0001d18b\U0001d1aa-\U0001d1ad"
    "\U0001d242-\U0001d244\U0001da00-\U0001da36\U0001da3b-\U0001da6c\U0001da75\U0001da84\U0001da9b-"
    "\U0001da9f\U0001daa1-\U0001daaf\U0001e000-\U0001e006\U0001e008-\U0001e018\U0001e01b-\U0001e021"
    "\U0001e023-\U0001e024\U0001e026-\U0001e02a\U0001e130-\U0001e136\U0001e2ae\U0001e2ec-\U0001e2ef"
    "\U0001e8d0-\U0001e8d6\U0001e944-\U0001e94a\U000e0100-\U000e01ef"
)
# Control and format characters (Cc, Cf: soft hyphen, zero-width space and joiner, byte-order
# mark, ...) separate tokens and never become tokens themselves. Same origin as MARKS.
INVISIBLE = (
    "\u0000-\u001f\u007f-\u009f\u00ad\u0600-\u0605\u061c\u06dd\u070f\u0890-\u0891\u08e2\u180e\u200b-"
    "\u200f\u202a-\u202e\u2060-\u2064\u2066-\u206f\ufeff\ufff9-\ufffb\U000110bd\U000110cd\U00013430-"
    "\U00013438\U0001bca0-\U0001bca3\U0001d173-\U0001d17a\U000e0001\U000e0020-\U000e007f"
)
APOSTROPHES = "'\u2019\u02bc"  # ' and the typographic apostrophes phones insert, inside words

# words-v1: a word is a letter or digit, then letters, digits and marks, with single inner
# apostrophes or hyphens ("don't", "type-2"; "5.0" splits at the dot); any other visible
# character is a token of its own (punctuation marks, emoji). Variation selectors and U+FFFD
# (the decoder's replacement character) separate tokens. "_" is a separator too.
PRESETS = {
    "words-v1": (
        f"[^\\W_](?:[^\\W_]|[{MARKS}])*(?:[{APOSTROPHES}\\-](?:[^\\W_]|[{MARKS}])+)*"
        f"|[^\\w\\s_{MARKS}{INVISIBLE}\\ufe00-\\ufe0f\\ufffd]"
    ),
    # spaces-v1: every run of non-whitespace is a token (str.split() in a training script).
    "spaces-v1": r"\S+",
    # wordpunct-v1: runs of word characters (letters, digits, "_"; combining marks split), or any
    # single other non-space character: re.findall(r"\w+|[^\w\s]", text), common in PyTorch training scripts.
    "wordpunct-v1": r"\w+|[^\w\s]",
}
DEFAULT_PATTERN = "words-v1"

# The same presets on ASCII text, where they reduce to plain ASCII classes (no marks, no
# invisible characters past U+007F; "_" is still a separator). Most comments are ASCII,
# and these find the same tokens about twice as fast; tests/test_tokenize.py checks them
# against the full patterns on arbitrary ASCII.
ASCII_PRESETS = {
    "words-v1": r"[A-Za-z0-9]+(?:['\-][A-Za-z0-9]+)*|[!-/:-@\[-^`{-~]",
    "wordpunct-v1": r"[0-9A-Za-z_]+|[!-/:-@\[-^`{-~\x00-\x08\x0e-\x1b\x7f]",
}

# Bounds on what a model folder or a bundle may ask of the tokenizer (README, "Tokenizer patterns").
MAX_TOKENS_LIMIT = 1024  # tokens per text: a batch pads every text to its longest, so memory grows with this
MAX_PATTERN_CHARS = 4096  # characters of a custom pattern (the presets are trusted constants)
_CLASS_ESCAPES = frozenset("wWdDsS")  # \w \d \s and their complements
_CHAR_ESCAPES = {"t": 0, "n": 0, "r": 0, "f": 0, "v": 0, "x": 2, "u": 4, "U": 8}  # escape -> hex digits after it
_META = frozenset("()^$*+?{}|")  # not atoms in the grammar


def _pattern_error(pattern: str, at: int, what: str) -> TokenizerError:
    return TokenizerError(f"tokenizer pattern {pattern[:40]!r}: {what} at character {at + 1}, outside the "
                          f"linear-time grammar (README, \"Tokenizer patterns\"); or use a preset")


def _escape_end(pattern: str, i: int, in_class: bool) -> int:
    """End of the escape starting at pattern[i] == "\\"."""
    if i + 1 >= len(pattern):
        raise _pattern_error(pattern, i, "a lone backslash")
    c = pattern[i + 1]
    if c in _CLASS_ESCAPES:
        return i + 2
    if c in _CHAR_ESCAPES:
        digits = _CHAR_ESCAPES[c]
        hex_part = pattern[i + 2 : i + 2 + digits]
        if len(hex_part) != digits or not all(h in "0123456789abcdefABCDEF" for h in hex_part):
            raise _pattern_error(pattern, i, f"\\{c} needs {digits} hex digits")
        return i + 2 + digits
    if c.isalnum() or c == "_":  # \b \B \A \Z \1 \N ...: anchors, back-references, names
        raise _pattern_error(pattern, i, f"the escape \\{c}{' inside a class' if in_class else ''} is not allowed")
    return i + 2  # an escaped punctuation character or space: a literal


def _atom_end(pattern: str, i: int) -> int:
    """End of the atom starting at pattern[i]: ".", a literal, an escape, or a character class [...]."""
    c = pattern[i]
    if c == "\\":
        return _escape_end(pattern, i, False)
    if c != "[":
        if c in _META or c == "]":
            raise _pattern_error(pattern, i, f"{c!r} (groups, anchors and counted or nested repetition are not allowed)")
        return i + 1
    j = i + 1
    if j < len(pattern) and pattern[j] == "^":
        j += 1
    start = j
    while j < len(pattern) and (pattern[j] != "]" or j == start):
        if pattern[j] == "\\":
            j = _escape_end(pattern, j, True)
        elif pattern[j] == "[":
            raise _pattern_error(pattern, j, "'[' inside a class (nested sets are not allowed; escape it as \\[)")
        else:
            j += 1
    if j >= len(pattern):
        raise _pattern_error(pattern, i, "a class that is never closed")
    return j + 1


def check_pattern_grammar(pattern: str) -> None:
    """Refuse a custom pattern outside the linear-time grammar (the presets are trusted constants and exempt).

    pattern := branch ("|" branch)* ; branch := atom ["+"] (atom ("*" | "?"))* ;
    atom := "." | literal | escape | "[" ["^"] class-items "]".
    Every branch starts with one mandatory atom and whatever follows is optional, so `re` never backtracks
    out of a match once its first atom matched: each match attempt costs its length plus a constant, and
    splitting a text is linear in its length. (Nested or counted repetition, groups, look-arounds and
    back-references can take exponential or quadratic time; a pattern such as (?:a+)+b does on "aaaa...c".)
    """
    if pattern in PRESETS:
        return
    i, n = 0, len(pattern)
    while True:
        atoms = 0
        while i < n and pattern[i] != "|":
            i = _atom_end(pattern, i)
            q = pattern[i] if i < n else ""
            if q in ("*", "+", "?", "{"):
                if q == "{" or q not in ("+" if atoms == 0 else "*?"):
                    first = "the first atom of a branch may only take '+'"
                    later = "an atom after the first must take '*' or '?'"
                    raise _pattern_error(pattern, i, f"{q!r} here ({first}; {later})")
                i += 1
                if i < n and pattern[i] in "*+?{":
                    raise _pattern_error(pattern, i, f"{pattern[i]!r} after a quantifier (lazy, possessive or "
                                                    "repeated quantifiers are not allowed)")
            elif atoms > 0:
                raise _pattern_error(pattern, i - 1, "an atom after the first of its branch without '*' or '?'")
            atoms += 1
        if atoms == 0:
            raise _pattern_error(pattern, i, "an empty branch")
        if i >= n:
            return
        i += 1


NORMALIZATIONS = ("NFC", "NFKC", "NFD", "NFKD", "none")
CASES = ("lower", "casefold", "keep")


@dataclass(frozen=True)
class TokenizerSpec:
    """How text becomes tokens; serialised as a plain dict."""

    normalization: str = "NFKC"  # Unicode normal form applied first ("none" to skip)
    case: str = "lower"  # "lower" (str.lower), "casefold" (str.casefold) or "keep"
    pattern: str = DEFAULT_PATTERN  # a preset name (see PRESETS) or a Python `re` pattern; each match is a token
    max_tokens: int = 512  # tokens past this count are dropped (bounds cost per text)
    unicode_version: str = UNICODE_VERSION  # code points unassigned in it become separators first (the only one accepted)

    def __post_init__(self) -> None:
        if self.unicode_version != UNICODE_VERSION:
            raise TokenizerError(
                f"tokenizer unicode_version {self.unicode_version!r} is not the version this danpack pins "
                f"({UNICODE_VERSION!r}); repack the model with this danpack version")
        if self.normalization not in NORMALIZATIONS:
            raise TokenizerError(
                f"tokenizer normalization {self.normalization!r} is not one of {NORMALIZATIONS}"
            )
        if self.case not in CASES:
            raise TokenizerError(f"tokenizer case {self.case!r} is not one of {CASES}")
        if (not isinstance(self.max_tokens, int) or isinstance(self.max_tokens, bool)
                or not 1 <= self.max_tokens <= MAX_TOKENS_LIMIT):
            raise TokenizerError(f"tokenizer max_tokens must be an integer from 1 to {MAX_TOKENS_LIMIT}, "
                                 f"found {self.max_tokens!r}")
        if not isinstance(self.pattern, str) or not self.pattern:
            raise TokenizerError("tokenizer pattern must be a non-empty string")
        if len(self.pattern) > MAX_PATTERN_CHARS and self.pattern not in PRESETS:
            raise TokenizerError(f"tokenizer pattern is {len(self.pattern)} characters long; a custom pattern may "
                                 f"have at most {MAX_PATTERN_CHARS}")
        try:
            compiled = re.compile(self.regex)
        except (re.error, OverflowError, RecursionError, ValueError) as e:
            raise TokenizerError(f"tokenizer pattern {self.pattern[:60]!r} does not compile: {e}") from e
        if compiled.fullmatch("") is not None:
            raise TokenizerError(f"tokenizer pattern {self.pattern!r} matches the empty string; every token must be non-empty")
        if compiled.groups:
            raise TokenizerError(
                "tokenizer pattern must not contain capturing groups (use (?:...)); "
                f"found {compiled.groups} in {self.pattern!r}"
            )
        check_pattern_grammar(self.pattern)

    @property
    def regex(self) -> str:
        """The regular expression itself (a preset name resolved)."""
        return PRESETS.get(self.pattern, self.pattern)

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, data: object) -> "TokenizerSpec":
        if not isinstance(data, dict):
            raise TokenizerError(f"tokenizer spec must be a mapping, found {type(data).__name__}")
        unknown = set(data) - {"normalization", "case", "pattern", "max_tokens", "unicode_version"}
        if unknown:
            raise TokenizerError(f"tokenizer spec has unknown fields {sorted(unknown)}")
        return cls(**data)


class Tokenizer:
    """Splits text into tokens according to a spec; stateless and thread-safe."""

    def __init__(self, spec: TokenizerSpec | None = None) -> None:
        self.spec = spec or TokenizerSpec()
        full = re.compile(self.spec.regex)
        fast = re.compile(ASCII_PRESETS[self.spec.pattern]) if self.spec.pattern in ASCII_PRESETS else full
        self._findall, self._ascii_findall = full.findall, fast.findall
        self._finditer, self._ascii_finditer = full.finditer, fast.finditer
        self._custom = self.spec.pattern not in PRESETS  # a custom pattern may match empty strings mid-text (r"\b")
        form = self.spec.normalization
        self._normalize = (lambda s: s) if form == "none" else (lambda s: unicodedata.normalize(form, s))
        self._case = {"lower": str.lower, "casefold": str.casefold, "keep": lambda s: s}[self.spec.case]
        self._check_known = check_known if tables_are_older() else None

    def normalize(self, text: str) -> str:
        """Pinning to the Unicode version, normalisation and case folding: the steps before splitting."""
        if not text.isascii():  # ASCII is assigned in every version: nothing to pin
            text = pin_unassigned(text)
            if self._check_known is not None:
                self._check_known(text)
        return self._case(self._normalize(text))

    def split(self, normalized: str) -> list[str]:
        """Every match of the pattern in already normalised text (ASCII text takes the fast path)."""
        tokens = self._ascii_findall(normalized) if normalized.isascii() else self._findall(normalized)
        if self._custom:  # its empty matches are dropped: every token is non-empty
            return [t for t in tokens if t]
        return tokens

    def tokenize(self, text: str) -> list[str]:
        """Tokens of one text, at most `max_tokens` of them.

        A text no longer than `max_tokens` characters cannot hold more tokens than that, and is split at
        once; a longer one is matched lazily and stops at `max_tokens`, so a huge line costs no more
        splitting than a full one.
        """
        normalized, cap = self.normalize(text), self.spec.max_tokens
        if len(normalized) <= cap:
            return self.split(normalized)
        finditer = self._ascii_finditer if normalized.isascii() else self._finditer
        tokens = (m.group() for m in finditer(normalized))
        if self._custom:  # as in split(): a custom pattern's empty matches are dropped
            tokens = filter(None, tokens)
        return list(itertools.islice(tokens, cap))

    def tokenize_bytes(self, data: bytes) -> list[str]:
        """Tokens of UTF-8 bytes; invalid sequences decode to U+FFFD, which separates tokens."""
        return self.tokenize(data.decode("utf-8", errors="replace"))

    def is_reachable(self, token: str) -> bool:
        """True when some text can produce exactly this token (it is its own tokenization)."""
        return self.split(self.normalize(token)) == [token]
