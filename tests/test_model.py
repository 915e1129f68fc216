"""Tests of the float model directory (packer/model.py): round trips and every loader error.

Bad model directories are written here with numpy (`np.savez`), safetensors
(`safetensors.numpy.save_file`) and the stdlib `json`, independently of `save_model`.
Every error test checks that the message names the file and the field. Tests named
`test_bug_*` fail on purpose: they show a defect reported to the lead.
"""

from __future__ import annotations

import json
import os
import zipfile
from pathlib import Path

import numpy as np
import pytest
from safetensors.numpy import load_file as st_load
from safetensors.numpy import save_file as st_save

from danpack.model import FloatModel, load_model, model_config, save_model
from danpack.runtime.errors import DanpackError, ModelError
from danpack.runtime.forward import Layer
from danpack.runtime.tokenize import TokenizerSpec

VOCAB = ("fast", "slow", "broken", "great", "charger", "<unk>")
LABELS = ("negative", "neutral", "positive")


def make_model(
    seed: int = 0, dim: int = 4, hidden: tuple[int, ...] = (5, 3), labels=LABELS, activation: str = "relu",
    oov: str = "unk",
) -> FloatModel:
    """A small random float model (row count = len(VOCAB))."""
    rng = np.random.default_rng(seed)
    layers, width = [], dim
    for size in hidden:
        layers.append(Layer(rng.normal(size=(size, width)).astype(np.float32),
                            rng.normal(size=size).astype(np.float32), activation))
        width = size
    layers.append(Layer(rng.normal(size=(len(labels), width)).astype(np.float32),
                        rng.normal(size=len(labels)).astype(np.float32), None))
    return FloatModel(
        vocab=VOCAB, embedding=rng.normal(size=(len(VOCAB), dim)).astype(np.float32), layers=tuple(layers),
        labels=tuple(labels), tokenizer=TokenizerSpec(max_tokens=64), oov_policy=oov,
        unk_token="<unk>" if oov == "unk" else None, metadata={"trainer": "tests", "seed": seed},
    )


def assert_same_model(a: FloatModel, b: FloatModel) -> None:
    assert a.vocab == b.vocab and a.labels == b.labels
    assert a.tokenizer == b.tokenizer and a.oov_policy == b.oov_policy and a.unk_token == b.unk_token
    assert a.metadata == b.metadata
    np.testing.assert_array_equal(a.embedding, b.embedding)
    assert len(a.layers) == len(b.layers)
    for la, lb in zip(a.layers, b.layers):
        np.testing.assert_array_equal(la.weight, lb.weight)
        np.testing.assert_array_equal(la.bias, lb.bias)
        assert la.activation == lb.activation


@pytest.fixture
def model_dir(tmp_path: Path) -> Path:
    """A valid npz model directory with hidden sizes (5, 3) and an <unk> row."""
    return save_model(make_model(), tmp_path / "model")


# --- helpers that damage a directory (independent writers) ------------------------------------

def edit_config(model_dir: Path, change) -> None:
    path = model_dir / "dan.json"
    config = json.loads(path.read_text(encoding="utf-8"))
    change(config)
    path.write_text(json.dumps(config), encoding="utf-8")


def read_npz(model_dir: Path) -> dict[str, np.ndarray]:
    with np.load(model_dir / "weights.npz", allow_pickle=False) as npz:
        return {k: npz[k] for k in npz.files}


def edit_weights(model_dir: Path, change) -> None:
    arrays = read_npz(model_dir)
    change(arrays)
    with open(model_dir / "weights.npz", "wb") as f:
        np.savez(f, **arrays)


def load_error(model_dir: Path) -> str:
    with pytest.raises(ModelError) as info:
        load_model(model_dir)
    assert isinstance(info.value, DanpackError) and isinstance(info.value, ValueError)
    return str(info.value)


# --- round trips ----------------------------------------------------------------------------------

