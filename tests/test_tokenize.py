"""Tests of the one tokenizer (runtime/tokenize.py).

External references: `unicodedata` (Python stdlib) is the source of NFKC and of
Unicode general categories; `str.lower` / `str.casefold` (stdlib) the source of case
mapping; the UTF-8 decoder of the stdlib (`bytes.decode`) the source of U+FFFD
replacement. Tests named `test_bug_*` fail on purpose: they show a defect reported
to the lead and pass once it is fixed.
"""

from __future__ import annotations

import dataclasses
import json
import re
import unicodedata

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from danpack.runtime.errors import DanpackError, TokenizerError
from danpack.runtime.tokenize import ASCII_PRESETS, DEFAULT_PATTERN, PRESETS, Tokenizer, TokenizerSpec

TOK = Tokenizer()

# Characters that make tokenization interesting: letters of several scripts, a
# combining mark, punctuation used inside words, emoji with modifier / ZWJ / VS16,
# invisible format characters, and several kinds of whitespace.
TRICKY = list(
    "aZ09'-_.,!?\"() \t\n\u00a0\u2028\u3000"
    "éЖж你好مر\u0301\u0307ßİﬁＡ½"
    "\u200d\ufe0f\ufe0e\ufffd\u00ad\u200b\ufeff"
) + ["👍", "🏽", "❤", "👨"]
tricky_text = st.text(alphabet=st.sampled_from(TRICKY), max_size=40)
any_text = st.text(max_size=60)  # every code point except surrogates
# database=None: no .hypothesis folder in the working directory.
FAST = settings(max_examples=300, deadline=None, database=None, suppress_health_check=[HealthCheck.too_slow])


def stdlib_pinned(text: str) -> str:
    """The Unicode pin by the stdlib's own categories (Python 3.11: Unicode 14.0.0, the pinned version):
    unassigned code points (Cn) become spaces before anything else (tests/test_unicode_pin.py)."""
    return "".join(" " if unicodedata.category(c) == "Cn" else c for c in text)


# --- basic inputs -------------------------------------------------------------------

def test_empty_text_has_no_tokens():
    assert TOK.tokenize("") == []
    assert TOK.tokenize_bytes(b"") == []


@pytest.mark.parametrize("text", [" ", "   ", "\t\n\r\f\v", "\u00a0\u2003\u3000", "\u2028\u2029", "\ufe0f\u200d"])
def test_whitespace_and_joiners_only_have_no_tokens(text):
    # U+00A0, U+2003, U+3000, U+2028/9 are White_Space in Unicode (str.isspace, stdlib);
    # VS16 and ZWJ are separators by the tokenizer's documented pattern.
    assert TOK.tokenize(text) == []


def test_mixed_scripts_split_at_spaces_and_lowercase():
    text = "Hello ПРИВЕТ 你好世界 مرحبا"
    assert TOK.tokenize(text) == ["hello", "привет", "你好世界", "مرحبا"]
    # Case mapping of Cyrillic comes from str.lower (stdlib).
    assert "ПРИВЕТ".lower() == "привет"


def test_cjk_run_is_one_token_not_segmented():
    # Han characters are \w, so a run without spaces stays one token (a regex tokenizer
    # does no word segmentation; common practice for such tokenizers).
    assert TOK.tokenize("充电桩坏了") == ["充电桩坏了"]
    assert TOK.tokenize("充电桩 坏了") == ["充电桩", "坏了"]


def test_scripts_adjacent_without_space_stay_one_word():
    # Letters of any script are \w: Latin glued to Cyrillic is a single word token.
    assert TOK.tokenize("abcЖЖ") == ["abcжж"]


# --- emoji ----------------------------------------------------------------------------
# Documented behaviour: each emoji code point is a token of its own; VS15/VS16 and
# the zero-width joiner are dropped (separators); skin-tone modifiers, regional
# indicators and the keycap mark become tokens of their own.

def test_single_emoji_is_one_token():
    assert TOK.tokenize("👍") == ["👍"]


def test_repeated_emoji_give_one_token_each():
    # Repetition is kept: "👍👍👍" weighs three times in the mean.
    assert TOK.tokenize("great👍👍👍") == ["great", "👍", "👍", "👍"]


def test_variation_selector_is_dropped():
    # "❤️" (U+2764 U+FE0F) and "❤" become the same token.
    assert TOK.tokenize("\u2764\ufe0f") == ["\u2764"]
    assert TOK.tokenize("\u263a\ufe0e") == ["\u263a"]
    assert TOK.tokenize("\u2764\ufe0f") == TOK.tokenize("\u2764")


def test_zwj_sequence_splits_into_component_emoji():
    family = "\U0001F468\u200d\U0001F469\u200d\U0001F467"  # man ZWJ woman ZWJ girl
    assert TOK.tokenize(family) == ["\U0001F468", "\U0001F469", "\U0001F467"]


def test_skin_tone_modifier_is_its_own_token():
    assert TOK.tokenize("👍🏽") == ["👍", "🏽"]
    # ZWJ with a modifier: woman, medium-dark skin tone, ZWJ, laptop.
    assert TOK.tokenize("👩🏾\u200d💻") == ["👩", "🏾", "💻"]


def test_flag_and_keycap_split_into_code_points():
    assert TOK.tokenize("\U0001F1EB\U0001F1F7") == ["\U0001F1EB", "\U0001F1F7"]  # two regional indicators
    # Keycap one: "1", VS16 (category Mn) and U+20E3 COMBINING ENCLOSING KEYCAP (Me):
    # combining marks continue a word after a letter or digit, so the keycap is one token.
    assert TOK.tokenize("1\ufe0f\u20e3") == ["1\ufe0f\u20e3"]
    assert TOK.tokenize("1\u20e3") == ["1\u20e3"]


def test_emoji_glued_to_word_is_separated():
    assert TOK.tokenize("fast⚡charger") == ["fast", "⚡", "charger"]


# --- words, numbers, punctuation ------------------------------------------------------

@pytest.mark.parametrize("text, tokens", [
    ("don't", ["don't"]),
    ("rock'n'roll", ["rock'n'roll"]),
    ("type-2", ["type-2"]),
    ("plug-and-charge", ["plug-and-charge"]),
    ("'quoted'", ["'", "quoted", "'"]),  # apostrophes at the edges are marks of their own
    ("-dash-", ["-", "dash", "-"]),
    ("a--b", ["a", "-", "-", "b"]),  # only a single inner joiner binds
    ("it's-ok", ["it's-ok"]),
    ("end-", ["end", "-"]),
    ("o'", ["o", "'"]),
])
def test_inner_apostrophes_and_hyphens(text, tokens):
    assert TOK.tokenize(text) == tokens


def test_typographic_apostrophe_keeps_the_word_whole():
    # U+2019 (the apostrophe phone keyboards type) joins a word like "'" does; NFKC keeps it
    # (unicodedata), so "don’t" and "don't" stay distinct tokens.
    assert unicodedata.normalize("NFKC", "\u2019") == "\u2019"
    assert TOK.tokenize("don\u2019t") == ["don\u2019t"]


@pytest.mark.parametrize("text, tokens", [
    ("22", ["22"]),
    ("22kW", ["22kw"]),
    ("5.0", ["5", ".", "0"]),  # the pattern's comment: split at the dot
    ("1,000", ["1", ",", "000"]),
    ("-5", ["-", "5"]),
    ("3-4", ["3-4"]),
    ("\u0663\u0664", ["\u0663\u0664"]),  # Arabic-Indic digits are \w digits
    ("\u00bd", ["1", "\u2044", "2"]),  # NFKC: VULGAR FRACTION ONE HALF -> 1 FRACTION SLASH 2
    ("x\u00b2", ["x2"]),  # NFKC: SUPERSCRIPT TWO -> 2
])
def test_numbers(text, tokens):
    assert TOK.tokenize(text) == tokens


@pytest.mark.parametrize("mark", list("!?.,;:()[]{}\"'-/\\@#$%&*+=<>|~^`") + ["\u00bf", "\u3002", "\u060c"])
def test_single_punctuation_mark_is_one_token(mark):
    assert TOK.tokenize(mark) == [mark]
    assert TOK.tokenize(mark * 3) == [mark] * 3
    assert TOK.tokenize(f"ok{mark}") == ["ok", mark]


def test_underscore_is_dropped_silently():
    # Documented current behaviour (reported to the lead): "_" is \w, so it is excluded
    # from both alternatives of the pattern and vanishes, although the pattern's comment
    # says every other visible character becomes a token.
    assert TOK.tokenize("x_y") == ["x", "y"]
    assert TOK.tokenize("___") == []


# --- length -------------------------------------------------------------------------------

def test_max_tokens_keeps_the_first_tokens_in_order():
    tok = Tokenizer(TokenizerSpec(max_tokens=3))
    assert tok.tokenize("one two three four five") == ["one", "two", "three"]
    assert tok.tokenize("one two") == ["one", "two"]


def test_max_tokens_one():
    assert Tokenizer(TokenizerSpec(max_tokens=1)).tokenize("a b c") == ["a"]


def test_default_cap_is_512_tokens():
    assert len(TOK.tokenize("w " * 2000)) == 512


