"""Writes the adversarial corpus: tiny crafted bad bundles, each with the exact error the reader must give.

Run from the repository root: `python tests/adversarial/make_corpus.py` (rewrites this folder's *.bundle,
expected.json and README.md). Every file starts from one real, tiny bundle packed by `danpack pack` from a
seeded 24-token model of the demo scenario (comments on public EV chargers). Damage made below the checksum
(byte cuts and flips) is caught by it; damage made above it (a valid msgpack tree of the wrong shape, a bad
graph, a lying probe) is re-encoded with a valid sha256 so that only the reader's own checks can catch it.
"""

from __future__ import annotations

import copy
import hashlib
import json
import struct
import sys
import tempfile
import zlib
from pathlib import Path

import msgpack
import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parents[1]))  # the repository root, when run as a script

import onnx  # noqa: E402

from danpack.pack.bundle import encode_bundle, encode_vocab  # noqa: E402
from danpack.model import FloatModel, save_model  # noqa: E402
from danpack.pack.build import PackOptions, pack_model  # noqa: E402
from danpack.runtime.forward import Layer  # noqa: E402

MAX_FILE = 6144  # each corpus file stays below this many bytes (commit-sized)
SOURCE = "{source}"  # stands for the file name or path in the recorded messages
BACKENDS = ("onnxruntime", "numpy")
TOKENS = (
    "charger", "slow", "fast", "card", "payment", "app", "cable", "broken", "screen", "queue", "kw", "refund",
    "plug", "stuck", "great", "never", "worked", "price", "receipt", "connector", "wait", "full", "bay", "cafe",
)
LABELS = ("payment", "connector_cable", "charging_speed")


def build_model(seed: int = 7, dim: int = 8, hidden: int = 6) -> FloatModel:
    """A seeded float DAN over TOKENS: dim-wide table, one relu layer of `hidden`, three labels."""
    rng = np.random.default_rng(seed)
    hidden_layer = Layer(rng.normal(size=(hidden, dim)).astype(np.float32), rng.normal(size=hidden).astype(np.float32), "relu")
    output = Layer(rng.normal(size=(len(LABELS), hidden)).astype(np.float32), rng.normal(size=len(LABELS)).astype(np.float32), None)
    return FloatModel(TOKENS, rng.normal(size=(len(TOKENS), dim)).astype(np.float32), (hidden_layer, output), LABELS)


def build_base_bundle(workdir: Path) -> bytes:
    """Pack the seeded model (first hidden layer folded, int8 table, skip policy) and return the bundle bytes."""
    save_model(build_model(), workdir / "model")
    return pack_model(workdir / "model", None, PackOptions()).data


# --- tools for crafting ---------------------------------------------------------------------------------------

def split(data: bytes) -> tuple[dict, dict]:
    """(outer map, payload tree) of a bundle."""
    outer = msgpack.unpackb(data, raw=False)
    return outer, msgpack.unpackb(outer["payload"], raw=False)


def seal(body: object) -> bytes:
    """Any payload tree, msgpack-encoded and wrapped with a valid sha256 (so only the reader's checks catch it)."""
    return encode_bundle(msgpack.packb(body, use_bin_type=True))


def seal_raw(payload: bytes) -> bytes:
    """Raw payload bytes with a valid sha256."""
    return encode_bundle(payload)


def with_body(base: bytes, edit) -> bytes:
    """Apply `edit(body)` to a deep copy of the payload tree, then seal it."""
    body = copy.deepcopy(split(base)[1])
    edit(body)
    return seal(body)


def with_outer(base: bytes, edit) -> bytes:
    """Apply `edit(outer)` to the outer map and re-encode it (the payload and its digest untouched)."""
    outer = dict(split(base)[0])
    edit(outer)
    return msgpack.packb(outer, use_bin_type=True)


def with_graph(base: bytes, edit) -> bytes:
    """Apply `edit(model)` to the parsed ONNX graph, re-serialise it into the payload and seal it."""
    body = copy.deepcopy(split(base)[1])
    model = onnx.ModelProto()
    model.ParseFromString(body["graph"])
    edit(model)
    body["graph"] = model.SerializeToString()
    return seal(body)


def flip(data: bytes, offset: int, mask: int = 0x01) -> bytes:
    out = bytearray(data)
    out[offset] ^= mask
    return bytes(out)


def nested(depth: int, leaf: bytes = b"\xc0") -> bytes:
    """msgpack bytes of `depth` one-element arrays around a nil."""
    return b"\x91" * depth + leaf


def tensor(body: dict, name: str) -> dict:
    return body["tensors"][name]


def set_path(body: dict, path: tuple, value) -> None:
    node = body
    for key in path[:-1]:
        node = node[key]
    node[path[-1]] = value


def edit_value(path: tuple, value):
    return lambda body: set_path(body, path, value)


def _vocab_bytes(body: dict) -> bytes:
    """The payload's vocabulary, inflated: the tokens joined by newlines, as UTF-8."""
    return zlib.decompress(body["vocab"])


def edit_vocab(edit):
    """Apply `edit(text)` to the inflated vocabulary and deflate it again as the packer does."""
    def apply(body: dict) -> None:
        body["vocab"] = encode_vocab(edit(_vocab_bytes(body).decode("utf-8")).split("\n"))
    return apply


def payload_offset(data: bytes) -> int:
    outer = split(data)[0]
    return data.index(outer["payload"])


