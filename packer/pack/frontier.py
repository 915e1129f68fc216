"""`danpack frontier`: bundle bytes against held-out agreement over a grid of candidate bundles.

The grid is choose.grid_keeps (row counts) × every pruned-token policy the model can use × fold (both when
`auto` and the model has a hidden layer), each candidate measured on the pack's held-out slice (heldout.py)
and, with --eval, on the evaluation texts too (agreement with the float model, and accuracy when labelled).
The recommended point is the one `danpack pack` picks by default; it is packed once more with the exact
`danpack pack` line printed, so its bytes and figures are those of the bundle that line writes.
"""

from __future__ import annotations

import io
import json
import os
import shlex
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from danpack.files import write_atomic
from danpack.pack.build import PackError, PackOptions, _choose, candidate_folds, pack_model, prepare_pack
from danpack.pack.choose import non_dominated
from danpack.pack.fold import should_fold
from danpack.pack.heldout import HeldOut, Measure
from danpack.progress import Steps

PLOT_NAMES = ("frontier.svg", "frontier.png")
INSTALL_PLOT = "pip install 'danpack[plot]'  (matplotlib)"


@dataclass(frozen=True)
class FrontierOptions:
    """What `danpack frontier` is told: the pack options shared with `danpack pack`, and an evaluation file."""

    pack: PackOptions
    eval_path: str | None = None  # texts (JSONL, CSV, TSV) measured besides the held-out slice; labelled: accuracy
    keep_words_file: str | None = None  # the --keep-words file, repeated in the printed pack line


@dataclass(frozen=True)
class FrontierResult:
    """Every measured candidate, the non-dominated ones, and the recommended point with its pack line."""

    model_dir: str
    points: list[Measure]  # on the held-out slice, by bytes
    frontier: list[Measure]  # non-dominated points, bytes ascending, agreement rising
    recommended: Measure  # exact: from packing the pack line's options
    pack_line: str
    rule: str
    heldout_texts: int
    selection_texts: int
    eval_points: dict  # candidate -> Measure on the --eval texts
    eval_float_accuracy: float | None

    def to_dict(self) -> dict:
        def row(m: Measure) -> dict:
            d = m.to_dict()
            e = self.eval_points.get(m.candidate)
            if e is not None:
                d["eval"] = {k: v for k, v in e.to_dict().items() if k in ("agreement", "mean_abs_prob_diff",
                                                                             "certified_share", "accuracy", "texts")}
            return d

        return {
            "model": self.model_dir, "heldout_texts": self.heldout_texts, "selection_texts": self.selection_texts,
            "rule": self.rule, "points": [row(m) for m in self.points], "frontier": [row(m) for m in self.frontier],
            "recommended": {**row(self.recommended), "pack_line": self.pack_line},
            "eval_float_accuracy": self.eval_float_accuracy,
        }


def run_frontier(model_dir: str | os.PathLike, options: FrontierOptions, steps: Steps | None = None) -> FrontierResult:
    """Measure the grid, find the frontier and the recommended point (packed once to confirm its figures)."""
    steps = steps or Steps(5, quiet=True)
    base = replace(options.pack, coverage=None, top=None, max_bytes=None, target_agreement=None, quantize=True)
    prep = prepare_pack(model_dir, base, steps)
    model, plan = prep.model, prep.plan
    if not plan.has_corpus or not prep.heldout_texts:
        raise PackError("frontier measures candidates on a held-out slice of the corpus (about 1 in 7 texts); "
                        "give a --corpus with more texts")
    fold_rule = "yes" if should_fold(model.embedding.shape[1], model.layers, base.fold) else "no"
    with steps.step(f"measuring the grid on {len(prep.heldout_texts):,} held-out texts"):
        searcher = prep.searcher(HeldOut(model, plan, prep.heldout_texts))
        combos = [(p, f) for f in candidate_folds(model, base.fold, True) for p in prep.policies]
        searcher.grid(combos)
        _, chosen, rule = _choose(model, plan, base, prep.policies, searcher, prep.build, fold_rule)
    points = sorted(searcher.measured.values(), key=lambda m: (m.bytes, -m.agreement))
    c = chosen.candidate
    line_options = replace(base, top=c.keep, pruned=c.policy, fold="yes" if c.folded else "no")
    with steps.step("packing the recommended point"):
        exact = pack_model(model_dir, None, line_options).heldout
    # the frontier with the recommended point's exact bytes in place of its estimate
    points = [exact if m.candidate == c else m for m in points]
    eval_points, float_accuracy = {}, None
    if options.eval_path is not None:
        with steps.step(f"measuring the grid on {options.eval_path}"):
            eval_points, float_accuracy = _measure_eval(prep, searcher, options.eval_path, points)
    return FrontierResult(str(model_dir), points, non_dominated(points), exact, pack_line(model_dir, line_options,
                          options.keep_words_file), rule, len(prep.heldout_texts), plan.corpus_texts, eval_points,
                          float_accuracy)


