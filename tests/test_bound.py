"""Tests of the guaranteed drift bound (runtime/certify.py, packer/bound.py, Classifier.predict_certified).

External references: the float model's own numpy forward pass (packer.model.FloatModel.predict_logits)
is the "float" side; the runtime's numpy backend and onnxruntime are the "packed" side. float64 and
`math.fsum` (exactly rounded sums, Python stdlib) are the oracle for float32 rounding; numpy's float64
tanh (libm) the oracle for float32 tanh. The rounding bound γ_n = n·u/(1 − n·u), u = 2⁻²⁴, is the
standard dot-product error bound (Higham, Accuracy and Stability of Numerical Algorithms, §3.1; from memory).
"""

from __future__ import annotations

import itertools
import math
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import danpack.runtime.certify as certify
from danpack.check.bound import (BoundError, CertifiedReport, certify_texts, check_certified, check_rows, describe_bound,
                          worst_case_bound)
from danpack.model import FloatModel, load_model, save_model
from danpack.pack.build import PackOptions, pack_model
from danpack.runtime.bundle import Bundle, decode_bundle
from danpack.runtime.classifier import Classifier
from danpack.runtime.forward import Layer

# --- helpers -------------------------------------------------------------------------------------


def random_model(rng: np.random.Generator, *, vocab: int = 120, dim: int = 12, hidden: tuple[int, ...] = (8,),
                 activation: str = "relu", classes: int = 3, scale: float = 1.0, out_scale: float = 1.0,
                 unk: bool = False) -> FloatModel:
    """A float DAN with random weights; tokens w0..w{V-1} survive the tokenizer."""
    tokens = [f"w{i}" for i in range(vocab)] + (["<unk>"] if unk else [])
    emb = (rng.normal(0.0, scale, (len(tokens), dim))).astype(np.float32)  # (V, D)
    layers, width = [], dim
    for size in hidden:
        w = rng.normal(0.0, 1.0 / np.sqrt(width), (size, width)).astype(np.float32)
        layers.append(Layer(w, rng.normal(0.0, 0.1, size).astype(np.float32), activation))
        width = size
    w = rng.normal(0.0, out_scale / np.sqrt(width), (classes, width)).astype(np.float32)
    layers.append(Layer(w, rng.normal(0.0, 0.1, classes).astype(np.float32), None))
    labels = tuple(f"c{i}" for i in range(classes))
    return FloatModel(tuple(tokens), emb, tuple(layers), labels, oov_policy="unk" if unk else "skip",
                      unk_token="<unk>" if unk else None)


def pack(model: FloatModel, root, **options) -> Bundle:
    """Save the model and pack it through the real packer; returns the decoded bundle."""
    model_dir = root / "model"
    save_model(model, model_dir)
    return decode_bundle(pack_model(model_dir, None, PackOptions(**options)).data, "test bundle")


def random_texts(rng: np.random.Generator, tokens: list[str], count: int, longest: int = 30) -> list[str]:
    """Texts of 0..longest tokens drawn from `tokens`, plus one past the tokenizer's 512-token cap."""
    texts = [" ".join(rng.choice(tokens, int(rng.integers(0, longest + 1)))) for _ in range(count)]
    return texts + [" ".join(rng.choice(tokens, 600))]


def worst_drift(model: FloatModel, bundle: Bundle, texts: list[str], backends=("numpy", "onnxruntime")) -> float:
    """The core check: largest |logit_packed − logit_float| / bound over texts, classes and backends (≤ 1 holds)."""
    float_logits = model.predict_logits(texts).astype(np.float64)  # (B, C)
    bound = certify.drift_bound(bundle)
    worst = 0.0
    for backend in backends:
        clf = Classifier(bundle, backend)
        ids, counts, unknown = certify.encode_unknown(clf.encoder, texts)
        kept = unknown == 0  # every token has its own row
        assert kept.all(), "the core check is for texts whose tokens are all kept"
        packed = clf.backend.run(ids, counts)[1].astype(np.float64)  # (B, C)
        bounds = certify.logit_bounds(bound, ids, counts)  # (B, C)
        drift = np.abs(packed - float_logits)
        assert np.isfinite(bounds).all()
        worst = max(worst, float(np.max(np.where(drift > 0, drift / bounds, 0.0))))
    return worst


# --- the property: observed drift never exceeds the bound -----------------------------------------

RANDOM_MODELS = settings(max_examples=150, deadline=None, derandomize=True,
                         suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])


