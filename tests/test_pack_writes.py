"""Writing bundles: a killed pack loses nothing, packing is repeatable, every input reaches the checksum,
and one loaded classifier gives the same answers from many threads as from one.

External references: SIGKILL cannot be caught or handled (POSIX signal(7)), so nothing in the packer runs
after it; rename(2) replaces a file atomically within one file system (the basis of write_atomic);
`hashlib.sha256` (stdlib) is the independent digest; serial calls of the same classifier are the oracle for
concurrent ones. Stage lines on stderr ("[k/5] ...") come from packer/progress.py and time the kills.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import os
import random
import signal
import subprocess
import sys
import textwrap
import threading
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pytest

from danpack import runtime
from danpack.runtime import decode_bundle
from danpack.runtime.forward import Layer
from danpack.runtime.tokenize import TokenizerSpec

from danpack.model import FloatModel, save_model
from danpack.pack.build import PackOptions, pack_model

ROOT = Path(__file__).resolve().parents[1]
DANPACK = [sys.executable, "-c", "from danpack.cli import main; main()"]  # the `danpack` console script's entry


def _model(vocab_size: int, dim: int, hidden: int, seed: int, labels=("payment", "connector_cable", "charging_speed")) -> FloatModel:
    """A seeded random DAN over tokens w0..w{V-1} (the tokenizer keeps them whole)."""
    rng = np.random.default_rng(seed)
    vocab = tuple(f"w{i}" for i in range(vocab_size))
    layers = (Layer(rng.normal(size=(hidden, dim)).astype(np.float32), rng.normal(size=hidden).astype(np.float32), "relu"),
              Layer(rng.normal(size=(len(labels), hidden)).astype(np.float32), rng.normal(size=len(labels)).astype(np.float32), None))
    return FloatModel(vocab, rng.normal(size=(vocab_size, dim)).astype(np.float32), layers, tuple(labels))


@pytest.fixture(scope="module")
def models(tmp_path_factory) -> dict[str, Path]:
    """A small model, another small one (the 'old' bundle's source) and a 100k x 64 one that takes seconds to pack."""
    root = tmp_path_factory.mktemp("models")
    out = {}
    for name, spec in {"small": (300, 16, 8, 1), "old": (120, 16, 8, 2), "big": (100_000, 64, 32, 3)}.items():
        out[name] = save_model(_model(*spec), root / name)
    return out


@pytest.fixture(scope="module")
def old_bundle(models, tmp_path_factory) -> bytes:
    return pack_model(models["old"], None).data


def _env(**extra) -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if k != "SOURCE_DATE_EPOCH"}
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT), env.get("PYTHONPATH", "")]).rstrip(os.pathsep)
    env.update(extra)
    return env


def _listing(directory: Path) -> list[str]:
    return sorted(p.name for p in directory.iterdir())


# --- killed part-way ---------------------------------------------------------------------------------------------

