"""Golden records: what the runtime computes for each stress text, written as JSONL a host can compare with.

Line 1 is the header {"format": "danpack-golden", "version": 1, "bundle_sha256", "labels", "tokenizer",
"records"}; each further line is one record {"n", "case", "text", ["utf8_hex"], "normalized", "tokens", "ids",
"counts", "probs", "label"}. Probabilities are the runtime's float32 values written as the decimal of their
exact value (a double parse gives back the same float32), so nothing is lost on the way.
"""

from __future__ import annotations

import json
import os
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from danpack.runtime.classifier import Classifier
from danpack.runtime.errors import DanpackError
from danpack.runtime.forward import encode_batch

from .stress import Case

GOLDEN_FORMAT, GOLDEN_VERSION = "danpack-golden", 1


class GoldenError(DanpackError):
    """A golden file or a host's output file cannot be read as the kit's JSONL."""


def exact_floats(values: np.ndarray) -> list[float]:
    """float32 values as Python floats holding their exact value: json writes the shortest decimal of that
    double, which any host's double parser reads back exactly (then exactly to float32)."""
    return [float(v) for v in np.asarray(values, dtype=np.float32)]


def make_records(classifier: Classifier, cases: Sequence[Case]) -> list[dict]:
    """One record per case, each text run alone (batch 1, as a host usually runs it)."""
    tokenizer, encoder, labels = classifier.encoder.tokenizer, classifier.encoder, classifier.labels
    records = []
    for n, (name, value) in enumerate(cases):
        text = value.decode("utf-8", errors="replace") if isinstance(value, bytes) else value
        tokens = tokenizer.tokenize(text)
        ids = encoder.map_tokens(tokens)
        probs = classifier.backend.run(*encode_batch([ids]))[0][0]  # (1, T), (1,) -> (C,)
        record = {"n": n, "case": name, "text": text}
        if isinstance(value, bytes):
            record["utf8_hex"] = value.hex()
        record.update(normalized=tokenizer.normalize(text), tokens=tokens, ids=ids, counts=len(ids),
                      probs=exact_floats(probs), label=labels[int(np.argmax(probs))])
        records.append(record)
    return records


def make_header(classifier: Classifier, count: int) -> dict:
    return {"format": GOLDEN_FORMAT, "version": GOLDEN_VERSION, "bundle_sha256": classifier.bundle.sha256,
            "labels": list(classifier.labels), "tokenizer": classifier.bundle.tokenizer.to_dict(), "records": count}


def render_golden(header: dict, records: Sequence[dict]) -> bytes:
    """The JSONL bytes: header line, then one record per line; pure ASCII (every other character \\u-escaped),
    so no host splits a line at U+2028 or trips over an encoding."""
    lines = [json.dumps(header)] + [json.dumps(r) for r in records]
    return ("\n".join(lines) + "\n").encode("utf-8")


def read_jsonl(path: str | os.PathLike, what: str) -> list[dict]:
    """Every line of a JSONL file as a dict; a bad line is a GoldenError naming the file and line."""
    path = Path(path)
    try:
        data = path.read_bytes()
    except FileNotFoundError as e:
        raise GoldenError(f"{path}: no such {what}") from e
    except OSError as e:
        raise GoldenError(f"{path}: cannot read the {what} ({e.strerror or e})") from e
    out = []
    for number, line in enumerate(data.splitlines(), start=1):
        if not line.strip():
            continue
        try:
            value = json.loads(line)
        except (UnicodeDecodeError, json.JSONDecodeError) as e:
            raise GoldenError(f"{path}: line {number} is not a JSON object ({e}); write one JSON object per line") from None
        if not isinstance(value, dict):
            raise GoldenError(f"{path}: line {number} is {type(value).__name__}, expected a JSON object")
        out.append(value)
    return out


def read_golden(path: str | os.PathLike) -> tuple[dict, list[dict]]:
    """(header, records) of a golden file written by `danpack golden`."""
    lines = read_jsonl(path, "golden file")
    if not lines or lines[0].get("format") != GOLDEN_FORMAT:
        raise GoldenError(f"{path}: not a golden file (line 1 must be the header with format {GOLDEN_FORMAT!r}); "
                          "write one with `danpack golden BUNDLE -o FILE.jsonl`")
    header, records = lines[0], lines[1:]
    if header.get("version") != GOLDEN_VERSION:
        raise GoldenError(f"{path}: golden version {header.get('version')!r}, this danpack reads {GOLDEN_VERSION}")
    if header.get("records") != len(records):
        raise GoldenError(f"{path}: header announces {header.get('records')!r} records but the file holds "
                          f"{len(records)}; the file is cut short or edited: write it again")
    for i, r in enumerate(records):
        if not all(k in r for k in ("text", "normalized", "tokens", "ids", "probs", "label")):
            raise GoldenError(f"{path}: record {i} (line {i + 2}) lacks some of text, normalized, tokens, ids, probs, label")
    return header, records
