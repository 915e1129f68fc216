"""Packing (packer/pack.py, packer/fold.py, packer/bundle.py): folding, the float baseline,
deterministic bytes, checksums, SOURCE_DATE_EPOCH and the atomic write.

External references: the folded table is recomputed with a plain numpy matmul (E @ W1ᵀ), the float
baseline against the float model's own numpy forward pass written out in this file, checksums
with `hashlib.sha256` (stdlib) over the payload read back with `msgpack` (the file format's codec).
SOURCE_DATE_EPOCH follows the reproducible-builds.org specification (common practice: a decimal
count of seconds since 1970-01-01 UTC, set by the build environment).
"""

from __future__ import annotations

import hashlib
import os
from dataclasses import replace
from pathlib import Path

import msgpack
import numpy as np
import pytest

from danpack.files import OutputError
from helpers import make_corpus, make_float_model, make_model, random_texts, token, zipf_texts

import danpack.files as bundle_module
from danpack.pack.fold import should_fold
from danpack.model import load_model, save_model
from danpack.pack.build import PackError, PackOptions, pack_model
from danpack.runtime.bundle import decode_bundle, read_bundle
from danpack.runtime.classifier import Classifier
from danpack.runtime.forward import Layer


def _classify(data: bytes, texts, backend="onnxruntime") -> np.ndarray:
    return Classifier(decode_bundle(data), backend).predict_proba(texts)


def _float_forward(model, texts) -> np.ndarray:
    """The float original written out with numpy: skip unknown tokens, mean, layers, softmax."""
    index = {t: i for i, t in enumerate(model.vocab)}
    tok = model.encoder().tokenizer
    out = []
    for text in texts:
        rows = [index[t] for t in tok.tokenize(text) if t in index]
        x = model.embedding[rows].astype(np.float64).mean(0) if rows else np.zeros(model.embedding.shape[1])
        for layer in model.layers:
            x = x @ layer.weight.T.astype(np.float64) + layer.bias
            x = np.maximum(x, 0) if layer.activation == "relu" else np.tanh(x) if layer.activation == "tanh" else x
        e = np.exp(x - x.max())
        out.append(e / e.sum())
    return np.array(out)


# --- folding ---------------------------------------------------------------------------------

@pytest.mark.parametrize("activation", ["relu", "tanh"])
@pytest.mark.parametrize("hidden", [(6,), (10, 4, 4), (24, 5)])
def test_folded_and_unfolded_float_outputs_agree(tmp_path, hidden, activation):
    model_dir = make_model(tmp_path, vocab_size=80, dim=16, hidden=hidden, activation=activation, seed=2)
    model = load_model(model_dir)
    texts = random_texts(model.vocab, 150, seed=1)
    folded = pack_model(model_dir, None, PackOptions(quantize=False, fold="yes"))
    plain = pack_model(model_dir, None, PackOptions(quantize=False, fold="no"))
    assert folded.folded and not plain.folded
    assert folded.width == hidden[0] and plain.width == 16
    # the folded table is E @ W1ᵀ (numpy matmul in float64 as the reference)
    table = decode_bundle(folded.data).tensors["table"]
    np.testing.assert_allclose(table, model.embedding.astype(np.float64) @ model.layers[0].weight.T.astype(np.float64),
                               rtol=1e-5, atol=1e-5)
    for backend in ("onnxruntime", "numpy"):
        np.testing.assert_allclose(_classify(folded.data, texts, backend), _classify(plain.data, texts, backend),
                                   atol=1e-5)


@pytest.mark.parametrize("dim,hidden,expected", [
    (16, (8,), True),      # H1 < D: the table shrinks
    (16, (16,), False),    # H1 == D: nothing to gain
    (16, (24,), False),    # H1 > D: folding would grow the table
    (16, (), False),       # no hidden layer to fold
])
def test_auto_folds_only_when_the_first_layer_is_narrower(tmp_path, dim, hidden, expected):
    model_dir = make_model(tmp_path, vocab_size=30, dim=dim, hidden=hidden, seed=3)
    result = pack_model(model_dir, None, PackOptions())
    assert result.folded is expected
    assert result.width == (hidden[0] if expected else dim)
    assert decode_bundle(result.data).manifest["table"]["folded"] is expected


def test_fold_yes_on_a_model_without_hidden_layers_is_a_no_op(tmp_path):
    model_dir = make_model(tmp_path, vocab_size=30, dim=8, hidden=(), seed=4)
    assert not pack_model(model_dir, None, PackOptions(fold="yes")).folded
    assert should_fold(8, load_model(model_dir).layers, "yes") is False


# --- the float baseline ------------------------------------------------------------------------

