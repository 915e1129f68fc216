"""The device runtime API (runtime.load -> Classifier): backends, errors, threads, probe, isolation.

External references: `msgpack` (the format's codec) and `hashlib` (stdlib) to rewrite bundles with
a valid checksum; `numpy.argmax` / a plain softmax for predict; Python's import system
(`sys.meta_path` finders, PEP 451) to prove the runtime needs none of the packer's libraries.
"""

from __future__ import annotations

import copy
import json
import os
import subprocess
import sys
import textwrap
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import msgpack
import numpy as np
import pytest
from helpers import LABELS, make_corpus, make_model, random_texts, token, zipf_texts

from danpack import runtime
from danpack.pack.bundle import encode_bundle, encode_payload, encode_vocab
from danpack.pack.build import PackOptions, pack_model
from danpack.runtime import BundleError, DanpackError
from danpack.runtime.bundle import read_bundle

REPO = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def bundle_path(tmp_path_factory) -> Path:
    """An int8, pruned (rest row), folded bundle of a 500-row model with two hidden layers."""
    root = tmp_path_factory.mktemp("runtime")
    model_dir = make_model(root, vocab_size=500, dim=24, hidden=(12, 6), activation="tanh", seed=11)
    corpus = make_corpus(root, zipf_texts([token(i) for i in range(400)], 300, seed=12, unknown_rate=0.05))
    out = root / "model.danpack"
    pack_model(model_dir, out, PackOptions(corpora=(str(corpus),), coverage=0.95, pruned="rest"))
    return out


@pytest.fixture(scope="module")
def texts(bundle_path) -> list[str]:
    return random_texts([token(i) for i in range(520)], 300, seed=13)  # incl. pruned rows and unknown tokens


def test_backends_agree_on_random_texts(bundle_path, texts):
    ort, npy = runtime.load(bundle_path), runtime.load(bundle_path, backend="numpy")
    assert ort.backend.name == "onnxruntime" and npy.backend.name == "numpy"
    p1, l1 = ort.run(texts)
    p2, l2 = npy.run(texts)
    np.testing.assert_allclose(p1, p2, rtol=1e-5, atol=1e-5)
    np.testing.assert_allclose(l1, l2, rtol=1e-5, atol=1e-5)
    top2 = np.sort(p1, axis=1)[:, -2:]
    clear = top2[:, 1] - top2[:, 0] > 1e-4  # texts whose label is not a near-tie
    assert clear.mean() > 0.9
    a, b = ort.predict(texts), npy.predict(texts)
    assert [x for x, c in zip(a, clear) if c] == [y for y, c in zip(b, clear) if c]


def test_predict_proba_labels_manifest(bundle_path, texts):
    clf = runtime.load(str(bundle_path))  # str and Path both accepted
    assert clf.labels == LABELS
    m = clf.manifest
    assert m["labels"] == list(LABELS) and m["oov"]["policy"] == "rest" and m["table"]["dtype"] == "int8"
    probs, logits = clf.run(texts)
    assert probs.shape == logits.shape == (len(texts), len(LABELS)) and probs.dtype == np.float32
    e = np.exp(logits.astype(np.float64) - logits.max(axis=1, keepdims=True))  # softmax, written out
    np.testing.assert_allclose(probs, e / e.sum(axis=1, keepdims=True), atol=1e-6)
    np.testing.assert_allclose(clf.predict_proba(texts), probs)
    predicted = clf.predict(texts)
    assert predicted == [LABELS[i] for i in np.argmax(probs, axis=1)]
    assert set(predicted) <= set(LABELS)
    assert clf.predict([]) == [] and clf.predict_proba([]).shape == (0, len(LABELS))
    single = clf.predict_proba([texts[7]])
    np.testing.assert_allclose(single[0], probs[7], atol=1e-6)  # batch composition does not matter


def test_load_arguments_are_checked(bundle_path):
    with pytest.raises(DanpackError, match="backend 'gpu' is not one of"):
        runtime.load(bundle_path, backend="gpu")
    for threads in (0, -1, 1.5, "2", True, 2**40):
        with pytest.raises(DanpackError, match="threads must be an integer from 1 to 256"):
            runtime.load(bundle_path, threads=threads)
    assert runtime.load(bundle_path, threads=2).predict(["w1"])  # more threads work too


# --- load errors -----------------------------------------------------------------------------

