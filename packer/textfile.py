"""Reading text files users hand us: plain lines, JSONL, CSV or TSV, with errors that name file and line.

One reader for the packer's corpora and the check's evaluation sets.
"""

from __future__ import annotations

import csv
import json
import os
from collections.abc import Iterator
from pathlib import Path

from runtime.errors import DanpackError


class TextFileError(DanpackError):
    """A corpus or evaluation file cannot be read as the expected records."""


def detect_format(path: Path) -> str:
    """"jsonl", "csv", "tsv" or "lines", from the suffix (a .txt file is plain lines)."""
    suffix = path.suffix.lower()
    if suffix in (".jsonl", ".ndjson", ".json"):
        return "jsonl"
    if suffix in (".csv", ".tsv"):
        return suffix[1:]
    return "lines"


def iter_records(path: str | os.PathLike, text_field: str = "text", fmt: str | None = None) -> Iterator[dict]:
    """Yield one dict per record, each with a str under `text_field`; raise TextFileError on bad input."""
    path = Path(path)
    fmt = fmt or detect_format(path)
    try:
        handle = open(path, encoding="utf-8-sig", newline="")  # a leading byte-order mark (Windows editors) is dropped
    except FileNotFoundError as e:
        raise TextFileError(f"{path}: no such file") from e
    except OSError as e:
        raise TextFileError(f"{path}: cannot be opened ({e})") from e
    with handle:
        try:
            if fmt == "lines":
                for line in handle:
                    yield {text_field: line.rstrip("\r\n")}
            elif fmt == "jsonl":
                yield from _iter_jsonl(path, handle, text_field)
            elif fmt in ("csv", "tsv"):
                yield from _iter_table(path, handle, text_field, "," if fmt == "csv" else "\t")
            else:
                raise TextFileError(f"{path}: unknown format {fmt!r}; use lines, jsonl, csv or tsv")
        except UnicodeDecodeError as e:
            raise TextFileError(f"{path}: is not valid UTF-8 ({e.reason} at byte {e.start} of a read block)",
                                ) from e


def _iter_jsonl(path: Path, handle, text_field: str) -> Iterator[dict]:
    for number, line in enumerate(handle, start=1):
        if not line.strip():
            continue
        try:
            record = json.loads(line)
        except json.JSONDecodeError as e:
            raise TextFileError(f"{path}:{number}: not valid JSON ({e.msg})") from e
        if not isinstance(record, dict):
            raise TextFileError(f"{path}:{number}: expected a JSON object, found {type(record).__name__}")
        if not isinstance(record.get(text_field), str):
            raise TextFileError(f"{path}:{number}: field {text_field!r} is missing or not a string; "
                                f"fields present: {sorted(record)} (choose the field with --text-field)")
        yield record


def _iter_table(path: Path, handle, text_field: str, delimiter: str) -> Iterator[dict]:
    reader = csv.DictReader(handle, delimiter=delimiter)
    if reader.fieldnames is None or text_field not in reader.fieldnames:
        raise TextFileError(f"{path}: header {reader.fieldnames} has no column {text_field!r} "
                            "(the first line must name the columns; choose the text column with --text-field)")
    for number, row in enumerate(reader, start=2):
        if None in row or any(v is None for v in row.values()):
            raise TextFileError(f"{path}:{number}: has a different number of columns than the header")
        yield row
