"""Tests of `danpack check`: figures (packer/check.py), verdict (packer/verdict.py), latency (packer/latency.py), CLI.

Outside references: scipy.stats.binomtest (exact two-sided binomial p-value, and its exact
Clopper-Pearson interval via proportion_ci), scipy.stats.entropy (KL divergence), a plain
numpy index-resampling bootstrap (the textbook paired bootstrap; common practice), the
definition of ONNX QuantizeLinear/DequantizeLinear (per-row int8 with zero point 0), and
whitespace splitting of the generated texts ("w12 w7 ...") for token counts.
The test model is random; its eval labels are the float model's own predictions with 10%
replaced at random, so accuracy is meaningful (~93%) and pruning can cost some of it.
"""

from __future__ import annotations

import copy
import json
import xml.etree.ElementTree as ET
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pytest
import scipy.stats
from typer.testing import CliRunner

from helpers import make_model, zipf_texts
from danpack.pack.bundle import encode_bundle, encode_payload, encode_vocab
from danpack.check.compare import (CheckError, CheckOptions, MeanShift, align_labels, bootstrap_drop_interval,
                          clopper_pearson, exact_drop_interval, kl_divergence, mcnemar_exact_p, per_class_recall,
                          read_eval_set, run_check)
from danpack.cli import app
from danpack.check.latency import LatencyOptions, measure_pair, pick_texts
from danpack.model import load_model
from danpack.pack.build import PackOptions, pack_model
from danpack.check.verdict import (THRESHOLDS, VerdictError, Verdict, evaluate, parse_limit, parse_tolerances,
                            resolve_limits)
from danpack.runtime import load, read_bundle
from danpack.runtime.forward import Layer, encode_batch, forward_logits, softmax

RUNNER = CliRunner()
NO_LATENCY = ["--no-latency", "--quiet"]


# ---- the shared case: a random model, a corpus, a labelled eval set, good and bad bundles --------

@dataclass(frozen=True)
class Case:
    model_dir: Path
    eval_path: Path
    unlabelled: Path
    corpus: Path
    good: Path  # quantisation only: passes the default gates
    pruned: Path  # pruned to 99.9% coverage: passes, but drops a little accuracy
    heavy: Path  # pruned to 50 rows: fails agreement and accuracy
    texts: tuple[str, ...]
    gold: tuple[str, ...]


def make_case(root: Path) -> Case:
    """Build the test model and inputs in `root` (about half a second)."""
    model_dir = make_model(root, vocab_size=600, dim=16, hidden=(8,), seed=7)
    model = load_model(model_dir)
    texts = zipf_texts(model.vocab, 6000, seed=11, max_len=12, unknown_rate=0.05)  # 5% words no model knows
    corpus_texts, eval_texts = texts[:4500], texts[4500:]
    corpus = root / "corpus.txt"
    corpus.write_text("".join(t + "\n" for t in corpus_texts), encoding="utf-8")
    pred = model.predict_proba(eval_texts).argmax(axis=1)  # (N,)
    rng = np.random.default_rng(4)
    noisy = rng.random(len(pred)) < 0.10  # 10% label noise
    pred[noisy] = rng.integers(0, len(model.labels), int(noisy.sum()))
    gold = tuple(model.labels[i] for i in pred)
    eval_path = root / "eval.jsonl"
    eval_path.write_text("".join(json.dumps({"text": t, "label": g, "station": "S-03"}) + "\n"
                                 for t, g in zip(eval_texts, gold)), encoding="utf-8")
    unlabelled = root / "stream.jsonl"
    unlabelled.write_text("".join(json.dumps({"text": t}) + "\n" for t in eval_texts), encoding="utf-8")
    pack_model(model_dir, root / "good.dpk", PackOptions())
    pack_model(model_dir, root / "pruned.dpk", PackOptions(corpora=(str(corpus),), coverage=0.999))
    pack_model(model_dir, root / "heavy.dpk", PackOptions(corpora=(str(corpus),), top=50))
    return Case(model_dir, eval_path, unlabelled, corpus, root / "good.dpk", root / "pruned.dpk", root / "heavy.dpk",
                tuple(eval_texts), gold)


@pytest.fixture(scope="module")
def case(tmp_path_factory) -> Case:
    return make_case(tmp_path_factory.mktemp("check"))


