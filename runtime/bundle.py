"""Reading and verifying a danpack bundle: bounded, checksummed, no pickle, nothing executable.

File layout (format "danpack-bundle", version 1), specified in the README:
a msgpack map {"format": str, "payload": bin, "sha256": bin(32), "version": int};
sha256 is over the payload bytes, which are themselves a msgpack map
{"graph": bin, "manifest": map, "tensors": map, "vocab": bin}; vocab is the zlib stream (RFC 1950) of the
deployment tokens joined by newlines, inflated with a bound.
Everything is checked before use: msgpack container counts against the bytes present (before msgpack
allocates), the checksum before the payload is parsed, then tensors, manifest and the ONNX graph (read
with the protobuf wire format, stdlib only). Every failure is a BundleError saying what is wrong.
"""

from __future__ import annotations

import hashlib
import math
import os
import reprlib
import stat
import zlib
from dataclasses import dataclass
from pathlib import Path

import msgpack
import numpy as np

from .errors import BundleError
from .fingerprints import decode_fingerprints
from .graph import first_difference, spec_from_tensors, write_graph
from .onnx_wire import read_graph_names
from .safe_text import labels_problem, token_problem
from .tokenize import TokenizerSpec

FORMAT_NAME = "danpack-bundle"
FORMAT_VERSION = 1
MAX_FILE_BYTES = 1 << 32  # 4 GiB: far above any DAN table we pack (400k x 300 int8 is 120 MB)
MAX_MANIFEST_DEPTH = 8  # maps and lists inside the manifest; the packer writes 4
# msgpack items in a payload: the packer writes a few thousand (mostly the probe); Python objects cost
# ~10x their msgpack bytes, so a budget, not the file size, bounds what decoding may allocate.
MAX_PAYLOAD_ITEMS = 1 << 18
# Largest |logit| a bundle's weights may reach for any text: float32 overflows at 3.4e38, and a 512-token
# sum or a 300-term dot product of values below this stays far from it. Trained models reach < 1e4.
MAX_LOGIT_REACH = 1e30
MAX_CONTAINER = 1 << 16  # entries of one map or list (the probe's lists hold at most 64)
# The vocabulary inflates to at most this many bytes per table row (plus a little): real tokens average
# under 10 bytes (GloVe 6B: 8.4 with its newline), so a stream that inflates further is a zlib bomb.
MAX_VOCAB_BYTES_PER_ROW, VOCAB_SLACK_BYTES = 256, 4096
DTYPES = {"int8": np.dtype("i1"), "float32": np.dtype("<f4")}
OOV_POLICIES = ("skip", "unk", "rest")
ACTIVATIONS = ("relu", "tanh", None)
PROBE_KEYS = {"ids", "probs", "texts", "text_probs"}
MAX_PROBE_TEXTS, MAX_PROBE_TEXT_CHARS = 32, 1 << 14  # the packer writes at most 6 texts of about 16 tokens
OUTER_KEYS = {"format", "version", "sha256", "payload"}
PAYLOAD_KEYS = {"graph", "manifest", "tensors", "vocab"}
UNKNOWN_KEYS = {"rows", "skipped", "lo", "hi", "buckets", "absent", "outliers"}  # the manifest's `unknown` field
OUTLIER_KEYS = {"filter", "probes"}  # its `outliers` map: a Bloom filter of tokens outside the buckets
MAX_PROBES = 16  # probes per token in that filter
ONNX_DTYPES = {"float32": 1, "int8": 3}  # TensorProto.DataType: FLOAT = 1, INT8 = 3 (onnx.proto)
GRAPH_INPUTS, GRAPH_OUTPUTS = ("ids", "counts"), ("probs", "logits")  # what the backends feed and fetch
# The operators packer/graph.py writes (default ONNX domain); tests/test_graph.py keeps the two in step.
GRAPH_OPS = frozenset({"Add", "Cast", "Div", "Gather", "Gemm", "Identity", "Less", "MatMul", "Max", "Mul", "Range",
                       "Relu", "Shape", "Softmax", "Squeeze", "Tanh", "Unsqueeze"})
_SHOW = reprlib.Repr()
_SHOW.maxlevel, _SHOW.maxstring, _SHOW.maxother, _SHOW.maxlist, _SHOW.maxdict = 2, 40, 40, 4, 4


