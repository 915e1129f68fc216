"""In-process figures of a trained model: contenders, fidelity, sizes, speed, model-only speed, profile.

Each function measures, then appends a formatted table (and its raw figures) to the CaseReport.
"""

from __future__ import annotations

import math

from collections.abc import Sequence
from pathlib import Path

import numpy as np

from danpack.model import model_bytes

from . import contenders as ct
from .config import BenchConfig
from .profile import numpy_steps, ort_operator_profile, stage_split
from .results import CaseReport, iqr_pct
from .stats import fmt_bytes, fmt_percent, fmt_rate, fmt_ratio, fmt_seconds, fmt_spread, summarize
from .tables import make_table
from .timing import batched_rates, interleave, ratio_summary, single_latency
from .workdata import say

REFERENCE = ct.FLOAT_NUMPY  # fidelity is measured against the float original's own numpy forward pass
RATIO_BASES = (ct.FLOAT_ONNX, ct.TORCH_EAGER, ct.FLOAT_NUMPY)  # packed-ort is compared with each


# --- building the contenders ------------------------------------------------------------------------


def build_contenders(model, float_bundle: bytes, bundle_path: Path, report: CaseReport) -> dict[str, ct.Contender]:
    """All contenders that can run here; one that cannot is reported in the notes, not silently dropped."""
    out: dict[str, ct.Contender] = {}
    builders = [
        (ct.FLOAT_NUMPY, lambda: ct.float_numpy(model)),
        (ct.FLOAT_ONNX, lambda: ct.float_onnx(float_bundle, bundle_path.with_name(f"{bundle_path.stem}-float32.danpack"))),
        (ct.TORCH_EAGER, lambda: ct.torch_eager(model)),
        (ct.TORCH_ONNX_BAG, lambda: ct.torch_onnx(model, padded=False)),
        (ct.TORCH_ONNX_PADDED, lambda: ct.torch_onnx(model, padded=True)),
        (ct.PACKED_ORT, lambda: ct.packed(bundle_path, "onnxruntime")),
        (ct.PACKED_NUMPY, lambda: ct.packed(bundle_path, "numpy")),
    ]
    for key, build in builders:
        try:
            c = build()
        except ImportError as e:
            report.notes.append(f"{ct.LABELS[key]}: not measured, {e} (PyTorch is not installed)")
            continue
        except RuntimeError as e:
            report.notes.append(f"{ct.LABELS[key]}: not measured, the exporter could not run here ({e})")
            continue
        if c.labels and tuple(c.labels) != tuple(model.labels):
            raise RuntimeError(f"{key} answers in label order {c.labels}, the float model in {model.labels}")
        out[key] = c
        for note in c.notes:
            report.notes.append(f"{ct.LABELS[key]}: {note}")
    return out


# --- fidelity ---------------------------------------------------------------------------------------


def fidelity(cs: dict[str, ct.Contender], records: Sequence[dict], labels: Sequence[str], report: CaseReport) -> None:
    """Accuracy, agreement with the float original and the largest probability difference, per contender."""
    texts = [r["text"] for r in records]
    gold = np.array([labels.index(r["label"]) for r in records])  # (N,)
    probs = {k: np.concatenate([c.predict(texts[i : i + 256]) for i in range(0, len(texts), 256)]) for k, c in cs.items()}
    ref = probs[REFERENCE]
    ref_top = ref.argmax(axis=1)
    ref_acc = float((ref_top == gold).mean())
    rows = []
    for k, p in probs.items():
        top = p.argmax(axis=1)
        acc, agree = float((top == gold).mean()), float((top == ref_top).mean())
        rows.append((ct.LABELS[k], fmt_percent(acc), f"{100 * (ref_acc - acc):+.2f} pt", fmt_percent(agree),
                     f"{float(np.abs(p - ref).max()):.2e}"))
        report.figures[f"accuracy.{k}"] = acc
        report.figures[f"agreement.{k}"] = agree
        report.figures[f"accuracy_drop.{k}"] = ref_acc - acc
    report.tables.append(make_table(
        f"Fidelity on the demo test set ({len(texts):,} labelled comments)",
        ["contender", "accuracy", "drop vs float", "agreement with float", "max |Δp|"], rows,
        "agreement: same top label as the float original's numpy forward pass; Δp: probability difference"))


# --- sizes ------------------------------------------------------------------------------------------