@pytest.mark.parametrize("hidden", [(), (8,), (12, 6, 5)])
def test_unpruned_float_bundle_reproduces_the_float_model(tmp_path, hidden):
    # no corpus, quantize=False, fold="no": every row and weight as in the float model
    model_dir = make_model(tmp_path, vocab_size=70, dim=16, hidden=hidden, activation="tanh", seed=5)
    model = load_model(model_dir)
    result = pack_model(model_dir, None, PackOptions(quantize=False, fold="no"))
    bundle = decode_bundle(result.data)
    assert bundle.vocab == model.vocab
    np.testing.assert_array_equal(bundle.tensors["table"], model.embedding)
    texts = random_texts(model.vocab, 200, seed=2)
    expected = _float_forward(model, texts)
    np.testing.assert_allclose(model.predict_proba(texts), expected, atol=1e-6)
    for backend in ("onnxruntime", "numpy"):
        np.testing.assert_allclose(_classify(result.data, texts, backend), expected, atol=1e-6)


def test_int8_bundle_stays_close_to_the_float_model(tmp_path):
    model_dir = make_model(tmp_path, vocab_size=300, dim=32, hidden=(16,), seed=6)
    model = load_model(model_dir)
    texts = random_texts(model.vocab, 300, seed=4)
    probs = _classify(pack_model(model_dir, None, PackOptions()).data, texts)
    gap = np.abs(probs - model.predict_proba(texts)).max()
    assert gap < 0.02, gap  # per-row int8 moves each element by <= scale/2 ~ 0.4% of the row maximum
    assert gap > 0  # and it is really quantised


# --- deterministic bytes and checksums -----------------------------------------------------

def _sha(data: bytes) -> str:
    """sha256 of the payload, read back with msgpack and hashed with hashlib (independent of our reader)."""
    outer = msgpack.unpackb(data, raw=False)
    assert hashlib.sha256(outer["payload"]).digest() == outer["sha256"]
    return outer["sha256"].hex()


@pytest.fixture()
def packed_inputs(tmp_path, monkeypatch):
    monkeypatch.delenv("SOURCE_DATE_EPOCH", raising=False)
    model = make_float_model(vocab_size=120, dim=16, hidden=(8,), seed=7)
    model_dir = save_model(model, tmp_path / "model")
    corpus = make_corpus(tmp_path, zipf_texts(model.vocab, 150, seed=8, unknown_rate=0.1))
    return model, model_dir, corpus


def test_packing_twice_gives_identical_files(packed_inputs, tmp_path):
    model, model_dir, corpus = packed_inputs
    options = PackOptions(corpora=(str(corpus),), coverage=0.9, keep_words=(token(100),))
    a = pack_model(model_dir, tmp_path / "a.danpack", options)
    # the same model saved elsewhere, the same corpus copied elsewhere: still the same bytes
    other = tmp_path / "elsewhere"
    other_model = save_model(model, other / "model")
    other_corpus = other / corpus.name
    other_corpus.write_bytes(corpus.read_bytes())
    b = pack_model(other_model, other / "b.danpack", PackOptions(corpora=(str(other_corpus),), coverage=0.9,
                                                                  keep_words=(token(100),)))
    assert (tmp_path / "a.danpack").read_bytes() == (other / "b.danpack").read_bytes() == a.data == b.data
    assert read_bundle(tmp_path / "a.danpack").sha256 == _sha(a.data)


def _variants(model, model_dir: Path, corpus: Path, tmp_path: Path):
    """(name, model_dir, options) for inputs that each differ from the base in one thing."""
    base = PackOptions(corpora=(str(corpus),), coverage=0.9)
    yield "base", model_dir, base
    emb = model.embedding.copy()
    emb[5, 3] = np.nextafter(emb[5, 3], np.float32(np.inf))  # one weight, one ulp
    yield "embedding weight", save_model(replace(model, embedding=emb), tmp_path / "m1"), base
    layers = list(model.layers)
    bias = layers[-1].bias.copy()
    bias[0] += np.float32(1e-3)
    layers[-1] = Layer(layers[-1].weight, bias, None)
    yield "output bias", save_model(replace(model, layers=tuple(layers)), tmp_path / "m2"), base
    vocab = list(model.vocab)
    vocab[vocab.index(token(1))] = "w1x"  # one vocabulary token renamed
    yield "vocab token", save_model(replace(model, vocab=tuple(vocab)), tmp_path / "m3"), base
    yield "coverage", model_dir, PackOptions(corpora=(str(corpus),), coverage=0.8)
    yield "fold", model_dir, PackOptions(corpora=(str(corpus),), coverage=0.9, fold="no")
    yield "pruned", model_dir, PackOptions(corpora=(str(corpus),), coverage=0.9, pruned="rest")
    yield "keep-words", model_dir, PackOptions(corpora=(str(corpus),), coverage=0.9, keep_words=("w119",))
    changed = tmp_path / "corpus2.txt"
    lines = corpus.read_text(encoding="utf-8").splitlines()
    changed.write_text("\n".join(lines[:-1] + [lines[-1] + " " + token(0)]) + "\n", encoding="utf-8")
    yield "corpus", model_dir, PackOptions(corpora=(str(changed),), coverage=0.9)
    yield "no corpus", model_dir, PackOptions()


