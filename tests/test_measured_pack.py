"""Measured packing (packer/pack/heldout.py, choose.py; pack_model's choices): the held-out slice, the
candidate figures against the written bundle, --pruned auto, --target-agreement, the measured default.

External references: the candidate figures are recomputed from the WRITTEN bundle run by the runtime's
numpy backend and the float model's own forward pass, with plain numpy argmax / abs; the certified share
with `certify_texts` (packer/check/bound.py, the `danpack check` path); the held-out slice with `hashlib`
(stdlib) sha256 over the salt and the text; the Wilson bound against scipy's normal quantile and the
published formula (Wilson 1927).
"""

from __future__ import annotations

import hashlib
from dataclasses import replace

import numpy as np
import pytest
from helpers import make_corpus, make_model, token, zipf_texts

from danpack.check.bound import certify_texts
from danpack.model import load_model
from danpack.models_demo import scenario
from danpack.models_demo.demo import shipped_model
from danpack.pack.build import PackError, PackOptions, TargetError, pack_model
from danpack.pack.heldout import HELDOUT_PERCENT, HELDOUT_SALT, TARGET_Z, is_heldout, wilson_lower
from danpack.runtime.bundle import decode_bundle
from danpack.runtime.classifier import Classifier


@pytest.fixture(scope="module")
def small(tmp_path_factory):
    """A 150-row model with an unknown row, a Zipf corpus (unknown words mixed in), its held-out texts."""
    root = tmp_path_factory.mktemp("measured")
    model_dir = make_model(root, vocab_size=150, dim=12, hidden=(6,), oov="unk", seed=3)
    texts = zipf_texts([token(i) for i in range(150)], 1200, seed=4, unknown_rate=0.05)
    corpus = make_corpus(root, texts)
    return model_dir, corpus, [t for t in texts if is_heldout(t)]


def test_the_held_out_slice_is_a_salted_hash_of_the_text():
    texts = [f"comment {i} about charger {i % 7}" for i in range(4000)]
    independent = [int.from_bytes(hashlib.sha256(HELDOUT_SALT + t.encode()).digest()[:8], "big") % 100 < HELDOUT_PERCENT
                   for t in texts]
    assert [is_heldout(t) for t in texts] == independent
    assert 0.13 < np.mean(independent) < 0.17  # about 15%


@pytest.mark.parametrize("pruned,fold", [("skip", "yes"), ("unk", "no"), ("rest", "yes"), ("rest", "no")])
def test_candidate_figures_are_those_of_the_written_bundle(small, pruned, fold):
    model_dir, corpus, held = small
    model = load_model(model_dir)
    result = pack_model(model_dir, None, PackOptions(corpora=(str(corpus),), top=40, pruned=pruned, fold=fold))
    bundle = decode_bundle(result.data)
    packed = Classifier(bundle, "numpy").predict_proba(held)  # (N, C)
    floats = model.predict_proba(held)  # (N, C)
    h = result.heldout
    assert h.texts == len(held) == result.heldout_texts and 100 < h.texts < 300
    assert h.bytes == result.bytes and h.candidate.keep == 40 and h.candidate.policy == pruned
    assert h.agreement == pytest.approx(float(np.mean(packed.argmax(1) == floats.argmax(1))), abs=1e-12)
    assert h.mean_abs_prob_diff == pytest.approx(float(np.abs(packed - floats).max(1).mean()), rel=1e-4, abs=1e-7)
    assert h.certified_share == pytest.approx(certify_texts(model, bundle, held).share, abs=1e-12)
    assert 0 < h.certified_share < 1 and h.agreement < 1  # pruning 40 of 150 rows costs something here
    manifest = bundle.manifest["selection"]
    assert manifest["heldout"]["agreement"] == round(h.agreement, 6) and manifest["heldout"]["texts"] == h.texts