def reencode(source: Path, out: Path, *, table=None, labels=None) -> Path:
    """Re-encode a bundle with a replaced table and/or label list, re-computing the load-time probe,
    so the runtime accepts it: a self-consistent but wrong bundle, as a packer bug would write."""
    b = read_bundle(source)
    tensors = {name: np.array(t) for name, t in b.tensors.items()}
    manifest = copy.deepcopy(b.manifest)
    if table is not None:
        tensors["table"] = table
    if labels is not None:
        manifest["labels"] = list(labels)
    layers = tuple(Layer(tensors.get(f"layer.{i}.weight") if spec["weight"] else None, tensors[f"layer.{i}.bias"],
                         spec["activation"]) for i, spec in enumerate(manifest["layers"]))
    ids, counts = encode_batch(manifest["probe"]["ids"])
    probs = softmax(forward_logits(tensors["table"], layers, ids, counts, tensors.get("scales")))  # (P, C)
    manifest["probe"]["probs"] = probs.astype(np.float32).tolist()
    from danpack.runtime.encode import Encoder
    from danpack.runtime.graph import spec_from_tensors, write_graph
    from danpack.runtime.tokenize import Tokenizer

    ids, counts = Encoder(Tokenizer(b.tokenizer), b.vocab, b.oov_row).encode(manifest["probe"]["texts"])
    probs = softmax(forward_logits(tensors["table"], layers, ids, counts, tensors.get("scales")))  # (S, C)
    manifest["probe"]["text_probs"] = probs.astype(np.float32).tolist()
    graph = write_graph(spec_from_tensors(len(manifest["labels"]), "scales" in tensors, manifest["layers"],
                                          {n: t.shape for n, t in tensors.items()}))
    out.write_bytes(encode_bundle(encode_payload(manifest, encode_vocab(list(b.vocab)), graph, tensors)))
    return out


def invoke(*args) -> object:
    return RUNNER.invoke(app, ["check", *map(str, args)])


# ---- statistics against scipy ------------------------------------------------------------------

COUNTS = [(0, 1), (1, 0), (3, 0), (5, 5), (5, 6), (12, 4), (270, 7), (40, 61), (1000, 1040), (0, 30)]


@pytest.mark.parametrize("b,c", COUNTS)
def test_mcnemar_exact_matches_scipy_binomtest(b, c):
    # source: scipy.stats.binomtest(k, n, p=0.5, alternative="two-sided") on the discordant pairs
    expected = scipy.stats.binomtest(b, b + c, 0.5).pvalue
    assert mcnemar_exact_p(b, c) == pytest.approx(expected, rel=1e-9, abs=1e-300)


def test_mcnemar_without_discordant_pairs_is_one():
    assert mcnemar_exact_p(0, 0) == 1.0


@pytest.mark.parametrize("k,n", [(0, 5), (5, 5), (1, 2), (7, 20), (270, 277), (500, 1000), (3, 1000)])
def test_clopper_pearson_matches_scipy(k, n):
    # source: scipy.stats.binomtest(k, n).proportion_ci(0.95, method="exact") (Clopper-Pearson)
    ci = scipy.stats.binomtest(k, n).proportion_ci(0.95, method="exact")
    low, high = clopper_pearson(k, n, 0.95)
    assert low == pytest.approx(ci.low, abs=1e-9)
    assert high == pytest.approx(ci.high, abs=1e-9)


def test_exact_drop_interval_maps_the_discordant_split():
    # drop = d (2 pi - 1) / N in points, with pi's Clopper-Pearson bounds from scipy
    b, c, n = 30, 10, 1000
    ci = scipy.stats.binomtest(b, b + c).proportion_ci(0.95, method="exact")
    low, high = exact_drop_interval(b, c, n)
    assert low == pytest.approx(100 * 40 * (2 * ci.low - 1) / n, abs=1e-7)
    assert high == pytest.approx(100 * 40 * (2 * ci.high - 1) / n, abs=1e-7)
    assert low < 100 * (b - c) / n < high
    assert exact_drop_interval(0, 0, n) == (0.0, 0.0)


def test_bootstrap_interval_contains_estimate_and_is_reproducible():
    b, c, n = 37, 12, 1500
    first = bootstrap_drop_interval(b, c, n, 2000, seed=5)
    assert first == bootstrap_drop_interval(b, c, n, 2000, seed=5)  # same seed, same interval
    assert first != bootstrap_drop_interval(b, c, n, 2000, seed=6)
    assert first[0] < 100 * (b - c) / n < first[1]


