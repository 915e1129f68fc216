"""Per-row symmetric int8 quantisation of the embedding table.

Arithmetic is that of the ONNX `QuantizeLinear` operator (opset 13+) with zero point 0:
q = saturate(round_half_to_even(x / scale)), computed in float32, with the row's scale
= max|row| / 127 so the range is [-127, 127]. An all-zero row keeps scale 0 and q = 0.
Dequantisation is q * scale, so each element moves by at most scale / 2.
"""

from __future__ import annotations

import numpy as np

QMAX = 127  # symmetric range [-127, 127]: -128 is never produced
CHUNK_ROWS = 65536  # rows per block, to bound temporary memory on 400k-row tables


def quantize_rows(table: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(V, D) float32 -> ((V, D) int8, (V,) float32 scales)."""
    rows, width = table.shape
    q = np.empty((rows, width), dtype=np.int8)  # (V, D)
    scales = np.empty(rows, dtype=np.float32)  # (V,)
    for start in range(0, rows, CHUNK_ROWS):
        block = np.asarray(table[start : start + CHUNK_ROWS], dtype=np.float32)  # (b, D)
        scale = (np.abs(block).max(axis=1) / np.float32(QMAX)).astype(np.float32)  # (b,)
        safe = np.where(scale > 0, scale, np.float32(1.0))[:, None]  # (b, 1): zero rows divide by 1 -> q 0
        scaled = np.rint(block / safe)  # round half to even, as QuantizeLinear
        q[start : start + CHUNK_ROWS] = np.clip(scaled, -QMAX, QMAX).astype(np.int8)
        scales[start : start + CHUNK_ROWS] = scale
    return q, scales


def dequantize_rows(q: np.ndarray, scales: np.ndarray) -> np.ndarray:
    """((V, D) int8, (V,) scales) -> (V, D) float32, as DequantizeLinear with zero point 0."""
    return q.astype(np.float32) * scales[:, None]
