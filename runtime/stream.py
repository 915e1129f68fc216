"""`danpack-run BUNDLE [INPUT|-]`: classify a stream of texts on the device, one answer per input line.

A Unix filter: plain lines or JSONL in, JSONL or TSV out, in input order, one output record per input
record, always. Records are classified in micro-batches that are answered early when the input pauses,
so an interactive pipe gets each answer at once and a file gets full batches. A record that cannot be
classified (bad bytes, bad JSON, no text, an overlong line) gets an error record in its place and the
stream goes on. `classify_stream` is the library function; `main` only parses options and calls it.
"""

from __future__ import annotations

import argparse
import os
import signal
import sys
import threading
import time
from contextlib import contextmanager
from dataclasses import dataclass
from typing import BinaryIO

import numpy as np

from .backends import BACKENDS
from .classifier import CALL_TEXTS, Classifier, load
from .errors import DanpackError
from .fastpath import NativeStream, pad
from .formats import choose_format
from .stream_lines import OVERLONG, read_batches
from .stream_records import JsonlFormatter, Skipped, TsvFormatter, make_parser

PROG = "danpack-run"
FORMATS = ("jsonl", "tsv")
EXIT_OK, EXIT_RECORD_ERRORS, EXIT_USAGE = 0, 1, 2
EXIT_SIGPIPE = 128 + signal.SIGPIPE  # what a shell reports for a filter whose reader went away (141)
EXIT_SIGINT = 128 + signal.SIGINT  # what a shell reports after Ctrl-C (130)
EXIT_SIGTERM = 128 + signal.SIGTERM  # what a shell reports after a stop request, kill or a service manager (143)
STOP_SIGNALS = (signal.SIGINT, signal.SIGTERM)  # each ends the stream cleanly, after the batch being written


class StreamError(DanpackError):
    """Stream options that cannot be honoured (batch size 0, top-k past the label count, ...)."""


@dataclass(frozen=True)
class StreamConfig:
    """How `classify_stream` reads and writes records."""

    jsonl: bool = False  # each input line is a JSON object (else each line is the text itself)
    text_field: str = "text"  # JSONL field holding the text; every other field passes through
    id_field: str | None = None  # JSONL field shown in the TSV id column (None: no id column)
    output: str = "jsonl"  # "jsonl" or "tsv"
    top_k: int | None = None  # only the k most probable labels (None: all labels in JSONL, the best in TSV)
    header: bool = False  # TSV: write a header line first
    batch: int = 64  # most records per classifier call (amortises the per-call cost)
    max_wait_ms: float = 5.0  # answer a partial batch once its oldest line waited this long for company
    max_line_bytes: int = 1 << 20  # longer lines become error records; their bytes are skipped, not held
    classify_empty: bool = False  # plain text: classify an empty line as "" instead of an error record
    skip_empty: bool = False  # an empty line gets a "skipped" record instead of an error record

    def __post_init__(self) -> None:
        def positive(name: str, value) -> None:
            if not isinstance(value, int) or isinstance(value, bool) or value < 1:
                raise StreamError(f"stream option {name} must be an integer >= 1, found {value!r}")

        positive("batch", self.batch)
        positive("max_line_bytes", self.max_line_bytes)
        if self.top_k is not None:
            positive("top_k", self.top_k)
        if not self.max_wait_ms >= 0:
            raise StreamError(f"stream option max_wait_ms must be >= 0, found {self.max_wait_ms!r}")
        if self.output not in FORMATS:
            raise StreamError(f"output format {self.output!r} is not one of {FORMATS}")
        if self.id_field is not None and (not self.jsonl or self.output != "tsv"):
            raise StreamError("an id column exists only for JSONL input shown as TSV (--jsonl --format tsv)")
        if self.id_field is not None and self.id_field == self.text_field:
            raise StreamError(f"the id field and the text field are both {self.id_field!r}; name two different fields")
        if self.header and self.output != "tsv":
            raise StreamError("a header line exists only for TSV output (--format tsv)")
        if self.classify_empty and self.skip_empty:
            raise StreamError("an empty line is either classified or skipped: choose --classify-empty or --skip-empty")


