"""What a token the bundle does not know may have done in the float model: the manifest's `unknown` field.

The device cannot tell a pruned token (the float model used its row) from a word the float model never
knew (left out, or its unknown row). The packer can bound both: per coordinate of the table (for a folded
table, of the first layer's pre-activation W1·E), the minimum and maximum over every float row the bundle
does not keep, plus the unknown row when the float model has one. Each bound is widened by the float32
rounding that row can add to the float model's mean of at most `max_tokens` tokens, so the device needs
nothing else (runtime/certify.py, `mean_box`). Costs 2 × width floats in the manifest.

Two optional parts let the device narrow it by the token's text (FNV-1a of its UTF-8 bytes, `hash_token`):
  * `buckets`: the same envelope per hash bucket (rows grouped by their token's hash mod K), as uint8 steps
    inward from the one envelope, rounded outward: 2 × K × width bytes;
  * `absent`: fingerprints (top bits of the hash) of deployment-corpus tokens the float model never knew (a
    `skip` float model left them out), dropping any fingerprint a float token shares, as an Elias–Fano set
    (runtime/fingerprints.py): about 2 + bits − log2 N bits each.
  * `outliers`: a Bloom filter over the tokens of the few rows that set the envelope's extremes (outside the
    per-coordinate `outlier_tail` quantiles of the float table): the buckets then hold the other rows only (the
    core), and a token the filter holds takes the one envelope. A false positive only widens a token's envelope.
Each is sound by construction: every float row the device may meet under a token is inside that token's
envelope, and a listed fingerprint is no float token's. Together they never take more bytes than keeping the
left-out rows would (`parts_budget`): past that, keeping the rows is both smaller and exact. Measured in the
README's bound section.
"""

from __future__ import annotations

from collections.abc import Sequence
import math
from dataclasses import dataclass
from functools import lru_cache

import msgpack
import numpy as np

from danpack.model import FloatModel
from danpack.runtime.errors import DanpackError
from danpack.runtime.certify import build_filter, decode_buckets, gamma, gamma64, hash_token
from danpack.runtime.fingerprints import encode_fingerprints, fingerprint

CHUNK_ROWS = 65536  # float rows per block: bounds the (rows, width) float64 temporaries
OUTLIER_ROWS = 8192  # float rows per block when looking for the outliers (the mask is needed before the envelope)


@dataclass(frozen=True)
class EnvelopeOptions:
    """How finely the `unknown` envelope tells tokens apart (README, "The guaranteed drift bound", measured)."""

    buckets: int = 16  # hash buckets (0: one envelope); 2 × width bytes each
    absent_min_count: int = 1  # list corpus tokens the float model never knew seen this often (0: no list)
    absent_max: int = 8192  # at most this many listed, most frequent first (about 14 kB at GloVe's 24 bits)
    absent_spread: int = 32  # fingerprint values per float token: bits = ⌈log2(spread × V)⌉ (at most 32), so
    # about 1 in `spread` corpus tokens shares a float token's fingerprint and cannot be listed
    outlier_tail: float = 0.0001  # rows beyond this quantile at either end of any coordinate leave the buckets (0: none)
    outlier_bits: int = 5  # filter bits per such row (false positives about 0.6^bits)

    def __post_init__(self) -> None:
        for name, value in (("envelope-buckets", self.buckets), ("absent-min-count", self.absent_min_count),
                            ("absent-max", self.absent_max), ("outlier-bits", self.outlier_bits)):
            if value < 0:
                raise DanpackError(f"{name} {value} must be 0 or more (0 turns that part of the envelope off)")
        if self.absent_spread < 1:
            raise DanpackError(f"absent-spread {self.absent_spread} must be 1 or more (fingerprint values per float token)")
        if not 0.0 <= self.outlier_tail < 0.5:
            raise DanpackError(f"outlier-tail {self.outlier_tail} must be from 0 (no outlier filter) to below 0.5")

    @property
    def filtering(self) -> bool:
        """True when the envelope sets rows beyond the tails apart (they then need a filter)."""
        return self.outlier_tail > 0 and self.outlier_bits > 0

    @property
    def bucket_count(self) -> int:
        """K: the buckets asked for, at least one when outliers are set apart (the core then needs its own)."""
        return max(self.buckets, 1) if self.filtering else self.buckets

    def fingerprint_bits(self, vocab: int) -> int:
        """Bits of an absent-list fingerprint for a float model of `vocab` tokens."""
        return min(max((self.absent_spread * vocab - 1).bit_length(), 1), 32)

    @property
    def probes(self) -> int:
        """Bits probed per token: ln 2 × bits per entry, the count that keeps a Bloom filter's false positives lowest."""
        return min(max(1, round(math.log(2) * self.outlier_bits)), 16)


