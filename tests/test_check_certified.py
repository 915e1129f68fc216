"""`danpack check` wiring of the drift bound: the certified-share figure and its two gates."""

from __future__ import annotations

import json

from typer.testing import CliRunner

import danpack.check.compare as check_module
from danpack.cli import app
from danpack.pack.build import PackOptions, pack_model
from tests.helpers import LABELS, make_model, token, zipf_texts

RUNNER = CliRunner()


def _setup(tmp_path, quantize=True):
    model_dir = make_model(tmp_path, vocab_size=80, dim=16, hidden=(8,), seed=3)
    bundle = tmp_path / "m.danpack"
    pack_model(model_dir, bundle, PackOptions(quantize=quantize))
    texts = zipf_texts([token(i) for i in range(80)], 300, seed=5)
    eval_file = tmp_path / "eval.jsonl"
    eval_file.write_text("".join(json.dumps({"text": t, "label": LABELS[i % 3]}) + "\n" for i, t in enumerate(texts)),
                         encoding="utf-8")
    return model_dir, bundle, eval_file


def _check(model_dir, bundle, eval_file, *extra):
    return RUNNER.invoke(app, ["check", str(bundle), "-r", str(model_dir), "-e", str(eval_file), "--no-latency", "-q",
                               *extra])


def test_certified_share_is_reported_and_gated(tmp_path):
    model_dir, bundle, eval_file = _setup(tmp_path)
    report = tmp_path / "r.json"
    ok = _check(model_dir, bundle, eval_file, "--min-certified", "0.01", "--report", str(report))
    assert ok.exit_code == 0, ok.stdout + ok.stderr
    figures = json.loads(report.read_text())["figures"]
    assert 0.0 < figures["certified_share"] <= 1.0  # not vacuous on a quantised-only bundle
    assert figures["certified_changes"] == 0
    strict = _check(model_dir, bundle, eval_file, "--min-certified", "1.0")
    if figures["certified_share"] < 1.0:
        assert strict.exit_code == 1 and "min-certified" in strict.stdout


def test_a_certified_text_that_changed_class_fails_by_default(tmp_path, monkeypatch):
    model_dir, bundle, eval_file = _setup(tmp_path)
    real = check_module.certified_figures

    def broken(*args, **kwargs):  # as if the bound had let a prediction change
        return {**real(*args, **kwargs), "certified_changes": 1}

    monkeypatch.setattr(check_module, "certified_figures", broken)
    result = _check(model_dir, bundle, eval_file)
    assert result.exit_code == 1 and "max-certified-changes" in result.stdout


def test_float32_bundle_skips_the_bound_and_refuses_an_explicit_gate(tmp_path):
    model_dir, bundle, eval_file = _setup(tmp_path, quantize=False)
    assert _check(model_dir, bundle, eval_file).exit_code == 0
    explicit = _check(model_dir, bundle, eval_file, "--min-certified", "0.5")
    assert explicit.exit_code == 2 and "no drift bound applies" in explicit.stderr


def test_share_among_texts_with_unknown_tokens_is_reported(tmp_path):
    model_dir, _, eval_file = _setup(tmp_path)
    bundle, corpus = tmp_path / "pruned.danpack", tmp_path / "corpus.txt"
    corpus.write_text(" ".join(token(i) for i in range(40)) + "\n", encoding="utf-8")
    pack_model(model_dir, bundle, PackOptions(corpora=(str(corpus),), coverage=1.0))
    report, markdown = tmp_path / "r.json", tmp_path / "r.md"
    result = _check(model_dir, bundle, eval_file, "--report", str(report), "--markdown", str(markdown),
                    "--min-agreement", "0", "--max-points-lost", "100")
    assert result.exit_code == 0, result.stdout + result.stderr
    figures = json.loads(report.read_text())["figures"]
    assert 0.0 <= figures["certified_share_of_uncovered"] <= 1.0 and figures["certified_changes"] == 0
    assert "of texts with unknown tokens" in markdown.read_text()
    assert "of texts with unknown tokens" in result.stdout
