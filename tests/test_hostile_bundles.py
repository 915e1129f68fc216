"""Hostile and damaged bundles: every bad file is a BundleError naming the problem, in bounded time and memory.

External references: the msgpack specification (github.com/msgpack/msgpack, spec.md) for the header bytes
crafted here (0xc6 bin32, 0xdb str32, 0xdd array32, 0xdf map32, 0x91 one-element fixarray); `hashlib.sha256`
(stdlib) as the independent checksum; the `onnx` package's own protobuf parser as the oracle for the
runtime's stdlib graph reader; `resource.getrusage` (stdlib, Linux reports ru_maxrss in KiB) and Linux's /proc/self/status VmHWM (proc(5))
for peak memory.
Predictions of a damaged-but-accepted bundle are compared with those of the undamaged original.
"""

from __future__ import annotations

import copy
import hashlib
import importlib.util
import json
import math
import os
import re
import struct
import subprocess
import sys
import textwrap
from collections import Counter
from pathlib import Path

import msgpack
import numpy as np
import onnx
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from danpack import runtime
import danpack.runtime.bundle as rb
from danpack.runtime.onnx_wire import read_graph_names
from danpack.runtime import BundleError, decode_bundle
from danpack.runtime.classifier import Classifier

from danpack.pack.bundle import encode_bundle
from danpack.model import FloatModel, save_model
from danpack.pack.build import PackOptions, pack_model
from danpack.runtime.forward import Layer

CORPUS_DIR = Path(__file__).parent / "adversarial"
_spec = importlib.util.spec_from_file_location("make_corpus", CORPUS_DIR / "make_corpus.py")
corpus = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(corpus)

BACKENDS = ("onnxruntime", "numpy")
TEXTS = [
    "charger slow", "card payment refund never worked", "", "zzz qqq unknown words", "great fast charger cafe",
    "cable stuck plug broken broken", "Screen: APP crashed, receipt?", "kw kw kw full bay wait queue",
]
# Parts of a bundle that legitimately change predictions when rewritten with a valid checksum: the runtime
# cannot tell a different model from a damaged one there (that is what pinning Bundle.sha256 is for).
MEANINGFUL = (("manifest", "labels"), ("manifest", "tokenizer"), ("manifest", "oov"), ("vocab",))
MEMORY_LIMIT_KIB = 16 * 1024  # peak RSS growth allowed while refusing one crafted file


# --- real bundles to damage ------------------------------------------------------------------------------------

def _model_unk(seed: int = 11) -> FloatModel:
    """An unfolded tanh DAN over the corpus tokens plus an unknown-token row (oov policy unk)."""
    rng = np.random.default_rng(seed)
    vocab = corpus.TOKENS + ("<unk>",)
    layers = (Layer(rng.normal(size=(10, 6)).astype(np.float32), rng.normal(size=10).astype(np.float32), "tanh"),
              Layer(rng.normal(size=(2, 10)).astype(np.float32), rng.normal(size=2).astype(np.float32), None))
    return FloatModel(vocab, rng.normal(size=(len(vocab), 6)).astype(np.float32), layers, ("negative", "positive"),
                      oov_policy="unk", unk_token="<unk>")


@pytest.fixture(scope="module")
def bases(tmp_path_factory) -> list[bytes]:
    """Three real bundles: int8 folded (skip), int8 pruned with a rest row, float32 table (unk)."""
    root = tmp_path_factory.mktemp("bases")
    first = corpus.build_base_bundle(root)
    save_model(_model_unk(), root / "unk")
    comments = root / "stream.txt"
    comments.write_text("charger slow\ncard payment refund\nslow slow charger queue\ngreat fast charger\n", encoding="utf-8")
    rest = pack_model(root / "unk", None, PackOptions(corpora=(str(comments),), top=6, pruned="rest", fold="no")).data
    plain = pack_model(root / "unk", None, PackOptions(quantize=False)).data
    return [first, rest, plain]


@pytest.fixture(scope="module")
def references(bases) -> list[dict[str, tuple]]:
    """(labels, probabilities) of each base bundle on TEXTS, per backend."""
    out = []
    for data in bases:
        bundle = decode_bundle(data)
        out.append({b: _predict(Classifier(bundle, b)) for b in BACKENDS})
    return out


def _predict(clf: Classifier) -> tuple[tuple[str, ...], np.ndarray]:
    return tuple(clf.predict(TEXTS)), clf.predict_proba(TEXTS)


def _same(a: tuple, b: tuple) -> bool:
    return a[0] == b[0] and np.array_equal(a[1], b[1])


def _meaningful(path: tuple) -> bool:
    return any(path[: len(p)] == p for p in MEANINGFUL) or (len(path) == 3 and path[0] == "tensors" and path[2] == "data")


def _outcome(data: bytes, ref: dict, path: tuple | None, backends=("numpy",), tmp: Path | None = None) -> str:
    """Decode (and open) mutated bytes: 'refused' (BundleError), 'same' or 'changed'; anything else fails the test.

    'changed' is accepted only for a mutation under MEANINGFUL, and then both backends must agree.
    With `tmp`, the bytes also go through a file and `runtime.load` on each backend.
    """
    try:
        bundle = decode_bundle(data, "mutated")
    except BundleError as e:
        assert str(e).startswith("mutated: ") and len(str(e)) < 2000, str(e)
        if tmp is not None:  # the file path gives the same refusal
            tmp.write_bytes(data)
            for backend in BACKENDS:
                with pytest.raises(BundleError):
                    runtime.load(tmp, backend)
        return "refused"
    results = {}
    for backend in (BACKENDS if tmp is not None else backends):
        try:
            clf = runtime.load(_write(tmp, data), backend) if tmp is not None else Classifier(bundle, backend)
        except BundleError:
            results[backend] = None
            continue
        results[backend] = _predict(clf)
    opened = {b: r for b, r in results.items() if r is not None}
    if not opened:
        return "refused"
    if all(_same(r, ref[b]) for b, r in opened.items()):
        return "same"
    assert path is not None and _meaningful(path), f"mutation at {path} changed predictions without a BundleError"
    if len(opened) < 2:  # a meaningful change: the other backend must compute the same thing
        other = "onnxruntime" if "numpy" in opened else "numpy"
        try:
            opened[other] = _predict(Classifier(bundle, other))
        except BundleError:
            return "changed"
    assert opened["numpy"][0] == opened["onnxruntime"][0], "the backends disagree on an accepted bundle"
    np.testing.assert_allclose(opened["numpy"][1], opened["onnxruntime"][1], atol=1e-5)
    return "changed"


