"""The compiled fast path: tokenization and id mapping by the native runtime (runtime/native, C99) through ctypes.

`pip install` builds the native library as the optional extension `danpack.runtime._native` when a C compiler is
there (it holds the C library only; it is loaded with ctypes, never imported). When it is absent, fails to load,
refuses the bundle (e.g. a custom tokenizer pattern) or meets a text it cannot take as UTF-8 (a lone surrogate),
the pure-Python encoder does the work instead, silently; `Classifier.describe()` says which path runs. The ids
are the same either way (tests/test_native.py), so the backend's answers are identical. DANPACK_NATIVE=0 turns
the fast path off.
"""

from __future__ import annotations

import ctypes
import importlib.util
import os
import threading
from collections.abc import Sequence

import numpy as np

_LOCK = threading.Lock()
# Below this many texts a call costs more in ctypes and numpy set-up than it saves (measured: the Python encoder wins
# at 1 and 4 texts, the native one from 16 on): the Python encoder takes such calls.
MIN_TEXTS = 8
_LIB: list = []  # [ctypes.CDLL | None] once looked up


class _Error(ctypes.Structure):
    _fields_ = [("message", ctypes.c_char * 512)]


def library() -> ctypes.CDLL | None:
    """The built native library, or None (not built, not loadable, or turned off by DANPACK_NATIVE=0)."""
    with _LOCK:
        if not _LIB:
            _LIB.append(_open_library())
        return _LIB[0]


def _open_library() -> ctypes.CDLL | None:
    if os.environ.get("DANPACK_NATIVE", "1") == "0":
        return None
    try:
        spec = importlib.util.find_spec("danpack.runtime._native")  # locates the file without importing it
        if spec is None or not spec.origin:
            return None
        lib = ctypes.CDLL(spec.origin)
        _declare(lib)
    except (OSError, ImportError, ValueError, AttributeError):  # AttributeError: a stale build missing a function
        return None
    return lib


def _declare(lib: ctypes.CDLL) -> None:
    """The argument and result types of every function the fast path calls."""
    p, size, i64 = ctypes.c_void_p, ctypes.c_size_t, ctypes.c_void_p  # int64 arrays passed as addresses
    lib.dp_load_path.restype, lib.dp_load_path.argtypes = p, [ctypes.c_char_p, ctypes.POINTER(_Error)]
    lib.dp_free.restype, lib.dp_free.argtypes = None, [p]
    lib.dp_scratch_new.restype, lib.dp_scratch_new.argtypes = p, [p]
    lib.dp_scratch_free.restype, lib.dp_scratch_free.argtypes = None, [p]
    lib.dp_encode_flat.restype = ctypes.c_longlong
    lib.dp_encode_flat.argtypes = [p, p, ctypes.c_char_p, i64, size, i64, size, i64, i64, i64, ctypes.POINTER(_Error)]
    err = ctypes.POINTER(_Error)
    lib.dp_classify_flat.restype = ctypes.c_int
    lib.dp_classify_flat.argtypes = [p, p, ctypes.c_char_p, p, size, p, p, err]
    lib.dp_stream_new.restype, lib.dp_stream_new.argtypes = p, [p, ctypes.POINTER(_StreamOptions), err]
    lib.dp_stream_free.restype, lib.dp_stream_free.argtypes = None, [p]
    lib.dp_stream_parse.restype = ctypes.c_longlong
    lib.dp_stream_parse.argtypes = [p, ctypes.c_char_p, i64, ctypes.c_char_p, size, size, err]
    lib.dp_stream_ids.restype, lib.dp_stream_ids.argtypes = size, [p, i64, i64, i64]
    lib.dp_stream_format.restype = ctypes.c_int
    lib.dp_stream_format.argtypes = [p, p, ctypes.POINTER(ctypes.c_void_p), ctypes.POINTER(size), ctypes.POINTER(size), err]
    lib.dp_encode_unknown_flat.restype = ctypes.c_longlong
    lib.dp_encode_unknown_flat.argtypes = [p, p, ctypes.c_char_p, i64, size, i64, size, i64, i64, p, size,
                                           ctypes.POINTER(ctypes.c_int64), err]
    n64 = ctypes.c_int64
    lib.dp_certify_work_bytes.restype, lib.dp_certify_work_bytes.argtypes = size, [p, n64, n64]
    lib.dp_certify.restype = ctypes.c_int
    lib.dp_certify.argtypes = [p, p, n64, n64, p, p, n64, p, p, p, p, p, p, size, ctypes.c_char_p]


