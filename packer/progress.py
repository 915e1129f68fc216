"""Progress for long commands: a live status line on a terminal, plain timed lines otherwise (stderr)."""

from __future__ import annotations

import sys
import time
from contextlib import contextmanager


class Steps:
    """Reports numbered steps of a procedure to stderr; `quiet` silences it."""

    def __init__(self, total: int, quiet: bool = False) -> None:
        self.total, self.done, self.quiet = total, 0, quiet
        self.console = None
        if not quiet and sys.stderr.isatty():
            from rich.console import Console

            self.console = Console(stderr=True)

    @contextmanager
    def step(self, label: str):
        self.done += 1
        head = f"[{self.done}/{self.total}] {label}"
        start = time.perf_counter()
        if self.quiet:
            yield
            return
        if self.console is not None:
            with self.console.status(head + " …"):
                yield
            self.console.print(f"{head} [dim]({time.perf_counter() - start:.2f} s)[/dim]")
        else:
            yield
            print(f"{head} ({time.perf_counter() - start:.2f} s)", file=sys.stderr, flush=True)

    def note(self, message: str) -> None:
        if not self.quiet:
            print(f"      {message}", file=sys.stderr, flush=True)
