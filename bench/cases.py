"""The bench cases: a trained model (cases 1 and 2), the synthetic table (3), long inputs (4).

Each case sequences the measurements of `measure` (in process) and `fresh` (fresh interpreters)
and returns a CaseReport: formatted tables plus the raw figures the targets are judged on.
"""

from __future__ import annotations

import gc
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from danpack.pack.inspect import size_breakdown
from danpack.model import load_model, model_bytes
from danpack.pack.build import PackOptions, pack_model
from danpack.runtime.bundle import read_bundle
from danpack.runtime.errors import DanpackError
from danpack.runtime.tokenize import Tokenizer

from . import contenders as ct
from . import probes
from .config import BenchConfig
from .fresh import cold_and_memory, pack_runs, pack_table, stream
from .measure import build_contenders, fidelity, profile, sizes, speed
from .results import CaseReport
from .stats import fmt_bytes, fmt_percent, fmt_ratio, fmt_seconds, summarize
from .tables import make_table
from .timing import single_latency
from .workdata import glove_words_model_dir, long_comments, say, synthetic_model_dir

TOKENIZE_ONLY = "tokenize-only"  # Tokenizer.tokenize of the same text, timed in the same rounds


def model_case(config: BenchConfig, key: str, title: str, model_dir: Path, records: list[dict], corpus: Path,
               lines: Path, with_profile: bool, intro: str = "") -> tuple[CaseReport, dict[str, ct.Contender]]:
    """Cases 1 and 2: pack with the deployment stream, then every figure against every baseline."""
    report = CaseReport(key, title, intro)
    say(f"case {title}")
    config.bundles_dir.mkdir(parents=True, exist_ok=True)
    bundle = config.bundles_dir / f"{key}.dpk"
    float_path = config.bundles_dir / f"{key}-float32.dpk"
    say(f"  packing ({config.pack_reps} run(s), fresh interpreter each)")
    packs = pack_runs(model_dir, bundle, {"corpora": [str(corpus)]}, config.pack_reps)
    model = load_model(model_dir)
    float_result = pack_model(model_dir, float_path, PackOptions(quantize=False, fold="no"))
    report.figures["rows"] = len(model.vocab)
    say("  building the contenders (PyTorch exports included)")
    cs = build_contenders(model, float_result.data, bundle, report)
    del float_result
    sizes(model_dir, cs, packs, report)
    fidelity(cs, records, model.labels, report)
    texts = [r["text"] for r in records]
    speed(cs, texts, config, report)
    stream(bundle, float_path, lines, config, report)
    cold_and_memory(model_dir, bundle, float_path, lines, config, report, ct.TORCH_EAGER in cs, texts[0])
    pack_table("Pack (deployment stream as corpus)", {"packed int8 bundle": packs}, None, report, "pack")
    if with_profile:
        say("  profile")
        profile(bundle, texts, config, report)
    gc.collect()
    return report, cs


