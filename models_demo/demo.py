"""`danpack demo`: the whole job on the invented charging-station scenario, start to finish.

1. generate the scenario data, 2. pack the shipped sentiment model with the deployment
stream as corpus, 3. stream comments through `danpack-run`, 4. check the bundle against the
float original with the default gates. Every file lands in one output directory.
"""

from __future__ import annotations

import json
import subprocess
import sys
import time
from dataclasses import dataclass
from pathlib import Path

from danpack.runtime.errors import DanpackError

from danpack.check.compare import CheckOptions, run_check
from danpack.check.latency import LatencyOptions
from danpack.pack.build import PackOptions, PackResult, pack_model
from danpack.progress import Steps
from danpack.check.reports import build_report, write_junit, write_markdown, write_report
from danpack.check.verdict import Verdict, evaluate, resolve_limits

STREAM_SAMPLE = 200  # comments piped through danpack-run


class DemoError(DanpackError):
    """A demo step failed in a way the user can act on."""


@dataclass(frozen=True)
class DemoOptions:
    """What the demo runs on."""

    task: str = "sentiment"  # which shipped model: sentiment or topic
    small: bool = False  # small scenario sizes (a quick look; the tests use it)
    glove: bool = False  # train the GloVe fine-tuned model (400,000-row table) instead of the shipped one
    latency: bool = True  # measure latency side by side in the check


@dataclass(frozen=True)
class DemoResult:
    """Paths and figures of one demo run."""

    out: Path
    bundle: Path
    pack: PackResult
    stream_output: Path
    stream_seconds: float
    stream_records: int
    report: dict
    exit_code: int  # the check's verdict: 0 all gates hold, 1 some fail


def shipped_model(task: str) -> Path:
    """The float model directory shipped for a demo task."""
    from danpack.models_demo.build import SHIPPED_DIR

    return SHIPPED_DIR / task


def train_glove_model(task: str, sizes, model_dir: Path) -> Path:
    """Train the fine-tuned GloVe regime (needs the `glove` extra) and save the float model."""
    from danpack.models_demo.build import build_model, write_model
    from danpack.models_demo.glove import load_glove

    return write_model(build_model(task, "finetune", sizes=sizes, pretrained=load_glove()), model_dir)


def run_demo(out: str | Path, options: DemoOptions = DemoOptions(), steps: Steps | None = None) -> DemoResult:
    """Run the four steps into `out` and return what each measured."""
    from danpack.models_demo.scenario import SMALL_SIZES, ScenarioSizes, write_scenario

    out = Path(out)
    steps = steps or Steps(4 + options.glove, quiet=True)
    sizes = SMALL_SIZES if options.small else ScenarioSizes()
    with steps.step(f"generating the scenario data into {out / 'data'}"):
        paths = write_scenario(out / "data", sizes=sizes)
    model_dir = shipped_model(options.task)
    if options.glove:
        model_dir = out / f"{options.task}-glove-finetuned"
        with steps.step(f"training the GloVe 6B 50d fine-tuned model into {model_dir}"):
            train_glove_model(options.task, sizes, model_dir)
    bundle = out / f"{options.task}.danpack"
    with steps.step(f"packing {model_dir} with the deployment stream as corpus"):
        packed = pack_model(model_dir, bundle, PackOptions(corpora=(str(paths["stream_lines"]),)))
    test_file = paths[f"{options.task}/test"]
    stream_output = out / "stream-output.jsonl"
    with steps.step(f"streaming {STREAM_SAMPLE} comments through danpack-run"):
        with open(test_file, "rb") as f:
            sample = b"".join(line for _, line in zip(range(STREAM_SAMPLE), f))
        start = time.perf_counter()
        done = subprocess.run([sys.executable, "-m", "danpack.runtime.stream", str(bundle), "-", "--jsonl"],
                              input=sample, capture_output=True, check=False)
        stream_seconds = time.perf_counter() - start
        stream_output.write_bytes(done.stdout)
        if done.returncode != 0:
            raise DemoError(f"danpack-run failed (exit {done.returncode}): {done.stderr.decode(errors='replace')}")
    with steps.step("checking the bundle against the float original (default gates)"):
        latency = LatencyOptions() if options.latency else None
        result = run_check(bundle, model_dir, test_file, CheckOptions(), latency)
        limits, explicit = resolve_limits({})
        verdict = Verdict(evaluate(result.figures, limits, explicit))
        report = build_report(result, verdict, None, ())
        write_report(out / "check-report.json", report)
        write_markdown(out / "check-summary.md", report)
        write_junit(out / "check-junit.xml", report)
    records = done.stdout.count(b"\n")
    return DemoResult(out, bundle, packed, stream_output, stream_seconds, records, report, verdict.exit_code)


def describe_demo(result: DemoResult) -> list[str]:
    """The demo's closing summary, one line each."""
    f = result.report["figures"]
    p = result.pack
    first = json.loads(result.stream_output.read_text(encoding="utf-8").splitlines()[0])
    lines = [
        f"bundle      {result.bundle}  {p.bytes:,} bytes, {p.source_bytes / p.bytes:.1f}x smaller than the float model",
        f"            kept {p.plan.keep:,} of {p.source_rows:,} rows ({p.plan.coverage:.2%} of the stream's known tokens), "
        f"table {p.rows:,} x {p.width} int8{', first layer folded' if p.folded else ''}",
        f"stream      {result.stream_output}  {result.stream_records} records in {result.stream_seconds:.2f} s "
        f"(process start included); first: {first.get('label')} for line {first.get('line')}",
        f"accuracy    float {f['accuracy_float']:.2%}, bundle {f['accuracy_bundle']:.2%} "
        f"(drop {f['accuracy_drop_points']:+.2f} points); agreement {f['agreement']:.2%}",
    ]
    if f.get("certified_share") is not None:
        lines.append(f"certified   {f['certified_share']:.2%} of test comments provably get the float model's label "
                     "(pruning and int8 included)")
    if f.get("latency_ratio") is not None:
        lines.append(f"latency     one comment p50 {f['latency_p50_ms_bundle'] * 1000:.0f} µs (float ONNX "
                     f"{f['latency_p50_ms_float'] * 1000:.0f} µs); batched {f['throughput_bundle']:,.0f} comments/s")
    lines += [
        f"check       {'PASS' if result.exit_code == 0 else 'FAIL'}: {result.out / 'check-report.json'}, "
        f"{result.out / 'check-summary.md'}, {result.out / 'check-junit.xml'}",
        f"data        {result.out / 'data'} (scenario JSONL and the deployment stream)",
    ]
    return lines
