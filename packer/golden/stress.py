"""The golden kit's stress texts: where a port of the tokenizer to another language or library goes wrong.

Each case is (name, text) or (name, bytes): bytes are decoded as UTF-8 with U+FFFD for invalid sequences (the
runtime's `tokenize_bytes`). The fixed cases cover the traps of the issue list; `vocab_cases` dresses the
bundle's own tokens in the same traps, so a broken port changes ids and probabilities, not only tokens.
"""

from __future__ import annotations

from collections.abc import Sequence

from danpack.runtime.tokenize import TokenizerSpec

Case = tuple[str, "str | bytes"]

FULLWIDTH_OFFSET = 0xFF01 - 0x21  # U+FF01..U+FF5E are the fullwidth forms of ASCII ! .. ~ (NFKC maps them back)
VOCAB_WORDS = 24  # bundle tokens dressed in each trap

# (name, text): fixed texts. Characters new after Unicode 14.0 are from memory of the published code charts.
FIXED: tuple[Case, ...] = (
    ("empty", ""),
    ("spaces-only", "   "),
    ("whitespace-kinds", "\t\n\r\f\v \u00a0\u1680\u2000\u2003\u2028\u2029\u202f\u205f\u3000\u0085"),
    ("upper-case", "THE CHARGER WAS NOT FAST AT ALL"),
    ("mixed-case", "ChArGeR 4 iS OK"),
    ("fullwidth", "\uff23\uff28\uff21\uff32\uff27\uff25\uff32 \uff14\uff10\uff4b\uff37 \uff01"),
    ("nbsp", "charger\u00a0broken\u202fagain"),
    ("ogham-space-mark", "slow\u1680charging"),  # White_Space, unchanged by NFKC: \s only in Unicode mode
    ("line-separator", "plug\u2028cable\u2029screen\u0085app"),
    ("zero-width", "char\u200bger\u200cok\u200dnow\u2060done\ufeffend"),
    ("soft-hyphen", "super\u00adfast charg\u00ading"),
    ("typographic-apostrophes", "don\u2019t can\u02bct won't it\u2018s \u201cquoted\u201d"),
    ("composed-accents", "caf\u00e9 na\u00efve r\u00e9sum\u00e9"),
    ("decomposed-accents", "cafe\u0301 nai\u0308ve re\u0301sume\u0301"),
    ("greek-final-sigma", "\u039f\u0394\u039f\u03a3 \u03a3\u039f\u03a6\u039f\u03a3 \u03c3\u03bf\u03c6\u03bf\u03c2"),
    ("dotted-capital-i", "\u0130STANBUL \u0130i \u0131I"),
    ("sharp-s", "STRA\u00dfE stra\u00dfe \u1e9e"),
    ("ligatures", "\ufb01ne \ufb02at \ufb00 \u0132 \u2126 \u212b"),
    ("compatibility", "\u00bd \u2460 \u00b2 x\u00b3 \u2163 \u33a1 \u2122"),
    ("emoji-variation-selectors", "ok\u2764\ufe0f fine\u263a\ufe0e \u2b50\ufe0f"),
    ("emoji-joiners", "\U0001f468\u200d\U0001f469\u200d\U0001f467 \U0001f3f3\ufe0f\u200d\U0001f308 \U0001f469\U0001f3fd\u200d\U0001f527"),
    ("emoji-modifiers-flags-keycaps", "\U0001f44d\U0001f3fd \U0001f1e9\U0001f1ea 4\ufe0f\u20e3"),
    ("punctuation", "fast!!! slow... (maybe) \u2014 \u00abbroken\u00bb \u00bfok?"),
    ("underscore-and-hyphens", "type_2 type-2 --flag a-b-c -x- ccs\u2010combo"),
    ("ascii-edges", "_under_score 'quoted' don''t a--b -lead trail- it's 5.0 x_y A'B @home #1 $5 ~tilde"),
    ("digits-other-scripts", "\u0663\u0664 \u096a\u096b \uff15\uff16 \U0001d7d9"),
    ("scripts", "\u041f\u0420\u0418\u0412\u0415\u0422 \u4f60\u597d \u0645\u0631\u062d\u0628\u0627 \u0928\u092e\u0938\u094d\u0924\u0947 \u0e2a\u0e27\u0e31\u0e2a\u0e14\u0e35"),
    ("controls", "a\u0000b\u0007c\u001bd\u007fe\u009ff"),
    ("bidi-and-format", "\u202aleft\u202c \u2066iso\u2069 \u200emark\u200f"),
    ("private-use", "x\ue000y \U000f0000z"),
    ("unassigned-in-14", "kawi\U00011f04letter pink\U0001fa77heart garay\U00010d50a riyal\u20c1sign"),
    ("new-after-14-alone", "\U0001fae8"),
    ("new-after-14-nfkc", "digit\U0001ccf0zero cyr\U0001e030a"),
    ("noncharacters", "a\ufdd0b\uffffc\U0010ffffd"),
    ("replacement-char", "broken\ufffdtext"),
)
INVALID_UTF8: tuple[Case, ...] = (
    ("invalid-utf8-byte", b"charger \xff ok"),
    ("invalid-utf8-truncated", b"caf\xc3 closed \xf0\x9f\x91"),
    ("invalid-utf8-overlong", b"slash\xc0\xafhere"),
    ("invalid-utf8-surrogate", b"x\xed\xa0\x80y"),
    ("invalid-utf8-continuation", b"\x80\x80lonely\xbf"),
)


