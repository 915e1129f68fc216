"""What a token the bundle does not know may have done in the float model: the manifest's `unknown` field.

The device cannot tell a pruned token (the float model used its row) from a word the float model never
knew (left out, or its unknown row). The packer can bound both: per coordinate of the table (for a folded
table, of the first layer's pre-activation W1·E), the minimum and maximum over every float row the bundle
does not keep, plus the unknown row when the float model has one. Each bound is widened by the float32
rounding that row can add to the float model's mean of at most `max_tokens` tokens, so the device needs
nothing else (runtime/certify.py, `mean_box`). Costs 2 × width floats in the manifest.
"""

from __future__ import annotations

import numpy as np

from danpack.model import FloatModel
from danpack.runtime.certify import gamma, gamma64

CHUNK_ROWS = 65536  # float rows per block: bounds the (rows, width) float64 temporaries


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


def _width(model: FloatModel, folded: bool) -> int:
    return model.layers[0].weight.shape[0] if folded else model.embedding.shape[1]


def unknown_envelope(model: FloatModel, kept: np.ndarray, folded: bool) -> dict:
    """The manifest field: {"rows": P, "skipped": bool, "lo": [W floats], "hi": [W floats]} for the kept float rows."""
    left = np.ones(len(model.vocab), dtype=bool)  # (V,)
    left[np.asarray(kept, dtype=np.int64)] = False
    if model.oov_policy == "unk":  # a word the float model does not know takes its unknown row
        left[model.vocab.index(model.unk_token)] = True
    rows = np.flatnonzero(left)  # (P,): every row left out, reachable or not (no reliance on the reachability test)
    width = _width(model, folded)
    lo, hi = np.full(width, np.inf), np.full(width, -np.inf)  # (W,)
    for start in range(0, rows.size, CHUNK_ROWS):
        row_lo, row_hi = _row_bounds(model, rows[start : start + CHUNK_ROWS], folded)  # (k, W) each
        lo, hi = np.minimum(lo, row_lo.min(axis=0)), np.maximum(hi, row_hi.max(axis=0))
    return _field(rows.size, lo, hi, model)


class EnvelopeIndex:
    """`unknown_envelope` of every prefix of a ranking at once: the candidates a pack measures keep
    `order[:keep]`, so the rows left out are `order[keep:]` plus a fixed rest. Block minima and maxima over the
    ranking (suffix-combined) make each prefix cost one block of rows instead of the whole table."""

    BLOCK = 1024  # ranked rows per block

    def __init__(self, model: FloatModel, order: np.ndarray, folded: bool) -> None:
        self.model, self.order, self.folded = model, np.asarray(order, np.int64), folded
        width, n = _width(model, folded), len(self.order)
        fixed = np.ones(len(model.vocab), dtype=bool)  # (V,): left out whatever the cut
        fixed[self.order] = False
        self.unk = model.vocab.index(model.unk_token) if model.oov_policy == "unk" else None
        if self.unk is not None:
            fixed[self.unk] = True
        rest = np.flatnonzero(fixed)
        where = np.flatnonzero(self.order == self.unk) if self.unk is not None else np.zeros(0, np.int64)
        self.unk_position = int(where[0]) if where.size else None  # the unknown row's place in the ranking
        self.fixed_rows = int(rest.size)
        self.fixed_lo, self.fixed_hi = np.full(width, np.inf), np.full(width, -np.inf)
        for start in range(0, rest.size, CHUNK_ROWS):
            lo, hi = _row_bounds(model, rest[start : start + CHUNK_ROWS], folded)
            self.fixed_lo, self.fixed_hi = np.minimum(self.fixed_lo, lo.min(0)), np.maximum(self.fixed_hi, hi.max(0))
        blocks = (n + self.BLOCK - 1) // self.BLOCK
        lo_b, hi_b = np.full((blocks + 1, width), np.inf), np.full((blocks + 1, width), -np.inf)  # (B + 1, W)
        for b in range(blocks):
            lo, hi = _row_bounds(model, self.order[b * self.BLOCK : (b + 1) * self.BLOCK], folded)
            lo_b[b], hi_b[b] = lo.min(0), hi.max(0)
        # suffix: block b onwards
        self.suffix_lo = np.minimum.accumulate(lo_b[::-1], axis=0)[::-1]  # (B + 1, W)
        self.suffix_hi = np.maximum.accumulate(hi_b[::-1], axis=0)[::-1]

    def envelope(self, keep: int) -> dict:
        """The manifest field of a bundle keeping `order[:keep]` (equal to `unknown_envelope` of those rows)."""
        keep = min(max(int(keep), 0), len(self.order))
        block = (keep + self.BLOCK - 1) // self.BLOCK  # first whole block past the cut
        lo, hi = np.minimum(self.fixed_lo, self.suffix_lo[block]), np.maximum(self.fixed_hi, self.suffix_hi[block])
        partial = self.order[keep : block * self.BLOCK]
        if partial.size:
            p_lo, p_hi = _row_bounds(self.model, partial, self.folded)
            lo, hi = np.minimum(lo, p_lo.min(0)), np.maximum(hi, p_hi.max(0))
        # left out: the fixed rows and order[keep:]; the unknown row is in both when it is ranked past the cut
        past = self.unk_position is not None and self.unk_position >= keep
        rows = self.fixed_rows + len(self.order) - keep - int(past)
        return _field(rows, lo, hi, self.model)
