"""Which format a text file holds: one rule for every command (pack, check, danpack-run).

1. An explicit choice (an option) wins.
2. A known suffix decides: .jsonl / .ndjson / .json -> jsonl, .csv -> csv, .tsv -> tsv, .txt -> lines.
3. Otherwise (another suffix, none) the first non-blank line decides: a JSON object -> jsonl, else lines.

A .txt file whose first line is a JSON object is still read as plain lines (its name says so), with a warning:
classifying raw JSON text is almost never what was meant.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

SUFFIXES = {".jsonl": "jsonl", ".ndjson": "jsonl", ".json": "jsonl", ".csv": "csv", ".tsv": "tsv", ".txt": "lines"}
SNIFF_BYTES = 1 << 16  # the first line is looked at within this many bytes


def looks_like_json_object(line: str | bytes) -> bool:
    """True when the line (whitespace aside) is one JSON object."""
    text = line.decode("utf-8", "replace") if isinstance(line, bytes) else line
    text = text.strip().lstrip("\ufeff")
    if not (text.startswith("{") and text.endswith("}")):
        return False
    try:
        return isinstance(json.loads(text), dict)
    except (ValueError, RecursionError):
        return False


def first_line(path: str | os.PathLike) -> bytes | None:
    """The first non-blank line of a regular file (None for a pipe, a device or an unreadable file)."""
    try:
        if not Path(path).is_file():
            return None
        with open(path, "rb") as f:
            head = f.read(SNIFF_BYTES)
    except OSError:
        return None
    for line in head.splitlines():
        if line.strip():
            return line
    return None


def choose_format(path: str | os.PathLike, forced: str | None = None) -> tuple[str, str | None]:
    """(format, warning or None) for a file, by the rule above."""
    if forced is not None:
        return forced, None
    suffix = Path(path).suffix.lower()
    line = first_line(path)
    json_first = line is not None and looks_like_json_object(line)
    if suffix in SUFFIXES:
        fmt = SUFFIXES[suffix]
        if fmt == "lines" and json_first:
            return fmt, (f"{path}: its first line is a JSON object but a {suffix} file is read as plain lines (the "
                         "JSON text itself would be classified); name it .jsonl or choose the JSONL format")
        return fmt, None
    return ("jsonl" if json_first else "lines"), None