def _garbage(tmp_path: Path, bundle_path: Path) -> dict[str, Path]:
    good = bundle_path.read_bytes()
    outer = msgpack.unpackb(good, raw=False)
    files = {
        "empty": b"",
        "random bytes": np.random.default_rng(0).integers(0, 256, 4096, dtype=np.uint8).tobytes(),
        "text": b"this is not a bundle\n",
        "msgpack list": msgpack.packb([1, 2, 3]),
        "other format": msgpack.packb({**outer, "format": "something-else"}, use_bin_type=True),
        "newer version": msgpack.packb({**outer, "version": 99}, use_bin_type=True),
        "truncated": good[: len(good) // 2],
        "trailing bytes": good + b"\x00",
        "flipped payload byte": good[:100] + bytes([good[100] ^ 1]) + good[101:],
        "toml file": (REPO / "pyproject.toml").read_bytes(),
    }
    paths = {}
    for name, data in files.items():
        p = tmp_path / (name.replace(" ", "_") + ".danpack")
        p.write_bytes(data)
        paths[name] = p
    return paths


def test_missing_file_and_directory_are_bundle_errors(tmp_path):
    missing = tmp_path / "nope.danpack"
    with pytest.raises(BundleError, match="no such bundle file") as e:
        runtime.load(missing)
    assert str(missing) in str(e.value)
    with pytest.raises(BundleError, match="is a directory") as e:
        runtime.load(tmp_path)
    assert str(tmp_path) in str(e.value)


@pytest.mark.parametrize("backend", ["onnxruntime", "numpy"])
def test_garbage_files_are_bundle_errors(tmp_path, bundle_path, backend):
    for name, path in _garbage(tmp_path, bundle_path).items():
        with pytest.raises(BundleError) as e:
            runtime.load(path, backend=backend)
        assert isinstance(e.value, DanpackError) and isinstance(e.value, ValueError)
        assert str(path) in str(e.value), f"{name}: message does not name the file: {e.value}"


# --- the probe ---------------------------------------------------------------------------------

def _rewrite(bundle_path: Path, out: Path, edit) -> Path:
    """Decode a bundle, let `edit(manifest, tensors)` change it, re-encode with a valid checksum."""
    b = read_bundle(bundle_path)
    manifest = copy.deepcopy(b.manifest)  # a deep, mutable copy (it may hold bytes: the envelope's parts)
    tensors = {k: np.array(v) for k, v in b.tensors.items()}
    edit(manifest, tensors)
    out.write_bytes(encode_bundle(encode_payload(manifest, encode_vocab(list(b.vocab)), b.graph, tensors)))
    return out


def test_unchanged_rewrite_is_byte_identical_and_loads(bundle_path, tmp_path):
    out = _rewrite(bundle_path, tmp_path / "same.danpack", lambda m, t: None)
    assert out.read_bytes() == bundle_path.read_bytes()
    runtime.load(out)


@pytest.mark.parametrize("backend", ["onnxruntime", "numpy"])
def test_altered_probe_is_refused(bundle_path, tmp_path, backend):
    def edit(manifest, tensors):
        p = manifest["probe"]["probs"][2]
        p[0], p[1] = p[1], p[0]  # still probabilities in [0, 1] summing to 1, but not what the graph computes
        assert abs(p[0] - p[1]) > 1e-3
    out = _rewrite(bundle_path, tmp_path / "probe.danpack", edit)
    read_bundle(out)  # the file itself is well-formed and its checksum valid
    with pytest.raises(BundleError, match=f"the {backend} backend disagrees with the packer on the bundle's probe"):
        runtime.load(out, backend=backend)


@pytest.mark.parametrize("backend", ["onnxruntime", "numpy"])
def test_damaged_table_with_a_valid_checksum_is_refused(bundle_path, tmp_path, backend):
    def edit(manifest, tensors):
        tensors["table"][1] = -tensors["table"][1]  # row 1 is in the probe's id sequences
    with pytest.raises(BundleError, match="probe"):
        runtime.load(_rewrite(bundle_path, tmp_path / "table.danpack", edit), backend=backend)


# --- threads ---------------------------------------------------------------------------------

@pytest.mark.parametrize("backend", ["onnxruntime", "numpy"])
def test_concurrent_predict_equals_serial(bundle_path, texts, backend):
    clf = runtime.load(bundle_path, backend=backend)
    chunks = [texts[i::8] for i in range(8)] * 4  # 32 jobs over 8 threads, every chunk several times
    serial = [clf.predict_proba(c) for c in chunks]
    serial_labels = [clf.predict(c) for c in chunks]
    with ThreadPoolExecutor(max_workers=8) as pool:
        parallel = list(pool.map(clf.predict_proba, chunks))
        parallel_labels = list(pool.map(clf.predict, chunks))
    for s, p in zip(serial, parallel):
        np.testing.assert_array_equal(s, p)
    assert serial_labels == parallel_labels


# --- import isolation --------------------------------------------------------------------------

ISOLATED = textwrap.dedent('''
    import sys
    BLOCKED = {"onnx", "typer", "safetensors", "torch"}

    def blocked(name):
        """The packer's libraries, and every part of danpack but the runtime."""
        top, _, rest = name.partition(".")
        return top in BLOCKED or (top == "danpack" and rest != "" and rest.partition(".")[0] != "runtime")

    class Refuse:
        """Any import of a blocked package (or its submodules) fails."""
        def find_spec(self, name, path=None, target=None):
            if blocked(name):
                raise ImportError(f"{name} is blocked in this test")
            return None

    already = sorted(m for m in sys.modules if blocked(m))
    sys.meta_path.insert(0, Refuse())
    for name in [*BLOCKED, "danpack.pack", "danpack.model"]:  # the finder really refuses them
        try:
            __import__(name)
        except ImportError:
            pass
        else:
            raise SystemExit(f"{name} imported despite the block")

    import json
    from danpack import runtime

    texts = json.loads(sys.argv[2])
    out = {"already": already}
    for backend in ("onnxruntime", "numpy"):
        clf = runtime.load(sys.argv[1], backend=backend)
        out[backend] = {"labels": clf.predict(texts), "probs": clf.predict_proba(texts).tolist()}
    out["loaded"] = sorted(m for m in sys.modules if blocked(m))
    print(json.dumps(out))
''')


def test_runtime_works_without_the_packer_libraries(bundle_path, texts, tmp_path):
    sample = texts[:40]
    env = {**os.environ, "PYTHONPATH": str(REPO), "PYTHONDONTWRITEBYTECODE": "1"}
    proc = subprocess.run([sys.executable, "-c", ISOLATED, str(bundle_path), json.dumps(sample)],
                          capture_output=True, text=True, cwd=tmp_path, env=env, timeout=120)
    assert proc.returncode == 0, proc.stderr
    out = json.loads(proc.stdout.strip().splitlines()[-1])
    assert out["already"] == [] and out["loaded"] == []
    here = runtime.load(bundle_path)
    for backend in ("onnxruntime", "numpy"):
        assert out[backend]["labels"] == here.predict(sample)
        np.testing.assert_allclose(np.array(out[backend]["probs"]), here.predict_proba(sample), atol=1e-5)


# --- the texts argument -----------------------------------------------------------------------

@pytest.mark.parametrize("texts, message", [
    ("card declined", "found a single str; wrap it"),  # would otherwise classify each character
    (b"card declined", "found a single bytes"),
    ([None], r"texts\[0\] is NoneType, expected str"),
    (["ok", b"abc"], r"texts\[1\] is bytes, expected str"),
    (42, "texts must be a list of strings, found int"),
])
def test_bad_texts_argument_is_a_clear_error(bundle_path, texts, message):
    clf = runtime.load(bundle_path)
    for call in (clf.predict, clf.predict_proba, clf.predict_certified):
        with pytest.raises(DanpackError, match=message):
            call(texts)


def test_any_iterable_of_texts_works_and_long_calls_are_chunked(bundle_path):
    clf = runtime.load(bundle_path)
    texts = [f"w{i % 7} w{i % 5} w{i % 3}" for i in range(600)]  # 600 > CALL_TEXTS: three backend calls
    expected = clf.predict_proba(texts)
    assert expected.shape == (600, len(clf.labels))
    np.testing.assert_allclose(clf.predict_proba(t for t in texts), expected, rtol=0, atol=1e-6)
    labels, probs, certified = clf.predict_certified(iter(texts))
    assert len(labels) == 600 and probs.shape == expected.shape and certified.shape == (600,)
    np.testing.assert_allclose(probs, expected, rtol=0, atol=1e-6)
    for i in (0, 255, 256, 599):  # rows on both sides of a chunk edge match a call of their own
        np.testing.assert_allclose(expected[i], clf.predict_proba([texts[i]])[0], rtol=0, atol=1e-6)
    assert clf.predict([]) == [] and clf.predict_certified([])[1].shape == (0, len(clf.labels))
