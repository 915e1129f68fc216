"""The contenders measured side by side: the float original in four forms, the packed bundle on two backends.

Every contender answers `predict(texts) -> (B, C) probabilities` from raw texts, so each pays for
its tokenizer; all of them tokenize with the one runtime Tokenizer and map tokens with the one
Encoder. `encode` and `run` split that call in two for the profile (tokenizer share vs model).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from danpack import runtime
from danpack.model import FloatModel
from danpack.runtime.classifier import Classifier
from danpack.runtime.forward import forward_logits, softmax

from . import torch_baselines as tb

# keys, in table order; the ratios in the report are packed-ort against float-onnx and torch-eager
FLOAT_NUMPY, FLOAT_ONNX, TORCH_EAGER = "float-numpy", "float-onnx", "torch-eager"
TORCH_ONNX_BAG, TORCH_ONNX_PADDED = "torch-onnx-bag", "torch-onnx-padded"
PACKED_ORT, PACKED_NUMPY = "packed-ort", "packed-numpy"
LABELS = {
    FLOAT_NUMPY: "float original, numpy (FloatModel.predict_proba)",
    FLOAT_ONNX: "float original, float32 ONNX via the runtime (unpruned)",
    TORCH_EAGER: "float original, PyTorch eager (EmbeddingBag mean)",
    TORCH_ONNX_BAG: "float original, PyTorch ONNX export of EmbeddingBag",
    TORCH_ONNX_PADDED: "float original, PyTorch ONNX export of Embedding + masked mean",
    PACKED_ORT: "packed bundle, onnxruntime backend",
    PACKED_NUMPY: "packed bundle, numpy backend",
}


@dataclass
class Contender:
    """One way of answering texts; `predict` is the public call a user would make."""

    key: str
    predict: Callable[[Sequence[str]], np.ndarray]  # (B,) texts -> (B, C) probabilities
    encode: Callable[[Sequence[str]], tuple]  # texts -> model inputs (tokenizer + vocabulary)
    run: Callable[[tuple], np.ndarray]  # model inputs -> (B, C) probabilities
    notes: list[str] = field(default_factory=list)
    artifact_bytes: int | None = None  # size of what this contender loads (bundle / ONNX file), when it is one file
    labels: tuple[str, ...] = ()  # output order

    @property
    def label(self) -> str:
        return LABELS[self.key]


def ort_session(model_bytes: bytes):
    """An onnxruntime session with the runtime's device settings (one intra-op thread, no spinning)."""
    import onnxruntime as ort

    from danpack.runtime.backends import session_options

    return ort.InferenceSession(model_bytes, session_options(1), providers=["CPUExecutionProvider"])


def classifier_contender(key: str, classifier: Classifier) -> Contender:
    """A runtime Classifier (packed bundle, or the float bundle) as a contender."""
    return Contender(key, classifier.predict_proba, classifier.encoder.encode,
                     lambda inputs: classifier.backend.run(*inputs)[0],
                     artifact_bytes=classifier.bundle.size, labels=classifier.labels)


def float_numpy(model: FloatModel) -> Contender:
    """FloatModel.predict_proba with its encoder built once (the method rebuilds it when not given one)."""
    encoder = model.encoder()
    return Contender(FLOAT_NUMPY, lambda texts: model.predict_proba(texts, encoder), encoder.encode,
                     lambda inputs: softmax(forward_logits(model.embedding, model.layers, *inputs)),
                     labels=model.labels)


def float_onnx(float_bundle: bytes, path: Path) -> Contender:
    """The unpruned float32 bundle (PackOptions(quantize=False, fold="no")), written to `path` and opened with
    runtime.load as the packed bundle is (the same encoder, native or Python, on both sides of the ratio)."""
    path.write_bytes(float_bundle)
    return classifier_contender(FLOAT_ONNX, runtime.load(path, backend="onnxruntime", threads=1))


def packed(path: Path, backend: str) -> Contender:
    """The packed bundle file through runtime.load."""
    return classifier_contender(PACKED_ORT if backend == "onnxruntime" else PACKED_NUMPY,
                                runtime.load(path, backend=backend, threads=1))


def torch_eager(model: FloatModel) -> Contender:
    """BagDAN's eager forward, one intra-op thread, inference mode; inputs from the same Encoder."""
    import torch

    torch.set_num_threads(1)
    module = tb.build_bag_module(model)
    encoder = model.encoder()

    def run(inputs: tuple) -> np.ndarray:
        ids, offsets = inputs
        with torch.inference_mode():
            return module(torch.from_numpy(ids), torch.from_numpy(offsets)).numpy()

    encode = (lambda texts: tb.flat_inputs(encoder, texts))
    return Contender(TORCH_EAGER, lambda texts: run(encode(texts)), encode, run, labels=model.labels)


def torch_onnx(model: FloatModel, padded: bool) -> Contender:
    """PyTorch's ONNX export run by onnxruntime with one thread; raises RuntimeError when no exporter runs."""
    encoder = model.encoder()
    if padded:
        data, how, ops = tb.export_padded(model)
        session = ort_session(data)
        names = ("ids", "counts")
        encode = encoder.encode
    else:
        data, how, ops = tb.export_bag(model)
        session = ort_session(data)
        names = ("ids", "offsets")
        encode = (lambda texts: tb.flat_inputs(encoder, texts))
    size = len(data)
    del data

    def run(inputs: tuple) -> np.ndarray:
        return session.run(["probs"], dict(zip(names, inputs)))[0]

    key = TORCH_ONNX_PADDED if padded else TORCH_ONNX_BAG
    notes = [f"exporter: {how}; operators: {', '.join(ops)}"]
    return Contender(key, lambda texts: run(encode(texts)), encode, run, notes, size, model.labels)
