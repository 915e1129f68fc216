"""The certification's compiled part against its numpy reference (runtime/certify.py, runtime/native/certify.c).

Two things run in C when the fast path is on: the encoder reports the FNV-1a hash of each token without a row of its
own (`dp_encode_unknown_flat`, so `encode_unknown` never tokenizes in Python again), and `certify_box`'s arithmetic
(`NativeCertifier`). The reference for the first is the Python tokenizer and `hash_token`; for the second, the numpy
code: the certified flags must be the same and the lower bounds on z_top − z_k within 1e-12 of numpy's (relative to
the largest bound), on the demo models and on random bundles of every pruned-token policy, envelope kind, activation,
table kind and layer shape.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

import danpack.runtime.certify as certify
from danpack.pack.build import PackOptions, pack_model
from danpack.pack.envelope import EnvelopeOptions
from danpack.runtime import load
from danpack.runtime.bundle import Bundle, decode_bundle
from danpack.runtime.fastpath import NativeCertifier, library
from tests.test_bound import random_model
from tests.test_certify_pruned import mixed_texts, pack_pruned
from tests.test_native import AWKWARD_LINES, TRICKY

SHIPPED = Path(__file__).resolve().parents[1] / "models_demo" / "shipped"
needs_native = pytest.mark.skipif(library() is None, reason="the native library is not built (or DANPACK_NATIVE=0)")
pytestmark = needs_native

# name -> (random_model options, pack_pruned options): every branch of mean_box / _slot_hull / logit_gaps
RANDOM = {
    "skip relu int8": (dict(hidden=(6,)), dict(fold="no")),
    "skip tanh folded two layers": (dict(hidden=(6, 5), activation="tanh", dim=10), dict(fold="yes")),
    "unk tanh float32": (dict(hidden=(6,), activation="tanh", unk=True), dict(fold="no", quantize=False, pruned="unk")),
    "rest relu folded": (dict(hidden=(4,)), dict(fold="yes", pruned="rest")),
    "unk model packed skip, no hidden layer": (dict(hidden=(), unk=True), dict(fold="no", pruned="skip")),
    "one envelope": (dict(hidden=(6,)), dict(fold="no", envelope=EnvelopeOptions(buckets=0, absent_min_count=0, outlier_tail=0.0))),
    "one envelope unk float32 folded": (dict(hidden=(5,), unk=True, activation="tanh"),
                                        dict(fold="yes", quantize=False, pruned="unk",
                                             envelope=EnvelopeOptions(buckets=0, absent_min_count=0, outlier_tail=0.0))),
    "every row kept": (dict(hidden=(6,), vocab=40), dict(fold="no", common=40)),
}


def without_envelope(bundle: Bundle) -> Bundle:
    """The bundle as a packer before the `unknown` field wrote it."""
    from danpack.pack.bundle import encode_bundle, encode_payload, encode_vocab

    manifest = {k: v for k, v in bundle.manifest.items() if k != "unknown"}
    return decode_bundle(encode_bundle(encode_payload(manifest, encode_vocab(list(bundle.vocab)), bundle.graph,
                                                      dict(bundle.tensors))), "older")


@pytest.fixture(scope="module")
def cases(tmp_path_factory) -> dict[str, tuple[Path, Bundle, list[str]]]:
    """name -> (bundle file, bundle, texts): the random bundles above, then the demo models at the default pack."""
    root = tmp_path_factory.mktemp("certc")
    out = {}
    for i, (name, (model_options, pack_options)) in enumerate(RANDOM.items()):
        rng = np.random.default_rng(100 + i)
        options = dict(pack_options)
        common = options.pop("common", 12)
        model = random_model(rng, **{"vocab": 60, "out_scale": 4.0, **model_options})
        bundle = pack_pruned(model, root / str(i), rng, common, **options)
        pruned = [t for t in model.vocab if t not in set(bundle.vocab)] or ["qqq"]
        many = [" ".join(["w1", *rng.choice(pruned + ["zzz", "qqq"], k)]) for k in (9, 40, 70)]  # sorted any-k hull
        texts = mixed_texts(rng, model, bundle, 150) + many + ["<unk> zzz", "<unk>", "w1 <unk> qqq", "w2 <unk> <unk>"]
        out[name] = (root / str(i) / "pruned.danpack", bundle, texts)
    out["no unknown field"] = (None, without_envelope(out["skip relu int8"][1]), out["skip relu int8"][2])
    if (SHIPPED / "sentiment").is_dir():
        from danpack.models_demo import scenario

        stream = scenario.write_jsonl(root / "stream.jsonl", scenario.generate_stream(3000))
        for task in ("sentiment", "topic"):
            path = root / f"{task}.danpack"
            pack_model(SHIPPED / task, path, PackOptions(corpora=(str(stream),)))
            texts = [r["text"] for r in scenario.generate_split(task, "test", 1000)]
            out[f"demo {task}"] = (path, decode_bundle(path.read_bytes()), texts)
    return out


def python_unknown_hashes(clf, texts: list[str]) -> tuple[list[int], list[int]]:
    """(per-text counts, hashes) of the tokens without a row of their own, by the Python tokenizer and hash_token."""
    encoder = clf.encoder
    counts, hashes = [], []
    for text in texts:
        tokens = encoder.tokenizer.tokenize(text)
        unknown = ([t for t in tokens if t not in encoder.index] if encoder.oov_id is None else
                   [t for t in tokens if encoder.index.get(t, encoder.oov_id) == encoder.oov_id])
        counts.append(len(unknown))
        hashes.extend(certify.hash_token(t) for t in unknown)
    return counts, hashes


def awkward_texts() -> list[str]:
    """tests/test_native.py's tricky texts and awkward JSONL lines (as raw texts), UTF-8-encodable ones only."""
    lines = AWKWARD_LINES.decode("utf-8", "replace").splitlines()  # the bad bytes as U+FFFD
    return TRICKY + lines + ["<unk>", "<UNK> <unk>", "FIne ﬂow ligatures", "ÄÖÜ straße ǅ", "w1 " * 700]