@lru_cache(maxsize=2)
def _token_bytes(vocab: tuple[str, ...]) -> np.ndarray:
    """(V,) int64: bytes each token takes in the bundle's vocabulary (UTF-8 and its newline)."""
    return np.fromiter((len(t.encode("utf-8")) + 1 for t in vocab), dtype=np.int64, count=len(vocab))


def parts_budget(model: FloatModel, width: int, rows: int, token_bytes: int) -> int:
    """Bytes the by-token parts may take: what keeping the `rows` left-out rows would cost (an int8 row, its
    scale, its token). Beyond that, keeping the rows (exact) beats describing them."""
    return rows * (width + 4) + token_bytes


@lru_cache(maxsize=2)
def _token_hashes(vocab: tuple[str, ...]) -> np.ndarray:
    """(V,) uint32 FNV-1a of every float token (cached: a pack builds many candidate bundles)."""
    return np.fromiter((hash_token(t) for t in vocab), dtype=np.uint32, count=len(vocab))


def _row_bounds(model: FloatModel, rows: np.ndarray, folded: bool) -> tuple[np.ndarray, np.ndarray]:
    """(k,) float rows -> ((k, W) lo, (k, W) hi): each row's values in table space, widened by the float32 rounding
    it can add to the float model's mean of at most `max_tokens` tokens (and this module's own float64 rounding)."""
    dim = model.embedding.shape[1]
    reserve = float(gamma(model.tokenizer.max_tokens + (dim + 1 if folded else 2)))  # module doc of runtime/certify
    emb = model.embedding[rows].astype(np.float64)  # (k, D)
    if folded:
        w1 = model.layers[0].weight.astype(np.float64)  # (H, D)
        mass = np.abs(emb) @ np.abs(w1).T  # (k, H): Σ_d |E_d||W1_hd|
        values = emb @ w1.T  # (k, H): within γ64_D · mass of the exact W1·E
        widen = reserve * mass + gamma64(dim + 2) * mass
    else:
        values, widen = emb, reserve * np.abs(emb)  # (k, D): exact
    widen = widen + 2.0**-50 * np.abs(values)  # the float64 subtraction and addition below
    return values - widen, values + widen


def _field(rows: int, lo: np.ndarray, hi: np.ndarray, model: FloatModel) -> dict:
    if not rows:
        lo, hi = np.zeros_like(lo), np.zeros_like(hi)
    return {"rows": int(rows), "skipped": model.oov_policy == "skip",
            "lo": [float(x) for x in lo], "hi": [float(x) for x in hi]}


