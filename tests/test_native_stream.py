"""`danpack-run` with and without the compiled part gives the same bytes.

With the compiled part, classify_stream hands each batch of raw lines to the native record code
(runtime/native/stream.c through runtime/fastpath.py NativeStream) and runs the classifier's own backend on the
ids it returns; without it (classifier.native None, as with DANPACK_NATIVE=0 or no C compiler) the Python records
of runtime/stream_records.py do the work. Compared byte for byte, with the counts, on awkward fixed input and on
random lines (hypothesis), for every output option; the reference is the Python stream itself.
"""

from __future__ import annotations

import importlib.util
import io
import json
import os

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from danpack.runtime import fastpath, load
from danpack.runtime.stream import StreamConfig, classify_stream
from test_native import AWKWARD_LINES

pytestmark = pytest.mark.skipif(
    importlib.util.find_spec("danpack.runtime._native") is None or os.environ.get("DANPACK_NATIVE") == "0",
    reason="the native library was not built by pip install (no C compiler) or DANPACK_NATIVE=0")

AWKWARD = (
    AWKWARD_LINES
    + b'{"text":"ok","x":"a\\u200bb\\u0085c\\u2028d\\ue000e\\u00adf\\ud83d\\ude00g\\u0378h\\udb40\\udc41i\\udfff\\u007f"}\n'
    b'{"text":"ok","id":[1,"\\u200b\\u0001\\\\\\ud800\\u007f"],"k\\u200b":{"a\\u2028":"\\udfff"}}\n'
    + b'{"text":"deep","x":' + b"[" * 101 + b"]" * 101 + b"}\n"
    + b'{"text":"not deep","x":' + b"[" * 100 + b"]" * 100 + b"}\n"
    + b'{"text":"in a string","x":"' + b"[" * 150 + b'"}\n'
    + b'{"text":"unterminated","x":"\\"' + b"[" * 150 + b"}\n"
    + b"\xef\xbb\xbfBOM not first\n" + b"x" * 300 + b"\nlast line without newline"
)

OPTIONS = [
    dict(jsonl=True), dict(jsonl=True, output="tsv", header=True, top_k=2), dict(jsonl=True, top_k=1, text_field="t"),
    dict(jsonl=True, output="tsv", id_field="id"), dict(classify_empty=True), dict(output="tsv", max_line_bytes=40),
    dict(jsonl=True, skip_empty=True, batch=3), dict(skip_empty=True, output="tsv", header=True, batch=1),
    dict(jsonl=True, batch=300),
]


@pytest.fixture(scope="module")
def classifiers(tmp_path_factory):
    """numpy and onnxruntime classifiers of a seeded 3-label test bundle (runtime/native/tests/make_test_bundles.py)."""
    from test_native import NATIVE, _load_module

    maker = _load_module(NATIVE / "tests" / "make_test_bundles.py", "make_test_bundles")
    paths = maker.write_bundles(tmp_path_factory.mktemp("native_stream"))
    path = next(p for p in paths if p.name == "demo_topic.bundle")
    return {backend: load(path, backend=backend) for backend in ("numpy", "onnxruntime")}


def both_ways(clf, data: bytes, config: StreamConfig) -> tuple:
    """(native bytes, native stats), (Python bytes, Python stats)."""
    results = []
    native = clf.native
    for use in (native, None):
        clf.native = use
        try:
            sink = io.BytesIO()
            stats = classify_stream(clf, io.BytesIO(data), sink, config)
        finally:
            clf.native = native
        results.append((sink.getvalue(), stats.records, stats.errors, stats.batches))
    return results


@pytest.mark.parametrize("options", OPTIONS, ids=lambda o: ",".join(f"{k}={v}" for k, v in o.items()))
@pytest.mark.parametrize("backend", ["numpy", "onnxruntime"])
def test_native_records_are_the_python_records(classifiers, options, backend):
    clf = classifiers[backend]
    assert fastpath.NativeStream.open(clf.native, jsonl=False, text_field="text", id_field=None, tsv=False,
                                      top_k=None, max_line_bytes=10, classify_empty=False, skip_empty=False)
    native, python = both_ways(clf, AWKWARD, StreamConfig(**options))
    assert native == python
    assert native[1] == AWKWARD.count(b"\n") + 1  # in = out


def test_the_native_records_do_the_work(classifiers, monkeypatch):
    """Guards the comparison above: with the Python records broken, the native path still answers (so it ran)."""
    from danpack.runtime import stream

    clf = classifiers["numpy"]
    monkeypatch.setattr(stream, "answer_batch", lambda *a: (_ for _ in ()).throw(AssertionError("Python path ran")))
    sink = io.BytesIO()
    classify_stream(clf, io.BytesIO(b"great charger\nslow\n"), sink, StreamConfig())
    assert [json.loads(line)["line"] for line in sink.getvalue().splitlines()] == [1, 2]


def test_a_failing_native_batch_is_answered_the_python_way(classifiers, monkeypatch):
    clf = classifiers["numpy"]
    want = both_ways(clf, AWKWARD, StreamConfig(jsonl=True))[1]

    def broken(self, *args):
        raise MemoryError("no room")

    monkeypatch.setattr(fastpath.NativeStream, "parse", broken)
    assert both_ways(clf, AWKWARD, StreamConfig(jsonl=True))[0] == want


