"""The one writer of a packed DAN's ONNX graph: ids -> Gather -> dequantise -> masked mean -> Gemm/act ... -> Softmax.

Stdlib only (protobuf wire format by hand, runtime/onnx_wire.py), so the packer writes the graph with it and the
device's bundle reader rebuilds it from the manifest and the tensor shapes and compares the bundle's graph with
it byte for byte: a bundle computes exactly what its tensors say, nothing a crafted graph adds.

Inputs: `ids` (B, T) int64, padded with 0, and `counts` (B,) int64, the real length of each row; padding is
marked only by the counts (never by -1: onnxruntime's Gather wraps negative ids).
Outputs: `probs` (B, C) and `logits` (B, C), float32.
Large tensors (table, scales, layer weights) are declared as external initializers: the bundle holds their bytes
once and the runtime hands them to the session at load time. The only inline initializers are the writer's five
scalar or one-element constants (axis_0, axis_1, one_f, zero_i, one_i).
tests/test_graph.py checks the bytes with onnx.checker and runs them with onnx.reference (ONNX specification).
"""

from __future__ import annotations

import struct
from dataclasses import dataclass

from .onnx_wire import _fields, put_bytes, put_int

OPSET = 17  # supported by onnxruntime >= 1.13 and by onnx.reference
IR_VERSION = 8
PRODUCER = "danpack"
EXTERNAL_LOCATION = "danpack-bundle"  # placeholder: the data come from the bundle, never from a file
# TensorProto.DataType (onnx.proto)
FLOAT, INT8, INT64 = 1, 3, 7
_ATTR_INT = 2  # AttributeProto.AttributeType.INT


@dataclass(frozen=True)
class GraphSpec:
    """What the graph needs to know besides the tensors themselves."""

    rows: int  # table rows
    width: int  # table width (embedding dim, or first hidden size when folded)
    quantized: bool  # int8 table with per-row `scales`, or a float32 table
    layers: tuple[tuple[bool, str | None], ...]  # per layer: (has weight matrix, activation)
    layer_shapes: tuple[tuple[int, int], ...]  # per layer: (out, in); in is 0 for a folded layer
    classes: int


def tensor_names(spec: GraphSpec) -> list[str]:
    """Names of the tensors the graph takes from the bundle, in a fixed order."""
    names = ["table"] + (["scales"] if spec.quantized else [])
    for i, (has_weight, _) in enumerate(spec.layers):
        names += ([f"layer.{i}.weight"] if has_weight else []) + [f"layer.{i}.bias"]
    return names


def spec_from_tensors(labels: int, quantized: bool, layers: list[dict], shapes: dict[str, tuple[int, ...]]) -> GraphSpec:
    """The spec of a bundle whose manifest was already checked: label count, table dtype, layer list, tensor shapes."""
    rows, width = shapes["table"]
    return GraphSpec(
        rows=rows, width=width, quantized=quantized,
        layers=tuple((bool(layer["weight"]), layer["activation"]) for layer in layers),
        layer_shapes=tuple((shapes[f"layer.{i}.bias"][0], shapes[f"layer.{i}.weight"][1] if layer["weight"] else 0)
                           for i, layer in enumerate(layers)),
        classes=labels,
    )


def _tensor(name: str, dtype: int, dims: list[int], raw: bytes | None = None) -> bytes:
    """TensorProto: dims (1), data_type (2), name (8), then raw_data (9) or an external reference (13, 14)."""
    out = b"".join(put_int(1, d) for d in dims) + put_int(2, dtype) + put_bytes(8, name)
    if raw is not None:
        return out + put_bytes(9, raw)
    entry = put_bytes(1, "location") + put_bytes(2, EXTERNAL_LOCATION)  # StringStringEntryProto
    return out + put_bytes(13, entry) + put_int(14, 1)  # data_location EXTERNAL


def _value_info(name: str, dtype: int, dims: list[int | str]) -> bytes:
    """ValueInfoProto with a tensor type: each dim a dim_value (int) or a dim_param (str)."""
    shape = b"".join(put_bytes(1, put_int(1, d) if isinstance(d, int) else put_bytes(2, d)) for d in dims)
    tensor_type = put_int(1, dtype) + put_bytes(2, shape)
    return put_bytes(1, name) + put_bytes(2, put_bytes(1, tensor_type))


