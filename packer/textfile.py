"""Reading text files users hand us: plain lines, JSONL, CSV or TSV, with errors that name file and line.

One reader for the packer's corpora and the check's evaluation sets.
"""

from __future__ import annotations

import codecs
import csv
import json
import os
from collections.abc import Iterator
from pathlib import Path

from danpack.runtime.errors import DanpackError
from danpack.runtime.formats import choose_format


class TextFileError(DanpackError):
    """A corpus or evaluation file cannot be read as the expected records."""


def detect_format(path: str | os.PathLike) -> str:
    """"jsonl", "csv", "tsv" or "lines": the suffix, else the first line (`danpack.runtime.formats`, the rule
    danpack-run follows too)."""
    return choose_format(path)[0]


def format_warning(path: str | os.PathLike) -> str | None:
    """A warning when the file's name and content disagree (a .txt file of JSON objects), else None."""
    return choose_format(path)[1]


def iter_records(path: str | os.PathLike, text_field: str = "text", fmt: str | None = None) -> Iterator[dict]:
    """Yield one dict per record, each with a str under `text_field`; raise TextFileError on bad input."""
    for _, record in iter_numbered_records(path, text_field, fmt):
        yield record


def iter_numbered_records(path: str | os.PathLike, text_field: str | None = "text",
                          fmt: str | None = None) -> Iterator[tuple[int, dict]]:
    """(line where the record starts, record) pairs, so later checks can name the line of a bad value.
    `text_field` None (JSONL only): records need no text, e.g. a framework's outputs beside an eval set."""
    path = Path(path)
    fmt = fmt or detect_format(path)
    if fmt not in ("lines", "jsonl", "csv", "tsv"):
        raise TextFileError(f"{path}: unknown format {fmt!r}; use lines, jsonl, csv or tsv")
    try:
        handle = open(path, "rb")
    except FileNotFoundError as e:
        raise TextFileError(f"{path}: no such file") from e
    except OSError as e:
        raise TextFileError(f"{path}: cannot be opened ({e})") from e
    with handle:
        lines = _decode_lines(path, handle)
        if fmt == "lines":
            for number, line in enumerate(lines, start=1):
                yield number, {text_field: line.rstrip("\r\n")}
        elif fmt == "jsonl":
            yield from _iter_jsonl(path, lines, text_field)
        else:
            yield from _iter_table(path, lines, text_field, "," if fmt == "csv" else "\t")


def _decode_lines(path: Path, handle) -> Iterator[str]:
    """The file's lines as text, each with its LF (or CRLF); a leading byte-order mark (Windows editors) is
    dropped. Decoding line by line lets a byte that is not UTF-8 be reported with its line."""
    for number, raw in enumerate(handle, start=1):
        if number == 1 and raw.startswith(codecs.BOM_UTF8):
            raw = raw[len(codecs.BOM_UTF8):]
        try:
            yield raw.decode("utf-8")
        except UnicodeDecodeError as e:
            raise TextFileError(f"{path}:{number}: is not valid UTF-8 ({e.reason} at byte {e.start + 1} of the "
                                "line); save the file as UTF-8") from e


def _iter_jsonl(path: Path, lines: Iterator[str], text_field: str | None) -> Iterator[tuple[int, dict]]:
    for number, line in enumerate(lines, start=1):
        if not line.strip():
            continue
        try:
            record = json.loads(line)
        except json.JSONDecodeError as e:
            raise TextFileError(f"{path}:{number}: not valid JSON ({e.msg})") from e
        if not isinstance(record, dict):
            raise TextFileError(f"{path}:{number}: expected a JSON object, found {type(record).__name__}")
        if text_field is not None and not isinstance(record.get(text_field), str):
            raise TextFileError(f"{path}:{number}: field {text_field!r} is missing or not a string; "
                                f"fields present: {sorted(record)} (choose the field with --text-field)")
        yield number, record


def _iter_table(path: Path, lines: Iterator[str], text_field: str, delimiter: str) -> Iterator[tuple[int, dict]]:
    """Rows of a CSV/TSV file with a header line, as dicts. Strict quoting (RFC 4180): an opened quote must
    close, or one unterminated quote would swallow the rest of the file as a single text."""
    kind = "CSV" if delimiter == "," else "TSV"
    reader = csv.reader(lines, delimiter=delimiter, strict=True)
    first = 1  # the line where the current row starts (a quoted field may span lines)
    try:
        header = next(reader, None)
        if header is None:
            raise TextFileError(f"{path}: is empty; a {kind} file starts with a header line naming its columns")
        if text_field not in header:
            raise TextFileError(f"{path}: header {header} has no column {text_field!r} "
                                "(the first line must name the columns; choose the text column with --text-field)")
        while True:
            first = reader.line_num + 1
            fields = next(reader, None)
            if fields is None:
                return
            if not fields:  # a blank line
                continue
            if len(fields) != len(header):
                raise TextFileError(f"{path}:{first}: has {len(fields)} columns where the header has {len(header)}")
            yield first, dict(zip(header, fields))
    except csv.Error as e:
        raise TextFileError(f"{path}:{first}: malformed {kind} ({e}); a field that opens a quote must close it, "
                            'and a quote inside a quoted field is written twice ("")') from e
