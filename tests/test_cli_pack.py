"""The `danpack pack`, `inspect` and `export-onnx` commands (packer/cli/pack.py) through typer's CliRunner.

External references: `hashlib.sha256` and `msgpack` (the format's codec) recompute the checksum the
commands print; `onnxruntime.InferenceSession` and `onnx.checker` load the exported file; the file
size comes from the operating system (`Path.stat`). Usage errors exit 2 (click/typer convention).
"""

from __future__ import annotations

import hashlib
import json
import re
import zlib
from pathlib import Path

import msgpack
import numpy as np
import onnx
import onnxruntime as ort
import pytest
from helpers import LABELS, make_corpus, make_model, random_texts, token, zipf_texts
from typer.testing import CliRunner

from danpack import runtime
from danpack.cli import app

RUNNER = CliRunner()


def invoke(*args: str):
    return RUNNER.invoke(app, [str(a) for a in args], catch_exceptions=False)


@pytest.fixture(scope="module")
def inputs(tmp_path_factory):
    root = tmp_path_factory.mktemp("cli")
    vocab = [token(i) for i in range(150)] + ["Hello"]  # "Hello" can never be produced (lower-casing)
    model_dir = make_model(root, vocab=vocab, dim=16, hidden=(8,), seed=21)
    corpus = make_corpus(root, zipf_texts(vocab[:120], 200, seed=22, unknown_rate=0.05), fmt="jsonl")
    return root, model_dir, corpus


@pytest.fixture(scope="module")
def packed(inputs):
    root, model_dir, corpus = inputs
    out = root / "packed.danpack"
    result = invoke("pack", model_dir, "-o", out, "--corpus", corpus, "--coverage", "0.9")
    assert result.exit_code == 0, result.stderr
    return out, result


# --- pack --------------------------------------------------------------------------------------

def test_pack_writes_a_bundle_and_prints_a_summary(packed):
    out, result = packed
    lines = result.stdout.splitlines()
    bundle = runtime.read_bundle(out)
    size = out.stat().st_size
    assert lines[0].startswith(f"wrote {out}: ") and "smaller" in lines[0]
    kept = re.match(r"kept (\d+) of 151 rows, covering (\d+\.\d\d)% of the ([\d,]+) known tokens in (\d+) selection "
                    r"texts \((\d+) more held out for measurement\); chosen by --coverage 0.9", lines[1])
    assert kept, lines[1]
    assert int(kept.group(1)) == len(bundle.vocab)  # the pruned-rest row, if any, has no token
    assert float(kept.group(2)) >= 90.0 and int(kept.group(4)) + int(kept.group(5)) == 200
    held = bundle.manifest["selection"]["heldout"]
    assert held["texts"] == int(kept.group(5)) and 0 < int(kept.group(5)) < 200
    assert lines[2] == (f"held-out: agreement with the float model {held['agreement']:.2%}, mean |dp| "
                        f"{held['mean_abs_prob_diff']:.4f}, certified {held['certified_share']:.2%} of {held['texts']} texts")
    assert lines[3] == "dropped 1 rows the tokenizer can never produce, e.g. 'Hello'"
    table = bundle.manifest["table"]
    assert lines[4] == (f"table {table['rows']:,} x {table['width']} int8 (first hidden layer folded in); "
                        f"pruned tokens at run time: {bundle.manifest['oov']['policy']}")
    assert lines[5].startswith("bytes: table ")
    assert len(lines) == 6
    assert size == bundle.size
    # progress went to stderr, numbered; stdout holds only the summary
    assert re.search(r"^\[1/6\] reading float model", result.stderr, re.M)
    assert "[6/6] writing" in result.stderr and "[1/6]" not in result.stdout
    clf = runtime.load(out)
    assert clf.labels == LABELS and len(clf.predict(["w1 w2", "Hello"])) == 2