@pytest.mark.parametrize("fmt", ["npz", "safetensors"])
@pytest.mark.parametrize("hidden", [(), (5,), (5, 3, 2)])
@pytest.mark.parametrize("activation", ["relu", "tanh"])
def test_save_load_round_trip(tmp_path, fmt, hidden, activation):
    model = make_model(hidden=hidden, activation=activation)
    path = save_model(model, tmp_path / "m", weights_format=fmt)
    assert sorted(p.name for p in path.iterdir()) == sorted(["dan.json", "tokens.txt", f"weights.{fmt}"])
    loaded = load_model(path)
    assert_same_model(model, loaded)
    assert loaded.hidden_sizes == hidden
    if hidden:  # with no hidden layer there is no activation to keep (the property says "relu")
        assert loaded.activation == activation
    texts = ["fast charger", "broken broken slow", "no known words", ""]
    np.testing.assert_array_equal(model.predict_logits(texts), loaded.predict_logits(texts))


def test_round_trip_skip_policy_and_custom_tokenizer(tmp_path):
    model = make_model(oov="skip")
    model = FloatModel(model.vocab, model.embedding, model.layers, model.labels,
                       TokenizerSpec(normalization="none", case="keep", pattern=r"\S+", max_tokens=9), "skip", None, {})
    loaded = load_model(save_model(model, tmp_path / "m"))
    assert_same_model(model, loaded)


def test_round_trip_unicode_vocab_and_labels(tmp_path):
    base = make_model()
    vocab = ("привет", "你好", "👍", "don't", "مرحبا", "<unk>")
    model = FloatModel(vocab, base.embedding, base.layers, ("плохо", "😐", "好"), base.tokenizer, "unk", "<unk>", {})
    loaded = load_model(save_model(model, tmp_path / "m", weights_format="safetensors"))
    assert_same_model(model, loaded)


def test_saved_config_is_plain_json_with_documented_fields(model_dir):
    config = json.loads((model_dir / "dan.json").read_text(encoding="utf-8"))
    assert config == model_config(make_model())
    assert config["format"] == "danpack-float" and config["version"] == 1
    assert config["hidden_sizes"] == [5, 3] and config["embedding_dim"] == 4
    assert config["oov"] == {"policy": "unk", "token": "<unk>"}
    assert (model_dir / "tokens.txt").read_text(encoding="utf-8") == "".join(t + "\n" for t in VOCAB)


@pytest.mark.parametrize("fmt", ["npz", "safetensors"])
def test_float16_weights_load_as_float32(tmp_path, fmt):
    model = make_model()
    path = save_model(model, tmp_path / "m", weights_format=fmt)
    if fmt == "npz":
        arrays = {k: v.astype(np.float16) for k, v in read_npz(path).items()}
        with open(path / "weights.npz", "wb") as f:
            np.savez(f, **arrays)
    else:
        arrays = {k: v.astype(np.float16) for k, v in st_load(str(path / "weights.safetensors")).items()}
        st_save(arrays, str(path / "weights.safetensors"))
    loaded = load_model(path)
    assert loaded.embedding.dtype == np.float32
    np.testing.assert_array_equal(loaded.embedding, arrays["embedding"].astype(np.float32))
    for i, layer in enumerate(loaded.layers):
        name = "output" if i == len(loaded.layers) - 1 else f"hidden.{i}"
        assert layer.weight.dtype == np.float32 and layer.bias.dtype == np.float32
        np.testing.assert_array_equal(layer.weight, arrays[f"{name}.weight"].astype(np.float32))
        np.testing.assert_array_equal(layer.bias, arrays[f"{name}.bias"].astype(np.float32))
    # float16 rounding stays within its half-precision step (2**-11 relative, IEEE 754 binary16).
    np.testing.assert_allclose(loaded.embedding, model.embedding, rtol=2**-10, atol=1e-4)


def test_weights_written_by_hand_with_numpy_load(tmp_path):
    # A directory written without save_model: stdlib json + np.savez.
    d = tmp_path / "hand"
    d.mkdir()
    (d / "dan.json").write_text(json.dumps({
        "format": "danpack-float", "version": 1, "labels": ["no", "yes"], "embedding_dim": 2,
        "hidden_sizes": [], "activation": "tanh"}), encoding="utf-8")
    (d / "tokens.txt").write_text("ok\nbad", encoding="utf-8")  # no final newline
    np.savez(d / "weights.npz", embedding=np.eye(2, dtype=np.float32),
             **{"output.weight": np.array([[1, 0], [0, 1]], np.float32), "output.bias": np.zeros(2, np.float32)})
    model = load_model(d)
    assert model.vocab == ("ok", "bad") and model.oov_policy == "skip" and model.tokenizer == TokenizerSpec()
    np.testing.assert_array_equal(model.predict_logits(["ok", "bad", "ok bad"]), [[1, 0], [0, 1], [0.5, 0.5]])