@RANDOM_MODELS
@given(seed=st.integers(0, 2**32 - 1), activation=st.sampled_from(["relu", "tanh"]),
       fold=st.sampled_from(["yes", "no"]), depth=st.integers(0, 3), dim=st.integers(2, 40),
       width=st.integers(2, 24), classes=st.integers(2, 5),
       scale=st.sampled_from([0.01, 0.3, 1.0, 8.0]), quantize=st.sampled_from([True, True, True, False]))
def test_drift_never_exceeds_bound(tmp_path_factory, seed, activation, fold, depth, dim, width, classes, scale,
                                   quantize):
    rng = np.random.default_rng(seed)
    hidden = tuple(int(rng.integers(2, width + 1)) for _ in range(depth))
    model = random_model(rng, vocab=int(rng.integers(10, 150)), dim=dim, hidden=hidden, activation=activation,
                         classes=classes, scale=scale)
    bundle = pack(model, tmp_path_factory.mktemp("m"), fold=fold, quantize=quantize)
    texts = random_texts(rng, list(model.vocab), 40)
    assert worst_drift(model, bundle, texts) <= 1.0


def aligned_model(folded_width: int | None = None) -> FloatModel:
    """A model built so the bound is nearly attained: every row's int8 error is 0.49 step with one fixed
    sign pattern, the first layer's weights match that pattern, every ReLU stays active, the output is positive."""
    rng = np.random.default_rng(7)
    vocab, dim, hidden = 24, 8, 6
    signs = np.where(np.arange(dim) % 2 == 0, 1.0, -1.0)  # (D,)
    step = 0.01 * (1.0 + rng.random(vocab))  # (V,)
    emb = np.empty((vocab, dim))
    emb[:, 0] = 127.0 * step  # the largest element fixes the row's scale at `step`
    emb[:, 1:] = step[:, None] * (rng.integers(0, 100, (vocab, dim - 1)) + 0.49) * signs[1:]  # rint drops the .49
    w1 = -np.abs(rng.normal(1.0, 0.2, (hidden, dim))) * signs  # (H, D): aligned with the error −0.49·step·sign
    w1[:, 0] = 1e-3
    layers = (Layer(w1.astype(np.float32), np.full(hidden, 100.0, np.float32), "relu"),  # active for every text
              Layer(np.abs(rng.normal(1.0, 0.2, (2, hidden))).astype(np.float32), np.zeros(2, np.float32), None))
    return FloatModel(tuple(f"w{i}" for i in range(vocab)), emb.astype(np.float32), layers, ("c0", "c1"))


def test_bound_is_nearly_attained_by_an_aligned_model(tmp_path):
    """The check has teeth: on a worst-case model the observed drift reaches 98% of the bound."""
    model = aligned_model()
    bundle = pack(model, tmp_path, fold="no")
    texts = random_texts(np.random.default_rng(1), list(model.vocab), 30)
    assert 0.95 < worst_drift(model, bundle, texts) <= 1.0


def test_understated_scales_are_caught(tmp_path, monkeypatch):
    """Break the bound on purpose (scales read as half their value): the core check and the premise check fail."""
    model = aligned_model()
    bundle = pack(model, tmp_path, fold="no")
    texts = random_texts(np.random.default_rng(1), list(model.vocab), 30)
    assert worst_drift(model, bundle, texts) <= 1.0
    assert check_rows(model, bundle)[0].holds
    honest = certify.read_steps
    monkeypatch.setattr(certify, "read_steps", lambda b: honest(b) / 2.0)
    assert worst_drift(model, bundle, texts) > 1.0  # the core check catches it
    assert not check_rows(model, bundle)[0].holds  # and so does the packer's premise check


def test_float32_allowance_is_needed_and_enough(tmp_path):
    """A float32 bundle has no quantisation error: what remains is rounding, which onnxruntime shows and c covers."""
    rng = np.random.default_rng(3)
    model = random_model(rng, dim=30, hidden=(40, 20), activation="tanh", scale=2.0)
    bundle = pack(model, tmp_path, fold="no", quantize=False)
    texts = random_texts(rng, list(model.vocab), 200)
    ids, counts, _ = certify.encode_unknown(Classifier(bundle, "numpy").encoder, texts)
    packed = Classifier(bundle, "onnxruntime").backend.run(ids, counts)[1]
    drift = np.abs(packed.astype(np.float64) - model.predict_logits(texts))
    assert drift.max() > 0  # without an allowance the bound (δ = 0 here) would be broken
    assert (drift <= certify.logit_bounds(certify.drift_bound(bundle), ids, counts)).all()


SHIPPED = Path(__file__).resolve().parents[1] / "models_demo" / "shipped"