def encode_buckets(lo: np.ndarray, hi: np.ndarray, bucket_lo: np.ndarray, bucket_hi: np.ndarray) -> bytes:
    """(W,) the one envelope as stored, (K, W) each bucket's bounds (+inf / -inf: empty) -> (K, 2, W) uint8 bytes
    whose decoding (runtime/certify.py `decode_buckets`, the device's exact expression) holds every bucket."""
    unit = (hi - lo) / 254.0  # (W,)
    with np.errstate(divide="ignore", invalid="ignore"):
        s_lo = np.where(unit > 0, np.floor((bucket_lo - lo) / unit), 0.0)  # (K, W)
        s_hi = np.where(unit > 0, np.floor((hi - bucket_hi) / unit), 0.0)
    steps = np.stack([np.clip(np.nan_to_num(s_lo), 0, 254), np.clip(np.nan_to_num(s_hi), 0, 254)], axis=1)
    steps = steps.astype(np.uint8)  # (K, 2, W)
    empty = ~np.isfinite(bucket_lo).all(axis=1)  # (K,)
    steps[empty] = 0
    for _ in range(255):  # rounding outward: step in until the decoded bound holds the bucket's
        got = decode_buckets(steps, lo, hi)  # (K, 2, W)
        loose = (got[:, 0] > bucket_lo) | (got[:, 1] < bucket_hi)  # (K, W)
        loose[empty] = False
        if not loose.any():
            break
        steps[:, 0][(got[:, 0] > bucket_lo) & (steps[:, 0] > 0)] -= 1  # step 0 decodes to lo itself: holds
        steps[:, 1][(got[:, 1] < bucket_hi) & (steps[:, 1] > 0)] -= 1
    steps[empty] = 255
    return steps.tobytes()


def _absent_fingerprints(model: FloatModel, absent: Sequence[tuple[str, int]], options: EnvelopeOptions) -> np.ndarray:
    """(N,) uint64 fingerprints of the corpus tokens the float model never knew, most frequent first, none a float
    token's, each once."""
    if model.oov_policy != "skip" or not options.absent_min_count or not options.absent_max:
        return np.zeros(0, np.uint64)  # an unk float model gave such a token its unknown row: nothing to gain
    bits = options.fingerprint_bits(len(model.vocab))
    taken = fingerprint(np.array([hash_token(t) for t, c in absent if c >= options.absent_min_count], np.uint32), bits)
    taken = taken[~np.isin(taken, fingerprint(_token_hashes(tuple(model.vocab)), bits))]
    _, first = np.unique(taken, return_index=True)
    return taken[np.sort(first)][: options.absent_max]


def _fit_absent(ranked: np.ndarray, bits: int, budget: int) -> dict | None:
    """The `absent` set of the most frequent fingerprints whose encoding fits `budget` bytes (None: not one)."""
    def fits(n: int) -> bool:
        return len(msgpack.packb(encode_fingerprints(np.sort(ranked[:n]), bits))) <= budget

    lo, hi = 0, int(ranked.size)  # the largest n that fits lies in lo..hi (the size grows with n)
    while lo < hi:
        mid = (lo + hi + 1) // 2
        lo, hi = (mid, hi) if fits(mid) else (lo, mid - 1)
    return encode_fingerprints(np.sort(ranked[:lo]), bits) if lo else None


def _width(model: FloatModel, folded: bool) -> int:
    return model.layers[0].weight.shape[0] if folded else model.embedding.shape[1]


def _group_bounds(rows: np.ndarray, row_lo: np.ndarray, row_hi: np.ndarray, hashes: np.ndarray | None,
                  outlier: np.ndarray | None, k: int) -> np.ndarray:
    """(r,) float rows with their (r, W) bounds -> (2K + 1, 2, W) lo and hi of: every row; per hash bucket, the core
    rows (not `outlier`); per hash bucket, the outlier rows (+inf / -inf: no row). Combined by min / max."""
    out = np.empty((2 * k + 1, 2, row_lo.shape[1]))
    out[:, 0], out[:, 1] = np.inf, -np.inf
    if not rows.size:
        return out
    out[0, 0], out[0, 1] = row_lo.min(axis=0), row_hi.max(axis=0)
    if k:
        bucket = (hashes[rows] % np.uint32(k)).astype(np.int64)  # (r,)
        if outlier is not None:
            bucket = bucket + k * outlier[rows]  # outlier rows in groups K..2K-1
        order = np.argsort(bucket, kind="stable")
        sorted_b = bucket[order]
        starts = np.flatnonzero(np.r_[True, sorted_b[1:] != sorted_b[:-1]])  # first row of each group present
        at = 1 + sorted_b[starts]
        out[at, 0] = np.minimum.reduceat(row_lo[order], starts, axis=0)
        out[at, 1] = np.maximum.reduceat(row_hi[order], starts, axis=0)
    return out