# --- missing / conflicting files -----------------------------------------------------------------------

def test_not_a_directory(tmp_path):
    (tmp_path / "file").write_text("x")
    msg = load_error(tmp_path / "file")
    assert "file" in msg and "is not a directory" in msg
    msg = load_error(tmp_path / "nowhere")
    assert "nowhere" in msg and "no such directory" in msg


@pytest.mark.parametrize("name", ["dan.json", "tokens.txt"])
def test_missing_file(model_dir, name):
    (model_dir / name).unlink()
    msg = load_error(model_dir)
    assert str(model_dir / name) in msg and "missing" in msg


def test_missing_weights(model_dir):
    (model_dir / "weights.npz").unlink()
    msg = load_error(model_dir)
    assert str(model_dir) in msg and "weights.npz" in msg and "weights.safetensors" in msg


def test_both_weight_files(model_dir):
    st_save(read_npz(model_dir), str(model_dir / "weights.safetensors"))
    msg = load_error(model_dir)
    assert "weights.npz" in msg and "weights.safetensors" in msg and "exactly one" in msg


# --- dan.json --------------------------------------------------------------------------------------------

@pytest.mark.parametrize("text, fragment", [
    ("{", "not valid JSON"),
    ('{"format": "danpack-float",}', "not valid JSON"),
    ("", "not valid JSON"),
    ("[1, 2]", "JSON object, found list"),
    ('"danpack-float"', "JSON object, found str"),
])
def test_config_not_a_json_object(model_dir, text, fragment):
    (model_dir / "dan.json").write_text(text, encoding="utf-8")
    msg = load_error(model_dir)
    assert "dan.json" in msg and fragment in msg


def test_config_invalid_json_names_line_and_column(model_dir):
    (model_dir / "dan.json").write_text('{\n  "format": "danpack-float"\n  "version": 1\n}', encoding="utf-8")
    msg = load_error(model_dir)
    assert "dan.json" in msg and "line 3" in msg and "column" in msg


def test_config_not_utf8(model_dir):
    (model_dir / "dan.json").write_bytes(b'{"format": "danpack-float\xff"}')
    msg = load_error(model_dir)
    assert "dan.json" in msg and "UTF-8" in msg


@pytest.mark.parametrize("value", ["danpack-bundle", "", None, 1])
def test_wrong_format_name(model_dir, value):
    edit_config(model_dir, lambda c: c.update(format=value))
    msg = load_error(model_dir)
    assert "dan.json" in msg and "'format'" in msg and repr(value) in msg and "'danpack-float'" in msg


def test_missing_format(model_dir):
    edit_config(model_dir, lambda c: c.pop("format"))
    msg = load_error(model_dir)
    assert "dan.json" in msg and "'format'" in msg


@pytest.mark.parametrize("value", [0, 2, 99, "1", None])
def test_unknown_version(model_dir, value):
    edit_config(model_dir, lambda c: c.update(version=value))
    msg = load_error(model_dir)
    assert "dan.json" in msg and "'version'" in msg and repr(value) in msg


def test_unknown_config_field(model_dir):
    edit_config(model_dir, lambda c: c.update(dropout=0.1, hidden=[3]))
    msg = load_error(model_dir)
    assert "dan.json" in msg and "['dropout', 'hidden']" in msg and "allowed fields" in msg


@pytest.mark.parametrize("field", ["labels", "embedding_dim", "hidden_sizes", "activation"])
def test_required_config_field_missing(model_dir, field):
    edit_config(model_dir, lambda c: c.pop(field))
    msg = load_error(model_dir)
    assert "dan.json" in msg and f"'{field}' is missing" in msg