def test_pruned_auto_picks_the_best_measured_policy_and_records_it(small):
    model_dir, corpus, _ = small
    base = PackOptions(corpora=(str(corpus),), top=30)
    fixed = {p: pack_model(model_dir, None, replace(base, pruned=p)).heldout for p in ("skip", "unk", "rest")}
    auto = pack_model(model_dir, None, base)
    assert auto.heldout.agreement == max(m.agreement for m in fixed.values())
    assert decode_bundle(auto.data).manifest["pack"]["pruned"] == auto.policy


def test_measured_default_is_within_a_tenth_of_a_point_of_every_row(small):
    model_dir, corpus, _ = small
    default = pack_model(model_dir, None, PackOptions(corpora=(str(corpus),)))
    full = pack_model(model_dir, None, PackOptions(corpora=(str(corpus),), top=10_000))
    assert default.heldout.agreement >= full.heldout.agreement - 0.001
    assert default.bytes <= full.bytes and default.choice.startswith("default: smallest within 0.1 pt")


def test_target_agreement_is_the_smallest_bundle_whose_lower_bound_reaches_it(small):
    model_dir, corpus, _ = small
    options = PackOptions(corpora=(str(corpus),), target_agreement=0.9)
    result = pack_model(model_dir, None, options)
    h = result.heldout
    assert h.agreement_low >= 0.9 and h.agreement > h.agreement_low
    # one row fewer with the same policy and fold does not reach the target (the bisection's boundary)
    fewer = pack_model(model_dir, None, PackOptions(corpora=(str(corpus),), top=h.candidate.keep - 1,
                                                    pruned=h.candidate.policy, fold="yes" if h.candidate.folded else "no"))
    assert fewer.heldout.agreement_low < 0.9 and fewer.bytes < result.bytes


def test_unreachable_target_writes_nothing_and_says_the_best(small, tmp_path):
    model_dir, corpus, _ = small
    out = tmp_path / "never.danpack"
    with pytest.raises(TargetError, match=r"no candidate reaches held-out agreement 100\.00%.*the best is .*bytes"):
        pack_model(model_dir, out, PackOptions(corpora=(str(corpus),), target_agreement=1.0))
    assert not out.exists()
    with pytest.raises(PackError, match="give --corpus"):
        PackOptions(target_agreement=0.99)


def test_wilson_lower_bound_against_the_formula_and_scipy():
    from scipy.stats import norm  # the normal quantile behind TARGET_Z

    assert TARGET_Z == pytest.approx(norm.ppf(0.90), abs=1e-4)
    p, n, z = 0.998, 500, norm.ppf(0.90)
    expected = (p + z * z / (2 * n) - z * np.sqrt(p * (1 - p) / n + z * z / (4 * n * n))) / (1 + z * z / n)
    assert wilson_lower(p, n) == pytest.approx(expected, abs=1e-6)
    assert wilson_lower(1.0, 500) < 1.0 and wilson_lower(0.9, 0) == 0.0


@pytest.fixture(scope="module")
def demo_stream(tmp_path_factory):
    root = tmp_path_factory.mktemp("demo-stream")
    return scenario.write_jsonl(root / "stream.jsonl", scenario.generate_stream(6000, seed=11))


def test_target_holds_on_a_test_set_the_packer_never_saw(demo_stream, tmp_path):
    """Done-when on a small model: --target-agreement 0.995 agrees on ≥ 99.5% of unseen labelled test texts."""
    model_dir = shipped_model("sentiment")
    model = load_model(model_dir)
    result = pack_model(model_dir, tmp_path / "t.danpack", PackOptions(corpora=(str(demo_stream),),
                                                                       target_agreement=0.995))
    test = [r["text"] for r in scenario.generate_split("sentiment", "test", 2000, seed=12)]  # another seed
    packed = Classifier(decode_bundle(result.data), "numpy").predict(test)
    floats = [model.labels[i] for i in model.predict_proba(test).argmax(1)]
    agreement = float(np.mean([a == b for a, b in zip(packed, floats)]))
    assert agreement >= 0.995, (agreement, result.heldout)
    assert result.plan.keep < len(result.plan.ranked_rows)  # and it did prune