def _measure_eval(prep, searcher, eval_path: str, points: list[Measure]) -> tuple[dict, float | None]:
    from danpack.check.compare import read_eval_set
    from danpack.pack.vocab import pruned_mean_row

    model = prep.model
    eval_set = read_eval_set(eval_path, model.labels, prep.options.text_field)
    gold = None if eval_set.labels is None else np.array([model.labels.index(g) for g in eval_set.labels])  # (N,)
    held = HeldOut(model, prep.plan, list(eval_set.texts), gold)
    out = {}
    for m in points:
        c = m.candidate
        rest = pruned_mean_row(model.embedding, prep.plan.with_keep(c.keep)) if c.policy == "rest" else None
        out[c] = held.measure(c, rest, m.bytes)
    accuracy = None if gold is None else float((held.float_probs.argmax(axis=1) == held.gold).mean())
    return out, accuracy


def pack_line(model_dir, options: PackOptions, keep_words_file: str | None) -> str:
    """The `danpack pack` command that writes the bundle of these options."""
    args = ["danpack", "pack", str(model_dir), "-o", "model.danpack"]
    for corpus in options.corpora:
        args += ["--corpus", str(corpus)]
    if options.text_field != "text":
        args += ["--text-field", options.text_field]
    if keep_words_file:
        args += ["--keep-words", str(keep_words_file)]
    args += ["--top", str(options.top), "--pruned", options.pruned, "--fold", options.fold]
    return shlex.join(args)


def format_table(result: FrontierResult) -> list[str]:
    """The frontier as terminal lines (the recommended point marked with *)."""
    has_eval = bool(result.eval_points)
    head = f"{'':1} {'rows':>8} {'pruned':>6} {'fold':>4} {'bytes':>11} {'agree':>8} {'mean|dp|':>8} {'certif':>7}"
    if has_eval:
        head += f" {'eval agr':>8} {'eval acc':>8}"
    lines = [head]
    shown = result.frontier if result.recommended in result.frontier else sorted(
        [*result.frontier, result.recommended], key=lambda m: (m.bytes, -m.agreement))
    for m in shown:
        c = m.candidate
        mark = "*" if c == result.recommended.candidate else ""
        line = (f"{mark:1} {c.keep:>8,} {c.policy:>6} {'yes' if c.folded else 'no':>4} {m.bytes:>11,} "
                f"{m.agreement:>8.2%} {m.mean_abs_prob_diff:>8.4f} {m.certified_share:>7.2%}")
        if has_eval:
            e = result.eval_points.get(c)
            acc = "" if e is None or e.accuracy is None else f"{e.accuracy:.2%}"
            line += f" {'' if e is None else format(e.agreement, '.2%'):>8} {acc:>8}"
        lines.append(line)
    r = result.recommended
    lines.append(f"* recommended ({result.rule}): {r.bytes:,} bytes, held-out agreement {r.agreement:.2%}")
    lines.append(f"  {result.pack_line}")
    return lines