@pytest.mark.parametrize("labels", [[], ["only"], "negative,positive", ["a", ""], ["a", 2], None])
def test_labels_invalid_or_too_few(model_dir, labels):
    edit_config(model_dir, lambda c: c.update(labels=labels))
    msg = load_error(model_dir)
    assert "dan.json" in msg and "'labels'" in msg and "at least 2" in msg


def test_labels_duplicated(model_dir):
    edit_config(model_dir, lambda c: c.update(labels=["negative", "positive", "negative"]))
    msg = load_error(model_dir)
    assert "dan.json" in msg and "'labels'" in msg and "repeats" in msg


@pytest.mark.parametrize("value", [0, -4, "4", 4.0, True, None])
def test_embedding_dim_invalid(model_dir, value):
    edit_config(model_dir, lambda c: c.update(embedding_dim=value))
    msg = load_error(model_dir)
    assert "dan.json" in msg and "'embedding_dim'" in msg and "positive integer" in msg


def test_embedding_dim_mismatch(model_dir):
    edit_config(model_dir, lambda c: c.update(embedding_dim=6))
    msg = load_error(model_dir)
    assert "weights.npz" in msg and "'embedding'" in msg and "width 4" in msg and "embedding_dim 6" in msg


@pytest.mark.parametrize("value", [[0], [-3], [5, "3"], [2.5], "5,3", None, [True]])
def test_hidden_sizes_invalid(model_dir, value):
    edit_config(model_dir, lambda c: c.update(hidden_sizes=value))
    msg = load_error(model_dir)
    assert "dan.json" in msg and "'hidden_sizes'" in msg


def test_hidden_sizes_longer_than_the_layers_saved(model_dir):
    edit_config(model_dir, lambda c: c.update(hidden_sizes=[5, 3, 2]))
    msg = load_error(model_dir)
    assert "weights.npz" in msg and "'hidden.2.weight' is missing" in msg


def test_hidden_sizes_disagree_with_weight_rows(model_dir):
    edit_config(model_dir, lambda c: c.update(hidden_sizes=[5, 4]))
    msg = load_error(model_dir)
    assert "weights.npz" in msg and "'hidden.1.weight'" in msg and "(3, 5)" in msg and "(4, 5)" in msg


def test_hidden_layers_do_not_chain(model_dir):
    # hidden.1 expects 6 inputs but hidden.0 has 5 outputs.
    rng = np.random.default_rng(1)
    edit_weights(model_dir, lambda a: a.update({"hidden.1.weight": rng.normal(size=(3, 6)).astype(np.float32)}))
    msg = load_error(model_dir)
    assert "weights.npz" in msg and "'hidden.1.weight'" in msg and "(3, 6)" in msg and "expected (3, 5)" in msg


def test_fewer_hidden_sizes_than_saved_layers(model_dir):
    edit_config(model_dir, lambda c: c.update(hidden_sizes=[5]))
    msg = load_error(model_dir)
    # output.weight (3, 3) no longer chains after a single hidden layer of width 5.
    assert "weights.npz" in msg and "'output.weight'" in msg and "expected (3, 5)" in msg


@pytest.mark.parametrize("value", ["sigmoid", "ReLU", None, ""])
def test_activation_invalid(model_dir, value):
    edit_config(model_dir, lambda c: c.update(activation=value))
    msg = load_error(model_dir)
    assert "dan.json" in msg and "'activation'" in msg and "relu" in msg


def test_output_rows_differ_from_label_count(model_dir):
    edit_config(model_dir, lambda c: c.update(labels=["negative", "positive"]))
    msg = load_error(model_dir)
    assert "weights.npz" in msg and "'output.weight'" in msg and "(3, 3)" in msg and "label count" in msg


@pytest.mark.parametrize("name, shape", [
    ("hidden.0.bias", (4,)),
    ("hidden.1.bias", (5,)),
    ("output.bias", (2,)),
    ("output.bias", (4,)),
])
def test_bias_shape_wrong(model_dir, name, shape):
    edit_weights(model_dir, lambda a: a.update({name: np.zeros(shape, np.float32)}))
    msg = load_error(model_dir)
    assert "weights.npz" in msg and f"'{name}'" in msg and str(shape) in msg