def _bin_header(data: bytes) -> int:
    """Bytes of the msgpack bin header in front of the payload (bin8, bin16 or bin32)."""
    size = len(split(data)[0]["payload"])
    return 2 if size < 1 << 8 else 3 if size < 1 << 16 else 5


def _rename_initializer(model: onnx.ModelProto, old: str, new: str) -> None:
    for init in model.graph.initializer:
        if init.name == old:
            init.name = new
    for node in model.graph.node:
        node.input[:] = [new if i == old else i for i in node.input]


def _set_dims(model: onnx.ModelProto, name: str, dims: list[int]) -> None:
    for init in model.graph.initializer:
        if init.name == name:
            del init.dims[:]
            init.dims.extend(dims)


def _node_input(model: onnx.ModelProto, node_name: str, index: int, value: str) -> None:
    for node in model.graph.node:
        if node.name == node_name:
            node.input[index] = value


def _rename_output(model: onnx.ModelProto, old: str, new: str) -> None:
    for out in model.graph.output:
        if out.name == old:
            out.name = new
    for node in model.graph.node:
        node.output[:] = [new if o == old else o for o in node.output]
        node.input[:] = [new if i == old else i for i in node.input]


def _bad_utf8_node_name(graph: bytes) -> bytes:
    """The graph with the 2-byte name of one node replaced by an invalid UTF-8 sequence (same length)."""
    needle = b"\x1a\x07width_t"  # NodeProto.name (field 3, length 7) of the first node
    start = graph.index(needle) + 2
    return graph[:start] + b"\xff\xfe" + graph[start + 2 :]


def _with_raw_graph(base: bytes, edit) -> bytes:
    body = copy.deepcopy(split(base)[1])
    body["graph"] = edit(body["graph"])
    return seal(body)


def _mismatched_probe(body: dict) -> None:
    first = body["manifest"]["probe"]["probs"][0]
    body["manifest"]["probe"]["probs"][0] = first[1:] + first[:1]  # same numbers, rotated: sums still 1


def _add_loop(model: onnx.ModelProto) -> None:
    """A Loop of 2**62 iterations: valid ONNX that would hang the load-time probe forever."""
    body = onnx.helper.make_graph(
        [onnx.helper.make_node("Identity", ["c"], ["c_out"])], "spin",
        [onnx.helper.make_tensor_value_info("i", onnx.TensorProto.INT64, []),
         onnx.helper.make_tensor_value_info("c", onnx.TensorProto.BOOL, [])],
        [onnx.helper.make_tensor_value_info("c_out", onnx.TensorProto.BOOL, [])])
    model.graph.initializer.extend([onnx.numpy_helper.from_array(np.array(2**62, np.int64), "trips"),
                                    onnx.numpy_helper.from_array(np.array(True), "go")])
    model.graph.node.append(onnx.helper.make_node("Loop", ["trips", "go"], [], body=body))


def _insert_before_logits(model: onnx.ModelProto, nodes: list, inits: list, result: str) -> None:
    """Insert `nodes` (reading the last layer's output `x`) before the logits Identity, which then reads `result`."""
    identity = next(i for i, n in enumerate(model.graph.node) if n.name == "logits")
    x = model.graph.node[identity].input[0]
    for node in nodes:
        node.input[:] = [x if i == "x" else i for i in node.input]
    model.graph.node[identity].input[0] = result
    for offset, node in enumerate(nodes):
        model.graph.node.insert(identity + offset, node)
    model.graph.initializer.extend(inits)


def _back_door(model: onnx.ModelProto, row: int = 5, push: float = 40.0 * 24) -> None:
    """+40 on the first logit for every text holding the token of `row`: allowed operators and one inline tensor.
    `push` is divided by the text's token count (the mean), so a long text still gets a large push."""
    rows = next(t for t in model.graph.initializer if t.name == "table").dims[0]
    spy = np.zeros((rows, len(LABELS)), np.float32)
    spy[row, 0] = push
    make = onnx.helper.make_node
    _insert_before_logits(model, [
        make("Gather", ["spy", "ids"], ["spy_rows"], name="spy_rows"),  # (B, T, C)
        make("MatMul", ["token_weight3", "spy_rows"], ["spy3"], name="spy3"),  # (B, 1, C)
        make("Squeeze", ["spy3", "axis_1"], ["spy_z"], name="spy_z"),  # (B, C)
        make("Add", ["x", "spy_z"], ["spy_out"], name="spy_out"),
    ], [onnx.numpy_helper.from_array(spy, "spy")], "spy_out")


def _swap_small_batches(model: onnx.ModelProto) -> None:
    """Logits reversed whenever fewer than 8 texts are in a batch (single answers wrong, batches right)."""
    make = onnx.helper.make_node
    _insert_before_logits(model, [
        make("Shape", ["ids"], ["batch_n"], name="batch_n", start=0, end=1),  # (1,)
        make("Less", ["batch_n", "eight"], ["small_b"], name="small_b"),
        make("Cast", ["small_b"], ["small"], name="small", to=onnx.TensorProto.FLOAT),  # (1,)
        make("Gather", ["x", "reverse"], ["swapped"], name="swapped", axis=1),  # (B, C)
        make("Mul", ["x", "minus_one"], ["neg_x"], name="neg_x"),
        make("Add", ["swapped", "neg_x"], ["delta"], name="delta"),
        make("Mul", ["delta", "small"], ["delta_small"], name="delta_small"),
        make("Add", ["x", "delta_small"], ["mixed"], name="mixed"),
    ], [onnx.numpy_helper.from_array(np.array([8], np.int64), "eight"),
        onnx.numpy_helper.from_array(np.arange(len(LABELS))[::-1].copy(), "reverse"),
        onnx.numpy_helper.from_array(np.array(-1.0, np.float32), "minus_one")], "mixed")


