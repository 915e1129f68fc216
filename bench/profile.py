"""Where the time of one predict goes: tokenizer, encoder, session call, and inside the model.

Three views of the packed bundle:
1. the call split in stages (tokenize, vocabulary lookup + padding, backend run), each timed alone;
2. onnxruntime's own profiler: kernel time per operator type (Gather, MatMul, Gemm, ...), and the
   part of session.run spent outside the kernels (Python binding, input checks, allocation);
3. the numpy backend's steps (gather, dequantise, masked mean, layers, softmax), timed one by one.
"""

from __future__ import annotations

import gc
import json
import os
import time
from collections import defaultdict
from collections.abc import Callable, Sequence
from pathlib import Path

import numpy as np

from danpack.runtime.bundle import Bundle
from danpack.runtime.classifier import Classifier
from danpack.runtime.forward import run_layers, softmax

from .stats import summarize
from .timing import interleave


def _median_seconds(fn: Callable[[], object], reps: int, inner: int = 1) -> float:
    """Median seconds of one fn() call over `reps` timed groups of `inner` calls (after 3 untimed groups)."""
    for _ in range(3):
        for _ in range(inner):
            fn()
    times = []
    gc.disable()
    try:
        for _ in range(reps):
            start = time.perf_counter_ns()
            for _ in range(inner):
                fn()
            times.append((time.perf_counter_ns() - start) * 1e-9 / inner)
    finally:
        gc.enable()
    return summarize(times).median


def stage_split(classifier: Classifier, texts: Sequence[str], batch: int, rounds: int) -> dict[str, float]:
    """Seconds per comment of each stage of predict_proba at a batch size ("tokenize" NaN when the native encoder
    does tokenizing, lookup and padding in one call).

    The stages are timed interleaved (one call of each per round, rotating) on the same chunks
    of comments, so they see the same machine; medians over the rounds.
    """
    encode = classifier._encode  # what predict runs: the native encoder when the fast path is open (8+ texts)
    chunks = [list(texts[i : i + batch]) for i in range(0, len(texts) - batch + 1, batch)] or [list(texts[:batch])]
    encoded = [encode(c) for c in chunks]
    n = len(chunks)
    calls = {
        "encode": lambda i: encode(chunks[i % n]),
        "backend": lambda i: classifier.backend.run(*encoded[i % n]),
        "predict": lambda i: classifier.predict_proba(chunks[i % n]),
    }
    native = classifier.native is not None and classifier.native.encode(chunks[0]) is not None
    if not native:  # the Python encoder: its tokenizer timed apart (the native one tokenizes inside its call)
        tokenize = classifier.encoder.tokenizer.tokenize
        calls["tokenize"] = lambda i: [tokenize(t) for t in chunks[i % n]]
    seconds = interleave(calls, rounds, warmup=min(rounds, 20))
    stages = {k: summarize(v).median / len(chunks[0]) for k, v in seconds.items()}
    stages.setdefault("tokenize", float("nan"))  # NaN: inside the native encoder's one call
    return stages


def _session(bundle: Bundle, profile_prefix: str | None):
    """A session over the bundle like runtime.backends.OrtBackend builds it, optionally with the profiler on."""
    import onnxruntime as ort

    from danpack.runtime.backends import session_options

    options = session_options(1)
    if profile_prefix is not None:
        options.enable_profiling = True
        options.profile_file_prefix = profile_prefix
    names = sorted(bundle.tensors)
    options.add_external_initializers(names, [ort.OrtValue.ortvalue_from_numpy(bundle.tensors[n]) for n in names])
    return ort.InferenceSession(bundle.graph, options, providers=["CPUExecutionProvider"])


