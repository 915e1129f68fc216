"""Tests of the device's text-stream CLI `danpack-run` (runtime/stream.py, stream_lines.py, stream_records.py).

External references: the stdlib `json` module parses every output record (so every record is checked to
be valid JSON) and `bytes.split` is the oracle of line splitting; /proc/PID/status (Linux proc(5)) gives
the child's resident memory; exit statuses 128+N after a signal and 141 after SIGPIPE are shell
convention (common practice). Answers are compared with `Classifier.predict_proba`, the runtime's own
API, which other suites check against onnx.reference and the numpy forward pass.
"""

from __future__ import annotations

import io
import json
import os
import select
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from danpack import runtime
from danpack.pack.build import PackOptions, pack_model
from danpack.runtime.errors import DanpackError
from danpack.runtime.stream import (StreamConfig, StreamError, StreamInterrupted, StreamStats, Terminated, classify_stream,
                            main)
from danpack.runtime.stream_lines import OVERLONG, LineSplitter, read_batches
from tests.helpers import LABELS, make_model, random_texts, token

REPO = Path(__file__).resolve().parents[1]
VOCAB = [token(i) for i in range(200)]
# float32 sums depend on the batch's padded width and size (measured differences <= 1.2e-7, one or two ulps
# of a probability); a misplaced row would differ by ~1e-2
BATCH_TOLERANCE = 1e-6
CHILD_TIMEOUT = 60.0  # generous: a loaded CI machine may take seconds to start numpy and onnxruntime


# --- fixtures and helpers ------------------------------------------------------------------------

@pytest.fixture(scope="module")
def bundle(tmp_path_factory) -> Path:
    root = tmp_path_factory.mktemp("stream")
    model_dir = make_model(root, vocab_size=len(VOCAB), dim=16, hidden=(8,), seed=3)
    return pack_model(model_dir, root / "model.dpk", PackOptions()).path


@pytest.fixture(scope="module")
def clf(bundle):
    return runtime.load(bundle)


@pytest.fixture(scope="module")
def texts() -> list[str]:
    """Texts without a newline; the empty text is left out (an empty line is an error record)."""
    return [t for t in random_texts(VOCAB, 120, seed=5) if t]


def run_stream(clf, data: bytes, source=None, **options) -> tuple[list[dict], StreamStats, bytes]:
    """Records (parsed with the stdlib json module), stats and raw output bytes of a stream."""
    out = io.BytesIO()
    stats = classify_stream(clf, source or io.BytesIO(data), out, StreamConfig(**options))
    raw = out.getvalue()
    assert raw == b"" or raw.endswith(b"\n")
    return [json.loads(line) for line in raw.decode("utf-8").split("\n")[:-1]], stats, raw


def probs_of(record: dict) -> np.ndarray:
    return np.array([record["probs"][label] for label in LABELS], dtype=np.float32)  # (C,)


def lines_bytes(lines: list[bytes]) -> bytes:
    return b"".join(line + b"\n" for line in lines)


class Trickle(io.RawIOBase):
    """A file-like source without a descriptor that hands out data in small random pieces."""

    def __init__(self, data: bytes, seed: int, most: int = 40) -> None:
        self.data, self.pos, self.rng, self.most = data, 0, np.random.default_rng(seed), most

    def readable(self) -> bool:
        return True

    def read(self, n: int = -1) -> bytes:
        k = min(n, int(self.rng.integers(1, self.most + 1)))
        piece = self.data[self.pos : self.pos + k]
        self.pos += len(piece)
        return piece


STOPS = [(signal.SIGINT, 130, "interrupted"), (signal.SIGTERM, 143, "terminated")]  # 128 + N: shell convention


def _reset_stop_signals() -> None:
    """In the child before exec: SIGINT and SIGTERM at their defaults and unblocked, as a shell leaves them.

    Both are inherited through fork and exec (signal(7)): a CI launcher that ignores a signal, or blocks it
    in its signal mask, would otherwise hand that on, and the child would never see it.
    """
    for signum in (signal.SIGINT, signal.SIGTERM):
        signal.signal(signum, signal.SIG_DFL)
    signal.pthread_sigmask(signal.SIG_UNBLOCK, {signal.SIGINT, signal.SIGTERM})


def child(bundle: Path, *args: str, **popen) -> subprocess.Popen:
    """`danpack-run BUNDLE ARGS` as a subprocess (python -m danpack.runtime.stream), stop signals at their defaults."""
    env = dict(os.environ, PYTHONPATH=str(REPO))
    return subprocess.Popen(
        [sys.executable, "-m", "danpack.runtime.stream", str(bundle), *args], env=env, cwd=popen.pop("cwd"),
        preexec_fn=_reset_stop_signals, **popen,
    )


def read_line(stream, timeout: float = CHILD_TIMEOUT) -> bytes:
    """One line from a child's stdout, failing (not hanging) when none comes."""
    ready, _, _ = select.select([stream], [], [], timeout)
    assert ready, "no answer from danpack-run within the timeout"
    return stream.readline()


# --- clean streams -------------------------------------------------------------------------------

def test_clean_stream_equals_predict_proba(clf, texts):
    records, stats, _ = run_stream(clf, "\n".join(texts).encode() + b"\n")
    expected = clf.predict_proba(texts)  # (N, C) one call over all texts
    assert [r["line"] for r in records] == list(range(1, len(texts) + 1))
    assert stats == StreamStats(len(texts), 0, stats.batches, stats.seconds) and stats.batches == 2
    got = np.stack([probs_of(r) for r in records])  # (N, C)
    np.testing.assert_allclose(got, expected, rtol=0, atol=BATCH_TOLERANCE)
    assert [r["label"] for r in records] == clf.predict(texts)
    assert all(set(r) == {"line", "label", "probs", "known_tokens", "no_known_token"} for r in records)
    known = clf.predict_known(texts)[2]  # (N,) the API's own count
    assert [r["known_tokens"] for r in records] == known.tolist()
    assert [r["no_known_token"] for r in records] == (known == 0).tolist()