@dataclass(frozen=True)
class StreamStats:
    """What a stream did: records in (= records out), error records among them, batches, wall time."""

    records: int
    errors: int
    batches: int
    seconds: float

    @property
    def lines_per_second(self) -> float:
        return self.records / self.seconds if self.seconds > 0 else 0.0


class Terminated(KeyboardInterrupt):
    """SIGTERM, raised where Ctrl-C would be (the `danpack-run` command installs this), so a service manager's
    stop ends the stream as cleanly as Ctrl-C does."""


def _raise_terminated(signum, frame) -> None:
    raise Terminated()


class StreamInterrupted(KeyboardInterrupt):
    """Ctrl-C (SIGINT) or, under `danpack-run`, SIGTERM stopped the stream; every answered batch was written."""

    def __init__(self, stats: StreamStats, signum: int = signal.SIGINT) -> None:
        super().__init__("terminated" if signum == signal.SIGTERM else "interrupted")
        self.stats = stats
        self.signum = signum


@contextmanager
def _stop_signals_held():
    """Hold SIGINT and SIGTERM back while a batch is written and counted, so neither cuts a record in half.

    Python-level handlers, not a thread signal mask: the kernel may hand a signal to any thread
    (onnxruntime's, the BLAS pool's), and Python then runs the handler in the main thread all the same.
    A signal that came meanwhile takes effect afterwards, as its own handler (or default action) says.
    """
    if threading.current_thread() is not threading.main_thread():  # only the main thread may set handlers
        yield
        return
    caught: list[int] = []
    previous: dict[int, object] = {}
    try:
        for signum in STOP_SIGNALS:  # a signal between two of these still finds every handler put back
            previous[signum] = signal.signal(signum, lambda n, frame: caught.append(n))
        yield
    finally:
        for signum, handler in previous.items():
            signal.signal(signum, signal.SIG_DFL if handler is None else handler)  # None: set outside Python
        for signum in dict.fromkeys(caught):  # each signal once, in arrival order
            handler = previous[signum]
            if callable(handler):
                handler(signum, None)
            elif handler is None or handler == signal.SIG_DFL:  # the default action, now that it is back
                signal.raise_signal(signum)


def classify_stream(classifier: Classifier, source: BinaryIO, sink: BinaryIO,
                    config: StreamConfig = StreamConfig(), wake_fd: int | None = None) -> StreamStats:
    """Classify every line of `source` into `sink` (both binary); returns the counts.

    Raises StreamInterrupted on Ctrl-C or Terminated (after writing every answered batch) and lets OSError
    from the sink (BrokenPipeError when the reader went away) propagate. `wake_fd`, the read end of the
    descriptor given to `signal.set_wakeup_fd`, lets a signal end a wait for input at once.
    """
    if config.top_k is not None and config.top_k > len(classifier.labels):
        raise StreamError(f"top-k {config.top_k} is more than the bundle's {len(classifier.labels)} labels "
                          f"({', '.join(classifier.labels)})")
    parse = make_parser(config.jsonl, config.text_field, config.max_line_bytes, config.classify_empty,
                        config.skip_empty)
    if config.output == "tsv":
        formatter = TsvFormatter(classifier.labels, config.top_k, config.id_field, config.header)
    else:
        formatter = JsonlFormatter(classifier.labels, config.top_k)
    # the native records stand in for predict_known's encoder and the Python records: only for the stock Classifier
    stock = isinstance(classifier, Classifier) and type(classifier).predict_known is Classifier.predict_known
    native = None if not stock else NativeStream.open(
        classifier.native, jsonl=config.jsonl, text_field=config.text_field, id_field=config.id_field,
        tsv=config.output == "tsv", top_k=config.top_k, max_line_bytes=config.max_line_bytes,
        classify_empty=config.classify_empty, skip_empty=config.skip_empty)
    start = time.perf_counter()
    records = errors = batches = 0

    def stats() -> StreamStats:
        return StreamStats(records, errors, batches, time.perf_counter() - start)

    try:
        if formatter.header:
            with _stop_signals_held():
                sink.write(formatter.header)
        for lines in read_batches(source, config.batch, config.max_wait_ms / 1000.0, config.max_line_bytes, wake_fd):
            answered = None if native is None else _answer_native(classifier, native, lines, records + 1)
            if answered is None:  # no compiled part, or the native batch failed: the Python records
                parsed = [_parse_one(parse, raw, records + i) for i, raw in enumerate(lines, start=1)]
                answered = answer_batch(classifier, formatter, parsed)
            data, failed = answered
            count = len(lines)
            with _stop_signals_held():  # one write and one flush per batch
                sink.write(data)
                sink.flush()
                records += count
                errors += failed
                batches += 1
    except KeyboardInterrupt as e:
        raise StreamInterrupted(stats(), signal.SIGTERM if isinstance(e, Terminated) else signal.SIGINT) from None
    return stats()


