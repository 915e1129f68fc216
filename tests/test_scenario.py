"""The invented demo scenario: deterministic, well-formed, and honestly hard."""

from __future__ import annotations

import hashlib
import json
import os
import subprocess
import sys
import unicodedata
from collections import Counter
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from danpack.models_demo import scenario
from danpack.models_demo.scenario import (
    SMALL_SIZES,
    TASKS,
    ScenarioError,
    generate_split,
    generate_stream,
    read_jsonl,
    write_scenario,
)
from danpack.runtime.errors import DanpackError
from danpack.runtime.tokenize import Tokenizer

ROOT = Path(__file__).resolve().parents[1]
TOKENIZER = Tokenizer()


@pytest.fixture(scope="module")
def stream() -> list[dict]:
    return generate_stream(5000, seed=7)


@pytest.fixture(scope="module")
def sentiment_train() -> list[dict]:
    return generate_split("sentiment", "train", 3000, seed=7)


def test_same_seed_gives_the_same_records_and_another_seed_does_not():
    a = generate_split("topic", "dev", 300, seed=3)
    assert a == generate_split("topic", "dev", 300, seed=3)
    assert [r["text"] for r in a] != [r["text"] for r in generate_split("topic", "dev", 300, seed=4)]


def test_splits_and_tasks_draw_different_comments():
    train = {r["text"] for r in generate_split("sentiment", "train", 500, seed=3)}
    test = [r["text"] for r in generate_split("sentiment", "test", 500, seed=3)]
    topic_train = [r["text"] for r in generate_split("topic", "train", 500, seed=3)]
    # short comments ("slow!") may repeat by chance, long ones must not
    assert sum(t in train for t in test) < 0.1 * len(test)
    assert sum(t in train for t in topic_train) < 0.1 * len(topic_train)


def test_output_does_not_depend_on_python_string_hashing():
    # Python salts str hashes per process (PYTHONHASHSEED); a generator iterating a set would differ.
    code = ("import hashlib, json; from danpack.models_demo.scenario import generate_split, generate_stream; "
            "print(hashlib.sha256(json.dumps(generate_split('topic', 'train', 200, 5) + generate_stream(200, 5))"
            ".encode()).hexdigest())")
    digests = set()
    for hash_seed in ("1", "2"):
        env = {**os.environ, "PYTHONHASHSEED": hash_seed}
        out = subprocess.run([sys.executable, "-c", code], cwd=ROOT, env=env, capture_output=True, text=True, check=True)
        digests.add(out.stdout.strip())
    here = hashlib.sha256(json.dumps(generate_split("topic", "train", 200, 5) + generate_stream(200, 5)).encode()).hexdigest()
    assert digests == {here}


def test_records_have_ids_texts_labels_in_that_order():
    for task, labels in TASKS.items():
        records = generate_split(task, "test", 400, seed=1)
        assert [list(r) for r in records] == [["id", "text", "label"]] * 400
        assert len({r["id"] for r in records}) == 400
        assert set(r["label"] for r in records) == set(labels)  # every label occurs
    assert all(list(r) == ["id", "text"] for r in generate_stream(50, seed=1))


def test_every_comment_has_1_to_60_tokens_and_no_line_break(stream, sentiment_train):
    lengths = [len(TOKENIZER.tokenize(r["text"])) for r in stream + sentiment_train]
    assert min(lengths) >= 1 and max(lengths) <= scenario.MAX_TOKENS
    assert min(lengths) == 1 and max(lengths) > 40  # the whole range is used
    assert not any("\n" in r["text"] or "\r" in r["text"] for r in stream + sentiment_train)


def test_longer_drafts_are_rewritten_under_the_token_cap(monkeypatch):
    monkeypatch.setattr(scenario, "MAX_TOKENS", 12)
    lengths = [len(TOKENIZER.tokenize(r["text"])) for r in generate_stream(1500, seed=8)]
    assert 1 <= min(lengths) and max(lengths) <= 12


def test_class_shares_follow_the_documented_mix():
    sentiment = Counter(r["label"] for r in generate_split("sentiment", "train", 4000, seed=2))
    assert abs(sentiment["negative"] / 4000 - scenario.NEGATIVE_SHARE) < 0.04
    topic = Counter(r["label"] for r in generate_split("topic", "train", 4000, seed=2))
    for label, weight in zip(TASKS["topic"], scenario.TOPIC_WEIGHTS):
        assert abs(topic[label] / 4000 - weight) < 0.04


def test_label_noise_replaces_about_the_documented_share(monkeypatch):
    noisy = generate_split("topic", "train", 4000, seed=9)
    monkeypatch.setattr(scenario, "LABEL_NOISE", 0.0)
    clean = generate_split("topic", "train", 4000, seed=9)
    assert [r["text"] for r in noisy] == [r["text"] for r in clean]  # same comments, only labels move
    flipped = sum(a["label"] != b["label"] for a, b in zip(noisy, clean)) / 4000
    assert 0.01 < flipped < 0.03  # LABEL_NOISE = 0.02


def test_hard_cases_are_common(stream):
    texts = [r["text"].lower() for r in stream]
    tokens = [TOKENIZER.tokenize(t) for t in texts]

    def share(pred) -> float:
        return sum(map(pred, tokens)) / len(tokens)

    negators = {"not", "never", "wasn't", "isn't", "didn't", "wouldn't", "weren't", "aren't", "couldn't", "no"}
    assert share(lambda ts: bool(negators & set(ts))) > 0.2
    assert share(lambda ts: bool({"but", "though", "although", "however", "yet"} & set(ts))) > 0.15
    assert share(lambda ts: any(t.isdigit() for t in ts)) > 0.1
    # emoji: Unicode category So ("Symbol, other"), per the unicodedata module
    assert share(lambda ts: any(unicodedata.category(t[0]) == "So" for t in ts)) > 0.05
    assert share(lambda ts: bool({"very", "really", "so", "super", "extremely"} & set(ts))) > 0.05
    assert 0.01 < share(lambda ts: len(ts) == 1) < 0.15