def test_pack_json_summary(inputs, tmp_path):
    _, model_dir, corpus = inputs
    out = tmp_path / "j.danpack"
    result = invoke("pack", model_dir, "-o", out, "-c", corpus, "--top", "40", "--pruned", "rest", "--json")
    assert result.exit_code == 0, result.stderr
    summary = json.loads(result.stdout)  # nothing but JSON on stdout
    size = out.stat().st_size
    assert summary["bundle"] == str(out) and summary["bytes"] == size
    assert sum(summary["breakdown"].values()) == size
    assert summary["rows_kept"] == 40 and summary["table_rows"] == 41 and summary["rows_float"] == 151
    assert summary["pruned_policy"] == "rest" and summary["folded"] is True and summary["table_width"] == 8
    assert summary["unreachable_rows"] == 1 and summary["unreachable_examples"] == ["Hello"]
    assert summary["corpus_texts"] == 200 and summary["ratio"] == round(summary["float_bytes"] / size, 2)
    assert result.stderr == ""  # --json implies no progress


def test_pack_without_corpus_keeps_every_row(inputs, tmp_path):
    _, model_dir, _ = inputs
    result = invoke("pack", model_dir, "-o", tmp_path / "n.danpack", "-q")
    assert result.exit_code == 0, result.stderr
    assert "no corpus given: kept every reachable row (150 of 151)" in result.stdout
    assert result.stderr == ""  # -q


def test_keep_words_outside_the_model_are_named(inputs, tmp_path):
    _, model_dir, corpus = inputs
    words = tmp_path / "keep.txt"
    words.write_text("w3\nnot-in-model\n\n", encoding="utf-8")
    result = invoke("pack", model_dir, "-o", tmp_path / "n.danpack", "-c", corpus, "--keep-words", words, "-q")
    assert result.exit_code == 0, result.stderr
    assert "keep-words the float model does not know (not added): not-in-model" in result.stdout


@pytest.mark.parametrize("option", [("--top", "3"), ("--coverage", "0.9"), ("--max-bytes", "9000"),
                                    ("--keep-words", "KEEP")])
def test_row_options_without_a_corpus_are_refused(inputs, tmp_path, option):
    """Each would silently do nothing without a corpus (every reachable row is kept): exit 2, naming --corpus."""
    _, model_dir, _ = inputs
    (tmp_path / "keep.txt").write_text("w3\n", encoding="utf-8")
    value = str(tmp_path / "keep.txt") if option[1] == "KEEP" else option[1]
    out = tmp_path / "n.danpack"
    result = invoke("pack", model_dir, "-o", out, option[0], value)
    assert result.exit_code == 2
    assert f"{option[0]} chooses rows by their use in a corpus; add --corpus FILE" in result.stderr
    assert not out.exists()


def test_ctrl_c_during_a_pack_says_nothing_was_written(inputs, tmp_path, monkeypatch):
    import danpack.pack.build

    _, model_dir, corpus = inputs
    out = tmp_path / "n.danpack"
    out.write_bytes(b"the previous bundle")

    def interrupted(*args, **kwargs):
        raise KeyboardInterrupt

    monkeypatch.setattr(danpack.pack.build, "pack_model", interrupted)
    result = invoke("pack", model_dir, "-o", out, "-c", corpus)
    assert result.exit_code == 130
    assert f"danpack: interrupted; nothing was written ({out} is as it was)" in result.stderr
    assert out.read_bytes() == b"the previous bundle"


def test_text_field_on_plain_lines_is_refused(inputs, tmp_path):
    _, model_dir, _ = inputs
    corpus = tmp_path / "corpus.txt"
    corpus.write_text("w1 w2\nw3\n", encoding="utf-8")
    result = invoke("pack", model_dir, "-o", tmp_path / "n.danpack", "-c", corpus, "--text-field", "body")
    assert result.exit_code == 2 and "--text-field 'body' names a JSONL field" in result.stderr


@pytest.mark.parametrize("value, ok", [("0.9", True), ("90%", True), ("90", False), ("1.5", False), ("x", False)])
def test_coverage_is_a_share_like_every_share(inputs, tmp_path, value, ok):
    """One rule for shares everywhere (as check --min-agreement): 0..1 or a percent with its sign."""
    _, model_dir, corpus = inputs
    result = invoke("pack", model_dir, "-o", tmp_path / "n.danpack", "-c", corpus, "--coverage", value, "-q")
    assert (result.exit_code == 0) == ok, result.stderr
    if value == "90":
        assert "did you mean 90%?" in result.stderr


