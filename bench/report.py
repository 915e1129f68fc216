"""Targets and RESULTS.md: every figure judged against its target, missed ones said plainly with the profile."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

from . import contenders as ct
from .results import CaseReport
from .stats import fmt_bytes, fmt_percent, fmt_rate, fmt_ratio, fmt_seconds
from .tables import Table, make_table, render_markdown, render_text


@dataclass(frozen=True)
class Target:
    """One target: what was asked, what was measured, and whether it holds (None: not measured)."""

    name: str
    goal: str
    measured: str
    met: bool | None
    why: str = ""  # for a missed target: where the time or bytes go


def _get(reports: dict[str, CaseReport], case: str, key: str):
    r = reports.get(case)
    return None if r is None else r.figures.get(key)


def _stages(f: dict, batch: int) -> str:
    tok, enc, back, total = (f[f"profile.{batch}.{k}"] for k in ("tokenize", "encode", "backend", "predict"))
    head = f"At batch {batch} a packed predict costs {fmt_seconds(total)} per comment: "
    if tok != tok:  # NaN: the native encoder tokenizes, looks up and pads in one call
        head += f"native encoder (tokenizer, lookup, padding) {fmt_seconds(enc)} ({fmt_percent(enc / total, 0)})"
    else:
        head += (f"tokenizer {fmt_seconds(tok)} ({fmt_percent(tok / total, 0)}), vocabulary lookup + padding "
                 f"{fmt_seconds(max(enc - tok, 0))}")
    return head + f", backend {fmt_seconds(back)} ({fmt_percent(back / total, 0)})"


def _where(reports: dict[str, CaseReport], case: str, batch: int) -> str:
    """Where a packed predict's time goes at a batch size, from the case's own profile."""
    r = reports.get(case)
    if r is None or f"profile.{batch}.predict" not in r.figures:
        return ""
    return _stages(r.figures, batch) + f" ({r.title} profile)"


def _ceiling(reports: dict[str, CaseReport], case: str, batch: int, base: str, what: str) -> str:
    """Why a throughput ratio stays low: the ratio even a free packed backend would reach (Amdahl's law).

    With packed time P = E + K (E: tokenizer + vocabulary lookup, K: backend) and the measured ratio
    r = F / P, a backend costing nothing gives F / E = r / (E / P); E / P comes from the case's profile.
    """
    r = reports.get(case)
    if r is None or f"profile.{batch}.encode" not in r.figures or f"speedup.{batch}.{base}" not in r.figures:
        return ""
    f = r.figures
    share = f[f"profile.{batch}.encode"] / f[f"profile.{batch}.predict"]
    ratio = f[f"speedup.{batch}.{base}"]
    return (f"{_stages(f, batch)}. Tokenizer and vocabulary lookup, which the {what} pays as well, are "
            f"{fmt_percent(share, 0)} of a packed predict at this batch size, so even a packed backend costing "
            f"nothing would lift this ratio to at most {fmt_ratio(ratio)} / {share:.2f} = {fmt_ratio(ratio / share)}")


def judge(reports: dict[str, CaseReport]) -> list[Target]:
    """Every target of bench/README.md against this run's figures."""
    out: list[Target] = []

    def add(name, goal, value, ok, fmt, why=""):
        if value is None:
            out.append(Target(name, goal, "not measured", None))
        else:
            out.append(Target(name, goal, fmt(value), bool(ok(value)), "" if ok(value) else why))

    ratio = _get(reports, "glove", "size_ratio")
    add("GloVe bundle size", "≥ 40x smaller than the float model directory", ratio, lambda v: v >= 40, fmt_ratio,
        "see the GloVe size table for the bytes by part")
    agree = _get(reports, "glove", f"agreement.{ct.PACKED_ORT}")
    add("GloVe bundle agreement", "≥ 99.5% same top label as the float original", agree, lambda v: v >= 0.995,
        fmt_percent, "see the GloVe fidelity table")
    for case, name in (("demo-sentiment", "demo sentiment"), ("demo-topic", "demo topic"), ("glove", "GloVe")):
        for base, need, what in ((ct.FLOAT_ONNX, 1.2, "float ONNX model"), (ct.TORCH_EAGER, 2.0, "PyTorch eager module")):
            for b in (32, 256):
                v = _get(reports, case, f"speedup.{b}.{base}")
                add(f"{name}: batch {b} throughput vs {what}", f"≥ {need}x", v, lambda x, n=need: x >= n, fmt_ratio,
                    _ceiling(reports, case, b, base, what))
    rows, dim = _get(reports, "synthetic", "rows"), _get(reports, "synthetic", "dim")
    syn = f"synthetic {rows:,} x {dim}" if rows else "synthetic 400,000 x 300"
    add(f"{syn}: pack time", "< 20 s", _get(reports, "synthetic", "pack_seconds"), lambda v: v < 20,
        fmt_seconds, "see the synthetic pack table")
    peak, table = _get(reports, "synthetic", "pack_peak"), _get(reports, "synthetic", "table_bytes")
    add(f"{syn}: pack peak memory", "< 3x the table's bytes",
        None if peak is None else peak / table, lambda v: v < 3, lambda v: f"{fmt_ratio(v)} ({fmt_bytes(peak)})",
        "see the synthetic pack table (the interpreter and its imports alone hold about 55 MB)")
    peak_nf = _get(reports, "synthetic", "pack_peak_nofold")
    add(f"{syn}, fold=no: pack time", "< 20 s", _get(reports, "synthetic", "pack_seconds_nofold"),
        lambda v: v < 20, fmt_seconds)
    add(f"{syn}, fold=no: pack peak memory", "< 3x the table's bytes",
        None if peak_nf is None else peak_nf / table, lambda v: v < 3, lambda v: f"{fmt_ratio(v)} ({fmt_bytes(peak_nf)})",
        "see the synthetic pack table (the interpreter and its imports alone hold about 55 MB)")
    framing = _get(reports, "synthetic", "overhead_framing.auto")
    add("synthetic 20,000 rows: bytes beyond the int8 table and scales", "< 5% of the bundle",
        _get(reports, "synthetic", "overhead.auto"), lambda v: v < 0.05, lambda v: fmt_percent(v, 2),
        "" if framing is None else f"graph, manifest and msgpack framing are {fmt_percent(framing, 2)} of the bundle; "
        "the rest is the vocabulary (one zlib stream) and the layers; the overhead table of case 3 also gives "
        "the figure with GloVe's most frequent words as tokens")
    demo = "demo-sentiment"
    add("demo sentiment: single predict p50", "< 60 µs", _get(reports, demo, f"latency_p50.{ct.PACKED_ORT}"),
        lambda v: v < 60e-6, fmt_seconds, _where(reports, demo, 1))
    add("demo sentiment: single predict p99", "< 250 µs", _get(reports, demo, f"latency_p99.{ct.PACKED_ORT}"),
        lambda v: v < 250e-6, fmt_seconds, _where(reports, demo, 1))
    add("demo sentiment: batched throughput (batch 256)", "≥ 40,000 comments/s",
        _get(reports, demo, f"throughput.256.{ct.PACKED_ORT}"), lambda v: v >= 40_000, fmt_rate, _where(reports, demo, 256))
    add("demo sentiment: danpack-run", "≥ 25,000 lines/s", _get(reports, demo, "stream_lines_per_s"),
        lambda v: v >= 25_000, fmt_rate, _where(reports, demo, 32) + "; danpack-run adds line parsing and JSON output")
    add("demo sentiment: cold start", "< 30 ms", _get(reports, demo, f"cold.{ct.PACKED_ORT}"),
        lambda v: v < 0.030, fmt_seconds, "bundle read + checksum + session creation + probe; see the cold start table")
    add("`danpack --help` start-up", "≤ 4x `python -c pass`", _get(reports, "install", "startup.danpack --help"),
        lambda v: v <= 4, fmt_ratio, "see the start-up table of case 5: typer and its imports")
    return out


def headline_table(reports: dict[str, CaseReport]) -> Table | None:
    """One row per trained model: the figures a reader looks for first."""
    rows = []
    for key in ("demo-sentiment", "demo-topic", "glove"):
        r = reports.get(key)
        if r is None or "bundle_bytes" not in r.figures:
            continue
        f = r.figures
        g = (lambda k: f.get(k, float("nan")))
        rows.append((
            r.title.split(" (")[0].split(". ", 1)[-1], fmt_bytes(f["float_dir_bytes"]), fmt_bytes(f["bundle_bytes"]),
            fmt_ratio(f["size_ratio"]), fmt_percent(g(f"agreement.{ct.PACKED_ORT}")),
            f"{100 * g(f'accuracy_drop.{ct.PACKED_ORT}'):+.2f} pt", fmt_seconds(g(f"latency_p50.{ct.PACKED_ORT}")),
            fmt_rate(g(f"throughput.256.{ct.PACKED_ORT}")), fmt_ratio(g(f"speedup.256.{ct.FLOAT_ONNX}")),
            fmt_ratio(g(f"speedup.256.{ct.TORCH_EAGER}")), fmt_rate(g("stream_lines_per_s")),
            fmt_seconds(g(f"cold.{ct.PACKED_ORT}")), fmt_seconds(g(f"cold.{ct.FLOAT_ONNX}"))))
    if not rows:
        return None
    return make_table(
        "Headline (packed bundle, onnxruntime backend, one thread)",
        ["model", "float dir", "bundle", "smaller by", "agreement", "accuracy drop", "single p50", "batch 256",
         "vs float ONNX", "vs PyTorch eager", "danpack-run", "cold start", "cold start, float ONNX"], rows,
        "ratios at batch 256, paired (>1: the bundle is faster); danpack-run: lines/s with the bundle loaded")


def targets_table(targets: Sequence[Target]) -> Table:
    rows = [(t.name, t.goal, t.measured, {True: "met", False: "MISSED", None: "not measured"}[t.met])
            for t in targets]
    return make_table("Targets", ["figure", "target", "measured", "verdict"], rows)


def machine_table(machine: dict) -> Table:
    libs = machine["libraries"]
    rows = [
        ("date", machine["date"]),
        ("CPU", machine["cpu"]),
        ("cores", f"{machine['cores']} ({machine['usable_cores']} usable by this process)"),
        ("memory", fmt_bytes(machine["memory"]) if machine["memory"] else "unknown"),
        ("system", machine["system"]),
        ("libraries", ", ".join(f"{k} {v}" for k, v in libs.items())),
        ("thread settings", ", ".join(f"{k}={v}" for k, v in machine["threads"].items())),
        ("load average at start", "n/a" if machine["load_average"] is None
         else ", ".join(f"{x:.2f}" for x in machine["load_average"])),
    ]
    return make_table("Machine", ["", "value"], rows)


def render_results(machine: dict, reports: Sequence[CaseReport], targets: Sequence[Target], seconds: float,
                   quick: bool, command: str) -> str:
    """The whole RESULTS.md."""
    lines = ["# danpack bench results", ""]
    lines.append(f"Written by `{command}` on {machine['date']} in {seconds / 60:.1f} minutes"
                 + (" (quick smoke run: sizes and repetitions too small for the figures to mean much)." if quick else "."))
    lines.append("Method, cases and targets: [bench/README.md](README.md). Every ratio compares runs taken side by side "
                 "in the same process (interleaved, rotating order), medians with interquartile ranges; one intra-op "
                 "thread everywhere; every contender pays for the tokenizer. The packed contenders run as `runtime.load` "
                 "opens a bundle: with the native fast path when the compiled part is built. The C program, the fast "
                 "path on and off, and their targets: [bench/NATIVE.md](NATIVE.md) (`python -m bench.native`).")
    lines += ["", render_markdown(machine_table(machine))]
    headline = headline_table({r.key: r for r in reports})
    if headline is not None:
        lines.append(render_markdown(headline))
    lines.append(render_markdown(targets_table(targets)))
    missed = [t for t in targets if t.met is False]
    if missed:
        lines.append("### Missed targets, and where the time goes\n")
        for t in missed:
            lines.append(f"- **{t.name}**: {t.measured} against {t.goal}." + (f" {t.why}." if t.why else ""))
        lines.append("")
    for r in reports:
        lines.append(f"## {r.title}\n")
        if r.intro:
            lines.append(r.intro + "\n")
        for table in r.tables:
            lines.append(render_markdown(table))
        if r.notes:
            lines.append("Notes:\n")
            lines += [f"- {n}" for n in r.notes]
            lines.append("")
    return "\n".join(lines).rstrip() + "\n"


def render_console(reports: Sequence[CaseReport], targets: Sequence[Target]) -> str:
    parts = []
    for r in reports:
        parts.append(f"\n#### {r.title}\n")
        parts += [render_text(t) for t in r.tables]
        parts += [f"note: {n}" for n in r.notes]
    parts.append("")
    headline = headline_table({r.key: r for r in reports})
    if headline is not None:
        parts.append(render_text(headline))
    parts.append(render_text(targets_table(targets)))
    return "\n".join(parts)