def _show(value: object) -> str:
    """A short repr for messages: bounded in length and depth, whatever a hostile file holds."""
    return _SHOW.repr(value)


@dataclass(frozen=True)
class Bundle:
    """A verified bundle: manifest, deployment vocabulary, ONNX graph bytes, tensors."""

    manifest: dict
    vocab: tuple[str, ...]  # token of table row i (the pruned-rest row, if any, has no token)
    graph: bytes  # ONNX ModelProto whose large initializers are external (in `tensors`)
    tensors: dict[str, np.ndarray]  # read-only arrays over the payload bytes
    sha256: str  # hex digest of the payload, for pinning a deployment
    size: int  # bytes of the file
    vocab_bytes: int  # bytes the vocabulary takes in the file (compressed)

    @property
    def labels(self) -> tuple[str, ...]:
        return tuple(self.manifest["labels"])

    @property
    def tokenizer(self) -> TokenizerSpec:
        return TokenizerSpec.from_dict(self.manifest["tokenizer"])

    @property
    def oov_row(self) -> int | None:
        return self.manifest["oov"]["row"]


# msgpack type bytes (msgpack spec): fixed-size values -> bytes after the type byte; bin/str/ext -> bytes of
# their length field (ext adds a type byte); array/map 16/32 -> (bytes of the count, items per entry).
_FIXED = {0xC0: 0, 0xC2: 0, 0xC3: 0, 0xCA: 4, 0xCB: 8, 0xCC: 1, 0xCD: 2, 0xCE: 4, 0xCF: 8, 0xD0: 1, 0xD1: 2,
          0xD2: 4, 0xD3: 8, 0xD4: 2, 0xD5: 3, 0xD6: 5, 0xD7: 9, 0xD8: 17}
_SIZED = {0xC4: 1, 0xC5: 2, 0xC6: 4, 0xD9: 1, 0xDA: 2, 0xDB: 4, 0xC7: 1, 0xC8: 2, 0xC9: 4}
_COUNTED = {0xDC: (2, 1), 0xDD: (4, 1), 0xDE: (2, 2), 0xDF: (4, 2)}


def _check_counts(data: bytes, max_items: int = MAX_PAYLOAD_ITEMS) -> None:
    """Refuse containers that declare more entries than bytes remain, before msgpack allocates them.

    msgpack allocates a declared array before reading its items, so nested headers each claiming
    len(data) entries would cost up to 1024 x 8 x len(data) bytes; every item takes at least one byte,
    so in a real file the items still owed never exceed the bytes left. More than `max_items` items in
    all are refused too. Other damage is left to msgpack.
    """
    pos, owed, end, budget = 0, 1, len(data), max_items
    while owed and pos < end:
        b, pos, owed, budget = data[pos], pos + 1, owed - 1, budget - 1
        if budget < 0:
            raise ValueError(f"more than {max_items} msgpack items (a bundle holds a few thousand)")
        if b <= 0x7F or b >= 0xE0 or 0xA0 <= b <= 0xBF:  # positive / negative fixint, fixstr
            pos += b - 0xA0 if 0xA0 <= b <= 0xBF else 0
            continue
        if b in _FIXED:
            pos += _FIXED[b]
            continue
        if b in _SIZED:
            k = _SIZED[b]
            pos += k + int.from_bytes(data[pos : pos + k], "big") + (b in (0xC7, 0xC8, 0xC9))
            continue
        if b <= 0x9F:  # fixmap (two items per entry), fixarray
            n = 2 * (b & 0x0F) if b <= 0x8F else b & 0x0F
        elif b in _COUNTED:
            k, per = _COUNTED[b]
            n, pos = per * int.from_bytes(data[pos : pos + k], "big"), pos + k
        else:
            return  # 0xC1 is never used: msgpack names the error
        owed += n
        if owed > end - pos:
            raise ValueError(f"a container at byte {pos} declares more entries than the {max(end - pos, 0)} bytes left")


def _unpack(data: bytes, what: str, *, max_len: int, max_container: int) -> object:
    try:
        _check_counts(data)
        return msgpack.unpackb(
            data, raw=False, strict_map_key=True, use_list=True,
            max_str_len=max_len, max_bin_len=max_len, max_ext_len=0,
            max_array_len=max_container, max_map_len=max_container,
        )
    except Exception as e:  # msgpack raises ExtraData, FormatError, StackError, ValueError, UnicodeDecodeError ...
        detail = str(e) or "containers nested deeper than msgpack allows"  # StackError has no message
        cut = "incomplete input" in detail or "bytes left" in detail  # what a truncated copy looks like
        hint = "; the file is cut short or damaged: copy it again from the packer's output" if cut else ""
        raise BundleError(f"{what} is not a well-formed msgpack map ({type(e).__name__}: {detail}){hint}") from e