def test_changing_any_input_changes_the_checksum(packed_inputs, tmp_path):
    model, model_dir, corpus = packed_inputs
    seen: dict[str, str] = {}
    for name, directory, options in _variants(model, model_dir, corpus, tmp_path):
        digest = _sha(pack_model(directory, None, options).data)
        assert digest not in seen.values(), f"{name} gives the same checksum as {[k for k, v in seen.items() if v == digest]}"
        seen[name] = digest
    assert len(seen) == 10


def test_source_date_epoch_is_recorded(packed_inputs, monkeypatch):
    _, model_dir, corpus = packed_inputs
    options = PackOptions(corpora=(str(corpus),))
    plain = pack_model(model_dir, None, options).data
    assert "created_epoch" not in decode_bundle(plain).manifest  # no clock reading without the variable
    monkeypatch.setenv("SOURCE_DATE_EPOCH", "1700000000")
    stamped = pack_model(model_dir, None, options).data
    assert decode_bundle(stamped).manifest["created_epoch"] == 1700000000
    assert pack_model(model_dir, None, options).data == stamped  # still reproducible
    monkeypatch.setenv("SOURCE_DATE_EPOCH", "1700000001")
    assert _sha(pack_model(model_dir, None, options).data) != _sha(stamped)


@pytest.mark.parametrize("value", ["abc", "", "-1", "1.5", " 1700000000", "١٧٠٠"])  # the last: Arabic-Indic digits
def test_malformed_source_date_epoch_is_refused(packed_inputs, monkeypatch, value):
    _, model_dir, corpus = packed_inputs
    monkeypatch.setenv("SOURCE_DATE_EPOCH", value)
    with pytest.raises(PackError, match="SOURCE_DATE_EPOCH=.*digits only"):
        pack_model(model_dir, None, PackOptions(corpora=(str(corpus),)))


def test_long_tokens_stay_within_the_vocabulary_inflate_bound(tmp_path):
    """The reader inflates at most 256 bytes per table row (a bomb guard); 250-byte tokens still load."""
    vocab = [f"{'x' * 246}{i:03d}" for i in range(40)]  # 249 bytes + newline per row, incompressible digits aside
    model_dir = save_model(make_float_model(vocab=vocab, dim=8, hidden=(4,), seed=2), tmp_path / "model")
    bundle = decode_bundle(pack_model(model_dir, None, PackOptions()).data)
    assert list(bundle.vocab) == vocab
    assert bundle.vocab_bytes < len("\n".join(vocab)) // 10  # repeated letters deflate well


# --- the atomic write ----------------------------------------------------------------------

class _FailingFile:
    """Wraps the temp file: writes the first half of the data, then fails like a full disk."""

    def __init__(self, f):
        self.f = f

    def write(self, data):
        self.f.write(data[: len(data) // 2])
        raise OSError(28, "No space left on device")

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.f.close()
        return False

    def __getattr__(self, name):
        return getattr(self.f, name)


@pytest.mark.parametrize("failure", ["write", "fsync", "replace"])
def test_failed_write_keeps_the_old_bundle_and_leaves_no_temp_file(packed_inputs, tmp_path, monkeypatch, failure):
    _, model_dir, corpus = packed_inputs
    out = tmp_path / "out" / "model.danpack"
    out.parent.mkdir()
    old = pack_model(model_dir, out, PackOptions()).data
    before = sorted(os.listdir(out.parent))
    if failure == "write":
        real_fdopen = os.fdopen
        monkeypatch.setattr(bundle_module.os, "fdopen", lambda fd, mode: _FailingFile(real_fdopen(fd, mode)))
    elif failure == "fsync":
        monkeypatch.setattr(bundle_module.os, "fsync", lambda fd: (_ for _ in ()).throw(OSError(5, "I/O error")))
    else:
        monkeypatch.setattr(bundle_module.os, "replace", lambda a, b: (_ for _ in ()).throw(OSError(18, "cross-device")))
    with pytest.raises(OutputError, match="writing failed"):
        pack_model(model_dir, out, PackOptions(corpora=(str(corpus),), coverage=0.5))
    monkeypatch.undo()
    assert out.read_bytes() == old  # the previous bundle is intact
    assert sorted(os.listdir(out.parent)) == before  # no .partial file left behind
    assert read_bundle(out).sha256 == _sha(old)


def test_write_replaces_an_existing_bundle(packed_inputs, tmp_path):
    _, model_dir, corpus = packed_inputs
    out = tmp_path / "model.danpack"
    pack_model(model_dir, out, PackOptions())
    new = pack_model(model_dir, out, PackOptions(corpora=(str(corpus),), top=3)).data
    assert out.read_bytes() == new
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []
