"""The tokenizer's pinned Unicode version (runtime/tokenize.py, runtime/unicode_pinned.py).

External references: `unicodedata` (Python stdlib, whose tables on Python 3.11 are Unicode 14.0.0, the
pinned version) for general categories; `unicodedata.ucd_3_2_0` (stdlib) as a real older table to simulate
an interpreter whose tables are older than the pinned version. The characters new in Unicode 15.0-17.0 are
written down from memory of the published Unicode code charts (each is checked here to be unassigned in
14.0.0; its assignment in the later version is from memory).
"""

from __future__ import annotations

import unicodedata

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from danpack.runtime import gen_unicode, tokenize
from danpack.runtime.errors import TokenizerError
from danpack.runtime.tokenize import PRESETS, Tokenizer, TokenizerSpec, pin_unassigned
from danpack.runtime.unicode_pinned import UNASSIGNED, UNICODE_VERSION

ON_PINNED_PYTHON = unicodedata.unidata_version == UNICODE_VERSION

# (code point, version, name, what a host with that version's tables would otherwise do) - from memory
NEWER_CHARACTERS = [
    (0x11F04, "15.0", "KAWI LETTER A", "a letter: \\w"),
    (0x11F50, "15.0", "KAWI DIGIT ZERO", "a decimal digit: \\w"),
    (0x1E4D0, "15.0", "NAG MUNDARI LETTER O", "a letter"),
    (0x1D2C0, "15.0", "KAKTOVIK NUMERAL ZERO", "a number (No): \\w"),
    (0x1DF25, "15.0", "LATIN SMALL LETTER D WITH MID-HEIGHT LEFT HOOK", "a letter"),
    (0x1E030, "15.0", "MODIFIER LETTER CYRILLIC SMALL A", "a letter with an NFKC mapping to U+0430"),
    (0x31350, "15.0", "CJK UNIFIED IDEOGRAPH-31350 (Extension H)", "a letter"),
    (0x10EFD, "15.0", "ARABIC SMALL LOW WORD SAKTA", "a combining mark"),
    (0x1FAE8, "15.0", "SHAKING FACE", "an emoji symbol"),
    (0x1FA77, "15.0", "PINK HEART", "an emoji symbol"),
    (0x2EBF0, "15.1", "CJK UNIFIED IDEOGRAPH-2EBF0 (Extension I)", "a letter"),
    (0x2FFC, "15.1", "IDEOGRAPHIC DESCRIPTION CHARACTER SURROUND FROM RIGHT", "a symbol"),
    (0x31EF, "15.1", "CJK STROKE HXG", "a symbol"),
    (0x10D50, "16.0", "GARAY CAPITAL LETTER A", "an upper-case letter with a lower-case mapping"),
    (0xA7CB, "16.0", "LATIN CAPITAL LETTER RAMS HORN", "an upper-case letter lowering to U+0264"),
    (0x16100, "16.0", "GURUNG KHEMA LETTER A", "a letter"),
    (0x116D0, "16.0", "MYANMAR PAO DIGIT ZERO", "a decimal digit"),
    (0x1CCF0, "16.0", "OUTLINED DIGIT ZERO", "a digit with an NFKC mapping to '0'"),
    (0x1FAE9, "16.0", "FACE WITH BAGS UNDER EYES", "an emoji symbol"),
    (0x20C1, "17.0", "SAUDI RIYAL SIGN", "a currency symbol"),
    (0x10940, "17.0", "SIDETIC LETTER N01", "a letter"),
    (0x11DB0, "17.0", "TOLONG SIKI LETTER I", "a letter"),
    (0x16EA0, "17.0", "BERIA ERFE CAPITAL LETTER ARKAB", "an upper-case letter"),
    (0x323B0, "17.0", "CJK UNIFIED IDEOGRAPH-323B0 (Extension J)", "a letter"),
    (0x1FAC8, "17.0", "HAIRY CREATURE", "an emoji symbol"),
]


def in_table(cp: int) -> bool:
    return any(a <= cp <= b for a, b in UNASSIGNED)


@pytest.mark.skipif(not ON_PINNED_PYTHON, reason="the generator runs only on tables of the pinned version")
def test_checked_in_table_is_what_the_generator_makes():
    # unicodedata (stdlib) on Python 3.11 is Unicode 14.0.0: the table is exactly its Cn code points
    assert gen_unicode.render_module(gen_unicode.unassigned_ranges()) == gen_unicode.TARGET.read_text(encoding="utf-8")
    assert gen_unicode.main(["--check"]) == 0