def decode_bundle(data: bytes, source: str = "bundle") -> Bundle:
    """Verify and decode bundle bytes; `source` names the file in messages."""
    if len(data) > MAX_FILE_BYTES:
        raise BundleError(f"{source}: {len(data)} bytes is larger than any bundle ({MAX_FILE_BYTES} max)")
    if not data:
        raise BundleError(f"{source}: the file is empty (0 bytes); copy the bundle again from the packer's output")
    # 1. outer map: a handful of small keys around one large bin
    outer = _unpack(data, f"{source}: file", max_len=len(data), max_container=8)
    if not isinstance(outer, dict):
        raise BundleError(f"{source}: not a danpack bundle (top level is {type(outer).__name__}, expected a map)")
    if outer.get("format") != FORMAT_NAME:
        raise BundleError(f"{source}: not a danpack bundle (format is {_show(outer.get('format'))}, "
                          f"expected {FORMAT_NAME!r}); pack one with `danpack pack`")
    version = outer.get("version")
    if not isinstance(version, int) or isinstance(version, bool):
        raise BundleError(f"{source}: bundle version is {_show(version)}, expected an integer")
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
        raise BundleError(f"{source}: checksum mismatch (stored sha256 {digest.hex()}, computed {actual.hex()}); "
                          "the file is damaged or was modified: copy it again from the packer's output")
    # 3. payload, bounded by its own size
    body = _unpack(payload, f"{source}: payload", max_len=len(payload), max_container=MAX_CONTAINER)
    if not isinstance(body, dict) or set(body) != PAYLOAD_KEYS:
        keys = sorted(map(str, body)) if isinstance(body, dict) else type(body).__name__
        raise BundleError(f"{source}: payload holds {keys}, expected the keys {sorted(PAYLOAD_KEYS)}")
    manifest, vocab_blob, graph, raw_tensors = body["manifest"], body["vocab"], body["graph"], body["tensors"]
    if not isinstance(manifest, dict):
        raise BundleError(f"{source}: manifest is {type(manifest).__name__}, expected a map")
    if not isinstance(vocab_blob, bytes):
        raise BundleError(f"{source}: vocab is {type(vocab_blob).__name__}, expected bytes (a zlib stream)")
    if not isinstance(graph, bytes):
        raise BundleError(f"{source}: graph is {type(graph).__name__}, expected bytes")
    if not isinstance(raw_tensors, dict):
        raise BundleError(f"{source}: tensors is {type(raw_tensors).__name__}, expected a map")
    # 4. tensors, then the manifest against them, then the graph against both
    tensors = {name: _decode_tensor(source, name, spec) for name, spec in raw_tensors.items()}
    table = tensors.get("table")
    rows = table.shape[0] if table is not None else 0
    vocab = _decode_vocab(source, vocab_blob, MAX_VOCAB_BYTES_PER_ROW * rows + VOCAB_SLACK_BYTES)
    _check_manifest(source, manifest, vocab, tensors)
    _check_graph(source, graph, tensors)
    _check_graph_is_written(source, graph, manifest, tensors)
    return Bundle(manifest, vocab, graph, tensors, digest.hex(), len(data), len(vocab_blob))


def read_bundle(path: str | os.PathLike) -> Bundle:
    """Read and verify a bundle file (size checked before reading)."""
    path = Path(path)
    try:
        info = path.stat()
        if stat.S_ISDIR(info.st_mode):
            raise IsADirectoryError(path)
        if not stat.S_ISREG(info.st_mode):  # a FIFO or device could block the load forever
            raise BundleError(f"{path}: is not a regular file; pass the bundle file written by `danpack pack -o`")
        if info.st_size > MAX_FILE_BYTES:
            raise BundleError(f"{path}: {info.st_size} bytes is larger than any bundle ({MAX_FILE_BYTES} max)")
        with open(path, "rb") as f:
            data = f.read(MAX_FILE_BYTES + 1)  # bounded even if the file grows after stat()
    except FileNotFoundError as e:
        raise BundleError(f"{path}: no such bundle file") from e
    except IsADirectoryError as e:
        raise BundleError(f"{path}: is a directory; pass the bundle file written by `danpack pack -o`") from e
    except OSError as e:
        raise BundleError(f"{path}: cannot be read ({e})") from e
    return decode_bundle(data, str(path))


