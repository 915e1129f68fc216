"""`danpack` command line: thin wrappers that parse options and call library functions.

Each command module registers itself on the one typer app when imported; `load_app` imports them all.
Command modules import the library (numpy, onnx, the runtime) inside their functions, so `danpack --help`
starts in a few tens of milliseconds.
"""

from __future__ import annotations

import sys
from importlib.util import find_spec

# What the `danpack` command needs beyond the runtime's numpy and msgpack (the `packer` extra).
PACKER_LIBRARIES = ("typer", "onnx", "onnxruntime", "safetensors")


def load_app():
    """The typer app with every command registered."""
    from danpack.cli.root import app
    from danpack.cli import check, convert_torch, demo, frontier, golden, pack  # noqa: F401  (importing registers the commands)

    return app


def __getattr__(name: str):
    if name == "app":  # `from danpack.cli import app`, as tests and embedding programs do
        return load_app()
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def main() -> None:
    """Entry point of `danpack`: a device-only install says what to add; a full standard output ends it
    without a traceback (click itself ends a broken pipe, `| head`, with exit 1)."""
    missing = [name for name in PACKER_LIBRARIES if find_spec(name) is None]
    if missing:
        print(f"danpack: error: the packer is not installed here (missing {', '.join(missing)}); this looks like "
              "a device install, which has only the runtime (`danpack-run`, `danpack.runtime`). "
              "Install the packer with: pip install 'danpack[packer]'", file=sys.stderr)
        raise SystemExit(2)
    app = load_app()
    try:
        app()
    except OSError as e:  # stdout on a full disk or /dev/full: say so on stderr
        print(f"danpack: error: cannot write the output ({e.strerror or e})", file=sys.stderr)
        raise SystemExit(2)
