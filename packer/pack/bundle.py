"""Encoding a bundle: deterministic bytes (sorted keys, no timestamps); `packer.files` writes them.

The layout is the one `runtime.bundle` reads and the README specifies.
"""

from __future__ import annotations

import hashlib
import zlib

import msgpack
import numpy as np

from danpack.runtime.bundle import FORMAT_NAME, FORMAT_VERSION


def _sorted(obj):
    """Maps with sorted keys, recursively, so equal content gives equal bytes."""
    if isinstance(obj, dict):
        return {k: _sorted(obj[k]) for k in sorted(obj)}
    if isinstance(obj, (list, tuple)):
        return [_sorted(v) for v in obj]
    return obj


def _tensor(array: np.ndarray) -> dict:
    dtype = {np.dtype("i1"): "int8", np.dtype("<f4"): "float32"}[array.dtype.newbyteorder("<")]
    return {"dtype": dtype, "shape": list(array.shape), "data": np.ascontiguousarray(array, dtype=array.dtype.newbyteorder("<")).tobytes()}


def encode_vocab(tokens: list[str]) -> bytes:
    """The tokens joined by newlines, as UTF-8, in one zlib stream (level 9: about half the bytes of the
    plain text for word vocabularies; the same zlib gives the same bytes)."""
    return zlib.compress("\n".join(tokens).encode("utf-8"), 9)


def encode_payload(manifest: dict, vocab: bytes, graph: bytes, tensors: dict[str, np.ndarray]) -> bytes:
    """The payload bytes (what the checksum covers); `vocab` is `encode_vocab`'s output."""
    body = {
        "graph": graph,
        "manifest": _sorted(manifest),
        "tensors": {name: _tensor(tensors[name]) for name in sorted(tensors)},
        "vocab": vocab,
    }
    return msgpack.packb(body, use_bin_type=True)


def encode_bundle(payload: bytes) -> bytes:
    """The file bytes around a payload."""
    outer = {"format": FORMAT_NAME, "payload": payload, "sha256": hashlib.sha256(payload).digest(), "version": FORMAT_VERSION}
    return msgpack.packb(outer, use_bin_type=True)
