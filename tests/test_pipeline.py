"""The user's pipeline: unknown-word token detection, token samples, eval labels as users write them, the
framework's outputs as the check's reference, and the gates reading framework -> bundle."""

from __future__ import annotations

import dataclasses
import json
from pathlib import Path

import numpy as np
import pytest

from danpack.check.compare import (CheckError, parse_label_map, read_eval_set, read_reference_probs,
                                   reference_figures, resolve_label, diagnose_reference)
from danpack.check.verdict import evaluate, resolve_limits
from danpack.pipeline import (Pipeline, TokenSampleError, candidate_pipelines, check_token_sample,
                              find_unk_token, read_token_sample)
from danpack.runtime.tokenize import PRESETS, TokenizerSpec

from helpers import make_float_model

LABELS = ("ham", "spam")
WORDS = ["<unk>", "i", "doesn", "'", "t", "know", "doesn't", "free", "prize", "!", "call", "now", "🙂"]


def write_jsonl(path: Path, records: list[dict]) -> Path:
    path.write_text("".join(json.dumps(r, ensure_ascii=False) + "\n" for r in records), encoding="utf-8")
    return path


def model(**kw):
    return make_float_model(vocab=WORDS, labels=LABELS, dim=8, hidden=(), **kw)


# ---- unknown-word token ---------------------------------------------------------------------------

@pytest.mark.parametrize("vocab, found", [
    (["a", "<unk>", "b"], "<unk>"), (["[PAD]", "[UNK]", "x"], "[UNK]"), (["<oov>"], "<oov>"),
    (["a", "unk", "b"], None), ([], None),
])
def test_find_unk_token(vocab, found):
    assert find_unk_token(vocab) == found


def test_candidates_cover_every_preset_and_start_with_the_current_pipeline():
    current = Pipeline(TokenizerSpec(), "skip", None)
    found = candidate_pipelines(current, WORDS)
    assert found[0] == current
    assert {c.tokenizer.pattern for c in found} == set(PRESETS)
    assert ("unk", "<unk>") in {(c.oov_policy, c.unk_token) for c in found}


# ---- token samples --------------------------------------------------------------------------------

def test_token_sample_of_tokens_is_reproduced(tmp_path):
    m = dataclasses.replace(model(), tokenizer=TokenizerSpec(pattern="wordpunct-v1", normalization="none"))
    path = write_jsonl(tmp_path / "s.jsonl", [{"text": "I doesn't know!", "tokens": ["i", "doesn", "'", "t", "know", "!"]}])
    assert check_token_sample(path, m, style="model").records == 1


def test_token_sample_mismatch_lists_both_sides_and_names_the_fix(tmp_path):
    # what re.findall(r"\w+|[^\w\s]", text.lower()) gives; danpack's default words-v1 keeps "doesn't" whole
    path = write_jsonl(tmp_path / "s.jsonl", [
        {"text": "Free prize now", "tokens": ["free", "prize", "now"]},
        {"text": "I doesn't KNOW", "tokens": ["i", "doesn", "'", "t", "know"]},
    ])
    with pytest.raises(TokenSampleError) as info:
        check_token_sample(path, model())
    message = str(info.value)
    assert "does not reproduce 1 of 2 records" in message and "line 2:" in message
    assert "yours:   ['i', 'doesn', \"'\", 't', 'know']" in message
    assert "danpack: ['i', \"doesn't\", 'know']" in message
    assert "fix: pass --pattern wordpunct-v1" in message


def test_token_sample_ids_are_mapped_past_a_dropped_padding_row(tmp_path):
    # the user's table had <pad> at row 0, dropped by convert-torch: user row r is danpack row r - 1
    m = dataclasses.replace(model(oov="unk"), metadata={"converted_from": {"dropped_rows": [{"row": 0, "token": "<pad>"}]}})
    user = {t: i + 1 for i, t in enumerate(WORDS)}
    ids = [user["call"], user["now"], user["<unk>"], 0, 0]  # "zzz" is unknown -> <unk>; two padding ids
    path = write_jsonl(tmp_path / "s.jsonl", [{"text": "call now zzz", "ids": ids}])
    assert check_token_sample(path, m).kind == "ids"
    skip = dataclasses.replace(m, oov_policy="skip", unk_token=None)
    with pytest.raises(TokenSampleError, match="fix: pass --oov unk --unk-token <unk>"):
        check_token_sample(path, skip)
    write_jsonl(path, [{"text": "call", "ids": [99]}])
    with pytest.raises(TokenSampleError, match="id 99 is not a row of the vocabulary"):
        check_token_sample(path, m)