def write_graph(spec: GraphSpec, tensors: dict | None = None) -> bytes:
    """The serialised ModelProto; with `tensors` (name -> numpy array) the large initializers are embedded as
    raw data (a self-contained ONNX file), without them they are external (the bundle's form)."""
    nodes: list[bytes] = []
    inits: list[bytes] = []

    def node(op: str, inputs: list[str], output: str, **attrs: int) -> str:
        body = b"".join(put_bytes(1, i) for i in inputs) + put_bytes(2, output) + put_bytes(3, output) + put_bytes(4, op)
        for key, value in attrs.items():  # AttributeProto: name (1), i (3), type (20)
            body += put_bytes(5, put_bytes(1, key) + put_int(3, value) + put_int(20, _ATTR_INT))
        nodes.append(body)
        return output

    def const(name: str, dtype: int, dims: list[int], raw: bytes) -> str:
        inits.append(_tensor(name, dtype, dims, raw))
        return name

    def big(name: str, dtype: int, dims: list[int]) -> str:
        if tensors is None:
            inits.append(_tensor(name, dtype, dims))
        else:
            array = tensors[name]
            inits.append(_tensor(name, dtype, dims, array.astype(array.dtype.newbyteorder("<")).tobytes()))
        return name

    zero_axis = const("axis_0", INT64, [1], struct.pack("<q", 0))
    one_axis = const("axis_1", INT64, [1], struct.pack("<q", 1))
    one_f = const("one_f", FLOAT, [], struct.pack("<f", 1.0))

    # 1. mask from counts: position < count  -> (B, T) float
    width_t = node("Shape", ["ids"], "width_t", start=1, end=2)  # (1,)
    width_s = node("Squeeze", [width_t, zero_axis], "width_s")  # ()
    zero_i, one_i = const("zero_i", INT64, [], struct.pack("<q", 0)), const("one_i", INT64, [], struct.pack("<q", 1))
    positions = node("Range", [zero_i, width_s, one_i], "positions")  # (T,)
    pos_row = node("Unsqueeze", [positions, zero_axis], "pos_row")  # (1, T)
    count_col = node("Unsqueeze", ["counts", one_axis], "count_col")  # (B, 1)
    mask = node("Cast", [node("Less", [pos_row, count_col], "mask_b")], "mask", to=FLOAT)  # (B, T)

    # 2. per-token weight = mask * row scale / max(count, 1)  -> (B, T)
    table = big("table", INT8 if spec.quantized else FLOAT, [spec.rows, spec.width])
    weight = mask
    if spec.quantized:
        scales = big("scales", FLOAT, [spec.rows])
        weight = node("Mul", [mask, node("Gather", [scales, "ids"], "row_scales")], "scaled_mask")  # (B, T)
    denom = node("Max", [node("Cast", ["counts"], "counts_f", to=FLOAT), one_f], "denom")  # (B,)
    weight = node("Div", [weight, node("Unsqueeze", [denom, one_axis], "denom_col")], "token_weight")  # (B, T)

    # 3. gather rows (int8 or float), mean as a batched matmul: (B, 1, T) @ (B, T, W) -> (B, W)
    rows = node("Gather", [table, "ids"], "rows")  # (B, T, W)
    if spec.quantized:
        rows = node("Cast", [rows], "rows_f", to=FLOAT)
    weight3 = node("Unsqueeze", [weight, one_axis], "token_weight3")  # (B, 1, T)
    x = node("Squeeze", [node("MatMul", [weight3, rows], "mean3"), one_axis], "mean")  # (B, W)

    # 4. feed-forward stack
    for i, (has_weight, activation) in enumerate(spec.layers):
        out, inp = spec.layer_shapes[i]
        bias = big(f"layer.{i}.bias", FLOAT, [out])
        if has_weight:
            w = big(f"layer.{i}.weight", FLOAT, [out, inp])
            z = node("Gemm", [x, w, bias], f"layer{i}_z", transB=1)
        else:
            z = node("Add", [x, bias], f"layer{i}_z")
        if activation == "relu":
            z = node("Relu", [z], f"layer{i}_a")
        elif activation == "tanh":
            z = node("Tanh", [z], f"layer{i}_a")
        x = z
    node("Identity", [x], "logits")
    node("Softmax", ["logits"], "probs", axis=-1)

    graph = b"".join(put_bytes(1, n) for n in nodes) + put_bytes(2, "danpack_dan")
    graph += b"".join(put_bytes(5, t) for t in inits)
    graph += put_bytes(11, _value_info("ids", INT64, ["batch", "tokens"]))
    graph += put_bytes(11, _value_info("counts", INT64, ["batch"]))
    graph += put_bytes(12, _value_info("probs", FLOAT, ["batch", spec.classes]))
    graph += put_bytes(12, _value_info("logits", FLOAT, ["batch", spec.classes]))
    opset = put_bytes(1, "") + put_int(2, OPSET)  # OperatorSetIdProto: domain (1), version (2)
    return put_int(1, IR_VERSION) + put_bytes(2, PRODUCER) + put_bytes(7, graph) + put_bytes(8, opset)


