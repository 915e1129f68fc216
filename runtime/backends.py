"""The two backends over the same bundle bytes: onnxruntime (default) and numpy.

Both take (B, T) int64 ids with every id in range and (B,) int64 counts, and
return (B, C) float32 probabilities and logits.
"""

from __future__ import annotations

import numpy as np

from .bundle import Bundle
from .errors import BundleError, DanpackError
from .forward import Layer, forward_logits, softmax

BACKENDS = ("onnxruntime", "numpy")


class NumpyBackend:
    """The runtime's numpy forward pass over the bundle's tensors (no onnxruntime needed)."""

    name = "numpy"

    def __init__(self, bundle: Bundle) -> None:
        t = bundle.tensors
        self.table = t["table"]  # (R, W) int8 or float32
        self.scales = t.get("scales") if bundle.manifest["table"]["dtype"] == "int8" else None  # (R,)
        self.layers = tuple(
            Layer(t.get(f"layer.{i}.weight") if spec["weight"] else None, t[f"layer.{i}.bias"], spec["activation"])
            for i, spec in enumerate(bundle.manifest["layers"])
        )

    def run(self, ids: np.ndarray, counts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        logits = forward_logits(self.table, self.layers, ids, counts, self.scales)  # (B, C)
        return softmax(logits), logits


def session_options(threads: int = 1):
    """onnxruntime SessionOptions with the device defaults (also used by bench/ for its baselines)."""
    import onnxruntime as ort

    options = ort.SessionOptions()
    options.intra_op_num_threads = threads
    options.inter_op_num_threads = 1
    options.execution_mode = ort.ExecutionMode.ORT_SEQUENTIAL
    options.log_severity_level = 3  # errors only: a device log stays quiet
    # idle cores must not keep spinning after each call on a small board
    options.add_session_config_entry("session.intra_op.allow_spinning", "0")
    options.add_session_config_entry("session.inter_op.allow_spinning", "0")
    return options


class OrtBackend:
    """onnxruntime session with device-friendly defaults; the bundle's tensors are handed in once."""

    name = "onnxruntime"

    def __init__(self, bundle: Bundle, threads: int = 1) -> None:
        import onnxruntime as ort

        options = session_options(threads)
        names = sorted(bundle.tensors)
        values = [ort.OrtValue.ortvalue_from_numpy(bundle.tensors[n]) for n in names]
        options.add_external_initializers(names, values)
        try:
            self.session = ort.InferenceSession(bundle.graph, options, providers=["CPUExecutionProvider"])
        except Exception as e:  # onnxruntime raises its own Fail/InvalidGraph/... types
            raise BundleError(f"bundle graph was refused by onnxruntime ({type(e).__name__}: {e}); "
                              "repack the model with this danpack version") from e
        del values  # onnxruntime copied the data into the session

    def run(self, ids: np.ndarray, counts: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        probs, logits = self.session.run(("probs", "logits"), {"ids": ids, "counts": counts})
        return probs, logits


def open_backend(bundle: Bundle, backend: str, threads: int):
    """Instantiate a backend by name."""
    if backend == "onnxruntime":
        return OrtBackend(bundle, threads)
    if backend == "numpy":
        return NumpyBackend(bundle)
    raise DanpackError(f"backend {backend!r} is not one of {BACKENDS}")