def test_bootstrap_shortcut_agrees_with_index_resampling():
    # the textbook paired bootstrap (common practice): resample text indices, recompute the drop
    rng = np.random.default_rng(0)
    n, b, c = 800, 40, 15
    diff = np.zeros(n)
    diff[:b], diff[b:b + c] = 1, -1  # correct_float - correct_packed per text
    idx = rng.integers(0, n, size=(4000, n))
    drops = 100 * diff[idx].mean(axis=1)
    textbook = np.percentile(drops, [2.5, 97.5])
    ours = bootstrap_drop_interval(b, c, n, 4000, seed=1)
    assert ours == pytest.approx(tuple(textbook), abs=0.4)  # Monte Carlo error of two 4000-draw runs


def test_kl_divergence_matches_scipy_entropy():
    rng = np.random.default_rng(3)
    p = rng.dirichlet(np.ones(4), size=20)
    q = rng.dirichlet(np.ones(4), size=20)
    # source: scipy.stats.entropy(pk, qk) = sum pk log(pk / qk), in nats
    expected = np.array([scipy.stats.entropy(a, b) for a, b in zip(p, q)])
    np.testing.assert_allclose(kl_divergence(p, q), expected, rtol=1e-9, atol=1e-10)
    np.testing.assert_allclose(kl_divergence(p, p), 0.0, atol=1e-12)


def test_per_class_recall_matches_a_confusion_matrix():
    rng = np.random.default_rng(8)
    gold, pf, pp = (rng.integers(0, 3, 200) for _ in range(3))
    confusion = np.zeros((3, 3), int)
    np.add.at(confusion, (gold, pf), 1)  # rows: true class, columns: predicted
    rows = per_class_recall(gold, pf, pp, ["a", "b", "c"])
    for c_, row in enumerate(rows):
        assert row["support"] == confusion[c_].sum()
        assert row["recall_float"] == pytest.approx(confusion[c_, c_] / confusion[c_].sum())
    assert per_class_recall(np.array([0, 0]), np.array([0, 1]), np.array([0, 0]), ["a", "b"])[1]["recall_float"] is None


# ---- reading the evaluation set ----------------------------------------------------------------

LABELS = ("negative", "neutral", "positive")


def test_eval_set_formats_and_label_detection(tmp_path):
    (tmp_path / "a.csv").write_text("station,text,label\nS1,slow charger,negative\nS2,\"fine, fast\",positive\n")
    (tmp_path / "a.tsv").write_text("text\tsentiment\nslow charger\tnegative\n")
    (tmp_path / "a.jsonl").write_text('{"text": "ok", "label": 1}\n', encoding="utf-8")
    csv_set = read_eval_set(tmp_path / "a.csv", LABELS)
    assert csv_set.texts == ("slow charger", "fine, fast") and csv_set.labels == ("negative", "positive")
    tsv = read_eval_set(tmp_path / "a.tsv", LABELS)
    assert tsv.labels is None  # no "label" column: unlabelled
    assert read_eval_set(tmp_path / "a.tsv", LABELS, label_field="sentiment").labels == ("negative",)
    assert read_eval_set(tmp_path / "a.jsonl", ("0", "1")).labels == ("1",)  # integer labels read as text


@pytest.mark.parametrize("content,needle", [
    ('{"text": "a", "label": "angry"}\n', "1 of 1 records have a label that is not one of the model's labels"),
    ('{"text": "a", "label": "negative"}\n{"text": "b"}\n', "record 2 has no field 'label'"),
    ('{"text": "a", "label": null}\n', "line 1: None"),
    ("", "holds no records"),
])
def test_eval_set_errors_name_file_and_record(tmp_path, content, needle):
    path = tmp_path / "bad.jsonl"
    path.write_text(content, encoding="utf-8")
    with pytest.raises(CheckError) as e:
        read_eval_set(path, LABELS)
    assert str(path) in str(e.value) and needle in str(e.value)


def test_eval_set_explicit_label_field_must_exist(tmp_path):
    path = tmp_path / "e.jsonl"
    path.write_text('{"text": "a"}\n', encoding="utf-8")
    with pytest.raises(CheckError, match="no field 'gold'"):
        read_eval_set(path, LABELS, label_field="gold")