def test_a_txt_corpus_of_json_objects_gets_a_warning(inputs, tmp_path):
    _, model_dir, _ = inputs
    corpus = tmp_path / "corpus.txt"
    corpus.write_text('{"text": "w1 w2"}\n{"text": "w3"}\n', encoding="utf-8")
    result = invoke("pack", model_dir, "-o", tmp_path / "n.danpack", "-c", corpus, "-q")
    assert "its first line is a JSON object but a .txt file is read as plain lines" in result.stderr
    renamed = tmp_path / "corpus"  # no suffix: the first line decides (JSONL)
    renamed.write_bytes(corpus.read_bytes())
    result = invoke("pack", model_dir, "-o", tmp_path / "m.danpack", "-c", renamed, "--json")
    assert result.exit_code == 0, result.stderr
    assert json.loads(result.stdout)["corpus_tokens"] == 3


# --- inspect -----------------------------------------------------------------------------------

def _payload_sha(path: Path) -> str:
    return hashlib.sha256(msgpack.unpackb(path.read_bytes(), raw=False)["payload"]).hexdigest()


def test_inspect_human(packed):
    out, _ = packed
    result = invoke("inspect", out)
    assert result.exit_code == 0, result.stderr
    fields = {line.split()[0]: line.split(None, 1)[1] for line in result.stdout.splitlines()}
    assert list(fields) == ["bundle", "sha256", "size", "labels", "table", "layers", "pruned", "heldout", "source",
                            "packer", "bytes", "bound"]
    assert "cannot be changed by quantisation" in result.stdout  # the drift bound's guaranteed-safe margin
    assert fields["bundle"] == str(out)
    assert fields["sha256"] == _payload_sha(out)
    assert f"({out.stat().st_size:,} bytes)" in fields["size"]
    assert fields["labels"] == ", ".join(LABELS)
    assert fields["layers"] == "folded into the table + relu -> dense + softmax"
    held = runtime.read_bundle(out).manifest["selection"]["heldout"]
    assert fields["pruned"].startswith(f"{runtime.read_bundle(out).manifest['oov']['policy']}; coverage ")
    assert fields["heldout"] == (f"agreement {held['agreement']:.2%}, mean |dp| {held['mean_abs_prob_diff']:.4f}, "
                                 f"certified {held['certified_share']:.2%} of {held['texts']:,} texts; chosen by "
                                 "--coverage 0.9 (policy by held-out agreement)")


def test_inspect_json_breakdown_sums_to_the_file_size(packed):
    out, _ = packed
    result = invoke("inspect", out, "--json")
    assert result.exit_code == 0, result.stderr
    info = json.loads(result.stdout)
    size = out.stat().st_size
    assert info["bytes"] == size and sum(info["breakdown"].values()) == size
    assert set(info["breakdown"]) == {"table", "scales", "layers", "vocab", "graph", "other"}
    assert all(v >= 0 for v in info["breakdown"].values())
    t = info["manifest"]["table"]
    assert info["breakdown"]["table"] == t["rows"] * t["width"]  # int8: one byte per element
    assert info["breakdown"]["scales"] == 4 * t["rows"]  # one float32 per row
    # the vocabulary: one zlib stream (RFC 1950), inflated by the stdlib, of the tokens joined by newlines
    stored = msgpack.unpackb(msgpack.unpackb(out.read_bytes(), raw=False)["payload"], raw=False)["vocab"]
    assert info["breakdown"]["vocab"] == len(stored)
    tokens = zlib.decompress(stored).decode("utf-8").split("\n")
    assert len(tokens) == info["tokens"] == t["tokens"] and len(set(tokens)) == len(tokens)
    assert info["sha256"] == _payload_sha(out)
    assert info["labels"] == list(LABELS) and "probe" not in info["manifest"]


# --- export-onnx -------------------------------------------------------------------------------

