"""`python -m bench.hostile_vocab_probe`: what would it cost for the load-time probe to cover the whole
token -> row path (so that a swap of ANY two vocabulary words is refused), on the shipped demo sentiment model
(about 1,270 rows) and a synthetic 400,000-row model? Writes bench/HOSTILE-VOCAB.md.

Today the packer writes one probe text per bit of a 32-token sample (packer/pack/build.py, `probe_texts`), so a
swap is caught only when one of the two words is sampled. Three figures per model:
- **load**: `runtime.load` as it is (median of 3, numpy and onnxruntime backends);
- **whole path at load**: tokenizing every vocabulary token through the bundle's tokenizer and vocabulary
  (each must map to its own row) and running every row through the backend as a one-token text: the work a
  reader would add to see every token's answer (median of 3);
- **where the answers would go**: format version 1 has no field for them. The probe texts are the only field that
  passes through the vocabulary; a text's answer is the mean over its tokens, so a swap inside one text is
  invisible, and two tokens are told apart only when some text holds exactly one of them (distinct membership
  codes over the 32 texts). Each text keeps at most max_tokens tokens, so the texts can hold at most
  32 x max_tokens token occurrences: the table gives the most tokens distinct codes can cover in that budget and
  the bytes those texts would add to the manifest, against the bundle's size.
The synthetic model's vocabulary is `a`..`z`, `aa`.. (distinct lowercase tokens), as in bench case 3.
"""

from __future__ import annotations

import itertools
import math
import statistics
import string
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

from danpack import runtime
from danpack.model import FloatModel, load_model, save_model
from danpack.pack.build import PROBE_TEXTS, PackOptions, pack_model
from danpack.runtime.forward import Layer

REPO = Path(__file__).resolve().parents[1]
TEXTS = 32  # probe texts a bundle may carry (README, bundle specification rule 6)
ROUNDS = 3
SWAPS = 500  # random pairs of rows swapped
OUT = REPO / "bench" / "HOSTILE-VOCAB.md"


def synthetic(rows: int, dim: int = 16, hidden: int = 8) -> FloatModel:
    """A random float DAN over `rows` distinct lowercase tokens (a, b, ..., z, aa, ab, ...)."""
    rng = np.random.default_rng(5)
    tokens = list(itertools.islice((("".join(p)) for n in itertools.count(1)
                                    for p in itertools.product(string.ascii_lowercase, repeat=n)), rows))
    layers = (Layer(rng.normal(size=(hidden, dim)).astype(np.float32) / 4, np.zeros(hidden, np.float32), "relu"),
              Layer(rng.normal(size=(2, hidden)).astype(np.float32), np.zeros(2, np.float32), None))
    return FloatModel(tuple(tokens), rng.normal(size=(rows, dim)).astype(np.float32), layers, ("negative", "positive"))


def median_seconds(call) -> float:
    times = []
    for _ in range(ROUNDS):
        start = time.perf_counter()
        call()
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def whole_path(clf) -> None:
    """Every vocabulary token through tokenizer and vocabulary (each must give its own row), then every row
    through the backend as a one-token text."""
    vocab = clf.bundle.vocab
    ids, counts = clf.encoder.encode(vocab)  # (V, 1), (V,)
    if ids.shape[1] != 1 or not np.array_equal(ids[:, 0], np.arange(len(vocab))):
        raise SystemExit("a vocabulary token does not map to its own row")
    for start in range(0, len(vocab), 8192):
        clf.backend.run(ids[start:start + 8192], counts[start:start + 8192])