@pytest.mark.parametrize("record, fragment", [
    ({"text": "a"}, "give either 'tokens'"),
    ({"text": "a", "tokens": ["a"], "ids": [1]}, "give either 'tokens'"),
    ({"text": "a", "tokens": "a"}, "'tokens' must be a list of strings"),
    ({"text": "a", "ids": [1, -2]}, "'ids' must be a list of row numbers"),
    ({"tokens": ["a"]}, "field 'text' is missing"),
])
def test_bad_token_sample_records_are_named_by_line(tmp_path, record, fragment):
    path = write_jsonl(tmp_path / "s.jsonl", [{"text": "ok", "tokens": ["ok"]}, record])
    with pytest.raises(Exception, match=fragment) as info:
        read_token_sample(path)
    assert ":2:" in str(info.value)


# ---- eval labels ----------------------------------------------------------------------------------

@pytest.mark.parametrize("value, expected", [
    (0, "ham"), (1, "spam"), ("spam", "spam"), ("1", "spam"), (2, None), (True, None), ("Spam", None),
    ("yes", "spam"),
])
def test_resolve_label(value, expected):
    assert resolve_label(value, LABELS, {"yes": "spam"}) == expected


def test_digit_strings_are_names_when_labels_are_digits():
    assert resolve_label("1", ("1", "0"), {}) == "1"
    assert resolve_label(1, ("1", "0"), {}) == "0"  # an integer always indexes


def test_bad_labels_are_counted_and_reported_together(tmp_path):
    records = [{"text": f"t{i}", "label": v} for i, v in enumerate(["ham", "Spam", 0, 7, "Spam", "eggs"])]
    path = write_jsonl(tmp_path / "e.jsonl", records)
    with pytest.raises(CheckError) as info:
        read_eval_set(path, LABELS)
    message = str(info.value)
    assert "4 of 6 records have a label" in message
    assert "line 2: 'Spam' (did you mean 'spam'? pass --label-map 'Spam=spam')" in message
    assert "line 4: 7 (integer labels index the model's labels 0..1)" in message
    assert "'Spam' x2" in message
    assert read_eval_set(path, LABELS, label_map=(("Spam", "spam"), ("7", "ham"), ("eggs", "ham"))).labels == (
        "ham", "spam", "ham", "ham", "spam", "ham")


def test_label_map_inline_and_files(tmp_path):
    assert parse_label_map("0=ham,1=spam", LABELS) == (("0", "ham"), ("1", "spam"))
    (tmp_path / "m.json").write_text('{"no": "ham", "yes": "spam"}')
    assert parse_label_map(str(tmp_path / "m.json"), LABELS) == (("no", "ham"), ("yes", "spam"))
    (tmp_path / "m.txt").write_text("no=ham\nyes\tspam\n")
    assert parse_label_map(str(tmp_path / "m.txt"), LABELS) == (("no", "ham"), ("yes", "spam"))
    with pytest.raises(CheckError, match="not one of the model's labels"):
        parse_label_map("0=eggs", LABELS)
    with pytest.raises(CheckError, match="is not `spelling=label`"):
        parse_label_map("ham", LABELS)


# ---- the framework's outputs ----------------------------------------------------------------------