def test_batch_of_one_gives_exactly_predict_proba(clf, texts):
    # with batch 1 every record is its own classifier call: equal to the bit (float32 round trip of the text form)
    records, _, _ = run_stream(clf, "\n".join(texts[:30]).encode(), batch=1)
    for record, text in zip(records, texts[:30], strict=True):
        np.testing.assert_array_equal(probs_of(record), clf.predict_proba([text])[0])


def test_line_endings_bom_and_last_line(clf):
    plain = run_stream(clf, b"w1 w2\nw3\nw4 w5")[0]
    assert len(plain) == 3  # the last line needs no newline
    crlf = run_stream(clf, b"\xef\xbb\xbfw1 w2\r\nw3\r\nw4 w5\r\n")[0]  # BOM + CRLF: the same records
    assert crlf == plain
    assert run_stream(clf, b"")[0] == [] and run_stream(clf, b"w1\n")[0] == run_stream(clf, b"w1")[0]
    # only one CR belongs to the line ending; a second is text (a separator for the tokenizer)
    twice = run_stream(clf, b"w1\r\r\n")[0][0]
    np.testing.assert_array_equal(probs_of(twice), clf.predict_proba(["w1\r"])[0])


def test_classify_empty_option(clf):
    assert run_stream(clf, b"\n")[0] == [{"line": 1, "error": "empty line"}]
    record = run_stream(clf, b"\n", classify_empty=True)[0][0]
    np.testing.assert_array_equal(probs_of(record), clf.predict_proba([""])[0])
    blank = run_stream(clf, b"   \n")[0][0]  # spaces are a text (no tokens), not an empty line
    np.testing.assert_array_equal(probs_of(blank), clf.predict_proba(["   "])[0])


# --- bad records, one kind at a time -------------------------------------------------------------

PLAIN_BAD = {
    "empty": (b"", "empty line"),
    "cr only": (b"\r", "empty line"),
    "invalid utf-8": (b"w1 \xff\xfe w2", "not valid UTF-8 (byte 4)"),
    "utf-8 of a surrogate": (b"w1 \xed\xa0\x80", "not valid UTF-8 (byte 4)"),
    "overlong utf-8 form": (b"\xc0\xaf w1", "not valid UTF-8 (byte 1)"),
    "nul byte": (b"w1\x00w2", "NUL byte in line"),
    "too long": (b"w1 " * 40, "line longer than 64 bytes (skipped)"),
}

JSONL_BAD = {
    "empty": (b"", "empty line", None),
    "invalid json": (b'{"text": "w1"', "invalid JSON: Expecting ',' delimiter (column 14)", None),
    "blank": (b"   ", "invalid JSON: Expecting value (column 4)", None),
    "array": (b'["w1", "w2"]', "JSON value is an array, expected an object", None),
    "number": (b"42", "JSON value is a number, expected an object", None),
    "string": (b'"w1 w2"', "JSON value is a string, expected an object", None),
    "null": (b"null", "JSON value is null, expected an object", None),
    "missing field": (b'{"id": 7}', "field 'text' is missing", 7),
    "number text": (b'{"id": 8, "text": 5}', "field 'text' is a number, expected a string", 8),
    "null text": (b'{"id": 9, "text": null}', "field 'text' is null, expected a string", 9),
    "array text": (b'{"id": 10, "text": ["w1"]}', "field 'text' is an array, expected a string", 10),
    "nul escape": (b'{"id": 11, "text": "w1\\u0000"}', "field 'text' holds a NUL character", 11),
    "nul byte": (b'{"id": 12, "text": "w1"}\x00', "NUL byte in line", None),
    "nan": (b'{"text": "w1", "x": NaN}', "invalid JSON: NaN is not a JSON number", None),
    "out of range": (b'{"text": "w1", "x": -1e400}', "invalid JSON: number -1e400 is out of range", None),
    "long integer": (b'{"text": "w1", "x": ' + b"9" * 5000 + b"}",
                     "invalid JSON: an integer of 5000 digits is too long", None),
    "deep nesting": (b'{"text": "w1", "x": ' + b"[" * 100_000 + b"]" * 100_000 + b"}",
                     "invalid JSON: nested deeper than 100 levels", None),
    # decodes under Python's ~1,000-level limit but json.dumps of the passthrough field would then recurse past it
    "990 levels": (b'{"text": "w1", "x": ' + b"[" * 989 + b"]" * 989 + b"}",
                   "invalid JSON: nested deeper than 100 levels", None),
    "utf-16 bom": (b'\xff\xfe{"text": "w1"}', "not valid UTF-8 (byte 1)", None),
    "latin-1": (b'{"text": "caf\xe9"}', "not valid UTF-8 (byte 14)", None),
}


@pytest.mark.parametrize("kind", sorted(PLAIN_BAD))
def test_plain_bad_record(clf, kind):
    bad, reason = PLAIN_BAD[kind]
    records, stats, _ = run_stream(clf, lines_bytes([b"w1 w2", bad, b"w3"]), max_line_bytes=64)
    assert records[1] == {"line": 2, "error": reason}
    assert stats.records == 3 and stats.errors == 1
    good, _, _ = run_stream(clf, lines_bytes([b"w1 w2", b"w3"]), batch=1)
    alone = run_stream(clf, lines_bytes([b"w1 w2", bad, b"w3"]), batch=1, max_line_bytes=64)[0]
    assert [alone[0], {**alone[2], "line": 2}] == good  # the good ones as in a clean stream


@pytest.mark.parametrize("kind", sorted(JSONL_BAD))
def test_jsonl_bad_record(clf, kind):
    bad, reason, record_id = JSONL_BAD[kind]
    data = lines_bytes([b'{"id": 1, "text": "w1 w2"}', bad, b'{"id": 3, "text": "w3"}'])
    records, stats, _ = run_stream(clf, data, jsonl=True, batch=1)
    expected = {"line": 2, "error": reason} if record_id is None else {"line": 2, "id": record_id, "error": reason}
    assert records[1] == expected
    assert list(records[1]) == list(expected)  # key order: line, passthrough, error
    assert stats.records == 3 and stats.errors == 1
    for record, text in ((records[0], "w1 w2"), (records[2], "w3")):
        np.testing.assert_array_equal(probs_of(record), clf.predict_proba([text])[0])


