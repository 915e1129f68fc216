"""The one forward pass of a DAN, in numpy, vectorised over a padded batch.

Used three ways: the float reference (float32 table), the numpy backend of the
runtime (int8 table with per-row scales), and the folded form (first hidden layer
pre-multiplied into the table, so that layer keeps only its bias and activation).
A text with no known token averages to the zero vector (documented behaviour).
"""

from __future__ import annotations

import itertools
from dataclasses import dataclass

import numpy as np

ACTIVATIONS = ("relu", "tanh")


@dataclass(frozen=True)
class Layer:
    """One feed-forward layer: z = x Wᵀ + b, then the activation (None on the output layer).

    `weight` is None for a layer folded into the table: its matmul already happened.
    """

    weight: np.ndarray | None  # (out, in) float32, or None when folded
    bias: np.ndarray  # (out,) float32
    activation: str | None  # "relu", "tanh", or None for the logits layer


# Below this many texts, filling row by row beats building a boolean mask (measured: crossover
# at about 16 texts); one text, the usual interactive call, needs no padding at all.
ROW_FILL_MAX = 16


def encode_batch(id_lists: list[list[int]]) -> tuple[np.ndarray, np.ndarray]:
    """Pad id lists into (ids, counts); padding is id 0, marked only by the counts."""
    if len(id_lists) == 1:
        only = id_lists[0]
        return np.array(only or [0], dtype=np.int64).reshape(1, -1), np.array([len(only)], dtype=np.int64)
    counts = np.fromiter(map(len, id_lists), dtype=np.int64, count=len(id_lists))  # (B,)
    width = int(counts.max()) if len(id_lists) else 0
    ids = np.zeros((len(id_lists), max(width, 1)), dtype=np.int64)  # (B, T)
    if len(id_lists) <= ROW_FILL_MAX:
        for row, x in enumerate(id_lists):
            ids[row, : len(x)] = x
    else:
        flat = np.fromiter(itertools.chain.from_iterable(id_lists), dtype=np.int64, count=int(counts.sum()))  # (sum n,)
        ids[np.arange(ids.shape[1])[None, :] < counts[:, None]] = flat  # row-major fill of each row's first n slots
    return ids, counts


def mean_embedding(
    table: np.ndarray, ids: np.ndarray, counts: np.ndarray, scales: np.ndarray | None = None
) -> np.ndarray:
    """Masked mean of table rows: (V, D) table, (B, T) ids, (B,) counts -> (B, D) float32.

    With `scales` (V,) the table is int8 and each gathered row is dequantised by its
    own scale before averaging (dequantise after the gather, as the ONNX graph does).
    """
    batch, width = ids.shape
    mask = np.arange(width)[None, :] < counts[:, None]  # (B, T) bool
    rows = table[ids].astype(np.float32)  # (B, T, D)
    weight = mask.astype(np.float32)  # (B, T)
    if scales is not None:
        weight = weight * scales[ids]  # (B, T): dequantisation scale folded into the mask
    total = np.einsum("bt,btd->bd", weight, rows)  # (B, D)
    return total / np.maximum(counts, 1).astype(np.float32)[:, None]  # (B, D)


def run_layers(x: np.ndarray, layers: tuple[Layer, ...]) -> np.ndarray:
    """(B, D) mean vectors -> (B, C) logits through the feed-forward stack."""
    for layer in layers:
        z = x if layer.weight is None else x @ layer.weight.T  # (B, out)
        z = z + layer.bias
        if layer.activation == "relu":
            z = np.maximum(z, 0.0)
        elif layer.activation == "tanh":
            z = np.tanh(z)
        x = z.astype(np.float32, copy=False)
    return x


def softmax(logits: np.ndarray) -> np.ndarray:
    """Row-wise softmax, stable for large logits: (B, C) -> (B, C)."""
    shifted = logits - logits.max(axis=-1, keepdims=True)
    e = np.exp(shifted)
    return e / e.sum(axis=-1, keepdims=True)


def forward_logits(
    table: np.ndarray,
    layers: tuple[Layer, ...],
    ids: np.ndarray,
    counts: np.ndarray,
    scales: np.ndarray | None = None,
) -> np.ndarray:
    """(B, T) ids and (B,) counts -> (B, C) logits."""
    return run_layers(mean_embedding(table, ids, counts, scales), layers)
