"""danpack's packer: float DAN -> one int8 bundle, and the checks around it."""

__version__ = "0.1.0"