def test_bad_first_line_keeps_line_numbers(clf):
    records = run_stream(clf, b"\xff\nw1\n\n")[0]
    assert [r.get("error") for r in records] == ["not valid UTF-8 (byte 1)", None, "empty line"]
    assert [r["line"] for r in records] == [1, 2, 3]


# --- a mixed stream ------------------------------------------------------------------------------

def make_mixed_stream(texts: list[str], seed: int) -> tuple[bytes, list[tuple[int, str | None, str | None]]]:
    """JSONL with bad records between good ones: (bytes, per line (id, text or None, expected error or None))."""
    rng = np.random.default_rng(seed)
    bad = [
        (b"caf\xe9 w1", "not valid UTF-8 (byte 4)"),
        (b'{"id": %d, "text": "w1\x00"}', "NUL byte in line"),
        (b'{"id": %d, "text": "' + b"w7 " * 3_500_000 + b'"}', "line longer than 1048576 bytes (skipped)"),  # ~10 MB
        (b"", "empty line"),
        (b'["w1", "w2"]', "JSON value is an array, expected an object"),
        (b'{"id": %d, "text": 17}', "field 'text' is a number, expected a string"),
        (b'{"id": %d, "when": "2031-05-04T10:00"}', "field 'text' is missing"),
    ]
    lines, expected = [], []
    kinds = [i % len(bad) for i in range(2 * len(bad))]  # every kind twice, at random places
    slots = set(rng.choice(len(texts) + len(kinds), size=len(kinds), replace=False).tolist())
    good_iter, bad_iter = iter(texts), iter(kinds)
    for n in range(1, len(texts) + len(kinds) + 1):
        ending = b"\r\n" if rng.random() < 0.5 else b"\n"  # CRLF and LF mixed
        if n - 1 in slots:
            raw, reason = bad[next(bad_iter)]
            raw = raw % n if b"%d" in raw[:20] else raw
            keeps_id = reason.startswith("field")
            lines.append(raw + ending)
            expected.append((n if keeps_id else None, None, reason))
        else:
            text = next(good_iter)
            lines.append(json.dumps({"id": n, "text": text}).encode() + ending)
            expected.append((n, text, None))
    return b"".join(lines), expected


def test_mixed_stream(clf, texts):
    data, expected = make_mixed_stream(texts, seed=11)
    good_texts = [text for _, text, error in expected if error is None]
    clean = lines_bytes([json.dumps({"id": i, "text": t}).encode() for i, t, e in expected if e is None])
    reference = clf.predict_proba(good_texts)  # (G, C)
    for batch in (1, 64):
        records, stats, _ = run_stream(clf, data, jsonl=True, batch=batch)
        clean_records = run_stream(clf, clean, jsonl=True, batch=batch)[0]
        assert len(records) == len(expected) and stats.records == len(expected)
        assert stats.errors == sum(e is not None for _, _, e in expected) == 14
        good = []
        for n, (record, (record_id, _text, error)) in enumerate(zip(records, expected), start=1):
            assert record["line"] == n
            assert record.get("id") == record_id
            if error is not None:
                assert record["error"] == error
            else:
                good.append(record)
        got = np.stack([probs_of(r) for r in good])  # (G, C)
        assert [r["label"] for r in good] == [r["label"] for r in clean_records]
        if batch == 1:  # same calls as the clean stream and as predict_proba one text at a time
            assert [{k: v for k, v in r.items() if k != "line"} for r in good] == \
                   [{k: v for k, v in r.items() if k != "line"} for r in clean_records]
            for row, text in zip(got, good_texts):
                np.testing.assert_array_equal(row, clf.predict_proba([text])[0])
        np.testing.assert_allclose(got, reference, rtol=0, atol=BATCH_TOLERANCE)


def test_mixed_stream_in_small_random_pieces(clf, texts):
    # the same stream handed over a few bytes at a time (CRLF split between reads, lines split anywhere)
    data, expected = make_mixed_stream(texts[:40], seed=12)
    data = data.replace(b"w7 " * 3_500_000, b"w7 " * 400)  # overlong at the small limit below
    whole = run_stream(clf, data, jsonl=True, max_line_bytes=1000, batch=1)[0]
    pieces = run_stream(clf, b"", source=Trickle(data, seed=3), jsonl=True, max_line_bytes=1000, batch=1)[0]
    assert pieces == whole and len(whole) == len(expected)
    assert sum("line longer than 1000 bytes" in r.get("error", "") for r in whole) == 2


# --- line splitting ------------------------------------------------------------------------------

def test_overlong_line_is_skipped_without_being_held():
    splitter = LineSplitter(limit=1 << 20)
    chunk, most, got = b"x" * (1 << 16), 0, []
    got += splitter.feed(b"first\nsecond-starts-")
    for _ in range(160):  # a 10 MB line
        got += splitter.feed(chunk)
        most = max(most, splitter.held)
    got += splitter.feed(b"tail-of-it\nthird\nfourth")
    got += splitter.finish()
    assert got == [b"first", OVERLONG, b"third", b"fourth"]
    assert most <= (1 << 20) + 1 + len(chunk)  # never more than the limit and one chunk


@settings(max_examples=200, deadline=None)
@given(st.lists(st.sampled_from([b"a", b"bc", b"\n", b"\r", b"\xff", b"\x00", b"de f"]), max_size=40),
       st.lists(st.integers(1, 9), min_size=1, max_size=20))
def test_splitter_agrees_with_bytes_split(parts, cuts):
    data = b"".join(parts)
    splitter, got, pos, i = LineSplitter(limit=1 << 20), [], 0, 0
    while pos < len(data):  # feed the data in pieces of the drawn sizes
        got += splitter.feed(data[pos : pos + cuts[i % len(cuts)]])
        pos += cuts[i % len(cuts)]
        i += 1
    got += splitter.finish()
    expected = data.split(b"\n")  # oracle: the stdlib; a final newline ends a line, it starts none
    if expected[-1] == b"":
        expected.pop()
    assert got == expected


