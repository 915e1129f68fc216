"""Reading and verifying a danpack bundle: bounded, checksummed, no pickle, nothing executable.

File layout (format "danpack-bundle", version 1), specified in the README:
a msgpack map {"format": str, "payload": bin, "sha256": bin(32), "version": int};
sha256 is over the payload bytes, which are themselves a msgpack map
{"graph": bin, "manifest": map, "tensors": map, "vocab": str}.
Everything is checked before use; every failure is a BundleError saying what is wrong.
"""

from __future__ import annotations

import hashlib
import math
import os
from dataclasses import dataclass
from pathlib import Path

import msgpack
import numpy as np

from .errors import BundleError, TokenizerError
from .tokenize import TokenizerSpec

FORMAT_NAME = "danpack-bundle"
FORMAT_VERSION = 1
MAX_FILE_BYTES = 1 << 32  # 4 GiB: far above any DAN table we pack (400k x 300 int8 is 120 MB)
DTYPES = {"int8": np.dtype("i1"), "float32": np.dtype("<f4")}
OOV_POLICIES = ("skip", "unk", "rest")
ACTIVATIONS = ("relu", "tanh", None)
OUTER_KEYS = {"format", "version", "sha256", "payload"}
PAYLOAD_KEYS = {"graph", "manifest", "tensors", "vocab"}


@dataclass(frozen=True)
class Bundle:
    """A verified bundle: manifest, deployment vocabulary, ONNX graph bytes, tensors."""

    manifest: dict
    vocab: tuple[str, ...]  # token of table row i (the pruned-rest row, if any, has no token)
    graph: bytes  # ONNX ModelProto whose large initializers are external (in `tensors`)
    tensors: dict[str, np.ndarray]  # read-only arrays over the payload bytes
    sha256: str  # hex digest of the payload, for pinning a deployment
    size: int  # bytes of the file

    @property
    def labels(self) -> tuple[str, ...]:
        return tuple(self.manifest["labels"])

    @property
    def tokenizer(self) -> TokenizerSpec:
        return TokenizerSpec.from_dict(self.manifest["tokenizer"])

    @property
    def oov_row(self) -> int | None:
        return self.manifest["oov"]["row"]


def _unpack(data: bytes, what: str, *, max_len: int, max_container: int) -> object:
    try:
        return msgpack.unpackb(
            data, raw=False, strict_map_key=True, use_list=True,
            max_str_len=max_len, max_bin_len=max_len, max_ext_len=0,
            max_array_len=max_container, max_map_len=max_container,
        )
    except Exception as e:  # msgpack raises ExtraData, FormatError, StackError, ValueError, UnicodeDecodeError ...
        raise BundleError(f"{what} is not a well-formed msgpack map ({type(e).__name__}: {e})") from e