_MODEL_FIELDS = {1: "ir_version", 2: "producer_name", 3: "producer_version", 4: "domain", 5: "model_version",
                 6: "doc_string", 7: "graph", 8: "opset_import", 14: "metadata_props", 20: "training_info",
                 25: "functions"}
_GRAPH_FIELDS = {1: "node", 2: "graph name", 5: "initializer", 10: "doc_string", 11: "input", 12: "output",
                 13: "value_info", 14: "quantization_annotation", 15: "sparse_initializer"}
_NAMED = {1: 3, 5: 8, 11: 1, 12: 1, 13: 1}  # graph field -> field number of its name inside


def _describe(number: int, value: object) -> str:
    """One field of a GraphProto in words: its kind, operator and name."""
    kind = _GRAPH_FIELDS.get(number, f"field {number}")
    if not isinstance(value, memoryview) or number not in _NAMED:
        return kind
    name = op = ""
    try:
        for f, _w, v in _fields(value):
            if f == _NAMED[number] and isinstance(v, memoryview):
                name = bytes(v[:60]).decode("utf-8", "replace")
            elif number == 1 and f == 4 and isinstance(v, memoryview):
                op = bytes(v[:40]).decode("utf-8", "replace")
    except ValueError:
        return f"{kind} (malformed)"
    return f"{kind} {op + ' ' if op else ''}{name!r}"


def first_difference(actual: bytes, expected: bytes) -> str | None:
    """None when the two serialised models are equal, else the first differing part in words (e.g.
    "node 12 is node Add 'spy', expected node Gemm 'layer1_z'"); `actual` may be any bytes."""
    if actual == expected:
        return None
    try:
        got = list(_fields(memoryview(actual)))
    except ValueError as e:
        return f"the model is not well-formed protobuf ({e})"
    want = list(_fields(memoryview(expected)))
    for i in range(max(len(got), len(want))):
        g, w = (got[i] if i < len(got) else None), (want[i] if i < len(want) else None)
        if g is not None and w is not None and g[:2] == w[:2] and bytes(g[2]) == bytes(w[2]):
            continue
        if g is None or w is None or g[0] != 7 or w[0] != 7:
            found = "nothing" if g is None else _MODEL_FIELDS.get(g[0], f"field {g[0]}")
            wanted = "nothing" if w is None else _MODEL_FIELDS.get(w[0], f"field {w[0]}")
            return f"model field {i + 1} is {found}{' with other content' if found == wanted else ''}, expected {wanted}"
        try:
            gparts = list(_fields(g[2]))
        except ValueError as e:
            return f"the graph is not well-formed protobuf ({e})"
        wparts = list(_fields(w[2]))
        for j in range(max(len(gparts), len(wparts))):
            a = gparts[j] if j < len(gparts) else None
            b = wparts[j] if j < len(wparts) else None
            if a is not None and b is not None and a[:2] == b[:2] and bytes(a[2]) == bytes(b[2]):
                continue
            found = "nothing" if a is None else _describe(a[0], a[2])
            wanted = "nothing" if b is None else _describe(b[0], b[2])
            if a is not None and b is not None and a[0] == b[0]:
                kind = _GRAPH_FIELDS.get(b[0], f"field {b[0]}")
                index = sum(1 for p in wparts[: j + 1] if p[0] == b[0])
                if found == wanted:
                    return f"{kind} {index} ({wanted}) differs in its inputs, attributes or contents"
                return f"{kind} {index} is {found}, expected {wanted}"
            return f"part {j + 1} of the graph is {found}, expected {wanted}"
        return "the graph differs in its encoding"
    return "the model differs in its encoding"
