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
    """Entry point of `danpack`: a full standard output ends it without a traceback (click itself ends a
    broken pipe, `| head`, with exit 1)."""
    import sys

    try:
        app()
    except OSError as e:  # stdout on a full disk or /dev/full: say so on stderr
        print(f"danpack: error: cannot write the output ({e.strerror or e})", file=sys.stderr)
        raise SystemExit(2)