def fullwidth(text: str) -> str:
    """ASCII ! .. ~ replaced by their fullwidth forms (U+FF01..U+FF5E)."""
    return "".join(chr(ord(c) + FULLWIDTH_OFFSET) if "!" <= c <= "~" else c for c in text)


def vocab_cases(vocab: Sequence[str], spec: TokenizerSpec) -> list[Case]:
    """The bundle's own tokens in each trap: case, fullwidth, separators, accents, the cap."""
    step = max(len(vocab) - 1, 1) / max(VOCAB_WORDS - 1, 1)  # rows spread over the table, frequent to rare
    words = list(dict.fromkeys(vocab[round(i * step)] for i in range(min(VOCAB_WORDS, len(vocab)))))
    if not words:
        return []
    line = " ".join(words)
    cases: list[Case] = [
        ("vocab-plain", line),
        ("vocab-upper", line.upper()),
        ("vocab-title", line.title()),
        ("vocab-fullwidth", fullwidth(line.upper())),
        ("vocab-nbsp", "\u00a0".join(words)),
        ("vocab-ideographic-space", "\u3000".join(words)),
        ("vocab-line-separator", "\u2028".join(words)),
        ("vocab-zero-width-space", "\u200b".join(words)),
        ("vocab-soft-hyphen", " ".join(w[:1] + "\u00ad" + w[1:] for w in words)),
        ("vocab-nfd", " ".join(_decompose_friendly(w) for w in words)),
        ("vocab-emoji-vs16", " ".join(f"{w}\u2764\ufe0f" for w in words)),
        ("vocab-new-after-14", "\U00011f04".join(words)),
        ("vocab-typographic", " ".join(w.replace("'", "\u2019") for w in words)),
        ("vocab-dotted-i", " ".join(w.upper().replace("I", "\u0130") for w in words)),
    ]
    # "ss" spelt with a sharp s: lower() keeps "ß" (another token), casefold() turns it back into "ss"
    sharp = [t for t in vocab if "ss" in t][:VOCAB_WORDS]
    if sharp:
        cases.append(("vocab-sharp-s", " ".join(t.upper().replace("SS", "\u00df") for t in sharp)))
        cases.append(("vocab-capital-sharp-s", " ".join(t.replace("ss", "\u1e9e") for t in sharp)))
    for cap_extra in (0, 1, 7):  # exactly at, just past and well past max_tokens
        n = spec.max_tokens + cap_extra
        cases.append((f"past-max-tokens+{cap_extra}", " ".join(words[i % len(words)] for i in range(n))))
    return cases


def _decompose_friendly(word: str) -> str:
    """The word with a combining acute accent after its first vowel (an NFD-style spelling)."""
    for i, c in enumerate(word):
        if c in "aeiou":
            return word[: i + 1] + "\u0301" + word[i + 1 :]
    return word + "\u0301"


def stress_cases(vocab: Sequence[str], spec: TokenizerSpec, extra: Sequence[str] = ()) -> list[Case]:
    """Fixed cases, invalid UTF-8, the vocabulary cases, then the user's own texts (`--texts`)."""
    return [*FIXED, *INVALID_UTF8, *vocab_cases(vocab, spec), *((f"user-{i}", t) for i, t in enumerate(extra))]