@pytest.mark.parametrize("tokenizer, fragment", [
    ({"normalization": "NFX"}, "normalization"),
    ({"case": "upper"}, "case"),
    ({"max_tokens": 0}, "max_tokens"),
    ({"pattern": r"(\w+)"}, "capturing groups"),
    ({"pattern": "[a-"}, "does not compile"),
    ({"lowercase": True}, "unknown fields"),
    ("NFKC", "must be a mapping"),
])
def test_bad_tokenizer_spec_in_config(model_dir, tokenizer, fragment):
    edit_config(model_dir, lambda c: c.update(tokenizer=tokenizer))
    msg = load_error(model_dir)
    assert "dan.json" in msg and "field 'tokenizer'" in msg and fragment in msg


@pytest.mark.parametrize("oov", [{"policy": "drop"}, {}, "skip", None, {"policy": None}])
def test_oov_policy_invalid(model_dir, oov):
    edit_config(model_dir, lambda c: c.update(oov=oov))
    msg = load_error(model_dir)
    assert "dan.json" in msg and "'oov'" in msg


@pytest.mark.parametrize("token", ["<UNK>", "[unk]", None])
def test_unk_policy_token_not_in_vocab(model_dir, token):
    oov = {"policy": "unk"} if token is None else {"policy": "unk", "token": token}
    edit_config(model_dir, lambda c: c.update(oov=oov))
    msg = load_error(model_dir)
    assert "dan.json" in msg and "'oov'" in msg and repr(token) in msg
    if token is not None:  # a missing token is refused before the vocabulary is read
        assert "tokens.txt" in msg


def test_metadata_not_an_object(model_dir):
    edit_config(model_dir, lambda c: c.update(metadata=["seed", 1]))
    msg = load_error(model_dir)
    assert "dan.json" in msg and "'metadata'" in msg


# --- tokens.txt --------------------------------------------------------------------------------------------------

def write_vocab(model_dir: Path, data: bytes) -> None:
    (model_dir / "tokens.txt").write_bytes(data)


def test_duplicate_token(model_dir):
    write_vocab(model_dir, b"fast\nslow\nfast\ngreat\ncharger\n<unk>\n")
    msg = load_error(model_dir)
    assert "tokens.txt" in msg and "line 3" in msg and "'fast'" in msg and "line 1" in msg


@pytest.mark.parametrize("data, line", [
    (b"fast\n\nbroken\ngreat\ncharger\n<unk>\n", 2),  # empty line in the middle
    (b"fast\n \nbroken\ngreat\ncharger\n<unk>\n", 2),  # blank (space only)
    (b"fast\nslow\nbroken\ngreat\ncharger\n<unk>\n\n", 7),  # one newline too many at the end
    (b"\nslow\nbroken\ngreat\ncharger\n<unk>\n", 1),
    (b"fast\n\t\nbroken\ngreat\ncharger\n<unk>\n", 2),
])
def test_empty_token(model_dir, data, line):
    write_vocab(model_dir, data)
    msg = load_error(model_dir)
    assert "tokens.txt" in msg and f"line {line}" in msg and "empty or blank" in msg


@pytest.mark.parametrize("data", [b"", b"\n"])
def test_vocab_without_tokens(model_dir, data):
    write_vocab(model_dir, data)
    msg = load_error(model_dir)
    assert "tokens.txt" in msg and ("no tokens" in msg or "empty" in msg)


@pytest.mark.parametrize("data, rows", [
    (b"fast\nslow\nbroken\ngreat\n<unk>\n", 5),
    (b"fast\nslow\nbroken\ngreat\ncharger\n<unk>\nextra\n", 7),
])
def test_vocab_length_differs_from_table_rows(model_dir, data, rows):
    write_vocab(model_dir, data)
    msg = load_error(model_dir)
    assert "weights.npz" in msg and "'embedding'" in msg and "6 rows" in msg and f"{rows} tokens" in msg