def _range_grows(model: onnx.ModelProto) -> None:
    """Range's limit multiplied by an inline 10**6: memory grows with the text, past what the probe tries."""
    make = onnx.helper.make_node
    at = next(i for i, n in enumerate(model.graph.node) if n.name == "positions")
    model.graph.node.insert(at, make("Mul", ["width_s", "million"], ["width_big"], name="width_big"))
    model.graph.node[at + 1].input[1] = "width_big"
    model.graph.initializer.append(onnx.numpy_helper.from_array(np.array(10**6, np.int64), "million"))


def _set_constant(model: onnx.ModelProto, name: str, value: np.ndarray) -> None:
    for i, init in enumerate(model.graph.initializer):
        if init.name == name:
            model.graph.initializer[i].CopyFrom(onnx.numpy_helper.from_array(value, name))


def _swap_vocab(body: dict) -> None:
    """Two words of the vocabulary swapped (rows 0 and 1); checksum, ids probe and graph all still valid."""
    tokens = _vocab_bytes(body).decode("utf-8").split("\n")
    tokens[0], tokens[1] = tokens[1], tokens[0]
    body["vocab"] = encode_vocab(tokens)


def _declare_spare(body: dict) -> None:
    """A tensor the bundle holds and the graph declares as external, but no node reads."""
    model = onnx.ModelProto()
    model.ParseFromString(body["graph"])
    spare = model.graph.initializer.add()
    spare.CopyFrom(next(t for t in model.graph.initializer if t.name == "layer.1.bias"))
    spare.name = "spare"
    body["graph"] = model.SerializeToString()
    body["tensors"]["spare"] = copy.deepcopy(body["tensors"]["layer.1.bias"])


def set_last_scale(body: dict, value: float) -> None:
    """Set the last row's scale (outside the probe's ids, so only the reader's range check sees it)."""
    scales = np.frombuffer(body["tensors"]["scales"]["data"], "<f4").copy()
    scales[-1] = np.float32(value)
    body["tensors"]["scales"]["data"] = scales.tobytes()


def _huge_last_scale(body: dict) -> None:
    """The last row's scale at 3e38: finite, but some text's logits would overflow float32."""
    set_last_scale(body, 3e38)


# --- the corpus -----------------------------------------------------------------------------------------------
# (file name, what is wrong, how to make it from the base bundle's bytes)