def _decode_vocab(source: str, blob: bytes, limit: int) -> tuple[str, ...]:
    """The tokens from their zlib stream; never inflates more than `limit` bytes (a crafted stream can
    expand a thousandfold), and refuses a stream that is cut short or followed by other bytes."""
    inflater = zlib.decompressobj()
    try:
        text = inflater.decompress(blob, limit)
    except zlib.error as e:
        raise BundleError(f"{source}: vocab is not a valid zlib stream ({e})") from None
    if inflater.unconsumed_tail or (not inflater.eof and len(text) >= limit):
        raise BundleError(f"{source}: vocab inflates to more than {limit:,} bytes ({MAX_VOCAB_BYTES_PER_ROW} per "
                          "table row, far beyond any real vocabulary); refused as a decompression bomb")
    if not inflater.eof or inflater.unused_data:
        raise BundleError(f"{source}: vocab's zlib stream is {'cut short' if not inflater.eof else 'followed by other bytes'}")
    try:
        tokens = text.decode("utf-8")
    except UnicodeDecodeError as e:
        raise BundleError(f"{source}: vocab is not UTF-8 ({e.reason} at byte {e.start})") from None
    return tuple(tokens.split("\n")) if tokens else ()


def _decode_tensor(source: str, name: object, spec: object) -> np.ndarray:
    where = f"{source}: tensor {_show(name)}"
    if not isinstance(name, str) or not isinstance(spec, dict) or set(spec) != {"dtype", "shape", "data"}:
        raise BundleError(f"{where} must be a map with dtype, shape and data")
    dtype, shape, data = spec["dtype"], spec["shape"], spec["data"]
    if not isinstance(dtype, str) or dtype not in DTYPES:  # a list or map here is unhashable
        raise BundleError(f"{where} has dtype {_show(dtype)}, expected one of {sorted(DTYPES)}")
    if (not isinstance(shape, list) or not 1 <= len(shape) <= 2
            or not all(isinstance(d, int) and not isinstance(d, bool) and d >= 0 for d in shape)):
        raise BundleError(f"{where} has shape {_show(shape)}, expected 1 or 2 non-negative integers")
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
    problem = labels_problem(labels)
    if problem is not None:
        raise fail(f"field 'labels' {problem}")
    try:
        TokenizerSpec.from_dict(m.get("tokenizer"))
    except Exception as e:  # re.compile of a hostile pattern also raises OverflowError, RecursionError ...
        raise fail(f"field 'tokenizer' is invalid ({type(e).__name__}: {str(e)[:300]})") from e
    oov, table_meta, layers = m.get("oov"), m.get("table"), m.get("layers")
    if not isinstance(oov, dict) or oov.get("policy") not in OOV_POLICIES or "row" not in oov:
        raise fail(f"field 'oov' must be a map with policy in {OOV_POLICIES} and a row")
    if not isinstance(table_meta, dict) or not isinstance(table_meta.get("dtype"), str) or table_meta["dtype"] not in DTYPES:
        raise fail("field 'table' must be a map with dtype int8 or float32")
    table = tensors.get("table")
    if table is None or table.ndim != 2 or table.dtype != DTYPES[table_meta["dtype"]]:
        raise fail("names a table the tensors do not hold (missing, not 2-D, or of another dtype)")
    rows = table.shape[0]
    if rows < 1 or table.shape[1] < 1:
        raise fail(f"names a table of shape {table.shape}, expected at least one row and one column")
    if len(vocab) > rows or len(vocab) < rows - 1 or len(set(vocab)) != len(vocab):
        raise fail(f"vocabulary ({len(vocab)} tokens) does not match the table ({rows} rows) or repeats a token")
    if "" in vocab:
        raise fail(f"vocabulary holds an empty token (line {vocab.index('') + 1}); tokens must be non-empty")
    problem = token_problem(vocab)
    if problem is not None:
        raise fail(f"vocabulary {problem}")
    described = {k: table_meta.get(k) for k in ("rows", "width", "tokens")}
    if described != {"rows": rows, "width": table.shape[1], "tokens": len(vocab)}:
        raise fail(f"field 'table' describes {_show(described)}, but the bundle holds {rows} x {table.shape[1]} "
                   f"with {len(vocab)} tokens")
    row = oov.get("row")
    if oov["policy"] == "skip":
        valid_row = row is None
    else:
        valid_row = isinstance(row, int) and not isinstance(row, bool) and 0 <= row < rows
    if not valid_row:
        raise fail(f"field 'oov' row {_show(row)} is not valid for policy {oov['policy']!r} and {rows} rows "
                   "(None for 'skip', a row id otherwise)")
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
        if (not isinstance(layer, dict) or "activation" not in layer or layer["activation"] not in ACTIVATIONS
                or not isinstance(layer.get("weight"), bool)):
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
    if table_meta.get("folded") is not (not layers[0]["weight"]):
        raise fail(f"field 'table.folded' is {_show(table_meta.get('folded'))}, but layer 0 "
                   f"{'has no' if not layers[0]['weight'] else 'has its'} weight")
    _check_probe(fail, m.get("probe"), rows, len(labels))
    _check_unknown(fail, m.get("unknown"), table.shape[1])
    _check_description(fail, m)
    for name, t in tensors.items():
        if t.dtype == DTYPES["float32"] and not np.isfinite(t).all():
            raise fail(f"tensor {name!r} holds NaN or Inf")
    reach = _logit_reach(tensors, layers)
    if not reach < MAX_LOGIT_REACH:
        raise fail(f"weights can drive the logits to {reach:.3g}, past what float32 computes safely "
                   f"({MAX_LOGIT_REACH:g}); a trained model stays far below, so the bundle is damaged or crafted")


