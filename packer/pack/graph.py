"""The ONNX graph of a packed DAN: ids -> Gather -> dequantise -> masked mean -> Gemm/act ... -> Softmax.

Inputs: `ids` (B, T) int64, padded with 0, and `counts` (B,) int64, the real length of each
row; padding is marked only by the counts (never by -1: onnxruntime's Gather wraps negative ids).
Outputs: `probs` (B, C) and `logits` (B, C), float32.
Large tensors (table, scales, layer weights) are declared as external initializers: the bundle
holds their bytes once and the runtime hands them to the session at load time.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

OPSET = 17  # supported by onnxruntime >= 1.13 and by onnx.reference
IR_VERSION = 8
EXTERNAL_LOCATION = "danpack-bundle"  # placeholder: the data come from the bundle, never from a file


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


def _external(name: str, dtype: int, dims: list[int]) -> TensorProto:
    t = TensorProto()
    t.name, t.data_type = name, dtype
    t.dims.extend(dims)
    t.data_location = TensorProto.EXTERNAL
    entry = t.external_data.add()
    entry.key, entry.value = "location", EXTERNAL_LOCATION
    return t


def build_graph(spec: GraphSpec, tensors: dict[str, np.ndarray] | None = None) -> onnx.ModelProto:
    """Build the graph; with `tensors` the initializers are embedded (a self-contained ONNX file)."""
    f32 = TensorProto.FLOAT
    nodes = []
    inits: list[TensorProto] = []

    def node(op: str, inputs: list[str], output: str, **attrs) -> str:
        nodes.append(helper.make_node(op, inputs, [output], name=output, **attrs))
        return output

    def const(name: str, value: np.ndarray) -> str:
        inits.append(numpy_helper.from_array(value, name))
        return name

    def big(name: str, dtype: int, dims: list[int]) -> str:
        if tensors is None:
            inits.append(_external(name, dtype, dims))
        else:
            inits.append(numpy_helper.from_array(np.ascontiguousarray(tensors[name]), name))
        return name

    zero_axis, one_axis = const("axis_0", np.array([0], np.int64)), const("axis_1", np.array([1], np.int64))
    one_f = const("one_f", np.array(1.0, np.float32))

    # 1. mask from counts: position < count  -> (B, T) float
    width_t = node("Shape", ["ids"], "width_t", start=1, end=2)  # (1,)
    width_s = node("Squeeze", [width_t, zero_axis], "width_s")  # ()
    positions = node("Range", [const("zero_i", np.array(0, np.int64)), width_s, const("one_i", np.array(1, np.int64))],
                     "positions")  # (T,)
    pos_row = node("Unsqueeze", [positions, zero_axis], "pos_row")  # (1, T)
    count_col = node("Unsqueeze", ["counts", one_axis], "count_col")  # (B, 1)
    mask = node("Cast", [node("Less", [pos_row, count_col], "mask_b")], "mask", to=f32)  # (B, T)

    # 2. per-token weight = mask * row scale / max(count, 1)  -> (B, T)
    table = big("table", TensorProto.INT8 if spec.quantized else f32, [spec.rows, spec.width])
    weight = mask
    if spec.quantized:
        scales = big("scales", f32, [spec.rows])
        weight = node("Mul", [mask, node("Gather", [scales, "ids"], "row_scales")], "scaled_mask")  # (B, T)
    denom = node("Max", [node("Cast", ["counts"], "counts_f", to=f32), one_f], "denom")  # (B,)
    weight = node("Div", [weight, node("Unsqueeze", [denom, one_axis], "denom_col")], "token_weight")  # (B, T)

    # 3. gather rows (int8 or float), mean as a batched matmul: (B, 1, T) @ (B, T, W) -> (B, W)
    rows = node("Gather", [table, "ids"], "rows")  # (B, T, W)
    if spec.quantized:
        rows = node("Cast", [rows], "rows_f", to=f32)
    weight3 = node("Unsqueeze", [weight, one_axis], "token_weight3")  # (B, 1, T)
    x = node("Squeeze", [node("MatMul", [weight3, rows], "mean3"), one_axis], "mean")  # (B, W)

    # 4. feed-forward stack
    for i, (has_weight, activation) in enumerate(spec.layers):
        out, inp = spec.layer_shapes[i]
        bias = big(f"layer.{i}.bias", f32, [out])
        if has_weight:
            w = big(f"layer.{i}.weight", f32, [out, inp])
            z = node("Gemm", [x, w, bias], f"layer{i}_z", transB=1)
        else:
            z = node("Add", [x, bias], f"layer{i}_z")
        if activation == "relu":
            z = node("Relu", [z], f"layer{i}_a")
        elif activation == "tanh":
            z = node("Tanh", [z], f"layer{i}_a")
        x = z
    nodes.append(helper.make_node("Identity", [x], ["logits"], name="logits"))
    node("Softmax", ["logits"], "probs", axis=-1)

    graph = helper.make_graph(
        nodes, "danpack_dan",
        [helper.make_tensor_value_info("ids", TensorProto.INT64, ["batch", "tokens"]),
         helper.make_tensor_value_info("counts", TensorProto.INT64, ["batch"])],
        [helper.make_tensor_value_info("probs", f32, ["batch", spec.classes]),
         helper.make_tensor_value_info("logits", f32, ["batch", spec.classes])],
        inits,
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", OPSET)], producer_name="danpack")
    model.ir_version = IR_VERSION
    return model


def check_graph(model: onnx.ModelProto) -> None:
    """onnx.checker with shape inference on the graph; external tensors are checked as typed graph inputs."""
    probe = onnx.ModelProto()
    probe.CopyFrom(model)
    external = [t for t in probe.graph.initializer if t.data_location == TensorProto.EXTERNAL]
    for t in external:
        probe.graph.input.append(helper.make_tensor_value_info(t.name, t.data_type, list(t.dims)))
        probe.graph.initializer.remove(t)
    onnx.checker.check_model(probe, full_check=True)
