"""A sorted set of short token fingerprints in few bytes: the manifest's `unknown.absent` list.

A fingerprint is the top `bits` bits of a token's FNV-1a hash (`runtime/certify.py` `hash_token`). The set is
stored with Elias–Fano coding (P. Elias 1974, R. M. Fano 1971; a published construction, from memory): for N
strictly ascending values below 2^bits and split s = bits − ⌈log2 N⌉ (the largest s with N·2^s ≤ 2^bits),
  * `low`:  the low s bits of every value, value i at bits i·s .. i·s + s − 1 of a little-endian bit stream
            (bit j is bit j mod 8, least significant first, of byte j div 8), padded with zero bits to a byte;
  * `high`: a bit stream with bit (v_i >> s) + i set for every value i and no other, ending with the byte that
            holds the last set bit.
About 2 + bits − log2 N bits per value, against 32 for a plain hash list. The split is not stored: both readers
derive it from `bits` and `count`, so each set has exactly one encoding. Decoding is vectorised (numpy) and
bounded by the bytes present: a count beyond what `high` can hold is refused before any array is built.
"""

from __future__ import annotations

import numpy as np

FINGERPRINT_KEYS = {"bits", "count", "low", "high"}


def fingerprint(hashes: np.ndarray, bits: int) -> np.ndarray:
    """(N,) uint32 FNV-1a hashes -> (N,) uint64 fingerprints: their top `bits` bits (1..32)."""
    return np.asarray(hashes, dtype=np.uint64) >> np.uint64(32 - bits)


def split_of(bits: int, count: int) -> int:
    """s = bits − ⌈log2 count⌉, floored at 0: the low bits stored per value (count ≥ 1)."""
    return max(bits - (count - 1).bit_length(), 0)


def encode_fingerprints(values: np.ndarray, bits: int) -> dict:
    """(N,) strictly ascending integers below 2^bits, N ≥ 1 -> {"bits", "count", "low", "high"} (the field)."""
    v = np.asarray(values, dtype=np.uint64)  # (N,)
    n = int(v.size)
    s = split_of(bits, n)
    shifts = np.arange(s, dtype=np.uint64)  # (s,)
    low = ((v[:, None] >> shifts[None, :]) & np.uint64(1)).astype(np.uint8).ravel()  # (N·s,) bit stream
    positions = (v >> np.uint64(s)).astype(np.int64) + np.arange(n)  # (N,) strictly ascending
    high = np.zeros(int(positions[-1]) + 1, dtype=np.uint8)
    high[positions] = 1
    return {"bits": int(bits), "count": n, "low": np.packbits(low, bitorder="little").tobytes(),
            "high": np.packbits(high, bitorder="little").tobytes()}


def decode_fingerprints(field: object) -> np.ndarray:
    """The field -> (N,) uint64 strictly ascending fingerprints; ValueError (one message, which both readers
    give) for anything that is not the one encoding of such a set."""
    if not (isinstance(field, dict) and set(field) == FINGERPRINT_KEYS and all(
            isinstance(field[k], int) and not isinstance(field[k], bool) for k in ("bits", "count"))
            and all(isinstance(field[k], bytes) for k in ("low", "high"))
            and 1 <= field["bits"] <= 32 and 1 <= field["count"] <= min(8 * len(field["high"]), 2 ** field["bits"])):
        raise ValueError(SHAPE_MESSAGE)
    bits, n, low, high = field["bits"], field["count"], field["low"], field["high"]
    s = split_of(bits, n)
    if high[-1] == 0 or len(low) != -(-n * s // 8):  # lengths first: nothing unpacked beyond what they allow
        raise ValueError(VALUE_MESSAGE)
    set_bits = np.flatnonzero(np.unpackbits(np.frombuffer(high, np.uint8), bitorder="little"))  # (≤ 8·len,)
    stream = np.unpackbits(np.frombuffer(low, np.uint8), bitorder="little")  # (8·len,)
    if set_bits.size != n or stream[n * s:].any():
        raise ValueError(VALUE_MESSAGE)
    highs = (set_bits - np.arange(n)).astype(np.uint64)  # (N,) v >> s, nondecreasing
    if (highs >> np.uint64(bits - s)).any():  # a value at or past 2^bits
        raise ValueError(VALUE_MESSAGE)
    weights = np.uint64(1) << np.arange(s, dtype=np.uint64)  # (s,)
    lows = (stream[: n * s].reshape(n, s).astype(np.uint64) * weights).sum(axis=1, dtype=np.uint64)  # (N,)
    values = (highs << np.uint64(s)) | lows  # (N,)
    if (values[1:] <= values[:-1]).any():
        raise ValueError(VALUE_MESSAGE)
    return values


SHAPE_MESSAGE = ("absent must be a map with bits (1 to 32), count (1 to 2^bits, at most 8 per byte of high), "
                 "low and high (bytes)")
VALUE_MESSAGE = ("absent does not decode to count strictly ascending fingerprints below 2^bits (low: count x split "
                 "bits, zero-padded; high: one set bit per fingerprint, ending in its last byte)")
