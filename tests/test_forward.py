"""Tests of the one forward pass (runtime/forward.py) and the encoder (runtime/encode.py).

The oracle is independent of the code under test: plain Python loops over `math`
(no numpy), following the DAN definition — mean of the known tokens' embedding rows,
then z = W x + b with relu (max(0, z)) or tanh per hidden layer, then softmax
exp(z_i - max z) / sum_j exp(z_j - max z) (the published, max-shifted formula;
common practice). scipy.special.softmax is a second external reference.
Tolerance 1e-5: the code under test computes in float32, the oracle in float64.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.special
from hypothesis import given, settings
from hypothesis import strategies as st

from danpack.runtime.encode import Encoder
from danpack.runtime.forward import Layer, encode_batch, forward_logits, mean_embedding, run_layers, softmax
from danpack.runtime.tokenize import Tokenizer, TokenizerSpec

TOL = dict(rtol=1e-5, atol=1e-5)


# --- the oracle: plain Python, math only ----------------------------------------------------------

def py_mean(table: list[list[float]], ids: list[int]) -> list[float]:
    """Mean of the rows named by ids; the zero vector for no ids."""
    dim = len(table[0])
    total = [0.0] * dim
    for i in ids:
        for d in range(dim):
            total[d] += table[i][d]
    return [t / len(ids) for t in total] if ids else total


def py_layer(x: list[float], weight: list[list[float]] | None, bias: list[float], act: str | None) -> list[float]:
    """One feed-forward layer; weight None means x already went through the matmul."""
    if weight is None:
        z = [x[o] + bias[o] for o in range(len(bias))]
    else:
        z = [sum(weight[o][i] * x[i] for i in range(len(x))) + bias[o] for o in range(len(bias))]
    if act == "relu":
        return [max(0.0, v) for v in z]
    if act == "tanh":
        return [math.tanh(v) for v in z]
    return z


def py_softmax(z: list[float]) -> list[float]:
    top = max(z)
    e = [math.exp(v - top) for v in z]
    s = sum(e)
    return [v / s for v in e]


def py_logits(table, layers, ids):
    """layers: list of (weight-or-None as nested lists, bias list, activation)."""
    x = py_mean(table, ids)
    for weight, bias, act in layers:
        x = py_layer(x, weight, bias, act)
    return x


def as_lists(layers: tuple[Layer, ...]):
    return [(None if l.weight is None else l.weight.tolist(), l.bias.tolist(), l.activation) for l in layers]


def make_layers(rng, dim: int, hidden: tuple[int, ...], classes: int, act: str) -> tuple[Layer, ...]:
    layers, width = [], dim
    for i, size in enumerate((*hidden, classes)):
        w = (rng.normal(size=(size, width)) / math.sqrt(width)).astype(np.float32)
        b = rng.normal(scale=0.3, size=size).astype(np.float32)
        layers.append(Layer(w, b, act if i < len(hidden) else None))  # the logits layer has none
        width = size
    return tuple(layers)


def random_id_lists(rng, vocab: int, batch: int, max_len: int) -> list[list[int]]:
    return [rng.integers(0, vocab, size=int(rng.integers(0, max_len + 1))).tolist() for _ in range(batch)]


# --- encode_batch -------------------------------------------------------------------------------------

def test_encode_batch_pads_with_zero_and_counts():
    ids, counts = encode_batch([[3, 1], [], [2, 2, 5]])
    assert ids.dtype == np.int64 and counts.dtype == np.int64
    np.testing.assert_array_equal(ids, [[3, 1, 0], [0, 0, 0], [2, 2, 5]])
    np.testing.assert_array_equal(counts, [2, 0, 3])


def test_encode_batch_empty_inputs_keep_a_width_of_one():
    ids, counts = encode_batch([])
    assert ids.shape == (0, 1) and counts.shape == (0,)
    ids, counts = encode_batch([[]])
    assert ids.tolist() == [[0]] and counts.tolist() == [0]  # padding is id 0 (the bundle format, rule 7)


@pytest.mark.parametrize("batch", [1, 2, 16, 17, 300])  # each fill path of encode_batch and its edges
def test_encode_batch_matches_plain_python_padding(batch):
    rng = np.random.default_rng(batch)
    lists = random_id_lists(rng, 1000, batch, 40)
    width = max([len(x) for x in lists] + [1])
    expected = [x + [0] * (width - len(x)) for x in lists]  # the oracle: plain Python lists
    ids, counts = encode_batch(lists)
    assert ids.dtype == np.int64 and counts.dtype == np.int64 and ids.shape == (batch, width)
    assert ids.tolist() == expected and counts.tolist() == [len(x) for x in lists]


# --- mean embedding ---------------------------------------------------------------------------------------

def test_mean_embedding_matches_the_oracle():
    rng = np.random.default_rng(0)
    table = rng.normal(size=(20, 7)).astype(np.float32)
    lists = [[0], [1, 2, 3], [5, 5, 5, 9], [19, 0, 4, 4, 11, 2], []]
    got = mean_embedding(table, *encode_batch(lists))
    assert got.shape == (5, 7) and got.dtype == np.float32
    expected = [py_mean(table.tolist(), ids) for ids in lists]
    np.testing.assert_allclose(got, expected, **TOL)


def test_repeated_tokens_count_each_time():
    table = np.array([[1.0, 0.0], [0.0, 3.0]], np.float32)
    got = mean_embedding(table, *encode_batch([[0, 0, 1]]))
    np.testing.assert_allclose(got, [[2 / 3, 1.0]], **TOL)


def test_no_known_token_gives_the_zero_vector():
    table = np.full((4, 3), 7.0, np.float32)
    got = mean_embedding(table, *encode_batch([[], [2]]))
    np.testing.assert_array_equal(got, [[0, 0, 0], [7, 7, 7]])
    assert np.isfinite(got).all()


def test_padding_ids_are_ignored_whatever_their_value():
    rng = np.random.default_rng(1)
    table = rng.normal(size=(10, 4)).astype(np.float32)
    table[9] = 1e6  # a huge row: any leak through the padding would show
    ids, counts = encode_batch([[1, 2], [3, 4, 5, 6, 7]])
    ids_other = ids.copy()
    ids_other[0, 2:] = 9  # same counts, different padding ids
    a = mean_embedding(table, ids, counts)
    b = mean_embedding(table, ids_other, counts)
    np.testing.assert_array_equal(a, b)
    np.testing.assert_allclose(a[0], py_mean(table.tolist(), [1, 2]), **TOL)


# --- forward pass vs the oracle ----------------------------------------------------------------------------

@pytest.mark.parametrize("hidden", [(), (6,), (8, 5, 4)])
@pytest.mark.parametrize("act", ["relu", "tanh"])
def test_forward_logits_and_softmax_match_the_oracle(hidden, act):
    rng = np.random.default_rng(len(hidden) * 10 + (act == "tanh"))
    table = rng.normal(size=(30, 6)).astype(np.float32)
    layers = make_layers(rng, 6, hidden, 3, act)
    assert [l.activation for l in layers] == [act] * len(hidden) + [None]
    lists = random_id_lists(rng, 30, batch=9, max_len=12) + [[], [29]]
    logits = forward_logits(table, layers, *encode_batch(lists))
    expected = [py_logits(table.tolist(), as_lists(layers), ids) for ids in lists]
    assert logits.shape == (11, 3) and logits.dtype == np.float32
    np.testing.assert_allclose(logits, expected, **TOL)
    np.testing.assert_allclose(softmax(logits), [py_softmax(z) for z in expected], **TOL)


def test_relu_actually_clips_in_the_cases_tested():
    # Guard against a vacuous relu check: some hidden pre-activations must be negative.
    rng = np.random.default_rng(10)
    table = rng.normal(size=(30, 6)).astype(np.float32)
    layers = make_layers(rng, 6, (6,), 3, "relu")
    x = mean_embedding(table, *encode_batch(random_id_lists(rng, 30, 9, 12)))
    pre = x @ layers[0].weight.T + layers[0].bias
    assert (pre < 0).any() and (pre > 0).any()
    relu = run_layers(x, layers[:1])
    np.testing.assert_allclose(relu, [py_layer(r, layers[0].weight.tolist(), layers[0].bias.tolist(), "relu")
                                      for r in x.tolist()], **TOL)


def test_text_without_known_token_gives_the_output_of_the_zero_vector():
    rng = np.random.default_rng(2)
    table = rng.normal(size=(5, 4)).astype(np.float32)
    layers = make_layers(rng, 4, (3,), 2, "tanh")
    encoder = Encoder(Tokenizer(), ["fast", "slow", "ok", "bad", "good"], oov_id=None)
    ids, counts = encoder.encode(["zzz qqq", "", "!!!"])
    assert counts.tolist() == [0, 0, 0]
    logits = forward_logits(table, layers, ids, counts)
    zero = py_logits(table.tolist(), as_lists(layers), [])  # the mean of nothing is the zero vector
    for row in logits:
        np.testing.assert_allclose(row, zero, **TOL)
    # and that is what run_layers gives on zeros
    np.testing.assert_allclose(run_layers(np.zeros((1, 4), np.float32), layers)[0], zero, **TOL)


def test_padding_never_changes_results():
    rng = np.random.default_rng(3)
    table = rng.normal(size=(50, 8)).astype(np.float32)
    layers = make_layers(rng, 8, (6, 5), 4, "relu")
    short = [4, 17, 4]
    long = rng.integers(0, 50, size=400).tolist()
    alone = forward_logits(table, layers, *encode_batch([short]))
    batched = forward_logits(table, layers, *encode_batch([long, short, [], long[:7]]))
    np.testing.assert_allclose(batched[1], alone[0], **TOL)
    np.testing.assert_allclose(batched[1], py_logits(table.tolist(), as_lists(layers), short), **TOL)
    np.testing.assert_allclose(batched[0], py_logits(table.tolist(), as_lists(layers), long), **TOL)


def test_batch_of_one_and_empty_batch():
    rng = np.random.default_rng(4)
    table = rng.normal(size=(10, 3)).astype(np.float32)
    layers = make_layers(rng, 3, (4,), 2, "tanh")
    one = forward_logits(table, layers, *encode_batch([[1, 2, 3]]))
    assert one.shape == (1, 2)
    np.testing.assert_allclose(one[0], py_logits(table.tolist(), as_lists(layers), [1, 2, 3]), **TOL)
    none = forward_logits(table, layers, *encode_batch([]))
    assert none.shape == (0, 2)
    assert softmax(none).shape == (0, 2)


@settings(max_examples=40, deadline=None, database=None)  # no .hypothesis folder in the cwd
@given(st.integers(0, 2**32 - 1), st.integers(1, 3), st.sampled_from(["relu", "tanh"]))
def test_forward_matches_the_oracle_on_random_shapes(seed, depth, act):
    rng = np.random.default_rng(seed)
    vocab, dim, classes = int(rng.integers(1, 40)), int(rng.integers(1, 9)), int(rng.integers(2, 6))
    hidden = tuple(int(h) for h in rng.integers(1, 9, size=depth - 1))
    table = rng.normal(size=(vocab, dim)).astype(np.float32)
    layers = make_layers(rng, dim, hidden, classes, act)
    lists = random_id_lists(rng, vocab, batch=int(rng.integers(1, 6)), max_len=20)
    logits = forward_logits(table, layers, *encode_batch(lists))
    expected = [py_logits(table.tolist(), as_lists(layers), ids) for ids in lists]
    np.testing.assert_allclose(logits, expected, **TOL)


# --- int8 table with per-row scales --------------------------------------------------------------------------

def test_scales_path_equals_the_float_path_on_the_dequantised_table():
    rng = np.random.default_rng(5)
    q = rng.integers(-127, 128, size=(40, 6)).astype(np.int8)  # (V, D) int8
    scales = rng.uniform(1e-3, 0.05, size=40).astype(np.float32)  # (V,) one scale per row
    layers = make_layers(rng, 6, (5,), 3, "relu")
    lists = random_id_lists(rng, 40, batch=8, max_len=15) + [[], [39, 39]]
    ids, counts = encode_batch(lists)
    # Dequantisation: x = q * scale (ONNX DequantizeLinear with zero point 0).
    dequant = q.astype(np.float32) * scales[:, None]
    got = forward_logits(q, layers, ids, counts, scales=scales)
    np.testing.assert_allclose(got, forward_logits(dequant, layers, ids, counts), **TOL)
    # ... and against the oracle, dequantising in plain Python.
    table = [[int(v) * float(s) for v in row] for row, s in zip(q.tolist(), scales.tolist())]
    expected = [py_logits(table, as_lists(layers), x) for x in lists]
    np.testing.assert_allclose(got, expected, **TOL)


def test_scales_mean_embedding_with_padding_row_zero_scaled_high():
    q = np.array([[127, -127], [1, 2], [-3, 4]], np.int8)
    scales = np.array([100.0, 0.5, 0.25], np.float32)  # row 0 is also the padding id
    got = mean_embedding(q, *encode_batch([[1], [2, 1, 2]]), scales=scales)
    np.testing.assert_allclose(got, [[0.5, 1.0], [(-0.75 + 0.5 - 0.75) / 3, (1.0 + 1.0 + 1.0) / 3]], **TOL)


# --- folded first layer ---------------------------------------------------------------------------------------

@pytest.mark.parametrize("act", ["relu", "tanh"])
@pytest.mark.parametrize("rest", [(), (4,)])
def test_folded_layer_equals_the_matmul_applied_to_the_table(act, rest):
    # Linearity: mean(E[ids]) Wᵀ == mean(E[ids] Wᵀ), so the first layer's matmul can be
    # pre-applied to every row of the table.
    rng = np.random.default_rng(6)
    table = rng.normal(size=(25, 12)).astype(np.float32)
    layers = make_layers(rng, 12, (5, *rest), 3, act)
    first = layers[0]
    # Folded table computed in plain Python: row v of E Wᵀ.
    folded_rows = [py_layer(row, first.weight.tolist(), [0.0] * 5, None) for row in table.tolist()]
    folded = np.array(folded_rows, np.float32)  # (V, 5)
    folded_layers = (Layer(None, first.bias, first.activation), *layers[1:])
    lists = random_id_lists(rng, 25, batch=10, max_len=30) + [[]]
    ids, counts = encode_batch(lists)
    np.testing.assert_allclose(forward_logits(folded, folded_layers, ids, counts),
                               forward_logits(table, layers, ids, counts), **TOL)
    expected = [py_logits(folded_rows, as_lists(folded_layers), x) for x in lists]
    np.testing.assert_allclose(forward_logits(folded, folded_layers, ids, counts), expected, **TOL)


def test_folded_layer_with_scales():
    # Folding then int8: the scales path must also feed a weight-less first layer.
    rng = np.random.default_rng(7)
    q = rng.integers(-127, 128, size=(12, 4)).astype(np.int8)
    scales = rng.uniform(0.01, 0.02, size=12).astype(np.float32)
    layers = (Layer(None, rng.normal(size=4).astype(np.float32), "relu"),
              Layer(rng.normal(size=(2, 4)).astype(np.float32), rng.normal(size=2).astype(np.float32), None))
    lists = [[0, 1, 2], [11], []]
    got = forward_logits(q, layers, *encode_batch(lists), scales=scales)
    table = [[int(v) * float(s) for v in row] for row, s in zip(q.tolist(), scales.tolist())]
    np.testing.assert_allclose(got, [py_logits(table, as_lists(layers), x) for x in lists], **TOL)


# --- softmax -----------------------------------------------------------------------------------------------------

@pytest.mark.parametrize("logits", [
    [[1000.0, 0.0, -1000.0]],
    [[1e4, 1e4 - 1.0, -1e4]],
    [[88.8, 88.7, 0.0]],  # exp(88.8) overflows float32 without the max shift (max ≈ 3.4e38)
    [[-1e4, -1e4 - 2.0, -1e4 - 50.0]],  # all very negative: underflows without the shift
    [[1e30, -1e30]],
    [[5.0, 5.0, 5.0, 5.0]],
])
def test_softmax_of_large_logits_is_finite_and_matches_the_oracle(logits):
    x = np.array(logits, np.float32)
    p = softmax(x)
    assert np.isfinite(p).all()
    np.testing.assert_allclose(p.sum(axis=-1), 1.0, **TOL)
    np.testing.assert_allclose(p, [py_softmax(row) for row in x.astype(np.float64).tolist()], **TOL)
    np.testing.assert_allclose(p, scipy.special.softmax(x.astype(np.float64), axis=-1), **TOL)


def test_softmax_is_row_wise():
    x = np.array([[0.0, 1.0], [100.0, 100.0], [-3.0, 2.0]], np.float32)
    np.testing.assert_allclose(softmax(x), [py_softmax(r) for r in x.tolist()], **TOL)


# --- encoder and OOV policies --------------------------------------------------------------------------------------

VOCAB = ["fast", "slow", "charger", "broken", "👍", "<unk>"]


def test_encoder_skip_policy_drops_unknown_tokens():
    enc = Encoder(Tokenizer(), VOCAB, oov_id=None)
    assert enc.token_ids("Fast charger, zzz 👍") == [0, 2, 4]  # "," and "zzz" are unknown
    ids, counts = enc.encode(["Fast charger, zzz 👍", "qqq", "slow"])
    np.testing.assert_array_equal(ids, [[0, 2, 4], [0, 0, 0], [1, 0, 0]])
    np.testing.assert_array_equal(counts, [3, 0, 1])


def test_encoder_oov_id_policy_maps_unknown_tokens_to_the_unk_row():
    enc = Encoder(Tokenizer(), VOCAB, oov_id=5)
    assert enc.token_ids("Fast charger, zzz 👍") == [0, 2, 5, 5, 4]
    ids, counts = enc.encode(["qqq", ""])
    np.testing.assert_array_equal(counts, [1, 0])
    assert ids[0, 0] == 5


def test_encoder_respects_the_tokenizer_cap():
    enc = Encoder(Tokenizer(TokenizerSpec(max_tokens=2)), VOCAB, oov_id=5)
    assert enc.token_ids("zzz fast slow charger") == [5, 0]


@pytest.mark.parametrize("oov_id", [None, 5])
def test_end_to_end_texts_match_the_oracle(oov_id):
    # Texts -> tokens (the one tokenizer) -> ids by a plain dict lookup -> oracle.
    rng = np.random.default_rng(8)
    table = rng.normal(size=(len(VOCAB), 5)).astype(np.float32)
    layers = make_layers(rng, 5, (4,), 3, "tanh")
    texts = ["FAST charger!!", "broken broken slow zzz", "nothing known", "👍👍 fast", ""]
    enc = Encoder(Tokenizer(), VOCAB, oov_id)
    got = softmax(forward_logits(table, layers, *enc.encode(texts)))
    index = {t: i for i, t in enumerate(VOCAB)}
    expected = []
    for text in texts:
        ids = []
        for token in Tokenizer().tokenize(text):
            if token in index:
                ids.append(index[token])
            elif oov_id is not None:
                ids.append(oov_id)
        expected.append(py_softmax(py_logits(table.tolist(), as_lists(layers), ids)))
    np.testing.assert_allclose(got, expected, **TOL)


def test_skip_and_unk_policies_give_different_outputs_for_unknown_words():
    rng = np.random.default_rng(9)
    table = rng.normal(size=(len(VOCAB), 3)).astype(np.float32)
    layers = make_layers(rng, 3, (), 2, "relu")
    skip = forward_logits(table, layers, *Encoder(Tokenizer(), VOCAB, None).encode(["fast zzz"]))
    unk = forward_logits(table, layers, *Encoder(Tokenizer(), VOCAB, 5).encode(["fast zzz"]))
    np.testing.assert_allclose(skip[0], py_logits(table.tolist(), as_lists(layers), [0]), **TOL)
    np.testing.assert_allclose(unk[0], py_logits(table.tolist(), as_lists(layers), [0, 5]), **TOL)
    assert not np.allclose(skip, unk)