def test_vocab_without_final_newline_is_accepted(model_dir):
    write_vocab(model_dir, "\n".join(VOCAB).encode())
    assert load_model(model_dir).vocab == VOCAB


def test_vocab_not_utf8(model_dir):
    write_vocab(model_dir, b"fast\nsl\xffow\nbroken\ngreat\ncharger\n<unk>\n")
    msg = load_error(model_dir)
    assert "tokens.txt" in msg and "line 2" in msg and "UTF-8" in msg


def test_vocab_latin1_encoded(model_dir):
    write_vocab(model_dir, "fast\nslow\nbroken\ngreat\ncharger\ncafé\n".encode("latin-1"))
    msg = load_error(model_dir)
    assert "tokens.txt" in msg and "line 6" in msg and "UTF-8" in msg


# --- weights --------------------------------------------------------------------------------------------------------

TENSORS = ["embedding", "hidden.0.weight", "hidden.0.bias", "hidden.1.weight", "hidden.1.bias",
           "output.weight", "output.bias"]


@pytest.mark.parametrize("name", TENSORS)
@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
def test_nan_or_inf_in_any_tensor(model_dir, name, bad):
    def poison(arrays):
        a = arrays[name].copy()
        a.flat[a.size - 1] = bad  # the last element
        arrays[name] = a
    edit_weights(model_dir, poison)
    last = tuple(int(i) - 1 for i in read_npz(model_dir)[name].shape)
    msg = load_error(model_dir)
    assert "weights.npz" in msg and f"'{name}'" in msg and "NaN or Inf" in msg and str(last) in msg


def test_inf_in_float16_tensor(model_dir):
    def poison(arrays):
        a = arrays["embedding"].astype(np.float16)
        a[2, 1] = np.inf
        arrays["embedding"] = a
    edit_weights(model_dir, poison)
    msg = load_error(model_dir)
    assert "'embedding'" in msg and "NaN or Inf" in msg and "(2, 1)" in msg


@pytest.mark.parametrize("name", ["embedding", "hidden.0.weight", "output.bias"])
@pytest.mark.parametrize("dtype", [np.int32, np.float64, np.int8, np.uint8, np.bool_])
def test_wrong_dtype(model_dir, name, dtype):
    edit_weights(model_dir, lambda a: a.update({name: a[name].astype(dtype)}))
    msg = load_error(model_dir)
    assert "weights.npz" in msg and f"'{name}'" in msg and np.dtype(dtype).name in msg and "float32 or float16" in msg


def test_wrong_dtype_in_safetensors(tmp_path):
    path = save_model(make_model(), tmp_path / "m", weights_format="safetensors")
    arrays = st_load(str(path / "weights.safetensors"))
    arrays["hidden.1.weight"] = arrays["hidden.1.weight"].astype(np.float64)
    st_save(arrays, str(path / "weights.safetensors"))
    msg = load_error(path)
    assert "weights.safetensors" in msg and "'hidden.1.weight'" in msg and "float64" in msg


@pytest.mark.parametrize("name, shape", [
    ("embedding", (24,)),
    ("embedding", (6, 4, 1)),
    ("hidden.0.weight", (20,)),
    ("output.weight", (1, 3, 3)),
    ("output.bias", (1, 3)),
    ("hidden.0.bias", ()),
])
def test_wrong_ndim(model_dir, name, shape):
    edit_weights(model_dir, lambda a: a.update({name: np.zeros(shape, np.float32)}))
    msg = load_error(model_dir)
    assert "weights.npz" in msg and f"'{name}'" in msg and str(shape) in msg and "dimensions" in msg


def test_extra_tensors(model_dir):
    edit_weights(model_dir, lambda a: a.update({"hidden.2.weight": np.zeros((2, 3), np.float32),
                                                "scale": np.ones(1, np.float32)}))
    msg = load_error(model_dir)
    assert "weights.npz" in msg and "['hidden.2.weight', 'scale']" in msg and "hidden_sizes" in msg


@pytest.mark.parametrize("name", TENSORS)
def test_missing_tensor(model_dir, name):
    edit_weights(model_dir, lambda a: a.pop(name))
    msg = load_error(model_dir)
    assert "weights.npz" in msg and f"'{name}' is missing" in msg