def test_native_hashes_are_the_python_tokens_hashes(cases):
    """For every text, the compiled encoder's unknown-token hashes are hash_token of the Python tokenizer's unknown
    tokens (in order, after the 512-token cap), and its counts and ids are the Python encoder's."""
    checked = 0
    for name, (path, _, texts) in cases.items():
        if path is None:
            continue
        clf = load(path, backend="numpy")
        assert clf.native is not None, (name, clf.describe()["encoder"])
        texts = texts + awkward_texts()
        ids, counts, unknown, hashes = clf.native.encode_unknown(texts)
        want_counts, want_hashes = python_unknown_hashes(clf, texts)
        assert unknown.tolist() == want_counts, name
        assert hashes.dtype == np.uint32 and hashes.tolist() == want_hashes, name
        python_ids, python_counts = clf.encoder.encode(texts)
        np.testing.assert_array_equal(ids, python_ids)
        np.testing.assert_array_equal(counts, python_counts)
        checked += int(unknown.sum())
    assert checked > 500


def compare(bound: certify.BoxBound, ids, counts, unknown, top, name: str) -> np.ndarray:
    """Native flags == numpy's; native lower bounds within 1e-12 (relative to the largest) of numpy's."""
    low, covered = certify.logit_gaps(bound, top, ids, counts, unknown)  # (B, C), (B,)
    flags = certify.certify_box(bound, top, ids, counts, unknown)  # (B,)
    got, got_low, got_covered = NativeCertifier.open(bound).certify(top, ids, counts, unknown, lower=True)
    np.testing.assert_array_equal(got_covered, covered, err_msg=name)
    np.testing.assert_array_equal(got, flags, err_msg=name)
    finite = np.isfinite(low)
    np.testing.assert_array_equal(np.isfinite(got_low), finite, err_msg=name)
    assert (got_low[~finite] == low[~finite]).all(), name
    scale = max(1.0, float(np.abs(low[finite]).max(initial=0.0)))
    worst = float(np.abs(got_low - low)[finite].max(initial=0.0))
    assert worst <= 1e-12 * scale, (name, worst, scale)
    return flags


def test_native_certifier_matches_numpy(cases):
    seen = set()
    for name, (_, bundle, texts) in cases.items():
        from danpack.runtime.classifier import Classifier

        clf = Classifier(bundle, "numpy")
        bound = certify.box_bound(bundle)
        ids, counts, unknown = certify.encode_unknown(clf.encoder, texts, bound.envelope)  # unknown: (B,) or (B, U)
        logits = clf.backend.run(ids, counts)[1]  # (B, C)
        rng = np.random.default_rng(7)
        for top in (logits.argmax(axis=1), rng.integers(0, logits.shape[1], len(texts))):
            flags = compare(bound, ids, counts, unknown, top, name)
            if unknown.ndim == 2:  # the same texts by counts only: the one envelope bounds every unknown token
                compare(bound, ids, counts, (unknown >= 0).sum(axis=1), top, name + " (counts)")
        env = bound.envelope
        seen.add("none" if env is None else "by token" if env.by_token else "one" if env.rows else "kept")
        seen.add(f"skipped {env is not None and env.skipped}")
        if unknown.ndim == 2 and (unknown == env.hash_buckets).any():  # slot K: the one envelope, by token
            seen.add("whole-envelope slot")
        assert flags.any() or name == "no unknown field", name
    assert {"none", "by token", "one", "kept", "skipped True", "skipped False", "whole-envelope slot"} <= seen


def test_native_certifier_takes_a_lone_folded_layer(cases):
    """A bound whose only layer is folded into the table (logits = mean + bias; the packer folds only a hidden layer,
    logit_gaps takes this form too): built from a real bound by reading its table rows as logits."""
    from dataclasses import replace

    _, bundle, texts = cases["skip relu int8"]
    bound = certify.box_bound(bundle)
    width = bound.table.shape[1]
    rng = np.random.default_rng(9)
    lone = replace(bound, layers=((None, None, rng.normal(0.0, 0.1, width), None, np.full(width, 1e-7)),),
                   contrast=None)
    from danpack.runtime.classifier import Classifier

    ids, counts, unknown = certify.encode_unknown(Classifier(bundle, "numpy").encoder, texts, bound.envelope)
    for top in (rng.integers(0, width, len(texts)), np.zeros(len(texts), dtype=np.int64)):
        compare(lone, ids, counts, unknown, top, "lone folded layer")


def test_predict_certified_runs_the_native_certifier(cases):
    """With the fast path, predict_certified certifies in C (describe() says so) and answers as the numpy code."""
    path, _, texts = cases["demo sentiment"] if "demo sentiment" in cases else cases["skip relu int8"]
    for backend in ("numpy", "onnxruntime"):
        clf = load(path, backend=backend)
        assert clf.describe()["certify"] == "native" and clf._native_certifier is not None
        labels, probs, certified = clf.predict_certified(texts)
        clf.__dict__["_native_certifier"] = None  # the numpy reference
        want = clf.predict_certified(texts)
        assert labels == want[0] and np.array_equal(probs, want[1]) and np.array_equal(certified, want[2])
        assert certified.mean() > 0.5