def test_table_is_sorted_disjoint_and_leaves_ascii_alone():
    assert UNICODE_VERSION == "14.0.0" == TokenizerSpec().unicode_version
    flat = [x for pair in UNASSIGNED for x in pair]
    assert flat == sorted(flat) and all(a <= b for a, b in UNASSIGNED)
    assert all(b + 1 < a2 for (_, b), (a2, _) in zip(UNASSIGNED, UNASSIGNED[1:]))  # maximal runs
    assert UNASSIGNED[0][0] > 0x7F  # ASCII is assigned in every version: the fast path skips the pin


@pytest.mark.parametrize("cp, version, name, otherwise", NEWER_CHARACTERS, ids=[f"U+{c[0]:04X}" for c in NEWER_CHARACTERS])
def test_characters_new_after_the_pinned_version_become_separators(cp, version, name, otherwise):
    c = chr(cp)
    assert in_table(cp)  # unassigned in 14.0.0
    if ON_PINNED_PYTHON:
        assert unicodedata.category(c) == "Cn"  # stdlib agrees on this Python
    # the pinned rule: the character is a separator, whatever this interpreter's tables say it is
    for preset in PRESETS:
        tok = Tokenizer(TokenizerSpec(pattern=preset))
        assert tok.normalize(f"Ab{c}Cd") == "ab cd"
        assert tok.tokenize(f"ab{c}cd") == ["ab", "cd"]
        assert tok.tokenize(c) == [] and tok.tokenize(c * 3 + " ok") == ["ok"]


def test_pinning_leaves_assigned_characters_and_ascii_alone():
    text = "Café ΟΔΟΣ ß ﬁ 👍🏽 \u200d \ufe0f 你好 \U0001F6DD"  # U+1F6DD SLIDE (Unicode 14.0): assigned, kept
    assert pin_unassigned(text) == text
    ascii_text = "plain ascii text"
    assert pin_unassigned(ascii_text) is ascii_text
    assert pin_unassigned("a\u0378b\U000E0080c\U0010FFFFd\uFFFFe") == "a b c d e"  # Cn in BMP, plane 14, 16; noncharacter


@settings(max_examples=300, deadline=None, database=None)
@given(st.text(max_size=60))
def test_pin_matches_the_stdlib_categories(text):
    if not ON_PINNED_PYTHON:
        pytest.skip("the reference needs stdlib tables of the pinned version")
    assert pin_unassigned(text) == "".join(" " if unicodedata.category(c) == "Cn" else c for c in text)


def test_spec_refuses_another_unicode_version():
    with pytest.raises(TokenizerError, match=r"unicode_version '15.0.0'.*pins \('14.0.0'\)"):
        TokenizerSpec.from_dict({"unicode_version": "15.0.0"})
    assert TokenizerSpec.from_dict({}).unicode_version == "14.0.0"  # bundles made before the field: the pinned one


def test_interpreter_with_older_tables_refuses_texts_it_cannot_read(monkeypatch):
    # Simulated with the stdlib's real Unicode 3.2.0 tables (unicodedata.ucd_3_2_0); Python 3.10 (13.0.0)
    # takes the same path. U+1F600 (emoji, Unicode 6.1) is assigned in 14.0.0 but unknown to 3.2.0.
    monkeypatch.setattr(tokenize, "_ucd", unicodedata.ucd_3_2_0)
    assert tokenize.tables_are_older()
    tok = Tokenizer()
    with pytest.raises(TokenizerError, match=r"U\+1F600 at index 8.*\(3\.2\.0\).*Python 3\.11 or newer"):
        tok.tokenize("charger \U0001F600")
    assert tok.tokenize("charger was great, café") == ["charger", "was", "great", ",", "café"]  # known to 3.2.0
    assert tok.tokenize("charger \U00011F04 ok") == ["charger", "ok"]  # unassigned in 14.0.0 too: a separator


def test_interpreter_with_the_pinned_or_newer_tables_checks_nothing(monkeypatch):
    class Newer:  # a host with Unicode 17 tables: nothing assigned in 14.0.0 is unknown to it
        unidata_version = "17.0.0"

        @staticmethod
        def category(c: str) -> str:
            raise AssertionError("no per-character check on newer tables")

    monkeypatch.setattr(tokenize, "_ucd", Newer)
    assert not tokenize.tables_are_older()
    assert Tokenizer().tokenize("charger \U0001F600 \U00011F04x") == ["charger", "\U0001F600", "x"]