def test_export_onnx_runs_in_onnxruntime_and_matches_the_bundle(packed, tmp_path):
    out, _ = packed
    missing = invoke("export-onnx", out, "-o", tmp_path / "sub" / "model.onnx")  # a missing folder is not made
    assert missing.exit_code == 2 and "does not exist; create it first (mkdir -p" in missing.stderr
    assert not (tmp_path / "sub").exists()
    target = tmp_path / "model.onnx"
    result = invoke("export-onnx", out, "-o", target)
    assert result.exit_code == 0, result.stderr
    assert result.stdout.startswith(f"wrote {target} (")
    onnx.checker.check_model(onnx.load(str(target)), full_check=True)
    session = ort.InferenceSession(str(target), providers=["CPUExecutionProvider"])
    clf = runtime.load(out)
    texts = random_texts([token(i) for i in range(151)], 100, seed=23)
    ids, counts = clf.encoder.encode(texts)
    probs, logits = session.run(["probs", "logits"], {"ids": ids, "counts": counts})
    np.testing.assert_allclose(probs, clf.predict_proba(texts), rtol=1e-6, atol=1e-6)
    np.testing.assert_allclose(logits, clf.run(texts)[1], rtol=1e-6, atol=1e-6)


# --- bad inputs exit 2 with a message naming the file -------------------------------------------

def _assert_usage_error(result, *needles: str) -> None:
    assert result.exit_code == 2, (result.exit_code, result.stdout, result.stderr)
    assert result.stdout == ""
    for needle in needles:
        assert needle in result.stderr, f"{needle!r} not in {result.stderr!r}"


def test_missing_model_dir(tmp_path):
    missing = tmp_path / "no-such-model"
    out = tmp_path / "x.danpack"
    _assert_usage_error(invoke("pack", missing, "-o", out), "danpack: error:", str(missing), "no such directory")
    assert not out.exists()


def test_model_dir_without_weights(inputs, tmp_path):
    _, model_dir, _ = inputs
    broken = tmp_path / "broken"
    broken.mkdir()
    for name in ("dan.json", "tokens.txt"):
        (broken / name).write_bytes((model_dir / name).read_bytes())
    _assert_usage_error(invoke("pack", broken, "-o", tmp_path / "x.danpack"), str(broken), "no weights file")


@pytest.mark.parametrize("value, needle", [("1.5", "--coverage '1.5' is a share"), ("-0.2", "--coverage '-0.2' is a share"),
                                          ("0", "coverage 0.0 must be in (0, 1]")])
def test_bad_coverage(inputs, tmp_path, value, needle):
    _, model_dir, corpus = inputs
    _assert_usage_error(invoke("pack", model_dir, "-o", tmp_path / "x.danpack", "-c", corpus, "--coverage", value),
                        needle)


def test_bad_pruned_policy(inputs, tmp_path):
    _, model_dir, corpus = inputs
    _assert_usage_error(invoke("pack", model_dir, "-o", tmp_path / "x.danpack", "--pruned", "drop"),
                        "pruned-token policy 'drop' is not one of skip, unk, rest, auto")
    _assert_usage_error(invoke("pack", model_dir, "-o", tmp_path / "x.danpack", "-c", corpus, "--pruned", "unk"),
                        "'unk' needs a model with an unknown-token row")


def test_missing_corpus(inputs, tmp_path):
    _, model_dir, _ = inputs
    missing = tmp_path / "comments-march.txt"
    out = tmp_path / "x.danpack"
    _assert_usage_error(invoke("pack", model_dir, "-o", out, "--corpus", missing), str(missing), "no such file")
    assert not out.exists()


def test_corpus_without_the_text_field(inputs, tmp_path):
    _, model_dir, corpus = inputs
    _assert_usage_error(invoke("pack", model_dir, "-o", tmp_path / "x.danpack", "-c", corpus, "--text-field", "comment"),
                        f"{corpus}:1", "'comment'")


def test_missing_keep_words_file(inputs, tmp_path):
    _, model_dir, corpus = inputs
    missing = tmp_path / "negations.txt"
    _assert_usage_error(invoke("pack", model_dir, "-o", tmp_path / "x.danpack", "-c", corpus, "--keep-words", missing),
                        str(missing), "keep-words")


def test_budget_too_small(inputs, tmp_path):
    _, model_dir, corpus = inputs
    _assert_usage_error(invoke("pack", model_dir, "-o", tmp_path / "x.danpack", "-c", corpus, "--max-bytes", "100"),
                        "--max-bytes 100 is below the smallest possible bundle")


