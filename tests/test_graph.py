"""The ONNX graph of a bundle (packer/graph.py, packer/inspect.export_onnx), by three independent paths.

The same (ids, counts) go through
  1. onnxruntime (the runtime's OrtBackend, external initializers handed in from the bundle),
  2. `onnx.reference.ReferenceEvaluator` (the ONNX project's Python implementation of the operator
     specification) on the self-contained model from `export_onnx`,
  3. the numpy forward pass (runtime.forward) on the table dequantised by packer.quantize,
and must agree. `onnx.checker` (the ONNX project's validator) must accept the exported model.
"""

from __future__ import annotations

import itertools

import numpy as np
import onnx
import pytest
from helpers import make_model, random_texts, token
from onnx import TensorProto
from onnx.reference import ReferenceEvaluator

from danpack.pack.inspect import export_onnx
from danpack.pack.build import PackOptions, pack_model
from danpack.pack.quantize import dequantize_rows
from danpack.runtime.backends import OrtBackend
from danpack.runtime.bundle import Bundle, decode_bundle
from danpack.runtime.classifier import Classifier
from danpack.runtime.forward import Layer, encode_batch, forward_logits, softmax

DIM = 16
HIDDEN = {"0": (), "1": (8,), "3": (12, 6, 5)}  # first hidden layer narrower than DIM: folding is possible
TOL = dict(rtol=1e-5, atol=1e-5)  # float32 paths summing in different orders: differences ~1e-7

CONFIGS = [
    pytest.param(h, act, q, fold, id=f"h{h}-{act}-{'int8' if q else 'f32'}-{'fold' if fold == 'yes' else 'nofold'}")
    for h, act, q, fold in itertools.product(HIDDEN, ("relu", "tanh"), (True, False), ("yes", "no"))
    if not (h == "0" and fold == "yes")  # nothing to fold without a hidden layer
]

_CACHE: dict = {}


def packed(tmp_path_factory, hidden: str, activation: str, quantize: bool, fold: str) -> Bundle:
    """One bundle per configuration, shared by the tests of this module."""
    key = (hidden, activation, quantize, fold)
    if key not in _CACHE:
        root = tmp_path_factory.mktemp("graph")
        seed = 2 * list(HIDDEN).index(hidden) + (activation == "tanh")  # same model for every dtype / fold
        model_dir = make_model(root, vocab_size=97, dim=DIM, hidden=HIDDEN[hidden], activation=activation, seed=seed)
        result = pack_model(model_dir, None, PackOptions(quantize=quantize, fold=fold))
        _CACHE[key] = decode_bundle(result.data, "test bundle")
    return _CACHE[key]