def test_a_corpus_ranking_that_keeps_every_row_keeps_each_token_with_its_own_row(small):
    """Every row kept, in corpus order (not row order): each bundle row must still hold its token's vector."""
    model_dir, corpus, held = small
    model = load_model(model_dir)
    result = pack_model(model_dir, None, PackOptions(corpora=(str(corpus),), top=10_000, pruned="skip", fold="no",
                                                     quantize=False))
    bundle = decode_bundle(result.data)
    assert len(bundle.vocab) == len(model.vocab) and bundle.vocab != model.vocab  # ranked, not in row order
    index = {t: i for i, t in enumerate(model.vocab)}
    np.testing.assert_array_equal(bundle.tensors["table"], model.embedding[[index[t] for t in bundle.vocab]])


@pytest.mark.parametrize("unk", [False, True])
@pytest.mark.parametrize("folded", [False, True])
def test_envelope_index_equals_the_envelope_of_each_cut(unk, folded):
    """The packer measures every cut with `EnvelopeIndex`; the bundle it writes carries `unknown_envelope`: the two
    must be the same field for every cut (block edges, the unknown row ranked before or after the cut)."""
    from test_bound import random_model

    from danpack.pack.envelope import EnvelopeIndex, unknown_envelope

    rng = np.random.default_rng(7)
    model = random_model(rng, vocab=2600, dim=12, hidden=(8,), unk=unk)
    order = rng.permutation(len(model.vocab))[:2500]  # some rows never ranked (as unreachable rows are not)
    index = EnvelopeIndex(model, order, folded)
    at = [int(p) + d for p in index.outlier_places[:3] for d in (0, 1)]  # cuts just before and after a set-apart row
    for keep in (0, 1, 700, 1023, 1024, 1025, 2048, 2499, 2500, *at):
        assert index.envelope(keep) == unknown_envelope(model, order[:keep], folded), keep
    assert at and "outliers" in index.envelope(at[0])  # the outlier filter's rows follow the cut too


def test_held_out_tokens_join_the_absent_list_once_measured(tmp_path):
    """Tokens the float model never knew that only the held-out slice holds are listed in the written bundle (they
    measured the candidates first); under --max-bytes, whose fit was measured without them, they are not."""
    from danpack.runtime.certify import hash_token, read_envelope
    from danpack.runtime.fingerprints import fingerprint

    model_dir = make_model(tmp_path, vocab_size=150, dim=12, hidden=(6,), oov="skip", seed=3)
    texts = zipf_texts([token(i) for i in range(150)], 1200, seed=4)
    novel = [(f"{token(i % 150)} {token((7 * i) % 150)} novel{i}", f"novel{i}") for i in range(600)]
    held = [word for text, word in novel if is_heldout(text)]
    chosen = [word for text, word in novel if not is_heldout(text)]
    corpus = make_corpus(tmp_path, texts + [text for text, _ in novel])
    bits = 13  # ⌈log2(32 × 150)⌉

    def listed(options: PackOptions) -> set[int]:
        bundle = decode_bundle(pack_model(model_dir, None, options).data)
        assert len(bundle.vocab) < 140  # rows left out: the list matters
        return set(read_envelope(bundle).absent.tolist())

    def prints(words: list[str]) -> set[int]:  # less those a float token has (never listed)
        found = set(fingerprint(np.array([hash_token(w) for w in words], np.uint32), bits).tolist())
        return found - set(fingerprint(np.array([hash_token(token(i)) for i in range(150)], np.uint32), bits).tolist())

    assert len(held) > 50 and len(chosen) > 300
    measured = listed(PackOptions(corpora=(str(corpus),), top=100))
    assert prints(chosen) <= measured and prints(held) <= measured
    capped = listed(PackOptions(corpora=(str(corpus),), max_bytes=5_000))
    assert prints(chosen) <= capped and not (prints(held) - prints(chosen)) & capped