@pytest.mark.slow
def test_typos_and_rare_words_are_unknown_to_glove(stream):
    # The GloVe 6B vocabulary (400k words from Wikipedia and news) as an outside dictionary:
    # typos ("contactkess") and invented place names fall outside it.
    pytest.importorskip("pyarrow")
    from danpack.models_demo.glove import load_glove

    glove = set(load_glove().tokens)
    words = Counter(t for r in stream for t in TOKENIZER.tokenize(r["text"]) if t.isalpha())
    unknown = {t: c for t, c in words.items() if t not in glove}
    assert 0.005 < sum(unknown.values()) / sum(words.values()) < 0.08
    assert len(unknown) > 300


def test_vocabulary_has_a_long_tail(stream, sentiment_train):
    counts = Counter(t for r in stream for t in TOKENIZER.tokenize(r["text"]))
    assert len(counts) > 1500  # distinct tokens in 5,000 comments (measured: 1,985)
    hapax = sum(1 for c in counts.values() if c == 1)
    assert hapax > 0.35 * len(counts)  # many tokens occur once: pruning has work to do (measured: 44%)
    freqs = np.sort(np.fromiter(counts.values(), dtype=np.int64))[::-1]
    top = freqs[: len(freqs) // 10].sum() / freqs.sum()
    assert top > 0.7  # the 10% most frequent types carry most of the text (measured: 79%)
    train_vocab = {t for r in sentiment_train for t in TOKENIZER.tokenize(r["text"])}
    assert sum(1 for t in counts if t not in train_vocab) > 500  # words training never saw (measured: 894)


def test_sentiment_labels_agree_with_an_outside_lexicon_but_not_trivially(sentiment_train):
    # VADER (Hutto & Gilbert 2014, package vadersentiment) scores text from its own lexicon and rules.
    vader = pytest.importorskip("vaderSentiment.vaderSentiment").SentimentIntensityAnalyzer()
    sample = sentiment_train[:1500]
    scores = np.array([vader.polarity_scores(r["text"])["compound"] for r in sample])
    positive = np.array([r["label"] == "positive" for r in sample])
    assert scores[positive].mean() - scores[~positive].mean() > 0.2
    agreement = ((scores > 0) == positive).mean()
    assert 0.6 < agreement < 0.9  # related to the labels, yet far from a lexicon lookup


def test_write_scenario_writes_every_file_byte_stable(tmp_path):
    paths = write_scenario(tmp_path / "a", seed=5, sizes=SMALL_SIZES)
    expected = {f"{t}/{s}" for t in TASKS for s in ("train", "dev", "test")} | {"stream", "stream_lines", "about"}
    assert set(paths) == expected
    for task in TASKS:
        train = read_jsonl(paths[f"{task}/train"])
        assert len(train) == SMALL_SIZES.train and train == generate_split(task, "train", SMALL_SIZES.train, 5)
    stream = read_jsonl(paths["stream"])
    assert len(stream) == SMALL_SIZES.stream
    lines = paths["stream_lines"].read_text(encoding="utf-8").split("\n")
    assert lines[-1] == "" and lines[:-1] == [r["text"] for r in stream]
    about = json.loads(paths["about"].read_text())
    assert about["seed"] == 5 and about["sizes"]["stream"] == SMALL_SIZES.stream
    again = write_scenario(tmp_path / "b", seed=5, sizes=SMALL_SIZES)
    for name, path in paths.items():
        assert path.read_bytes() == again[name].read_bytes(), name


def test_cli_writes_the_small_scenario(tmp_path):
    result = CliRunner().invoke(scenario.cli, ["--out", str(tmp_path), "--seed", "3", "--small"])
    assert result.exit_code == 0, result.output
    assert f"sentiment/train\t{tmp_path / 'sentiment' / 'train.jsonl'}" in result.stdout
    assert len(read_jsonl(tmp_path / "topic" / "dev.jsonl")) == SMALL_SIZES.dev


@pytest.mark.parametrize(
    "call, words",
    [
        (lambda: generate_split("mood", "train", 5), ["'mood'", "sentiment", "topic"]),
        (lambda: generate_split("topic", "validation", 5), ["'validation'", "dev"]),
        (lambda: generate_split("topic", "train", -1), ["-1", ">= 0"]),
        (lambda: generate_split("topic", "stream", 5), ["unlabelled", "generate_stream"]),
        (lambda: generate_stream(2.5), ["2.5"]),
    ],
)
def test_bad_requests_are_refused_with_a_clear_error(call, words):
    with pytest.raises(ScenarioError) as info:
        call()
    assert isinstance(info.value, DanpackError)
    for word in words:
        assert word in str(info.value)


def test_read_jsonl_names_the_bad_line(tmp_path):
    path = tmp_path / "bad.jsonl"
    path.write_text('{"text": "fine"}\n{"text": \n', encoding="utf-8")
    with pytest.raises(DanpackError, match=r"bad\.jsonl:2: not valid JSON"):
        read_jsonl(path)
    path.write_text('{"text": 3}\n', encoding="utf-8")
    with pytest.raises(DanpackError, match=r"bad\.jsonl:1: field 'text' is missing or not a string"):
        read_jsonl(path)
