"""Small helpers shared by the CLI commands."""

from __future__ import annotations

from typing import NoReturn

import typer


def fail(message: str, code: int = 2) -> NoReturn:
    """Print an error to stderr and exit (2: bad usage or unreadable input)."""
    typer.echo(f"danpack: error: {message}", err=True)
    raise typer.Exit(code=code)


def human_bytes(n: float) -> str:
    for unit in ("B", "KB", "MB", "GB"):
        if abs(n) < 1000 or unit == "GB":
            return f"{n:.0f} {unit}" if unit == "B" else f"{n:.1f} {unit}"
        n /= 1000
    return f"{n:.1f} GB"