def test_batches_are_full_for_a_file(tmp_path):
    path = tmp_path / "lines.txt"
    path.write_bytes(b"w1\n" * 1000)
    with open(path, "rb") as f:  # a real descriptor: poll() always finds a file readable
        sizes = [len(b) for b in read_batches(f, 64, max_wait=0.0, limit=100)]
    assert sizes == [64] * 15 + [40]


def test_partial_batch_is_answered_when_a_pipe_pauses():
    read_fd, write_fd = os.pipe()
    gave_up = threading.Event()

    def give_up() -> None:  # fail-safe: a reader that never answers early gets EOF instead of hanging the suite
        gave_up.set()
        os.close(write_fd)

    timer = threading.Timer(CHILD_TIMEOUT, give_up)
    timer.start()
    try:
        with open(read_fd, "rb", buffering=0) as source:
            batches = read_batches(source, 64, max_wait=0.005, limit=100)
            os.write(write_fd, b"w1\nw2\n")
            assert next(batches) == [b"w1", b"w2"] and not gave_up.is_set()  # answered while the writer is open
            os.write(write_fd, b"w3\n")
            assert next(batches) == [b"w3"] and not gave_up.is_set()
            timer.cancel()
            os.close(write_fd)
            assert list(batches) == []
    finally:
        timer.cancel()


# --- passthrough, top-k, TSV ---------------------------------------------------------------------

def test_passthrough_fields(clf):
    record = {"id": "c-17", "ts": 1_901_234_567.25, "meta": {"station": "S-07", "bay": [1, 2]},
              "note": "schnell ⚡", "label": "positive", "line": 99, "text": "w1 w2"}
    out = run_stream(clf, json.dumps(record).encode() + b"\n", jsonl=True)[0][0]
    assert list(out) == ["line", "id", "ts", "meta", "note", "input_label", "input_line", "label", "probs",
                         "known_tokens", "no_known_token"]
    assert out["line"] == 1 and out["input_line"] == 99 and out["input_label"] == "positive"
    assert {k: out[k] for k in ("id", "ts", "meta", "note")} == {k: record[k] for k in ("id", "ts", "meta", "note")}
    # a lone surrogate escape comes back as the same escape (valid JSON, valid UTF-8 bytes)
    raw = run_stream(clf, b'{"id": "\\ud800x", "text": "w1"}\n', jsonl=True)[2]
    raw.decode("utf-8")
    assert json.loads(raw)["id"] == "\ud800x"


def test_text_field_option(clf):
    records = run_stream(clf, b'{"comment": "w1 w2", "text": "w9"}\n', jsonl=True, text_field="comment")[0]
    assert records[0]["text"] == "w9"  # the other field passes through
    np.testing.assert_array_equal(probs_of(records[0]), clf.predict_proba(["w1 w2"])[0])


def test_top_k_jsonl(clf, texts):
    full = run_stream(clf, lines_bytes([t.encode() for t in texts]))[0]
    top = run_stream(clf, lines_bytes([t.encode() for t in texts]), top_k=2)[0]
    for f, t in zip(full, top):
        ranked = sorted(f["probs"].items(), key=lambda kv: -kv[1])[:2]  # oracle: sorted() on the full output
        assert list(t["probs"].items()) == ranked
        assert t["label"] == f["label"] == ranked[0][0]


def test_tsv_output(clf):
    data = lines_bytes([b'{"id": "a\\tb", "text": "w1 w2"}', b"[1]", b'{"text": "w3"}', b'{"id": 5}'])
    raw = run_stream_tsv(clf, data, jsonl=True, id_field="id", header=True, top_k=2)
    rows = [line.split("\t") for line in raw.decode().split("\n")[:-1]]
    assert rows[0] == ["line", "id", "label", "probability", "label_2", "probability_2", "known_tokens", "error"]
    assert all(len(row) == 8 for row in rows)
    full = run_stream(clf, data, jsonl=True)[0]
    first = sorted(full[0]["probs"].items(), key=lambda kv: -kv[1])[:2]
    assert rows[1] == ["1", "a\\tb", first[0][0], repr(first[0][1]), first[1][0], repr(first[1][1]), "2", ""]
    assert rows[2] == ["2", "", "", "", "", "", "", "JSON value is an array, expected an object"]
    assert rows[3][:3] == ["3", "", full[2]["label"]] and rows[3][-2:] == ["1", ""]
    assert rows[4] == ["4", "5", "", "", "", "", "", "field 'text' is missing"]
    plain = run_stream_tsv(clf, b"w1 w2\n\n").decode().split("\n")[:-1]
    assert plain == [f"1\t{full[0]['label']}\t{full[0]['probs'][full[0]['label']]!r}\t2\t", "2\t\t\t\tempty line"]


def test_texts_the_bundle_knows_nothing_of_are_flagged(clf):
    """An empty text, spaces, or only unknown words: the model answers as for an empty text, so every answer says
    how many tokens the bundle knew, and such a text is never certified (API and stream)."""
    texts = ["w1 w2 zzqx", "zzqx blorf", "   ", ""]
    labels, probs, known = clf.predict_known(texts)
    assert known.tolist() == [2, 0, 0, 0]
    assert labels == clf.predict(texts) and np.array_equal(probs, clf.predict_proba(texts))
    assert not clf.predict_certified(texts)[2][1:].any()
    records = run_stream(clf, b"w1 w2 zzqx\nzzqx blorf\n   \n", batch=2)[0]
    assert [(r["known_tokens"], r["no_known_token"]) for r in records] == [(2, False), (0, True), (0, True)]