def test_one_megabyte_text_completes():
    # 1 MiB of comment-like text; no timing assertion (performance lives in bench/).
    unit = "Charger 7 was slow, don't use it!! 👍 "
    text = (unit * (2**20 // len(unit.encode()) + 1))
    assert len(text.encode()) >= 2**20
    tokens = TOK.tokenize(text)
    assert len(tokens) == 512
    assert tokens[:9] == ["charger", "7", "was", "slow", ",", "don't", "use", "it", "!"]
    big = TOK.split(TOK.normalize(text))  # the uncapped split (max_tokens is capped at MAX_TOKENS_LIMIT)
    assert len(big) == 11 * text.count("Charger")  # 11 tokens per unit
    assert TOK.tokenize_bytes(text.encode()) == tokens


# --- normalisation and case ------------------------------------------------------------------

@pytest.mark.parametrize("text, tokens", [
    ("ＣＨＡＲＧＥＲ", ["charger"]),  # fullwidth Latin -> ASCII (NFKC)
    ("\ufb01ne", ["fine"]),  # U+FB01 LATIN SMALL LIGATURE FI -> "fi" (NFKC)
    ("\ufb02at", ["flat"]),  # U+FB02 LATIN SMALL LIGATURE FL
    ("\u2160", ["i"]),  # ROMAN NUMERAL ONE -> "I" -> lower
    ("\u01c5", ["d\u017e"]),  # LATIN CAPITAL D WITH SMALL Z WITH CARON -> "Dž" -> "dž"
    ("cafe\u0301", ["caf\u00e9"]),  # NFKC composes e + COMBINING ACUTE into é
    ("\U0001d400\U0001d401", ["ab"]),  # MATHEMATICAL BOLD CAPITAL A, B
    ("ＯＫ！", ["ok", "!"]),  # fullwidth exclamation -> "!"
])
def test_nfkc_normalisation(text, tokens):
    # Source: unicodedata.normalize("NFKC", ...) (Python stdlib) then str.lower.
    assert unicodedata.normalize("NFKC", text).lower() == "".join(tokens)
    assert TOK.tokenize(text) == tokens


def test_normalization_none_keeps_compatibility_characters():
    tok = Tokenizer(TokenizerSpec(normalization="none"))
    # str.lower maps fullwidth capitals to fullwidth small letters (stdlib), no NFKC.
    assert tok.tokenize("ＣＨＡＲＧＥＲ") == ["ｃｈａｒｇｅｒ"]
    assert tok.tokenize("\ufb01ne") == ["\ufb01ne"]


@pytest.mark.parametrize("form", ["NFC", "NFKC", "NFD", "NFKD"])
def test_normalize_uses_the_stdlib_form(form):
    text = "Ｃafé \ufb01 \u00bd Ω"
    tok = Tokenizer(TokenizerSpec(normalization=form, case="keep"))
    assert tok.normalize(text) == unicodedata.normalize(form, text)


@pytest.mark.parametrize("case, expected", [
    ("lower", ["straße", "σας"]),
    ("casefold", ["strasse", "σασ"]),  # CaseFolding.txt: ß -> ss, final sigma -> σ (from memory)
    ("keep", ["Straße", "ΣΑΣ"]),
])
def test_case_options(case, expected):
    tok = Tokenizer(TokenizerSpec(case=case))
    assert tok.tokenize("Straße ΣΑΣ") == expected
    oracle = {"lower": str.lower, "casefold": str.casefold, "keep": lambda s: s}[case]
    assert [oracle(w) for w in ["Straße", "ΣΑΣ"]] == expected


def test_dotted_capital_i_lowercases_to_i_plus_combining_dot():
    # str.lower("İ") == "i̇" (i + U+0307, SpecialCasing); the combining dot continues the word.
    assert "\u0130".lower() == "i\u0307"
    assert TOK.tokenize("\u0130stanbul") == ["i\u0307stanbul"]


# --- bytes ----------------------------------------------------------------------------------

@pytest.mark.parametrize("data, tokens", [
    (b"ab\xffcd", ["ab", "cd"]),  # invalid byte -> U+FFFD -> separator
    (b"caf\xc3", ["caf"]),  # truncated 2-byte sequence at the end
    (b"\xe2\x82", []),  # truncated 3-byte sequence alone
    (b"a\xc0\xafb", ["a", "b"]),  # overlong "/" is not decoded to "/"
    (b"x\xed\xa0\x80y", ["x", "y"]),  # encoded surrogate is invalid UTF-8
    (b"ok\x80\x80!", ["ok", "!"]),
    ("élan \u2764\ufe0f".encode(), ["élan", "\u2764"]),
])
def test_tokenize_bytes_invalid_utf8_separates_tokens(data, tokens):
    assert TOK.tokenize_bytes(data) == tokens
    # The stdlib decoder is the reference for where U+FFFD goes.
    assert TOK.tokenize_bytes(data) == TOK.tokenize(data.decode("utf-8", errors="replace").replace("\ufffd", " "))


def test_replacement_character_in_text_is_a_separator():
    assert TOK.tokenize("ab\ufffdcd") == ["ab", "cd"]


# --- is_reachable -------------------------------------------------------------------------------

@pytest.mark.parametrize("token, reachable", [
    ("hello", True),
    ("don't", True),
    ("👍", True),
    ("!", True),
    ("Hello", False),  # the default spec lowercases
    ("two words", False),
    ("", False),
    ("\ufb01", False),  # NFKC turns the ligature into "fi"
    ("\u2764\ufe0f", False),  # VS16 is dropped
    ("5.0", False),
    ("a_b", False),
    ("-a", False),
])
def test_is_reachable(token, reachable):
    assert TOK.is_reachable(token) is reachable


def test_is_reachable_depends_on_the_spec():
    assert Tokenizer(TokenizerSpec(case="keep")).is_reachable("Hello")
    assert Tokenizer(TokenizerSpec(normalization="none")).is_reachable("\ufb01")


# --- spec validation --------------------------------------------------------------------------

@pytest.mark.parametrize("kwargs, fragment", [
    ({"normalization": "NFX"}, "normalization 'NFX'"),
    ({"normalization": "nfkc"}, "normalization 'nfkc'"),
    ({"normalization": None}, "normalization None"),
    ({"case": "upper"}, "case 'upper'"),
    ({"case": ""}, "case ''"),
    ({"max_tokens": 0}, "max_tokens"),
    ({"max_tokens": -1}, "max_tokens"),
    ({"max_tokens": 1.5}, "max_tokens"),
    ({"max_tokens": "512"}, "max_tokens"),
    ({"max_tokens": True}, "max_tokens"),
    ({"pattern": ""}, "pattern"),
    ({"pattern": None}, "pattern"),
    ({"pattern": r"(\w+)"}, "capturing groups"),
    ({"pattern": r"(?P<word>\w+)"}, "capturing groups"),
    ({"pattern": r"\w+|(x)(y)"}, "found 2"),
    ({"pattern": "[a-"}, "does not compile"),
    ({"pattern": "(?:"}, "does not compile"),
    ({"pattern": "*"}, "does not compile"),
])
def test_spec_validation_errors(kwargs, fragment):
    with pytest.raises(TokenizerError) as info:
        TokenizerSpec(**kwargs)
    assert fragment in str(info.value)
    assert isinstance(info.value, DanpackError) and isinstance(info.value, ValueError)


def test_spec_refuses_groups_and_lookarounds_outside_the_linear_grammar():
    with pytest.raises(TokenizerError, match="outside the linear-time grammar"):
        TokenizerSpec(pattern=r"(?:\w+)(?=\s|$)|(?<=\s)[!?]")


def test_spec_is_frozen():
    spec = TokenizerSpec()
    with pytest.raises(dataclasses.FrozenInstanceError):
        spec.case = "keep"  # type: ignore[misc]


def test_spec_defaults():
    spec = TokenizerSpec()
    assert (spec.normalization, spec.case, spec.pattern, spec.max_tokens) == ("NFKC", "lower", DEFAULT_PATTERN, 512)


@pytest.mark.parametrize("spec", [
    TokenizerSpec(),
    TokenizerSpec(normalization="none", case="keep", pattern=r"\S+", max_tokens=7),
    TokenizerSpec(normalization="NFD", case="casefold", max_tokens=1),
])
def test_spec_round_trip_through_dict_and_json(spec):
    data = spec.to_dict()
    assert set(data) == {"normalization", "case", "pattern", "max_tokens", "unicode_version"}
    assert TokenizerSpec.from_dict(data) == spec
    # The dict is stored in dan.json / the manifest: it must survive JSON (stdlib json).
    assert TokenizerSpec.from_dict(json.loads(json.dumps(data))) == spec


def test_spec_from_partial_dict_uses_defaults():
    assert TokenizerSpec.from_dict({}) == TokenizerSpec()
    assert TokenizerSpec.from_dict({"case": "keep"}) == TokenizerSpec(case="keep")


def test_spec_from_dict_rejects_unknown_fields():
    with pytest.raises(TokenizerError) as info:
        TokenizerSpec.from_dict({"case": "lower", "lowercase": True, "strip_accents": 1})
    assert "['lowercase', 'strip_accents']" in str(info.value)


@pytest.mark.parametrize("data", [None, [], "NFKC", 3])
def test_spec_from_dict_rejects_non_mapping(data):
    with pytest.raises(TokenizerError, match="must be a mapping"):
        TokenizerSpec.from_dict(data)


def test_spec_from_dict_validates_values():
    with pytest.raises(TokenizerError, match="max_tokens"):
        TokenizerSpec.from_dict({"max_tokens": 0})


# --- properties (hypothesis) ------------------------------------------------------------------

@FAST
@given(st.one_of(tricky_text, any_text))
def test_tokens_are_never_empty_and_never_contain_whitespace(text):
    for token in TOK.tokenize(text):
        assert token
        assert not any(ch.isspace() for ch in token)  # str.isspace is the Unicode White_Space test


@FAST
@given(st.one_of(tricky_text, any_text))
def test_tokenizing_joined_tokens_gives_the_same_tokens(text):
    # Idempotence for the default spec: joining the tokens with spaces and tokenizing
    # again is a fixed point. (Also checked exhaustively over every single code point,
    # alone and next to "a", while writing these tests: no counterexample.)
    tokens = TOK.tokenize(text)
    assert TOK.tokenize(" ".join(tokens)) == tokens


@FAST
@given(st.one_of(tricky_text, any_text))
def test_every_produced_token_is_reachable(text):
    for token in TOK.tokenize(text):
        assert TOK.is_reachable(token)


@FAST
@given(st.one_of(tricky_text, any_text), st.integers(min_value=1, max_value=8))
def test_max_tokens_is_a_prefix_cap(text, cap):
    capped = Tokenizer(TokenizerSpec(max_tokens=cap)).tokenize(text)
    full = TOK.split(TOK.normalize(text))
    assert capped == full[:cap]


@FAST
@given(st.one_of(tricky_text, any_text))
def test_normalize_matches_stdlib_nfkc_then_lower(text):
    # unassigned code points (category Cn in unicodedata, whose tables on Python 3.11 are the pinned 14.0.0)
    # become spaces first: tests/test_unicode_pin.py
    assert TOK.normalize(text) == unicodedata.normalize("NFKC", stdlib_pinned(text)).lower()


@FAST
@given(st.one_of(tricky_text, any_text))
def test_tokenize_bytes_of_valid_utf8_equals_tokenize(text):
    assert TOK.tokenize_bytes(text.encode("utf-8")) == TOK.tokenize(text)


@FAST
@given(st.binary(max_size=80))
def test_tokenize_bytes_never_raises_and_never_yields_replacement_char(data):
    tokens = TOK.tokenize_bytes(data)
    assert all("\ufffd" not in t and t for t in tokens)


# --- defects reported to the lead (fail until fixed) ---------------------------------------------

@pytest.mark.parametrize("word", [
    "नमस्ते",  # Devanagari: virama and vowel signs are combining marks (Mn/Mc)
    "سَلَام",  # Arabic with harakat (Mn)
    "ใช้ได้",  # Thai with tone marks (Mn)
])
def test_bug_combining_marks_split_words(word):
    # A combining mark is not \w in Python `re` (unicodedata category M*), so the
    # default pattern cuts the word at every mark and makes the mark its own token.
    assert any(unicodedata.category(ch).startswith("M") for ch in word)
    assert TOK.tokenize(word) == [unicodedata.normalize("NFKC", word)]


def test_bug_combining_marks_split_words_under_nfd():
    # With normalization "NFD" every accented Latin letter is cut: "café" -> "cafe", "́".
    tok = Tokenizer(TokenizerSpec(normalization="NFD"))
    assert tok.tokenize("café") == [unicodedata.normalize("NFD", "café")]


@pytest.mark.parametrize("text", [
    "char\u00adging",  # SOFT HYPHEN inside a word (Cf)
    "a\u200bb",  # ZERO WIDTH SPACE (Cf)
    "\ufeffhello",  # BYTE ORDER MARK at the start of a line (Cf)
    "word\u2060joiner",  # WORD JOINER (Cf)
    "bell\x07",  # a C0 control character (Cc)
])
def test_bug_invisible_format_and_control_characters_become_tokens(text):
    # The pattern's comment says only *visible* characters become tokens; these are
    # invisible (unicodedata category Cf / Cc) yet each becomes a token of its own.
    tokens = TOK.tokenize(text)
    assert not any(unicodedata.category(ch) in ("Cf", "Cc") for t in tokens for ch in t), tokens


def test_bug_pattern_that_matches_the_empty_string_yields_empty_tokens():
    # TokenizerSpec accepts a pattern that can match "", and findall then returns empty
    # tokens (which an "unk" OOV policy would count in the mean). Either the spec should
    # refuse such a pattern or tokenize should drop empty matches.
    try:
        tok = Tokenizer(TokenizerSpec(pattern=r"a*"))
    except TokenizerError:
        return
    assert "" not in tok.tokenize("bbb")


# --- the ASCII fast path -------------------------------------------------------------
# Every ASCII string must split exactly as the full preset pattern splits it (Python `re`,
# stdlib, is the oracle). The alphabet is all 128 code points, so controls, "_" and every
# punctuation mark are drawn.

ascii_text = st.text(alphabet=st.characters(max_codepoint=127), max_size=80)


@pytest.mark.parametrize("preset", sorted(ASCII_PRESETS))
@given(text=ascii_text)
@settings(max_examples=2000, deadline=None, database=None)
def test_ascii_preset_splits_like_the_full_pattern(preset, text):
    import re

    assert re.findall(ASCII_PRESETS[preset], text) == re.findall(PRESETS[preset], text)


@pytest.mark.parametrize("code", range(128))
def test_ascii_preset_agrees_on_every_single_character(code):
    import re

    text = f"a{chr(code)}b {chr(code)}"
    for preset, pattern in ASCII_PRESETS.items():
        assert re.findall(pattern, text) == re.findall(PRESETS[preset], text), (preset, repr(chr(code)))


@pytest.mark.parametrize("case", ["lower", "casefold", "keep"])
def test_tokenize_takes_the_same_tokens_with_and_without_the_fast_path(case):
    tok = Tokenizer(TokenizerSpec(case=case))
    for text in ["Don't STOP-me now, it's 5.0!", "type-2 -- ok_then 'quoted' a--b", "x\x00y\x7fz ~`^"]:
        assert tok.tokenize(text) == tok._findall(tok.normalize(text))


def test_custom_pattern_never_yields_empty_tokens():
    # r"\b" passes the spec check (it cannot match the whole empty string) but matches empty strings
    # between words; such matches are dropped, as every token must be non-empty.
    with pytest.raises(TokenizerError, match="the escape \\\\b is not allowed"):
        TokenizerSpec(pattern=r"\b|[a-z]+")  # the grammar now refuses anchors: every branch starts with an atom
    tok = Tokenizer(TokenizerSpec(pattern=r"[a-z]+"))
    assert tok.tokenize("card declined") == ["card", "declined"]


@FAST
@given(st.one_of(tricky_text, ascii_text, any_text), st.integers(min_value=1, max_value=8),
       st.sampled_from([DEFAULT_PATTERN, r"[a-z]+|[^a-z\s]"]))
def test_lazy_split_of_long_texts_equals_the_full_split(text, cap, pattern):
    # texts longer than max_tokens characters take the lazy path; its tokens must be the full split's prefix
    capped = Tokenizer(TokenizerSpec(pattern=pattern, max_tokens=cap))
    assert capped.tokenize(text) == capped.split(capped.normalize(text))[:cap]


# --- the presets users train with -------------------------------------------------------------

@FAST
@given(st.one_of(tricky_text, any_text))
def test_wordpunct_preset_is_the_common_training_split(text):
    # source: Python's re, as a PyTorch training script calls it: re.findall(r"\w+|[^\w\s]", text.lower())
    tok = Tokenizer(TokenizerSpec(pattern="wordpunct-v1", normalization="none", case="lower", max_tokens=1024))
    # 1024: the max_tokens cap; the pinned text: code points unassigned in Unicode 14.0.0 are separators first
    assert tok.tokenize(text) == re.findall(r"\w+|[^\w\s]", stdlib_pinned(text).lower())[:1024]


@FAST
@given(st.one_of(tricky_text, any_text))
def test_spaces_preset_is_str_split(text):
    tok = Tokenizer(TokenizerSpec(pattern="spaces-v1", normalization="none", case="keep", max_tokens=1024))
    assert tok.tokenize(text) == stdlib_pinned(text).split()[:1024]  # 1024: the max_tokens cap


@pytest.mark.parametrize("pattern, text, tokens", [
    ("wordpunct-v1", "I doesn't know 🙂\ufe0f", ["i", "doesn", "'", "t", "know", "🙂", "\ufe0f"]),
    ("spaces-v1", "I doesn't know!", ["i", "doesn't", "know!"]),
])
def test_presets_on_examples(pattern, text, tokens):
    assert Tokenizer(TokenizerSpec(pattern=pattern, normalization="none")).tokenize(text) == tokens
