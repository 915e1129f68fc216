"""Small helpers shared by the CLI commands."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from typing import NoReturn

import typer

from danpack.units import UnitError
from danpack.units import parse_share as _parse_share


def echo(text: str, err: bool = False, nl: bool = True) -> None:
    """Print to the terminal through runtime.safe_text: control, format and bidi characters from a bundle, a model
    folder or an input file are shown as \\uXXXX escapes, never sent raw (newlines stay)."""
    from danpack.runtime.safe_text import escape_text

    typer.echo(escape_text(text, keep="\n"), err=err, nl=nl)


def fail(message: str, code: int = 2) -> NoReturn:
    """Print an error to stderr and exit (2: bad usage or unreadable input)."""
    echo(f"danpack: error: {message}", err=True)
    raise typer.Exit(code=code)


def parse_share(text: str, option: str) -> float:
    """A share option (0..1 or a percent); a bad value ends the command with exit 2."""
    try:
        return _parse_share(text, option)
    except UnitError as e:
        fail(str(e))


EXIT_INTERRUPTED = 130  # what a shell reports after Ctrl-C


@contextmanager
def interruptible(outcome: str) -> Iterator[None]:
    """Ctrl-C inside the block ends the command with exit 130 and says what became of its outputs."""
    try:
        yield
    except KeyboardInterrupt:
        echo(f"\ndanpack: interrupted; {outcome}", err=True)
        raise typer.Exit(code=EXIT_INTERRUPTED) from None