def long_case(config: BenchConfig, cs: dict[str, ct.Contender], spec, short_texts: Sequence[str]) -> CaseReport:
    """Case 4: single-text latency on comments of 200 and 1,000 tokens (demo sentiment contenders)."""
    report = CaseReport("long", "4. Long inputs (demo sentiment model)")
    say("case 4: long inputs")
    tokenizer = Tokenizer(spec)
    predicts = {k: c.predict for k, c in cs.items()}
    rows, tok_rows = [], []
    sets = {"typical demo comment": list(short_texts[:200])}
    for length in config.long_lengths:
        sets[f"{length:,} tokens"] = long_comments(config, spec, length)
    # the tokenizer alone runs in the same interleaved rounds, so its share is measured on the same machine state
    predicts[TOKENIZE_ONLY] = lambda texts: tokenizer.tokenize(texts[0])
    for name, texts in sets.items():
        lat = single_latency(predicts, texts, config.long_calls, max(2, config.latency_warmup // 10))
        for k in cs:
            s = summarize(lat[k])
            rows.append((name, ct.LABELS[k], fmt_seconds(s.median), fmt_seconds(s.p99)))
            report.figures[f"long.{name}.{k}"] = s.median
        kept = np.mean([len(tokenizer.tokenize(t)) for t in texts])
        words = np.mean([len(tokenizer.split(tokenizer.normalize(t))) for t in texts])  # past max_tokens
        tok = summarize(lat[TOKENIZE_ONLY]).median
        share = summarize(lat[TOKENIZE_ONLY] / lat[ct.PACKED_ORT]).median if ct.PACKED_ORT in lat else float("nan")
        tok_rows.append((name, f"{words:,.0f}", f"{kept:,.0f}", fmt_seconds(tok), fmt_percent(share, 0)))
        report.figures[f"long.{name}.tokenize"] = tok
    report.tables.append(make_table("Single-text latency by comment length", ["comment", "contender", "p50", "p99"], rows,
                                    f"{config.long_calls} interleaved calls per contender and length"))
    report.tables.append(make_table(
        "The tokenizer on long comments", ["comment", "tokens in text", f"tokens kept (max_tokens {spec.max_tokens})",
                                          "tokenize time (p50)", "share of packed-ort (paired)"], tok_rows,
        "max_tokens caps the ids the model sees (gather and mean cost) and the splitting (it stops at max_tokens "
        "tokens), not the normalisation, which covers the whole text"))
    return report


def synthetic_case(config: BenchConfig, model_dir: Path) -> CaseReport:
    """Case 3: pack time and peak memory, load time and size of a 400,000 x 300 random float model."""
    rows, dim = config.synthetic_rows, config.synthetic_dim
    report = CaseReport("synthetic", f"3. Synthetic {rows:,} x {dim} float32 model (hidden {config.synthetic_hidden}, "
                                     "relu, 2 classes)")
    say(f"case {report.title}")
    table_bytes = rows * dim * 4
    report.figures.update({"table_bytes": table_bytes, "rows": rows, "dim": dim})
    source = model_bytes(model_dir)
    out = config.bundles_dir
    variants = {
        "int8, first layer folded (default)": (out / "synthetic.dpk", {}),
        "int8, not folded (fold=no)": (out / "synthetic-nofold.dpk", {"fold": "no"}),
        "float32 unpruned (float ONNX baseline)": (out / "synthetic-float32.dpk", {"quantize": False, "fold": "no"}),
    }
    runs: dict[str, list[dict]] = {name: [] for name in variants}
    names = list(variants)
    say(f"  pack: {config.synthetic_reps} interleaved round(s) of {len(names)} variants (the float32 one in round 1 only)")
    for i in range(config.synthetic_reps):
        for name in names[i % len(names):] + names[: i % len(names)]:
            path, options = variants[name]
            if i == 0 or options.get("quantize", True):  # the float32 baseline costs seconds and GBs: once
                runs[name] += pack_runs(model_dir, path, options, 1)
    pack_table(f"Pack time and peak memory (table {fmt_bytes(table_bytes)}, no corpus: every row kept)", runs,
               table_bytes, report, "synthetic.pack")
    default = next(iter(variants))
    report.figures["pack_seconds"] = report.figures[f"synthetic.pack.{default}.seconds"]
    report.figures["pack_peak"] = report.figures[f"synthetic.pack.{default}.peak"]
    report.figures["pack_seconds_nofold"] = report.figures["synthetic.pack.int8, not folded (fold=no).seconds"]
    report.figures["pack_peak_nofold"] = report.figures["synthetic.pack.int8, not folded (fold=no).peak"]
    # sizes and loads
    text = "abc de fgh xyz qq"
    loads = {
        "float model directory, FloatModel (numpy)": {"what": "float-numpy", "path": str(model_dir)},
        "float32 bundle, onnxruntime": {"what": "packed", "path": str(variants["float32 unpruned (float ONNX baseline)"][0]),
                                        "backend": "onnxruntime"},
        "packed (folded), onnxruntime": {"what": "packed", "path": str(variants[default][0]), "backend": "onnxruntime"},
        "packed (folded), numpy": {"what": "packed", "path": str(variants[default][0]), "backend": "numpy"},
        "packed (fold=no), onnxruntime": {"what": "packed", "path": str(variants["int8, not folded (fold=no)"][0]),
                                          "backend": "onnxruntime"},
    }
    size_of = {
        "float model directory, FloatModel (numpy)": source,
        "float32 bundle, onnxruntime": variants["float32 unpruned (float ONNX baseline)"][0].stat().st_size,
        "packed (folded), onnxruntime": variants[default][0].stat().st_size,
        "packed (folded), numpy": variants[default][0].stat().st_size,
        "packed (fold=no), onnxruntime": variants["int8, not folded (fold=no)"][0].stat().st_size,
    }
    names = list(loads)
    results: dict[str, list[dict]] = {n: [] for n in names}
    say(f"  load time: {config.synthetic_reps} x {len(names)} fresh interpreters")
    for i in range(config.synthetic_reps):
        for n in names[i % len(names):] + names[: i % len(names)]:
            results[n].append(probes.run_worker({"kind": "cold", "text": text, **loads[n]}))
    table = []
    for n in names:
        cold = summarize([r["seconds"] for r in results[n]])
        peak = summarize([r["hwm"] for r in results[n]]).median
        table.append((n, fmt_bytes(size_of[n]), fmt_ratio(source / size_of[n]), fmt_seconds(cold.median),
                      fmt_bytes(peak)))
        report.figures[f"synthetic.load.{n}"] = cold.median
    report.figures["bundle_bytes"] = size_of["packed (folded), onnxruntime"]
    report.figures["size_ratio"] = source / size_of["packed (folded), onnxruntime"]
    report.tables.append(make_table(
        "Size and load time", ["artifact", "bytes", "float dir / artifact", "load + first answer", "peak RSS"], table,
        f"median of {config.synthetic_reps} fresh interpreter(s) each, imports not timed, file in the page cache"))
    bundle = read_bundle(variants[default][0])
    report.notes.append(f"folded bundle: {bundle.manifest['table']['rows']:,} rows x {bundle.manifest['table']['width']} "
                        f"int8 ({fmt_bytes(bundle.tensors['table'].nbytes)} table)")
    overhead(config, report)
    return report


def overhead(config: BenchConfig, report: CaseReport) -> None:
    """Bytes a bundle spends beyond its int8 table and scales, on a synthetic model of `overhead_rows` rows
    (the target's figure), and on the same table named by GloVe's most frequent words (real tokens).

    Sizes are deterministic (byte-identical bundles), so one pack per variant is enough.
    """
    rows = config.overhead_rows
    model_dir = synthetic_model_dir(config, rows)
    variants = [("int8, first layer folded (default)", model_dir, PackOptions(), "auto"),
                ("int8, not folded (fold=no)", model_dir, PackOptions(fold="no"), "no")]
    try:
        words_dir = glove_words_model_dir(config, rows)
        variants.append(("int8 folded, GloVe's most frequent words as tokens", words_dir, PackOptions(), "words"))
    except DanpackError as e:  # the glove extra is not installed: the synthetic rows still stand
        report.notes.append(f"no real-word variant of the overhead table: {e}")
    say(f"  overhead at {rows:,} rows")
    table_rows = []
    for name, source, options, key in variants:
        path = config.bundles_dir / f"overhead-{key}.dpk"
        pack_model(source, path, options)
        bundle = read_bundle(path)
        parts = size_breakdown(bundle)
        total = sum(parts.values())
        beyond = total - parts["table"] - parts["scales"]
        framing = parts["graph"] + parts["other"]
        plain = len("\n".join(bundle.vocab).encode("utf-8"))
        table_rows.append((name, fmt_bytes(total), fmt_bytes(parts["table"] + parts["scales"]),
                           f"{fmt_bytes(parts['vocab'])} (of {fmt_bytes(plain)})", fmt_bytes(parts["layers"]),
                           fmt_bytes(framing), fmt_percent(beyond / total, 2), fmt_percent(framing / total, 2)))
        report.figures[f"overhead.{key}"] = beyond / total
        report.figures[f"overhead_framing.{key}"] = framing / total
    synthetic_chars = sum(len(t) for t in load_model(model_dir).vocab) / rows
    report.tables.append(make_table(
        f"Bytes beyond the int8 table and scales ({rows:,}-row model, {config.synthetic_dim} wide)",
        ["bundle", "bytes", "table + scales", "vocabulary (deflated, of plain)", "layers", "graph + manifest + framing",
         "beyond table + scales", "graph + manifest + framing share"], table_rows,
        f"synthetic tokens of {synthetic_chars:.1f} characters on average (a..z, aa..zz, aaa..); the vocabulary is "
        "stored once, as one zlib stream of the tokens joined by newlines"))