def _answer_native(classifier: Classifier, native: NativeStream, lines: list, first_line: int) -> tuple[bytes, int] | None:
    """A batch through the native records (runtime/native/stream.c) and the classifier's own backend, called on
    the same groups of CALL_TEXTS records as Classifier.predict_known, so the probabilities and bytes are those of
    the Python records; None when anything fails (the caller answers the batch the Python way, record by record
    where it must)."""
    try:
        flat, counts, known = native.parse(lines, first_line, OVERLONG)  # (sum n,), (N,), (N,)
        probs = None
        if len(counts):
            parts, start = [], 0
            ends = np.cumsum(counts)  # (N,)
            for i in range(0, len(counts), CALL_TEXTS):
                part = counts[i : i + CALL_TEXTS]
                stop = int(ends[i + len(part) - 1])
                parts.append(classifier.backend.run(*pad(flat[start:stop], part))[0])  # (b, C)
                start = stop
            probs = np.concatenate(parts) if len(parts) > 1 else parts[0]  # (N, C)
        return native.format(probs)
    except Exception:
        return None


def _cause(e: BaseException) -> str:
    """An exception as a short reason for an error record."""
    detail = " ".join(str(e).split())[:200]
    return f"{type(e).__name__}: {detail}" if detail else type(e).__name__


def _parse_one(parse, raw, line: int) -> tuple:
    """`parse`, with any failure (MemoryError, RecursionError ...) turned into the record's error."""
    try:
        return parse(raw, line)
    except Exception as e:
        return line, None, None, f"cannot be read ({_cause(e)})"


def _classify(classifier: Classifier, formatter, parsed: list) -> tuple[bytes, int]:
    """Output bytes of a batch and its error count; a non-finite answer becomes that record's error."""
    texts = [p[1] for p in parsed if p[3] is None]
    _, probs, known = classifier.predict_known(texts) if texts else (None, None, None)  # (N, C), (N,)
    if probs is not None:
        finite = np.isfinite(probs).all(axis=1)  # (N,)
        if not finite.all():
            bad = iter((~finite).tolist())
            parsed = [p if p[3] is not None or not next(bad) else
                      (p[0], None, p[2], "the model returned a non-finite probability (NaN or Inf); "
                                         "the bundle is damaged or crafted") for p in parsed]
            probs, known = probs[finite], known[finite]
            if not len(probs):
                probs = known = None
    failed = sum(p[3] is not None and not isinstance(p[3], Skipped) for p in parsed)
    return formatter.format(parsed, probs, known), failed