def _write(path: Path, data: bytes) -> Path:
    path.write_bytes(data)
    return path


def _paths(tree, prefix=()) -> list[tuple]:
    """Every key / index path in a payload tree (long lists: first, second and last element only)."""
    out = [prefix] if prefix else []
    if isinstance(tree, dict):
        for key in tree:
            out += _paths(tree[key], prefix + (key,))
    elif isinstance(tree, list):
        picks = range(len(tree)) if len(tree) <= 3 else (0, 1, len(tree) - 1)
        for i in picks:
            out += _paths(tree[i], prefix + (i,))
    return out


def _get(tree, path):
    for key in path:
        tree = tree[key]
    return tree


def _set(tree, path, value):
    _get(tree, path[:-1])[path[-1]] = value


def _delete(tree, path):
    parent = _get(tree, path[:-1])
    if isinstance(parent, dict):
        del parent[path[-1]]
    else:
        parent.pop(path[-1])


# --- the adversarial corpus: exact errors ------------------------------------------------------------------------

EXPECTED = json.loads((CORPUS_DIR / "expected.json").read_text(encoding="utf-8"))


def test_corpus_is_complete_and_small():
    files = sorted(p.name for p in CORPUS_DIR.glob("*.bundle"))
    assert files == sorted(EXPECTED) == sorted(name for name, _, _ in corpus.CASES)
    readme = (CORPUS_DIR / "README.md").read_text(encoding="utf-8")
    for name in files:
        assert (CORPUS_DIR / name).stat().st_size < corpus.MAX_FILE
        assert f"`{name}`" in readme
    assert len(files) >= 80


@pytest.mark.parametrize("name", sorted(EXPECTED))
def test_corpus_file_gives_its_exact_error(name):
    path = CORPUS_DIR / name
    data = path.read_bytes()
    want = EXPECTED[name]
    if want["decode_bundle"] is None:
        decode_bundle(data)  # decodes: only opening it (the probe) can refuse it
    else:
        with pytest.raises(BundleError) as e:
            decode_bundle(data, corpus.SOURCE)
        assert str(e.value) == want["decode_bundle"]
    for backend in BACKENDS:
        with pytest.raises(BundleError) as e:
            runtime.load(path, backend)
        assert str(e.value).replace(str(path), corpus.SOURCE) == want[backend]
    # the sealed ones really carry a valid sha256: only structural checks can refuse them
    assert corpus.is_sealed(data) == want["sealed"]


def test_corpus_regenerates_with_the_same_errors(tmp_path):
    """make_corpus.py, run again, crafts files that give the recorded errors (digests masked: they follow the packer)."""
    table = corpus.write_corpus(tmp_path)
    mask = lambda s: re.sub(r"[0-9a-f]{64}", "<sha256>", s) if isinstance(s, str) else s  # noqa: E731
    for name, row in table.items():
        for key in ("decode_bundle", *BACKENDS, "sealed"):
            assert mask(row[key]) == mask(EXPECTED[name][key]), (name, key)


# --- truncation and bit flips, exhaustively on a small bundle -------------------------------------------------

def test_truncated_at_every_offset(bases, tmp_path):
    data = bases[0]

    def message(n: int) -> str:  # every cut names itself and the fix
        return "the file is empty" if n == 0 else "not a well-formed msgpack map .*the file is cut short or damaged: copy it again"

    for n in range(len(data)):
        with pytest.raises(BundleError, match=message(n)):
            decode_bundle(data[:n])
    for n in list(range(0, len(data), 97)) + [len(data) - 1]:  # a dense sample through the file path
        path = _write(tmp_path / "cut.bundle", data[:n])
        for backend in BACKENDS:
            with pytest.raises(BundleError, match=message(n)):
                runtime.load(path, backend)


def test_bit_flipped_at_every_offset(bases):
    data = bases[0]
    outer = msgpack.unpackb(data)
    payload_at, digest_at = data.index(outer["payload"]), data.index(outer["sha256"])
    checked = set(range(payload_at, payload_at + len(outer["payload"]))) | set(range(digest_at, digest_at + 32))
    framing = [i for i in range(len(data)) if i not in checked]
    flips = [(i, 1 << (i % 8)) for i in range(len(data))] + [(i, 1 << bit) for i in framing for bit in range(8)]
    for offset, mask in flips:
        damaged = bytearray(data)
        damaged[offset] ^= mask
        with pytest.raises(BundleError) as e:
            decode_bundle(bytes(damaged))
        if offset in checked:  # payload or stored digest: the checksum is what catches it
            assert "checksum mismatch" in str(e.value)
    assert len(flips) > len(data) and len(framing) < 64


# --- every level of the tree, rewritten with a valid checksum --------------------------------------------------

DEEP = 1
for _ in range(1000):  # msgpack reads up to 1024 levels; Python's repr of it hits the recursion limit
    DEEP = [DEEP]
WRONG_VALUES = [None, True, -1, 2**64 - 1, 1.5, float("nan"), "", "x" * 300, b"\x00", [], {}, [[1, 2]], {"k": 1}, DEEP]


