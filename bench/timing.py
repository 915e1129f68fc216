"""Interleaved in-process timing: every round calls each contender once, in a rotated order.

Rotation (A B C, B C A, C A B, ...) puts each contender in each position equally often, so a
slow phase of the machine, cache warmth left by the previous call, or frequency steps hit all
of them alike; ratios are then taken round by round. The garbage collector is paused while a
block is timed (a collection would land on whichever call happened to trigger it).
"""

from __future__ import annotations

import gc
import time
from collections.abc import Callable, Sequence

import numpy as np

from .stats import Summary, paired_ratios, summarize


def interleave(calls: dict[str, Callable[[int], object]], rounds: int, warmup: int = 0) -> dict[str, np.ndarray]:
    """Seconds per call of each named call, `rounds` times; call(i) gets the round index."""
    names = list(calls)
    for i in range(warmup):  # untimed, same rotation
        for name in names[i % len(names):] + names[: i % len(names)]:
            calls[name](i)
    out = {name: np.empty(rounds, dtype=np.float64) for name in names}
    clock = time.perf_counter_ns
    enabled = gc.isenabled()
    gc.collect()
    gc.disable()
    try:
        for i in range(rounds):
            shift = i % len(names)
            for name in names[shift:] + names[:shift]:
                call = calls[name]
                start = clock()
                call(i)
                out[name][i] = (clock() - start) * 1e-9
    finally:
        if enabled:
            gc.enable()
    return out


def single_latency(predicts: dict[str, Callable], texts: Sequence[str], calls: int, warmup: int) -> dict[str, np.ndarray]:
    """Seconds per predict([one text]) per contender; text i of the round cycles through `texts`."""
    n = len(texts)
    return interleave({k: (lambda i, p=p: p([texts[i % n]])) for k, p in predicts.items()}, calls, warmup)


def batched_rates(predicts: dict[str, Callable], texts: Sequence[str], batch: int, block: int, reps: int,
                  warmup: int = 1) -> dict[str, np.ndarray]:
    """Texts per second per repetition: each repetition answers `block` texts in calls of `batch`.

    Repetition i starts at a different offset of `texts`, so no two repetitions see the same block.
    """
    n = len(texts)
    block = max(block, batch)

    def blocks(i: int) -> list[list[str]]:
        start = (i * block) % n
        chunk = [texts[(start + j) % n] for j in range(block)]
        return [chunk[j : j + batch] for j in range(0, block, batch)]

    prepared = [blocks(i) for i in range(reps + warmup)]

    def make(predict):
        def call(i: int) -> None:
            for piece in prepared[i % len(prepared)]:
                predict(piece)
        return call

    seconds = interleave({k: make(p) for k, p in predicts.items()}, reps, warmup)
    return {k: block / v for k, v in seconds.items()}


def ratio_summary(a: np.ndarray, b: np.ndarray) -> Summary:
    """Summary of round-by-round ratios a / b."""
    return summarize(paired_ratios(a, b))
