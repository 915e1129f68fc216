"""Writing files safely: atomic replace with the usual permissions, errors that name the path."""

from __future__ import annotations

import hashlib
import glob
import os
import tempfile
from pathlib import Path

from danpack.runtime.errors import DanpackError


class OutputError(DanpackError):
    """An output file cannot be written (missing permission, a file where a folder should be, disk full)."""


def current_umask() -> int:
    """The process umask, read without changing it (Linux), else by setting it back at once."""
    try:
        with open("/proc/self/status", encoding="ascii") as f:
            for line in f:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError):
        pass
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def check_outputs(outputs: dict[str, str | os.PathLike | None],
                  inputs: dict[str, str | os.PathLike | None] | None = None) -> None:
    """Refuse, before any work, outputs that would destroy something: a folder or device at the path,
    an input file, or another output of the same command. Keys name the options in messages."""
    seen: dict[str, str] = {}
    sources = {os.path.realpath(p): name for name, p in (inputs or {}).items() if p is not None and Path(p).exists()}
    for name, out in outputs.items():
        if out is None:
            continue
        path = Path(out)
        if str(out) == "" or path.is_dir():
            raise OutputError(f"{name} {str(out)!r} is a folder; give a file path (the file to write, inside that folder or elsewhere)")
        if path.exists() and not path.is_file():
            raise OutputError(f"{name} {path} is not a regular file (a device or pipe would be replaced); "
                              "give a file path")
        if path.parent.exists() and not path.parent.is_dir():
            raise OutputError(f"{name} {path}: {path.parent} is a file, not a folder")
        if not path.parent.exists():  # as cp and tee do: a typo must not create a tree of folders
            raise OutputError(f"{name} {path}: the folder {path.parent} does not exist; create it first "
                              f"(mkdir -p {path.parent}) or correct the path")
        real = os.path.realpath(path)
        if real in sources:
            raise OutputError(f"{name} {path} would overwrite the input {sources[real]}; write the output elsewhere")
        if real in seen:
            raise OutputError(f"{name} and {seen[real]} both write {path}; give each output its own file")
        seen[real] = name


def remove_stale_partials(path: Path) -> list[Path]:
    """Remove the temporary files `.NAME.PID.XXXX.partial` that a killed writer of `path` left behind: those whose
    process no longer runs (a live writer's file is left alone). Returns what was removed."""
    removed = []
    for tmp in path.parent.glob(f".{glob.escape(path.name)}.*.partial"):
        pid = tmp.name[len(path.name) + 2 :].split(".", 1)[0]
        if not pid.isdigit() or int(pid) == os.getpid():
            continue
        try:
            os.kill(int(pid), 0)
            continue  # still running: its own write will rename or remove the file
        except ProcessLookupError:
            pass
        except (PermissionError, OverflowError, ValueError):  # alive under another user, or not a pid
            continue
        try:
            tmp.unlink()
            removed.append(tmp)
        except OSError:
            pass
    return removed


def write_atomic(path: str | os.PathLike, data: bytes) -> Path:
    """Write bytes to a temp file beside `path`, fsync, then rename over it: never a partial file."""
    path = Path(path)
    check_outputs({"output": path})
    try:
        remove_stale_partials(path)
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.{os.getpid()}.", suffix=".partial", dir=path.parent)
    except OSError as e:
        raise OutputError(f"{path}: cannot write here ({e.strerror or e}); choose another output path") from e
    try:
        os.fchmod(fd, 0o666 & ~current_umask())  # mkstemp makes 0600 files; a bundle gets the usual permissions
        with os.fdopen(fd, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException as e:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        if isinstance(e, OSError):
            raise OutputError(f"{path}: writing failed ({e.strerror or e}); the previous file, if any, is intact") from e
        raise
    return path


def feed_file(digest, path: str | os.PathLike) -> None:
    """Add a file's bytes to a hashlib object, 1 MiB at a time."""
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            digest.update(chunk)


def file_sha256(path: str | os.PathLike) -> str:
    """Hex SHA-256 of a file's bytes."""
    digest = hashlib.sha256()
    feed_file(digest, path)
    return digest.hexdigest()