def test_wrong_value_at_every_path(bases, references):
    """Each key and index of the payload tree (outer, payload, manifest, tensors, layers, probe) gets each wrong value."""
    seen = Counter()
    for which, data in enumerate(bases[:2]):
        body = msgpack.unpackb(msgpack.unpackb(data)["payload"])
        for path in _paths(body):
            for value in WRONG_VALUES:
                mutated = copy.deepcopy(body)
                _set(mutated, path, value)
                seen[_outcome(corpus.seal(mutated), references[which], path)] += 1
            mutated = copy.deepcopy(body)
            _delete(mutated, path)
            seen[_outcome(corpus.seal(mutated), references[which], path)] += 1
        outer = msgpack.unpackb(data)
        for key in ("format", "version"):
            for value in WRONG_VALUES:
                seen[_outcome(msgpack.packb({**outer, key: value}), references[which], (key,))] += 1
    print(f"\nwrong value at every path: {dict(seen)}", file=sys.stderr)
    assert seen["refused"] > 1000 and seen["same"] > 100  # most damage is refused; metadata edits do not matter


def test_inspect_shows_every_accepted_bundle(bases, tmp_path):
    """`danpack inspect` (text and JSON) works on every manifest edit the reader accepts: what it displays is validated."""
    from typer.testing import CliRunner

    from danpack.cli import app

    body = msgpack.unpackb(msgpack.unpackb(bases[0])["payload"])
    runner, shown = CliRunner(), 0
    for path in _paths(body["manifest"], ("manifest",)):
        for value in (None, "x", -1, 1.5, [], {}, DEEP, "delete"):
            mutated = copy.deepcopy(body)
            _delete(mutated, path) if value == "delete" else _set(mutated, path, value)
            data = corpus.seal(mutated)
            try:
                decode_bundle(data)
            except BundleError:
                continue
            target = _write(tmp_path / "accepted.bundle", data)
            for args in (["inspect", str(target)], ["inspect", "--json", str(target)]):
                result = runner.invoke(app, args)
                assert result.exit_code == 0 and result.exception is None, (path, value, args, result.exception)
                shown += 1
    assert shown > 50


def test_deep_nesting_100000_levels(bases):
    deep = b"\x91" * 100_000 + b"\xc0"  # msgpack: 10^5 one-element arrays around nil
    with pytest.raises(BundleError, match="StackError: containers nested deeper"):
        decode_bundle(deep)
    with pytest.raises(BundleError, match="payload is not a well-formed.*StackError"):
        decode_bundle(encode_bundle(deep))  # the same inside a payload with a valid sha256
    body = msgpack.unpackb(msgpack.unpackb(bases[0])["payload"])
    for path in (("manifest", "labels"), ("manifest", "oov", "row"), ("tensors", "table", "shape"), ("manifest", "probe", "ids", 0)):
        mutated = copy.deepcopy(body)
        _set(mutated, path, DEEP)  # 1000 levels: msgpack accepts them, Python's repr hits its recursion limit
        with pytest.raises(BundleError) as e:
            decode_bundle(corpus.seal(mutated))
        assert len(str(e.value)) < 400


def test_tokenizer_pattern_that_breaks_re_compile(bases):
    body = msgpack.unpackb(msgpack.unpackb(bases[0])["payload"])
    # re.compile raises RecursionError and OverflowError on these; the tokenizer turns both into TokenizerError
    for pattern, error in (("(?:" * 1000 + "a" + ")" * 1000, "maximum recursion"), ("a{4294967296}", "too large")):
        body["manifest"]["tokenizer"]["pattern"] = pattern
        with pytest.raises(BundleError, match=f"field 'tokenizer' is invalid \\(TokenizerError: .*{error}"):
            decode_bundle(corpus.seal(body))


def test_non_regular_files_are_refused(tmp_path):
    with pytest.raises(BundleError, match="is not a regular file"):
        runtime.load("/dev/null")  # a device: stat() says 0 bytes whatever it yields (/dev/zero never ends)
    with pytest.raises(BundleError, match="is a directory"):
        runtime.load(tmp_path)
    with pytest.raises(BundleError, match="no such bundle file"):
        runtime.load(tmp_path / "missing.bundle")


# --- declared lengths far beyond the file: bounded memory --------------------------------------------------------

MEMORY_SCRIPT = textwrap.dedent("""
    import json, resource, sys
    from danpack import runtime
    from danpack.runtime import BundleError

    def peak_kib():
        # ru_maxrss also counts the forked parent's peak (kept across exec), so a child of a large pytest
        # process would hide any growth below it; on Linux VmHWM is this process image's own peak
        try:
            with open("/proc/self/status") as f:
                return int(next(line for line in f if line.startswith("VmHWM:")).split()[1])
        except (OSError, StopIteration):
            return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss

    path = sys.argv[1]
    load = runtime.load  # runtime's names load on first use: import numpy and the backends before measuring
    open(path, "rb").read()  # warm the page cache and the allocator once
    try:  # Linux: reset the peak mark to the current RSS, so the growth below is the file's alone
        with open("/proc/self/clear_refs", "w") as f:
            f.write("5")
    except OSError:
        pass
    before = peak_kib()
    try:
        if path.endswith("control"):  # positive control: the instrument sees a 32 MiB allocation
            block = b"x" * (32 << 20)
            raise BundleError("control")
        load(path, "numpy")
        result = "loaded"
    except BundleError as e:
        result = "BundleError: " + str(e)
    except BaseException as e:
        result = type(e).__name__ + ": " + str(e)
    after = peak_kib()
    print(json.dumps({"growth_kib": after - before, "result": result}))
""")
B32 = struct.pack(">I", 0xFFFFFFFF)


