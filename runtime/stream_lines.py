"""Input side of `danpack-run`: a byte stream -> lines -> micro-batches that close early when input pauses.

Lines are cut on b"\\n" from raw bytes (no decoding here). A line longer than the limit is replaced by
the OVERLONG marker as soon as it passes the limit, and its remaining bytes are dropped as they arrive,
so an endless line never sits in memory. Batches fill up to `size`; a partial batch is handed over when
no further input arrives within `max_wait` seconds of its oldest line (interactive use), while a file or a
busy pipe always yields full batches.
"""

from __future__ import annotations

import io
import os
import select
import time
from collections.abc import Iterator
from typing import BinaryIO

CHUNK_BYTES = 1 << 16  # bytes per read: a pipe's default capacity on Linux, ~1,000 short comments

OVERLONG = object()  # marker that stands in the line sequence for a line longer than the limit


class LineSplitter:
    """Cuts chunks of bytes into lines (without b"\\n"); holds at most `limit` + one chunk of an unfinished line."""

    def __init__(self, limit: int) -> None:
        self.limit = limit
        self._pieces: list[bytes] = []  # start of the unfinished line
        self._held = 0  # bytes in `_pieces`
        self._skipping = False  # inside an overlong line: drop bytes up to the next newline

    @property
    def held(self) -> int:
        """Bytes of an unfinished line kept in memory (bounded by limit + 1 + one chunk)."""
        return self._held

    def feed(self, chunk: bytes) -> list:
        """Lines completed by `chunk`, in order; an overlong line appears once, as OVERLONG."""
        lines = chunk.split(b"\n")
        tail = lines.pop()  # bytes after the last newline: the start of the next line
        if lines:
            if self._skipping:  # the first piece ends the overlong line: drop it
                del lines[0]
                self._skipping = False
            elif self._pieces:
                self._pieces.append(lines[0])
                lines[0] = b"".join(self._pieces)
                self._pieces, self._held = [], 0
        if tail and not self._skipping:
            self._pieces.append(tail)
            self._held += len(tail)
            if self._held > self.limit + 1:  # + 1: a CR may still come before the newline
                self._pieces, self._held, self._skipping = [], 0, True
                lines.append(OVERLONG)
        return lines

    def finish(self) -> list:
        """The last line when the stream does not end with a newline (empty list otherwise)."""
        line = b"".join(self._pieces)
        self._pieces, self._held, self._skipping = [], 0, False
        return [line] if line else []


def _fileno(source: BinaryIO) -> int | None:
    try:
        return source.fileno()
    except (AttributeError, OSError, io.UnsupportedOperation):
        return None


class _Waiter:
    """Waits for input on a descriptor, and for a signal when given the signal wakeup descriptor.

    Without the wakeup descriptor a signal that lands just before a blocking read is lost until more
    input comes (its Python handler runs only when the read returns): with it, the signal makes the
    wait return and its handler runs at once.
    """

    def __init__(self, fd: int, wake_fd: int | None) -> None:
        self.fd, self.wake_fd = fd, wake_fd
        self.poller = select.poll()
        self.poller.register(fd, select.POLLIN | select.POLLPRI)
        if wake_fd is not None:
            self.poller.register(wake_fd, select.POLLIN)

    def wait(self, deadline: float | None) -> bool:
        """Whether input (or its end) is ready before `deadline` (a time.monotonic() value; None: wait for
        it); runs signal handlers."""
        while True:
            left = None if deadline is None else max(0, int((deadline - time.monotonic()) * 1000.0 + 0.999))
            ready = {fd for fd, _ in self.poller.poll(left)}
            if self.wake_fd in ready:
                self._drain_wakeups()  # a handler that stops the stream has raised by now
            if self.fd in ready:
                return True
            if deadline is not None and time.monotonic() >= deadline:
                return False

    def _drain_wakeups(self) -> None:
        try:
            while os.read(self.wake_fd, 512):
                pass
        except BlockingIOError:
            pass

    def read(self) -> bytes:
        """One read of at most CHUNK_BYTES once input is ready (b"" at its end)."""
        while True:
            self.wait(None)
            try:
                return os.read(self.fd, CHUNK_BYTES)
            except BlockingIOError:  # a non-blocking descriptor that another reader emptied first
                continue


def read_batches(source: BinaryIO, size: int, max_wait: float, limit: int,
                 wake_fd: int | None = None) -> Iterator[list]:
    """Batches (lists of at most `size` lines or OVERLONG markers) in input order.

    A source with a file descriptor is read through the descriptor directly (unbuffered `os.read`, so a
    partial batch can be answered while the producer pauses); other sources (BytesIO) through `read`.
    `wake_fd` is the read end of the descriptor given to `signal.set_wakeup_fd`, if any.
    """
    splitter = LineSplitter(limit)
    fd = _fileno(source)
    waiter = _Waiter(fd, wake_fd) if fd is not None else None
    pending: list = []
    deadline = 0.0  # when the oldest pending line has waited max_wait
    while True:
        if pending and waiter is not None:
            if not waiter.wait(deadline):  # the input paused: answer what is there
                yield pending
                pending = []
                continue
        chunk = waiter.read() if waiter is not None else source.read(CHUNK_BYTES)
        if not chunk:
            break
        arrived = time.monotonic()
        lines = splitter.feed(chunk)
        if not lines:
            continue
        if not pending:
            deadline = arrived + max_wait
        pending.extend(lines)
        if len(pending) >= size:
            full = len(pending) - len(pending) % size
            for start in range(0, full, size):
                yield pending[start : start + size]
            pending = pending[full:]
            deadline = arrived + max_wait  # what is left arrived with this chunk
    pending.extend(splitter.finish())
    for start in range(0, len(pending), size):
        yield pending[start : start + size]