def test_skip_empty_passes_blank_lines_through(clf):
    records, stats, _ = run_stream(clf, b"w1\n\nw2\n", skip_empty=True)
    assert [r["line"] for r in records] == [1, 2, 3] and records[1] == {"line": 2, "skipped": "empty line"}
    assert stats.records == 3 and stats.errors == 0
    jsonl = run_stream(clf, b'{"text": "w1", "id": 1}\n\n', jsonl=True, skip_empty=True)[0]
    assert jsonl[1] == {"line": 2, "skipped": "empty line"}
    assert run_stream(clf, b"w1\n\n")[0][1] == {"line": 2, "error": "empty line"}  # the default stays an error
    assert run_stream_tsv(clf, b"\n", skip_empty=True).decode() == "1\t\t\t\tskipped: empty line\n"
    with pytest.raises(StreamError):
        StreamConfig(classify_empty=True, skip_empty=True)


def run_stream_tsv(clf, data: bytes, **options) -> bytes:
    out = io.BytesIO()
    classify_stream(clf, io.BytesIO(data), out, StreamConfig(output="tsv", **options))
    return out.getvalue()


def test_config_errors(clf):
    for bad in ({"batch": 0}, {"max_line_bytes": 0}, {"top_k": 0}, {"max_wait_ms": -1}, {"output": "csv"},
                {"header": True}, {"id_field": "id"}, {"jsonl": True, "output": "tsv", "id_field": "text"}):
        with pytest.raises(StreamError):
            StreamConfig(**bad)
    with pytest.raises(DanpackError, match="top-k 4 is more than the bundle's 3 labels"):
        classify_stream(clf, io.BytesIO(b"w1\n"), io.BytesIO(), StreamConfig(top_k=4))


class _SignalMidWrite(io.BytesIO):
    """A sink that receives a signal halfway through its second write, as a pipe write can be interrupted."""

    def __init__(self, signum: int) -> None:
        super().__init__()
        self.signum, self.writes = signum, 0

    def write(self, data) -> int:
        self.writes += 1
        if self.writes < 2:
            return super().write(data)
        half = len(data) // 2
        super().write(data[:half])
        signal.raise_signal(self.signum)  # its Python handler runs at the next bytecode
        return half + super().write(data[half:])


def _raise_terminated_for_test(signum, frame):
    raise Terminated()


@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGTERM])
def test_a_signal_during_a_write_waits_for_the_batch_to_be_out(clf, signum):
    sink = _SignalMidWrite(signum)
    previous = signal.signal(signal.SIGTERM, _raise_terminated_for_test)  # what danpack-run's main installs
    try:
        with pytest.raises(StreamInterrupted) as e:
            classify_stream(clf, io.BytesIO(b"w1 w2\n" * 10), sink, StreamConfig(batch=4))
    finally:
        signal.signal(signal.SIGTERM, previous)
    assert e.value.signum == signum and str(e.value) == ("terminated" if signum == signal.SIGTERM else "interrupted")
    raw = sink.getvalue()
    assert raw.count(b"\n") == 8 and raw.endswith(b"\n")  # two whole batches of 4, the second not cut
    assert e.value.stats.records == 8 and e.value.stats.batches == 2


@pytest.mark.parametrize("wake", [True, False])
def test_a_signal_handled_off_the_main_thread_ends_a_wait_for_input(wake):
    """The lost-wakeup race, made deterministic: the signal's C handler runs in another thread (as when it
    lands just before the main thread blocks), so only the wakeup descriptor can end the wait. Without
    it the wait lasts until input comes (here: a byte written after 2 s)."""
    in_read, in_write = os.pipe()
    wake_read, wake_write = os.pipe()
    for fd in (wake_read, wake_write):
        os.set_blocking(fd, False)
    previous_wake = signal.set_wakeup_fd(wake_write, warn_on_full_buffer=False)
    previous = signal.signal(signal.SIGUSR1, _raise_terminated_for_test)
    sender = threading.Thread(target=lambda: (time.sleep(0.1), signal.pthread_kill(threading.get_ident(), signal.SIGUSR1)))
    rescue = threading.Timer(2.0, lambda: os.write(in_write, b"x\n"))  # bounds the test when the wait hangs
    started = time.monotonic()
    try:
        with open(in_read, "rb", buffering=0, closefd=False) as source:
            sender.start()
            rescue.start()
            batches = read_batches(source, 64, max_wait=0.005, limit=100, wake_fd=wake_read if wake else None)
            try:
                next(batches)
                stopped = False
            except Terminated:
                stopped = True
    finally:
        rescue.cancel()
        sender.join()
        signal.signal(signal.SIGUSR1, previous)
        signal.set_wakeup_fd(previous_wake)
        for fd in (in_read, in_write, wake_read, wake_write):
            os.close(fd)
    elapsed = time.monotonic() - started
    if wake:
        assert stopped and elapsed < 1.5, elapsed
    else:  # the failure the wakeup descriptor prevents: the signal waited for the rescue input
        assert elapsed >= 1.9


# --- the command line, in process ----------------------------------------------------------------

def cli(monkeypatch, capsys, argv: list[str]) -> tuple[int, bytes, str]:
    """main(argv) with stdout captured as bytes; returns (exit status, stdout bytes, stderr text)."""
    buffer = io.BytesIO()
    monkeypatch.setattr(sys, "stdout", io.TextIOWrapper(buffer, encoding="utf-8"))
    code = main(argv)
    return code, buffer.getvalue(), capsys.readouterr().err


def test_exit_codes(monkeypatch, capsys, bundle, tmp_path, clf):
    good, mixed = tmp_path / "good.txt", tmp_path / "mixed.txt"
    good.write_bytes(b"w1 w2\nw3\n")
    mixed.write_bytes(b"w1 w2\n\xff\nw3\n")
    code, out, err = cli(monkeypatch, capsys, [str(bundle), str(good)])
    assert (code, err, len(out.splitlines())) == (0, "", 2)
    code, out, err = cli(monkeypatch, capsys, [str(bundle), str(mixed)])
    assert (code, err, len(out.splitlines())) == (1, "", 3)
    code, _, err = cli(monkeypatch, capsys, [str(bundle), str(mixed), "--lenient", "--verbose"])
    assert code == 0 and "3 records, 1 errors" in err and "lines/s" in err
    code, out, _ = cli(monkeypatch, capsys, [str(bundle), str(good), "--backend", "numpy", "--format", "tsv"])
    assert code == 0 and [line.split(b"\t")[1].decode() for line in out.splitlines()] == clf.predict(["w1 w2", "w3"])
    # options between BUNDLE and INPUT, the order people type
    code, between, _ = cli(monkeypatch, capsys, [str(bundle), "--format", "tsv", "--backend", "numpy", str(good)])
    assert code == 0 and between == out


