"""Figures from fresh interpreters: danpack-run throughput, cold start and memory, pack time and memory."""

from __future__ import annotations

from pathlib import Path

from . import contenders as ct
from . import probes
from .config import BenchConfig
from .results import CaseReport, iqr_pct
from .stats import fmt_bytes, fmt_rate, fmt_ratio, fmt_seconds, fmt_spread, summarize
from .tables import make_table
from .workdata import say


def stream(bundle: Path, float_bundle: Path, lines: Path, config: BenchConfig, report: CaseReport) -> None:
    """danpack-run on the lines file: packed (both backends) and the float32 bundle, interleaved."""
    kinds = {"packed bundle, onnxruntime": (bundle, "onnxruntime"), "packed bundle, numpy": (bundle, "numpy"),
             "float32 bundle (unpruned), onnxruntime": (float_bundle, "onnxruntime")}
    names = list(kinds)
    runs: dict[str, list[dict]] = {n: [] for n in names}
    n_lines = sum(1 for _ in open(lines, "rb"))
    say(f"  danpack-run: {config.stream_reps} x {len(names)} runs over {n_lines:,} lines")
    for i in range(config.stream_reps):
        for n in names[i % len(names):] + names[: i % len(names)]:
            runs[n].append(probes.stream_run(kinds[n][0], lines, kinds[n][1]))
    rows = []
    for n in names:
        own = summarize([r["lines_per_s"] for r in runs[n]])
        wall = summarize([r["wall_lines_per_s"] for r in runs[n]])
        rss = summarize([r["hwm"] for r in runs[n]])
        rows.append((f"danpack-run, {n}", f"{fmt_rate(own.median)} {iqr_pct(own)}", fmt_rate(wall.median),
                     fmt_bytes(rss.median)))
        report.figures[f"stream.{n}"] = own.median
    report.figures["stream_lines_per_s"] = report.figures["stream.packed bundle, onnxruntime"]
    report.tables.append(make_table(
        f"danpack-run over a {n_lines:,}-line file (default options: JSONL out, to /dev/null)",
        ["run", "lines/s (stream, load excluded)", "lines/s (whole process)", "peak RSS"], rows,
        f"median of {config.stream_reps} runs each, interleaved; 'stream' is danpack-run's own --verbose figure; "
        "'whole process' includes interpreter start, imports and bundle load"))


def cold_and_memory(model_dir: Path, bundle: Path, float_bundle: Path, lines: Path, config: BenchConfig,
                    report: CaseReport, with_torch: bool, text: str) -> None:
    """Cold start (load + first answer in a fresh interpreter, imports excluded) and peak RSS, interleaved."""
    kinds = {
        ct.PACKED_ORT: {"what": "packed", "path": str(bundle), "backend": "onnxruntime"},
        ct.PACKED_NUMPY: {"what": "packed", "path": str(bundle), "backend": "numpy"},
        ct.FLOAT_ONNX: {"what": "packed", "path": str(float_bundle), "backend": "onnxruntime"},
        ct.FLOAT_NUMPY: {"what": "float-numpy", "path": str(model_dir)},
    }
    if with_torch:
        kinds[ct.TORCH_EAGER] = {"what": "torch-eager", "path": str(model_dir)}
    names = list(kinds)
    runs: dict[str, list[dict]] = {n: [] for n in names}
    say(f"  cold start and peak memory: {config.cold_reps} x {len(names)} fresh interpreters")
    for i in range(config.cold_reps):
        for n in names[i % len(names):] + names[: i % len(names)]:
            request = {"kind": "cold", "text": text, "texts_path": str(lines), "texts_limit": config.test_texts,
                       **kinds[n]}
            runs[n].append(probes.run_worker(request))
    rows = []
    for n in names:
        cold = summarize([r["seconds"] for r in runs[n]])
        base = summarize([r["hwm_imports"] for r in runs[n]]).median
        load = summarize([r["hwm_load"] for r in runs[n]]).median
        peak = summarize([r["hwm"] for r in runs[n]]).median
        rows.append((ct.LABELS[n], fmt_spread(cold, fmt_seconds), fmt_bytes(base), fmt_bytes(load), fmt_bytes(peak),
                     fmt_bytes(peak - base)))
        report.figures[f"cold.{n}"] = cold.median
        report.figures[f"rss.{n}"] = peak
    report.tables.append(make_table(
        "Cold start and memory (fresh interpreter per run)",
        ["contender", "cold start: load + first answer", "RSS after imports", "peak after load",
         f"peak after {config.test_texts:,} texts", "peak − imports"], rows,
        f"median of {config.cold_reps} runs each, interleaved; imports are not timed; the bundle file is in the page "
        "cache; memory = the child's VmHWM (peak resident set)"))


def pack_runs(model_dir: Path, out: Path, options: dict, reps: int) -> list[dict]:
    """pack_model in `reps` fresh interpreters (pack time and peak memory of the call)."""
    return [probes.run_worker({"kind": "pack", "model_dir": str(model_dir), "out": str(out), "options": options})
            for _ in range(reps)]


def pack_table(title: str, variants: dict[str, list[dict]], table_bytes: int | None, report: CaseReport,
               prefix: str) -> None:
    """Pack time and peak memory of each variant (optionally against the table's bytes)."""
    rows = []
    for name, runs in variants.items():
        secs = summarize([r["seconds"] for r in runs])
        peak = summarize([r["hwm"] for r in runs]).median
        base = summarize([r["hwm_imports"] for r in runs]).median
        cells = [name, fmt_spread(secs, fmt_seconds) if len(runs) > 1 else fmt_seconds(secs.median),
                 fmt_bytes(peak), fmt_bytes(peak - base)]
        if table_bytes:
            cells.append(fmt_ratio(peak / table_bytes))
        rows.append(cells)
        report.figures[f"{prefix}.{name}.seconds"] = secs.median
        report.figures[f"{prefix}.{name}.peak"] = peak
    columns = ["pack", "time", "peak RSS", "peak − imports"] + (["peak / table bytes"] if table_bytes else [])
    counts = sorted({len(r) for r in variants.values()}, reverse=True)
    report.tables.append(make_table(title, columns, rows,
                                    f"pack_model in a fresh interpreter ({' or '.join(map(str, counts))} run(s) each, "
                                    "interleaved); time excludes interpreter start and imports"))