def numpy_path(bundle: Bundle, ids: np.ndarray, counts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Path 3: dequantise the whole table first (packer.quantize), then runtime.forward."""
    t = bundle.tensors
    table = dequantize_rows(t["table"], t["scales"]) if "scales" in t else t["table"]  # (R, W) float32
    layers = tuple(Layer(t.get(f"layer.{i}.weight"), t[f"layer.{i}.bias"], spec["activation"])
                   for i, spec in enumerate(bundle.manifest["layers"]))
    logits = forward_logits(table, layers, ids, counts)
    return softmax(logits), logits


def reference_path(ev: ReferenceEvaluator, ids: np.ndarray, counts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    probs, logits = ev.run(["probs", "logits"], {"ids": ids, "counts": counts})
    return probs, logits


def random_batch(rng: np.random.Generator, rows: int, batch: int, width: int, garbage_padding: bool = False):
    """(B, T) ids in [0, rows) padded with 0 (or with random in-range ids), (B,) counts incl. a 0."""
    counts = rng.integers(0, width + 1, size=batch).astype(np.int64)  # (B,)
    if batch:
        counts[0] = 0  # a text with no known token
        counts[-1] = width
    ids = rng.integers(0, rows, size=(batch, width)).astype(np.int64)  # (B, T)
    if batch:
        ids[-1, -1] = rows - 1  # the last row of the table
    if not garbage_padding:
        ids[np.arange(width)[None, :] >= counts[:, None]] = 0
    return ids, counts


def assert_three_agree(bundle: Bundle, ort: OrtBackend, ev: ReferenceEvaluator, ids, counts) -> np.ndarray:
    a, b, c = ort.run(ids, counts), reference_path(ev, ids, counts), numpy_path(bundle, ids, counts)
    for probs, logits in (a, b, c):
        assert probs.shape == logits.shape == (ids.shape[0], len(bundle.labels))
        assert probs.dtype == logits.dtype == np.float32
    np.testing.assert_allclose(a[1], c[1], **TOL, err_msg="logits: onnxruntime vs numpy")
    np.testing.assert_allclose(b[1], c[1], **TOL, err_msg="logits: onnx.reference vs numpy")
    np.testing.assert_allclose(a[0], c[0], **TOL, err_msg="probs: onnxruntime vs numpy")
    np.testing.assert_allclose(b[0], c[0], **TOL, err_msg="probs: onnx.reference vs numpy")
    return c[0]


@pytest.mark.parametrize("hidden,activation,quantize,fold", CONFIGS)
def test_three_paths_agree(tmp_path_factory, hidden, activation, quantize, fold):
    bundle = packed(tmp_path_factory, hidden, activation, quantize, fold)
    assert bundle.manifest["table"]["dtype"] == ("int8" if quantize else "float32")
    assert bundle.manifest["table"]["folded"] == (fold == "yes")
    exported = export_onnx(bundle)
    onnx.checker.check_model(exported, full_check=True)
    ort, ev = OrtBackend(bundle), ReferenceEvaluator(exported)
    rows = bundle.manifest["table"]["rows"]
    rng = np.random.default_rng(7)
    for batch, width in ((16, 9), (1, 1), (1, 5), (5, 1), (32, 30)):
        ids, counts = random_batch(rng, rows, batch, width)
        probs = assert_three_agree(bundle, ort, ev, ids, counts)
        np.testing.assert_allclose(probs.sum(axis=1), 1.0, atol=1e-6)
    # batch 0 (supported by all three on the pinned versions)
    empty = assert_three_agree(bundle, ort, ev, np.zeros((0, 1), np.int64), np.zeros(0, np.int64))
    assert empty.shape == (0, len(bundle.labels))


@pytest.mark.parametrize("hidden,activation,quantize,fold", [CONFIGS[0].values, CONFIGS[-1].values])
def test_padding_is_marked_only_by_counts(tmp_path_factory, hidden, activation, quantize, fold):
    # whatever in-range ids sit after a row's count, every path must ignore them
    bundle = packed(tmp_path_factory, hidden, activation, quantize, fold)
    ort, ev = OrtBackend(bundle), ReferenceEvaluator(export_onnx(bundle))
    rng = np.random.default_rng(11)
    ids, counts = random_batch(rng, bundle.manifest["table"]["rows"], 12, 8, garbage_padding=True)
    zeroed = ids.copy()
    zeroed[np.arange(8)[None, :] >= counts[:, None]] = 0
    garbage = assert_three_agree(bundle, ort, ev, ids, counts)
    np.testing.assert_allclose(garbage, numpy_path(bundle, zeroed, counts)[0], **TOL)


@pytest.mark.parametrize("hidden,activation,quantize,fold", [CONFIGS[0].values, CONFIGS[-1].values])
def test_empty_text_is_the_zero_mean(tmp_path_factory, hidden, activation, quantize, fold):
    # documented behaviour (runtime/forward.py): a text with no known token averages to the zero vector,
    # so its logits are the layers applied to 0 — computed here directly with numpy
    bundle = packed(tmp_path_factory, hidden, activation, quantize, fold)
    x = np.zeros((1, bundle.manifest["table"]["width"]), np.float32)
    for i, spec in enumerate(bundle.manifest["layers"]):
        w = bundle.tensors.get(f"layer.{i}.weight")
        x = (x if w is None else x @ w.T) + bundle.tensors[f"layer.{i}.bias"]
        x = np.maximum(x, 0) if spec["activation"] == "relu" else np.tanh(x) if spec["activation"] == "tanh" else x
    probs, logits = OrtBackend(bundle).run(np.zeros((1, 4), np.int64), np.zeros(1, np.int64))
    np.testing.assert_allclose(logits, x, **TOL)


def test_graph_keeps_large_tensors_external(tmp_path_factory):
    bundle = packed(tmp_path_factory, "3", "relu", True, "no")
    graph = onnx.ModelProto()
    graph.ParseFromString(bundle.graph)
    external = {t.name for t in graph.graph.initializer if t.data_location == TensorProto.EXTERNAL}
    assert external == set(bundle.tensors)  # table, scales, every layer tensor: held once, in the bundle
    assert len(bundle.graph) < 8000  # the graph itself is only a few KB of nodes
    assert {n.op_type for n in graph.graph.node} >= {"Gather", "Cast", "MatMul", "Gemm", "Softmax"}
    # the exported model embeds them, so it runs with no bundle around it
    exported = export_onnx(bundle)
    assert not any(t.data_location == TensorProto.EXTERNAL for t in exported.graph.initializer)


@pytest.mark.parametrize("pruned", ["skip", "rest"])
def test_last_row_of_the_table_is_reached(tmp_path_factory, pruned):
    # the token of the last vocabulary row (and, with 'rest', the pruned-rest row after it) is encoded
    # as its true row id, never -1 (onnxruntime's Gather would wrap -1 to the last row silently)
    root = tmp_path_factory.mktemp("lastrow")
    model_dir = make_model(root, vocab_size=40, dim=DIM, hidden=(8,), seed=5)
    corpus = root / "corpus.txt"
    corpus.write_text("".join(f"{token(i)} {token(39)}\n" for i in range(30)), encoding="utf-8")
    result = pack_model(model_dir, None, PackOptions(corpora=(str(corpus),), coverage=1.0, pruned=pruned,
                                                     measure=False))  # every text counts: no held-out slice
    bundle = decode_bundle(result.data)
    rows = bundle.manifest["table"]["rows"]
    assert rows == len(bundle.vocab) + (pruned == "rest") == 31 + (pruned == "rest")
    clf = Classifier(bundle, "onnxruntime")
    last_token = bundle.vocab[-1]
    assert clf.encoder.token_ids(last_token) == [len(bundle.vocab) - 1]
    texts = [last_token, token(35), "never-seen-word", "", f"{last_token} {token(35)} nope"]
    ids, counts = clf.encoder.encode(texts)
    assert ids.min() >= 0 and ids.max() <= rows - 1
    if pruned == "rest":
        assert clf.encoder.token_ids(token(35)) == [rows - 1]  # pruned token -> rest row, the last row
    assert ids.max() == rows - 1
    ev = ReferenceEvaluator(export_onnx(bundle))
    assert_three_agree(bundle, clf.backend, ev, ids, counts)
    # a text of one token: its logits are the layers applied to that single row, alone
    for text, row in ((last_token, len(bundle.vocab) - 1), (token(35), rows - 1)):
        if pruned == "skip" and text == token(35):
            assert clf.encoder.token_ids(text) == []  # pruned and skipped
            continue
        single = numpy_path(bundle, np.array([[row]]), np.array([1]))[1]
        np.testing.assert_allclose(clf.run([text])[1], single, **TOL)
        other = numpy_path(bundle, np.array([[0]]), np.array([1]))[1]
        assert not np.allclose(single, other)  # a wrapped or clamped id would be visible


def test_encoded_random_texts_agree(tmp_path_factory):
    # real texts through the encoder (unknown words, case, punctuation, empty) on a folded int8 bundle
    bundle = packed(tmp_path_factory, "1", "tanh", True, "yes")
    clf = Classifier(bundle, "onnxruntime")
    ids, counts = clf.encoder.encode(random_texts(bundle.vocab, 120, seed=3))
    assert (counts == 0).any()  # some texts have no known token
    assert_three_agree(bundle, clf.backend, ReferenceEvaluator(export_onnx(bundle)), ids, counts)


def test_encode_batch_pads_with_zero_not_minus_one():
    ids, counts = encode_batch([[5, 6, 7], [], [9]])
    assert ids.tolist() == [[5, 6, 7], [0, 0, 0], [9, 0, 0]] and counts.tolist() == [3, 0, 1]
    ids, counts = encode_batch([])
    assert ids.shape == (0, 1) and counts.shape == (0,)


def test_the_reader_allows_exactly_the_operators_the_packer_writes(tmp_path_factory):
    # runtime.bundle.GRAPH_OPS must list every operator of every configuration, and nothing more.
    from danpack.runtime.bundle import GRAPH_OPS

    written = set()
    for param in CONFIGS:
        bundle = packed(tmp_path_factory, *param.values)
        model = onnx.ModelProto()
        model.ParseFromString(bundle.graph)
        written |= {n.op_type for n in model.graph.node}
        assert {n.domain for n in model.graph.node} == {""}
    assert written == GRAPH_OPS


@pytest.mark.parametrize("hidden, activation, quantize, fold", [c.values for c in CONFIGS], ids=[c.id for c in CONFIGS])
def test_written_graph_passes_the_onnx_checker(tmp_path_factory, hidden, activation, quantize, fold):
    # runtime.graph writes the protobuf bytes by hand; onnx.checker (the ONNX specification's validator, full
    # check with shape inference) must accept them, and the embedded form must equal the export's.
    from danpack.pack.graph import build_graph, check_graph
    from danpack.runtime.graph import spec_from_tensors, write_graph

    bundle = packed(tmp_path_factory, hidden, activation, quantize, fold)
    model = onnx.ModelProto()
    model.ParseFromString(bundle.graph)
    check_graph(model)
    spec = spec_from_tensors(len(bundle.labels), quantize, bundle.manifest["layers"],
                             {n: t.shape for n, t in bundle.tensors.items()})
    assert write_graph(spec) == bundle.graph
    embedded = build_graph(spec, bundle.tensors)
    onnx.checker.check_model(embedded, full_check=True)
    exported = export_onnx(bundle)
    assert embedded.graph == exported.graph  # the export adds only the host's metadata and a doc string
    assert {p.key for p in exported.metadata_props} and not embedded.metadata_props


def test_reader_names_the_first_node_that_differs(tmp_path_factory):
    from danpack.runtime.graph import first_difference

    bundle = packed(tmp_path_factory, "1", "relu", True, "no")
    model = onnx.ModelProto()
    model.ParseFromString(bundle.graph)
    model.graph.node[2].op_type = "Identity"
    assert first_difference(model.SerializeToString(), bundle.graph) == (
        "node 3 is node Identity 'positions', expected node Range 'positions'")
    model.ParseFromString(bundle.graph)
    model.graph.node[-1].attribute[0].i = 0  # Softmax over axis 0: same operator and name, other attribute
    assert first_difference(model.SerializeToString(), bundle.graph) == (
        f"node {len(model.graph.node)} (node Softmax 'probs') differs in its inputs, attributes or contents")
    assert first_difference(bundle.graph, bundle.graph) is None
