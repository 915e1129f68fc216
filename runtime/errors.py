"""The project's error hierarchy: one documented root, subclasses per input kind.

Every error a user can trigger with bad input is a `DanpackError` (a `ValueError`),
with a message that names what was found, what was expected, and the fix.
"""


class DanpackError(ValueError):
    """Root of every error danpack raises for bad input."""


class ModelError(DanpackError):
    """A float model directory (dan.json, tokens.txt, weights) is malformed."""


class BundleError(DanpackError):
    """A bundle file cannot be trusted or read: the one error `runtime.load` raises."""


class TokenizerError(DanpackError):
    """A tokenizer spec is invalid (unknown normalisation form, bad pattern, ...)."""