def decode_bundle(data: bytes, source: str = "bundle") -> Bundle:
    """Verify and decode bundle bytes; `source` names the file in messages."""
    if len(data) > MAX_FILE_BYTES:
        raise BundleError(f"{source}: {len(data)} bytes is larger than any bundle ({MAX_FILE_BYTES} max)")
    # 1. outer map: a handful of small keys around one large bin
    outer = _unpack(data, f"{source}: file", max_len=len(data), max_container=8)
    if not isinstance(outer, dict):
        raise BundleError(f"{source}: not a danpack bundle (top level is {type(outer).__name__}, expected a map)")
    if outer.get("format") != FORMAT_NAME:
        raise BundleError(f"{source}: not a danpack bundle (format is {str(outer.get('format'))[:40]!r}, "
                          f"expected {FORMAT_NAME!r}); pack one with `danpack pack`")
    version = outer.get("version")
    if not isinstance(version, int) or isinstance(version, bool):
        raise BundleError(f"{source}: bundle version is {version!r}, expected an integer")
    if version > FORMAT_VERSION:
        raise BundleError(f"{source}: bundle version {version} is newer than this runtime reads ({FORMAT_VERSION}); "
                          "upgrade danpack on the device or repack with the older packer")
    if version != FORMAT_VERSION:
        raise BundleError(f"{source}: bundle version {version} is not supported (this runtime reads {FORMAT_VERSION})")
    if set(outer) != OUTER_KEYS:
        raise BundleError(f"{source}: top-level keys are {sorted(map(str, outer))}, expected {sorted(OUTER_KEYS)}")
    payload, digest = outer["payload"], outer["sha256"]
    if not isinstance(payload, bytes) or not isinstance(digest, bytes) or len(digest) != 32:
        raise BundleError(f"{source}: 'payload' must be bytes and 'sha256' 32 bytes")
    # 2. integrity before anything in the payload is parsed or used
    actual = hashlib.sha256(payload).digest()
    if actual != digest:
        raise BundleError(f"{source}: checksum mismatch (stored {digest.hex()[:16]}…, computed {actual.hex()[:16]}…); "
                          "the file is damaged or was modified: copy it again from the packer's output")
    # 3. payload, bounded by its own size
    body = _unpack(payload, f"{source}: payload", max_len=len(payload), max_container=max(16, len(payload)))
    if not isinstance(body, dict) or set(body) != PAYLOAD_KEYS:
        keys = sorted(map(str, body)) if isinstance(body, dict) else type(body).__name__
        raise BundleError(f"{source}: payload holds {keys}, expected the keys {sorted(PAYLOAD_KEYS)}")
    manifest, vocab_text, graph, raw_tensors = body["manifest"], body["vocab"], body["graph"], body["tensors"]
    if not isinstance(manifest, dict):
        raise BundleError(f"{source}: manifest is {type(manifest).__name__}, expected a map")
    if not isinstance(vocab_text, str):
        raise BundleError(f"{source}: vocab is {type(vocab_text).__name__}, expected a newline-joined string")
    if not isinstance(graph, bytes):
        raise BundleError(f"{source}: graph is {type(graph).__name__}, expected bytes")
    if not isinstance(raw_tensors, dict):
        raise BundleError(f"{source}: tensors is {type(raw_tensors).__name__}, expected a map")
    vocab = tuple(vocab_text.split("\n")) if vocab_text else ()
    tensors = {name: _decode_tensor(source, name, spec) for name, spec in raw_tensors.items()}
    _check_manifest(source, manifest, vocab, tensors)
    return Bundle(manifest, vocab, graph, tensors, digest.hex(), len(data))


def read_bundle(path: str | os.PathLike) -> Bundle:
    """Read and verify a bundle file (size checked before reading)."""
    path = Path(path)
    try:
        size = path.stat().st_size
        if size > MAX_FILE_BYTES:
            raise BundleError(f"{path}: {size} bytes is larger than any bundle ({MAX_FILE_BYTES} max)")
        data = path.read_bytes()
    except FileNotFoundError as e:
        raise BundleError(f"{path}: no such bundle file") from e
    except IsADirectoryError as e:
        raise BundleError(f"{path}: is a directory; pass the bundle file written by `danpack pack -o`") from e
    except OSError as e:
        raise BundleError(f"{path}: cannot be read ({e})") from e
    return decode_bundle(data, str(path))


def _decode_tensor(source: str, name: object, spec: object) -> np.ndarray:
    where = f"{source}: tensor {str(name)[:40]!r}"
    if not isinstance(name, str) or not isinstance(spec, dict) or set(spec) != {"dtype", "shape", "data"}:
        raise BundleError(f"{where} must be a map with dtype, shape and data")
    dtype, shape, data = spec["dtype"], spec["shape"], spec["data"]
    if dtype not in DTYPES:
        raise BundleError(f"{where} has dtype {str(dtype)[:20]!r}, expected one of {sorted(DTYPES)}")
    if (not isinstance(shape, list) or not 1 <= len(shape) <= 2
            or not all(isinstance(d, int) and not isinstance(d, bool) and d >= 0 for d in shape)):
        raise BundleError(f"{where} has shape {str(shape)[:60]}, expected 1 or 2 non-negative integers")
    if not isinstance(data, bytes):
        raise BundleError(f"{where} data is not bytes")
    expected = math.prod(shape) * DTYPES[dtype].itemsize  # Python ints: no overflow
    if expected != len(data):
        raise BundleError(f"{where} declares shape {shape} ({expected} bytes) but holds {len(data)} bytes")
    return np.frombuffer(data, dtype=DTYPES[dtype]).reshape(shape)