def _logit_reach(tensors: dict[str, np.ndarray], layers: list[dict]) -> float:
    """The largest |logit| any text can produce, by interval arithmetic in float64 (same stack as runtime.forward).

    |mean| ≤ the largest |table entry| (dequantised), then |z| ≤ |W|·|a| + |b| per layer; ReLU and tanh
    never increase magnitudes. Below MAX_LOGIT_REACH no sum of the forward pass can overflow float32.
    """
    table = tensors["table"]  # (R, W), at least one row and column (checked before)
    top = max(float(table.max()), -float(table.min()))  # no abs(): it wraps int8 -128 and would copy the table
    if "scales" in tensors:  # int8: |q| ≤ 127 (128 for a crafted -128) times the row scale
        top *= float(tensors["scales"].astype(np.float64).max(initial=0.0))
    m = np.full(table.shape[1], top)  # (W,): bound on each coordinate of the mean
    with np.errstate(over="ignore", invalid="ignore"):
        for i, spec in enumerate(layers):
            bias = np.abs(tensors[f"layer.{i}.bias"].astype(np.float64))  # (out,)
            weight = tensors.get(f"layer.{i}.weight") if spec["weight"] else None
            m = bias + (m if weight is None else np.abs(weight.astype(np.float64)) @ m)  # (out,)
            if spec["activation"] == "tanh":
                m = np.minimum(m, 1.0)
    reach = float(m.max(initial=0.0))
    return reach if np.isfinite(reach) else float("inf")


def _is_count(value: object) -> bool:
    return isinstance(value, int) and not isinstance(value, bool) and value >= 0


def _check_description(fail, m: dict) -> None:
    """The descriptive fields `danpack inspect` shows (README rule 6): present, of their type, shallow."""
    source, selection = m.get("source"), m.get("selection")
    if not (isinstance(source, dict) and isinstance(source.get("sha256"), str)
            and all(_is_count(source.get(k)) for k in ("rows", "embedding_dim", "bytes"))):
        raise fail("field 'source' must hold the float model's sha256 (str) and rows, embedding_dim, bytes (integers)")
    coverage = selection.get("coverage") if isinstance(selection, dict) else None
    if not isinstance(coverage, (int, float)) or isinstance(coverage, bool):
        raise fail("field 'selection' must be a map with a numeric coverage")
    if not isinstance(m.get("packer"), str) or not isinstance(m["table"].get("folded"), bool):
        raise fail("fields 'packer' (a version string) and 'table.folded' (a bool) are required")
    stack = [(m, 1)]  # the packer writes 4 levels (manifest, probe, ids, one sequence); JSON and repr recurse
    while stack:
        value, depth = stack.pop()
        if depth > MAX_MANIFEST_DEPTH:
            raise fail(f"nests deeper than {MAX_MANIFEST_DEPTH} levels of maps and lists")
        children = value.values() if isinstance(value, dict) else value if isinstance(value, list) else ()
        stack.extend((child, depth + 1) for child in children if isinstance(child, (dict, list)))


