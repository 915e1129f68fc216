"""The one tokenizer: training, the float reference, the packer and the device share it.

It is driven entirely by a `TokenizerSpec`, stored in the model's config.json and
later in the bundle's manifest, so every stage splits a text the same way.
"""

from __future__ import annotations

import re
import unicodedata
from dataclasses import asdict, dataclass

from .errors import TokenizerError

# Words (letters/digits) with inner apostrophes or hyphens ("don't", "type-2", "5.0"
# is split at the dot), then any single other visible character: punctuation marks
# and emoji become tokens of their own. Variation selectors, the zero-width joiner
# and U+FFFD (the decoder's replacement character) are separators, not tokens.
DEFAULT_PATTERN = r"[^\W_]+(?:['\-][^\W_]+)*|[^\w\s\ufe0e\ufe0f\u200d\ufffd]"

NORMALIZATIONS = ("NFC", "NFKC", "NFD", "NFKD", "none")
CASES = ("lower", "casefold", "keep")


@dataclass(frozen=True)
class TokenizerSpec:
    """How text becomes tokens; serialised as a plain dict."""

    normalization: str = "NFKC"  # Unicode normal form applied first ("none" to skip)
    case: str = "lower"  # "lower" (str.lower), "casefold" (str.casefold) or "keep"
    pattern: str = DEFAULT_PATTERN  # Python `re` pattern; each match is one token
    max_tokens: int = 512  # tokens past this count are dropped (bounds cost per text)

    def __post_init__(self) -> None:
        if self.normalization not in NORMALIZATIONS:
            raise TokenizerError(
                f"tokenizer normalization {self.normalization!r} is not one of {NORMALIZATIONS}"
            )
        if self.case not in CASES:
            raise TokenizerError(f"tokenizer case {self.case!r} is not one of {CASES}")
        if not isinstance(self.max_tokens, int) or isinstance(self.max_tokens, bool) or self.max_tokens < 1:
            raise TokenizerError(f"tokenizer max_tokens must be an integer >= 1, found {self.max_tokens!r}")
        if not isinstance(self.pattern, str) or not self.pattern:
            raise TokenizerError("tokenizer pattern must be a non-empty string")
        try:
            compiled = re.compile(self.pattern)
        except re.error as e:
            raise TokenizerError(f"tokenizer pattern {self.pattern!r} does not compile: {e}") from e
        if compiled.groups:
            raise TokenizerError(
                "tokenizer pattern must not contain capturing groups (use (?:...)); "
                f"found {compiled.groups} in {self.pattern!r}"
            )

    def to_dict(self) -> dict:
        return asdict(self)

    @classmethod
    def from_dict(cls, data: object) -> "TokenizerSpec":
        if not isinstance(data, dict):
            raise TokenizerError(f"tokenizer spec must be a mapping, found {type(data).__name__}")
        unknown = set(data) - {"normalization", "case", "pattern", "max_tokens"}
        if unknown:
            raise TokenizerError(f"tokenizer spec has unknown fields {sorted(unknown)}")
        return cls(**data)


class Tokenizer:
    """Splits text into tokens according to a spec; stateless and thread-safe."""

    def __init__(self, spec: TokenizerSpec | None = None) -> None:
        self.spec = spec or TokenizerSpec()
        self._findall = re.compile(self.spec.pattern).findall
        form = self.spec.normalization
        self._normalize = (lambda s: s) if form == "none" else (lambda s: unicodedata.normalize(form, s))
        self._case = {"lower": str.lower, "casefold": str.casefold, "keep": lambda s: s}[self.spec.case]

    def normalize(self, text: str) -> str:
        """Normalisation and case folding, the steps before splitting."""
        return self._case(self._normalize(text))

    def tokenize(self, text: str) -> list[str]:
        """Tokens of one text, at most `max_tokens` of them."""
        tokens = self._findall(self.normalize(text))
        return tokens[: self.spec.max_tokens]

    def tokenize_bytes(self, data: bytes) -> list[str]:
        """Tokens of UTF-8 bytes; invalid sequences decode to U+FFFD, which separates tokens."""
        return self.tokenize(data.decode("utf-8", errors="replace"))

    def is_reachable(self, token: str) -> bool:
        """True when some text can produce exactly this token (it is its own tokenization)."""
        return self._findall(self.normalize(token)) == [token]
