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


def unknown_envelope(model: FloatModel, kept: np.ndarray, folded: bool) -> dict:
    """The manifest field: {"rows": P, "skipped": bool, "lo": [W floats], "hi": [W floats]} for the kept float rows."""
    left = np.ones(len(model.vocab), dtype=bool)  # (V,)
    left[np.asarray(kept, dtype=np.int64)] = False
    if model.oov_policy == "unk":  # a word the float model does not know takes its unknown row
        left[model.vocab.index(model.unk_token)] = True
    rows = np.flatnonzero(left)  # (P,): every row left out, reachable or not (no reliance on the reachability test)
    dim = model.embedding.shape[1]
    w1 = model.layers[0].weight.astype(np.float64) if folded else None  # (H, D)
    width = w1.shape[0] if folded else dim
    reserve = float(gamma(model.tokenizer.max_tokens + (dim + 1 if folded else 2)))  # module doc of runtime/certify
    lo, hi = np.full(width, np.inf), np.full(width, -np.inf)  # (W,)
    for start in range(0, rows.size, CHUNK_ROWS):
        emb = model.embedding[rows[start : start + CHUNK_ROWS]].astype(np.float64)  # (k, D)
        if folded:
            mass = np.abs(emb) @ np.abs(w1).T  # (k, H): Σ_d |E_d||W1_hd|
            values = emb @ w1.T  # (k, H): within γ64_D · mass of the exact W1·E
            widen = reserve * mass + gamma64(dim + 2) * mass
        else:
            values, widen = emb, reserve * np.abs(emb)  # (k, D): exact
        widen = widen + 2.0**-50 * np.abs(values)  # the float64 subtraction and addition below
        lo = np.minimum(lo, (values - widen).min(axis=0))
        hi = np.maximum(hi, (values + widen).max(axis=0))
    if not rows.size:
        lo, hi = np.zeros(width), np.zeros(width)
    return {"rows": int(rows.size), "skipped": model.oov_policy == "skip",
            "lo": [float(x) for x in lo], "hi": [float(x) for x in hi]}