def _pack_and_kill(model: Path, dest: Path, cue: str | None) -> tuple[bool, list[str]]:
    """Run `danpack pack` on model -> dest; SIGKILL it as soon as stderr shows `cue` (None: let it finish)."""
    proc = subprocess.Popen([*DANPACK, "pack", str(model), "-o", str(dest)], cwd=dest.parent, env=_env(),
                            stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    lines, killed = [], False
    for line in proc.stderr:
        lines.append(line.rstrip())
        if cue is not None and line.startswith(cue):
            proc.send_signal(signal.SIGKILL)
            killed = True
            break
    proc.stderr.close()
    code = proc.wait(timeout=300)
    # after the last cue the process may just have exited on its own (code 0) before the signal arrived
    assert code == (-signal.SIGKILL if killed else 0) or (cue == "[4/5]" and code == 0), (cue, code, lines)
    return code == -signal.SIGKILL, lines


def test_sigkill_at_each_pack_stage_keeps_the_old_bundle(models, old_bundle, tmp_path):
    """Kill `danpack pack` (100k-row model) after each of its stages; an unkilled run is the positive control."""
    cues = ["[1/5]", "[2/5]", "[3/5]", "[4/5]", None]
    dests = []
    for i, _ in enumerate(cues):
        (tmp_path / f"run{i}").mkdir()
        dests.append(tmp_path / f"run{i}" / "comments.bundle")
        dests[-1].write_bytes(old_bundle)
    with ThreadPoolExecutor(len(cues)) as pool:  # the runs overlap: five packs take the time of about two
        results = list(pool.map(lambda a: _pack_and_kill(models["big"], *a), zip(dests, cues)))
    new = dests[-1].read_bytes()  # the run that was not killed
    assert new != old_bundle and decode_bundle(new).tokenizer == decode_bundle(old_bundle).tokenizer
    assert len(decode_bundle(new).vocab) == 100_000
    leftovers = 0
    for dest, cue, (killed, _lines) in zip(dests[:-1], cues, results):
        assert killed or cue == "[4/5]", cue
        data = dest.read_bytes()
        # the destination is never partial: the old bundle byte for byte, or (a kill after the rename) the new one
        assert data == old_bundle or (cue == "[4/5]" and data == new), cue
        runtime.load(dest, "numpy")
        others = [n for n in _listing(dest.parent) if n != dest.name]
        assert all(n.startswith(f".{dest.name}.") and n.endswith(".partial") for n in others), others
        leftovers += len(others)
    print(f"\nkills at stages {cues[:-1]}: destination intact every time; hidden .partial leftovers: {leftovers}",
          file=sys.stderr)


KILL_POINT = textwrap.dedent("""
    import os, sys, time
    from danpack.pack.build import pack_model
    model, dest, point = sys.argv[1], sys.argv[2], sys.argv[3]
    real_fdopen, real_replace = os.fdopen, os.replace

    def pause():
        print("READY", flush=True)
        time.sleep(600)  # the test kills us here

    class HalfWriter:
        # the temp file receives half of the bundle, reaches the disk, then the process is killed
        def __init__(self, f):
            self.f = f
        def __enter__(self):
            return self
        def __exit__(self, *exc):
            return self.f.__exit__(*exc)
        def write(self, data):
            self.f.write(data[: len(data) // 2])
            self.f.flush()
            os.fsync(self.f.fileno())
            pause()
        def __getattr__(self, name):
            return getattr(self.f, name)

    def fdopen(fd, *a, **k):
        f = real_fdopen(fd, *a, **k)
        return HalfWriter(f) if point == "mid-write" else f

    def replace(src, dst):
        if point == "before-rename" and os.fspath(dst) == dest:
            pause()
        return real_replace(src, dst)

    os.fdopen, os.replace = fdopen, replace
    pack_model(model, dest)
    print("DONE", flush=True)
""")


@pytest.mark.parametrize("point,has_old", [("mid-write", True), ("before-rename", True), ("mid-write", False)])
def test_sigkill_inside_the_write_keeps_the_old_bundle(models, old_bundle, tmp_path, point, has_old):
    """Kill exactly while the temp file is half written, or after it is complete but before the rename."""
    dest = tmp_path / "comments.bundle"
    if has_old:
        dest.write_bytes(old_bundle)
    proc = subprocess.Popen([sys.executable, "-c", KILL_POINT, str(models["small"]), str(dest), point], cwd=tmp_path,
                            env=_env(), stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    first = proc.stdout.readline().strip()
    assert first == "READY", (first, proc.stderr.read() if proc.poll() is not None else "")
    partial = [n for n in _listing(tmp_path) if n.endswith(".partial")]
    assert len(partial) == 1  # the write really was in progress when killed
    proc.send_signal(signal.SIGKILL)
    assert proc.wait(timeout=60) == -signal.SIGKILL
    proc.stdout.close()
    proc.stderr.close()
    if has_old:
        assert dest.read_bytes() == old_bundle
        runtime.load(dest, "onnxruntime")
    else:
        assert not dest.exists()
    # the next pack succeeds and replaces the destination with a complete bundle
    result = pack_model(models["small"], dest)
    assert dest.read_bytes() == result.data
    runtime.load(dest, "numpy")


# --- repeatable ----------------------------------------------------------------------------------------------------

def test_packing_twice_gives_identical_bytes(models, tmp_path):
    comments = tmp_path / "stream.jsonl"
    rng = random.Random(5)
    comments.write_text("".join(json.dumps({"text": " ".join(f"w{rng.randrange(400)}" for _ in range(6))}) + "\n"
                                for _ in range(300)), encoding="utf-8")
    options = PackOptions(corpora=(str(comments),), coverage=0.9)
    first = pack_model(models["small"], tmp_path / "a.bundle", options).data
    second = pack_model(models["small"], tmp_path / "b.bundle", options).data
    assert first == second == (tmp_path / "a.bundle").read_bytes() == (tmp_path / "b.bundle").read_bytes()
    # two separate processes with different string-hash seeds (set and dict-of-str order) give the same bytes
    runs = {seed: subprocess.Popen([*DANPACK, "pack", str(models["small"]), "-o", str(tmp_path / f"cli{seed}.bundle"),
                                    "-c", str(comments), "--coverage", "0.9", "-q"], cwd=tmp_path,
                                   env=_env(PYTHONHASHSEED=seed), stdout=subprocess.PIPE, stderr=subprocess.PIPE)
            for seed in ("1", "2")}
    for proc in runs.values():
        _, err = proc.communicate(timeout=300)
        assert proc.returncode == 0, err
    outs = [(tmp_path / f"cli{seed}.bundle").read_bytes() for seed in runs]
    assert outs[0] == outs[1]
    assert decode_bundle(outs[0]).tensors["table"].tobytes() == decode_bundle(first).tensors["table"].tobytes()


def _digest(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def test_changing_any_input_changes_the_checksum(models, tmp_path, monkeypatch):
    base = _model(300, 16, 8, 1)
    comments = tmp_path / "stream.txt"
    comments.write_text("w1 w2 w3\nw4 w5 w1\nw7 w1 w2\n", encoding="utf-8")
    options = PackOptions(corpora=(str(comments),), coverage=0.99)

    def pack(model: FloatModel, opts: PackOptions = options, weights: str = "npz", corpus_text: str | None = None) -> bytes:
        folder = tmp_path / f"m{len(list(tmp_path.iterdir()))}"
        save_model(model, folder, weights)
        if corpus_text is not None:
            path = folder / "stream.txt"
            path.write_text(corpus_text, encoding="utf-8")
            opts = dataclasses.replace(opts, corpora=(str(path),))
        return pack_model(folder, None, opts).data

    def bumped(array: np.ndarray, index: tuple) -> np.ndarray:
        out = array.copy()
        out[index] += 0.5
        return out

    reference = pack(base)
    layer0, layer1 = base.layers
    variants = {
        "same inputs again": pack(base),
        "a label renamed": pack(dataclasses.replace(base, labels=("billing", *base.labels[1:]))),
        "tokenizer case": pack(dataclasses.replace(base, tokenizer=TokenizerSpec(case="casefold"))),
        "tokenizer max_tokens": pack(dataclasses.replace(base, tokenizer=TokenizerSpec(max_tokens=64))),
        "a kept token renamed": pack(dataclasses.replace(base, vocab=("w0", "charger", *base.vocab[2:]))),
        "one embedding value (kept row)": pack(dataclasses.replace(base, embedding=bumped(base.embedding, (1, 3)))),
        "one hidden weight": pack(dataclasses.replace(base, layers=(Layer(bumped(layer0.weight, (2, 5)), layer0.bias, "relu"), layer1))),
        "one output bias": pack(dataclasses.replace(base, layers=(layer0, Layer(layer1.weight, bumped(layer1.bias, (0,)), None)))),
        "metadata": pack(dataclasses.replace(base, metadata={"trainer": "numpy", "seed": 9})),
        "weights as safetensors": pack(base, weights="safetensors"),
        "corpus with more texts": pack(base, corpus_text="w1 w2 w3\nw4 w5 w1\nw7 w1 w2\nw9 w9 w9 w8\n"),
        "coverage": pack(base, dataclasses.replace(options, coverage=0.5)),
        "top": pack(base, dataclasses.replace(options, coverage=None, top=3)),
        "keep-words": pack(base, dataclasses.replace(options, keep_words=("w250",))),
        "pruned policy": pack(base, dataclasses.replace(options, pruned="rest")),
        "fold": pack(base, dataclasses.replace(options, fold="no")),
        "no quantisation": pack(base, dataclasses.replace(options, quantize=False)),
    }
    monkeypatch.setenv("SOURCE_DATE_EPOCH", "1700000000")
    variants["SOURCE_DATE_EPOCH"] = pack(base)
    assert variants.pop("same inputs again") == reference
    digests = {name: _digest(data) for name, data in variants.items()}
    assert _digest(reference) not in digests.values()
    assert len(set(digests.values())) == len(digests), digests
    # changed numbers reach the packed tensors, not only the recorded source digest
    ref_tensors = decode_bundle(reference).tensors
    for name in ("one embedding value (kept row)", "one hidden weight", "one output bias"):
        changed = decode_bundle(variants[name]).tensors
        assert any(not np.array_equal(changed[k], ref_tensors[k]) for k in ref_tensors), name
    # Bundle.sha256 is the payload's digest: it differs exactly when the file does
    assert len({decode_bundle(d).sha256 for d in variants.values()} | {decode_bundle(reference).sha256}) == len(variants) + 1


# --- concurrent predictions ---------------------------------------------------------------------------------------

@pytest.mark.parametrize("backend,threads", [("onnxruntime", 1), ("onnxruntime", 2), ("numpy", 1)])
def test_concurrent_predict_matches_serial(models, tmp_path, backend, threads):
    path = pack_model(models["small"], tmp_path / "b.bundle").path
    clf = runtime.load(path, backend, threads=threads)
    rng = random.Random(11)
    batches = [[" ".join(f"w{rng.randrange(320)}" for _ in range(rng.randrange(0, 30))) for _ in range(rng.randrange(1, 40))]
               for _ in range(60)]
    serial = [(clf.predict(b), clf.predict_proba(b)) for b in batches]
    start = threading.Barrier(8)

    def worker(seed: int) -> list[tuple[int, list[str], np.ndarray]]:
        order = list(range(len(batches)))
        random.Random(seed).shuffle(order)
        start.wait()
        return [(i, clf.predict(batches[i]), clf.predict_proba(batches[i])) for i in order for _ in range(2)]

    with ThreadPoolExecutor(8) as pool:
        results = [r for part in pool.map(worker, range(8)) for r in part]
    assert len(results) == 8 * 2 * len(batches)
    for i, labels, probs in results:
        assert labels == serial[i][0]
        assert np.array_equal(probs, serial[i][1])