def test_align_labels_by_name_and_refuses_other_labels():
    np.testing.assert_array_equal(align_labels(["b", "a", "c"], ["a", "b", "c"], "x"), [1, 0, 2])
    with pytest.raises(CheckError, match="are not the float model's labels"):
        align_labels(["a", "b"], ["a", "c"], "x")


# ---- figures on the test model ------------------------------------------------------------------

def test_figures_of_the_quantised_bundle(case):
    r = run_check(case.good, case.model_dir, case.eval_path, CheckOptions())
    f = r.figures
    model = load_model(case.model_dir)
    gold = np.array(case.gold)
    pf = np.array(model.labels)[model.predict_proba(list(case.texts)).argmax(axis=1)]
    pp = np.array(load(case.good).predict(list(case.texts)))
    assert f["texts"] == len(case.texts) == 1500
    assert f["accuracy_float"] == pytest.approx(np.mean(pf == gold))
    assert f["accuracy_bundle"] == pytest.approx(np.mean(pp == gold))
    assert f["accuracy_drop_points"] == pytest.approx(100 * (f["accuracy_float"] - f["accuracy_bundle"]))
    assert f["agreement"] == pytest.approx(np.mean(pf == pp))
    assert f["only_float_correct"] == np.sum((pf == gold) & (pp != gold))
    assert f["mcnemar_p"] == pytest.approx(
        scipy.stats.binomtest(f["only_float_correct"], f["only_float_correct"] + f["only_bundle_correct"]).pvalue)
    assert f["accuracy_drop_ci_low"] <= f["accuracy_drop_points"] <= f["accuracy_drop_ci_high"]
    assert f["pruned_tokens"] == 0 and f["pruned_token_share"] == 0.0  # nothing pruned without a corpus
    assert 0 <= f["mean_abs_prob_diff"] <= f["max_abs_prob_diff"] < 0.05  # int8 rounding only
    assert f["bundle_bytes"] == case.good.stat().st_size
    assert f["size_ratio"] == pytest.approx(f["float_bytes"] / f["bundle_bytes"])
    assert f["latency_ratio"] is None  # not measured here
    assert [row["label"] for row in r.per_class] == list(model.labels)
    assert sum(row["support"] for row in r.per_class) == 1500
    assert not r.warnings


def test_pruned_token_share_counts_tokens_the_bundle_dropped(case):
    f = run_check(case.pruned, case.model_dir, case.eval_path).figures
    float_vocab = set(load_model(case.model_dir).vocab)
    bundle_vocab = set(read_bundle(case.pruned).vocab)
    words = [w for t in case.texts for w in t.split()]  # the generated texts are space-separated tokens
    known = [w for w in words if w in float_vocab]
    pruned = [w for w in known if w not in bundle_vocab]
    assert f["tokens"] == len(words) and f["float_known_tokens"] == len(known)
    assert f["pruned_tokens"] == len(pruned) > 0
    assert f["pruned_token_share"] == pytest.approx(len(pruned) / len(known))
    with_pruned = sum(any(w in float_vocab and w not in bundle_vocab for w in t.split()) for t in case.texts)
    assert f["texts_with_pruned_share"] == pytest.approx(with_pruned / len(case.texts))


def test_unlabelled_set_gives_only_agreement_figures(case):
    r = run_check(case.good, case.model_dir, case.unlabelled)
    assert r.figures["accuracy_float"] is None and r.figures["mcnemar_p"] is None and r.per_class == []
    assert r.figures["agreement"] > 0.99
    assert all(d["label"] is None for d in r.disagreements)


def test_disagreements_listed_largest_change_first(case):
    r = run_check(case.heavy, case.model_dir, case.eval_path, CheckOptions(show_disagreements=7))
    d = r.disagreements
    assert len(d) == 7 and r.figures["disagreements"] > 7
    assert all(x["float"]["label"] != x["bundle"]["label"] for x in d)
    changes = [x["max_abs_prob_diff"] for x in d]
    assert changes == sorted(changes, reverse=True)
    pf = load_model(case.model_dir).predict_proba(list(case.texts))  # (N, C), same label order as the bundle
    pp = load(case.heavy).predict_proba(list(case.texts))
    differ = pf.argmax(axis=1) != pp.argmax(axis=1)
    assert changes[0] == pytest.approx(np.abs(pf - pp).max(axis=1)[differ].max(), abs=1e-6)
    for x in d:
        assert x["text"] == case.texts[x["index"]]
        assert set(x["pruned"]) <= set(x["text"].split())
        assert {t["token"] for t in x["tokens"] if t["status"] == "pruned"} <= set(x["pruned"])