@pytest.mark.skipif(not (SHIPPED / "sentiment").is_dir(), reason="the demo models are not built")
@pytest.mark.parametrize("task", ["sentiment", "topic"])
def test_bound_is_not_vacuous_on_the_demo_models(tmp_path, task):
    """Most test comments of the shipped demo models are certified (measured 0.75-0.83 of all, 0.94-0.99 of
    those whose tokens are all kept); a certified comment never changes class."""
    from danpack.models_demo import scenario

    model = load_model(SHIPPED / task)
    stream = scenario.write_jsonl(tmp_path / "stream.jsonl", scenario.generate_stream(5000))
    texts = [r["text"] for r in scenario.generate_split(task, "test", 1000)]
    for fold in ("no", "yes"):
        save_model(model, tmp_path / fold / "model")
        data = pack_model(tmp_path / fold / "model", None, PackOptions(corpora=(str(stream),), fold=fold)).data
        report = certify_texts(model, decode_bundle(data), texts)
        assert report.rows.holds and report.certified_disagreements == 0
        assert report.share > 0.5 and report.certified[report.covered].mean() > 0.8


# --- the float32 facts the allowance rests on --------------------------------------------------------


def test_gamma_bounds_float32_dot_products():
    """|fl(x·y) − x·y| ≤ γ_n Σ|x_i y_i| for numpy's float32 matmul, einsum and sum (exact value via math.fsum)."""
    rng = np.random.default_rng(5)
    for n in (1, 2, 7, 50, 300, 600):
        x = (rng.normal(size=(40, n)) * np.exp(rng.normal(0, 3, (40, n)))).astype(np.float32)  # wide range
        y = rng.normal(size=n).astype(np.float32)
        products = x.astype(np.float64) * y.astype(np.float64)  # exact: 24 + 24 bits fit in 53
        exact = np.array([math.fsum(row) for row in products])
        budget = certify.gamma(n) * np.abs(products).sum(axis=1)
        for got in (x @ y, np.einsum("bd,d->b", x, y), (x * y).sum(axis=1, dtype=np.float32)):
            assert (np.abs(got.astype(np.float64) - exact) <= budget).all()


def test_tanh_error_within_allowance():
    """float32 tanh of numpy and of onnxruntime stays within TANH_ERROR of float64 tanh on a dense grid."""
    import onnxruntime as ort
    from onnx import TensorProto, helper

    x = np.concatenate([np.linspace(-12, 12, 400_001, dtype=np.float32),
                        np.float32(10.0) ** -np.arange(1, 30, dtype=np.float32)]).astype(np.float32)
    reference = np.tanh(x.astype(np.float64))
    graph = helper.make_graph([helper.make_node("Tanh", ["x"], ["y"])], "tanh",
                              [helper.make_tensor_value_info("x", TensorProto.FLOAT, [None])],
                              [helper.make_tensor_value_info("y", TensorProto.FLOAT, [None])])
    onnx_model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    onnx_model.ir_version = 8
    session = ort.InferenceSession(onnx_model.SerializeToString(), providers=["CPUExecutionProvider"])
    for got in (np.tanh(x), session.run(None, {"x": x})[0]):
        assert np.abs(got.astype(np.float64) - reference).max() <= certify.TANH_ERROR


# --- the gain vector -------------------------------------------------------------------------------


def test_gain_between_exact_worst_case_and_absolute_product():
    """g ≥ the exact max over 0/1 activation patterns (brute force) and ≤ |W_L|···|W_1| 1; equal for one unit."""
    rng = np.random.default_rng(11)
    for hidden in (6, 1):
        w1, w2 = rng.normal(size=(hidden, 5)), rng.normal(size=(3, hidden))
        layers = [(w1, np.zeros(hidden), "relu"), (w2, np.zeros(3), None)]
        g = certify.gain_vector(layers)
        brute = np.max([np.abs(w2 @ np.diag(d) @ w1).sum(axis=1)
                        for d in itertools.product((0.0, 1.0), repeat=hidden)], axis=0)
        loose = np.abs(w2) @ np.abs(w1) @ np.ones(5)
        assert (brute <= g * (1 + 1e-12)).all() and (g <= loose * (1 + 1e-12)).all()
        if hidden == 1:
            np.testing.assert_allclose(g, brute, rtol=1e-12)


# --- worst case for `danpack inspect` --------------------------------------------------------------