def _idle_graph() -> bytes:
    """A graph with the bundle graph's inputs and outputs that does almost nothing: the fixed cost of session.run."""
    from onnx import TensorProto, helper

    nodes = [helper.make_node("Cast", ["counts"], ["counts_f"], to=TensorProto.FLOAT),
             helper.make_node("Identity", ["counts_f"], ["probs"]),
             helper.make_node("Identity", ["counts_f"], ["logits"])]
    graph = helper.make_graph(
        nodes, "idle",
        [helper.make_tensor_value_info("ids", TensorProto.INT64, ["batch", "tokens"]),
         helper.make_tensor_value_info("counts", TensorProto.INT64, ["batch"])],
        [helper.make_tensor_value_info("probs", TensorProto.FLOAT, ["batch"]),
         helper.make_tensor_value_info("logits", TensorProto.FLOAT, ["batch"])])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    return model.SerializeToString()


def ort_operator_profile(bundle: Bundle, ids: np.ndarray, counts: np.ndarray, calls: int, work: Path) -> dict:
    """session.run wall time against an idle graph's (interleaved), and each operator type's share of kernel time.

    onnxruntime's profiler adds microseconds to every node, so its absolute times are inflated
    for small calls; only the shares between operator types are reported from it.
    """
    from .contenders import ort_session

    work.mkdir(parents=True, exist_ok=True)
    feed = {"ids": ids, "counts": counts}
    plain, idle = _session(bundle, None), ort_session(_idle_graph())
    wall = interleave({"bundle": lambda i: plain.run(("probs", "logits"), feed),
                       "idle": lambda i: idle.run(("probs", "logits"), feed)}, calls, warmup=20)
    profiled = _session(bundle, str(work / "ort-profile"))
    for _ in range(max(20, calls // 4)):
        profiled.run(("probs", "logits"), feed)
    path = profiled.end_profiling()
    try:
        events = json.loads(Path(path).read_text(encoding="utf-8"))
    finally:
        os.unlink(path)
    by_op: dict[str, float] = defaultdict(float)
    for e in events:
        if e.get("cat") == "Node" and str(e.get("name", "")).endswith("_kernel_time"):
            by_op[e.get("args", {}).get("op_name", "?")] += float(e.get("dur", 0))
    total = sum(by_op.values()) or 1.0
    return {
        "session_run": summarize(wall["bundle"]).median,
        "idle_run": summarize(wall["idle"]).median,
        "kernel_share": {op: us / total for op, us in sorted(by_op.items(), key=lambda kv: -kv[1])},
    }


def numpy_steps(bundle: Bundle, ids: np.ndarray, counts: np.ndarray, reps: int) -> dict[str, float]:
    """Seconds per call of each step of runtime.forward on the bundle's int8 tensors (same arithmetic)."""
    t = bundle.tensors
    table, scales = t["table"], t.get("scales")
    from danpack.runtime.backends import NumpyBackend

    layers = NumpyBackend(bundle).layers
    width = ids.shape[1]
    inner = max(1, 4000 // max(1, ids.size))
    mask = np.arange(width)[None, :] < counts[:, None]  # (B, T)
    rows = table[ids].astype(np.float32)  # (B, T, W)
    weight = mask.astype(np.float32) * (scales[ids] if scales is not None else 1.0)  # (B, T)
    total = np.einsum("bt,btd->bd", weight, rows)  # (B, W)
    mean = total / np.maximum(counts, 1).astype(np.float32)[:, None]  # (B, W)
    logits = run_layers(mean, layers)  # (B, C)
    steps = {
        "mask": lambda: np.arange(width)[None, :] < counts[:, None],
        "gather rows + cast": lambda: table[ids].astype(np.float32),
        "gather scales + weights": lambda: mask.astype(np.float32) * (scales[ids] if scales is not None else 1.0),
        "masked mean (einsum)": lambda: np.einsum("bt,btd->bd", weight, rows) / np.maximum(counts, 1).astype(np.float32)[:, None],
        "layers (matmul, bias, activation)": lambda: run_layers(mean, layers),
        "softmax": lambda: softmax(logits),
    }
    return {name: _median_seconds(fn, reps, inner) for name, fn in steps.items()}
