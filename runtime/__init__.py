"""danpack's device runtime: load a bundle, classify texts. Imports only stdlib, numpy, msgpack, onnxruntime."""

from .bundle import Bundle, decode_bundle, read_bundle
from .classifier import Classifier, load
from .errors import BundleError, DanpackError

__all__ = ["Bundle", "BundleError", "Classifier", "DanpackError", "decode_bundle", "load", "read_bundle"]