def test_worst_case_bound_covers_every_text(tmp_path):
    rng = np.random.default_rng(2)
    model = random_model(rng, dim=20, hidden=(10, 6), activation="tanh")
    bundle = pack(model, tmp_path, fold="yes")
    worst = worst_case_bound(bundle)
    b = np.array(list(worst["logit_bound"].values()))
    assert worst["folded"] and worst["table"] == "int8"
    assert worst["delta_max"] >= worst["half_step_max"]
    assert worst["safe_margin"] == pytest.approx(np.sort(b)[-2:].sum())  # max over c ≠ c' of b_c + b_c'
    texts = random_texts(rng, list(model.vocab), 100)
    ids, counts, _ = certify.encode_unknown(Classifier(bundle, "numpy").encoder, texts)
    assert (certify.logit_bounds(certify.drift_bound(bundle), ids, counts) <= b * (1 + 1e-9)).all()
    lines = describe_bound(worst)
    assert len(lines) == 5 and lines[0].startswith("drift bound: ") and "every row kept" in lines[4]


# --- runtime and float-side certification ------------------------------------------------------------


@pytest.mark.parametrize("policy,unk", [("skip", False), ("rest", False), ("unk", True), ("skip", True)])
def test_runtime_and_float_certification_agree(tmp_path, policy, unk):
    rng = np.random.default_rng(4)
    model = random_model(rng, vocab=200, dim=16, hidden=(8,), out_scale=6.0, unk=unk)
    corpus = tmp_path / "stream.txt"
    common = [f"w{i}" for i in range(60)]
    corpus.write_text("\n".join(" ".join(rng.choice(common, 8)) for _ in range(300)) + "\n", encoding="utf-8")
    bundle = pack(model, tmp_path, corpora=(str(corpus),), coverage=1.0, pruned=policy, fold="no")
    kept = [t for i, t in enumerate(bundle.vocab) if i != bundle.oov_row and t != "<unk>"]
    pruned = [t for t in model.vocab[:200] if t not in set(bundle.vocab)]
    assert len(pruned) > 100 and len(kept) >= 50
    texts = random_texts(rng, kept, 300, longest=6)[:-1]
    with_pruned = [" ".join([*rng.choice(kept, 6), rng.choice(pruned)]) for _ in range(150)]
    with_unknown = ["w1 zzz w2", "qq"]
    texts = texts + with_pruned + with_unknown
    report = certify_texts(model, bundle, texts)
    labels, probs, runtime_certified = Classifier(bundle, "numpy").predict_certified(texts)

    assert isinstance(report, CertifiedReport) and report.rows.holds
    np.testing.assert_array_equal(runtime_certified, report.runtime_certified)
    np.testing.assert_array_equal(report.certified, report.runtime_certified)  # the premise holds: one bound
    assert report.certified_disagreements == 0
    # the theorem: a certified text has the float original's class (numpy forward over the full float table)
    assert (report.float_top == report.packed_top)[report.certified].all()
    outside = np.zeros(len(texts), bool)
    outside[-len(with_pruned) - len(with_unknown):] = True
    np.testing.assert_array_equal(~report.covered, outside)
    assert report.certified[~outside].mean() > 0.5
    assert not report.certified[-1]  # "qq": no token of its own, never certified
    summary = report.to_dict()
    assert summary["pruned_texts"] == len(with_pruned) and report.unknown[-2:].all()
    assert summary["uncovered_texts"] == len(with_pruned) + 2
    assert summary["certified_share_of_uncovered"] == pytest.approx(report.certified[outside].mean())
    # predict_certified returns what predict / predict_proba return
    clf = Classifier(bundle, "numpy")
    assert labels == clf.predict(texts)
    np.testing.assert_array_equal(probs, clf.predict_proba(texts))


def test_onnxruntime_certification_is_sound(tmp_path):
    rng = np.random.default_rng(8)
    model = random_model(rng, dim=24, hidden=(16, 8), activation="tanh", out_scale=6.0)
    bundle = pack(model, tmp_path, fold="yes")
    texts = random_texts(rng, list(model.vocab), 400, longest=10)
    labels, _, certified = Classifier(bundle, "onnxruntime").predict_certified(texts)
    float_labels = [model.labels[i] for i in model.predict_logits(texts).argmax(axis=1)]
    assert certified.sum() > 0
    assert all(a == b for a, b, c in zip(labels, float_labels, certified) if c)