def _check_unknown(fail, field: object, width: int) -> None:
    """The optional envelope of tokens the bundle does not know (runtime/certify.py); absent in older bundles.
    Optional parts: `buckets` ((K, 2, width) uint8 steps; a bucket is all 255 or each coordinate's two steps sum
    to at most 254), `absent` (a fingerprint set, runtime/fingerprints.py, or strictly ascending uint32 hashes as
    older packers wrote; only for a float model that skips) and `outliers`
    ({filter: bytes, probes: 1..16}; only with buckets)."""
    if field is None:
        return
    if not isinstance(field, dict) or not {"rows", "skipped", "lo", "hi"} <= set(field) <= UNKNOWN_KEYS:
        raise fail("field 'unknown' must be a map with rows, skipped, lo and hi (and optionally buckets, absent, "
                   "outliers)")
    rows, skipped, lo, hi = field["rows"], field["skipped"], field["lo"], field["hi"]
    if not _is_count(rows) or not isinstance(skipped, bool) or not (rows or skipped):
        raise fail(f"field 'unknown' has rows {_show(rows)} and skipped {_show(skipped)}, expected a count and a bool "
                   "(a count of 0 only when skipped)")
    if not all(isinstance(v, list) and len(v) == width and all(isinstance(x, float) and math.isfinite(x) for x in v)
               for v in (lo, hi)) or any(a > b for a, b in zip(lo, hi)):
        raise fail(f"field 'unknown' lo and hi must be {width} finite floats each (the table width), lo <= hi")
    buckets = field.get("buckets")
    if buckets is not None:
        if not isinstance(buckets, bytes) or not buckets or len(buckets) % (2 * width):
            raise fail(f"field 'unknown' buckets must be bytes, a positive multiple of 2 x {width} (the table width)")
        steps = np.frombuffer(buckets, np.uint8).reshape(-1, 2, width).astype(np.int32)  # (K, 2, W)
        empty = (steps == 255).all(axis=(1, 2))  # (K,)
        if (steps[~empty].sum(axis=1) > 254).any():
            raise fail("field 'unknown' buckets: a bucket must be all 255 (empty) or have lo + hi steps <= 254")
    absent = field.get("absent")
    if absent is not None and not skipped:
        raise fail("field 'unknown' absent is allowed only where skipped is true")
    if isinstance(absent, bytes):  # packers before the fingerprint set wrote plain uint32 hashes
        if not absent or len(absent) % 4:
            raise fail("field 'unknown' absent bytes must be a positive multiple of 4")
        if (np.diff(np.frombuffer(absent, "<u4").astype(np.int64)) <= 0).any():
            raise fail("field 'unknown' absent must hold strictly ascending uint32 hashes")
    elif absent is not None:
        try:
            decode_fingerprints(absent)
        except ValueError as e:
            raise fail(f"field 'unknown' {e}") from None
    outliers = field.get("outliers")
    if outliers is not None:
        if (not isinstance(outliers, dict) or set(outliers) != OUTLIER_KEYS or not isinstance(outliers["filter"], bytes)
                or not outliers["filter"] or not _is_count(outliers["probes"])
                or not 1 <= outliers["probes"] <= MAX_PROBES or buckets is None):
            raise fail(f"field 'unknown' outliers must be a map with filter (non-empty bytes) and probes (1 to "
                       f"{MAX_PROBES}), and only where buckets are present")