def test_mean_shift_per_token_follows_quantisation_and_pruning(case):
    model, bundle = load_model(case.model_dir), read_bundle(case.pruned)
    assert bundle.manifest["table"]["folded"]  # 8 < 16: the first layer is folded into the table
    shift = MeanShift(model, bundle)
    vocab = set(bundle.vocab)
    kept = next(t for t in model.vocab if t in vocab)
    gone = next(t for t in model.vocab if t not in vocab)
    out = {e["token"]: e for e in shift.shifts([kept, gone, kept], {gone}, 3)}
    w1 = model.layers[0].weight  # (H1, D)
    row = model.embedding[model.vocab.index(kept)] @ w1.T  # (H1,): the float row in the folded space
    # ONNX QuantizeLinear with zero point 0 and scale max|row| / 127, then DequantizeLinear
    scale = np.float32(np.abs(row).max() / 127)
    deq = np.clip(np.rint(row / scale), -127, 127) * scale
    assert out[kept]["status"] == "kept" and out[kept]["count"] == 2
    assert out[kept]["shift"] == pytest.approx(2 * np.linalg.norm(row - deq) / 3, rel=1e-4)
    pruned_row = model.embedding[model.vocab.index(gone)] @ w1.T
    assert out[gone]["status"] == "pruned"
    assert out[gone]["shift"] == pytest.approx(np.linalg.norm(pruned_row) / 3, rel=1e-5)  # skip policy: ||row|| / n


def test_bundle_with_other_labels_is_refused(case, tmp_path):
    other = make_model(tmp_path, vocab_size=600, dim=16, hidden=(8,), seed=7, labels=("bad", "good"))
    bundle = tmp_path / "other.dpk"
    pack_model(other, bundle, PackOptions())
    with pytest.raises(CheckError, match="not the float model's labels"):
        run_check(bundle, case.model_dir, case.eval_path)


def test_bundle_of_another_float_model_is_refused_unless_allowed(case, tmp_path):
    other = make_model(tmp_path, vocab_size=600, dim=16, hidden=(8,), seed=8)
    bundle = tmp_path / "other.dpk"
    pack_model(other, bundle, PackOptions())
    with pytest.raises(CheckError, match="not from --reference .*pass --allow-other-reference"):
        run_check(bundle, case.model_dir, case.eval_path)
    r = run_check(bundle, case.model_dir, case.eval_path, CheckOptions(allow_other_reference=True))
    assert any("not from --reference" in w for w in r.warnings)
    assert r.figures["agreement"] < 0.9  # a different model disagrees a lot
    junit = tmp_path / "junit.xml"
    cli = invoke(bundle, "-r", case.model_dir, "-e", case.eval_path, "--no-latency", "--junit", junit)
    assert cli.exit_code == 2 and "--allow-other-reference" in cli.stderr and not junit.exists()
    cli = invoke(bundle, "-r", case.model_dir, "-e", case.eval_path, "--no-latency", "--junit", junit,
                 "--allow-other-reference")
    assert cli.exit_code in (0, 1), cli.stderr
    suite = ET.parse(junit).getroot().find("testsuite")
    assert "warning: the bundle was packed from a float model" in suite.find("system-err").text


# ---- latency ------------------------------------------------------------------------------------

def test_measure_pair_interleaves_and_attributes_time():
    now = [0]
    calls: list[str] = []

    def fake(name: str, cost_ns: int):
        def run(batch):
            calls.append(name)
            now[0] += cost_ns * len(batch)  # a fake clock: each text costs this side cost_ns
        return run

    opts = LatencyOptions(texts=6, batch=4, batches=3, warmup=2)
    ta, tb = measure_pair(fake("a", 5000), fake("b", 2000), ["x", "y", "z"], opts, clock=lambda: now[0])
    timed = calls[2 * 2 + 2 * 2:]  # after warm-up: 2 single calls and 2 batched calls per side
    pairs = [timed[i:i + 2] for i in range(0, len(timed), 2)]
    assert len(pairs) == 6 + 3 and all(sorted(p) == ["a", "b"] for p in pairs)  # every pair holds both sides
    assert [p[0] for p in pairs] == ["a", "b", "a", "b", "a", "b", "a", "b", "a"]  # the first runner alternates
    assert ta.p(50) == pytest.approx(0.005) and tb.p(50) == pytest.approx(0.002)  # ms: only its own calls
    assert ta.throughput == pytest.approx(1 / 5e-6) and tb.throughput == pytest.approx(1 / 2e-6)


