"""The absent list's fingerprint set (runtime/fingerprints.py): its layout is the README's, it is compact, the
reader refuses everything but the one encoding, and the packer never lists a fingerprint a float token has.

The oracle is the README's bundle specification worked in Python's unbounded integers, bit by bit; Elias–Fano's
size, N·(2 + ⌈log2(U/N)⌉) bits at most, is the published bound (from memory)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from danpack.runtime.certify import hash_token
from danpack.runtime.fingerprints import decode_fingerprints, encode_fingerprints, fingerprint, split_of


def spec_decode(field: dict) -> list[int]:
    """The README's layout, read bit by bit: value i = (p_i − i)·2^s + (low bits i·s .. i·s + s − 1), p_i the
    position of the i-th set bit of `high`; s = bits − ⌈log2 count⌉ (not below 0)."""
    bits, n = field["bits"], field["count"]
    s = max(bits - (n - 1).bit_length(), 0)
    low = int.from_bytes(field["low"], "little")
    high = int.from_bytes(field["high"], "little")
    positions = [j for j in range(8 * len(field["high"])) if high >> j & 1]
    return [((p - i) << s) | (low >> (i * s) & ((1 << s) - 1)) for i, p in enumerate(positions)]


@st.composite
def fingerprint_sets(draw):
    bits = draw(st.integers(1, 32))
    values = draw(st.sets(st.integers(0, 2**bits - 1), min_size=1, max_size=60))
    return bits, sorted(values)


@settings(max_examples=300, deadline=None)
@given(fingerprint_sets())
def test_sets_round_trip_in_the_documented_layout(case):
    bits, values = case
    field = encode_fingerprints(np.array(values, np.uint64), bits)
    assert field["count"] == len(values) and field["bits"] == bits
    assert spec_decode(field) == values
    assert decode_fingerprints(field).tolist() == values
    n, s = len(values), split_of(bits, len(values))
    assert len(field["low"]) == -(-n * s // 8) and field["high"][-1] != 0
    per_value = 2 + max(0, math.ceil(math.log2(2**bits / n)))  # Elias–Fano's bound, plus two bytes' padding
    assert 8 * (len(field["low"]) + len(field["high"])) <= n * per_value + 16


def test_size_per_value_on_a_glove_sized_list():
    """4,400 fingerprints of 24 bits (the GloVe scale: ⌈log2(32 × 400,000)⌉ = 24) take under 14 bits each."""
    rng = np.random.default_rng(3)
    values = np.unique(rng.integers(0, 2**24, 4400, dtype=np.uint64))
    field = encode_fingerprints(values, 24)
    assert 8 * (len(field["low"]) + len(field["high"])) / values.size < 14.0


VALID = {"bits": 8, "count": 2, "low": bytes([0x05, 0x03]), "high": b"\x03"}  # values 5 and 6 (split 7)


@pytest.mark.parametrize("field, problem", [
    ({**VALID, "count": 9}, "must be a map"),  # 9 values cannot fit 8 bits of high
    ({**VALID, "count": True}, "must be a map"),
    ({**VALID, "bits": 0}, "must be a map"),
    ({**VALID, "bits": 33}, "must be a map"),
    ({**VALID, "spare": 1}, "must be a map"),
    ({**VALID, "low": "ab"}, "must be a map"),
    ([5, 6], "must be a map"),
    ({**VALID, "high": b"\x07"}, "does not decode"),  # three set bits for two values
    ({**VALID, "high": b"\x03\x00"}, "does not decode"),  # a spare byte
    ({**VALID, "low": bytes([0x05, 0x43])}, "does not decode"),  # a padding bit
    ({**VALID, "low": bytes([0x05])}, "does not decode"),  # too few low bits
    ({**VALID, "low": bytes([0x86, 0x02])}, "does not decode"),  # 6 then 5
    ({**VALID, "low": bytes([0x85, 0x02])}, "does not decode"),  # 5 twice
    ({"bits": 2, "count": 1, "low": b"\x01", "high": b"\x02"}, "does not decode"),  # split 2: value 5 ≥ 2^2
])
def test_reader_refuses_all_but_the_one_encoding(field, problem):
    assert decode_fingerprints(VALID).tolist() == [5, 6]
    with pytest.raises(ValueError, match=problem):
        decode_fingerprints(field)


def test_fingerprints_are_the_top_bits_of_fnv1a():
    h = np.array([hash_token("foobar"), 0xFFFFFFFF, 0], np.uint32)  # FNV-1a("foobar") = 0xBF9CF968
    assert fingerprint(h, 32).tolist() == [0xBF9CF968, 0xFFFFFFFF, 0]
    assert fingerprint(h, 12).tolist() == [0xBF9, 0xFFF, 0]
    assert fingerprint(h, 1).tolist() == [1, 1, 0]


def test_packer_never_lists_a_float_tokens_fingerprint():
    """With one fingerprint value per float token (spread 1), collisions are common: every listed fingerprint is
    still none of the float tokens', some corpus tokens are dropped for it, and the rest are all listed."""
    from danpack.pack.envelope import EnvelopeOptions, unknown_envelope
    from tests.test_bound import random_model

    rng = np.random.default_rng(5)
    model = random_model(rng, vocab=200, dim=6, hidden=(4,))
    options = EnvelopeOptions(absent_spread=1, absent_min_count=1)
    bits = options.fingerprint_bits(len(model.vocab))
    assert bits == 8  # ⌈log2 200⌉
    corpus = tuple((f"never{i}", 1) for i in range(300))
    field = unknown_envelope(model, np.arange(20), False, corpus, options)
    listed = set(decode_fingerprints(field["absent"]).tolist())
    float_prints = set(fingerprint(np.array([hash_token(t) for t in model.vocab], np.uint32), bits).tolist())
    corpus_prints = set(fingerprint(np.array([hash_token(t) for t, _ in corpus], np.uint32), bits).tolist())
    assert listed and not listed & float_prints
    assert listed == corpus_prints - float_prints and corpus_prints & float_prints


def test_a_listed_fingerprint_empties_the_slot_of_every_token_that_has_it():
    """The device matches fingerprints, not tokens: a listed corpus token, and any other token with the same
    fingerprint (it cannot be a float token either), takes the empty slot; other unknown tokens keep their bucket."""
    from danpack.pack.envelope import EnvelopeOptions, unknown_envelope
    from danpack.runtime.certify import Envelope, read_absent
    from tests.test_bound import random_model

    rng = np.random.default_rng(9)
    model = random_model(rng, vocab=60, dim=6, hidden=(4,))
    options = EnvelopeOptions(absent_min_count=1)
    field = unknown_envelope(model, np.arange(10), False, (("typo", 1),), options)
    absent, bits = read_absent(field["absent"])
    env = Envelope(field["rows"], True, np.asarray(field["lo"]), np.asarray(field["hi"]), np.zeros((16, 2, 6)),
                   absent, bits)
    target = fingerprint(np.array([hash_token("typo")], np.uint32), bits)[0]
    twin = next(t for t in (f"x{i}" for i in range(1 << 20))
                if fingerprint(np.array([hash_token(t)], np.uint32), bits)[0] == target)
    assert bits == 11 and absent.tolist() == [target]  # ⌈log2(32 × 60)⌉
    assert env.slot_of("typo") == env.slot_of(twin) == 17  # K + 1: the empty slot
    assert env.slot_of("w3") == hash_token("w3") % 16  # a pruned float token: its bucket
