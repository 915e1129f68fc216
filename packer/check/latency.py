"""Side-by-side timing of the bundle and the float original, interleaved in one run.

Both sides go through the same runtime path (tokenizer, encoder, backend): the float side is
the float original exported unpruned to a float32 ONNX bundle in memory. Calls alternate
(A B, B A, A B, ...), so drift of the machine (frequency scaling, other load) hits both sides
alike and neither always runs first. Absolute times depend on the machine; the ratios are the
figure worth comparing.
"""

from __future__ import annotations

import os
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from danpack.runtime.bundle import decode_bundle
from danpack.runtime.classifier import Classifier

from danpack.check.errors import CheckError


@dataclass(frozen=True)
class LatencyOptions:
    """How much timing a check does."""

    texts: int = 200  # single-text calls timed per side (p50 / p95 come from these)
    batch: int = 64  # texts per batched call (throughput)
    batches: int = 30  # batched calls timed per side (the median of these sets the throughput)
    warmup: int = 10  # untimed single calls per side first, plus 2 untimed batched calls

    def __post_init__(self) -> None:
        for name in ("texts", "batch", "batches"):
            if getattr(self, name) < 1:
                raise CheckError(f"latency {name} {getattr(self, name)} must be at least 1")
        if self.warmup < 0:
            raise CheckError(f"latency warm-up {self.warmup} must be 0 or more")


@dataclass(frozen=True)
class SideTiming:
    """Raw timings of one side, in nanoseconds."""

    single_ns: np.ndarray  # (texts,) one predict call on one text each
    batch_ns: np.ndarray  # (batches,) one predict call on `batch` texts each
    batch: int

    def p(self, q: float) -> float:
        """Percentile q of the single-text latency, in milliseconds."""
        return float(np.percentile(self.single_ns, q)) / 1e6

    @property
    def throughput(self) -> float:
        """Texts per second of a typical batched call: batch size / median call time (robust to stray pauses)."""
        return self.batch / (float(np.median(self.batch_ns)) / 1e9)


@dataclass(frozen=True)
class PairTiming:
    """Both sides' timings and the options used."""

    packed: SideTiming
    float: SideTiming
    options: LatencyOptions

    def figures(self) -> dict:
        """The latency figures of the check (keys of danpack.check.compare.FIGURES)."""
        return {
            "latency_p50_ms_float": self.float.p(50),
            "latency_p95_ms_float": self.float.p(95),
            "latency_p50_ms_bundle": self.packed.p(50),
            "latency_p95_ms_bundle": self.packed.p(95),
            "latency_ratio": self.packed.p(50) / self.float.p(50),
            "latency_p95_ratio": self.packed.p(95) / self.float.p(95),
            "throughput_float": self.float.throughput,
            "throughput_bundle": self.packed.throughput,
            "throughput_ratio": self.packed.throughput / self.float.throughput,
        }

    def settings(self) -> dict:
        o = self.options
        return {"single_texts": o.texts, "batch": o.batch, "batches": o.batches, "warmup": o.warmup,
                "order": "interleaved, alternating which side runs first", "clock": "time.perf_counter_ns",
                "cpu_count": os.cpu_count()}


def pick_texts(texts: Sequence[str], count: int) -> list[str]:
    """`count` texts spread evenly over the set (cycling when the set is smaller)."""
    if len(texts) >= count:
        return [texts[i] for i in np.linspace(0, len(texts) - 1, count).round().astype(int)]
    return [texts[i % len(texts)] for i in range(count)]


def measure_pair(run_a: Callable[[list[str]], object], run_b: Callable[[list[str]], object],
                 texts: Sequence[str], options: LatencyOptions,
                 clock: Callable[[], int] = time.perf_counter_ns) -> tuple[SideTiming, SideTiming]:
    """Time two predict functions on the same inputs, interleaved; returns (timing of a, timing of b)."""
    singles = pick_texts(texts, options.texts)
    pool = pick_texts(texts, options.batch * options.batches)
    batches = [pool[j * options.batch : (j + 1) * options.batch] for j in range(options.batches)]
    runs = (run_a, run_b)

    # 1. warm-up: caches, allocator, onnxruntime's first-run work; never timed
    for j in range(options.warmup):
        for r in runs:
            r([singles[j % len(singles)]])
    for _ in range(2 if options.warmup else 0):
        for r in runs:
            r(batches[0])

    def timed(calls: list[list[str]]) -> np.ndarray:
        ns = np.zeros((2, len(calls)), dtype=np.int64)  # (side, call)
        for j, call in enumerate(calls):
            order = (0, 1) if j % 2 == 0 else (1, 0)  # A B, B A, A B, ...
            for side in order:
                start = clock()
                runs[side](call)
                ns[side, j] = clock() - start
        return ns

    # 2. single texts, then 3. batches, both interleaved
    single = timed([[t] for t in singles])
    batched = timed(batches)
    return (SideTiming(single[0], batched[0], options.batch), SideTiming(single[1], batched[1], options.batch))


def open_float_onnx(model_dir: str | os.PathLike, backend: str = "onnxruntime") -> Classifier:
    """The float original exported unpruned to a float32 ONNX bundle (in memory), on the runtime path."""
    from danpack.pack.build import PackOptions, pack_model

    result = pack_model(model_dir, None, PackOptions(quantize=False, fold="no"))
    return Classifier(decode_bundle(result.data, "float32 ONNX export of the float original"), backend)


def measure_check_latency(model_dir: str | os.PathLike, packed: Classifier, texts: Sequence[str],
                          options: LatencyOptions, backend: str = "onnxruntime") -> PairTiming:
    """Latency of the bundle against the float original's float32 ONNX export, side by side."""
    baseline = open_float_onnx(model_dir, backend)
    a, b = measure_pair(packed.predict_proba, baseline.predict_proba, texts, options)
    return PairTiming(a, b, options)