def test_pick_texts_spreads_and_cycles():
    assert pick_texts(["a", "b", "c", "d", "e"], 3) == ["a", "c", "e"]
    assert pick_texts(["a", "b"], 5) == ["a", "b", "a", "b", "a"]


def test_check_with_a_small_latency_run(case):
    r = run_check(case.good, case.model_dir, case.eval_path, latency=LatencyOptions(texts=8, batch=4, batches=2, warmup=1))
    f = r.figures
    for key in ("latency_p50_ms_float", "latency_p50_ms_bundle", "throughput_float", "throughput_bundle"):
        assert f[key] > 0 and np.isfinite(f[key])
    assert f["latency_ratio"] == pytest.approx(f["latency_p50_ms_bundle"] / f["latency_p50_ms_float"])
    assert r.settings["latency"]["single_texts"] == 8


# ---- verdict ------------------------------------------------------------------------------------

def test_thresholds_compare_at_the_boundary():
    limits, explicit = resolve_limits({"max-bytes": 1000.0})
    figures = {"accuracy_drop_points": 1.0, "agreement": 0.99, "bundle_bytes": 1001, "size_ratio": 0.5,
               "latency_ratio": 3.0}
    out = {o.name: o for o in evaluate(figures, limits, explicit)}
    assert out["max-points-lost"].status == "pass"  # equal to the limit holds
    assert out["min-agreement"].status == "pass"
    assert out["max-bytes"].status == "fail" and "1,001 B" in out["max-bytes"].message
    assert out["min-size-ratio"].status == "fail"
    assert out["max-latency-ratio"].status == "skip"  # not gated by default
    assert Verdict(tuple(out.values())).exit_code == 1


def test_limits_off_and_percent_and_errors():
    limits, _ = resolve_limits({"min-size-ratio": parse_limit("off", "min-size-ratio"),
                                "min-agreement": parse_limit("98.5%", "min-agreement")})
    assert limits["min-size-ratio"] is None and limits["min-agreement"] == pytest.approx(0.985)
    assert limits["max-points-lost"] == 1.0  # the default stays
    with pytest.raises(VerdictError, match="not a number"):
        parse_limit("lots", "max-bytes")
    with pytest.raises(VerdictError, match="between 0 and 1"):
        parse_limit("99", "min-agreement")
    with pytest.raises(VerdictError, match="percent sign"):
        parse_limit("5%", "max-bytes")


def test_explicit_limit_on_a_missing_figure_is_an_error():
    limits, explicit = resolve_limits({"max-points-lost": 0.5})
    with pytest.raises(VerdictError, match="no labels"):
        evaluate({"agreement": 1.0, "size_ratio": 2.0}, limits, explicit)
    out = {o.name: o for o in evaluate({"agreement": 1.0, "size_ratio": 2.0}, *resolve_limits({}))}
    assert out["max-points-lost"].status == "skip" and "no labels" in out["max-points-lost"].message


def test_threshold_table_names_figures_that_exist():
    from danpack.check.compare import FIGURES

    assert all(t.key in FIGURES and t.op in ("<=", ">=") for t in THRESHOLDS)


def test_baseline_tolerance_parsing():
    tol = parse_tolerances(["accuracy=0.25", "bytes=10%", "latency=20", "drop=off"])
    assert tol["accuracy"] == 0.25 and tol["bytes"] == 10 and tol["latency"] == 20 and tol["drop"] is None
    with pytest.raises(VerdictError, match="NAME=VALUE"):
        parse_tolerances(["speed=3"])


# ---- the CLI: exit codes and damaged bundles ------------------------------------------------------

def test_cli_good_bundle_passes(case, tmp_path):
    res = invoke(case.good, "--reference", case.model_dir, "--eval", case.eval_path, *NO_LATENCY,
                 "--report", tmp_path / "r.json")
    assert res.exit_code == 0, res.output
    assert "PASS" in res.stdout and "accuracy" in res.stdout and "recall by class" in res.stdout
    report = json.loads((tmp_path / "r.json").read_text())
    assert report["verdict"]["passed"] and report["verdict"]["exit_code"] == 0