def answer_batch(classifier: Classifier, formatter, parsed: list) -> tuple[bytes, int]:
    """One output record per parsed record, in order, whatever fails: when the batch fails as a whole, each record
    is answered alone, and one that still fails (a backend exception, an encoding error, recursion, memory) gets an
    error record naming the cause. Returns (bytes, error records)."""
    try:
        return _classify(classifier, formatter, parsed)
    except Exception as e:
        if len(parsed) == 1:
            return _error_record(formatter, parsed[0], e), int(not isinstance(parsed[0][3], Skipped))
    out, errors = [], 0
    for record in parsed:
        try:
            data, failed = _classify(classifier, formatter, [record])
        except Exception as e:
            data, failed = _error_record(formatter, record, e), int(not isinstance(record[3], Skipped))
        out.append(data)
        errors += failed
    return b"".join(out), errors


def _error_record(formatter, record: tuple, e: BaseException) -> bytes:
    line, _text, extra, error = record
    if isinstance(error, Skipped):
        return formatter.format([record], None)
    reason = error or f"cannot be classified ({_cause(e)})"
    try:
        return formatter.format([(line, None, extra, reason)], None)
    except Exception:  # the passthrough fields themselves cannot be written
        return formatter.format([(line, None, None, f"{reason}; its other fields cannot be written")], None)


# --- command line --------------------------------------------------------------------------------

DESCRIPTION = "Classify texts with a danpack bundle: one answer per input line, in input order."

EPILOG = """\
output records (JSONL, the default):
  {"line":3,"id":"c-17","label":"positive","probs":{"negative":0.07,"positive":0.93},
   "known_tokens":5,"no_known_token":false}
  "line" is the 1-based input line; other JSONL input fields pass through after it (an input field
  named line, label, probs or error comes out as input_<name>); "probs" lists every label in label
  order, or with --top-k the k most probable, most probable first. Probabilities are float32 written
  in the shortest form that reads back as the same float32. "known_tokens" counts the text's tokens
  that have a row of their own in the bundle; "no_known_token":true means the model knew none of them
  and answered as for an empty text: route such a text to a fallback rather than trust its label.
  A record that cannot be classified gets, in its place: {"line":4,"error":"reason"}
  (plus its passthrough fields when it was a JSON object).

output records (--format tsv):
  columns line, [id: with --jsonl, the --id-field value], label, probability,
  [label_2, probability_2 ... with --top-k], known_tokens, error;
  an error row leaves label and probability empty; tab, newline, CR and backslash inside a value
  are written as \\t \\n \\r \\\\.

error records, one per bad input line:
  empty line; line longer than --max-line-bytes (skipped without being held in memory); a NUL byte
  (binary data, never a comment); bytes that are not UTF-8; and with --jsonl: invalid JSON (also
  NaN / Infinity, numbers out of range, nesting deeper than 100 levels), a JSON value that is not an
  object, a missing text field, a text field that is not a string or holds U+0000; and whatever fails
  while answering one record (a backend exception, recursion, memory, a non-finite probability):
  "cannot be classified (cause)". Lines end at LF; one CR before it is dropped (CRLF files); a UTF-8
  byte order mark at the start of the input is dropped. A line of spaces is classified (it has no
  tokens), and so is an empty JSONL text "". Control, format and bidi characters in any output value
  are written as \\uXXXX escapes.

exit status:
  0 every record was classified (or --lenient); 1 some record got an error record;
  2 bad usage or unreadable bundle/input; 130 interrupted (Ctrl-C) and 143 terminated (SIGTERM, as a
  service manager stops a program), each after writing every answered record and never half a record;
  141 the reader of the output went away (as `| head` does).
"""