def test_input_format_follows_the_one_rule(monkeypatch, capsys, bundle, tmp_path, clf):
    """A .jsonl file is JSONL without --jsonl (it was classified as raw JSON text); a nameless file whose first
    line is an object too; a .txt of objects stays plain lines with a warning; --lines and --jsonl override."""
    records = b'{"text": "w1 w2", "id": "a"}\n{"text": "w3", "id": "b"}\n'
    expected = clf.predict(["w1 w2", "w3"])
    for name in ("c.jsonl", "c.ndjson", "c"):
        path = tmp_path / name
        path.write_bytes(records)
        code, out, err = cli(monkeypatch, capsys, [str(bundle), str(path)])
        got = [json.loads(line) for line in out.splitlines()]
        assert code == 0 and err == "" and [r["label"] for r in got] == expected and got[0]["id"] == "a", name
    txt = tmp_path / "c.txt"
    txt.write_bytes(records)
    code, out, err = cli(monkeypatch, capsys, [str(bundle), str(txt)])
    assert code == 0 and "first line is a JSON object but a .txt file is read as plain lines" in err
    assert "id" not in json.loads(out.splitlines()[0])  # the JSON text itself was classified, as asked
    code, out, err = cli(monkeypatch, capsys, [str(bundle), str(txt), "--jsonl"])
    assert code == 0 and err == "" and [json.loads(line)["label"] for line in out.splitlines()] == expected
    code, out, err = cli(monkeypatch, capsys, [str(bundle), str(tmp_path / "c.jsonl"), "--lines"])
    assert code == 0 and err == "" and "id" not in json.loads(out.splitlines()[0])
    with pytest.raises(SystemExit) as e:
        main([str(bundle), str(txt), "--jsonl", "--lines"])
    assert e.value.code == 2


def test_command_line_flags_unknown_texts_and_skips_blank_lines(monkeypatch, capsys, bundle, tmp_path):
    path = tmp_path / "in.txt"
    path.write_bytes(b"w1 w2\n\nzzqx\n")
    code, out, err = cli(monkeypatch, capsys, [str(bundle), str(path), "--skip-empty"])
    got = [json.loads(line) for line in out.splitlines()]
    assert code == 0 and err == ""
    assert [(r.get("known_tokens"), r.get("no_known_token"), r.get("skipped")) for r in got] == [
        (2, False, None), (None, None, "empty line"), (0, True, None)]
    code, out, _ = cli(monkeypatch, capsys, [str(bundle), str(path)])
    assert code == 1 and json.loads(out.splitlines()[1]) == {"line": 2, "error": "empty line"}


def test_unreadable_bundle_and_input_exit_2(monkeypatch, capsys, bundle, tmp_path):
    damaged = tmp_path / "damaged.dpk"
    damaged.write_bytes(bundle.read_bytes()[:-10])
    code, out, err = cli(monkeypatch, capsys, [str(damaged), os.devnull])
    assert code == 2 and out == b"" and err.startswith("danpack-run: error: ") and "Traceback" not in err
    code, _, err = cli(monkeypatch, capsys, [str(tmp_path / "missing.dpk"), os.devnull])
    assert code == 2 and "no such bundle file" in err
    code, _, err = cli(monkeypatch, capsys, [str(bundle), str(tmp_path / "missing.txt")])
    assert code == 2 and "cannot open input" in err
    code, _, err = cli(monkeypatch, capsys, [str(bundle), os.devnull, "--top-k", "4"])
    assert code == 2 and "top-k 4 is more than" in err


@pytest.mark.parametrize("argv", [
    ["--batch", "0"], ["--max-wait-ms", "-1"], ["--max-line-bytes", "x"], ["--format", "csv"],
    ["--text-field", "comment"], ["--jsonl", "--id-field", "id"], ["--header"], ["--backend", "gpu"], [],
])
def test_usage_errors_exit_2(capsys, bundle, argv):
    with pytest.raises(SystemExit) as e:
        main(([str(bundle)] if argv else []) + argv)
    assert e.value.code == 2 and "usage:" in capsys.readouterr().err


def test_help_and_version(capsys):
    from danpack.runtime.stream import build_parser

    parser = build_parser()
    for action in parser._actions:  # every option and argument carries its own help text
        assert action.help and len(action.help) > 10, action.option_strings
    with pytest.raises(SystemExit) as e:
        main(["--help"])
    text = capsys.readouterr().out
    assert e.value.code == 0
    for option in ("--backend", "--threads", "--batch", "--max-wait-ms", "--jsonl", "--text-field", "--format",
                   "--top-k", "--lenient", "--max-line-bytes", "--verbose", "--version", "exit status"):
        assert option in text
    with pytest.raises(SystemExit) as e:
        main(["--version"])
    assert e.value.code == 0 and capsys.readouterr().out.startswith("danpack-run ")


# --- the command line as a process: pipes, signals, memory ---------------------------------------

