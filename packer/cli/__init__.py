"""`danpack` command line: thin wrappers that parse options and call library functions.

Each command module registers itself on `app` when imported.
"""

from .app import app

# Command modules: importing one registers its command(s).
from . import convert_torch  # noqa: E402,F401
from . import pack  # noqa: E402,F401  (pack, inspect, export-onnx)
from . import check  # noqa: E402,F401
from . import demo  # noqa: E402,F401


def main() -> None:
    app()
