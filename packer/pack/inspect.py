"""What a bundle holds: manifest, size breakdown, checksum; and a self-contained ONNX export."""

from __future__ import annotations

import onnx
from onnx import TensorProto, numpy_helper

from danpack.runtime.bundle import Bundle


def size_breakdown(bundle: Bundle) -> dict[str, int]:
    """Bytes by part: table, scales, layers, vocab, graph, other (framing and manifest); sums to the file size."""
    t = bundle.tensors
    parts = {
        "table": t["table"].nbytes,
        "scales": t["scales"].nbytes if "scales" in t else 0,
        "layers": sum(a.nbytes for n, a in t.items() if n.startswith("layer.")),
        "vocab": bundle.vocab_bytes,
        "graph": len(bundle.graph),
    }
    parts["other"] = bundle.size - sum(parts.values())
    return parts


def describe_bundle(bundle: Bundle) -> dict:
    """A JSON-ready description for `danpack inspect`."""
    manifest = {k: v for k, v in bundle.manifest.items() if k != "probe"}
    info = {
        "sha256": bundle.sha256,
        "bytes": bundle.size,
        "labels": list(bundle.labels),
        "tokens": len(bundle.vocab),
        "breakdown": size_breakdown(bundle),
        "manifest": manifest,
    }
    if bundle.manifest["table"]["dtype"] == "int8":
        from danpack.check.bound import worst_case_bound

        info["drift_bound"] = worst_case_bound(bundle)
    return info


def export_onnx(bundle: Bundle) -> onnx.ModelProto:
    """The bundle's graph with every external tensor embedded: a standalone ONNX model."""
    model = onnx.ModelProto()
    model.ParseFromString(bundle.graph)
    for i, init in enumerate(model.graph.initializer):
        if init.data_location == TensorProto.EXTERNAL:
            model.graph.initializer[i].CopyFrom(numpy_helper.from_array(bundle.tensors[init.name].copy(), init.name))
    return model