class _StreamOptions(ctypes.Structure):
    """runtime/native/stream.h dp_stream_options"""

    _fields_ = [("jsonl", ctypes.c_int), ("tsv", ctypes.c_int), ("classify_empty", ctypes.c_int),
                ("skip_empty", ctypes.c_int), ("text_field", ctypes.c_char_p), ("id_field", ctypes.c_char_p),
                ("top_k", ctypes.c_size_t), ("max_line_bytes", ctypes.c_size_t)]


class NativeEncoder:
    """Texts -> (ids, counts) exactly as runtime.encode.Encoder.encode, computed by the native library."""

    def __init__(self, lib: ctypes.CDLL, handle: int, path: str) -> None:
        self._lib, self._handle, self.path = lib, handle, path
        self._local = threading.local()  # one scratch space per thread: callers may share the classifier
        self._scratches: list[int] = []  # all of them, freed with the encoder
        self._scratch_lock = threading.Lock()

    @classmethod
    def open(cls, path: str | os.PathLike) -> tuple["NativeEncoder | None", str]:
        """(encoder, why) — encoder None with the reason when the fast path cannot serve this bundle."""
        lib = library()
        if lib is None:
            return None, "python (the native library is not built or DANPACK_NATIVE=0)"
        err = _Error()
        handle = lib.dp_load_path(os.fsencode(path), ctypes.byref(err))
        if not handle:
            return None, f"python (native refused the bundle: {err.message.decode('utf-8', 'replace')[:200]})"
        return cls(lib, handle, str(path)), "native"

    def __del__(self) -> None:
        for scratch in getattr(self, "_scratches", ()):
            self._lib.dp_scratch_free(scratch)
        self._scratches = []
        if getattr(self, "_handle", None):
            self._lib.dp_free(self._handle)
            self._handle = None

    def _scratch(self) -> int:
        scratch = getattr(self._local, "scratch", None)
        if scratch is None:
            scratch = self._lib.dp_scratch_new(self._handle)
            if not scratch:
                raise MemoryError("the native runtime could not allocate its scratch space")
            with self._scratch_lock:
                self._scratches.append(scratch)
            self._local.scratch = scratch
        return scratch

    def classify(self, texts: Sequence[str], labels: int) -> tuple[np.ndarray, np.ndarray] | None:
        """(B,) texts -> ((B, C) probabilities, (B, C) logits) by the native forward pass (gather, mean, layers,
        softmax in C: within 1e-6 of the numpy backend, not bit for bit); None when a text is not UTF-8-encodable.
        Made for few texts: one ctypes call, no numpy work but the two result arrays."""
        try:
            parts = [t.encode("utf-8") for t in texts]
        except UnicodeEncodeError:
            return None
        offsets = (ctypes.c_int64 * (len(parts) + 1))()
        total = 0
        for i, part in enumerate(parts):
            total += len(part)
            offsets[i + 1] = total
        probs = np.empty((len(parts), labels), dtype=np.float32)  # (B, C)
        logits = np.empty((len(parts), labels), dtype=np.float32)  # (B, C)
        err = _Error()
        if self._lib.dp_classify_flat(self._handle, self._scratch(), parts[0] if len(parts) == 1 else b"".join(parts),
                                      offsets, len(parts), probs.ctypes.data, logits.ctypes.data, ctypes.byref(err)):
            raise MemoryError(err.message.decode("utf-8", "replace"))
        return probs, logits

    def encode(self, texts: Sequence[str]) -> tuple[np.ndarray, np.ndarray] | None:
        """(B,) texts -> (B, T) int64 ids (padding 0) and (B,) int64 counts; None when a text is not UTF-8-encodable."""
        encoded = self.encode_known(texts)
        return None if encoded is None else encoded[:2]

    def encode_known(self, texts: Sequence[str]) -> tuple[np.ndarray, np.ndarray, np.ndarray] | None:
        """As Encoder.encode_known: (B, T) ids, (B,) counts and (B,) known-token counts; None as for encode, and for
        fewer than MIN_TEXTS texts."""
        flat_texts = self._flatten(texts)
        if flat_texts is None:
            return None
        data, offsets = flat_texts
        n = len(offsets) - 1
        counts, known, tokens = (np.zeros(n, dtype=np.int64) for _ in range(3))  # (B,) each; tokens: not needed here
        flat = np.empty(max(int(offsets[-1]), 64), dtype=np.int64)  # (room,): usually one id per few bytes
        err = _Error()
        scratch = self._scratch()
        while True:
            total = self._lib.dp_encode_flat(self._handle, scratch, data, offsets.ctypes.data, n,
                                             flat.ctypes.data, flat.size, counts.ctypes.data, known.ctypes.data,
                                             tokens.ctypes.data, ctypes.byref(err))
            if total < 0:
                raise MemoryError(err.message.decode("utf-8", "replace"))
            if total <= flat.size:
                break
            flat = np.empty(total, dtype=np.int64)  # ligatures can make more tokens than bytes: once more
        return (*pad(flat[:total], counts), known)

    @staticmethod
    def _flatten(texts: Sequence[str]) -> tuple[bytes, np.ndarray] | None:
        """(B,) texts -> their UTF-8 bytes joined and (B + 1,) int64 offsets; None for fewer than MIN_TEXTS texts or a
        text that is not UTF-8-encodable (a lone surrogate: the Python encoder takes it)."""
        if len(texts) < MIN_TEXTS:
            return None
        try:
            parts = [t.encode("utf-8") for t in texts]
        except UnicodeEncodeError:
            return None
        lengths = np.fromiter(map(len, parts), dtype=np.int64, count=len(parts))  # (B,)
        offsets = np.zeros(len(parts) + 1, dtype=np.int64)  # (B + 1,)
        np.cumsum(lengths, out=offsets[1:])
        return b"".join(parts), offsets

    def encode_unknown(self, texts: Sequence[str]) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray] | None:
        """(B, T) ids and (B,) counts as `encode`, (B,) int64 counts of the tokens without a row of their own (as
        runtime/certify.py encode_unknown counts them) and the (N,) uint32 FNV-1a hashes of those tokens, text after
        text in token order (Envelope.slots_of maps them to slots); None as for encode_known."""
        flat_texts = self._flatten(texts)
        if flat_texts is None:
            return None
        data, offsets = flat_texts
        n = len(offsets) - 1
        counts, unknown = np.zeros(n, dtype=np.int64), np.zeros(n, dtype=np.int64)  # (B,) each
        flat = np.empty(max(int(offsets[-1]), 64), dtype=np.int64)  # (room,): usually one id per few bytes
        hashes = np.empty(max(int(offsets[-1]) // 2, 64), dtype=np.uint32)  # (room,): a token takes a byte or more
        hash_total, err, scratch = ctypes.c_int64(), _Error(), self._scratch()
        while True:
            total = self._lib.dp_encode_unknown_flat(self._handle, scratch, data, offsets.ctypes.data, n,
                                                     flat.ctypes.data, flat.size, counts.ctypes.data,
                                                     unknown.ctypes.data, hashes.ctypes.data, hashes.size,
                                                     ctypes.byref(hash_total), ctypes.byref(err))
            if total < 0:
                raise MemoryError(err.message.decode("utf-8", "replace"))
            if total <= flat.size and hash_total.value <= hashes.size:
                break
            flat = np.empty(max(total, flat.size), dtype=np.int64)  # ligatures: more tokens than bytes; once more
            hashes = np.empty(max(hash_total.value, hashes.size), dtype=np.uint32)
        return (*pad(flat[:total], counts), unknown, hashes[: hash_total.value])


def pad(flat: np.ndarray, counts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Flat ids (sum n,) and counts (B,) -> the (B, T) padded ids runtime.forward.encode_batch builds."""
    if len(counts) == 1:
        return (flat if flat.size else np.zeros(1, dtype=np.int64)).reshape(1, -1).copy(), counts
    width = int(counts.max()) if len(counts) else 0
    ids = np.zeros((len(counts), max(width, 1)), dtype=np.int64)  # (B, T)
    ids[np.arange(ids.shape[1])[None, :] < counts[:, None]] = flat  # row-major fill of each row's first n slots
    return ids, counts


class NativeStream:
    """`danpack-run`'s records by the native library (runtime/native/stream.c, the C program's own record code):
    a batch of raw lines -> parsed records and their ids (`parse`), the backend's probabilities -> output bytes
    (`format`). The same bytes as runtime/stream_records.py (tests/test_native.py), which stays the fallback."""

    def __init__(self, encoder: NativeEncoder, handle: int) -> None:
        self._lib, self._encoder, self._handle = encoder._lib, encoder, handle  # the encoder keeps the bundle alive
        self._err = _Error()

    @classmethod
    def open(cls, encoder: "NativeEncoder | None", *, jsonl: bool, text_field: str, id_field: str | None, tsv: bool,
             top_k: int | None, max_line_bytes: int, classify_empty: bool, skip_empty: bool) -> "NativeStream | None":
        """A native stream for these options, or None (no compiled part, or a field name that is not UTF-8)."""
        if encoder is None:
            return None
        try:
            fields = text_field.encode("utf-8"), None if id_field is None else id_field.encode("utf-8")
        except UnicodeEncodeError:
            return None
        if b"\0" in fields[0] or (fields[1] is not None and b"\0" in fields[1]):
            return None
        opts = _StreamOptions(int(jsonl), int(tsv), int(classify_empty), int(skip_empty), fields[0], fields[1],
                              top_k or 0, max_line_bytes)
        err = _Error()
        handle = encoder._lib.dp_stream_new(encoder._handle, ctypes.byref(opts), ctypes.byref(err))
        return cls(encoder, handle) if handle else None

    def __del__(self) -> None:
        if getattr(self, "_handle", None):
            self._lib.dp_stream_free(self._handle)
            self._handle = None

    def parse(self, lines: list, first_line: int, overlong: object) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Raw lines (bytes, or the `overlong` marker) numbered from first_line -> the classifiable records' flat ids
        (sum n,), counts (N,) and known-token counts (N,), all int64."""
        flags = None
        if lines.count(overlong):
            flags = bytes(x is overlong for x in lines)
            lines = [b"" if x is overlong else x for x in lines]
        offsets = np.zeros(len(lines) + 1, dtype=np.int64)  # (B + 1,)
        np.cumsum(np.fromiter(map(len, lines), dtype=np.int64, count=len(lines)), out=offsets[1:])
        ok = self._lib.dp_stream_parse(self._handle, b"".join(lines), offsets.ctypes.data, flags, len(lines),
                                       first_line, ctypes.byref(self._err))
        if ok < 0:
            raise MemoryError(self._err.message.decode("utf-8", "replace"))
        total = self._lib.dp_stream_ids(self._handle, None, None, None)
        flat = np.empty(max(total, 1), dtype=np.int64)  # (sum n,)
        counts, known = np.empty(ok, dtype=np.int64), np.empty(ok, dtype=np.int64)  # (N,) each
        self._lib.dp_stream_ids(self._handle, flat.ctypes.data, counts.ctypes.data, known.ctypes.data)
        return flat[:total], counts, known

    def format(self, probs: np.ndarray | None) -> tuple[bytes, int]:
        """(N, C) float32 probabilities of the classifiable records -> (output bytes, error records)."""
        if probs is not None:
            probs = np.ascontiguousarray(probs, dtype=np.float32)  # (N, C)
        out, size, errors = ctypes.c_void_p(), ctypes.c_size_t(), ctypes.c_size_t()
        if self._lib.dp_stream_format(self._handle, None if probs is None else probs.ctypes.data, ctypes.byref(out),
                                      ctypes.byref(size), ctypes.byref(errors), ctypes.byref(self._err)):
            raise MemoryError(self._err.message.decode("utf-8", "replace"))
        return ctypes.string_at(out, size.value), errors.value


class _CertLayer(ctypes.Structure):
    """runtime/native/certify.h dp_cert_layer"""

    _fields_ = [("w", ctypes.c_void_p), ("w_abs", ctypes.c_void_p), ("bias", ctypes.c_void_p),
                ("allowance", ctypes.c_void_p), ("act", ctypes.c_int64), ("inputs", ctypes.c_int64),
                ("out", ctypes.c_int64)]


class _CertModel(ctypes.Structure):
    """runtime/native/certify.h dp_cert_model"""

    _fields_ = [("rows", ctypes.c_int64), ("width", ctypes.c_int64), ("q", ctypes.c_void_p),
                ("table", ctypes.c_void_p), ("steps", ctypes.c_void_p), ("row_terms", ctypes.c_void_p),
                ("certifiable", ctypes.c_void_p), ("terms", ctypes.c_int64), ("nlayers", ctypes.c_int64),
                ("layers", ctypes.c_void_p), ("contrast", ctypes.c_void_p), ("classes", ctypes.c_int64),
                ("envelope", ctypes.c_int64), ("skipped", ctypes.c_int64), ("env_lo", ctypes.c_void_p),
                ("env_hi", ctypes.c_void_p), ("nslots", ctypes.c_int64), ("minima", ctypes.c_void_p),
                ("pad_slot", ctypes.c_int64), ("largest", ctypes.c_double)]


_ACTIVATIONS = {None: 0, "relu": 1, "tanh": 2}  # certify.h DP_CERT_ACT_*
_ENV_NONE, _ENV_KEEP, _ENV_ONE, _ENV_SLOTS = range(4)  # certify.h DP_CERT_ENV_*


class NativeCertifier:
    """runtime/certify.py `certify_box` computed by the native library (runtime/native/certify.c, a port of the numpy
    code, which stays the reference): the bound's arrays are handed over once, each call passes the texts' ids,
    counts, unknown tokens (counts or slots) and top classes."""

    def __init__(self, lib: ctypes.CDLL, bound) -> None:
        self._lib = lib
        keep = []  # every array the C side points into, alive as long as this object

        def address(array: np.ndarray | None, dtype) -> int | None:
            if array is None:
                return None
            array = np.ascontiguousarray(array, dtype=dtype)
            keep.append(array)
            return array.ctypes.data

        table = bound.table  # (R, W)
        rows, width = table.shape
        layers = (_CertLayer * len(bound.layers))()
        for i, (w, w_abs, b, activation, allowance) in enumerate(bound.layers):
            layers[i] = _CertLayer(address(w, np.float64), address(w_abs, np.float64), address(b, np.float64),
                                   address(allowance, np.float64), _ACTIVATIONS[activation],
                                   0 if w is None else w.shape[1], b.shape[0])
        classes = bound.layers[-1][2].shape[0]
        env = bound.envelope
        model = _CertModel(rows, width, address(table, np.int8) if table.dtype == np.int8 else None,
                           None if table.dtype == np.int8 else address(table, np.float32),
                           address(bound.row_steps32, np.float32), address(bound.row_terms, np.float64),
                           address(bound.certifiable, np.uint8), bound.terms, len(bound.layers),
                           ctypes.addressof(layers), address(bound.contrast, np.float64), classes)
        if env is None or (not env.rows and not env.skipped):  # mean_box's branches
            model.envelope = _ENV_NONE
        elif env.rows:
            model.envelope = _ENV_SLOTS if env.by_token else _ENV_ONE
            model.env_lo, model.env_hi = address(env.lo, np.float64), address(env.hi, np.float64)
            if env.by_token:
                model.nslots, model.minima = env.minima.shape[0], address(env.minima, np.float64)  # (S, 2, W)
                model.pad_slot = env.minima.shape[0] - 1  # the slot _slot_hull's pads read (the empty slot)
                model.largest = env.largest
        else:
            model.envelope = _ENV_KEEP
        model.skipped = int(bool(env is not None and env.skipped))
        self._model, self._layers, self._keep = model, layers, keep
        self.classes = classes

    @classmethod
    def open(cls, bound) -> "NativeCertifier | None":
        """A certifier for this bound (runtime/certify.py BoxBound), or None without the native library or for an
        activation the port does not know."""
        lib = library()
        if lib is None or any(layer[3] not in _ACTIVATIONS for layer in bound.layers):
            return None
        return cls(lib, bound)

    def certify(self, top: np.ndarray, ids: np.ndarray, counts: np.ndarray, unknown: np.ndarray,
                lower: bool = False) -> np.ndarray | tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(B,) classes, (B, T) ids, (B,) counts, unknown ((B,) counts or (B, U) slots, as runtime/certify.py
        encode_unknown gives them) -> (B,) bool as certify_box; with `lower`, also the (B, C) lower bounds and (B,)
        covered of logit_gaps."""
        ids = np.ascontiguousarray(ids, dtype=np.int64)  # (B, T)
        counts, top = (np.ascontiguousarray(a, dtype=np.int64) for a in (counts, top))  # (B,) each
        unknown = np.ascontiguousarray(unknown, dtype=np.int64)  # (B,) or (B, U)
        slots = unknown if unknown.ndim == 2 else None
        batch, width = ids.shape
        if not (counts.shape == top.shape == (batch,) and unknown.shape[0] == batch):
            raise ValueError(f"certify: shapes {ids.shape}, {counts.shape}, {unknown.shape}, {top.shape} disagree")
        wide = 0 if slots is None else slots.shape[1]
        work = np.empty(self._lib.dp_certify_work_bytes(ctypes.byref(self._model), width, wide), dtype=np.uint8)
        certified = np.empty(batch, dtype=np.bool_)  # (B,)
        low = np.empty((batch, self.classes)) if lower else None  # (B, C)
        covered = np.empty(batch, dtype=np.bool_) if lower else None  # (B,)
        message = ctypes.create_string_buffer(256)
        if self._lib.dp_certify(ctypes.byref(self._model), ids.ctypes.data, batch, width, counts.ctypes.data,
                                None if slots is None else slots.ctypes.data, wide,
                                None if slots is not None else unknown.ctypes.data, top.ctypes.data,
                                certified.ctypes.data, None if low is None else low.ctypes.data,
                                None if covered is None else covered.ctypes.data, work.ctypes.data, work.size,
                                message):
            raise ValueError(message.value.decode("utf-8", "replace"))
        return (certified, low, covered) if lower else certified
