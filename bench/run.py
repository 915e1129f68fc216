"""`python -m bench [--quick]`: run the cases, print the tables, write RESULTS.md."""

from __future__ import annotations

import argparse
import gc
import sys
import time
from pathlib import Path

from danpack.pack.build import PackOptions, pack_model

from . import cases, workdata
from .config import CASES, DEFAULT_RESULTS, DEFAULT_WORK, BenchConfig, quick_config
from .machine import machine_info
from .report import judge, render_console, render_results
from .workdata import say


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="python -m bench", description=(
        "Size, speed and fidelity of packed bundles against the float baselines; writes bench/RESULTS.md."))
    p.add_argument("--quick", action="store_true",
                   help="smoke run (< 2 minutes): small sizes, few repetitions; writes WORK/RESULTS-quick.md")
    p.add_argument("--work", type=Path, default=DEFAULT_WORK, help=f"work dir for generated data (default {DEFAULT_WORK})")
    p.add_argument("--cases", default=",".join(CASES),
                   help=f"comma-separated subset of {','.join(CASES)} (long needs the demo sentiment model's contenders)")
    p.add_argument("--results", type=Path, default=None,
                   help=f"where to write the Markdown results (default {DEFAULT_RESULTS}; quick: WORK/RESULTS-quick.md)")
    return p


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    chosen = tuple(c.strip() for c in args.cases.split(",") if c.strip())
    unknown = [c for c in chosen if c not in CASES]
    if unknown:
        print(f"python -m bench: unknown case(s) {unknown}; choose from {', '.join(CASES)}", file=sys.stderr)
        return 2
    config = BenchConfig(work=args.work.resolve(), cases=chosen)
    if args.quick:
        config = quick_config(config)
    results_path = args.results or (config.work / "RESULTS-quick.md" if config.quick else DEFAULT_RESULTS)
    command = "python -m bench" + (" --quick" if config.quick else "") + (
        f" --cases {args.cases}" if chosen != CASES else "")
    started = time.perf_counter()
    machine = machine_info()
    say(f"{'quick' if config.quick else 'full'} run on {machine['cpu']} ({machine['cores']} cores); work dir {config.work}")
    reports: dict[str, cases.CaseReport] = {}

    corpus = workdata.stream_corpus(config)
    lines = workdata.run_lines_file(config)
    intro_corpus = (f"Packed with the demo deployment stream ({config.stream_texts:,} comments, "
                    "`danpack.models_demo.scenario.generate_stream`) as corpus, default pack options (the measured default: smallest bundle within 0.1 pt of every row on a held-out slice).")

    if "demo" in chosen or "long" in chosen:
        for task in ("sentiment", "topic"):
            if task == "topic" and "demo" not in chosen:
                continue
            model_dir, source = workdata.demo_model_dir(config, task)
            records = workdata.demo_test(config, task)
            report, contenders = cases.model_case(
                config, f"demo-{task}", f"1. Demo {task} model ({source})", model_dir, records, corpus, lines,
                with_profile=True, intro=intro_corpus)
            reports[report.key] = report
            if task == "sentiment" and "long" in chosen:
                from danpack.model import load_model

                spec = load_model(model_dir).tokenizer
                reports["long"] = cases.long_case(config, contenders, spec, [r["text"] for r in records])
            del contenders
            gc.collect()
    if "glove" in chosen:
        model_dir = workdata.glove_model_dir(config)
        records = workdata.demo_test(config, "sentiment")
        report, contenders = cases.model_case(
            config, "glove", "2. GloVe 6B 50d fine-tuned demo sentiment model (400,243-row table)", model_dir, records,
            corpus, lines, with_profile=True,
            intro=intro_corpus + " The float model's table holds every GloVe 6B token plus the training tokens it lacks.")
        reports[report.key] = report
        del contenders
        gc.collect()
    if "synthetic" in chosen:
        model_dir = workdata.synthetic_model_dir(config)
        reports["synthetic"] = cases.synthetic_case(config, model_dir)

    if "install" in chosen:
        from .install import install_case

        bundle = config.bundles_dir / "install-demo.dpk"
        pack_model(workdata.demo_model_dir(config, "sentiment")[0], bundle, PackOptions(corpora=(str(corpus),)))
        reports["install"] = install_case(config, bundle)

    order = ["demo-sentiment", "demo-topic", "long", "glove", "synthetic", "install"]
    ordered = [reports[k] for k in order if k in reports]
    targets = judge(reports)
    seconds = time.perf_counter() - started
    print(render_console(ordered, targets))
    results_path.parent.mkdir(parents=True, exist_ok=True)
    results_path.write_text(render_results(machine, ordered, targets, seconds, config.quick, command), encoding="utf-8")
    say(f"done in {seconds / 60:.1f} min; results written to {results_path}")
    return 0
