"""Robust summaries of repeated measurements: median, quartiles, tail percentile; paired ratios.

Shared machines are noisy, so every figure is a median over repeated runs with its spread
(interquartile range), and every comparison is a ratio of runs taken side by side.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Summary:
    """Order statistics of one series of measurements (same unit as the inputs)."""

    n: int
    median: float
    q1: float  # 25th percentile
    q3: float  # 75th percentile
    p99: float  # 99th percentile (the tail a device user feels)
    low: float
    high: float

    @property
    def iqr(self) -> float:
        return self.q3 - self.q1

    def scaled(self, factor: float) -> "Summary":
        """The same summary in another unit (seconds -> microseconds: factor 1e6)."""
        return Summary(self.n, *(v * factor for v in (self.median, self.q1, self.q3, self.p99, self.low, self.high)))


def summarize(values: Sequence[float] | np.ndarray) -> Summary:
    """Median, quartiles, p99, min and max of a non-empty series (numpy's linear percentiles)."""
    a = np.asarray(values, dtype=np.float64)
    if a.size == 0:
        raise ValueError("summarize needs at least one value")
    q1, median, q3, p99 = np.percentile(a, [25, 50, 75, 99])
    return Summary(int(a.size), float(median), float(q1), float(q3), float(p99), float(a.min()), float(a.max()))


def paired_ratios(numerator: Sequence[float], denominator: Sequence[float]) -> np.ndarray:
    """Round-by-round ratios of two series measured side by side (same length)."""
    a = np.asarray(numerator, dtype=np.float64)
    b = np.asarray(denominator, dtype=np.float64)
    if a.shape != b.shape:
        raise ValueError(f"paired series differ in length: {a.shape} vs {b.shape}")
    return a / b


# --- formatting ---------------------------------------------------------------------------------------


def fmt_seconds(seconds: float) -> str:
    """A duration with a unit that keeps 3 significant digits: 41.2 µs, 3.07 ms, 12.4 s."""
    if seconds != seconds:  # NaN
        return "n/a"
    s = abs(seconds)
    if s < 1e-3:
        return f"{seconds * 1e6:.1f} µs"
    if s < 1.0:
        return f"{seconds * 1e3:.2f} ms" if s < 0.1 else f"{seconds * 1e3:.1f} ms"
    return f"{seconds:.2f} s" if s < 100 else f"{seconds:.0f} s"


def fmt_rate(per_second: float) -> str:
    """A rate with thousands separators: 41,230/s (3 significant digits kept above 1,000)."""
    if per_second != per_second:
        return "n/a"
    if per_second >= 1000:
        digits = len(str(int(per_second))) - 3
        return f"{round(per_second, -digits):,.0f}/s"
    return f"{per_second:.1f}/s"


def fmt_bytes(n: float) -> str:
    """Bytes in decimal units (kB = 1,000 bytes), as file managers show them."""
    n = float(n)
    for unit, size in (("GB", 1e9), ("MB", 1e6), ("kB", 1e3)):
        if abs(n) >= size:
            return f"{n / size:.2f} {unit}" if abs(n) < 100 * size else f"{n / size:.1f} {unit}"
    return f"{int(n)} B"


def fmt_ratio(x: float) -> str:
    """A ratio: 41.2x, 1.23x, 0.87x."""
    if x != x:
        return "n/a"
    return f"{x:.1f}x" if x >= 10 else f"{x:.2f}x"


def fmt_percent(x: float, digits: int = 2) -> str:
    """A share in [0, 1] as a percentage: 0.9955 -> 99.55%."""
    return f"{100 * x:.{digits}f}%"


def fmt_spread(s: Summary, fmt) -> str:
    """Median with its interquartile range: '41.2 µs (IQR 40.1–43.0)'."""
    return f"{fmt(s.median)} (IQR {fmt(s.q1)}–{fmt(s.q3)})"