def _version() -> str:
    try:
        from importlib.metadata import version

        return version("danpack")
    except Exception:  # not installed as a distribution (e.g. run from a source tree)
        return "unknown"


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected an integer >= 1, found {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected an integer >= 1, found {text!r}")
    return value


def _non_negative_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number >= 0, found {text!r}") from None
    if not value >= 0 or value == float("inf"):
        raise argparse.ArgumentTypeError(f"expected a finite number >= 0, found {text!r}")
    return value


def build_parser() -> argparse.ArgumentParser:
    """The option parser of danpack-run."""
    p = argparse.ArgumentParser(prog=PROG, description=DESCRIPTION, epilog=EPILOG,
                                formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("bundle", metavar="BUNDLE", help="bundle file written by `danpack pack`")
    p.add_argument("input", metavar="INPUT", nargs="?", default="-",
                   help="file of texts, one per line; '-' or nothing reads standard input")
    kind = p.add_mutually_exclusive_group()
    kind.add_argument("--jsonl", action="store_true",
                      help="each input line is a JSON object whose text field is classified; other fields pass "
                           "through (the default for an INPUT named .jsonl, .ndjson or .json, or whose first line is "
                           "a JSON object and whose name is not .txt/.csv/.tsv; standard input is plain lines "
                           "unless this is given)")
    kind.add_argument("--lines", action="store_true",
                      help="each input line is one text, even in a file the rule above would read as JSONL")
    p.add_argument("--text-field", metavar="NAME", default=None,
                   help="JSONL field holding the text (default: text; only with JSONL input)")
    p.add_argument("--id-field", metavar="NAME", default=None,
                   help="JSONL field shown as the second TSV column (default: id; only with JSONL input and "
                        "--format tsv)")
    p.add_argument("--format", choices=FORMATS, default="jsonl", metavar="|".join(FORMATS),
                   help="output: one JSON object per line (default) or tab-separated columns")
    p.add_argument("--header", action="store_true", help="TSV: write a header line naming the columns")
    p.add_argument("--top-k", metavar="K", type=_positive_int, default=None,
                   help="only the K most probable labels (JSONL: in probs; TSV: K label/probability column pairs)")
    p.add_argument("--backend", choices=BACKENDS, default="onnxruntime", metavar="|".join(BACKENDS),
                   help="onnxruntime (default) or the pure numpy forward pass")
    p.add_argument("--threads", metavar="N", type=_positive_int, default=1,
                   help="onnxruntime intra-op threads (default: 1, right for a small board)")
    p.add_argument("--batch", metavar="N", type=_positive_int, default=StreamConfig.batch,
                   help=f"most records per classifier call (default: {StreamConfig.batch})")
    p.add_argument("--max-wait-ms", metavar="MS", type=_non_negative_float, default=StreamConfig.max_wait_ms,
                   help="answer a partial batch when the input pauses this long "
                        f"(default: {StreamConfig.max_wait_ms:g}; 0 answers whatever has arrived)")
    p.add_argument("--max-line-bytes", metavar="N", type=_positive_int, default=StreamConfig.max_line_bytes,
                   help=f"longer lines get an error record and are skipped (default: {StreamConfig.max_line_bytes})")
    empty = p.add_mutually_exclusive_group()
    empty.add_argument("--classify-empty", action="store_true",
                       help="classify an empty line as the empty text instead of giving it an error record")
    empty.add_argument("--skip-empty", action="store_true",
                       help='answer an empty line with {"line":N,"skipped":"empty line"} (not an error: exit 0)')
    p.add_argument("--lenient", action="store_true", help="exit 0 even when some records got error records")
    p.add_argument("--verbose", action="store_true",
                   help="print a summary to stderr at the end: records, errors, lines per second")
    p.add_argument("--version", action="version", version=f"{PROG} {_version()}")
    return p


def _input_is_jsonl(args: argparse.Namespace) -> bool:
    """--jsonl / --lines, else the one format rule of `formats` for a named file (standard input: plain lines)."""
    if args.jsonl or args.lines or args.input == "-":
        return args.jsonl
    fmt, warning = choose_format(args.input)
    if fmt in ("csv", "tsv"):
        return False  # read as plain lines, as before; a CSV row is classified whole
    if warning is not None:
        _say(f"warning: {warning} (pass --jsonl or --lines to choose)")
    return fmt == "jsonl"


def _config_from_args(parser: argparse.ArgumentParser, args: argparse.Namespace) -> StreamConfig:
    args.jsonl = _input_is_jsonl(args)
    if args.text_field is not None and not args.jsonl:
        parser.error("--text-field names a JSONL field: add --jsonl (or give a .jsonl input)")
    id_field = args.id_field
    if id_field is None and args.jsonl and args.format == "tsv":
        id_field = "id"  # JSONL input shown as TSV keeps an id column
    try:
        return StreamConfig(jsonl=args.jsonl, text_field="text" if args.text_field is None else args.text_field,
                            id_field=id_field, output=args.format, top_k=args.top_k, header=args.header,
                            batch=args.batch, max_wait_ms=args.max_wait_ms, max_line_bytes=args.max_line_bytes,
                            classify_empty=args.classify_empty, skip_empty=args.skip_empty)
    except StreamError as e:
        parser.error(str(e))


def _say(message: str) -> None:
    print(f"{PROG}: {message}", file=sys.stderr, flush=True)


def _summary(stats: StreamStats, note: str = "") -> None:
    _say(f"{stats.records:,} records, {stats.errors:,} errors, {stats.batches:,} batches, "
         f"{stats.seconds:.2f} s, {stats.lines_per_second:,.0f} lines/s{note}")


def _run(argv: list[str] | None, wake_fd: int | None) -> int:
    parser = build_parser()
    args = parser.parse_intermixed_args(argv)  # options may stand between BUNDLE and INPUT
    config = _config_from_args(parser, args)
    if sys.stdout is None or (args.input == "-" and sys.stdin is None):  # started with `>&-` or `<&-`
        _say(f"error: standard {'output' if sys.stdout is None else 'input'} is closed; "
             "give the stream an open input and output")
        return EXIT_USAGE
    try:
        source = sys.stdin.buffer if args.input == "-" else open(args.input, "rb")
    except OSError as e:
        _say(f"error: cannot open input {args.input}: {e.strerror or e}")
        return EXIT_USAGE
    try:
        try:
            classifier = load(args.bundle, backend=args.backend, threads=args.threads)
            stats = classify_stream(classifier, source, sys.stdout.buffer, config, wake_fd)
        except DanpackError as e:  # an unreadable bundle, or options the bundle cannot honour (--top-k)
            _say(f"error: {e}")
            return EXIT_USAGE
        except StreamInterrupted as e:
            if args.verbose:
                _summary(e.stats, f" ({e})")
            return EXIT_SIGTERM if e.signum == signal.SIGTERM else EXIT_SIGINT
        except BrokenPipeError:  # the reader went away (`| head`): stop quietly, as a filter killed by SIGPIPE
            return EXIT_SIGPIPE
        except OSError as e:  # an input that fails to read, an output that fails to write (disk full)
            _say(f"error: {e}")
            return EXIT_USAGE
    finally:
        if args.input != "-":
            source.close()
    if args.verbose:
        _summary(stats)
    return EXIT_OK if stats.errors == 0 or args.lenient else EXIT_RECORD_ERRORS


def main(argv: list[str] | None = None) -> int:
    """Entry point of the `danpack-run` console script; returns the exit status.

    SIGTERM is turned into Terminated for the run (and the previous handler put back after), so a stop
    request finishes the batch being written instead of killing the process in the middle of a record;
    a signal wakeup pipe makes a signal that lands just before a wait for input end that wait.
    """
    if threading.current_thread() is not threading.main_thread():  # signals are the main thread's
        return _run(argv, None)
    wake_read, wake_write = os.pipe()
    for fd in (wake_read, wake_write):
        os.set_blocking(fd, False)
    previous_wake = signal.set_wakeup_fd(wake_write, warn_on_full_buffer=False)
    previous = signal.signal(signal.SIGTERM, _raise_terminated)
    try:
        return _run(argv, wake_read)
    except Terminated:  # while loading, before any record was read
        return EXIT_SIGTERM
    except KeyboardInterrupt:  # Ctrl-C while loading
        return EXIT_SIGINT
    finally:
        signal.signal(signal.SIGTERM, signal.SIG_DFL if previous is None else previous)
        signal.set_wakeup_fd(previous_wake)
        os.close(wake_read)
        os.close(wake_write)


if __name__ == "__main__":
    sys.exit(main())
