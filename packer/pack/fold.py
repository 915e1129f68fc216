"""Folding the first hidden layer into the table.

The mean is linear: mean(E[ids]) W1ᵀ = mean(E[ids] W1ᵀ). Storing E W1ᵀ (V x H1) instead of
E (V x D) skips that matmul at run time and shrinks the table whenever H1 < D.
"""

from __future__ import annotations

import numpy as np

from danpack.runtime.forward import Layer

CHUNK_ROWS = 65536  # rows per block, to bound temporary memory on 400k-row tables


def should_fold(embedding_dim: int, layers: tuple[Layer, ...], mode: str) -> bool:
    """Decide folding: "auto" folds when the first hidden layer is narrower than the embedding."""
    if mode not in ("auto", "yes", "no"):
        raise ValueError(f"fold mode {mode!r} is not one of auto, yes, no")
    has_hidden = len(layers) > 1
    if mode == "no" or not has_hidden:
        return False
    if mode == "yes":
        return True
    return int(layers[0].bias.shape[0]) < embedding_dim


def fold_first_layer(table: np.ndarray, layers: tuple[Layer, ...]) -> tuple[np.ndarray, tuple[Layer, ...]]:
    """(V, D) table and layers -> (V, H1) table E W1ᵀ and layers whose first matmul is gone."""
    first = layers[0]
    weight_t = first.weight.T.astype(np.float32)  # (D, H1)
    folded = np.empty((table.shape[0], weight_t.shape[1]), dtype=np.float32)  # (V, H1)
    for start in range(0, table.shape[0], CHUNK_ROWS):
        folded[start : start + CHUNK_ROWS] = table[start : start + CHUNK_ROWS] @ weight_t
    return folded, (Layer(None, first.bias, first.activation), *layers[1:])