def _merge(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Two group bounds (…, 2, W) -> the bounds of both row sets."""
    return np.stack([np.minimum(a[..., 0, :], b[..., 0, :]), np.maximum(a[..., 1, :], b[..., 1, :])], axis=-2)


def _outlier_rows(model: FloatModel, folded: bool, tail: float, rows: np.ndarray) -> np.ndarray | None:
    """(V,) bool: which of `rows` lie beyond the `tail` quantiles (estimated on up to 65,536 evenly spaced float rows)
    at either end of any coordinate; False elsewhere. Any split is sound (the core's bounds are taken over the
    core's rows); this one keeps the few rows that set the extremes out of the buckets. None when `tail` is 0 or no
    row is asked about. Float32 midpoints in blocks of OUTLIER_ROWS rows bound the temporaries."""
    if not tail or not rows.size:
        return None
    vocab = len(model.vocab)
    sample = np.unique(np.linspace(0, vocab - 1, min(vocab, 65536)).astype(np.int64))
    mid = np.concatenate([_midpoints(model, sample[i : i + OUTLIER_ROWS], folded)
                          for i in range(0, sample.size, OUTLIER_ROWS)])  # (s, W) float32
    low, high = np.quantile(mid, tail, axis=0), np.quantile(mid, 1.0 - tail, axis=0)  # (W,)
    del mid
    out = np.zeros(vocab, dtype=bool)
    for i in range(0, rows.size, OUTLIER_ROWS):
        part = rows[i : i + OUTLIER_ROWS]
        mid = _midpoints(model, part, folded)  # (r, W)
        out[part] = ((mid < low) | (mid > high)).any(axis=1)
    return out


def _outlier_hashes(hashes: np.ndarray | None, outlier: np.ndarray | None, rows: np.ndarray) -> np.ndarray:
    """(r,) float rows -> the uint32 hashes of the tokens of those among them set apart (none without a filter)."""
    return np.zeros(0, np.uint32) if outlier is None else hashes[rows[outlier[rows]]]


def _midpoints(model: FloatModel, rows: np.ndarray, folded: bool) -> np.ndarray:
    """(r,) float rows -> (r, W) float32 midpoints of their table-space bounds (only where the outliers fall)."""
    lo, hi = _row_bounds(model, rows, folded)
    return (0.5 * (lo + hi)).astype(np.float32)


def _finish(model: FloatModel, folded: bool, rows: int, groups: np.ndarray, outlier_hashes: np.ndarray,
            ranked: np.ndarray, budget: int, options: EnvelopeOptions) -> dict:
    """The manifest field from the group bounds (`_group_bounds`) and the left-out outlier rows' hashes, within
    `budget` bytes, parts in the order they measured most per byte: the buckets, the outlier filter (then the buckets
    hold the core only), the most frequent absent fingerprints. The unknown row joins every bucket."""
    field = _field(rows, groups[0, 0], groups[0, 1], model)
    k = options.bucket_count
    outlier_hashes = np.unique(outlier_hashes)  # a hash once (the unknown row may be listed twice, tokens may collide)
    core, outliers = groups[1 : k + 1], groups[k + 1 :]  # (K, 2, W) each
    filter_bytes = -(-outlier_hashes.size * options.outlier_bits // 8)
    filtered = rows and options.filtering and outlier_hashes.size and 2 * k * core.shape[-1] + filter_bytes <= budget
    if not filtered:
        core, k = _merge(core, outliers), options.buckets  # every row in its bucket (none when none were asked)
    if rows and k and 2 * k * core.shape[-1] <= budget:
        if model.oov_policy == "unk":  # the unknown row may stand behind any token, whatever its hash
            u_lo, u_hi = _row_bounds(model, np.array([model.vocab.index(model.unk_token)]), folded)
            core = _merge(core[:k], np.stack([u_lo, u_hi], axis=1))
        field["buckets"] = encode_buckets(np.asarray(field["lo"]), np.asarray(field["hi"]), core[:k, 0], core[:k, 1])
        budget -= len(field["buckets"])
        if filtered:
            field["outliers"] = {"filter": build_filter(outlier_hashes, filter_bytes, options.probes),
                                 "probes": options.probes}
            budget -= filter_bytes
    listed = _fit_absent(ranked, options.fingerprint_bits(len(model.vocab)), budget) if rows else None
    if listed is not None:
        field["absent"] = listed
    return field


def unknown_envelope(model: FloatModel, kept: np.ndarray, folded: bool, absent: Sequence[tuple[str, int]] = (),
                     options: EnvelopeOptions = EnvelopeOptions()) -> dict:
    """The manifest field for the kept float rows: {"rows": P, "skipped": bool, "lo": [W floats], "hi": [W floats]},
    plus "buckets" (bytes), "outliers" ({filter, probes}) and "absent" (a fingerprint set) as `options` ask;
    `absent`: (token, corpus count) pairs of tokens the float model does not know, most frequent first."""
    left = np.ones(len(model.vocab), dtype=bool)  # (V,)
    left[np.asarray(kept, dtype=np.int64)] = False
    if model.oov_policy == "unk":  # a word the float model does not know takes its unknown row
        left[model.vocab.index(model.unk_token)] = True
    rows = np.flatnonzero(left)  # (P,): every row left out, reachable or not (no reliance on the reachability test)
    width, k = _width(model, folded), options.bucket_count
    hashes = _token_hashes(tuple(model.vocab)) if k else None
    outlier = _outlier_rows(model, folded, options.outlier_tail, rows) if options.filtering else None
    groups = _group_bounds(rows[:0], np.zeros((0, width)), np.zeros((0, width)), hashes, outlier, k)
    for start in range(0, rows.size, CHUNK_ROWS):
        part = rows[start : start + CHUNK_ROWS]
        row_lo, row_hi = _row_bounds(model, part, folded)  # (r, W) each
        groups = _merge(groups, _group_bounds(part, row_lo, row_hi, hashes, outlier, k))
    budget = parts_budget(model, width, rows.size, int(_token_bytes(tuple(model.vocab))[rows].sum()))
    return _finish(model, folded, rows.size, groups, _outlier_hashes(hashes, outlier, rows),
                   _absent_fingerprints(model, absent, options), budget, options)


class EnvelopeIndex:
    """`unknown_envelope` of every prefix of a ranking at once: the candidates a pack measures keep
    `order[:keep]`, so the rows left out are `order[keep:]` plus a fixed rest. Block minima and maxima over the
    ranking (suffix-combined; per hash bucket and core / outlier too) make each prefix cost one block of rows
    instead of the table."""

    BLOCK = 1024  # ranked rows per block

    def __init__(self, model: FloatModel, order: np.ndarray, folded: bool, absent: Sequence[tuple[str, int]] = (),
                 options: EnvelopeOptions = EnvelopeOptions()) -> None:
        self.model, self.order, self.folded, self.options = model, np.asarray(order, np.int64), folded, options
        width, n, k = _width(model, folded), len(self.order), options.bucket_count
        self.ranked, self.width = _absent_fingerprints(model, absent, options), width
        token_bytes = _token_bytes(tuple(model.vocab))
        self.suffix_bytes = np.append(np.cumsum(token_bytes[self.order][::-1])[::-1], 0)  # (n + 1,): order[i:]
        self.hashes = _token_hashes(tuple(model.vocab)) if k else None
        fixed = np.ones(len(model.vocab), dtype=bool)  # (V,): left out whatever the cut
        fixed[self.order] = False
        self.unk = model.vocab.index(model.unk_token) if model.oov_policy == "unk" else None
        if self.unk is not None:
            fixed[self.unk] = True
        rest = np.flatnonzero(fixed)
        self.outlier = (_outlier_rows(model, folded, options.outlier_tail, np.arange(len(model.vocab)))
                        if options.filtering else None)  # every row: a cut can leave out any of them
        where = np.flatnonzero(self.order == self.unk) if self.unk is not None else np.zeros(0, np.int64)
        self.unk_position = int(where[0]) if where.size else None  # the unknown row's place in the ranking
        self.fixed_rows = int(rest.size)
        self.fixed_bytes = int(token_bytes[rest].sum())
        self.fixed_groups = self._groups(rest[:0])  # (2K + 1, 2, W)
        for start in range(0, rest.size, CHUNK_ROWS):
            self.fixed_groups = _merge(self.fixed_groups, self._groups(rest[start : start + CHUNK_ROWS]))
        self.fixed_outliers = _outlier_hashes(self.hashes, self.outlier, rest)
        # the ranked outlier rows' hashes, and their places in the ranking (a cut keeps those before `keep`)
        ranked_out = np.flatnonzero(self.outlier[self.order]) if self.outlier is not None else np.zeros(0, np.int64)
        self.outlier_places = ranked_out  # (o,) ascending
        self.ranked_outliers = self.hashes[self.order[ranked_out]] if ranked_out.size else np.zeros(0, np.uint32)
        blocks = (n + self.BLOCK - 1) // self.BLOCK
        per_block = np.stack([self._groups(self.order[b * self.BLOCK : (b + 1) * self.BLOCK]) for b in range(blocks)]
                             + [self._groups(rest[:0])])  # (B + 1, 2K + 1, 2, W)
        # suffix: block b onwards
        self.suffix = np.stack([np.minimum.accumulate(per_block[::-1, :, 0], axis=0)[::-1],
                                np.maximum.accumulate(per_block[::-1, :, 1], axis=0)[::-1]], axis=2)

    def _groups(self, rows: np.ndarray) -> np.ndarray:
        lo, hi = _row_bounds(self.model, rows, self.folded) if rows.size else (np.zeros((0, self.width)),) * 2
        return _group_bounds(rows, lo, hi, self.hashes, self.outlier, self.options.bucket_count)

    def envelope(self, keep: int) -> dict:
        """The manifest field of a bundle keeping `order[:keep]` (equal to `unknown_envelope` of those rows)."""
        keep = min(max(int(keep), 0), len(self.order))
        block = (keep + self.BLOCK - 1) // self.BLOCK  # first whole block past the cut
        groups = _merge(self.fixed_groups, self.suffix[block])
        partial = self.order[keep : block * self.BLOCK]
        if partial.size:
            groups = _merge(groups, self._groups(partial))
        outliers = np.concatenate([self.fixed_outliers,
                                   self.ranked_outliers[np.searchsorted(self.outlier_places, keep):]])
        # left out: the fixed rows and order[keep:]; the unknown row is in both when it is ranked past the cut
        past = self.unk_position is not None and self.unk_position >= keep
        rows = self.fixed_rows + len(self.order) - keep - int(past)
        # the unknown row counted once: it is in the fixed rows, and in order[keep:] when ranked past the cut
        spent = self.fixed_bytes + int(self.suffix_bytes[keep])
        if past:
            spent -= int(_token_bytes(tuple(self.model.vocab))[self.unk])
        budget = parts_budget(self.model, self.width, rows, spent)
        return _finish(self.model, self.folded, rows, groups, outliers, self.ranked, budget, self.options)
