"""Records of `danpack-run`: raw input lines -> (text, passthrough fields) or an error reason; answers -> output lines.

A parsed record is a tuple (line, text, extra, error): `line` is the 1-based input line number, `text`
the string to classify (None on error), `extra` the other fields of a JSONL object (passed through to
the output; None for plain text), `error` the reason the record cannot be classified (None when fine).
"""

from __future__ import annotations

import json
import math
import operator
import re
from collections.abc import Callable, Sequence

import numpy as np

from .safe_text import escape_text
from .stream_lines import OVERLONG

EMPTY = "empty line"
BOM = b"\xef\xbb\xbf"  # UTF-8 byte order mark some editors put at the start of a file
# output keys; input fields so named come out as "input_<name>"
RESERVED = frozenset(("line", "label", "probs", "known_tokens", "no_known_token", "error", "skipped"))
JSON_TYPES = {dict: "an object", list: "an array", str: "a string", int: "a number", float: "a number",
              bool: "a boolean", type(None): "null"}
# JSON nesting deeper than this is an error record before decoding: well below the ~1,000 levels at which Python's
# decoder or encoder (json.dumps of the passthrough fields) raises RecursionError.
MAX_JSON_DEPTH = 100
MAX_INT_DIGITS = 4000  # longer JSON integers are refused (Python's own int() stops at 4300 digits)
TSV_ESCAPES = str.maketrans({"\\": "\\\\", "\t": "\\t", "\n": "\\n", "\r": "\\r"})  # common practice for TSV

_MISSING = object()  # a JSON object without the text field
Parsed = tuple  # (line: int, text: str | None, extra: dict | None, error: str | None)


class Skipped(str):
    """The `error` slot of a record passed over on request (an empty line with --skip-empty): answered with a
    "skipped" record, not counted as an error."""


def _reject_constant(name: str) -> None:
    raise ValueError(f"{name} is not a JSON number")


def _finite_float(text: str) -> float:
    value = float(text)
    if math.isinf(value):
        raise ValueError(f"number {text[:24]} is out of range")
    return value


def _bounded_int(text: str) -> int:
    if len(text) > MAX_INT_DIGITS:
        raise ValueError(f"an integer of {len(text)} digits is too long")
    return int(text)


# Strict JSON: NaN / Infinity and numbers that overflow to inf would not survive being written back out.
_decode_json = json.JSONDecoder(parse_constant=_reject_constant, parse_float=_finite_float,
                                parse_int=_bounded_int).decode


_JSON_STRING = re.compile(r'"[^"\\]*(?:\\.[^"\\]*)*"')  # a JSON string literal (its brackets are text)
_BRACKET = re.compile(r"[\[\]{}]")


def nests_deeper(doc: str, limit: int = MAX_JSON_DEPTH) -> bool:
    """Whether the JSON text `doc` opens more than `limit` arrays/objects inside one another (linear time)."""
    if doc.count("[") + doc.count("{") <= limit:  # the common case: cannot be that deep
        return False
    depth = 0
    for m in _BRACKET.finditer(_JSON_STRING.sub("", doc)):
        depth += 1 if m.group() in "[{" else -1
        if depth > limit:
            return True
    return False


def _check_bytes(raw, line: int, limit: int, allow_empty: bool) -> tuple[str | None, str | None]:
    """The common checks of one raw line -> (decoded text, None) or (None, reason)."""
    if raw is OVERLONG:
        return None, f"line longer than {limit} bytes (skipped)"
    if raw[-1:] == b"\r":  # CRLF line ending: one CR belongs to the ending
        raw = raw[:-1]
    if line == 1 and raw[:3] == BOM:
        raw = raw[3:]
    if not raw and not allow_empty:
        return None, EMPTY
    if len(raw) > limit:
        return None, f"line longer than {limit} bytes (skipped)"
    if b"\0" in raw:  # binary data or a damaged file, never a driver's comment
        return None, "NUL byte in line"
    try:
        return raw.decode("utf-8"), None
    except UnicodeDecodeError as e:
        return None, f"not valid UTF-8 (byte {e.start + 1})"


def make_parser(jsonl: bool, text_field: str, limit: int, classify_empty: bool,
                skip_empty: bool = False) -> Callable[[object, int], Parsed]:
    """A function (raw line, line number) -> parsed record, for plain-text or JSONL input."""

    def parse_plain(raw, line: int) -> Parsed:
        text, error = _check_bytes(raw, line, limit, classify_empty)
        if skip_empty and error == EMPTY:
            return line, None, None, Skipped(EMPTY)
        return line, text, None, error

    def parse_jsonl(raw, line: int) -> Parsed:
        doc, error = _check_bytes(raw, line, limit, False)
        if skip_empty and error == EMPTY:
            return line, None, None, Skipped(EMPTY)
        if error is not None:
            return line, None, None, error
        if nests_deeper(doc):
            return line, None, None, f"invalid JSON: nested deeper than {MAX_JSON_DEPTH} levels"
        try:
            obj = _decode_json(doc)
        except json.JSONDecodeError as e:
            return line, None, None, f"invalid JSON: {e.msg.removesuffix(' at')} (column {e.colno})"
        except RecursionError:
            return line, None, None, "invalid JSON: nested too deeply"
        except ValueError as e:  # NaN / Infinity, numbers out of range, over-long integers
            return line, None, None, f"invalid JSON: {e}"
        if type(obj) is not dict:
            return line, None, None, f"JSON value is {JSON_TYPES[type(obj)]}, expected an object"
        text = obj.pop(text_field, _MISSING)
        if text is _MISSING:
            return line, None, obj, f"field {text_field!r} is missing"
        if type(text) is not str:
            return line, None, obj, f"field {text_field!r} is {JSON_TYPES.get(type(text), 'not a string')}, expected a string"
        if "\0" in text:
            return line, None, obj, f"field {text_field!r} holds a NUL character"
        return line, text, obj, None

    return parse_jsonl if jsonl else parse_plain


