"""Which predictions int8 quantisation provably cannot change: a per-text bound on logit drift.

Method: interval bound propagation (IBP; Gowal et al. 2018, "On the effectiveness of interval
bound propagation for training verifiably robust models" — cited from memory) of the table's
rounding error through the network. Each activation is relaxed to its Lipschitz constant 1
(ReLU and tanh are 1-Lipschitz), so the bound is linear in the per-text table error δ:

    |logits_packed − logits_float| ≤ b = δ · g + c        (per class, per text)

  r_t   radius of table row t: every dequantised element lies within r_t of the exact float
        element (the embedding row, or the row of E·W1ᵀ when the first layer is folded in)
  δ     (1/n) Σ_k r_{t_k} over the text's n tokens, plus the float32 rounding of both means
  g     |W_L| ··· |W_2| (|W_1| 1), or |W_L| ··· |W_2| 1 when W_1 is folded into the table
  c     float32 rounding of every later layer in both computations (same for all texts)

The bound holds both ways, so a prediction is certified from the PACKED logits alone:
z'_top − z'_c > b_top + b_c for every other class c  ⇒  the float model's top class is the same.

float32 rounding, derived with the standard bound for a computed dot product or sum of k terms,
|fl(Σ x_i y_i) − Σ x_i y_i| ≤ γ_k Σ |x_i y_i|, γ_k = k·u / (1 − k·u), u = 2⁻²⁴ (Higham, "Accuracy
and Stability of Numerical Algorithms", 2nd ed., §3.1; from memory). It holds for any summation
order, with or without fused multiply-add, so it covers numpy's BLAS and onnxruntime's kernels.
Every term is listed where it is computed below; README-level summary:
  * quantiser: q = rint(fl(x/s)) misses x/s by at most 1/2 + 128u, so r_t = (1/2 + 2⁻¹⁶)·s_t;
  * masked means (packed and float): γ_{n+2} · (1/n) Σ (|packed row| + |float row|) per coordinate;
  * each Gemm + bias, in both computations: γ_{in+1} (|W| |a| + |b|), with |a| bounded per layer;
  * tanh: at most TANH_ERROR absolute per element in either backend (measured; see the tests);
  * a folded table also carries the float32 rounding of E·W1ᵀ and, on the float side, of the
    first matmul W1·mean(E): both are at most γ_k Σ_d |W1_hd| |E_td|, a quantity the bundle does
    not hold. The runtime assumes Σ_d |W1_hd| |E_td| ≤ FOLD_MASS_STEPS · s_t for every kept row;
    packer/bound.py verifies this premise on the actual rows and reports any row that breaks it.
The bound above (`drift_bound`, `logit_bounds`) covers texts whose tokens all have their own row; it
gives `danpack inspect` its worst case. What `predict_certified` uses is the per-text BOX below, which
also covers tokens the bundle does not know.

Box certification (`box_bound`, `mean_box`, `logit_gaps`, `certify_box`). It bounds the FLOAT model's
computation directly, from what the device knows, and asks whether the float model's top class is the
device's; the device's own rounding never enters (only its argmax is used).
  1. Tokens. Of a text's tokens (after the tokenizer's cap, which both sides share), n have their own
     kept row t and u do not (under `skip` the device left them out; under `unk` and `rest` it put them
     on the out-of-vocabulary row, which counts as "not its own" even for the literal unknown token).
  2. The float model's mean, in table space (the first pre-activation W1·mean(E) when folded). A kept
     token's float row lies within r_t of the dequantised row (premise, verified by the packer). A token
     without its own row was, in the float model, one of three things, whatever the bundle's policy:
       - a pruned row: any row of the float table the bundle left out;
       - a word the float model never knew, which a `skip` float model leaves out of its mean and an
         `unk` float model maps to its unknown row (that row is always kept, but the device cannot tell
         a word the float model maps there from a pruned one, so the row joins the envelope);
     The manifest's `unknown` field holds the per-coordinate min and max over all those rows (every row
     left out, reachable or not; plus the unknown row) and whether "left out" is possible (`skipped`).
     With k of the u tokens standing for rows, the float mean is (Σ_kept E_t + Σ_k E_p) / (n + k): it
     lies in [(S − R + k·lo), (S + R + k·hi)] / (n + k), S the sum of dequantised kept rows, R = Σ r_t.
     (a + k·e) / (n + k) is monotone in k, so k = 0 and k = u bound every k between (hull); a `skip`
     float model may have any k in 0..u, an `unk` float model has k = u. The device's policy changes
     only what the DEVICE computed (its label), never this box. n = 0: never certified.
     By token (optional `buckets` / `absent`): a token's own text decides which rows it can stand for.
     A pruned row's token IS the token's text, so it hashes (FNV-1a) to the same bucket; its row lies in
     that bucket's envelope [l_j, h_j]. A listed absent fingerprint (top bits of the hash) is no float
     token's, so a token that has it, listed or not, was no float token: a `skip` float model left it out
     (an empty slot). With an outlier filter (`outliers`), the buckets bound only
     the rows inside the per-coordinate tails; every row beyond them has its token's hash in the filter, so a
     token the filter does not hold is no such row, and one it holds (or a false positive) takes the one
     envelope, which bounds every row. Per coordinate, the lowest mean with k tokens taken
     takes the k smallest l_j; the bound is the lowest over k = 0..u (skip) or at k = u (unk), likewise
     for the highest (`_slot_hull`).
  3. float32 rounding of the float model's mean: γ_{n+u+terms} (1/(n+k)) Σ mass per element, split
     into the kept rows' share (added per text to R) and the pruned rows' share (the packer widened
     the envelope by γ_{max_tokens+terms}·mass_p, so nothing more is needed on the device); terms = 2
     (sum and division) or D + 1 when folded (the float model's W1 matmul; mass = Σ_d |W1_hd||E_td|).
     The device sums its dequantised rows in float32 (q·s rounded, then n terms): γ_{n+1} Σ mass_t more,
     as mass_t ≥ max |dequantised row t| (enforced in `box_bound`).
  4. Layers, per text: centre c and radius r; z = W c + b, r ← |W| r + allowance, where the allowance
     is the float model's float32 rounding of that layer (γ_in Σ|W||a| + γ_1 |z|, with |a| bounded
     once per bundle). ReLU maps [c − r, c + r] exactly (a unit whose whole interval is negative gives
     0, a positive one passes linearly); tanh maps it monotonically, widened by TANH_ERROR.
  5. The output layer: the logit DIFFERENCE z_top − z_k ≥ (W_top − W_k)·c + b_top − b_k
     − |W_top − W_k|·r − allowance_top − allowance_k; certified when every such bound is > 0.
This module's own float64 arithmetic is covered by γ64 terms, INFLATE and 2⁻⁵⁰-relative slack.
"""

