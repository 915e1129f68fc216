"""The float original as PyTorch modules, and their ONNX exports by PyTorch's own exporter.

Two forms of the same DAN, weights copied from the FloatModel:
- `BagDAN`: nn.EmbeddingBag(mode="mean") over flat ids + offsets, then the linear stack (the idiomatic
  PyTorch DAN; its eager forward is the "PyTorch eager" baseline);
- `PaddedDAN`: nn.Embedding over padded (B, T) ids, masked mean from the counts, then the same stack.
Both take the ids of the one runtime Encoder, so tokenizer and OOV handling are identical everywhere.
"""

from __future__ import annotations

import io
import warnings
from collections.abc import Sequence

import numpy as np

from danpack.model import FloatModel
from danpack.runtime.encode import Encoder

OPSET = 17  # the same opset as danpack's own graph


def torch_version() -> str | None:
    try:
        import torch
    except ImportError:
        return None
    return torch.__version__


def _stack(model: FloatModel):
    import torch
    from torch import nn

    modules = []
    for layer in model.layers:
        linear = nn.Linear(layer.weight.shape[1], layer.weight.shape[0])
        with torch.no_grad():
            linear.weight.copy_(torch.from_numpy(np.ascontiguousarray(layer.weight)))
            linear.bias.copy_(torch.from_numpy(np.ascontiguousarray(layer.bias)))
        modules.append(linear)
        if layer.activation == "relu":
            modules.append(nn.ReLU())
        elif layer.activation == "tanh":
            modules.append(nn.Tanh())
    return nn.Sequential(*modules)


def build_bag_module(model: FloatModel):
    """nn.EmbeddingBag(mean) + linear stack + softmax: (N,) flat ids, (B,) offsets -> (B, C) probabilities."""
    import torch
    from torch import nn

    class BagDAN(nn.Module):
        def __init__(self) -> None:
            super().__init__()
            self.bag = nn.EmbeddingBag.from_pretrained(torch.from_numpy(model.embedding), freeze=True, mode="mean")
            self.stack = _stack(model)

        def forward(self, ids, offsets):
            return torch.softmax(self.stack(self.bag(ids, offsets)), dim=-1)  # (B, D) -> (B, C)

    return BagDAN().eval()


def build_padded_module(model: FloatModel):
    """nn.Embedding + masked mean + linear stack + softmax: (B, T) ids, (B,) counts -> (B, C) probabilities."""
    import torch
    from torch import nn

    class PaddedDAN(nn.Module):
        def __init__(self) -> None:
            super().__init__()
            self.embed = nn.Embedding.from_pretrained(torch.from_numpy(model.embedding), freeze=True)
            self.stack = _stack(model)

        def forward(self, ids, counts):
            width = ids.shape[1]
            mask = (torch.arange(width).unsqueeze(0) < counts.unsqueeze(1)).to(torch.float32)  # (B, T)
            total = (self.embed(ids) * mask.unsqueeze(2)).sum(dim=1)  # (B, T, D) -> (B, D)
            mean = total / counts.clamp(min=1).to(torch.float32).unsqueeze(1)  # (B, D)
            return torch.softmax(self.stack(mean), dim=-1)  # (B, C)

    return PaddedDAN().eval()


def flat_inputs(encoder: Encoder, texts: Sequence[str]) -> tuple[np.ndarray, np.ndarray]:
    """EmbeddingBag inputs through the runtime Encoder: (N,) int64 ids of all texts, (B,) int64 offsets."""
    lists = [encoder.token_ids(t) for t in texts]
    lengths = np.fromiter((len(x) for x in lists), dtype=np.int64, count=len(lists))  # (B,)
    offsets = np.zeros(len(lists), dtype=np.int64)  # (B,)
    np.cumsum(lengths[:-1], out=offsets[1:])
    ids = np.fromiter((i for x in lists for i in x), dtype=np.int64, count=int(lengths.sum()))  # (N,)
    return ids, offsets


def export_onnx(module, example: tuple, input_names: list[str], dynamic_axes: dict) -> tuple[bytes, str]:
    """PyTorch's own ONNX export of a module -> (model bytes, which exporter ran).

    The default (torch.export-based) exporter needs the onnxscript package; without it the
    TorchScript-based exporter (dynamo=False) runs instead, as PyTorch documents for that case.
    """
    import torch

    attempts = []
    for dynamo in (True, False):
        buffer = io.BytesIO()
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                kwargs = {"dynamic_axes": dynamic_axes} if not dynamo else {
                    "dynamic_shapes": {n: {a: torch.export.Dim.AUTO for a in axes} for n, axes in dynamic_axes.items()
                                       if n in input_names}}
                torch.onnx.export(module, example, buffer, input_names=input_names, output_names=["probs"],
                                  opset_version=OPSET, dynamo=dynamo, **kwargs)
            if dynamo:
                return buffer.getvalue(), "torch.export-based (dynamo=True, the default)"
            return buffer.getvalue(), ("TorchScript-based (dynamo=False); the default torch.export-based exporter "
                                       f"could not run here ({attempts[0].split(': ', 1)[1]})")
        except Exception as e:  # ImportError (onnxscript), torch.onnx errors, ...
            attempts.append(f"dynamo={dynamo}: {type(e).__name__}: {str(e).splitlines()[0][:160] if str(e) else ''}")
    raise RuntimeError("; ".join(attempts))


def export_bag(model: FloatModel) -> tuple[bytes, str, list[str]]:
    """ONNX bytes of BagDAN, the exporter used, and the graph's operator types."""
    import torch

    ids = torch.tensor([1, 2, 3, 1], dtype=torch.int64)
    offsets = torch.tensor([0, 3], dtype=torch.int64)
    data, how = export_onnx(build_bag_module(model), (ids, offsets), ["ids", "offsets"],
                            {"ids": {0: "tokens"}, "offsets": {0: "batch"}, "probs": {0: "batch"}})
    return data, how, _op_types(data)


def export_padded(model: FloatModel) -> tuple[bytes, str, list[str]]:
    """ONNX bytes of PaddedDAN, the exporter used, and the graph's operator types."""
    import torch

    ids = torch.tensor([[1, 2, 3], [1, 0, 0]], dtype=torch.int64)
    counts = torch.tensor([3, 1], dtype=torch.int64)
    data, how = export_onnx(build_padded_module(model), (ids, counts), ["ids", "counts"],
                            {"ids": {0: "batch", 1: "tokens"}, "counts": {0: "batch"}, "probs": {0: "batch"}})
    return data, how, _op_types(data)


def _op_types(data: bytes) -> list[str]:
    import onnx

    proto = onnx.ModelProto()
    proto.ParseFromString(data)
    return sorted({n.op_type for n in proto.graph.node})