def test_predict_certified_shapes_and_encoding(tmp_path):
    rng = np.random.default_rng(9)
    model = random_model(rng, unk=True)
    bundle = pack(model, tmp_path, pruned="unk")
    clf = Classifier(bundle, "numpy")
    texts = ["w1 w2 nope", "", "w3"]
    ids, counts, unknown = certify.encode_unknown(clf.encoder, texts)
    kept = unknown == 0  # every token has its own row
    expected_ids, expected_counts = clf.encoder.encode(texts)
    np.testing.assert_array_equal(ids, expected_ids)
    np.testing.assert_array_equal(counts, expected_counts)
    assert kept.tolist() == [False, True, True]
    ids, counts, unknown = certify.encode_unknown(clf.encoder, texts + ["nope w1 nah"])
    assert unknown.tolist() == [1, 0, 0, 2] and counts.tolist() == [3, 0, 1, 3]
    labels, probs, certified = clf.predict_certified([])
    assert labels == [] and probs.shape == (0, 3) and certified.shape == (0,) and certified.dtype == bool


# --- the premise the runtime relies on, checked by the packer ------------------------------------------


def test_premise_holds_and_a_damaged_row_is_found(tmp_path):
    rng = np.random.default_rng(6)
    model = random_model(rng, dim=20, hidden=(8, 4))
    for fold in ("no", "yes"):
        bundle = pack(model, tmp_path / fold, fold=fold)
        check = check_rows(model, bundle)[0]
        assert check.holds and check.rows == len(model.vocab) and check.worst_radius > 0.9
        assert (check.worst_mass > 0) == (fold == "yes")
    bundle = pack(model, tmp_path / "plain", fold="no")
    row = bundle.vocab.index("w5")
    emb = model.embedding.copy()
    scale = float(bundle.tensors["scales"][row])
    emb[5, 0] = bundle.tensors["table"][row, 0] * scale + 0.6 * scale  # 0.6 step from the stored value: no int8 rounding
    damaged = FloatModel(model.vocab, emb, model.layers, model.labels)
    report = certify_texts(damaged, bundle, ["w5 w6", "w7"])
    assert report.rows.failing == 1 and report.rows.worst_token == "w5"
    assert any("premise" in p for p in check_certified(report, 0.0))


def test_cancelling_folded_row_breaks_the_premise_and_is_widened(tmp_path):
    """A row orthogonal to every first-layer weight folds to ≈ 0 with a large Σ|W1||E|: the runtime's
    assumed fold mass fails there; the packer reports it and its own (widened) bound still holds."""
    rng = np.random.default_rng(12)
    model = random_model(rng, vocab=40, dim=12, hidden=(4,), activation="tanh")
    w1 = model.layers[0].weight.astype(np.float64)  # (4, 12)
    null = np.linalg.svd(w1)[2][-1]  # (12,): W1 · null ≈ 0
    emb = model.embedding.copy()
    emb[5] = (3.0 * null / np.abs(null).max()).astype(np.float32)
    model = FloatModel(model.vocab, emb, model.layers, model.labels)
    bundle = pack(model, tmp_path, fold="yes")
    check, need_radius, need_mass = check_rows(model, bundle)
    assert check.failing >= 1 and check.worst_token == "w5" and check.worst_mass > 1.0
    texts = [" ".join(rng.choice(model.vocab, 5)) + " w5" for _ in range(50)]
    clf = Classifier(bundle, "numpy")
    ids, counts, _ = certify.encode_unknown(clf.encoder, texts)
    widened = certify.drift_bound(bundle, need_radius, need_mass)
    drift = np.abs(clf.backend.run(ids, counts)[1].astype(np.float64) - model.predict_logits(texts))
    assert (drift <= certify.logit_bounds(widened, ids, counts)).all()
    assert any("premise" in p for p in check_certified(certify_texts(model, bundle, texts), 0.0))


def test_gate_and_mismatched_model(tmp_path):
    rng = np.random.default_rng(10)
    model = random_model(rng)
    bundle = pack(model, tmp_path)
    report = certify_texts(model, bundle, ["w1 w2", "w3"])
    assert check_certified(report, 0.0) == []
    assert "below the required" in check_certified(report, 1.01)[0]
    other = random_model(np.random.default_rng(11))
    with pytest.raises(BoundError, match="layer 0 weights differ"):
        certify_texts(other, bundle, ["w1"])
    relabelled = FloatModel(model.vocab, model.embedding, model.layers, ("x", "y", "z"))
    with pytest.raises(BoundError, match="labels"):
        certify_texts(relabelled, bundle, ["w1"])


def test_gain_of_a_lone_folded_layer_is_one_per_class():
    # A bundle whose only layer is folded into the table (table width = label count) is valid by the format:
    # the logits are the mean plus a bias, so each logit moves by exactly the mean's drift (Jacobian = I).
    gain = certify.gain_vector([(None, np.zeros(3, np.float32), None)])
    np.testing.assert_array_equal(gain, np.ones(3))
