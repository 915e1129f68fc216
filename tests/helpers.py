"""Small, stable builders shared by the tests: random float models and corpora in tmp dirs.

Kept deliberately tiny and documented; other test modules import it, so signatures only grow
(new keyword arguments with defaults), never change. Everything is seeded and deterministic.

- `make_float_model(...)`  -> FloatModel with numpy random weights (nothing written)
- `make_model(tmp_path, ...)` -> Path of a saved float model directory (tokens "w0".."w{V-1}")
- `zipf_texts(...)`        -> short texts over the model's tokens with Zipf-like frequencies
- `make_corpus(tmp_path, ...)` -> Path of a corpus file (plain lines, JSONL, CSV or TSV)
- `random_texts(...)`      -> mixed texts for runtime comparisons (known, unknown, case, punctuation, empty)
"""

from __future__ import annotations

import csv
import json
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from danpack.model import FloatModel, save_model
from danpack.runtime.forward import Layer
from danpack.runtime.tokenize import TokenizerSpec

LABELS = ("negative", "neutral", "positive")  # the EV-charging comment classes used across tests
UNK = "<unk>"  # unknown-token spelling of models built with oov="unk" (no text can produce it)


def token(i: int) -> str:
    """The token of row i in a generated vocabulary ("w0", "w1", ...): survives the default tokenizer."""
    return f"w{i}"


def make_float_model(
    *,
    vocab_size: int = 60,
    dim: int = 16,
    hidden: Sequence[int] = (8,),
    activation: str = "relu",
    oov: str = "skip",
    seed: int = 0,
    labels: Sequence[str] = LABELS,
    vocab: Sequence[str] | None = None,
    unk_token: str = UNK,
    zero_rows: Sequence[int] = (),
    tokenizer: TokenizerSpec | None = None,
) -> FloatModel:
    """A random float DAN. `vocab` overrides the generated tokens; with oov="unk" the unknown
    token is appended as the last row unless `vocab` already holds it. `zero_rows` are set to 0;
    `tokenizer` defaults to TokenizerSpec() (NFKC, lower case, the default pattern)."""
    rng = np.random.default_rng(seed)
    tokens = list(vocab) if vocab is not None else [token(i) for i in range(vocab_size)]
    if oov == "unk" and unk_token not in tokens:
        tokens.append(unk_token)
    embedding = rng.normal(0.0, 1.0, size=(len(tokens), dim)).astype(np.float32)  # (V, D)
    embedding[list(zero_rows)] = 0.0
    layers, width = [], dim
    for size in list(hidden) + [len(labels)]:
        w = (rng.normal(0.0, 1.0, size=(size, width)) / np.sqrt(width)).astype(np.float32)  # (out, in)
        b = rng.normal(0.0, 0.1, size=size).astype(np.float32)  # (out,)
        layers.append(Layer(w, b, activation))
        width = size
    last = layers[-1]
    layers[-1] = Layer(last.weight, last.bias, None)  # the logits layer has no activation
    return FloatModel(
        vocab=tuple(tokens), embedding=embedding, layers=tuple(layers), labels=tuple(labels),
        tokenizer=tokenizer or TokenizerSpec(), oov_policy=oov, unk_token=unk_token if oov == "unk" else None,
        metadata={"builder": "tests.helpers", "seed": seed},
    )


def make_model(tmp_path: Path, name: str = "model", weights_format: str = "npz", **kwargs) -> Path:
    """Save `make_float_model(**kwargs)` as a model directory tmp_path/name and return its path."""
    return save_model(make_float_model(**kwargs), Path(tmp_path) / name, weights_format=weights_format)


def zipf_texts(
    vocab: Sequence[str],
    n_texts: int = 200,
    *,
    seed: int = 0,
    exponent: float = 1.1,
    max_len: int = 12,
    unknown_rate: float = 0.0,
) -> list[str]:
    """Space-joined texts drawing tokens with Zipf-like frequencies over a shuffled `vocab`
    (so frequency rank differs from row order); `unknown_rate` mixes in words no model knows."""
    rng = np.random.default_rng(seed)
    order = rng.permutation(len(vocab))  # rank r -> vocab[order[r]]
    p = 1.0 / np.arange(1, len(vocab) + 1) ** exponent
    p /= p.sum()
    texts = []
    for _ in range(n_texts):
        n = int(rng.integers(1, max_len + 1))
        words = [vocab[order[r]] for r in rng.choice(len(vocab), size=n, p=p)]
        words = [f"zq{rng.integers(1000)}x" if rng.random() < unknown_rate else w for w in words]
        texts.append(" ".join(words))
    return texts


def make_corpus(
    tmp_path: Path,
    texts: Sequence[str] | None = None,
    *,
    name: str | None = None,
    fmt: str = "lines",
    text_field: str = "text",
    **zipf_kwargs,
) -> Path:
    """Write `texts` (or `zipf_texts(**zipf_kwargs)`, which then needs `vocab`) as a corpus file.
    fmt: "lines" (.txt), "jsonl", "csv" or "tsv"; returns the file's path."""
    if texts is None:
        texts = zipf_texts(zipf_kwargs.pop("vocab"), **zipf_kwargs)
    suffix = {"lines": ".txt", "jsonl": ".jsonl", "csv": ".csv", "tsv": ".tsv"}[fmt]
    path = Path(tmp_path) / (name or f"corpus{suffix}")
    if fmt == "lines":
        path.write_text("".join(t + "\n" for t in texts), encoding="utf-8")
    elif fmt == "jsonl":
        path.write_text("".join(json.dumps({text_field: t, "station": "S-07"}) + "\n" for t in texts), encoding="utf-8")
    else:
        with open(path, "w", encoding="utf-8", newline="") as f:
            writer = csv.writer(f, delimiter="," if fmt == "csv" else "\t")
            writer.writerow(["station", text_field])
            writer.writerows([["S-07", t] for t in texts])
    return path


def random_texts(vocab: Sequence[str], n: int = 300, *, seed: int = 0, max_len: int = 10) -> list[str]:
    """Texts for backend comparisons: known tokens (some upper-cased), unknown words, punctuation,
    emoji, and a few texts with no known token at all (including the empty text)."""
    rng = np.random.default_rng(seed)
    extras = ["ZZunknownZZ", "!", "?", "👍", "charger", "kWh", "—", ""]
    texts = ["", "   ", "only unknown words here", "!!!"]
    while len(texts) < n:
        words = []
        for _ in range(int(rng.integers(1, max_len + 1))):
            roll = rng.random()
            if roll < 0.75:
                w = vocab[int(rng.integers(len(vocab)))]
                words.append(w.upper() if rng.random() < 0.1 else w)
            else:
                words.append(extras[int(rng.integers(len(extras)))])
        texts.append(" ".join(words))
    return texts[:n]