def _check_manifest(source: str, m: dict, vocab: tuple[str, ...], tensors: dict[str, np.ndarray]) -> None:
    """Cross-check the manifest against the vocabulary and tensor shapes."""

    def fail(what: str) -> BundleError:
        return BundleError(f"{source}: manifest {what}")

    labels = m.get("labels")
    if not isinstance(labels, list) or len(labels) < 2 or not all(isinstance(x, str) for x in labels):
        raise fail("field 'labels' must list at least 2 label strings")
    try:
        TokenizerSpec.from_dict(m.get("tokenizer"))
    except (TokenizerError, TypeError) as e:
        raise fail(f"field 'tokenizer' is invalid: {e}") from e
    oov, table_meta, layers = m.get("oov"), m.get("table"), m.get("layers")
    if not isinstance(oov, dict) or oov.get("policy") not in OOV_POLICIES:
        raise fail(f"field 'oov' must be a map with policy in {OOV_POLICIES}")
    if not isinstance(table_meta, dict) or table_meta.get("dtype") not in DTYPES:
        raise fail("field 'table' must be a map with dtype int8 or float32")
    table = tensors.get("table")
    if table is None or table.ndim != 2 or table.dtype != DTYPES[table_meta["dtype"]]:
        raise fail("names a table the tensors do not hold (missing, not 2-D, or of another dtype)")
    rows = table.shape[0]
    if len(vocab) > rows or len(vocab) < rows - 1 or len(set(vocab)) != len(vocab):
        raise fail(f"vocabulary ({len(vocab)} tokens) does not match the table ({rows} rows) or repeats a token")
    row = oov.get("row")
    needs_row = oov["policy"] != "skip"
    if needs_row != isinstance(row, int) or (needs_row and not 0 <= row < rows):
        raise fail(f"field 'oov' row {row!r} is not valid for policy {oov['policy']!r} and {rows} rows")
    if rows == len(vocab) + 1 and oov["policy"] != "rest":
        raise fail("table has a row without a token but the policy is not 'rest'")
    if table_meta["dtype"] == "int8":
        scales = tensors.get("scales")
        if scales is None or scales.shape != (rows,) or scales.dtype != DTYPES["float32"]:
            raise fail(f"int8 table needs float32 'scales' of shape ({rows},)")
        if not (np.isfinite(scales).all() and (scales >= 0).all()):
            raise fail("'scales' must be finite and non-negative")
    if not isinstance(layers, list) or not layers:
        raise fail("field 'layers' must be a non-empty list")
    width = table.shape[1]
    for i, layer in enumerate(layers):
        if not isinstance(layer, dict) or layer.get("activation") not in ACTIVATIONS or not isinstance(layer.get("weight"), bool):
            raise fail(f"layer {i} must be a map with activation in {ACTIVATIONS} and a bool 'weight'")
        bias = tensors.get(f"layer.{i}.bias")
        if bias is None or bias.ndim != 1 or bias.dtype != DTYPES["float32"]:
            raise fail(f"layer {i} has no float32 bias vector")
        out = bias.shape[0]
        if layer["weight"]:
            w = tensors.get(f"layer.{i}.weight")
            if w is None or w.shape != (out, width) or w.dtype != DTYPES["float32"]:
                raise fail(f"layer {i} weight must be float32 of shape ({out}, {width})")
        elif i != 0 or out != width:
            raise fail(f"layer {i} has no weight, which only a folded first layer of width {width} may")
        width = out
    if width != len(labels):
        raise fail(f"output width {width} differs from the {len(labels)} labels")
    _check_probe(fail, m.get("probe"), rows, len(labels))
    for name, t in tensors.items():
        if t.dtype == DTYPES["float32"] and not np.isfinite(t).all():
            raise fail(f"tensor {name!r} holds NaN or Inf")


def _check_probe(fail, probe: object, rows: int, classes: int) -> None:
    """The probe: a few id sequences (all in range) and the probabilities the packer computed."""
    if not isinstance(probe, dict) or set(probe) != {"ids", "probs"}:
        raise fail("field 'probe' must be a map with ids and probs")
    ids, probs = probe["ids"], probe["probs"]
    if not isinstance(ids, list) or not isinstance(probs, list) or len(ids) != len(probs) or len(ids) > 64:
        raise fail("probe ids and probs must be lists of the same length (at most 64)")
    for seq, p in zip(ids, probs):
        if (not isinstance(seq, list) or len(seq) > 64
                or not all(isinstance(i, int) and not isinstance(i, bool) and 0 <= i < rows for i in seq)):
            raise fail(f"probe ids must be lists of at most 64 row ids in [0, {rows})")
        if (not isinstance(p, list) or len(p) != classes
                or not all(isinstance(x, float) and math.isfinite(x) for x in p)):
            raise fail(f"probe probabilities must be {classes} finite floats per sequence")