def test_inspect_and_export_refuse_bad_bundles(tmp_path):
    garbage = tmp_path / "garbage.danpack"
    garbage.write_bytes(b"\x93\x01\x02\x03")
    missing = tmp_path / "missing.danpack"
    for path in (garbage, missing):
        _assert_usage_error(invoke("inspect", path), str(path))
        _assert_usage_error(invoke("export-onnx", path, "-o", tmp_path / "m.onnx"), str(path))
    assert not (tmp_path / "m.onnx").exists()


def test_missing_required_output_is_a_usage_error(inputs):
    _, model_dir, _ = inputs
    result = invoke("pack", model_dir)
    assert result.exit_code == 2 and "--output" in result.stderr


def test_unwritable_output_exits_2_naming_the_path(inputs, packed, tmp_path):
    _, model_dir, _ = inputs
    blocker = tmp_path / "a-file"
    blocker.write_text("not a directory\n", encoding="utf-8")
    target = blocker / "model.danpack"
    result = RUNNER.invoke(app, ["pack", str(model_dir), "-o", str(target)])
    _assert_usage_error(result, str(target))
    result = RUNNER.invoke(app, ["export-onnx", str(packed[0]), "-o", str(blocker / "m.onnx")])
    _assert_usage_error(result, str(blocker / "m.onnx"))


# --- help ------------------------------------------------------------------------------------------

@pytest.mark.parametrize("command", ["pack", "inspect", "export-onnx", "check", "convert-torch", "demo", "frontier", "golden"])
def test_every_command_has_help_for_every_option(command):
    result = invoke(command, "--help")
    assert result.exit_code == 0
    options = re.findall(r"^\s+(?:-\w, )?(--[a-z][a-z-]*)", result.output, flags=re.M)
    assert options and "--help" in options
    # plain words: no Python type names or braces (`<list[Path]>`, `<int range>`, `{model_dir}`)
    assert not re.search(r"<(?:str|int|float|bool|path|file|list\[[^>]*\]|[a-z]+ range)>|\{\w+\}", result.output), \
        result.output
    # each option line carries a description (help texts are plain text, never markup)
    for line in result.output.splitlines():
        if re.match(r"^\s+(?:-\w, )?--[a-z]", line) and "--help" not in line:
            assert len(line.split(None, 2)) >= 2, line


def test_the_command_list_gives_whole_sentences():
    result = invoke("--help")
    listed = result.output.split("Commands:", 1)[1]
    assert "..." not in listed and "…" not in listed
    for command in ("pack", "inspect", "export-onnx", "check", "convert-torch", "demo", "frontier", "golden"):
        assert re.search(rf"^  {command} ", listed, flags=re.M)


def test_both_command_lines_name_choices_the_same_way(capsys):
    from danpack.runtime.stream import main as run_main

    with pytest.raises(SystemExit):
        run_main(["--help"])
    run_help = capsys.readouterr().out
    assert "--format jsonl|tsv" in run_help and "--backend onnxruntime|numpy" in run_help
    assert not re.search(r"\{[a-z,]+\}", run_help)  # argparse's own {a,b} choice notation
    assert "--backend onnxruntime|numpy" in invoke("check", "--help").output


def test_help_texts_print_brackets_as_written():
    # Help strings hold "[default: ...]" and "danpack[glove]"; rich markup would swallow both.
    assert "[default: 1.0]" in " ".join(invoke("check", "--help").output.split())
    assert "danpack[glove]" in invoke("demo", "--help").output


# --- outputs that would destroy something, and options that contradict each other ---------------

def test_pack_refuses_outputs_that_would_destroy_inputs(inputs, tmp_path):
    import os

    _, model_dir, corpus = inputs
    config = (model_dir / "dan.json").read_bytes()
    fifo = tmp_path / "pipe"
    os.mkfifo(fifo)
    for output, needle in ((model_dir / "dan.json", "would overwrite the input model file dan.json"),
                           (corpus, "would overwrite the input --corpus"),
                           (tmp_path, "is a folder"),
                           (fifo, "is not a regular file")):
        res = RUNNER.invoke(app, ["pack", str(model_dir), "-o", str(output), "-c", str(corpus), "-q"])
        assert res.exit_code == 2 and needle in res.stderr, res.output
    assert (model_dir / "dan.json").read_bytes() == config and fifo.exists() and not fifo.is_file()