def _check_probe(fail, probe: object, rows: int, classes: int) -> None:
    """The probe: a few id sequences (all in range) and texts, with the probabilities the packer computed."""
    if not isinstance(probe, dict) or set(probe) != PROBE_KEYS:
        raise fail(f"field 'probe' must be a map with {', '.join(sorted(PROBE_KEYS))}")
    texts, text_probs = probe["texts"], probe["text_probs"]
    if (not isinstance(texts, list) or not isinstance(text_probs, list) or len(texts) != len(text_probs)
            or len(texts) > MAX_PROBE_TEXTS
            or not all(isinstance(t, str) and len(t) <= MAX_PROBE_TEXT_CHARS for t in texts)):
        raise fail(f"probe texts and text_probs must be lists of the same length (at most {MAX_PROBE_TEXTS}), "
                   f"the texts strings of at most {MAX_PROBE_TEXT_CHARS} characters")
    for p in text_probs:
        if (not isinstance(p, list) or len(p) != classes
                or not all(isinstance(x, float) and 0.0 <= x <= 1.0 for x in p)):
            raise fail(f"probe probabilities must be {classes} floats in [0, 1] per text")
    ids, probs = probe["ids"], probe["probs"]
    if (not isinstance(ids, list) or not isinstance(probs, list) or len(ids) != len(probs)
            or not 1 <= len(ids) <= 64):
        raise fail("probe ids and probs must be lists of the same length (1 to 64): "
                   "without a probe a backend that computes differently goes unnoticed")
    for seq, p in zip(ids, probs):
        if (not isinstance(seq, list) or len(seq) > 64
                or not all(isinstance(i, int) and not isinstance(i, bool) and 0 <= i < rows for i in seq)):
            raise fail(f"probe ids must be lists of at most 64 row ids in [0, {rows})")
        if (not isinstance(p, list) or len(p) != classes
                or not all(isinstance(x, float) and 0.0 <= x <= 1.0 for x in p)):
            raise fail(f"probe probabilities must be {classes} floats in [0, 1] per sequence")


def _check_graph(source: str, graph: bytes, tensors: dict[str, np.ndarray]) -> None:
    """The graph is a well-formed ONNX model whose external tensors are exactly the bundle's, by name, type and shape."""

    def fail(what: str) -> BundleError:
        return BundleError(f"{source}: graph {what}; repack the model with `danpack pack`")

    try:
        names = read_graph_names(graph)
    except (ValueError, UnicodeDecodeError) as e:
        raise fail(f"is not a well-formed ONNX model ({e})") from e
    used, defined, inputs, outputs, external = names.used, names.defined, names.inputs, names.outputs, names.external
    foreign = sorted({f"{d}:{op}" if d else op for d, op in names.ops if d not in ("", "ai.onnx") or op not in GRAPH_OPS})
    if foreign:  # a crafted graph could loop or allocate without bound: only the packer's operators run
        raise fail(f"uses operators {_show(foreign)}, which danpack never writes (it writes only {', '.join(sorted(GRAPH_OPS))})")
    for name in GRAPH_INPUTS:
        if name not in inputs:
            raise fail(f"has no input {name!r}")
    for name in GRAPH_OUTPUTS:
        if name not in outputs:
            raise fail(f"has no output {name!r}")
    undefined = sorted({n for n in used if n and n not in defined})
    if undefined:
        raise fail(f"uses {_show(undefined)}, which no input, initializer or node defines")
    if set(external) - set(tensors):
        raise fail(f"takes tensors the bundle does not hold: {_show(sorted(set(external) - set(tensors)))}")
    if set(tensors) - set(external):
        raise fail(f"does not use the bundle's tensors {_show(sorted(set(tensors) - set(external)))}")
    if set(external) - set(used):
        raise fail(f"declares tensors {_show(sorted(set(external) - set(used)))} that no node uses")
    for name, (dtype, dims) in external.items():
        t = tensors[name]
        want = ONNX_DTYPES["int8" if t.dtype == DTYPES["int8"] else "float32"]
        if dtype != want or tuple(dims) != t.shape:
            raise fail(f"declares tensor {name!r} as type {dtype} shape {_show(dims)}, "
                       f"but the bundle holds {t.dtype} {t.shape}")


def _check_graph_is_written(source: str, graph: bytes, manifest: dict, tensors: dict[str, np.ndarray]) -> None:
    """The graph is byte for byte the one runtime.graph writes for this manifest and these tensor shapes: no extra
    node, constant, attribute or input can make the bundle compute anything but what its tensors say."""
    spec = spec_from_tensors(len(manifest["labels"]), manifest["table"]["dtype"] == "int8", manifest["layers"],
                             {name: t.shape for name, t in tensors.items()})
    difference = first_difference(graph, write_graph(spec))
    if difference is not None:
        raise BundleError(f"{source}: graph is not the one danpack writes for this manifest: {difference}; "
                          "repack the model with `danpack pack`")