def _nested_claims(levels: int, claim: int, size: int) -> bytes:
    """A payload of `levels` nested array32 headers, each claiming `claim` entries, padded to `size` bytes."""
    head = (b"\xdd" + struct.pack(">I", claim)) * levels
    return head + bytes(size - len(head))


MEMORY_CASES = {
    "outer bin32 4 GiB": lambda b: b"\x84\xa7payload\xc6" + B32 + bytes(64),
    "outer str32 4 GiB": lambda b: b"\x84\xdb" + B32 + b"format",
    "outer array32 4 Gi entries": lambda b: b"\xdd" + B32 + bytes(64),
    "outer map32 4 Gi entries": lambda b: b"\xdf" + B32 + bytes(64),
    "payload bin32 4 GiB": lambda b: encode_bundle(b"\x84\xa5graph\xc6" + B32 + bytes(64)),
    "payload str32 4 GiB": lambda b: encode_bundle(b"\x84\xa5vocab\xdb" + B32 + bytes(64)),
    "payload array32 4 Gi entries": lambda b: encode_bundle(b"\x84\xa8manifest\xdd" + B32 + bytes(64)),
    "payload map32 4 Gi entries": lambda b: encode_bundle(b"\xdf" + B32 + bytes(64)),
    "tensor shape 2^63 x 2^63": lambda b: corpus.with_body(b, corpus.edit_value(("tensors", "table", "shape"), [2**63, 2**63])),
    "nested 10^5 levels": lambda b: b"\x91" * 100_000 + b"\xc0",
    "payload nested 10^5 levels": lambda b: encode_bundle(b"\x91" * 100_000 + b"\xc0"),
    # nested array headers each claiming as many entries as the payload has bytes: msgpack allocates every
    # declared list before reading it (measured before the count check: 21 MiB for the 4 KB file, 77 MiB for 1 MiB)
    "payload 790 nested claims of 4000 entries (4 KB file)": lambda b: encode_bundle(_nested_claims(790, 4000, 4000)),
    "payload 1000 nested claims of 64 Ki entries": lambda b: encode_bundle(_nested_claims(1000, 1 << 16, 1 << 16)),
    "payload 1000 nested claims of 1 Mi entries": lambda b: encode_bundle(_nested_claims(1000, 1 << 20, 1 << 20)),
}


def test_declared_lengths_stay_in_bounded_memory(bases, tmp_path):
    """Each crafted file is refused in a fresh process whose peak RSS grows by less than MEMORY_LIMIT_KIB."""
    figures = {}
    for name, make in {"control: 32 MiB allocation": None, **MEMORY_CASES}.items():
        path = _write(tmp_path / "control", b"") if make is None else _write(tmp_path / "claims.bundle", make(bases[0]))
        run = subprocess.run([sys.executable, "-c", MEMORY_SCRIPT, str(path)], capture_output=True, text=True,
                             timeout=120, cwd=Path(__file__).parents[1])
        assert run.returncode == 0, run.stderr
        report = json.loads(run.stdout.strip().splitlines()[-1])
        assert report["result"].startswith("BundleError: "), (name, report)
        figures[name] = report["growth_kib"]
        if make is None:
            assert report["growth_kib"] >= 32 * 1024, report  # the measurement can see growth
        else:
            assert report["growth_kib"] < MEMORY_LIMIT_KIB, (name, report)
    print(f"\npeak RSS growth (KiB) while refusing: {figures}", file=sys.stderr)


msgpack_values = st.recursive(
    st.none() | st.booleans() | st.integers(-(2**63), 2**64 - 1) | st.floats() | st.text(max_size=300)
    | st.binary(max_size=300) | st.builds(msgpack.ExtType, st.integers(0, 127), st.binary(max_size=20)),
    lambda inner: st.lists(inner, max_size=20) | st.dictionaries(st.text(max_size=5), inner, max_size=20),
    max_leaves=40,
)


@settings(max_examples=150, deadline=None, database=None, suppress_health_check=[HealthCheck.too_slow])
@given(value=msgpack_values)
def test_count_check_accepts_every_valid_msgpack(value):
    """The pre-allocation count check never refuses what msgpack itself writes (all widths of every type)."""
    for data in (msgpack.packb(value, use_bin_type=True), msgpack.packb([value] * 17), msgpack.packb({"k": value})):
        rb._check_counts(data)