def test_export_onnx_refuses_to_overwrite_its_bundle(inputs, tmp_path):
    _, model_dir, corpus = inputs
    bundle = tmp_path / "m.danpack"
    assert invoke("pack", model_dir, "-o", bundle, "-c", corpus, "-q").exit_code == 0
    before = bundle.read_bytes()
    res = RUNNER.invoke(app, ["export-onnx", str(bundle), "-o", str(bundle)])
    assert res.exit_code == 2 and "would overwrite the input BUNDLE" in res.stderr
    assert bundle.read_bytes() == before


@pytest.mark.parametrize("extra", [["--top", "10", "--max-bytes", "30000"], ["--top", "10", "--coverage", "0.9"],
                                   ["--coverage", "0.9", "--max-bytes", "30000"]])
def test_pack_refuses_two_ways_of_choosing_rows(inputs, tmp_path, extra):
    _, model_dir, corpus = inputs
    res = RUNNER.invoke(app, ["pack", str(model_dir), "-o", str(tmp_path / "b"), "-c", str(corpus), *extra])
    assert res.exit_code == 2 and "each choose how many rows to keep" in res.stderr
    assert not (tmp_path / "b").exists()


@pytest.mark.parametrize("content", ["", "\n\n  \n", "zzz qqq\nxxx\n"])  # empty, blank lines, no known word
def test_pack_refuses_a_corpus_with_no_known_token(inputs, tmp_path, content):
    _, model_dir, _ = inputs
    corpus = tmp_path / "c.txt"
    corpus.write_text(content, encoding="utf-8")
    res = RUNNER.invoke(app, ["pack", str(model_dir), "-o", str(tmp_path / "b"), "-c", str(corpus), "-q"])
    assert res.exit_code == 2 and "holds no token the model knows" in res.stderr
    assert not (tmp_path / "b").exists()


def test_keep_words_are_normalised_like_texts(inputs, tmp_path):
    _, model_dir, corpus = inputs
    words = tmp_path / "keep.txt"
    words.write_text("W149\n", encoding="utf-8")  # the tokenizer lower-cases: "W149" is the model's "w149"
    res = invoke("pack", model_dir, "-o", tmp_path / "b", "-c", corpus, "--top", "3", "--keep-words", words, "--json")
    summary = json.loads(res.stdout)
    assert summary["unknown_keep_words"] == [] and "w149" in runtime.load(tmp_path / "b").bundle.vocab


def test_byte_order_marks_are_dropped_from_vocabulary_and_corpus(inputs, tmp_path):
    import shutil

    _, model_dir, corpus = inputs
    bom_model = tmp_path / "bom-model"
    shutil.copytree(model_dir, bom_model)
    (bom_model / "tokens.txt").write_bytes(b"\xef\xbb\xbf" + (model_dir / "tokens.txt").read_bytes())
    bom_corpus = tmp_path / "corpus.jsonl"
    bom_corpus.write_bytes(b"\xef\xbb\xbf" + corpus.read_bytes())
    plain = json.loads(invoke("pack", model_dir, "-o", tmp_path / "a", "-c", corpus, "--json").stdout)
    with_bom = json.loads(invoke("pack", bom_model, "-o", tmp_path / "b", "-c", bom_corpus, "--json").stdout)
    for key in ("rows_kept", "unreachable_rows", "corpus_texts", "corpus_tokens", "coverage"):
        assert with_bom[key] == plain[key], key
    assert runtime.load(tmp_path / "b").bundle.vocab == runtime.load(tmp_path / "a").bundle.vocab


def test_a_full_standard_output_is_an_error_not_a_traceback(inputs, tmp_path):
    import subprocess
    import sys

    _, model_dir, corpus = inputs
    bundle = tmp_path / "m.danpack"
    assert invoke("pack", model_dir, "-o", bundle, "-c", corpus, "-q").exit_code == 0
    with open("/dev/full", "wb") as full:  # Linux: every write fails with ENOSPC
        proc = subprocess.run([sys.executable, "-c", "from danpack.cli import main; main()", "inspect", str(bundle)],
                              stdout=full, stderr=subprocess.PIPE, text=True, timeout=60)
    assert proc.returncode == 2 and "cannot write the output" in proc.stderr and "Traceback" not in proc.stderr