from __future__ import annotations

from collections.abc import Sequence
import dataclasses
from dataclasses import dataclass

import numpy as np

from .bundle import Bundle
from .encode import Encoder
from .errors import BundleError
from .forward import encode_batch
from .fingerprints import decode_fingerprints, fingerprint

U = 2.0**-24  # unit roundoff of float32, round to nearest (IEEE 754 binary32: 24-bit significand)
HALF_STEP = 0.5 + 2.0**-16  # radius of int8 rounding in steps: 1/2, plus ≥ 128u for fl(x/s) (see module doc)
FOLD_MASS_STEPS = 4096.0  # assumed bound on Σ_d |W1_hd||E_td| per folded row, in steps (≈ 32 × its largest entry)
TANH_ERROR = 2.0**-20  # absolute error allowed per float32 tanh (measured worst: numpy 1u, onnxruntime 5.5u)
INFLATE = 1.0 + 2.0**-20  # covers the float64 rounding of this module's own arithmetic (far below 2⁻⁴⁰ relative)


def gamma(k):
    """γ_k = k·u / (1 − k·u) for float32; infinite where k·u ≥ 1 (no bound). Scalar or array."""
    k = np.asarray(k, dtype=np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(k * U < 1.0, k * U / (1.0 - k * U), np.inf)


@dataclass(frozen=True)
class DriftBound:
    """What the per-text bound needs, computed once from a bundle's tensors (linear in δ)."""

    radius: np.ndarray  # (R,) float64: r_t, table-space radius of row t
    spread: np.ndarray  # (R,) float64: bound on |packed row| + |float row| elements (for the means' rounding)
    fold_mass: np.ndarray  # (R,) float64: bound on Σ_d |W1_hd||E_td| (folded tables; zeros otherwise)
    fold_terms: int  # D + 1: terms of the float side's first matmul (0 when not folded)
    gain: np.ndarray  # (C,) float64: g = |W_L| ··· (|W_1| 1)
    allowance: np.ndarray  # (C,) float64: c, float32 rounding of the layers in both computations
    certifiable: np.ndarray  # (R,) bool: False for the out-of-vocabulary / pruned-rest row
    max_tokens: int  # the tokenizer's cap on n


def read_steps(bundle: Bundle) -> np.ndarray:
    """(R,) float64 quantisation step per row: the int8 scale, or max|row|/127 for a float32 table."""
    table = bundle.tensors["table"]  # (R, W)
    if bundle.manifest["table"]["dtype"] == "int8":
        return bundle.tensors["scales"].astype(np.float64)  # (R,)
    return np.abs(table).max(axis=1).astype(np.float64) / 127.0  # (R,)


def _row_magnitude(bundle: Bundle, steps: np.ndarray) -> np.ndarray:
    """(R,) largest |element| of each dequantised row (computed with the steps the bound uses)."""
    table = bundle.tensors["table"]  # (R, W)
    if bundle.manifest["table"]["dtype"] == "int8":
        return np.abs(table.astype(np.int16)).max(axis=1).astype(np.float64) * steps  # int16: |−128| fits
    return np.abs(table).max(axis=1).astype(np.float64)


def _embedding_dim(bundle: Bundle) -> int:
    source = bundle.manifest.get("source")
    dim = source.get("embedding_dim") if isinstance(source, dict) else None
    if not isinstance(dim, int) or isinstance(dim, bool) or dim < 1:
        raise BundleError(f"manifest field 'source.embedding_dim' is {dim!r}, expected a positive integer; "
                          "a folded bundle needs it to certify predictions: repack with `danpack pack`")
    return dim


def _layers(bundle: Bundle) -> list[tuple[np.ndarray | None, np.ndarray, str | None]]:
    t = bundle.tensors
    return [(t.get(f"layer.{i}.weight") if spec["weight"] else None, t[f"layer.{i}.bias"], spec["activation"])
            for i, spec in enumerate(bundle.manifest["layers"])]


def drift_bound(bundle: Bundle, min_radius: np.ndarray | None = None,
                min_fold_mass: np.ndarray | None = None) -> DriftBound:
    """Row radii, gain and float32 allowance of a bundle (well under a second for a 400k-row table).

    `min_radius` / `min_fold_mass` (R,): per-row values measured by the packer against the float
    model; the bound then uses the larger of assumed and measured (the device never passes them).
    """
    steps = read_steps(bundle)  # (R,)
    magnitude = _row_magnitude(bundle, steps)  # (R,)
    quantized = bundle.manifest["table"]["dtype"] == "int8"
    layers = _layers(bundle)
    folded = layers[0][0] is None
    max_tokens = int(bundle.tokenizer.max_tokens)
    rows = steps.shape[0]

    # 1. per-row terms, in table space
    fold_terms = _embedding_dim(bundle) + 1 if folded else 0
    fold_mass = FOLD_MASS_STEPS * steps if folded else np.zeros(rows)  # (R,)
    # |dequantised − exact|: int8 rounding, plus the float32 rounding of E·W1ᵀ (≤ γ_D Σ|W1||E|) when folded
    radius = (HALF_STEP * steps if quantized else np.zeros(rows)) + gamma(max(fold_terms - 1, 0)) * fold_mass
    if min_fold_mass is not None:
        fold_mass = np.maximum(fold_mass, min_fold_mass)
    if min_radius is not None:
        radius = np.maximum(radius, min_radius)
    spread = 2.0 * magnitude + radius  # |packed row| ≤ magnitude, |float row| ≤ magnitude + radius
    certifiable = np.ones(rows, dtype=bool)
    if bundle.oov_row is not None:
        certifiable[bundle.oov_row] = False

    # 2. bound on |mean| for both computations (feeds the first layer's rounding)
    # packed |mean| ≤ max magnitude; float |mean| ≤ max (magnitude + radius), or after W1 (folded) + its rounding
    worst_row = (magnitude + 2.0 * radius + gamma(max_tokens + fold_terms) * fold_mass)[certifiable]
    mean_bound = float(worst_row.max() if worst_row.size else 0.0) * (1.0 + float(gamma(max_tokens + 2)))

    # 3. allowance c, layer by layer; e is the rounding error carried, m the |activation| bound
    width = bundle.tensors["table"].shape[1]
    e = np.zeros(width)  # (W,)
    m = np.full(width, mean_bound)  # (W,)
    for weight, bias, activation in layers:
        b = np.abs(bias.astype(np.float64))  # (out,)
        if weight is not None:
            w = np.abs(weight.astype(np.float64))  # (out, in)
            k = float(gamma(w.shape[1] + 1))  # one dot product of `in` terms plus the bias
            mass = w @ m + b  # (out,): bound on Σ|W||a| + |b|
            e = w @ e + 2.0 * k * mass  # two computations (packed, float), each rounded once
        else:  # folded first layer: only the bias add is computed at run time (the matmul is in the table)
            k = float(gamma(1))
            mass = m + b
            e = e + 2.0 * k * mass
        m = (1.0 + k) * mass
        if activation == "tanh":  # 1-Lipschitz; each backend's tanh may miss by TANH_ERROR
            e = e + 2.0 * TANH_ERROR
            m = np.minimum(m, 1.0 + TANH_ERROR)
        # relu: 1-Lipschitz and exact in float32; e and m carry over unchanged
    return DriftBound(radius, spread, fold_mass, fold_terms, gain_vector(layers), e * INFLATE, certifiable, max_tokens)


def gain_vector(layers: list[tuple[np.ndarray | None, np.ndarray, str | None]]) -> np.ndarray:
    """(C,) g: the largest Σ_j |∂z_c/∂x_j| over every activation pattern, so |Δz_c| ≤ δ·g_c for |Δx| ≤ δ.

    The map from the mean x to the logits is W_L D_{L−1} W_{L−1} ··· D_1 W_1 with each D_l diagonal and
    its entries in [0, 1] (the slope of a 1-Lipschitz non-decreasing activation between two points:
    ReLU, tanh). The rows of that product are bounded by interval arithmetic, from the logits back to
    the table. Never larger than |W_L| ··· |W_1| 1, and equal to it in the worst case.
    """
    last = layers[-1][0]  # (C, H); None for a lone folded layer, whose Jacobian is the identity
    weight = np.eye(layers[-1][1].shape[0]) if last is None else last.astype(np.float64)  # (C, H)
    lo, hi = weight.copy(), weight.copy()  # (C, H): interval of each Jacobian entry
    for weight, _, activation in reversed(layers[:-1]):
        if activation is not None:  # × D: a slope in [0, 1] widens each interval to include 0
            lo, hi = np.minimum(lo, 0.0), np.maximum(hi, 0.0)
        if weight is not None:  # × W: interval times a matrix of exact numbers
            pos, neg = np.maximum(weight, 0.0).astype(np.float64), np.minimum(weight, 0.0).astype(np.float64)
            lo, hi = lo @ pos + hi @ neg, hi @ pos + lo @ neg  # (C, in)
    return np.maximum(np.abs(lo), np.abs(hi)).sum(axis=1)  # (C,): worst |row| · 1 over the box


def text_deltas(bound: DriftBound, ids: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """(B, T) ids, (B,) counts -> (B,) δ: the table-space drift of each text's mean, float32 rounding included."""
    mask = np.arange(ids.shape[1])[None, :] < counts[:, None]  # (B, T)
    n = np.maximum(counts, 1).astype(np.float64)  # (B,)
    radius = np.where(mask, bound.radius[ids], 0.0).sum(axis=1) / n  # (B,)
    spread = np.where(mask, bound.spread[ids], 0.0).sum(axis=1) / n  # (B,)
    delta = radius + gamma(counts + 2) * spread  # both means: n products and sums, one division
    if bound.fold_terms:  # float side: mean of E (n terms) then W1· (D terms, plus bias), per unit of fold mass
        mass = np.where(mask, bound.fold_mass[ids], 0.0).sum(axis=1) / n  # (B,)
        delta = delta + gamma(counts + bound.fold_terms) * mass
    return np.where(counts > 0, delta, 0.0)  # no tokens: both means are exactly zero


def logit_bounds(bound: DriftBound, ids: np.ndarray, counts: np.ndarray) -> np.ndarray:
    """(B, T) ids, (B,) counts -> (B, C) bound on |logits_packed − logits_float| per text and class."""
    delta = text_deltas(bound, ids, counts)  # (B,)
    return (delta[:, None] * bound.gain[None, :] + bound.allowance[None, :]) * INFLATE  # (B, C)


def certify_margins(logits: np.ndarray, bounds: np.ndarray) -> np.ndarray:
    """(B, C) logits and (B, C) bounds -> (B,) bool: the top class beats every other by more than both bounds."""
    z = logits.astype(np.float64)  # differences of float32 values: exact in float64, or within 2⁻⁵³ ≪ the allowance
    top = z.argmax(axis=1)  # (B,)
    rows = np.arange(z.shape[0])
    margin = z[rows, top][:, None] - z  # (B, C)
    need = bounds[rows, top][:, None] + bounds  # (B, C)
    ok = (margin > need) | (np.arange(z.shape[1])[None, :] == top[:, None])
    return ok.all(axis=1) & np.isfinite(bounds).all(axis=1)


@dataclass(frozen=True)
class Envelope:
    """What a token unknown to the bundle may have added to the float model's mean (the manifest's `unknown`)."""

    rows: int  # float rows such a token may stand for (every row the bundle left out, plus the unknown row)
    skipped: bool  # True: the float model may instead have left the token out (it skips tokens it does not know)
    lo: np.ndarray  # (W,) float64: per-coordinate minimum over those rows, less their float32 rounding reserve
    hi: np.ndarray  # (W,) float64: per-coordinate maximum, plus the reserve
    buckets: np.ndarray | None = None  # (K, 2, W) float64: lo and hi of the rows whose token hashes to bucket j
    # (`slots_of`); lo = +inf, hi = -inf for a bucket no row hashes to. None: one envelope for every token
    # (N,) ascending fingerprints (the top `absent_bits` bits of FNV-1a) of tokens the float model never knew; no
    # float token has one of them
    absent: np.ndarray = dataclasses.field(default_factory=lambda: np.zeros(0, np.uint64))
    absent_bits: int = 32
    outliers: OutlierFilter | None = None  # tokens of the rows outside the buckets (which then hold the core only)

    @property
    def hash_buckets(self) -> int:
        """K, the number of hash buckets (0: the envelope is not split)."""
        return 0 if self.buckets is None else int(self.buckets.shape[0])

    @property
    def by_token(self) -> bool:
        """True when the token's text narrows what it did (hash buckets or the list of absent tokens)."""
        return self.buckets is not None or bool(self.absent.size)

    @property
    def slots(self) -> np.ndarray:
        """(K + 2, 2, W) float64: the K bucket envelopes, the one envelope (every row: K = 0, or a token the
        outlier filter holds), then an empty slot for a token that was no float row."""
        if "_slots" not in self.__dict__:
            whole = np.stack([self.lo, self.hi])[None]  # (1, 2, W)
            own = self.buckets if self.buckets is not None else whole[:0]  # (K, 2, W)
            empty = np.stack([np.full_like(self.lo, np.inf), np.full_like(self.hi, -np.inf)])[None]  # (1, 2, W)
            slots = np.concatenate([own, whole, empty])
            minima = np.stack([slots[:, 0], -slots[:, 1]], axis=1)  # (K + 2, 2, W): lows and negated highs
            finite = np.abs(minima[np.isfinite(minima)])
            object.__setattr__(self, "_slots", slots)
            object.__setattr__(self, "_minima", minima)
            object.__setattr__(self, "_largest", float(finite.max()) if finite.size else 0.0)
        return self.__dict__["_slots"]

    @property
    def minima(self) -> np.ndarray:
        """(K + 2, 2, W) float64: each slot's lows and negated highs, so that both sides of a bound take minima."""
        self.slots  # built and cached with the slots
        return self.__dict__["_minima"]

    @property
    def largest(self) -> float:
        """The largest finite |bound| of any slot (for the float64 rounding allowance of the slot hull)."""
        self.slots  # built and cached with the slots
        return self.__dict__["_largest"]

    def slot_of(self, token: str) -> int:
        """The slot of a token the bundle does not know: `slots_of` on its hash."""
        return int(self.slots_of(np.array([hash_token(token)], dtype=np.uint32))[0])

    def slots_of(self, hashes: np.ndarray) -> np.ndarray:
        """(N,) uint32 FNV-1a hashes of tokens the bundle does not know -> (N,) int64 slots: the empty slot (K + 1)
        for a listed absent token, else the one envelope (K) for a token the outlier filter holds or when the field
        has no buckets, else its bucket (h mod K). The one rule for both encoders (the compiled one reports hashes,
        the Python one computes `hash_token`); cached per hash, as unknown tokens repeat (typos, names)."""
        cache = self.__dict__.setdefault("_hash_slots", {})
        keys = np.asarray(hashes, dtype=np.uint32).tolist()
        slots = [cache.get(h, -1) for h in keys]
        new = [i for i, slot in enumerate(slots) if slot < 0]
        if new:
            fresh = self._rule(np.array([keys[i] for i in new], dtype=np.uint32)).tolist()
            if len(cache) + len(new) > 65536:  # a stream of ever-new tokens stays bounded
                cache.clear()
            for i, slot in zip(new, fresh):
                slots[i] = cache[keys[i]] = slot
        return np.array(slots, dtype=np.int64)

    def _rule(self, h: np.ndarray) -> np.ndarray:
        """`slots_of` without the cache: (N,) uint32 -> (N,) int64."""
        k = self.hash_buckets
        slots = (h % np.uint32(k)).astype(np.int64) if k else np.zeros(h.shape, dtype=np.int64)  # (N,)
        if self.outliers is not None:
            slots[self.outliers.holds(h)] = k
        if self.absent.size:
            f = fingerprint(h, self.absent_bits)  # (N,)
            at = np.minimum(np.searchsorted(self.absent, f), self.absent.size - 1)  # (N,)
            slots[self.absent[at] == f] = k + 1  # the empty slot
        return slots


def hash_token(token: str) -> int:
    """FNV-1a, 32 bits, of the token's UTF-8 bytes (offset basis 2166136261, prime 16777619): a hash both the
    packer and any device compute the same way."""
    h = 2166136261
    for byte in token.encode("utf-8"):
        h = ((h ^ byte) * 16777619) & 0xFFFFFFFF
    return h


FILTER_MIX = 0x045D9F3B  # the odd multiplier of the second hash (`filter_positions`)


def filter_positions(hashes: np.ndarray, bits: int, probes: int) -> np.ndarray:
    """(N,) uint32 FNV-1a hashes -> (N, probes) int64 bit positions in a filter of `bits` bits: probe i of hash h is
    (h + i·h2) mod bits (double hashing), h2 = h mixed twice by x ← ((x >> 16) ^ x)·0x045D9F3B mod 2³², then
    ((x >> 16) ^ x) | 1. Every operation is exact in uint64 (h, h2 < 2³², i < 64), so any device computes the same."""
    h = np.asarray(hashes, dtype=np.uint64)  # (N,)
    x = h
    for _ in range(2):
        x = (((x >> np.uint64(16)) ^ x) * np.uint64(FILTER_MIX)) & np.uint64(0xFFFFFFFF)
    step = ((x >> np.uint64(16)) ^ x) | np.uint64(1)  # (N,)
    i = np.arange(probes, dtype=np.uint64)  # (P,)
    return ((h[:, None] + i[None, :] * step[:, None]) % np.uint64(bits)).astype(np.int64)  # (N, P)


@dataclass(frozen=True)
class OutlierFilter:
    """A Bloom filter (Bloom 1970; false positives only) over the hashes of the tokens whose float rows lie outside
    the bucket envelopes (the manifest's `unknown.outliers`). A token it holds may be such a row, so it takes the one
    envelope; a token it does not hold is no such row. A false positive only widens a token's envelope."""

    bits: np.ndarray  # (M,) bool, M = 8 × the field's bytes; bit j is bit j % 8 (least significant first) of byte j // 8
    probes: int  # positions set per token

    def holds(self, hashes: np.ndarray) -> np.ndarray:
        """(N,) uint32 hashes -> (N,) bool: True where every probed bit is set."""
        return self.bits[filter_positions(hashes, self.bits.size, self.probes)].all(axis=1)


def build_filter(hashes: np.ndarray, size: int, probes: int) -> bytes:
    """(N,) uint32 hashes -> the `size`-byte filter holding every one of them (the packer's writer)."""
    bits = np.zeros(8 * size, dtype=bool)  # (M,)
    bits[filter_positions(hashes, bits.size, probes).ravel()] = True
    return np.packbits(bits, bitorder="little").tobytes()


def read_envelope(bundle: Bundle) -> Envelope | None:
    """The manifest's `unknown` field, or None for a bundle packed before it existed (then a text with a token
    the bundle does not know is never certified)."""
    field = bundle.manifest.get("unknown")
    if field is None:
        return None
    lo, hi = np.asarray(field["lo"], np.float64), np.asarray(field["hi"], np.float64)  # (W,)
    absent, absent_bits = read_absent(field.get("absent"))
    outliers = field.get("outliers")
    if outliers is not None:
        bits = np.unpackbits(np.frombuffer(outliers["filter"], np.uint8), bitorder="little").astype(bool)  # (M,)
        outliers = OutlierFilter(bits, int(outliers["probes"]))
    return Envelope(int(field["rows"]), bool(field["skipped"]), lo, hi, read_buckets(field, lo, hi),
                    absent, absent_bits, outliers)


def read_absent(absent: bytes | dict | None) -> tuple[np.ndarray, int]:
    """The field's `absent` list -> ((N,) ascending uint64 fingerprints, their bits): the Elias–Fano map
    (runtime/fingerprints.py), or plain little-endian uint32 hashes as packers before it wrote them."""
    if absent is None:
        return np.zeros(0, np.uint64), 32
    if isinstance(absent, bytes):
        return np.frombuffer(absent, dtype="<u4").astype(np.uint64), 32
    return decode_fingerprints(absent), int(absent["bits"])


def read_buckets(field: dict, lo: np.ndarray, hi: np.ndarray) -> np.ndarray | None:
    """(K, 2, W) float64 bucket envelopes from the field's `buckets` bytes ((K, 2, W) uint8: steps of (hi − lo)/254
    inward from the one envelope; 255 throughout a bucket: no row), or None when the field has none. Decoding is
    this exact float64 expression; the packer rounds each step count so that it gives a bound no tighter than the
    rows' (packer/pack/envelope.py `encode_buckets`)."""
    raw = field.get("buckets")
    if raw is None:
        return None
    steps = np.frombuffer(raw, dtype=np.uint8).reshape(-1, 2, lo.shape[0])  # (K, 2, W)
    return decode_buckets(steps, lo, hi)


def decode_buckets(steps: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """(K, 2, W) uint8 steps and (W,) lo, hi -> (K, 2, W) float64 bounds (the one definition of the decoding)."""
    unit = (hi - lo) / 254.0  # (W,)
    s = steps.astype(np.float64)  # (K, 2, W)
    out = np.stack([lo + s[:, 0] * unit, hi - s[:, 1] * unit], axis=1)  # (K, 2, W)
    empty = (steps == 255).all(axis=(1, 2))  # (K,)
    out[empty, 0], out[empty, 1] = np.inf, -np.inf
    return out


@dataclass(frozen=True)
class BoxBound:
    """What the per-text box certification needs, computed once from a bundle (see the module doc)."""

    table: np.ndarray  # (R, W) the bundle's table (int8 or float32), read-only
    steps: np.ndarray  # (R,) float64: dequantisation multiplier of each row (the int8 scale; 1 for float32)
    radius: np.ndarray  # (R,) float64: |float row − dequantised row| per element (the premise r_t)
    mass: np.ndarray  # (R,) float64: per element, what the float model's mean of this row rounds per unit of γ
    terms: int  # float32 operations in the float model's mean besides the n-term sum: 2, or D + 1 when folded
    certifiable: np.ndarray  # (R,) bool: False for the out-of-vocabulary / pruned-rest row
    layers: tuple  # per layer: ((out, in) float64 W or None, (out, in) |W| or None, (out,) b, activation, (out,) allowance)
    contrast: np.ndarray | None  # (C, C, H) float64 |W_c − W_k| of the output layer (None when it is folded)
    envelope: Envelope | None

    @property
    def row_terms(self) -> np.ndarray:
        """(R, 2) float64: radius and mass side by side, gathered once per text."""
        return self._row_terms

    @property
    def row_steps32(self) -> np.ndarray:
        """(R,) float32: the steps as stored (exact: they are float32 scales, or 1)."""
        return self._steps32

    def __post_init__(self) -> None:
        object.__setattr__(self, "_row_terms", np.stack([self.radius, self.mass], axis=1))
        object.__setattr__(self, "_steps32", self.steps.astype(np.float32))


def gamma64(k: int) -> float:
    """γ_k for float64 (u = 2⁻⁵³): the rounding of this module's own dot products of k terms."""
    return k * 2.0**-53 / (1.0 - k * 2.0**-53)


def _row_mass(bundle: Bundle, drift: DriftBound, steps: np.ndarray) -> tuple[np.ndarray, np.ndarray, int]:
    """((R,) mass, (R,) reach, terms): per row, what the float model's mean rounds per unit of γ (step 2 of the
    module doc), and the largest |element| that row can put into a mean with that rounding (its reach)."""
    magnitude = _row_magnitude(bundle, steps)  # (R,)
    folded = drift.fold_terms > 0
    # the float model's mean rounds by at most γ_{n+terms} (1/n) Σ mass_t per element (module doc, step 2)
    mass = drift.fold_mass if folded else magnitude + drift.radius  # (R,)
    mass = np.maximum(mass, magnitude)  # also bounds |dequantised row|, for the device's own float32 sum
    terms = drift.fold_terms if folded else 2
    reach = magnitude + drift.radius + float(gamma(drift.max_tokens + terms)) * mass
    return mass, reach, terms


def row_reach(bundle: Bundle) -> np.ndarray:
    """(R,) float64: the largest |element| each row can put into the float model's mean, rounding included. The box's
    allowances start from the largest over the rows a text may use (a packer measuring a cut needs the same)."""
    drift = drift_bound(bundle)
    return _row_mass(bundle, drift, read_steps(bundle))[1]


def box_bound(bundle: Bundle, min_radius: np.ndarray | None = None,
              min_fold_mass: np.ndarray | None = None) -> BoxBound:
    """Per-row terms and per-layer float32 allowances of the box certification (`min_*`: as in drift_bound)."""
    drift = drift_bound(bundle, min_radius, min_fold_mass)
    quantized = bundle.manifest["table"]["dtype"] == "int8"
    steps = read_steps(bundle)  # (R,)
    envelope = read_envelope(bundle)
    mass, reach, terms = _row_mass(bundle, drift, steps)  # (R,), (R,)

    # allowances: |float activations| ≤ m, from the largest element any contributing row can hold
    worst = reach[drift.certifiable]  # (K,)
    top = float(worst.max()) if worst.size else 0.0
    if envelope is not None and envelope.rows:
        top = max(top, float(np.abs(envelope.lo).max()), float(np.abs(envelope.hi).max()))
    m = np.full(bundle.tensors["table"].shape[1], top)  # (W,)
    g1 = float(gamma(1))
    layers = []
    for weight, bias, activation in _layers(bundle):
        b = bias.astype(np.float64)  # (out,)
        if weight is not None:
            w = weight.astype(np.float64)  # (out, in)
            k = float(gamma(w.shape[1]))
            mass_out = np.abs(w) @ m  # (out,): Σ|W||a|
            # the float model's x·Wᵀ rounds by γ_in Σ|W||a|, then its bias add by γ_1 |x·Wᵀ + b|
            allowance = k * mass_out + g1 * ((1.0 + k) * mass_out + np.abs(b))
            m = (1.0 + g1) * ((1.0 + k) * mass_out + np.abs(b))
            layers.append((w, np.abs(w), b, activation, allowance * INFLATE))
        else:  # folded: the first matmul's rounding is in the per-row mass; the bias add remains
            allowance = g1 * (m + np.abs(b))
            m = (1.0 + g1) * (m + np.abs(b))
            layers.append((None, None, b, activation, allowance * INFLATE))
        if activation == "tanh":
            m = np.minimum(m, 1.0 + TANH_ERROR)
    last = layers[-1][0]
    contrast = None if last is None else np.abs(last[:, None, :] - last[None, :, :])  # (C, C, H)
    return BoxBound(bundle.tensors["table"], steps if quantized else np.ones_like(steps), drift.radius, mass, terms,
                    drift.certifiable, tuple(layers), contrast, envelope)


def encode_unknown(encoder: Encoder, texts: Sequence[str], envelope: Envelope | None = None,
                   native=None) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Texts -> ((B, T) ids and (B,) counts exactly as `encoder.encode`, unknown): the tokens without a row of
    their own, as (B,) int64 counts, or, when the envelope tells tokens apart (`Envelope.by_token`), as (B, U)
    int64 slots of those tokens (`Envelope.slots_of` on their FNV-1a hashes), padded with -1. With `native`
    (runtime/fastpath.py NativeEncoder, same ids) the compiled encoder reports the counts and the hashes.

    Not `Encoder.encode_known`'s complement: a token on the out-of-vocabulary row counts as unknown here even
    when it is the unknown-word token itself, whose float row the certification must then bound too."""
    oov, tokenize, map_tokens, index = encoder.oov_id, encoder.tokenizer.tokenize, encoder.map_tokens, encoder.index
    by_token = envelope is not None and envelope.by_token
    encoded = native.encode_unknown(texts) if native is not None else None
    if encoded is not None:
        # skip: an unknown token is left out of the ids; unk / rest: it sits on the out-of-vocabulary row
        ids, counts, unknown, hashes = encoded  # (B, T), (B,), (B,), (N,) uint32: the N unknown tokens, in order
    else:
        id_lists, unknown, hash_list = [], np.zeros(len(texts), dtype=np.int64), []
        for i, text in enumerate(texts):
            tokens = tokenize(text)
            rows = map_tokens(tokens)
            unknown[i] = len(tokens) - len(rows) if oov is None else rows.count(oov)
            if by_token and unknown[i]:
                hash_list.extend(hash_token(t) for t in tokens if (t not in index if oov is None else
                                                                   index.get(t, oov) == oov))
            id_lists.append(rows)
        ids, counts = encode_batch(id_lists)
        hashes = np.array(hash_list, dtype=np.uint32)  # (N,)
    return (ids, counts, slot_table(unknown, envelope.slots_of(hashes))) if by_token else (ids, counts, unknown)


def slot_table(unknown: np.ndarray, slots: Sequence[int] | np.ndarray) -> np.ndarray:
    """(B,) counts of each text's unknown tokens and their (sum,) slots, text after text -> (B, U) slots padded with -1
    (each text's slots first; U at least 1), the form `mean_box` takes."""
    table = np.full((unknown.shape[0], max(int(unknown.max(initial=0)), 1)), -1, dtype=np.int64)  # (B, U)
    table[np.arange(table.shape[1])[None, :] < unknown[:, None]] = slots  # row-major: text after text
    return table


def _as_box(lo: np.ndarray, hi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Bounds -> centre and radius whose box holds [lo, hi] despite this module's float64 rounding."""
    return 0.5 * (lo + hi), 0.5 * (hi - lo) + 2.0**-50 * (np.abs(lo) + np.abs(hi))


def mean_box(bound: BoxBound, ids: np.ndarray, counts: np.ndarray,
             unknown: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(B, T) ids, (B,) counts, unknown -> ((B, W) lo, (B, W) hi, (B,) bool covered): a box holding the float
    model's computed mean (table space), for every text marked covered. `unknown`: (B,) counts of the tokens
    without a row of their own (the one envelope bounds each), or (B, U) their buckets (`encode_unknown`)."""
    token_slots = unknown if unknown.ndim == 2 else None  # (B, U) slots, or counts only
    unknown = (unknown >= 0).sum(axis=1) if token_slots is not None else unknown  # (B,)
    mask = (np.arange(ids.shape[1])[None, :] < counts[:, None]) & bound.certifiable[ids]  # (B, T): own rows
    n = mask.sum(axis=1)  # (B,)
    flat = ids[mask]  # (N,): every text's own rows, text after text (padding never gathered)
    rows = bound.table[flat].astype(np.float32)  # (N, W): int8 -> float32 is exact
    rows *= bound.row_steps32[flat][:, None]  # dequantised in float32: each product within u·|q·s|
    terms = bound.row_terms[flat]  # (N, 2) float64: radius, mass
    total = np.zeros((ids.shape[0], rows.shape[1]))  # (B, W): Σ dequantised rows
    sums = np.zeros((ids.shape[0], 2))  # (B, 2): Σ r_t, Σ mass_t
    has = n > 0
    if flat.size:
        starts = (np.cumsum(n) - n)[has]
        total[has] = np.add.reduceat(rows, starts, axis=0)  # float32 sums: within γ_{n+1} Σ|q·s| ≤ γ_{n+1} Σ mass
        sums[has] = np.add.reduceat(terms, starts, axis=0)
    # the float model's mean rounding, plus this sum's own (|dequantised row| ≤ mass_t for every row: module doc)
    reach = sums[:, 0] + (gamma(n + unknown + bound.terms) + gamma(n + 1)) * sums[:, 1] * INFLATE  # (B,)
    low, high = total - reach[:, None], total + reach[:, None]  # (B, W): the kept rows' sum, float side
    kept_n = np.maximum(n, 1).astype(np.float64)[:, None]  # (B, 1)
    lo, hi = low / kept_n, high / kept_n  # k = 0: every unknown token left out
    env, has = bound.envelope, unknown > 0
    covered = n > 0  # no token of its own: never certified
    if env is None or (not env.rows and not env.skipped):
        covered &= ~has  # nothing is known about what an unknown token did
    elif env.rows and token_slots is not None and env.by_token and has.any():
        lo_u, hi_u = _slot_hull(env, token_slots[has], low[has], high[has], n[has])
        lo[has], hi[has] = lo_u, hi_u
    elif env.rows:
        u = unknown.astype(np.float64)[:, None]  # (B, 1)
        lo_u = (low + u * env.lo[None, :]) / (kept_n + u)  # (B, W): k = u, all unknown tokens were float rows
        hi_u = (high + u * env.hi[None, :]) / (kept_n + u)
        # (a + k·e) / (n + k) is monotone in k, so k = 0 and k = u bound every k in between
        lo = np.where(has[:, None], np.minimum(lo, lo_u) if env.skipped else lo_u, lo)
        hi = np.where(has[:, None], np.maximum(hi, hi_u) if env.skipped else hi_u, hi)
    return lo, hi, covered


def _slot_hull(env: Envelope, slots: np.ndarray, low: np.ndarray, high: np.ndarray,
               n: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(b, U) slots of each text's unknown tokens (-1 pads), (b, W) kept sums' bounds, (b,) kept counts ->
    (b, W) lo and hi of the float model's mean over every way the unknown tokens could have been taken.

    Token j stood for a float row inside its slot's envelope [l_j, h_j] or (skip float model) for nothing.
    Per coordinate, the smallest mean with k of them taken takes the k smallest l_j; the smallest over k = 0..u
    (skip) or at k = u (unk, where every token stood for a row) is the lower bound; the upper one likewise.
    A token in an empty slot (l = +inf: an absent token, or a bucket no row hashes to) was no float row."""
    valid = slots >= 0  # (b, U): a text's slots come first, pads (-1) after
    u = valid.sum(axis=1)  # (b,)
    empty = env.slots.shape[0] - 1  # pads read the empty slot: +inf on both sides, never the lowest
    minima, largest = env.minima, env.largest
    index = np.where(valid, slots, empty)  # (b, U)
    base = np.stack([low, -high], axis=1)  # (b, 2, W): lows and negated highs, so both sides take minima
    kept = n.astype(np.float64)[:, None, None]  # (b, 1, 1)
    width = slots.shape[1]
    # this module's float64 sums of up to U + 1 terms and their divisions round by ≤ γ64_{U+4} times
    # |base| + Σ|l_j| ≤ |base| + U·largest, over n + k ≥ n
    slack = gamma64(width + 4) * (np.abs(base) + width * largest) / np.maximum(kept, 1.0)  # (b, 2, W)
    if not env.skipped:  # every token a row (k = u): one sum; a token in no row (empty slot) makes it +inf
        side = minima[index]  # (b, U, 2, W)
        with np.errstate(invalid="ignore"):
            total = base + np.where(valid[:, :, None, None], side, 0.0).sum(axis=1)  # (b, 2, W)
        return_ = total / (kept + u[:, None, None]) - slack
        return return_[:, 0], -return_[:, 1]
    bound_ = base / np.maximum(kept, 1.0)  # k = 0: every unknown token left out
    one = u <= 1  # most texts: one unknown token, no sorting
    if one.any():
        first = minima[index[one, 0]]  # (b1, 2, W)
        bound_[one] = np.minimum(bound_[one], (base[one] + first) / (kept[one] + 1.0))
    if not one.all():  # any k in 0..u: the k smallest, for every k; pads (+inf) sort last and never win
        many = ~one
        side = np.sort(np.moveaxis(minima[index[many]], 1, -1), axis=-1)  # (b2, 2, W, U)
        take = base[many][..., None] + np.cumsum(side, axis=-1)  # (b2, 2, W, U): k = 1..U tokens taken
        k = np.arange(1, width + 1, dtype=np.float64)  # (U,)
        bound_[many] = np.minimum(bound_[many], (take / (kept[many][..., None] + k)).min(axis=-1))
    bound_ = bound_ - slack
    return bound_[:, 0], -bound_[:, 1]


def logit_gaps(bound: BoxBound, top: np.ndarray, ids: np.ndarray, counts: np.ndarray,
               unknown: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(B,) classes, (B, T) ids, (B,) counts, (B,) unknown-token counts -> ((B, C) lower bound on the float
    model's computed z_top − z_k, (B,) bool covered: the bound holds for every covered text)."""
    lo, hi, covered = mean_box(bound, ids, counts, unknown)
    with np.errstate(over="ignore", invalid="ignore"):
        centre, radius = _as_box(lo, hi)  # (B, W)
        for w, w_abs, b, activation, allowance in bound.layers[:-1]:
            if w is None:
                z = centre + b
                radius = radius + allowance
            else:
                # the float64 product rounds by ≤ γ64 |W||c|: carried in the radius through the same |W|
                z = centre @ w.T + b  # (B, out)
                radius = (radius + gamma64(w.shape[1] + 1) * np.abs(centre)) @ w_abs.T + allowance
            radius = (radius + 2.0**-52 * np.abs(z)) * INFLATE
            low, high = z - radius, z + radius
            if activation == "relu":  # exact in float32; a unit whose whole interval is negative contributes 0
                low, high = np.maximum(low, 0.0), np.maximum(high, 0.0)
            elif activation == "tanh":  # monotone: the image of the interval, widened by float32 tanh's error
                low, high = np.tanh(low) - TANH_ERROR, np.tanh(high) + TANH_ERROR
            centre, radius = _as_box(low, high)
        w, w_abs, b, _, allowance = bound.layers[-1]
        rows = np.arange(centre.shape[0])
        if w is None:  # a lone folded layer: the logits are the mean plus the bias
            z = centre + b  # (B, C)
            spread = radius[rows, top][:, None] + radius  # (B, C)
        else:
            radius = radius + gamma64(w.shape[1] + 1) * np.abs(centre)
            z = centre @ w.T + b  # (B, C)
            spread = np.einsum("bch,bh->bc", bound.contrast[top], radius)  # (B, C): |W_top − W_k| · r
        # logit differences bounded directly: z_top − z_k ≥ (W_top − W_k)·c − |W_top − W_k|·r − both allowances
        low = (z[rows, top][:, None] - z - spread * INFLATE - allowance[top][:, None] - allowance[None, :]
               - 2.0**-50 * (np.abs(z[rows, top])[:, None] + np.abs(z)))  # (B, C)
    return np.where(np.isnan(low), -np.inf, low), covered


def certify_box(bound: BoxBound, top: np.ndarray, ids: np.ndarray, counts: np.ndarray,
                unknown: np.ndarray) -> np.ndarray:
    """(B,) classes, (B, T) ids, (B,) counts, (B,) unknown-token counts -> (B,) bool: True where the
    float model's logit of class `top` provably beats every other class's (so it predicts `top`)."""
    low, covered = logit_gaps(bound, top, ids, counts, unknown)  # (B, C), (B,)
    beats = (low > 0.0) | (np.arange(low.shape[1])[None, :] == top[:, None])
    return covered & beats.all(axis=1)


def certify_packed(bound: BoxBound, logits: np.ndarray, ids: np.ndarray, counts: np.ndarray,
                   unknown: np.ndarray) -> np.ndarray:
    """(B,) bool from the packed logits: True where the float model provably predicts the packed top class."""
    return certify_box(bound, logits.argmax(axis=1), ids, counts, unknown)