def test_count_check_on_wide_values():
    wide = [b"x" * 70000, "y" * 70000, b"x" * 300, "y" * 300, msgpack.ExtType(1, b"z" * 70000)]  # bin/str/ext 16 and 32
    rb._check_counts(msgpack.packb([wide, 1, [2, 3]], use_bin_type=True))
    for value, items in (([0] * 70000, 70000), ({str(i): i for i in range(70000)}, 140000), ([[]] * 16, 16),
                         ({str(i): [] for i in range(16)}, 32)):
        data = msgpack.packb(value)
        rb._check_counts(data)  # array16 / array32 / map16 / map32 counts are read right
        header = 3 if len(value) < 65536 else 5
        with pytest.raises(ValueError, match="declares more entries"):
            rb._check_counts(data[: header + items // 2])


# --- the ONNX graph reader against onnx's own parser -------------------------------------------------------------

def _onnx_view(graph: bytes):
    """What the runtime's reader extracts, computed by the onnx package (protobuf's parser)."""
    m = onnx.ModelProto()
    m.ParseFromString(graph)
    g = m.graph
    used = [i for n in g.node for i in n.input]
    defined = {o for n in g.node for o in n.output} | {t.name for t in g.initializer} | {v.name for v in g.input}
    external = {t.name: (t.data_type, list(t.dims)) for t in g.initializer
                if t.data_location == onnx.TensorProto.EXTERNAL}
    ops = [(n.domain, n.op_type) for n in g.node]
    return used, defined, {v.name for v in g.input}, {v.name for v in g.output}, external, ops


def test_graph_reader_agrees_with_onnx(bases):
    graphs = [msgpack.unpackb(msgpack.unpackb(b)["payload"])["graph"] for b in bases]
    model = onnx.ModelProto()
    model.ParseFromString(graphs[0])
    embedded = onnx.helper.make_model(model.graph)  # a re-serialised copy through onnx's own writer
    graphs.append(embedded.SerializeToString())
    for graph in graphs:
        names = read_graph_names(graph)
        assert (names.used, names.defined, names.inputs, names.outputs, names.external, names.ops) == _onnx_view(graph)
    # onnx.proto field numbers the reader relies on (its comment cites them)
    fields = {(msg.DESCRIPTOR.name, f.name): f.number for msg in (onnx.ModelProto, onnx.GraphProto, onnx.NodeProto,
              onnx.TensorProto, onnx.ValueInfoProto) for f in msg.DESCRIPTOR.fields}
    assert (fields["ModelProto", "graph"], fields["GraphProto", "node"], fields["GraphProto", "initializer"],
            fields["GraphProto", "input"], fields["GraphProto", "output"], fields["NodeProto", "input"],
            fields["NodeProto", "output"], fields["TensorProto", "dims"], fields["TensorProto", "data_type"],
            fields["TensorProto", "name"], fields["TensorProto", "data_location"], fields["NodeProto", "op_type"],
            fields["NodeProto", "domain"]) == (7, 1, 5, 11, 12, 1, 2, 1, 2, 8, 14, 4, 7)
    assert (onnx.TensorProto.FLOAT, onnx.TensorProto.INT8, onnx.TensorProto.EXTERNAL) == (1, 3, 1)


def _graph_edit(data: bytes, edit) -> bytes:
    return corpus.with_graph(data, edit)


def _set_initializer(model: onnx.ModelProto, name: str, value: np.ndarray) -> None:
    for i, init in enumerate(model.graph.initializer):
        if init.name == name:
            model.graph.initializer[i].CopyFrom(onnx.numpy_helper.from_array(value, name))


@pytest.mark.parametrize("edit", [
    lambda m: _set_initializer(m, "one_i", np.array(0, np.int64)),  # Range with step 0: fails only when run
    lambda m: corpus._node_input(m, "logits", 0, "layer0_a"),  # logits 6 wide instead of 3
], ids=["range-step-zero", "logits-too-wide"])
def test_graph_failing_only_at_run_time_is_a_bundle_error(bases, tmp_path, edit, monkeypatch):
    data = _graph_edit(bases[0], edit)
    with pytest.raises(BundleError, match="graph is not the one danpack writes"):
        decode_bundle(data)  # the reader rebuilds the graph and compares
    # second line of defence: without the comparison, the load-time probe still turns the failure into BundleError
    import danpack.runtime.bundle as rb

    monkeypatch.setattr(rb, "_check_graph_is_written", lambda *args: None)
    decode_bundle(data)  # structurally sound: the names-only checks cannot see it
    with pytest.raises(BundleError):
        runtime.load(_write(tmp_path / "g.bundle", data), "onnxruntime")


@pytest.mark.parametrize("body, message", [
    ([0] * 300_000, "more than 262144 msgpack items"),  # 300 KB that would decode into ~10 MB of Python objects
    ([[0] * 60_000] * 5, "more than 262144 msgpack items"),  # the same spread over containers under the cap
    ({"manifest": [0] * 70_000}, "exceeds max_array_len"),  # one container past MAX_CONTAINER
])
def test_payload_item_budget_bounds_decoding(body, message):
    with pytest.raises(BundleError, match=message):
        decode_bundle(corpus.seal(body))


def test_weights_that_can_overflow_float32_are_refused(bases):
    # A finite but huge scale makes some text's logits inf and its probabilities NaN (then a JSON stream
    # would print NaN with a confident label): the reader bounds what any text can reach.
    with pytest.raises(BundleError, match="weights can drive the logits to 2.59e\\+41"):
        decode_bundle(corpus.with_body(bases[0], lambda b: corpus.set_last_scale(b, 3e38)))
    decode_bundle(corpus.with_body(bases[0], lambda b: corpus.set_last_scale(b, 1e-3)))  # an ordinary scale passes


def test_folded_flag_must_match_layer_zero(bases):
    def flag(body):
        body["manifest"]["table"]["folded"] = not body["manifest"]["table"]["folded"]

    with pytest.raises(BundleError, match="field 'table.folded' is"):
        decode_bundle(corpus.with_body(bases[0], flag))


def test_a_fifo_is_refused_without_blocking(tmp_path):
    fifo = tmp_path / "bundle.fifo"
    os.mkfifo(fifo)  # nobody writes: opening it would block forever
    import threading

    outcome: list = []

    def load() -> None:
        try:
            runtime.load(fifo)
        except BundleError as e:
            outcome.append(str(e))

    worker = threading.Thread(target=load, daemon=True)  # a blocked open fails the test instead of hanging it
    worker.start()
    worker.join(10)
    assert not worker.is_alive(), "runtime.load blocked on a FIFO"
    assert outcome and "is not a regular file" in outcome[0]


@pytest.mark.parametrize("edit, message", [
    (corpus._add_loop, r"uses operators \['Loop'\], which danpack never writes"),
    (lambda m: setattr(m.graph.node[0], "domain", "com.example"), r"uses operators \['com.example:Shape'\]"),
])
def test_graph_with_foreign_operators_is_refused(bases, tmp_path, edit, message):
    # Only the operators packer/graph.py writes may run: a crafted Loop would hang the probe forever.
    with pytest.raises(BundleError, match=message):
        decode_bundle(_graph_edit(bases[0], edit))


def test_declared_tensor_that_no_node_uses_is_refused(bases):
    # the tensor is held by the bundle and declared by the graph, so only the use check can object
    with pytest.raises(BundleError, match=r"declares tensors \['spare'\] that no node uses"):
        decode_bundle(corpus.with_body(bases[0], corpus._declare_spare))


# --- integrity: the checksum comes first ------------------------------------------------------------------------

def test_checksum_is_verified_before_the_payload_is_used(bases, monkeypatch, tmp_path):
    import onnxruntime

    calls: list[str] = []
    real_unpackb, real_tensor, real_session = msgpack.unpackb, rb._decode_tensor, onnxruntime.InferenceSession
    data = bases[0]
    payload = msgpack.unpackb(data)["payload"]

    def unpackb(buf, *a, **k):
        calls.append("payload" if bytes(buf) == payload or len(buf) == len(payload) else "file")
        return real_unpackb(buf, *a, **k)

    def tensor(*a, **k):
        calls.append("tensor")
        return real_tensor(*a, **k)

    def check(name):
        def record(*a, **k):
            calls.append(name)
        return record

    def session(*a, **k):
        calls.append("session")
        return real_session(*a, **k)

    monkeypatch.setattr(msgpack, "unpackb", unpackb)
    monkeypatch.setattr(rb, "_decode_tensor", tensor)
    monkeypatch.setattr(onnxruntime, "InferenceSession", session)
    # positive control: a good bundle goes through every stage
    runtime.load(_write(tmp_path / "good.bundle", data), "onnxruntime")
    assert calls[0] == "file" and "payload" in calls and "tensor" in calls and "session" in calls
    # one flipped payload bit, and a payload that would itself be hostile: refused by the checksum alone
    flipped = bytearray(data)
    flipped[data.index(payload) + len(payload) // 2] ^= 0x10
    hostile = msgpack.packb({**msgpack.unpackb(data), "payload": b"\x91" * 3000 + b"\xc0"})
    for bad in (bytes(flipped), hostile):
        calls.clear()
        with pytest.raises(BundleError, match="checksum mismatch"):
            runtime.load(_write(tmp_path / "bad.bundle", bad), "onnxruntime")
        assert calls == ["file"]
    # and the manifest / graph checks are never reached either
    monkeypatch.setattr(rb, "_check_manifest", check("manifest"))
    monkeypatch.setattr(rb, "_check_graph", check("graph"))
    calls.clear()
    with pytest.raises(BundleError, match="checksum mismatch"):
        decode_bundle(bytes(flipped))
    assert calls == ["file"]


def test_bundle_sha256_is_the_payload_digest_and_inspect_shows_it(bases, tmp_path):
    from typer.testing import CliRunner

    from danpack.cli import app

    for data in bases:
        outer = msgpack.unpackb(data)
        assert decode_bundle(data).sha256 == hashlib.sha256(outer["payload"]).hexdigest() == outer["sha256"].hex()
    path = _write(tmp_path / "b.bundle", bases[0])
    digest = hashlib.sha256(msgpack.unpackb(bases[0])["payload"]).hexdigest()
    result = CliRunner().invoke(app, ["inspect", str(path)])
    assert result.exit_code == 0, result.output
    assert f"sha256   {digest}" in result.output
    result = CliRunner().invoke(app, ["inspect", "--json", str(path)])
    assert json.loads(result.stdout)["sha256"] == digest
    # a sealed edit of one label gives another digest: pinning the digest pins the content
    body = msgpack.unpackb(msgpack.unpackb(bases[0])["payload"])
    body["manifest"]["labels"][0] = "billing"
    assert decode_bundle(corpus.seal(body)).sha256 != digest


# --- property-based: mutations of real bundles -------------------------------------------------------------------

MSGPACK_HEADERS = [b"\xc6" + B32, b"\xdb" + B32, b"\xdd" + B32, b"\xdf" + B32, b"\xc5\xff\xff", b"\x91" * 40,
                   b"\xc0", b"\xcf" + b"\xff" * 8, b"\xcb" + struct.pack(">d", math.nan)]


def _mutate_bytes(data: bytes, other: bytes, kind: str, rnd: np.random.Generator) -> bytes:
    n = len(data)
    at = int(rnd.integers(0, n))
    if kind == "flip":
        out = bytearray(data)
        for _ in range(int(rnd.integers(1, 4))):
            out[int(rnd.integers(0, n))] ^= int(rnd.integers(1, 256))
        return bytes(out)
    if kind == "truncate":
        return data[:at]
    if kind == "insert":
        return data[:at] + rnd.bytes(int(rnd.integers(1, 9))) + data[at:]
    if kind == "delete":
        return data[:at] + data[at + int(rnd.integers(1, 17)) :]
    if kind == "splice":
        start = int(rnd.integers(0, len(other)))
        piece = other[start : start + int(rnd.integers(1, 200))]
        return data[:at] + piece + data[at + len(piece) :]
    if kind == "header":
        header = MSGPACK_HEADERS[int(rnd.integers(0, len(MSGPACK_HEADERS)))]
        return data[:at] + header + data[at + len(header) :]
    return data[:at] + data[at : at + int(rnd.integers(1, 64))] + data[at:]  # duplicate a run


def _random_value(rnd: np.random.Generator, depth: int = 0):
    """Any msgpack value: scalars of every type (NaN, Inf, huge ints, non-ASCII text), small lists and maps."""
    kind = int(rnd.integers(0, 11 if depth < 2 else 8))
    makers = [
        lambda: None, lambda: bool(rnd.integers(0, 2)), lambda: int(rnd.integers(-(2**63), 2**63 - 1)),
        lambda: int(rnd.integers(0, 40)), lambda: float(rnd.normal() * 10 ** int(rnd.integers(-3, 40))),
        lambda: [math.nan, math.inf, -0.0][int(rnd.integers(0, 3))],
        lambda: "".join(chr(int(c)) for c in rnd.integers(32, 0x2FF, int(rnd.integers(0, 12)))),
        lambda: rnd.bytes(int(rnd.integers(0, 9))),
        lambda: [_random_value(rnd, depth + 1) for _ in range(int(rnd.integers(0, 4)))],
        lambda: {f"k{i}": _random_value(rnd, depth + 1) for i in range(int(rnd.integers(0, 3)))},
        lambda: [[0], [1, 2]],
    ]
    return makers[kind]()


def _nudge(value, rnd: np.random.Generator):
    """A small, plausible change of the same type (the kind a buggy packer would make)."""
    if isinstance(value, bool):
        return not value
    if isinstance(value, int):
        return value + int(rnd.choice([-1, 1, -value - 1, 2**31]))
    if isinstance(value, float):
        return float(rnd.choice([value * (1 + 1e-7), -value, value + 1, 0.0, math.nan]))
    if isinstance(value, str):
        return rnd.choice(["", value + "x", value.upper(), value[::-1], value[:-1]])
    if isinstance(value, bytes):
        return value[:-1] if rnd.integers(0, 2) else value + b"\x00"
    if isinstance(value, list):
        return [value[:-1], value + value[-1:], value[::-1], []][int(rnd.integers(0, 4))]
    if isinstance(value, dict):
        keys = sorted(value)
        if keys and rnd.integers(0, 2):
            return {k: v for k, v in value.items() if k != keys[int(rnd.integers(0, len(keys)))]}
        return {**value, "extra": 1}
    return value


def _mutate_tree(data: bytes, rnd: np.random.Generator) -> tuple[bytes, tuple | None, str]:
    """A msgpack-level mutation re-encoded with a valid sha256: (bytes, mutated path, kind)."""
    outer = msgpack.unpackb(data)
    body = msgpack.unpackb(outer["payload"])
    op = ["replace", "nudge", "delete", "encoding", "outer"][int(rnd.choice(5, p=[0.35, 0.4, 0.15, 0.05, 0.05]))]
    if op == "encoding":  # the same tree, other msgpack choices: float32 numbers, or bytes written as str
        if rnd.integers(0, 2):
            return encode_bundle(msgpack.packb(body, use_single_float=True)), ("manifest", "probe"), op
        return encode_bundle(msgpack.packb(body, use_bin_type=False)), ("tensors",), op
    if op == "outer":
        key = ["format", "version", "extra"][int(rnd.integers(0, 3))]
        return msgpack.packb({**outer, key: _random_value(rnd)}), (key,), op
    paths = _paths(body)
    path = paths[int(rnd.integers(0, len(paths)))]
    if op == "delete":
        _delete(body, path)
    else:
        _set(body, path, _random_value(rnd) if op == "replace" else _nudge(_get(body, path), rnd))
    return corpus.seal(body), path, op


BYTE_EXAMPLES, TREE_EXAMPLES = 3000, 2500  # 5,500 mutated bundles per run


def test_property_byte_mutations_refused_or_harmless(bases, references, tmp_path):
    seen, runs = Counter(), [0]
    tmp = tmp_path / "m.bundle"

    @settings(max_examples=BYTE_EXAMPLES, deadline=None, database=None,
              suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
    @given(which=st.integers(0, len(bases) - 1), kind=st.sampled_from(
        ["flip", "truncate", "insert", "delete", "splice", "header", "duplicate"]),
        seed=st.integers(0, 2**32 - 1), full=st.integers(0, 39))
    def check(which, kind, seed, full):
        runs[0] += 1
        rnd = np.random.default_rng(seed)
        data = _mutate_bytes(bases[which], bases[(which + 1) % len(bases)], kind, rnd)
        outcome = _outcome(data, references[which], None, tmp=tmp if full == 0 else None)
        if data != bases[which]:
            assert outcome == "refused", (kind, "a damaged file was accepted")
        seen[kind, outcome] += 1

    check()
    print(f"\nbyte mutations run: {runs[0]}; outcomes: {dict(sorted(seen.items()))}", file=sys.stderr)
    assert runs[0] >= BYTE_EXAMPLES


def test_property_tree_mutations_refused_or_harmless(bases, references, tmp_path):
    seen, runs = Counter(), [0]
    tmp = tmp_path / "m.bundle"

    @settings(max_examples=TREE_EXAMPLES, deadline=None, database=None,
              suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
    @given(which=st.integers(0, len(bases) - 1), seed=st.integers(0, 2**32 - 1), full=st.integers(0, 19))
    def check(which, seed, full):
        runs[0] += 1
        data, path, op = _mutate_tree(bases[which], np.random.default_rng(seed))
        seen[op, _outcome(data, references[which], path, tmp=tmp if full == 0 else None)] += 1

    check()
    print(f"\ntree mutations run: {runs[0]}; outcomes: {dict(sorted(seen.items()))}", file=sys.stderr)
    assert runs[0] >= TREE_EXAMPLES


def test_logit_reach_sees_int8_minus_128():
    # np.abs(np.int8(-128)) wraps to -128: the reach must still count it as 128.
    tensors = {"table": np.array([[-128, 1]], np.int8), "scales": np.array([1e29], np.float32),
               "layer.0.bias": np.zeros(2, np.float32)}
    assert rb._logit_reach(tensors, [{"activation": None, "weight": False}]) == pytest.approx(128e29, rel=1e-6)


# --- graph mutations, node by node, with a valid checksum ------------------------------------------------------

GRAPH_EXAMPLES = 600
GRAPH_MUTATIONS = ("op_type", "attribute", "add_attribute", "input", "output", "delete_node", "duplicate_node",
                   "swap_nodes", "insert_identity", "constant_value", "constant_dims", "inline_initializer",
                   "external_to_inline", "io_dims", "same")


def _mutate_graph(data: bytes, rnd: np.random.Generator) -> tuple[bytes, str]:
    """One change to the parsed ONNX graph (an operator, attribute, input, node or initializer), re-sealed."""
    from danpack.runtime.bundle import GRAPH_OPS

    kind = GRAPH_MUTATIONS[int(rnd.integers(0, len(GRAPH_MUTATIONS)))]
    body = corpus.split(data)[1]
    model = onnx.ModelProto()
    model.ParseFromString(body["graph"])
    nodes, inits = model.graph.node, model.graph.initializer
    node = nodes[int(rnd.integers(0, len(nodes)))]
    names = sorted({o for n in nodes for o in n.output} | {t.name for t in inits} | {"ids", "counts"})
    inline = [t for t in inits if t.data_location != onnx.TensorProto.EXTERNAL]
    if kind == "op_type":
        node.op_type = sorted(GRAPH_OPS)[int(rnd.integers(0, len(GRAPH_OPS)))]
    elif kind == "attribute" and node.attribute:
        attr = node.attribute[int(rnd.integers(0, len(node.attribute)))]
        attr.i = int(rnd.choice([attr.i + 1, attr.i - 1, 0, -1, 2**40]))
    elif kind == "add_attribute":
        node.attribute.append(onnx.helper.make_attribute(["axis", "to", "transB", "start"][int(rnd.integers(0, 4))],
                                                         int(rnd.integers(-2, 3))))
    elif kind == "input" and node.input:
        node.input[int(rnd.integers(0, len(node.input)))] = names[int(rnd.integers(0, len(names)))]
    elif kind == "output":
        node.output[0] = names[int(rnd.integers(0, len(names)))]
    elif kind == "delete_node":
        nodes.remove(node)
    elif kind == "duplicate_node":
        nodes.insert(int(rnd.integers(0, len(nodes))), copy.deepcopy(node))
    elif kind == "swap_nodes":
        i, j = (int(x) for x in rnd.integers(0, len(nodes), 2))
        a, b = copy.deepcopy(nodes[i]), copy.deepcopy(nodes[j])
        nodes[i].CopyFrom(b)
        nodes[j].CopyFrom(a)
    elif kind == "insert_identity":
        at = int(rnd.integers(0, len(nodes)))
        out = nodes[at].output[0]
        nodes[at].output[0] = out + "_pre"
        nodes.insert(at + 1, onnx.helper.make_node("Identity", [out + "_pre"], [out], name=out + "_id"))
    elif kind == "constant_value" and inline:
        t = inline[int(rnd.integers(0, len(inline)))]
        value = onnx.numpy_helper.to_array(t).copy()
        value.flat[0] = rnd.choice([0, 2, -1, 10**6]) if value.dtype.kind == "i" else rnd.choice([0.0, 2.0, np.nan, 1e30])
        t.CopyFrom(onnx.numpy_helper.from_array(value, t.name))
    elif kind == "constant_dims":
        t = inits[int(rnd.integers(0, len(inits)))]
        t.dims.append(1)
    elif kind == "inline_initializer":
        inits.append(onnx.numpy_helper.from_array(rnd.normal(size=int(rnd.integers(1, 9))).astype(np.float32),
                                                  f"extra{int(rnd.integers(0, 9))}"))
    elif kind == "external_to_inline":
        external = [t for t in inits if t.data_location == onnx.TensorProto.EXTERNAL]
        t = external[int(rnd.integers(0, len(external)))]
        array = np.frombuffer(body["tensors"][t.name]["data"], "<f4" if t.data_type == 1 else "i1")
        t.CopyFrom(onnx.numpy_helper.from_array(array.reshape(tuple(t.dims)).copy(), t.name))
    elif kind == "io_dims":
        dim = model.graph.output[int(rnd.integers(0, 2))].type.tensor_type.shape.dim[1]
        dim.dim_value += 1
    body["graph"] = model.SerializeToString()  # kind "same" (or an edit that did not apply): onnx's own encoding
    return corpus.seal(body), kind


@pytest.fixture(scope="module")
def thousand_texts() -> list[str]:
    rng = np.random.default_rng(15)
    words = list(corpus.TOKENS) + ["zzz", "Charger!", "<unk>"]
    return [" ".join(words[int(i)] for i in rng.integers(0, len(words), int(rng.integers(0, 12)))) for _ in range(1000)]


def test_property_graph_mutations_refused_or_bit_identical(bases, references, thousand_texts):
    # Every mutant of the graph (valid checksum) is refused by the reader, or computes bit-identical answers on
    # the probe (it loads) and on 1,000 texts on both backends.
    seen, runs = Counter(), [0]
    answers = [{b: Classifier(decode_bundle(data), b).predict_proba(thousand_texts) for b in BACKENDS} for data in bases]

    @settings(max_examples=GRAPH_EXAMPLES, deadline=None, database=None,
              suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
    @given(which=st.integers(0, len(bases) - 1), seed=st.integers(0, 2**32 - 1))
    def check(which, seed):
        runs[0] += 1
        data, kind = _mutate_graph(bases[which], np.random.default_rng(seed))
        try:
            bundle = decode_bundle(data, "mutated")
        except BundleError as e:
            assert str(e).startswith("mutated: graph "), str(e)
            seen[kind, "refused"] += 1
            return
        for backend in BACKENDS:
            assert np.array_equal(Classifier(bundle, backend).predict_proba(thousand_texts), answers[which][backend])
        seen[kind, "same"] += 1

    check()
    print(f"\ngraph mutations run: {runs[0]}; outcomes: {dict(sorted(seen.items()))}", file=sys.stderr)
    assert runs[0] >= GRAPH_EXAMPLES
    assert sum(n for (kind, outcome), n in seen.items() if outcome == "refused") > GRAPH_EXAMPLES // 2
