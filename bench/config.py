"""How much a bench run measures: the full run (RESULTS.md) and the quick smoke run."""

from __future__ import annotations

from dataclasses import dataclass, replace
from pathlib import Path

BENCH_DIR = Path(__file__).resolve().parent
DEFAULT_WORK = BENCH_DIR / "out"  # generated data, models and bundles (gitignored, never committed)
DEFAULT_RESULTS = BENCH_DIR / "RESULTS.md"
CASES = ("demo", "glove", "synthetic", "long", "install")  # cases 1..5 of bench/README.md


@dataclass(frozen=True)
class BenchConfig:
    """Sizes and repetition counts; the defaults are the full run."""

    work: Path = DEFAULT_WORK  # where generated data, models and bundles go
    quick: bool = False  # smoke run: small sizes, few repetitions (figures are not meaningful)
    cases: tuple[str, ...] = CASES  # which cases to run
    seed: int = 2024  # scenario seed of the demo data (danpack.models_demo.scenario.DEFAULT_SEED)
    test_texts: int = 2000  # labelled demo test comments for fidelity (the whole test split)
    stream_texts: int = 50_000  # deployment stream: the pack corpus (the scenario's default size)
    run_lines: int = 100_000  # lines of the danpack-run input file (fresh comments, another seed)
    latency_calls: int = 3000  # timed single-text calls per contender (p50 / p99 from these)
    latency_warmup: int = 100  # untimed single-text calls per contender first
    batch_sizes: tuple[int, ...] = (1, 32, 256)  # batched throughput
    block_texts: int = 512  # texts per timed repetition of a batched run (batch 256: 2 calls)
    throughput_reps: int = 21  # timed repetitions per contender and batch size
    cold_reps: int = 7  # fresh subprocesses per cold-start kind
    stream_reps: int = 5  # danpack-run runs per bundle
    pack_reps: int = 3  # pack_model runs per demo/GloVe bundle (subprocess each)
    synthetic_reps: int = 3  # pack runs and loads per case-3 variant (each takes seconds)
    long_lengths: tuple[int, ...] = (200, 1000)  # tokens per long comment (case 4)
    long_texts: int = 40  # distinct long comments of each length
    long_calls: int = 400  # timed single-text calls per contender and length
    synthetic_rows: int = 400_000  # case 3 table rows
    synthetic_dim: int = 300  # case 3 table width
    synthetic_hidden: int = 64  # case 3 hidden layer
    overhead_rows: int = 20_000  # case 3: bytes beyond the int8 table and scales, measured at this many rows
    profile_calls: int = 2000  # session calls under onnxruntime's profiler
    startup_rounds: int = 15  # interleaved rounds of `danpack --help` etc. against `python -c pass` (case 5)

    @property
    def data_dir(self) -> Path:
        return self.work / "data"

    @property
    def models_dir(self) -> Path:
        return self.work / "models"

    @property
    def bundles_dir(self) -> Path:
        return self.work / "bundles"


def quick_config(base: BenchConfig) -> BenchConfig:
    """The smoke run: every code path, small sizes, under two minutes."""
    return replace(
        base, quick=True, test_texts=300, stream_texts=5000, run_lines=10_000, latency_calls=200, latency_warmup=20,
        block_texts=256, throughput_reps=3, cold_reps=2, stream_reps=1, pack_reps=1, synthetic_reps=1, long_texts=8, long_calls=40,
        synthetic_rows=20_000, profile_calls=200, startup_rounds=3,
    )