def test_interactive_pipe_answers_each_line(bundle, clf, tmp_path):
    proc = child(bundle, cwd=tmp_path, stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    try:
        for text in ("w1 w2 w3", "w4", "w5 w6"):
            proc.stdin.write(text.encode() + b"\n")
            proc.stdin.flush()
            record = json.loads(read_line(proc.stdout))  # the answer comes before the next line is written
            np.testing.assert_array_equal(probs_of(record), clf.predict_proba([text])[0])
        proc.stdin.close()
        assert proc.wait(CHILD_TIMEOUT) == 0
        assert proc.stdout.read() == b"" and proc.stderr.read() == b""
    finally:
        proc.kill()


def test_reader_going_away_is_quiet(bundle, tmp_path):
    path = tmp_path / "long.txt"
    path.write_bytes(b"w1 w2 w3\n" * 100_000)
    with open(path, "rb") as stdin:
        proc = child(bundle, cwd=tmp_path, stdin=stdin, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    try:
        assert json.loads(read_line(proc.stdout))["line"] == 1
        proc.stdout.close()  # like `| head -n 1`
        assert proc.wait(CHILD_TIMEOUT) == 141
        assert proc.stderr.read() == b""  # no traceback, no "Exception ignored"
    finally:
        proc.kill()
    # and through a real shell pipeline
    shell = subprocess.run(
        f'"{sys.executable}" -m danpack.runtime.stream "{bundle}" "{path}" 2>err.txt | head -n 1',
        shell=True, cwd=tmp_path, env=dict(os.environ, PYTHONPATH=str(REPO)), capture_output=True,
        timeout=CHILD_TIMEOUT)
    assert len(shell.stdout.splitlines()) == 1 and (tmp_path / "err.txt").read_bytes() == b""


@pytest.mark.parametrize("signum,status,word", STOPS)
def test_stop_signal_flushes_answers_and_exits_128_plus_n(bundle, tmp_path, signum, status, word):
    proc = child(bundle, "--verbose", cwd=tmp_path, stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                 stderr=subprocess.PIPE)
    try:
        for i in range(3):
            proc.stdin.write(f"w{i} w9\n".encode())
            proc.stdin.flush()
            assert json.loads(read_line(proc.stdout))["line"] == i + 1
        proc.stdin.write(b"w1 unfinished")  # a line still being typed
        proc.stdin.flush()
        proc.send_signal(signum)
        assert proc.wait(CHILD_TIMEOUT) == status
        err = proc.stderr.read().decode()
        assert "Traceback" not in err and "3 records, 0 errors" in err and f"({word})" in err
        assert proc.stdout.read() == b""  # every answered record was already out; nothing half-written
    finally:
        proc.kill()


@pytest.mark.parametrize("signum,status,word", STOPS)
def test_stop_signal_mid_stream_never_cuts_a_record(bundle, tmp_path, signum, status, word):
    """A signal while batches are flowing: the output is whole records 1..N and the summary counts N."""
    proc = child(bundle, "--verbose", "--batch", "16", cwd=tmp_path, stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                 stderr=subprocess.PIPE)
    out = bytearray()
    lines_out = threading.Event()

    def feed() -> None:
        try:
            for start in range(0, 2_000_000, 500):  # far more than arrives before the signal
                proc.stdin.write("".join(f"w{i % 200} w{i * 7 % 200} charger\n" for i in range(start, start + 500)).encode())
        except (BrokenPipeError, ValueError):
            pass

    def drain() -> None:
        while chunk := proc.stdout.read1(1 << 16):
            out.extend(chunk)
            if out.count(b"\n") >= 2_000:
                lines_out.set()

    threads = [threading.Thread(target=feed, daemon=True), threading.Thread(target=drain, daemon=True)]
    try:
        for t in threads:
            t.start()
        assert lines_out.wait(CHILD_TIMEOUT), "danpack-run answered too little within the timeout"
        proc.send_signal(signum)
        assert proc.wait(CHILD_TIMEOUT) == status
        threads[1].join(CHILD_TIMEOUT)
        err = proc.stderr.read().decode()
    finally:
        proc.kill()
    assert out.endswith(b"\n"), "the last record was cut"
    records = [json.loads(line) for line in out.splitlines()]
    assert [r["line"] for r in records] == list(range(1, len(records) + 1))
    assert "Traceback" not in err and f"{len(records):,} records, 0 errors" in err and f"({word})" in err


def rss_kib(pid: int) -> int | None:
    """Resident memory of a process (proc(5): VmRSS in /proc/PID/status), None once it is gone."""
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith("VmRSS:"):
                return int(line.split()[1])
    except OSError:
        return None
    return None


@pytest.mark.skipif(not Path("/proc/self/status").exists(), reason="needs Linux /proc")
def test_endless_stream_memory_stays_bounded(bundle, tmp_path):
    total, warm_up = 200_000, 20_000
    proc = child(bundle, "--jsonl", cwd=tmp_path, stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                 stderr=subprocess.PIPE)
    answered = [0]

    def feed() -> None:  # a generator of records, written a thousand at a time
        records = (json.dumps({"id": i, "text": f"w{i % 200} w{i * 7 % 200} w{i * 13 % 200} charger"}) + "\n"
                   for i in range(total))
        try:
            while chunk := "".join(r for _, r in zip(range(1000), records)):
                proc.stdin.write(chunk.encode())
            proc.stdin.close()
        except BrokenPipeError:
            pass

    def drain() -> None:
        for _ in proc.stdout:
            answered[0] += 1

    threads = [threading.Thread(target=feed, daemon=True), threading.Thread(target=drain, daemon=True)]
    for t in threads:
        t.start()
    warm, late = None, []
    deadline = time.monotonic() + 120
    try:
        while proc.poll() is None and time.monotonic() < deadline:
            rss = rss_kib(proc.pid)
            if rss is not None and answered[0] >= warm_up:
                if warm is None:
                    warm = rss
                else:
                    late.append(rss)
            time.sleep(0.02)
        assert proc.wait(CHILD_TIMEOUT) == 0
        for t in threads:
            t.join(CHILD_TIMEOUT)
    finally:
        proc.kill()
    assert answered[0] == total
    assert warm is not None and len(late) >= 5, "too few memory samples"
    # 180,000 records after warm-up; kept in memory they would take tens of MB
    assert max(late) - warm < 16 * 1024, (warm, max(late))


@pytest.mark.parametrize("closed", ["input", "output"])
def test_closed_standard_stream_is_a_usage_error(bundle, tmp_path, closed):
    # `danpack-run B <&-` / `>&-`: Python sees sys.stdin / sys.stdout as None; no traceback, exit 2.
    fd = 0 if closed == "input" else 1
    env = dict(os.environ, PYTHONPATH=str(REPO))
    proc = subprocess.Popen([sys.executable, "-m", "danpack.runtime.stream", str(bundle)], env=env, cwd=tmp_path,
                            stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            preexec_fn=lambda: os.close(fd))
    _, err = proc.communicate(timeout=CHILD_TIMEOUT)
    assert proc.returncode == 2
    assert f"standard {closed} is closed" in err.decode() and "Traceback" not in err.decode()


# --- in = out whatever fails (issue: hostile inputs) --------------------------------------------------------------

def test_brackets_inside_strings_do_not_count_as_nesting(clf):
    from danpack.runtime.stream_records import nests_deeper

    deep_text = "[" * 500 + '\\"{' * 50
    record = json.dumps({"text": "w1", "note": deep_text}).encode()
    records, stats, _ = run_stream(clf, lines_bytes([record]), jsonl=True)
    assert records[0]["note"] == deep_text and "label" in records[0] and stats.errors == 0
    assert nests_deeper("[" * 101 + "]" * 101) and not nests_deeper("[" * 100 + "]" * 100)
    assert not nests_deeper('["' + "[" * 200 + '"]')


def test_990_levels_among_2001_records_keep_in_equal_out(clf):
    # the trial's attack: one record 990 levels deep in 2,001 lines (before: 960 records out, then a traceback)
    good = b'{"text": "w1 w2"}'
    deep = b'{"text": "w1", "x": ' + b"[" * 989 + b"]" * 989 + b"}"
    lines = [good] * 1000 + [deep] + [good] * 1000
    records, stats, _ = run_stream(clf, lines_bytes(lines), jsonl=True)
    assert len(records) == stats.records == 2001 and stats.errors == 1
    assert [r["line"] for r in records] == list(range(1, 2002))
    assert records[1000]["error"] == "invalid JSON: nested deeper than 100 levels"


class _FailingOn:
    """A classifier whose backend raises for any batch holding `word` (as onnxruntime did for a crafted graph)."""

    def __init__(self, clf, word: str, error: BaseException, nan_word: str | None = None) -> None:
        self.clf, self.word, self.error, self.nan_word = clf, word, error, nan_word
        self.labels = clf.labels

    def predict_known(self, texts):
        if any(self.word in t for t in texts):
            raise self.error
        labels, probs, known = self.clf.predict_known(texts)
        if self.nan_word is not None:
            probs[[self.nan_word in t for t in texts]] = np.nan
        return labels, probs, known


@pytest.mark.parametrize("error, cause", [
    (RuntimeError("[ONNXRuntimeError] : 6 : RUNTIME_EXCEPTION : std::bad_alloc"), "RuntimeError: [ONNXRuntimeError]"),
    (MemoryError(), "MemoryError"),
    (RecursionError("maximum recursion depth exceeded"), "RecursionError: maximum recursion depth exceeded"),
    (UnicodeEncodeError("utf-8", "\ud800", 0, 1, "surrogates not allowed"), "UnicodeEncodeError"),
])
@pytest.mark.parametrize("output", ["jsonl", "tsv"])
def test_a_failing_record_gets_an_error_record_and_the_stream_goes_on(clf, error, cause, output):
    # the trial's attack: a backend exception ended the stream (171 lines in, 70 records out, traceback)
    lines = [f"w{i % 7} w{i % 5}".encode() for i in range(171)]
    lines[70] = b"w1 boom w2"
    failing = _FailingOn(clf, "boom", error)
    out = io.BytesIO()
    stats = classify_stream(failing, io.BytesIO(lines_bytes(lines)), out, StreamConfig(output=output))
    rows = out.getvalue().decode("utf-8").split("\n")[:-1]
    assert len(rows) == stats.records == 171 and stats.errors == 1
    expected, _, _ = run_stream(clf, lines_bytes(lines[:70] + lines[71:]))
    if output == "jsonl":
        records = [json.loads(r) for r in rows]
        assert records[70]["line"] == 71 and records[70]["error"].startswith(f"cannot be classified ({cause}")
        assert [r.get("label") for r in records[:70] + records[71:]] == [r["label"] for r in expected]
    else:
        assert rows[70].split("\t")[0] == "71" and f"cannot be classified ({cause}" in rows[70].split("\t")[-1]


def test_a_non_finite_answer_is_an_error_record_never_invalid_json(clf):
    # the trial's attack: a NaN-producing graph made danpack-run write {"negative":nan,...} (not JSON)
    failing = _FailingOn(clf, "\0never", RuntimeError(), nan_word="w3")
    out = io.BytesIO()
    stats = classify_stream(failing, io.BytesIO(lines_bytes([b"w1", b"w3 w4", b"w2"])), out, StreamConfig())
    records = [json.loads(r) for r in out.getvalue().decode("utf-8").split("\n")[:-1]]  # every line valid JSON
    assert stats.records == 3 and stats.errors == 1
    assert records[1] == {"line": 2, "error": "the model returned a non-finite probability (NaN or Inf); "
                                              "the bundle is damaged or crafted"}
    assert "label" in records[0] and "label" in records[2]


def test_escape_characters_in_ids_and_fields_never_reach_the_output_raw(clf):
    # the trial's attack: a JSONL id holding ESC reached the TSV id column raw; JSON let U+009B and bidi through
    record = json.dumps({"id": "a\x1b[2Jb\u009b\u202e", "text": "w1", "note": "\u2028x\U000e0001"}).encode()
    tsv = run_stream_tsv(clf, lines_bytes([record]), jsonl=True, id_field="id")
    assert tsv.split(b"\t")[1] == rb"a\u001b[2Jb\u009b\u202e"
    records, _, raw = run_stream(clf, lines_bytes([record]), jsonl=True)
    assert records[0]["id"] == "a\x1b[2Jb\u009b\u202e" and records[0]["note"] == "\u2028x\U000e0001"  # same data
    text = raw.decode("utf-8")
    assert not any(ch in text for ch in "\x1b\u009b\u202e\u2028\U000e0001")  # written as escapes only