def codes_budget(occurrences: int) -> int:
    """Most tokens with distinct membership codes over TEXTS texts whose codes' weights sum to `occurrences`
    (the empty code first, then weight 1, 2, ...)."""
    tokens, left = 1, occurrences
    for weight in range(1, TEXTS + 1):
        n = min(math.comb(TEXTS, weight), left // weight)
        tokens += n
        left -= n * weight
        if n < math.comb(TEXTS, weight):
            break
    return tokens


def coded_texts(rows: int, max_tokens: int) -> list[list[int]] | None:
    """Ids of TEXTS texts giving every row a distinct membership code (lightest codes first), or None when the
    texts would need more than max_tokens tokens."""
    codes = itertools.islice(itertools.chain.from_iterable(
        itertools.combinations(range(TEXTS), w) for w in range(TEXTS + 1)), rows)
    texts: list[list[int]] = [[] for _ in range(TEXTS)]
    for row, code in enumerate(codes):
        for b in code:
            texts[b].append(row)
    return texts if max(map(len, texts)) <= max_tokens else None


def swaps_caught(clf, texts: list[list[int]], pairs: np.ndarray) -> float:
    """Share of the word swaps `pairs` (rows i and j exchanged in the vocabulary) that move some probe text's
    probabilities by more than the load-time tolerance (1e-4)."""
    from danpack.runtime.classifier import PROBE_TOLERANCE
    from danpack.runtime.forward import encode_batch

    base = clf.backend.run(*encode_batch(texts))[0]  # (S, C)
    caught = 0
    for i, j in pairs:
        swap = {int(i): int(j), int(j): int(i)}
        moved = [[swap.get(r, r) for r in text] for text in texts]
        probs = clf.backend.run(*encode_batch(moved))[0]  # (S, C)
        caught += float(np.abs(probs - base).max()) > PROBE_TOLERANCE
    return caught / len(pairs)


def measure(name: str, folder: Path, work: Path) -> list[str]:
    model = load_model(folder)
    result = pack_model(folder, work / f"{name}.dpk", PackOptions())
    path = result.path
    size = path.stat().st_size
    row = [name, f"{len(model.vocab):,}", f"{size:,}"]
    for backend in ("numpy", "onnxruntime"):
        load = median_seconds(lambda: runtime.load(path, backend))
        clf = runtime.load(path, backend)
        extra = median_seconds(lambda: whole_path(clf))
        row += [f"{load * 1000:,.1f}", f"{extra * 1000:,.1f}"]
    max_tokens = model.tokenizer.max_tokens
    covered = min(codes_budget(TEXTS * max_tokens), len(model.vocab))
    # bytes of texts holding `covered` tokens with the cheapest codes (weights 1, 2, ...), at the mean token length
    mean_len = statistics.fmean(len(t) for t in model.vocab) + 1
    occurrences, left = 0, covered - 1
    for weight in range(1, TEXTS + 1):
        n = min(math.comb(TEXTS, weight), left)
        occurrences += n * weight
        left -= n
    current = sum(len(t) + 1 for t in runtime.load(path, "numpy").bundle.manifest["probe"]["texts"])
    row += [f"{max_tokens}", f"{covered:,} ({covered / len(model.vocab):.1%})", f"{current:,}",
            f"{occurrences * mean_len:,.0f}", f"{len(model.vocab) * len(model.labels) * 4:,}"]
    clf = runtime.load(path, "numpy")
    rows = len(clf.bundle.vocab)
    pairs = np.random.default_rng(11).choice(rows, size=(SWAPS, 2), replace=True)
    pairs = pairs[pairs[:, 0] != pairs[:, 1]]
    today = [list(map(int, t[:c])) for t, c in zip(*clf.encoder.encode(clf.bundle.manifest["probe"]["texts"]))]
    coded = coded_texts(rows, max_tokens)
    row += [f"{swaps_caught(clf, today, pairs):.1%}",
            "cannot (too many tokens)" if coded is None else f"{swaps_caught(clf, coded, pairs):.1%}"]
    if coded is None:
        row.append("-")
    else:  # what the reader would add: the coded texts through tokenizer, vocabulary and backend
        strings = [" ".join(clf.bundle.vocab[r] for r in text) for text in coded]
        row.append(f"{median_seconds(lambda: clf.backend.run(*clf.encoder.encode(strings))) * 1000:.1f}")
    return row


def main() -> None:
    header = ["model", "rows", "bundle bytes", "load numpy ms", "+ whole path numpy ms", "load ort ms",
              "+ whole path ort ms", "max_tokens", "tokens distinct probe-text codes can cover", "probe text bytes now",
              "probe text bytes to cover them", "answers of every row (float32 bytes)",
              f"random swaps caught, today's probe", "random swaps caught, texts coding every row",
              "+ load ms for those texts (numpy)"]
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        rows.append(measure("demo sentiment (shipped)", REPO / "models_demo" / "shipped" / "sentiment", work))
        print(f"done: {rows[-1]}", file=sys.stderr)
        rows.append(measure("synthetic 400,000 x 16", save_model(synthetic(400_000), work / "synthetic"), work))
    lines = ["# Hostile inputs: a probe over the whole vocabulary? (issue 15)", "",
             "Written by `python -m bench.hostile_vocab_probe`; what each column means is in the module's docstring.",
             "", "| " + " | ".join(header) + " |", "|" + "---|" * len(header)]
    lines += ["| " + " | ".join(row) + " |" for row in rows]
    lines += ["", f"Probe ids: {PROBE_TEXTS} sequences (unchanged). Times are medians of {ROUNDS} on a shared 2-core "
              f"machine (they move by 2x between runs); {SWAPS} random row pairs less those of one row twice. "
              "Decision: not done. Every token must appear in some probe text, stored uncompressed in the manifest "
              "(at least the vocabulary's own length again, about 2.5 times that with distinct codes), a 400,000-row "
              "vocabulary cannot fit in 32 texts of at most max_tokens tokens, and anyone who knows the format "
              "recomputes any probe: pinning the bundle's sha256 is the defence (README).", ""]
    OUT.write_text("\n".join(lines), encoding="utf-8")
    print("\n".join(lines))

if __name__ == "__main__":
    main()