def test_reference_probs_are_read_and_validated(tmp_path):
    texts = ["a", "b"]
    path = write_jsonl(tmp_path / "r.jsonl", [{"probs": [0.25, 0.75]}, {"probs": [1.0, 0.0]}])
    out = read_reference_probs(path, texts, LABELS)
    assert out.predicted.tolist() == [1, 0] and out.probs.shape == (2, 2)
    write_jsonl(path, [{"label": "spam"}, {"label": 0}])
    out = read_reference_probs(path, texts, LABELS)
    assert out.probs is None and out.predicted.tolist() == [1, 0]
    for records, fragment in [([{"probs": [0.5, 0.5]}], "has 1 records but the evaluation set has 2"),
                              ([{"probs": [2.0, 3.0]}, {"probs": [1, 0]}], "give probabilities"),
                              ([{"probs": [1.0]}, {"probs": [1, 0]}], "must be 2 finite numbers"),
                              ([{"text": "b", "probs": [1, 0]}, {"probs": [1, 0]}], "same order"),
                              ([{"x": 1}, {"probs": [1, 0]}], "expected an object with 'probs'")]:
        write_jsonl(path, records)
        with pytest.raises(CheckError, match=fragment):
            read_reference_probs(path, texts, LABELS)


def test_diagnosis_names_the_tokenizer_when_the_framework_split_otherwise(tmp_path):
    truth = dataclasses.replace(model(oov="unk"), tokenizer=TokenizerSpec(pattern="wordpunct-v1"))
    declared = dataclasses.replace(truth, tokenizer=TokenizerSpec())  # words-v1: the wrong declaration
    texts = ["I doesn't know", "free prize now!", "call now 🙂", "doesn't doesn't"]
    path = write_jsonl(tmp_path / "r.jsonl", [{"probs": p} for p in truth.predict_proba(texts).tolist()])
    framework = read_reference_probs(path, texts, LABELS)
    probs = declared.predict_proba(texts)
    figures, differs = reference_figures(framework, probs, probs, None, 1e-5)
    assert figures["reference_float_mismatches"] == 2 and differs.tolist() == [True, False, False, True]
    message = "\n".join(diagnose_reference(declared, texts, framework, differs, 1e-5))
    assert "likely cause: the tokenizer. With --pattern wordpunct-v1" in message and "(all)" in message
    assert "danpack reads ['i', \"doesn't\", 'know']" in message


def test_gates_read_framework_to_bundle_when_reference_figures_exist():
    limits, explicit = resolve_limits({})
    figures = {"agreement": 1.0, "accuracy_drop_points": 0.0, "reference_agreement": 0.9,
               "reference_accuracy_drop_points": 5.0, "reference_float_mismatches": 3, "size_ratio": 2.0}
    outcomes = {o.name: o for o in evaluate(figures, limits, explicit)}
    assert outcomes["min-agreement"].status == "fail" and outcomes["min-agreement"].key == "reference_agreement"
    assert outcomes["max-points-lost"].status == "fail"
    assert outcomes["max-reference-mismatches"].status == "fail"
    plain = {o.name: o for o in evaluate({"agreement": 1.0, "accuracy_drop_points": 0.0, "size_ratio": 2.0},
                                         limits, explicit)}
    assert plain["min-agreement"].status == "pass" and plain["max-reference-mismatches"].status == "skip"


def test_diagnosis_names_the_padding_row_when_unknown_words_read_as_padding(tmp_path):
    # a training script that sends unknown words to padding_idx 0 (a zero vector counted in the mean)
    from danpack.check.compare import _padding_model

    declared = dataclasses.replace(model(), metadata={"converted_from": {"dropped_rows": [{"row": 0, "token": "<pad>"}]}})
    truth, token = _padding_model(declared)
    assert token == "<pad>" and truth.predict_proba(["zzz free"]).tolist() != declared.predict_proba(["zzz free"]).tolist()
    texts = ["zzz free prize", "call now", "qqq qqq know", "free"]
    path = write_jsonl(tmp_path / "r.jsonl", [{"probs": p} for p in truth.predict_proba(texts).tolist()])
    framework = read_reference_probs(path, texts, LABELS)
    _, differs = reference_figures(framework, declared.predict_proba(texts), declared.predict_proba(texts), None, 1e-5)
    assert differs.tolist() == [True, False, True, False]
    message = "\n".join(diagnose_reference(declared, texts, framework, differs, 1e-5))
    assert "likely cause: the padding row" in message
    assert "--padding-row none --oov unk --unk-token <pad>" in message
