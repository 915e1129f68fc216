"""`danpack check`: the bundle against its float original, with a verdict for CI (exit 0 / 1 / 2)."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer

from danpack.check import BOOTSTRAP_SEED
from danpack.cli.common import echo, fail, interruptible
from danpack.cli.root import PlainCommand, app
from danpack.runtime.errors import DanpackError

# The library (numpy, onnxruntime) is imported inside the command: `danpack --help` stays fast.

LIMIT_HELP = "Number, or 'off' to drop the default."


@app.command("check", cls=PlainCommand,
             short_help="Compare a bundle with its float original; exit 1 when a gate fails.")
def check_command(
    bundle: Path = typer.Argument(..., metavar="BUNDLE", help="Bundle file written by `danpack pack`."),
    reference: Path = typer.Option(..., "--reference", "-r", metavar="MODEL_DIR", help="The float model directory the bundle was packed from."),
    eval_file: Path = typer.Option(..., "--eval", "-e", metavar="FILE", help="Evaluation texts: JSONL, CSV or TSV with a header; labels optional."),
    text_field: str = typer.Option("text", metavar="NAME", help="Field (JSONL) or column (CSV/TSV) holding the text."),
    label_field: Optional[str] = typer.Option(None, metavar="NAME", help="Field holding the label [default: 'label' when present; else unlabelled]. Integer labels index the model's labels."),
    label_map: Optional[str] = typer.Option(None, metavar="FILE|A=B,...", help="Other label spellings: a file (JSON object or spelling=label lines) or inline a=b,c=d."),
    reference_probs: Optional[Path] = typer.Option(None, metavar="FILE", help="JSONL, one record per eval record: your framework's 'probs' (model label order) or 'label'. Gates then apply framework -> bundle."),
    reference_tolerance: float = typer.Option(1e-5, metavar="PROB", help="Largest probability difference between the float reading and --reference-probs counted as equal."),
    token_sample: Optional[Path] = typer.Option(None, metavar="FILE", help="JSONL of {text, tokens|ids} from your own pipeline; danpack must reproduce every record."),
    max_points_lost: Optional[str] = typer.Option(None, metavar="POINTS|off", help=f"Largest accuracy loss of the bundle against the float original, in percentage points [default: 1.0]. {LIMIT_HELP}"),
    min_agreement: Optional[str] = typer.Option(None, metavar="SHARE|off", help=f"Smallest prediction agreement, 0..1 or a percent [default: 0.99]. {LIMIT_HELP}"),
    max_bytes: Optional[str] = typer.Option(None, metavar="BYTES|off", help="Largest bundle size in bytes [default: not gated]."),
    min_size_ratio: Optional[str] = typer.Option(None, metavar="RATIO|off", help=f"Smallest float bytes / bundle bytes [default: 1.0]. {LIMIT_HELP}"),
    max_latency_ratio: Optional[str] = typer.Option(None, metavar="RATIO|off", help="Largest single-text p50 ratio bundle / float [default: not gated]."),
    min_certified: Optional[str] = typer.Option(None, metavar="SHARE|off", help="Smallest share of texts the drift bound certifies as unchanged by quantisation, 0..1 or a percent [default: not gated]."),
    max_certified_changes: Optional[str] = typer.Option(None, metavar="N|off", help=f"Largest number of certified texts whose prediction changed [default: 0: any means the bound is broken]. {LIMIT_HELP}"),
    allow_other_reference: bool = typer.Option(False, "--allow-other-reference", help="Compare even when --reference is not the float model the bundle was packed from (its recorded sha256 differs); the reports then carry a warning. Without it such a check is refused."),
    baseline: Optional[Path] = typer.Option(None, metavar="REPORT", help="An earlier --report of the same lineage: fail on regressions."),
    baseline_tolerance: list[str] = typer.Option([], metavar="NAME=VALUE", help="NAME=VALUE, repeatable: accuracy=0.5 drop=0.5 agreement=0.5 (points), bytes=5 latency=off (percent)."),
    report: Optional[Path] = typer.Option(None, metavar="FILE", help="Write the JSON report (schema danpack-check-report, version 1)."),
    markdown: Optional[Path] = typer.Option(None, metavar="FILE", help="Write a Markdown summary for a CI comment."),
    junit: Optional[Path] = typer.Option(None, metavar="FILE", help="Write JUnit XML: one test case per gate."),
    show_disagreements: int = typer.Option(5, metavar="N", help="Texts listed where the two predictions differ."),
    latency_texts: int = typer.Option(200, metavar="N", help="Single-text calls timed per side."),
    latency_batch: int = typer.Option(64, metavar="N", help="Texts per batched call when timing throughput."),
    latency_batches: int = typer.Option(30, metavar="N", help="Batched calls timed per side."),
    no_latency: bool = typer.Option(False, "--no-latency", help="Skip the latency measurement."),
    backend: str = typer.Option("onnxruntime", metavar="onnxruntime|numpy", help="Runtime backend: onnxruntime or numpy."),
    bootstrap: int = typer.Option(2000, metavar="N", help="Paired bootstrap resamples for the accuracy-drop interval."),
    seed: int = typer.Option(BOOTSTRAP_SEED, min=0, metavar="N", help="Seed of the bootstrap (fixed: same inputs, same interval)."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress on stderr."),
) -> None:
    """Compare a bundle with its float original on labelled or unlabelled texts; exit 1 when a gate fails."""
    from danpack.check.compare import CheckOptions, parse_label_map, run_check
    from danpack.check.latency import LatencyOptions
    from danpack.check.reports import build_report, read_report, render_table, write_junit, write_markdown, write_report
    from danpack.check.verdict import (Verdict, baseline_lineage, compare_baseline, evaluate, parse_limit,
                                       parse_tolerances, resolve_limits)
    from danpack.files import check_outputs
    from danpack.model import load_model, model_files
    from danpack.progress import Steps

    try:
        check_outputs({"--report": report, "--markdown": markdown, "--junit": junit},
                      {"BUNDLE": bundle, "--eval": eval_file, "--baseline": baseline,
                       "--reference-probs": reference_probs, "--token-sample": token_sample,
                       **{f"--reference file {n}": p for n, p in model_files(reference).items()}})
        given = {"max-points-lost": parse_limit(max_points_lost, "max-points-lost"),
                 "min-agreement": parse_limit(min_agreement, "min-agreement"),
                 "max-bytes": parse_limit(max_bytes, "max-bytes"),
                 "min-size-ratio": parse_limit(min_size_ratio, "min-size-ratio"),
                 "max-latency-ratio": parse_limit(max_latency_ratio, "max-latency-ratio"),
                 "min-certified": parse_limit(min_certified, "min-certified"),
                 "max-certified-changes": parse_limit(max_certified_changes, "max-certified-changes")}
        limits, explicit = resolve_limits(given)
        if no_latency and "max-latency-ratio" in explicit:
            fail("--max-latency-ratio needs the latency measurement; drop --no-latency")
        tolerances = parse_tolerances(baseline_tolerance)
        previous = read_report(baseline) if baseline is not None else None
        labels_now = load_model(reference).labels if label_map else ()
        options = CheckOptions(text_field=text_field, label_field=label_field, backend=backend, bootstrap=bootstrap,
                               seed=seed, show_disagreements=show_disagreements,
                               allow_other_reference=allow_other_reference,
                               label_map=parse_label_map(label_map, labels_now),
                               reference_probs=None if reference_probs is None else str(reference_probs),
                               reference_tolerance=reference_tolerance,
                               token_sample=None if token_sample is None else str(token_sample))
        latency = None if no_latency else LatencyOptions(texts=latency_texts, batch=latency_batch,
                                                         batches=latency_batches)
        steps = Steps(6 + (latency is not None), quiet=quiet)
        with interruptible("no report was written"):
            result = run_check(bundle, reference, eval_file, options, latency, steps)
        outcomes = evaluate(result.figures, limits, explicit)
        extra_warnings: list[str] = []
        baseline_info = None
        if previous is not None:
            extra_warnings = baseline_lineage(result.inputs, previous["inputs"])
            outcomes += compare_baseline(result.figures, previous["figures"], tolerances)
            baseline_info = {"path": str(baseline), "bundle_sha256": previous["inputs"]["bundle"]["sha256"],
                             "tolerances": tolerances}
        verdict = Verdict(outcomes)
        full = build_report(result, verdict, baseline_info, tuple(extra_warnings))
    except DanpackError as e:
        fail(str(e))
    for w in full["warnings"]:
        echo(f"danpack: warning: {w}", err=True)
    echo(render_table(full), nl=False)
    try:
        if report is not None:
            write_report(report, full)
        if markdown is not None:
            write_markdown(markdown, full)
        if junit is not None:
            write_junit(junit, full)
    except (OSError, DanpackError) as e:
        fail(f"cannot write an output file ({e})")
    raise typer.Exit(code=verdict.exit_code)