B32 = 0xFFFFFFFF  # a 32-bit msgpack length: 4 GiB - 1
CASES: list[tuple[str, str, object]] = [
    # framing and bytes below the checksum
    ("empty.bundle", "a file of zero bytes", lambda b: b""),
    ("truncated_to_1_byte.bundle", "only the first byte (the map header)", lambda b: b[:1]),
    ("truncated_in_header.bundle", "cut inside the outer keys", lambda b: b[:20]),
    ("truncated_in_payload.bundle", "cut in the middle of the payload", lambda b: b[: len(b) // 2]),
    ("truncated_last_byte.bundle", "one byte short (the version value is cut)", lambda b: b[:-1]),
    ("trailing_byte.bundle", "one byte appended after the outer map", lambda b: b + b"\x00"),
    ("flipped_bit_in_payload.bundle", "one bit flipped in the middle of the payload",
     lambda b: flip(b, (payload_offset(b) + len(b)) // 2)),
    ("flipped_bit_in_digest.bundle", "one bit flipped in the stored sha256", lambda b: flip(b, b.index(split(b)[0]["sha256"]) + 31)),
    ("flipped_bit_in_format.bundle", "one bit flipped in the format name",
     lambda b: flip(b, b.index(b"danpack-bundle"), 0x20)),
    ("json_text.bundle", "a JSON document instead of msgpack", lambda b: b'{"format": "danpack-bundle"}'),
    ("zip_header.bundle", "the first bytes of a zip archive", lambda b: b"PK\x03\x04" + bytes(26)),
    ("top_level_array.bundle", "valid msgpack, but a list at the top", lambda b: msgpack.packb([1, 2, 3])),
    ("top_level_string.bundle", "valid msgpack, but a string at the top", lambda b: msgpack.packb("danpack-bundle")),
    ("wrong_format_name.bundle", "format names another file type",
     lambda b: with_outer(b, lambda o: o.update(format="danpack-float"))),
    ("missing_format.bundle", "no format key", lambda b: with_outer(b, lambda o: o.pop("format"))),
    ("newer_version.bundle", "format version 2 (newer than this runtime)",
     lambda b: with_outer(b, lambda o: o.update(version=2))),
    ("version_zero.bundle", "format version 0", lambda b: with_outer(b, lambda o: o.update(version=0))),
    ("version_as_text.bundle", "version is the string '1'", lambda b: with_outer(b, lambda o: o.update(version="1"))),
    ("version_as_bool.bundle", "version is true", lambda b: with_outer(b, lambda o: o.update(version=True))),
    ("extra_outer_key.bundle", "an unknown fifth top-level key", lambda b: with_outer(b, lambda o: o.update(signer="x"))),
    ("digest_too_short.bundle", "sha256 of 31 bytes", lambda b: with_outer(b, lambda o: o.update(sha256=o["sha256"][:31]))),
    ("payload_as_text.bundle", "payload is a str, not bin",
     lambda b: with_outer(b, lambda o: o.update(payload="x", sha256=hashlib.sha256(b"x").digest()))),
    ("digest_of_other_payload.bundle", "a well-formed sha256 of different bytes",
     lambda b: with_outer(b, lambda o: o.update(sha256=hashlib.sha256(b"other").digest()))),
    # declared lengths far beyond the file
    ("outer_bin32_claims_4gb.bundle", "the payload's bin32 header claims 4 GiB",
     lambda b: b[: payload_offset(b) - _bin_header(b)] + b"\xc6" + struct.pack(">I", B32) + b[payload_offset(b) :]),
    ("outer_str32_claims_4gb.bundle", "a str32 key claims 4 GiB", lambda b: b"\x84\xdb" + struct.pack(">I", B32) + b"format"),
    ("outer_array32_claims_4gb.bundle", "a top-level array32 claims 2^32-1 entries", lambda b: b"\xdd" + struct.pack(">I", B32)),
    ("outer_map32_claims_4gb.bundle", "a top-level map32 claims 2^32-1 entries", lambda b: b"\xdf" + struct.pack(">I", B32)),
    ("payload_bin32_claims_4gb.bundle", "inside a checksummed payload: graph's bin32 claims 4 GiB",
     lambda b: seal_raw(b"\x84\xa5graph\xc6" + struct.pack(">I", B32) + bytes(64))),
    ("payload_str32_claims_4gb.bundle", "inside a checksummed payload: vocab's str32 claims 4 GiB",
     lambda b: seal_raw(b"\x84\xa5vocab\xdb" + struct.pack(">I", B32) + bytes(64))),
    ("payload_array32_claims_4gb.bundle", "inside a checksummed payload: an array32 claims 2^32-1 entries",
     lambda b: seal_raw(b"\x84\xa8manifest\xdd" + struct.pack(">I", B32) + bytes(64))),
    ("payload_map32_claims_4gb.bundle", "inside a checksummed payload: a map32 claims 2^32-1 entries",
     lambda b: seal_raw(b"\xdf" + struct.pack(">I", B32) + bytes(64))),
    ("payload_nested_claims.bundle", "inside a checksummed payload: 780 nested array32 headers, each claiming 3,950 entries",
     lambda b: seal_raw((b"\xdd" + struct.pack(">I", 3950)) * 780 + bytes(50))),
    ("nested_4000_levels.bundle", "4,000 nested one-element arrays at the top", lambda b: nested(4000)),
    ("payload_nested_3900_levels.bundle", "3,900 nested arrays inside a checksummed payload",
     lambda b: seal_raw(nested(3900))),
    # a valid msgpack payload of the wrong shape (valid checksum)
    ("payload_is_list.bundle", "the payload is a list", lambda b: seal([1, 2])),
    ("payload_missing_vocab.bundle", "the payload has no vocab", lambda b: with_body(b, lambda d: d.pop("vocab"))),
    ("payload_extra_key.bundle", "the payload has an unknown key", lambda b: with_body(b, lambda d: d.update(extra=1))),
    ("manifest_is_list.bundle", "manifest is a list", lambda b: with_body(b, edit_value(("manifest",), [1]))),
    ("tensors_is_list.bundle", "tensors is a list", lambda b: with_body(b, edit_value(("tensors",), []))),
    ("graph_is_text.bundle", "graph is a str", lambda b: with_body(b, edit_value(("graph",), "onnx"))),
    ("vocab_is_list.bundle", "vocab is a list of tokens", lambda b: with_body(b, edit_value(("vocab",), ["charger"]))),
    ("vocab_is_text.bundle", "vocab is the plain newline-joined text, not its zlib stream",
     lambda b: with_body(b, lambda d: d.update(vocab=_vocab_bytes(d).decode("utf-8")))),
    ("vocab_not_zlib.bundle", "vocab bytes are the plain text, not a zlib stream",
     lambda b: with_body(b, lambda d: d.update(vocab=_vocab_bytes(d)))),
    ("vocab_zlib_cut.bundle", "vocab's zlib stream without its last 4 bytes (the Adler-32)",
     lambda b: with_body(b, lambda d: d.update(vocab=d["vocab"][:-4]))),
    ("vocab_zlib_trailing.bundle", "a byte after the end of vocab's zlib stream",
     lambda b: with_body(b, lambda d: d.update(vocab=d["vocab"] + b"\x00"))),
    ("vocab_zlib_bomb.bundle", "vocab deflated from 400 kB of one repeated token (a 24-row table allows 10 kB)",
     lambda b: with_body(b, edit_value(("vocab",), zlib.compress(b"charger\n" * 50_000, 9)))),
    ("vocab_not_utf8.bundle", "vocab inflates to bytes that are not UTF-8",
     lambda b: with_body(b, lambda d: d.update(vocab=zlib.compress(_vocab_bytes(d).replace(b"charger", b"ch\xffrger", 1), 9)))),
    # tensors
    ("tensor_dtype_float64.bundle", "table dtype float64", lambda b: with_body(b, edit_value(("tensors", "table", "dtype"), "float64"))),
    ("tensor_dtype_is_list.bundle", "table dtype is a list (unhashable)", lambda b: with_body(b, edit_value(("tensors", "table", "dtype"), ["int8"]))),
    ("tensor_negative_dim.bundle", "table shape [-24, 6]", lambda b: with_body(b, edit_value(("tensors", "table", "shape"), [-24, 6]))),
    ("tensor_shape_overflows_int64.bundle", "table shape [2^63, 2^63]: product overflows int64",
     lambda b: with_body(b, edit_value(("tensors", "table", "shape"), [2**63, 2**63]))),
    ("tensor_shape_3d.bundle", "table shape of 3 dims", lambda b: with_body(b, edit_value(("tensors", "table", "shape"), [24, 6, 1]))),
    ("tensor_shape_float.bundle", "table shape [24.0, 6.0]", lambda b: with_body(b, edit_value(("tensors", "table", "shape"), [24.0, 6.0]))),
    ("tensor_data_short.bundle", "table data one byte short",
     lambda b: with_body(b, lambda d: tensor(d, "table").update(data=tensor(d, "table")["data"][:-1]))),
    ("tensor_bytes_name.bundle", "a tensor whose name is bin, not str",
     lambda b: with_body(b, lambda d: d["tensors"].update({b"table2": tensor(d, "table")}))),
    ("tensor_extra_key.bundle", "a tensor map with a fourth key", lambda b: with_body(b, lambda d: tensor(d, "scales").update(order="C"))),
    ("scales_nan.bundle", "a NaN row scale",
     lambda b: with_body(b, lambda d: tensor(d, "scales").update(data=struct.pack("<f", float("nan")) + tensor(d, "scales")["data"][4:]))),
    ("scales_negative.bundle", "a negative row scale",
     lambda b: with_body(b, lambda d: tensor(d, "scales").update(data=struct.pack("<f", -1.0) + tensor(d, "scales")["data"][4:]))),
    ("weight_inf.bundle", "an Inf in the output layer's weight",
     lambda b: with_body(b, lambda d: tensor(d, "layer.1.weight").update(data=struct.pack("<f", float("inf")) + tensor(d, "layer.1.weight")["data"][4:]))),
    ("table_missing.bundle", "no table tensor", lambda b: with_body(b, lambda d: d["tensors"].pop("table"))),
    ("table_dtype_mismatch.bundle", "manifest says float32, the table is int8",
     lambda b: with_body(b, edit_value(("manifest", "table", "dtype"), "float32"))),
    ("table_meta_dtype_is_map.bundle", "manifest table dtype is a map (unhashable)",
     lambda b: with_body(b, edit_value(("manifest", "table", "dtype"), {"int8": 1}))),
    ("table_zero_rows.bundle", "a table of shape (0, 6) with no vocabulary", lambda b: with_body(b, _zero_rows)),
    # manifest
    ("labels_one.bundle", "a single label", lambda b: with_body(b, edit_value(("manifest", "labels"), ["payment"]))),
    ("labels_four.bundle", "four labels for three outputs",
     lambda b: with_body(b, edit_value(("manifest", "labels"), [*LABELS, "site_amenities"]))),
    ("layers_empty.bundle", "no layers", lambda b: with_body(b, edit_value(("manifest", "layers"), []))),
    ("layer_chain_does_not_fit.bundle", "output layer weight 3x5 after a 6-wide layer",
     lambda b: with_body(b, lambda d: tensor(d, "layer.1.weight").update(shape=[3, 5], data=tensor(d, "layer.1.weight")["data"][:60]))),
    ("layer_folded_not_first.bundle", "the output layer claims to be folded",
     lambda b: with_body(b, edit_value(("manifest", "layers", 1, "weight"), False))),
    ("layer_bad_activation.bundle", "activation 'gelu'", lambda b: with_body(b, edit_value(("manifest", "layers", 0, "activation"), "gelu"))),
    ("layer_activation_missing.bundle", "a layer map without its activation key",
     lambda b: with_body(b, lambda d: d["manifest"]["layers"][1].pop("activation"))),
    ("layer_bias_missing.bundle", "layer 1 has no bias", lambda b: with_body(b, lambda d: d["tensors"].pop("layer.1.bias"))),
    ("vocab_duplicate_token.bundle", "a token listed twice",
     lambda b: with_body(b, edit_vocab(lambda v: v.replace("slow", "charger", 1)))),
    ("vocab_empty_token.bundle", "an empty token between two others",
     lambda b: with_body(b, edit_vocab(lambda v: v.replace("\nslow\n", "\n\n", 1)))),
    ("table_rows_misdescribed.bundle", "the manifest says the table has 25 rows; it has 24",
     lambda b: with_body(b, edit_value(("manifest", "table", "rows"), 25))),
    ("vocab_too_long.bundle", "more tokens than table rows", lambda b: with_body(b, edit_vocab(lambda v: v + "\nextra\nmore"))),
    ("oov_policy_unknown.bundle", "oov policy 'drop'", lambda b: with_body(b, edit_value(("manifest", "oov", "policy"), "drop"))),
    ("oov_row_out_of_range.bundle", "policy unk with row 999", lambda b: with_body(b, edit_value(("manifest", "oov"), {"policy": "unk", "row": 999}))),
    ("oov_row_is_bool.bundle", "policy unk with row true", lambda b: with_body(b, edit_value(("manifest", "oov"), {"policy": "unk", "row": True}))),
    ("oov_row_missing.bundle", "an oov map without its row key", lambda b: with_body(b, lambda d: d["manifest"]["oov"].pop("row"))),
    ("oov_row_for_skip.bundle", "policy skip with a nested list as row",
     lambda b: with_body(b, edit_value(("manifest", "oov", "row"), [[[[[[1]]]]]]))),
    ("tokenizer_missing.bundle", "no tokenizer", lambda b: with_body(b, lambda d: d["manifest"].pop("tokenizer"))),
    ("tokenizer_bad_form.bundle", "normalization 'NFX'", lambda b: with_body(b, edit_value(("manifest", "tokenizer", "normalization"), "NFX"))),
    ("tokenizer_pattern_overflow.bundle", "pattern a{4294967296} (re raises OverflowError)",
     lambda b: with_body(b, edit_value(("manifest", "tokenizer", "pattern"), "a{4294967296}"))),
    ("tokenizer_bytes_key.bundle", "a tokenizer key encoded as bin",
     lambda b: with_body(b, edit_value(("manifest", "tokenizer"), {b"case": "lower"}))),
    ("source_missing.bundle", "no source description", lambda b: with_body(b, lambda d: d["manifest"].pop("source"))),
    ("selection_coverage_text.bundle", "selection coverage is the string '99%'",
     lambda b: with_body(b, edit_value(("manifest", "selection", "coverage"), "99%"))),
    ("packer_missing.bundle", "no packer version", lambda b: with_body(b, lambda d: d["manifest"].pop("packer"))),
    ("manifest_too_deep.bundle", "a pack option nested 100 levels deep (json.dumps and repr recurse)",
     lambda b: with_body(b, edit_value(("manifest", "pack", "keep_words"), _deep_list(100)))),
    ("unknown_buckets_bad_length.bundle", "envelope buckets of 5 bytes for a 6-wide table",
     lambda b: with_body(b, edit_value(("manifest", "unknown", "buckets"), bytes(5)))),
    ("unknown_buckets_steps_cross.bundle", "an envelope bucket whose lo and hi steps sum past 254",
     lambda b: with_body(b, edit_value(("manifest", "unknown", "buckets"), bytes([200] * 12)))),
    ("unknown_absent_unsorted.bundle", "absent-token hashes out of order",
     lambda b: with_body(b, edit_value(("manifest", "unknown", "absent"), np.array([2, 1], "<u4").tobytes()))),
    ("unknown_absent_count_past_high.bundle", "a fingerprint set claiming 100 values in one byte of high bits",
     lambda b: with_body(b, edit_value(("manifest", "unknown", "absent"),
                                       {"bits": 16, "count": 100, "low": bytes(112), "high": b"\x01"}))),
    ("unknown_absent_repeated.bundle", "a fingerprint set holding the value 5 twice",
     lambda b: with_body(b, edit_value(("manifest", "unknown", "absent"),  # split 7: low 5, 5; high parts 0, 0
                                       {"bits": 8, "count": 2, "low": bytes([0x85, 0x02]), "high": b"\x03"}))),
    ("unknown_absent_spare_byte.bundle", "a fingerprint set whose high bits end in a spare zero byte",
     lambda b: with_body(b, edit_value(("manifest", "unknown", "absent"),
                                       {"bits": 8, "count": 1, "low": b"\x05", "high": b"\x01\x00"}))),
    ("unknown_absent_padding_set.bundle", "a fingerprint set with a padding bit set after its low bits",
     lambda b: with_body(b, edit_value(("manifest", "unknown", "absent"),  # split 7: values 5, 6 take bits 0-13; bit 14 is padding
                                       {"bits": 8, "count": 2, "low": bytes([0x05, 0x43]), "high": b"\x03"}))),
    ("unknown_absent_past_bits.bundle", "a 4-bit fingerprint set holding the value 21",
     lambda b: with_body(b, edit_value(("manifest", "unknown", "absent"),  # split 4: low 5, high part 1
                                       {"bits": 4, "count": 1, "low": b"\x05", "high": b"\x02"}))),
    ("unknown_outliers_without_buckets.bundle", "an outlier filter with no buckets for the other rows",
     lambda b: with_body(b, lambda d: d["manifest"]["unknown"].update(
         {"outliers": {"filter": bytes(8), "probes": 3}}) or d["manifest"]["unknown"].pop("buckets", None))),
    ("unknown_outliers_probes_zero.bundle", "an outlier filter probing 0 bits per token",
     lambda b: with_body(b, lambda d: d["manifest"]["unknown"].update({"outliers": {"filter": bytes(8), "probes": 0}}))),
    # probe
    ("probe_missing.bundle", "no probe", lambda b: with_body(b, lambda d: d["manifest"].pop("probe"))),
    ("probe_empty.bundle", "a probe with no sequence", lambda b: with_body(b, edit_value(("manifest", "probe"), {"ids": [], "probs": []}))),
    ("probe_id_out_of_range.bundle", "probe id 24 in a 24-row table", lambda b: with_body(b, edit_value(("manifest", "probe", "ids", 0), [24]))),
    ("probe_id_negative.bundle", "probe id -1 (onnxruntime's Gather would wrap it)",
     lambda b: with_body(b, edit_value(("manifest", "probe", "ids", 0), [-1]))),
    ("probe_id_too_long.bundle", "a probe sequence of 65 ids", lambda b: with_body(b, edit_value(("manifest", "probe", "ids", 0), [0] * 65))),
    ("probe_probs_nan.bundle", "a NaN probe probability", lambda b: with_body(b, edit_value(("manifest", "probe", "probs", 0, 0), float("nan")))),
    ("probe_probs_above_one.bundle", "a probe probability of 2.0", lambda b: with_body(b, edit_value(("manifest", "probe", "probs", 0, 0), 2.0))),
    ("probe_probs_too_few.bundle", "two probabilities for three labels",
     lambda b: with_body(b, edit_value(("manifest", "probe", "probs", 0), [0.5, 0.5]))),
    ("probe_disagrees.bundle", "well-formed probe whose probabilities the model does not produce", lambda b: with_body(b, _mismatched_probe)),
    # the ONNX graph
    ("graph_garbage.bundle", "graph bytes that are not protobuf", lambda b: with_body(b, edit_value(("graph",), b"\xff" * 32))),
    ("graph_empty.bundle", "an empty graph field", lambda b: with_body(b, edit_value(("graph",), b""))),
    ("graph_missing_tensor.bundle", "graph takes an external tensor the bundle does not hold",
     lambda b: with_graph(b, lambda m: _rename_initializer(m, "layer.1.weight", "layer.1.weight_v2"))),
    ("graph_unused_tensor.bundle", "the bundle holds a tensor the graph never declares",
     lambda b: with_body(b, lambda d: d["tensors"].update({"spare": {"dtype": "float32", "shape": [1], "data": bytes(4)}}))),
    ("graph_undefined_input.bundle", "a node reads a name nothing defines",
     lambda b: with_graph(b, lambda m: _node_input(m, "layer1_z", 1, "ghost"))),
    ("graph_wrong_dims.bundle", "graph declares the table 24x7, the bundle holds 24x6",
     lambda b: with_graph(b, lambda m: _set_dims(m, "table", [24, 7]))),
    ("graph_no_probs_output.bundle", "graph output renamed from probs", lambda b: with_graph(b, lambda m: _rename_output(m, "probs", "p"))),
    ("graph_name_not_utf8.bundle", "a node name that is not UTF-8", lambda b: _with_raw_graph(b, _bad_utf8_node_name)),
    ("graph_loop_operator.bundle", "a Loop of 2^62 iterations added to the graph", lambda b: with_graph(b, _add_loop)),
    ("graph_foreign_domain.bundle", "a node moved to another operator domain",
     lambda b: with_graph(b, lambda m: setattr(m.graph.node[0], "domain", "com.example"))),
    ("graph_declared_unused.bundle", "a tensor declared by the graph but read by no node", lambda b: with_body(b, _declare_spare)),
    # graphs of allowed operators that compute something other than the tensors say (valid checksum)
    ("graph_back_door.bundle", "extra Gather/MatMul/Squeeze/Add nodes and an inline tensor: +40 on one logit "
     "for texts holding one word", lambda b: with_graph(b, _back_door)),
    ("graph_swaps_small_batches.bundle", "extra nodes reverse the logits when fewer than 8 texts are in a batch",
     lambda b: with_graph(b, _swap_small_batches)),
    ("graph_range_grows.bundle", "Range's limit multiplied by an inline 10^6 (allocates on demand)",
     lambda b: with_graph(b, _range_grows)),
    ("graph_inline_constant.bundle", "an extra inline initializer of 256 floats nobody reads",
     lambda b: with_graph(b, lambda m: m.graph.initializer.append(
         onnx.numpy_helper.from_array(np.ones(256, np.float32), "ballast")))),
    ("graph_inline_nan.bundle", "the writer's constant one_f set to NaN",
     lambda b: with_graph(b, lambda m: _set_constant(m, "one_f", np.array(np.nan, np.float32)))),
    ("graph_softmax_axis.bundle", "Softmax over axis 0 (the batch) instead of the labels",
     lambda b: with_graph(b, lambda m: setattr(m.graph.node[-1].attribute[0], "i", 0))),
    ("graph_producer_renamed.bundle", "the model's producer name changed",
     lambda b: with_graph(b, lambda m: setattr(m, "producer_name", "other"))),
    # vocabulary and strings
    ("vocab_two_words_swapped.bundle", "two vocabulary words swapped (the probe texts catch it)",
     lambda b: with_body(b, _swap_vocab)),
    ("vocab_token_too_long.bundle", "a 300-character token",
     lambda b: with_body(b, edit_vocab(lambda v: v.replace("charger", "c" * 300, 1)))),
    ("labels_duplicate.bundle", "a label listed twice",
     lambda b: with_body(b, edit_value(("manifest", "labels"), [LABELS[0], LABELS[1], LABELS[0]]))),
    ("labels_empty_string.bundle", "an empty label",
     lambda b: with_body(b, edit_value(("manifest", "labels"), [LABELS[0], "", LABELS[2]]))),
    ("labels_escape_sequence.bundle", "a label holding a clear-screen escape sequence",
     lambda b: with_body(b, edit_value(("manifest", "labels"), [LABELS[0], "\x1b[2J\x1b[H", LABELS[2]]))),
    ("labels_csi_c1.bundle", "a label holding U+009B (the one-character CSI)",
     lambda b: with_body(b, edit_value(("manifest", "labels"), [LABELS[0], "a\u009b2Jb", LABELS[2]]))),
    ("labels_bidi_override.bundle", "a label holding a right-to-left override",
     lambda b: with_body(b, edit_value(("manifest", "labels"), [LABELS[0], "\u202etnemyap", LABELS[2]]))),
    ("labels_too_long.bundle", "a label of 101 characters",
     lambda b: with_body(b, edit_value(("manifest", "labels"), [LABELS[0], "x" * 101, LABELS[2]]))),
    ("tokenizer_nested_quantifier.bundle", "pattern (?:a+)+b (exponential backtracking)",
     lambda b: with_body(b, edit_value(("manifest", "tokenizer", "pattern"), "(?:a+)+b"))),
    ("tokenizer_max_tokens_huge.bundle", "max_tokens 10^9",
     lambda b: with_body(b, edit_value(("manifest", "tokenizer", "max_tokens"), 10**9))),
    ("probe_texts_missing.bundle", "a probe without its texts",
     lambda b: with_body(b, lambda d: (d["manifest"]["probe"].pop("texts"), d["manifest"]["probe"].pop("text_probs")))),
    ("probe_text_probs_nan.bundle", "a NaN probability for a probe text",
     lambda b: with_body(b, edit_value(("manifest", "probe", "text_probs", 0, 0), float("nan")))),
    # numbers that are each finite but together overflow, and a flag that contradicts the tensors
    ("scale_overflows_float32.bundle", "a row scale of 3e38: logits could overflow float32", lambda b: with_body(b, _huge_last_scale)),
    ("table_folded_flag_wrong.bundle", "manifest says the table is not folded, layer 0 has no weight",
     lambda b: with_body(b, edit_value(("manifest", "table", "folded"), False))),
]


def _deep_list(depth: int) -> list:
    value: list = []
    for _ in range(depth):
        value = [value]
    return value


def _zero_rows(body: dict) -> None:
    tensor(body, "table").update(shape=[0, 6], data=b"")
    tensor(body, "scales").update(shape=[0], data=b"")
    body["vocab"] = encode_vocab([])
    body["manifest"]["probe"] = {"ids": [[]], "probs": [body["manifest"]["probe"]["probs"][0]]}


def is_sealed(data: bytes) -> bool:
    """Whether the file's outer map parses and its sha256 matches its payload (damage above the checksum)."""
    try:
        outer = msgpack.unpackb(data, raw=False)
        return hashlib.sha256(outer["payload"]).digest() == outer["sha256"]
    except Exception:
        return False


def expected_errors(data: bytes, path: Path) -> dict[str, str | None]:
    """The message each entry point gives for one file: decode_bundle, then runtime.load on each backend."""
    from danpack import runtime
    from danpack.runtime import BundleError, decode_bundle

    out: dict[str, str | None] = {}
    try:
        decode_bundle(data, SOURCE)
        out["decode_bundle"] = None
    except BundleError as e:
        out["decode_bundle"] = str(e)
    for backend in BACKENDS:
        try:
            runtime.load(path, backend)
            out[backend] = None
        except BundleError as e:
            out[backend] = str(e).replace(str(path), SOURCE)
    return out


def write_corpus(out_dir: Path) -> dict[str, dict]:
    """Write every case into out_dir; return {file: {what, decode_bundle, onnxruntime, numpy}}."""
    out_dir.mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory() as tmp:
        base = build_base_bundle(Path(tmp))
    table: dict[str, dict] = {}
    for name, what, make in CASES:
        data = make(base)
        if len(data) >= MAX_FILE:
            raise SystemExit(f"{name}: {len(data)} bytes, the corpus keeps files under {MAX_FILE}")
        path = out_dir / name
        path.write_bytes(data)
        table[name] = {"what": what, "sealed": is_sealed(data), **expected_errors(data, path)}
    return table


def write_readme(out_dir: Path, table: dict[str, dict]) -> None:
    lines = [
        "# Adversarial corpus",
        "",
        "Tiny crafted bad bundles (each under 6 KB), written by `make_corpus.py` from one real bundle packed from a",
        "seeded 24-token model. `tests/test_hostile_bundles.py` opens every file with `runtime.decode_bundle` and",
        "`runtime.load` (onnxruntime and numpy backends) and asserts the exact `BundleError` message recorded in",
        "`expected.json`. `{source}` stands for the file name or path. Files marked *sealed* carry a valid sha256",
        "over their payload, so only the reader's own structural checks can refuse them. Regenerate with",
        "`python tests/adversarial/make_corpus.py` after an intended change of a message. The files end in",
        "`.bundle` because `.gitignore` excludes `*.dpk`.",
        "",
        "| file | bytes | sealed | what is wrong | expected error |",
        "|---|---:|---|---|---|",
    ]
    for name, row in table.items():
        message = row["decode_bundle"] or f"(decodes; runtime.load) {row['onnxruntime']}"
        if row["decode_bundle"] is None and row["onnxruntime"] != row["numpy"]:
            message += f" / numpy: {row['numpy']}"
        message = message.replace("|", "\\|").replace("\n", " ")
        size = (out_dir / name).stat().st_size
        lines.append(f"| `{name}` | {size} | {'sealed' if row['sealed'] else ''} | {row['what']} | {message} |")
    (out_dir / "README.md").write_text("\n".join(lines) + "\n", encoding="utf-8")


def main(out_dir: Path = HERE) -> None:
    for stale in out_dir.glob("*.bundle"):
        stale.unlink()
    table = write_corpus(out_dir)
    (out_dir / "expected.json").write_text(json.dumps(table, indent=1, ensure_ascii=False) + "\n", encoding="utf-8")
    write_readme(out_dir, table)
    print(f"wrote {len(table)} files to {out_dir}", file=sys.stderr)


if __name__ == "__main__":
    main()
