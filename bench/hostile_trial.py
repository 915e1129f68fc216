"""`python -m bench.hostile_trial`: re-run the hostile-input trial's bundle attacks with and without the reader's
new protections (issue 15), and print each outcome. "Without" switches the protection off in this process
(the graph comparison, the probe texts), so the same crafted bytes show what they did before.

Texts are random sequences of the model's tokens (the invented EV-charger scenario's words are not needed for a
crafted graph); figures are counts, not timings, except the 64 one-MiB lines run (one run, wall time and the
child's peak RSS from getrusage).
"""

from __future__ import annotations

import contextlib
import copy
import importlib.util
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import msgpack
import numpy as np

from danpack import runtime
from danpack.model import FloatModel, save_model
from danpack.pack.build import PackOptions, pack_model
from danpack.pack.bundle import encode_bundle
from danpack.runtime import bundle as reader
from danpack.runtime import classifier as clf_module
from danpack.runtime.errors import BundleError
from danpack.runtime.forward import Layer
from danpack.runtime.tokenize import TokenizerSpec

WORDS = [f"w{i}" for i in range(600)]
LABELS = ("payment", "connector_cable", "charging_speed")
REPO = Path(__file__).resolve().parents[1]
SPY_ROW = 400  # a row no id probe sequence reaches (they cover rows 0-28)


def build(root: Path, max_tokens: int = 512) -> bytes:
    rng = np.random.default_rng(3)
    layers = (Layer(rng.normal(size=(8, 16)).astype(np.float32) / 4, rng.normal(size=8).astype(np.float32) / 10, "relu"),
              Layer(rng.normal(size=(3, 8)).astype(np.float32) / 3, rng.normal(size=3).astype(np.float32) / 10, None))
    model = FloatModel(tuple(WORDS), rng.normal(size=(600, 16)).astype(np.float32), layers, LABELS,
                       tokenizer=TokenizerSpec(max_tokens=max_tokens))
    save_model(model, root / f"model{max_tokens}")
    return pack_model(root / f"model{max_tokens}", root / f"m{max_tokens}.dpk", PackOptions(fold="no")).data


def texts(n: int = 2000) -> list[str]:
    rng = np.random.default_rng(9)
    return [" ".join(WORDS[i] for i in rng.integers(0, 600, int(rng.integers(1, 15)))) for _ in range(n)]


def load_corpus_maker():
    """tests/adversarial/make_corpus.py, the one place the graph attacks are crafted (the trial runs the same ones
    with the reader's checks off and on)."""
    spec = importlib.util.spec_from_file_location("make_corpus", REPO / "tests" / "adversarial" / "make_corpus.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@contextlib.contextmanager
def protections_off():
    """The reader as it was: no graph comparison, no probe texts."""
    saved = reader._check_graph_is_written, clf_module.Classifier._check_probe
    reader._check_graph_is_written = lambda *a: None

    def ids_only(self):
        probe = copy.deepcopy(self.bundle.manifest["probe"])
        self._check_probe_part(clf_module.encode_batch(probe["ids"]), probe["probs"], "probe")

    clf_module.Classifier._check_probe = ids_only
    try:
        yield
    finally:
        reader._check_graph_is_written, clf_module.Classifier._check_probe = saved


def outcome(path: Path, measure) -> str:
    try:
        ort, npy = runtime.load(path), runtime.load(path, "numpy")
    except BundleError as e:
        return f"refused: {str(e).replace(str(path), '{bundle}')[:160]}"
    return "loads; " + measure(ort, npy)


def main() -> None:
    corpus = load_corpus_maker()
    sample = texts()
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        base = build(root)
        attacks = {
            "back door (+40 on one logit for texts holding w400)": corpus.with_graph(
                base, lambda model: corpus._back_door(model, row=SPY_ROW, push=40.0 * 15)),
            "logits reversed when fewer than 8 texts in a batch": corpus.with_graph(base, corpus._swap_small_batches),
        }
        body = msgpack.unpackb(msgpack.unpackb(base)["payload"])
        import zlib

        tokens = zlib.decompress(body["vocab"]).decode().split("\n")
        tokens[0], tokens[1] = tokens[1], tokens[0]
        from danpack.pack.bundle import encode_vocab

        body["vocab"] = encode_vocab(tokens)
        attacks["vocabulary with its two most frequent words swapped"] = encode_bundle(msgpack.packb(body, use_bin_type=True))

        original = np.array(runtime.load(root / "m512.dpk").predict(sample))

        def changed(ort, npy) -> str:
            batch = np.array(ort.predict(sample))
            single = np.array([ort.predict([t])[0] for t in sample[:200]])
            reference = np.array(npy.predict(sample))
            certified = ort.predict_certified(sample)[2]
            moved = batch != reference
            return (f"{int(moved.sum())} of {len(sample)} batched labels differ from the numpy backend "
                    f"({int((moved & certified).sum())} of them certified); {int((single != reference[:200]).sum())} "
                    f"of 200 single-text labels differ; {int((batch != original).sum())} batched labels differ "
                    "from the original bundle")

        for name, data in attacks.items():
            path = root / "attack.dpk"
            path.write_bytes(data)
            with protections_off():
                before = outcome(path, changed)
            after = outcome(path, changed)
            print(f"{name}\n  without the new checks: {before}\n  with them:              {after}")

        # 64 lines of 1 MiB through danpack-run, at the largest max_tokens a bundle may now ask for
        build(root, max_tokens=1024)
        line = (" ".join(WORDS[i % 600] for i in range(200_000)))[: 1 << 20]
        (root / "big.txt").write_text((line + "\n") * 64, encoding="utf-8")
        start = time.perf_counter()
        proc = subprocess.run([sys.executable, "-m", "danpack.runtime.stream", str(root / "m1024.dpk"),
                               str(root / "big.txt"), "--max-line-bytes", str(2 << 20)], capture_output=True)
        wall = time.perf_counter() - start
        peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
        records = proc.stdout.count(b"\n")
        print(f"64 one-MiB lines, max_tokens 1024 (the cap): exit {proc.returncode}, {records} records, {wall:.2f} s, "
              f"peak RSS of the child {peak:.0f} MiB (input 64 MiB)")


if __name__ == "__main__":
    main()