def test_cli_progress_goes_to_stderr(case):
    res = invoke(case.good, "--reference", case.model_dir, "--eval", case.eval_path, "--no-latency")
    assert res.exit_code == 0
    assert "[1/6]" in res.stderr and "[1/6]" not in res.stdout


def test_cli_heavily_pruned_bundle_fails_with_reasons(case):
    res = invoke(case.heavy, "--reference", case.model_dir, "--eval", case.eval_path, *NO_LATENCY)
    assert res.exit_code == 1, res.output
    fails = [line for line in res.stdout.splitlines() if line.strip().startswith("FAIL ")]
    assert any("min-agreement" in line and "below the limit >= 99.00%" in line for line in fails)
    assert any("max-points-lost" in line and "above the limit" in line for line in fails)


def test_cli_zeroed_rows_fail(case, tmp_path):
    table = np.array(read_bundle(case.good).tensors["table"])
    table[::2] = 0  # half the rows zeroed: a packer bug that still writes a self-consistent bundle
    damaged = reencode(case.good, tmp_path / "zeroed.dpk", table=table)
    load(damaged)  # the runtime accepts it: only the check can catch it
    res = invoke(damaged, "--reference", case.model_dir, "--eval", case.eval_path, *NO_LATENCY,
                 "--report", tmp_path / "z.json")
    assert res.exit_code == 1, res.output
    report = json.loads((tmp_path / "z.json").read_text())
    failed = {c["name"] for c in report["verdict"]["checks"] if c["status"] == "fail"}
    assert {"min-agreement", "max-points-lost"} <= failed
    assert report["figures"]["agreement"] < 0.9
    # the zeroed rows show up as large mean shifts of kept tokens in the listed disagreements
    shifts = [t for d in report["disagreements"] for t in d["tokens"] if t["status"] == "kept"]
    assert max(t["shift"] for t in shifts) > 0.1


def test_cli_swapped_labels_fail(case, tmp_path):
    labels = list(read_bundle(case.good).labels)
    damaged = reencode(case.good, tmp_path / "swapped.dpk", labels=labels[::-1])
    res = invoke(damaged, "--reference", case.model_dir, "--eval", case.eval_path, *NO_LATENCY)
    assert res.exit_code == 1, res.output
    assert "min-agreement" in res.stdout and "compared by label name" in res.stderr
    fails = [line for line in res.stdout.splitlines() if line.strip().startswith("FAIL ")]
    assert any("min-agreement" in line for line in fails)


def test_cli_thresholds_can_be_loosened_and_tightened(case):
    base = [case.pruned, "--reference", case.model_dir, "--eval", case.eval_path, *NO_LATENCY]
    assert invoke(*base).exit_code == 0
    assert invoke(*base, "--max-points-lost", "0.1").exit_code == 1
    assert invoke(*base, "--max-bytes", "1000").exit_code == 1
    assert invoke(*base, "--min-size-ratio", "100").exit_code == 1
    loose = invoke(case.heavy, "--reference", case.model_dir, "--eval", case.eval_path, *NO_LATENCY,
                   "--min-agreement", "off", "--max-points-lost", "off")
    assert loose.exit_code == 0, loose.output


@pytest.mark.parametrize("extra,needle", [
    (["--min-agreement", "high"], "is not a number"),
    (["--max-latency-ratio", "1.5", "--no-latency"], "needs the latency measurement"),
    (["--baseline-tolerance", "speed=1"], "NAME=VALUE"),
    (["--show-disagreements", "-1"], "must be 0 or more"),
    (["--max-bytes", "-5"], "cannot be negative"),
    (["--max-certified-changes", "-1"], "cannot be negative"),
    (["--max-certified-changes", "0.5"], "give a whole number"),
    (["--seed", "-1"], "Invalid value for '--seed'"),
])
def test_cli_bad_options_exit_2(case, extra, needle):
    res = invoke(case.good, "--reference", case.model_dir, "--eval", case.eval_path, "--quiet", *extra)
    assert res.exit_code == 2 and needle in res.stderr
    assert "Traceback" not in res.output