def sizes(model_dir: Path, cs: dict[str, ct.Contender], packs: list[dict], report: CaseReport) -> None:
    """Bytes of every artifact against the float model directory."""
    source = model_bytes(model_dir)
    report.figures["float_dir_bytes"] = source
    rows = [("float model directory (dan.json, tokens.txt, weights)", fmt_bytes(source), "1.00x")]
    for key in (ct.FLOAT_ONNX, ct.TORCH_ONNX_BAG, ct.TORCH_ONNX_PADDED, ct.PACKED_ORT):
        c = cs.get(key)
        if c is None or c.artifact_bytes is None:
            continue
        what = {ct.FLOAT_ONNX: "float32 bundle, unpruned (float ONNX baseline)",
                ct.TORCH_ONNX_BAG: "PyTorch ONNX export, EmbeddingBag", ct.TORCH_ONNX_PADDED: "PyTorch ONNX export, Embedding",
                ct.PACKED_ORT: "packed int8 bundle"}[key]
        rows.append((what, fmt_bytes(c.artifact_bytes), fmt_ratio(source / c.artifact_bytes)))
    p = packs[0]
    report.figures["bundle_bytes"] = p["bytes"]
    report.figures["size_ratio"] = source / p["bytes"]
    parts = ", ".join(f"{k} {fmt_bytes(v)}" for k, v in p["breakdown"].items())
    report.tables.append(make_table(
        "Size", ["artifact", "bytes", "float dir / artifact"], rows,
        f"packed: {p['rows']:,} of {p['source_rows']:,} rows kept (corpus coverage {fmt_percent(p['coverage'])}), "
        f"width {p['width']}{' (first layer folded)' if p['folded'] else ''}, pruned tokens: {p['policy']}; "
        f"bytes by part: {parts}"))


# --- speed ------------------------------------------------------------------------------------------


def speed(cs: dict[str, ct.Contender], texts: Sequence[str], config: BenchConfig, report: CaseReport) -> None:
    """Single-text latency and batched throughput, all contenders interleaved; ratios round by round."""
    predicts = {k: c.predict for k, c in cs.items()}
    say(f"  single-text latency: {config.latency_calls:,} interleaved rounds x {len(cs)} contenders")
    lat = single_latency(predicts, texts, config.latency_calls, config.latency_warmup)
    rates = {}
    for b in config.batch_sizes:
        say(f"  batched throughput, batch {b}: {config.throughput_reps} interleaved repetitions")
        rates[b] = batched_rates(predicts, texts, b, config.block_texts, config.throughput_reps)
    rows = []
    for k in cs:
        s = summarize(lat[k])
        cells = [ct.LABELS[k], fmt_seconds(s.median), fmt_seconds(s.p99), f"{fmt_seconds(s.q1)}–{fmt_seconds(s.q3)}"]
        for b in config.batch_sizes:
            r = summarize(rates[b][k])
            cells.append(f"{fmt_rate(r.median)} {iqr_pct(r)}")
            report.figures[f"throughput.{b}.{k}"] = r.median
        rows.append(cells)
        report.figures[f"latency_p50.{k}"] = s.median
        report.figures[f"latency_p99.{k}"] = s.p99
    report.tables.append(make_table(
        "Speed, one thread, tokenizer included",
        ["contender", "single p50", "single p99", "single IQR", *(f"batch {b} (texts/s)" for b in config.batch_sizes)],
        rows,
        f"single: predict([one comment]), {config.latency_calls:,} calls each after {config.latency_warmup} warm-up; "
        f"batched: median of {config.throughput_reps} repetitions of {config.block_texts} comments, ± half the IQR"))
    # ratios of packed-ort against each baseline, paired round by round
    if ct.PACKED_ORT not in cs:
        return
    rows = []
    for base in RATIO_BASES:
        if base not in cs:
            continue
        single = ratio_summary(lat[base], lat[ct.PACKED_ORT])
        cells = [f"packed-ort vs {ct.LABELS[base]}", fmt_spread(single, fmt_ratio)]
        report.figures[f"speedup.single.{base}"] = single.median
        for b in config.batch_sizes:
            r = ratio_summary(rates[b][ct.PACKED_ORT], rates[b][base])
            cells.append(fmt_spread(r, fmt_ratio))
            report.figures[f"speedup.{b}.{base}"] = r.median
        rows.append(cells)
    report.tables.append(make_table(
        "Speed-up of the packed bundle (onnxruntime backend), paired ratios",
        ["comparison", "single-text (latency ratio)", *(f"batch {b} (throughput ratio)" for b in config.batch_sizes)],
        rows, "median of round-by-round ratios (>1: the packed bundle is faster), IQR in brackets"))
    model_only(cs, texts, config, report)