def _extra_json(extra: dict) -> str:
    """Passthrough fields as the inside of a JSON object, with a leading comma ("" when there are none)."""
    if not extra:
        return ""
    if not RESERVED.isdisjoint(extra):  # rename in place, keeping the input's key order
        extra = {_renamed(key, extra): value for key, value in extra.items()}
    return "," + escape_text(json.dumps(extra, ensure_ascii=False, separators=(",", ":"))[1:-1])


def _renamed(key: str, extra: dict) -> str:
    """`key`, or input_<key> for a reserved output key (prefixed again while that name is taken)."""
    new = key
    while new in RESERVED or (new != key and new in extra):
        new = "input_" + new
    return new


def _tsv_value(value) -> str:
    if value is None:
        return ""
    text = value if isinstance(value, str) else json.dumps(value, ensure_ascii=False, separators=(",", ":"))
    return escape_text(text.translate(TSV_ESCAPES))


def _rank(probs: np.ndarray, top_k: int) -> list[list[int]]:
    """(B, C) probabilities -> per row the indices of the k largest, largest first (ties: label order)."""
    return np.argsort(-probs, axis=1, kind="stable")[:, :top_k].tolist()  # (B, k)


class JsonlFormatter:
    """One JSON object per record: line, passthrough fields, then label and probs (or error)."""

    header = b""

    def __init__(self, labels: Sequence[str], top_k: int | None) -> None:
        self.names = [escape_text(json.dumps(label, ensure_ascii=False)) for label in labels]
        self.keys = [name + ":" for name in self.names]
        self.top_k = top_k

    def format(self, parsed: Sequence[Parsed], probs: np.ndarray | None, known: np.ndarray | None = None) -> bytes:
        """Output bytes of a batch; `probs` (N, C) and `known` (N,) hold the rows of the N records without error,
        in order."""
        out = []
        if probs is not None:
            strs = probs.astype(str).tolist()  # (N, C) shortest strings that read back as the same float32
            order = _rank(probs, self.top_k) if self.top_k else None
            best = probs.argmax(axis=1).tolist() if order is None else [o[0] for o in order]  # (N,)
            counts = [0] * len(strs) if known is None else known.tolist()  # (N,)
        keys, names, add = self.keys, self.names, operator.add
        j = 0
        for line, _text, extra, error in parsed:
            head = f'{{"line":{line}{_extra_json(extra) if extra else ""}'
            if error is not None:
                kind = "skipped" if isinstance(error, Skipped) else "error"
                out.append(f'{head},"{kind}":{escape_text(json.dumps(error, ensure_ascii=False))}}}\n')
                continue
            row = strs[j]
            if order is None:
                body = ",".join(map(add, keys, row))
            else:
                body = ",".join([keys[c] + row[c] for c in order[j]])
            n = counts[j]
            out.append(f'{head},"label":{names[best[j]]},"probs":{{{body}}},"known_tokens":{n},'
                       f'"no_known_token":{"false" if n else "true"}}}\n')
            j += 1
        # a lone surrogate (from a \\ud800 escape in the input) goes out as the same JSON escape
        return "".join(out).encode("utf-8", "backslashreplace")


class TsvFormatter:
    """Tab-separated: line, [id], label, probability (k pairs with top-k), error; values escaped (\\t \\n \\r \\\\)."""

    def __init__(self, labels: Sequence[str], top_k: int | None, id_field: str | None, header: bool) -> None:
        self.names = [escape_text(label.translate(TSV_ESCAPES)) for label in labels]
        self.k = top_k or 1
        self.id_field = id_field
        columns = ["line"] + ([escape_text(id_field.translate(TSV_ESCAPES))] if id_field is not None else [])
        columns += ["label", "probability"]
        for i in range(2, self.k + 1):
            columns += [f"label_{i}", f"probability_{i}"]
        columns += ["known_tokens", "error"]
        self.header = ("\t".join(columns) + "\n").encode("utf-8", "backslashreplace") if header else b""
        self.blank = "\t" * (2 * self.k + 1)  # empty label/probability/known cells of an error row

    def format(self, parsed: Sequence[Parsed], probs: np.ndarray | None, known: np.ndarray | None = None) -> bytes:
        """Output bytes of a batch; `probs` (N, C) and `known` (N,) hold the rows of the N records without error,
        in order. A skipped record's error cell reads "skipped: <reason>"."""
        out = []
        if probs is not None:
            strs = probs.astype(str).tolist()  # (N, C)
            order = _rank(probs, self.k) if self.k > 1 else [[i] for i in probs.argmax(axis=1).tolist()]  # (N, k)
            counts = [0] * len(strs) if known is None else known.tolist()  # (N,)
        names, id_field = self.names, self.id_field
        j = 0
        for line, _text, extra, error in parsed:
            head = str(line) if id_field is None else f"{line}\t{_tsv_value(extra.get(id_field)) if extra else ''}"
            if error is not None:
                reason = f"skipped: {error}" if isinstance(error, Skipped) else error
                out.append(f"{head}{self.blank}\t{escape_text(reason.translate(TSV_ESCAPES))}\n")
                continue
            row = strs[j]
            cells = "\t".join([f"{names[c]}\t{row[c]}" for c in order[j]])
            out.append(f"{head}\t{cells}\t{counts[j]}\t\n")
            j += 1
        return "".join(out).encode("utf-8", "backslashreplace")