def test_a_non_finite_row_is_the_same_error_record(classifiers, monkeypatch):
    clf = classifiers["numpy"]
    real = clf.backend.run

    def nan_for_short(ids, counts):  # (B, T), (B,) -> probabilities with NaN rows for texts of one token
        probs, logits = real(ids, counts)
        probs = probs.copy()
        probs[np.asarray(counts) == 1] = np.nan
        return probs, logits

    monkeypatch.setattr(clf.backend, "run", nan_for_short)
    data = b"great fast charger\nslow\nok then\nbad\n"
    native, python = both_ways(clf, data, StreamConfig(output="tsv"))
    assert native == python and native[2] == 2 and b"non-finite" in native[0]


_TEXT = st.text(alphabet=st.characters(blacklist_categories=()), max_size=30)
_VALUE = st.recursive(st.none() | st.booleans() | st.integers() | st.floats(allow_nan=False, allow_infinity=False)
                      | _TEXT, lambda inner: st.lists(inner, max_size=3) | st.dictionaries(_TEXT, inner, max_size=3),
                      max_leaves=6)
_RECORD = st.dictionaries(st.sampled_from(["text", "id", "line", "label", "x", "input_label", "\u200b"]), _VALUE,
                          max_size=4)


def _line(draw_kind: int, record: dict, raw: bytes, text: str) -> bytes:
    if draw_kind == 0:
        return json.dumps(record).encode()  # ASCII, surrogates as escapes
    if draw_kind == 1:
        return json.dumps(record, ensure_ascii=False).encode("utf-8", "surrogatepass")
    if draw_kind == 2:
        return raw.replace(b"\n", b" ")
    return text.encode("utf-8", "surrogatepass").replace(b"\n", b" ")


def test_floats_next_to_a_power_of_two_are_python_s_shortest(classifiers):
    """2^-24 as a double: the nearest 16-digit decimal (a tie, rounded to even) does not read back, the one above
    does; Python's repr writes 5.960464477539063e-08 (found by the property test below on a clean CI clone)."""
    values = [2.0**-24, 2.0**-96, 2.0**87, 2.0**-1074, 1e23, 5e-324, 0.1, 2.0**-149 * 3]
    data = json.dumps({"text": "ok", "x": values}).encode() + b"\n"
    native, python = both_ways(classifiers["numpy"], data, StreamConfig(jsonl=True))
    assert native == python and b"5.960464477539063e-08" in native[0]


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(lines=st.lists(st.tuples(st.integers(0, 3), _RECORD, st.binary(max_size=20), _TEXT), max_size=12),
       options=st.sampled_from(OPTIONS), backend=st.sampled_from(["numpy", "onnxruntime"]))
def test_random_lines_give_the_same_bytes(classifiers, lines, options, backend):
    data = b"\n".join(_line(*x) for x in lines)
    native, python = both_ways(classifiers[backend], data, StreamConfig(**options))
    assert native == python


# --- the Python API's native forward pass for few texts (numpy backend) ------------------------------------------

def test_few_texts_run_the_native_forward_pass_within_1e_6(classifiers):
    """Fewer than MIN_TEXTS texts on the numpy backend: one C call (tokens, ids, gather, mean, layers, softmax),
    said by describe(); its answers within 1e-6 of the numpy forward pass (which itself moves by ~1e-7 with the
    batch), its labels the same wherever the two best are not within 1e-5."""
    from test_native import TRICKY

    clf = classifiers["numpy"]
    assert clf.describe()["forward"].startswith("native below")
    assert classifiers["onnxruntime"].describe()["forward"] == "onnxruntime"
    calls = []
    real = clf.native.classify
    clf.native.classify = lambda *a: calls.append(len(a[0])) or real(*a)
    try:
        for size in (1, 2, fastpath.MIN_TEXTS - 1):
            for start in range(0, len(TRICKY), size):
                texts = TRICKY[start : start + size]
                fast, fast_logits = clf.run(texts)  # (B, C) each
                keep, clf.native = clf.native, None
                try:
                    slow, slow_logits = clf.run(texts)
                finally:
                    clf.native = keep
                assert fast.dtype == slow.dtype == np.float32 and fast.shape == slow.shape
                assert float(np.abs(fast - slow).max()) <= 1e-6 and float(np.abs(fast_logits - slow_logits).max()) <= 1e-5
                top2 = np.sort(slow, axis=1)[:, -2:]
                clear = top2[:, 1] - top2[:, 0] > 1e-5
                assert (fast.argmax(axis=1)[clear] == slow.argmax(axis=1)[clear]).all()
        assert calls and max(calls) < fastpath.MIN_TEXTS
        calls.clear()
        clf.predict_proba(TRICKY[: fastpath.MIN_TEXTS])  # a batch: the numpy backend
        clf.predict_proba(["lone \ud800 surrogate"])  # not UTF-8: the Python encoder and numpy
        assert calls == [1]
    finally:
        clf.native.classify = real