def model_only(cs: dict[str, ct.Contender], texts: Sequence[str], config: BenchConfig, report: CaseReport) -> None:
    """Throughput of the model part alone (inputs encoded beforehand): what the graph itself costs, no tokenizer."""
    batches = [b for b in config.batch_sizes if b > 1]
    rates: dict[int, dict[str, np.ndarray]] = {}
    for b in batches:
        block, n = max(config.block_texts, b), len(texts)
        slots = []  # 4 different blocks of comments, each cut into calls of b
        for j in range(4):
            chunk = [texts[(j * block + x) % n] for x in range(block)]
            slots.append([chunk[i : i + b] for i in range(0, block, b)])
        encoded = {k: [[c.encode(p) for p in slot] for slot in slots] for k, c in cs.items()}

        def make(k: str):
            run, inputs = cs[k].run, encoded[k]

            def call(i: int) -> None:
                for x in inputs[i % 4]:
                    run(x)
            return call

        seconds = interleave({k: make(k) for k in cs}, config.throughput_reps, warmup=1)
        rates[b] = {k: block / v for k, v in seconds.items()}
    rows = []
    for k in cs:
        cells = [ct.LABELS[k]]
        for b in batches:
            r = summarize(rates[b][k])
            cells.append(f"{fmt_rate(r.median)} {iqr_pct(r)}")
            if ct.PACKED_ORT in cs and k != ct.PACKED_ORT:
                cells.append(fmt_ratio(ratio_summary(rates[b][ct.PACKED_ORT], rates[b][k]).median))
            elif ct.PACKED_ORT in cs:
                cells.append("1.00x")
            report.figures[f"model_only.{b}.{k}"] = r.median
        rows.append(cells)
    columns = ["contender"]
    for b in batches:
        columns += [f"batch {b} (texts/s)", f"packed-ort / this, batch {b}"]
    report.tables.append(make_table(
        "Model only: inputs encoded beforehand (tokenizer and vocabulary lookup excluded)", columns, rows,
        "each contender's own run() on its own pre-encoded inputs, interleaved; shows what the graph itself costs, "
        "which the tokenizer hides in the figures above"))


# --- profile ----------------------------------------------------------------------------------------


def profile(bundle_path: Path, texts: Sequence[str], config: BenchConfig, report: CaseReport) -> None:
    """Where predict's time goes for the packed bundle, at batch 1 and 256."""
    from danpack import runtime

    clf = runtime.load(bundle_path, backend="onnxruntime")
    nclf = runtime.load(bundle_path, backend="numpy")
    bundle = clf.bundle
    rows = []
    for b in config.batch_sizes:
        pool = list(texts[: max(b * 8, 256)])
        rounds = max(10, config.latency_calls // max(1, b // 8))
        for name, c in (("onnxruntime", clf), ("numpy", nclf)):
            s = stage_split(c, pool, b, rounds)
            if math.isnan(s["tokenize"]):  # the native encoder: one call for all three
                tok, lookup, share = "in the native call", "in the native call", "-"
            else:
                tok, lookup = fmt_seconds(s["tokenize"]), fmt_seconds(max(s["encode"] - s["tokenize"], 0.0))
                share = fmt_percent(s["tokenize"] / s["predict"], 0)
            rows.append((f"batch {b}, {name}", tok, lookup, fmt_seconds(s["backend"]), fmt_seconds(s["predict"]),
                         share, fmt_percent(s["encode"] / s["predict"], 0)))
            if name == "onnxruntime":
                for k, v in s.items():
                    report.figures[f"profile.{b}.{k}"] = v
    report.tables.append(make_table(
        "Profile: time per comment by stage (packed bundle)",
        ["call", "tokenize", "vocabulary lookup + padding", "backend run", "whole predict", "tokenizer share",
         "tokenizer + encode share"], rows,
        "stages timed interleaved on the same comments (medians); backend run = session.run / numpy forward on "
        "pre-encoded ids; per comment = per call / batch size"))
    rows = []
    for b in (1, 256):
        ids, counts = clf.encoder.encode(list(texts[:b]))
        calls = config.profile_calls if b == 1 else max(20, config.profile_calls // 40)
        prof = ort_operator_profile(bundle, ids, counts, calls, config.work / "profile")
        shares = ", ".join(f"{op} {100 * v:.0f}%" for op, v in list(prof["kernel_share"].items())[:6])
        rows.append((f"batch {b} ({ids.shape[1]} ids wide), onnxruntime", fmt_seconds(prof["session_run"]), fmt_seconds(prof["idle_run"]),
                     fmt_seconds(max(prof["session_run"] - prof["idle_run"], 0.0)), "kernel time: " + shares))
        report.figures[f"profile.{b}.session_run"] = prof["session_run"]
        report.figures[f"profile.{b}.idle_run"] = prof["idle_run"]
        steps = numpy_steps(bundle, ids, counts, 15)
        total = sum(steps.values())
        rows.append((f"batch {b}, numpy backend", fmt_seconds(total), "", "",
                     ", ".join(f"{k} {fmt_seconds(v)}" for k, v in steps.items())))
    report.tables.append(make_table(
        "Profile: inside the backend call (packed bundle)",
        ["call", "backend call", "idle session.run", "graph work", "where it goes"], rows,
        "idle session.run: a graph with the same inputs and outputs doing nothing, timed interleaved with the "
        "bundle's (the fixed cost of a call: Python binding, input checks, executor); kernel shares from "
        "onnxruntime's profiler; numpy steps timed one by one"))