def test_cli_unreadable_inputs_exit_2(case, tmp_path):
    res = invoke(tmp_path / "missing.dpk", "--reference", case.model_dir, "--eval", case.eval_path, *NO_LATENCY)
    assert res.exit_code == 2 and "no such bundle file" in res.stderr
    bad = tmp_path / "bad.jsonl"
    bad.write_text('{"text": "w1 w2", "label": "furious"}\n', encoding="utf-8")
    res = invoke(case.good, "--reference", case.model_dir, "--eval", bad, *NO_LATENCY)
    assert res.exit_code == 2 and "line 1: 'furious'" in res.stderr
    res = invoke(case.good, "--reference", tmp_path, "--eval", case.eval_path, *NO_LATENCY)
    assert res.exit_code == 2 and "dan.json" in res.stderr
    res = invoke(case.good, "--reference", case.model_dir, "--eval", case.unlabelled, *NO_LATENCY,
                 "--max-points-lost", "0.5")
    assert res.exit_code == 2 and "no labels" in res.stderr
    assert "Traceback" not in res.output


def test_cli_unlabelled_check_passes_on_agreement(case):
    res = invoke(case.good, "--reference", case.model_dir, "--eval", case.unlabelled, *NO_LATENCY)
    assert res.exit_code == 0, res.output
    assert "unlabelled" in res.stdout and "not measured: the evaluation set has no labels" in res.stdout


def test_cli_with_tiny_latency_run(case, tmp_path):
    res = invoke(case.good, "--reference", case.model_dir, "--eval", case.eval_path, "--quiet",
                 "--latency-texts", "6", "--latency-batch", "4", "--latency-batches", "2",
                 "--max-latency-ratio", "1000", "--report", tmp_path / "l.json")
    assert res.exit_code == 0, res.output
    checks = {c["name"]: c for c in json.loads((tmp_path / "l.json").read_text())["verdict"]["checks"]}
    assert checks["max-latency-ratio"]["status"] == "pass" and checks["max-latency-ratio"]["value"] > 0
    assert "throughput, batch 4" in res.stdout


def test_cli_outputs_are_checked_before_the_run(case, tmp_path):
    eval_copy = tmp_path / "eval.jsonl"
    eval_copy.write_bytes(case.eval_path.read_bytes())
    before = eval_copy.read_bytes()
    for extra, needle in (
        (["--report", eval_copy], "would overwrite the input --eval"),  # the evaluation set survives
        (["--report", tmp_path / "r.json", "--junit", tmp_path / "r.json"], "both write"),
        (["--report", tmp_path], "is a folder"),
        (["--markdown", case.model_dir / "dan.json"], "would overwrite the input --reference file dan.json"),
    ):
        res = invoke(case.good, "--reference", case.model_dir, "--eval", eval_copy, *NO_LATENCY, *map(str, extra))
        assert res.exit_code == 2 and needle in res.stderr, res.output
        assert "Traceback" not in res.output and "accuracy" not in res.stdout  # refused before any work
    assert eval_copy.read_bytes() == before


def test_a_non_finite_answer_is_exit_2_never_a_crash(case, monkeypatch, tmp_path):
    # the hostile-input trial: a NaN-producing graph made `danpack check` crash with exit 1 (its "gate failed"
    # code); the reader now refuses such graphs, and a NaN that still came out of a backend is a plain error
    from danpack.runtime.classifier import Classifier

    real = Classifier.predict_proba

    def nan_on_first(self, texts):
        probs = real(self, texts)
        probs[:1] = np.nan
        return probs

    monkeypatch.setattr(Classifier, "predict_proba", nan_on_first)
    res = invoke(case.good, "--reference", case.model_dir, "--eval", case.eval_path, *NO_LATENCY)
    assert res.exit_code == 2, res.output
    assert "the bundle gives a non-finite probability (NaN or Inf) for text 1 of" in res.output


def test_a_label_map_file_is_bounded_json(tmp_path):
    """Deep nesting or a 5,000-digit number in a --label-map file is a CheckError naming it, never a traceback."""
    from danpack.check.compare import parse_label_map

    for name, text in (("deep.json", '{"a": ' * 5000 + "1" + "}" * 5000), ("huge.json", '{"a": ' + "9" * 5000 + "}"),
                       ("bad.json", '{"a": "ham",}')):
        path = tmp_path / name
        path.write_text(text, encoding="utf-8")
        with pytest.raises(CheckError, match=f"{name}: "):
            parse_label_map(str(path), ("ham", "spam"))
    good = tmp_path / "good.json"
    good.write_text('{"0": "ham", "1": "spam"}', encoding="utf-8")
    assert parse_label_map(str(good), ("ham", "spam")) == (("0", "ham"), ("1", "spam"))