def test_missing_tensor_in_safetensors(tmp_path):
    path = save_model(make_model(), tmp_path / "m", weights_format="safetensors")
    arrays = st_load(str(path / "weights.safetensors"))
    del arrays["output.bias"]
    st_save(arrays, str(path / "weights.safetensors"))
    msg = load_error(path)
    assert "weights.safetensors" in msg and "'output.bias' is missing" in msg


def test_npz_with_object_array_is_refused_without_unpickling(model_dir):
    # np.savez pickles object arrays; the loader must not unpickle (allow_pickle=False).
    arrays = read_npz(model_dir)
    arrays["embedding"] = np.array([{"x": 1}], dtype=object)
    with open(model_dir / "weights.npz", "wb") as f:
        np.savez(f, **arrays)
    msg = load_error(model_dir)
    assert "weights.npz" in msg and "cannot be read" in msg


def truncation_points(size: int) -> list[int]:
    return [0, 1, 8, 30, size // 2, size - 22, size - 1]


@pytest.mark.parametrize("fmt", ["npz", "safetensors"])
def test_truncated_weights_file(tmp_path, fmt):
    path = save_model(make_model(), tmp_path / "m", weights_format=fmt)
    weights = path / f"weights.{fmt}"
    raw = weights.read_bytes()
    for cut in truncation_points(len(raw)):
        weights.write_bytes(raw[:cut])
        msg = load_error(path)
        assert f"weights.{fmt}" in msg and "cannot be read" in msg and "re-save" in msg, (cut, msg)


def test_npz_with_flipped_byte_in_tensor_data(model_dir):
    # np.savez stores members uncompressed; zipfile checks each member's CRC-32 on read.
    raw = bytearray((model_dir / "weights.npz").read_bytes())
    with zipfile.ZipFile(model_dir / "weights.npz") as z:
        info = z.getinfo("embedding.npy")
    raw[info.header_offset + 30 + len(info.filename) + info.compress_size - 4] ^= 0xFF  # inside the last float
    (model_dir / "weights.npz").write_bytes(bytes(raw))
    msg = load_error(model_dir)
    assert "weights.npz" in msg and "cannot be read" in msg


def test_safetensors_with_garbage_header(tmp_path):
    path = save_model(make_model(), tmp_path / "m", weights_format="safetensors")
    (path / "weights.safetensors").write_bytes((12).to_bytes(8, "little") + b'{"not json"}' + b"\0" * 16)
    msg = load_error(path)
    assert "weights.safetensors" in msg and "cannot be read" in msg


def test_save_rejects_unknown_weights_format(tmp_path):
    with pytest.raises(ModelError, match="'pt'"):
        save_model(make_model(), tmp_path / "m", weights_format="pt")
    assert not (tmp_path / "m").exists()


# --- atomic save ------------------------------------------------------------------------------------------------------

def siblings(parent: Path) -> list[str]:
    return sorted(p.name for p in parent.iterdir())


def test_save_replaces_an_existing_model_dir(tmp_path):
    target = tmp_path / "m"
    save_model(make_model(seed=1), target, weights_format="safetensors")
    (target / "notes.txt").write_text("stale")  # not part of the new model
    save_model(make_model(seed=2), target, weights_format="npz")
    assert siblings(tmp_path) == ["m"]  # no temp or backup dir left
    assert siblings(target) == ["dan.json", "tokens.txt", "weights.npz"]
    assert_same_model(load_model(target), make_model(seed=2))


@pytest.mark.parametrize("fmt", ["npz", "safetensors"])
def test_failure_mid_write_leaves_the_old_model(tmp_path, monkeypatch, fmt):
    target = tmp_path / "m"
    save_model(make_model(seed=1), target)
    before = {p.name: p.read_bytes() for p in target.iterdir()}

    def half_write(*args, **kwargs):
        # Write some bytes where the weights go, then fail like a full disk would.
        dest = args[1] if fmt == "safetensors" else args[0]
        if hasattr(dest, "write"):
            dest.write(b"PK\x03\x04partial")
        else:
            Path(dest).write_bytes(b"partial")
        raise OSError(28, "No space left on device")

    if fmt == "npz":
        monkeypatch.setattr(np, "savez", half_write)
    else:
        import safetensors.numpy
        monkeypatch.setattr(safetensors.numpy, "save_file", half_write)
    with pytest.raises(ModelError, match=r"writing the model failed \(No space left"):
        save_model(make_model(seed=2), target, weights_format=fmt)
    monkeypatch.undo()
    assert siblings(tmp_path) == ["m"]  # the temp dir was removed
    assert {p.name: p.read_bytes() for p in target.iterdir()} == before
    assert_same_model(load_model(target), make_model(seed=1))


def test_failure_mid_write_into_a_new_dir_leaves_nothing(tmp_path, monkeypatch):
    def boom(*args, **kwargs):
        raise OSError(28, "No space left on device")
    monkeypatch.setattr(np, "savez", boom)
    with pytest.raises(ModelError, match="writing the model failed"):
        save_model(make_model(), tmp_path / "new")
    assert siblings(tmp_path) == []


def test_save_creates_missing_parent_dirs(tmp_path):
    path = save_model(make_model(), tmp_path / "a" / "b" / "m")
    assert_same_model(load_model(path), make_model())


# --- defects reported to the lead (fail until fixed) ---------------------------------------------------------------

@pytest.mark.parametrize("value", [True, 1.0])
def test_bug_version_true_or_float_is_accepted(model_dir, value):
    # In Python True == 1 and 1.0 == 1, so `version != FORMAT_VERSION` lets them through.
    edit_config(model_dir, lambda c: c.update(version=value))
    msg = load_error(model_dir)
    assert "'version'" in msg


@pytest.mark.parametrize("token", [["<unk>"], {"t": 1}])
def test_bug_unhashable_unk_token_raises_type_error(model_dir, token):
    # `unk_token not in set(vocab)` raises TypeError for a list/dict token.
    edit_config(model_dir, lambda c: c.update(oov={"policy": "unk", "token": token}))
    msg = load_error(model_dir)
    assert "dan.json" in msg and "'oov'" in msg


def test_bug_npz_member_that_is_not_an_array(model_dir):
    # A zip member without the .npy suffix comes back from np.load as raw bytes, and
    # `_take_tensor` then fails with AttributeError ('bytes' has no attribute 'dtype').
    arrays = read_npz(model_dir)
    with zipfile.ZipFile(model_dir / "weights.npz", "w") as z:
        for key, value in arrays.items():
            if key == "embedding":
                z.writestr("embedding", b"not an array")
            else:
                with z.open(f"{key}.npy", "w") as f:
                    np.save(f, value)
    msg = load_error(model_dir)
    assert "weights.npz" in msg and "'embedding'" in msg


def test_bug_vocab_with_crlf_line_ends_is_accepted(model_dir):
    # A tokens.txt saved with Windows line ends loads silently with "\r" at the end of every
    # token; no tokenizer output can match such a token, so every text is all-OOV.
    write_vocab(model_dir, "".join(t + "\r\n" for t in VOCAB).encode())
    msg = load_error(model_dir)
    assert "tokens.txt" in msg and "line 1" in msg


def test_bug_failed_final_rename_loses_the_model_at_its_path(tmp_path, monkeypatch):
    # save_model moves the old dir to a backup, then renames the temp dir into place. If
    # that second rename fails, the except clause removes the temp dir but never moves the
    # backup back: the target path is gone and the old model sits in ".m.old-<pid>".
    target = tmp_path / "m"
    save_model(make_model(seed=1), target)
    real_replace = os.replace
    failed = []

    def replace(src, dst):
        if Path(dst) == target and not failed:  # only the first rename into place fails
            failed.append(src)
            raise OSError(5, "Input/output error")
        return real_replace(src, dst)

    monkeypatch.setattr(os, "replace", replace)
    with pytest.raises(ModelError, match="writing the model failed"):
        save_model(make_model(seed=2), target)
    monkeypatch.undo()
    assert target.is_dir(), f"old model no longer at {target}; siblings: {siblings(tmp_path)}"
    assert_same_model(load_model(target), make_model(seed=1))
