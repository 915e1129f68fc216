"""Small helpers shared by the CLI commands."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from typing import NoReturn

import typer

from danpack.units import UnitError
from danpack.units import parse_share as _parse_share


def fail(message: str, code: int = 2) -> NoReturn:
    """Print an error to stderr and exit (2: bad usage or unreadable input)."""
    typer.echo(f"danpack: error: {message}", err=True)
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
        typer.echo(f"\ndanpack: interrupted; {outcome}", err=True)
        raise typer.Exit(code=EXIT_INTERRUPTED) from None