def write_frontier(result: FrontierResult, out_dir: str | os.PathLike) -> tuple[Path, list[Path], str | None]:
    """Write frontier.json and, with matplotlib, the plot as SVG and PNG; (json path, plot paths, why no plot)."""
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    json_path = write_atomic(out / "frontier.json", (json.dumps(result.to_dict(), indent=2) + "\n").encode("utf-8"))
    try:
        import matplotlib
    except ImportError:
        return json_path, [], f"matplotlib is not installed; for the plot: {INSTALL_PLOT}"
    matplotlib.use("Agg")
    return json_path, plot_frontier(result, out), None


def plot_frontier(result: FrontierResult, out: Path) -> list[Path]:
    """Bytes (log) against held-out agreement, and eval accuracy when labelled; frontier joined, pick marked."""
    import matplotlib.pyplot as plt
    from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

    panels = 2 if result.eval_float_accuracy is not None else 1
    fig, axes = plt.subplots(1, panels, figsize=(6.4 * panels, 4.6), squeeze=False)
    markers = {"skip": "o", "unk": "s", "rest": "^"}
    rec = result.recommended.candidate
    for k, ax in enumerate(axes[0]):
        def y(m: Measure) -> float:
            if k == 0:
                return 100 * m.agreement
            e = result.eval_points.get(m.candidate)
            return float("nan") if e is None or e.accuracy is None else 100 * e.accuracy

        for (policy, folded), style in (((p, f), (markers[p], "tab:blue" if f else "tab:orange"))
                                         for p in markers for f in (True, False)):
            pts = [m for m in result.points if m.candidate.policy == policy and m.candidate.folded == folded]
            if pts:
                ax.scatter([m.bytes for m in pts], [y(m) for m in pts], marker=style[0], s=18, alpha=0.45,
                           color=style[1], label=f"{policy}, {'folded' if folded else 'not folded'}")
        front = result.frontier
        ax.plot([m.bytes for m in front], [y(m) for m in front], "-", color="black", lw=1.2,
                label="non-dominated (bytes, held-out agreement)")
        r = result.recommended
        ax.scatter([r.bytes], [y(r)], marker="*", s=220, color="crimson", zorder=5,
                   label=f"recommended: {rec.keep:,} rows, {rec.policy}, {r.bytes:,} B")
        if k == 1:
            ax.axhline(100 * result.eval_float_accuracy, ls="--", color="gray", lw=1, label="float model")
        ax.set_xscale("log")
        ax.xaxis.set_major_locator(LogLocator(base=10, subs=(1.0, 2.0, 5.0)))
        ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _: _short_bytes(v)))
        ax.xaxis.set_minor_formatter(NullFormatter())
        ax.set_xlabel("bundle bytes (log scale)")
        ax.set_ylabel("held-out agreement with the float model (%)" if k == 0 else "accuracy on --eval (%)")
        ax.grid(True, which="both", alpha=0.3)
        ax.legend(fontsize=7, loc="lower right")
    fig.suptitle(f"{result.model_dir}: size against fidelity "
                 f"({result.heldout_texts:,} held-out texts)", fontsize=10)
    fig.text(0.01, 0.01, result.pack_line, fontsize=7, family="monospace")
    fig.tight_layout(rect=(0, 0.04, 1, 1))
    paths = []
    for name in PLOT_NAMES:
        buffer = io.BytesIO()
        kind = name.rsplit(".", 1)[1]
        fig.savefig(buffer, format=kind, dpi=110, metadata={"Date": None} if kind == "svg" else {"Software": None})
        paths.append(write_atomic(out / name, buffer.getvalue()))
    plt.close(fig)
    return paths


def _short_bytes(n: float) -> str:
    for unit in ("B", "KB", "MB", "GB"):
        if n < 1000 or unit == "GB":
            return f"{n:g} {unit}" if unit == "B" or n < 10 else f"{n:.0f} {unit}"
        n /= 1000
    return f"{n:.0f} GB"
