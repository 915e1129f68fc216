"""The packer's view of the graph: the one writer lives in `runtime.graph` (stdlib, shared with the bundle reader,
which rebuilds the graph from a bundle's manifest and refuses any other); this module adds what needs the onnx
package, used by tests and the ONNX export only: the graph as a ModelProto, and onnx.checker.
"""

from __future__ import annotations

import numpy as np

from danpack.runtime.graph import EXTERNAL_LOCATION, IR_VERSION, OPSET, GraphSpec, tensor_names, write_graph

__all__ = ["EXTERNAL_LOCATION", "IR_VERSION", "OPSET", "GraphSpec", "build_graph", "check_graph", "tensor_names",
           "write_graph"]


def build_graph(spec: GraphSpec, tensors: dict[str, np.ndarray] | None = None):
    """The writer's graph as an onnx.ModelProto; with `tensors` the initializers are embedded (self-contained)."""
    import onnx

    model = onnx.ModelProto()
    model.ParseFromString(write_graph(spec, tensors))
    return model


def check_graph(model) -> None:
    """onnx.checker with shape inference on the graph; external tensors are checked as typed graph inputs."""
    import onnx
    from onnx import TensorProto, helper

    probe = onnx.ModelProto()
    probe.CopyFrom(model)
    external = [t for t in probe.graph.initializer if t.data_location == TensorProto.EXTERNAL]
    for t in external:
        probe.graph.input.append(helper.make_tensor_value_info(t.name, t.data_type, list(t.dims)))
        probe.graph.initializer.remove(t)
    onnx.checker.check_model(probe, full_check=True)
