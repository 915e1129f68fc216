"""The check's own error, shared by its modules."""

from danpack.runtime.errors import DanpackError


class CheckError(DanpackError):
    """Inputs of a check that do not fit together (unknown label, bundle of other labels, empty set, ...)."""
