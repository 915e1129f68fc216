"""danpack's device runtime: load a bundle, classify texts. Imports only stdlib, numpy, msgpack, onnxruntime.

    from danpack import runtime
    clf = runtime.load("sentiment.danpack")      # backend="onnxruntime" (default) or "numpy"
    clf.predict(["the charger was quick"])

The names below load on first use, so `danpack.runtime.errors` can be imported without numpy.
"""

from __future__ import annotations

from importlib import import_module

# public name -> submodule that defines it
_EXPORTS = {
    "Bundle": "bundle", "decode_bundle": "bundle", "read_bundle": "bundle",
    "Classifier": "classifier", "load": "classifier",
    "BundleError": "errors", "DanpackError": "errors",
}

__all__ = sorted(_EXPORTS)


def __getattr__(name: str):
    if name in _EXPORTS:
        value = getattr(import_module(f"{__name__}.{_EXPORTS[name]}"), name)
        globals()[name] = value  # later look-ups skip this function
        return value
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted([*globals(), *_EXPORTS])
