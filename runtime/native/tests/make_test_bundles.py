"""Write the bundles the native runtime's tests use into a folder: small seeded models covering every manifest
variant (folded or not, int8 or float32, relu or tanh, unknown-word policies skip / unk / rest, every tokenizer
preset and normal form) and the two shipped demo models. Used by `make -C runtime/native test` (the C tests
mutate them) and by tests/test_native.py (answers compared with the Python runtime).

    python runtime/native/tests/make_test_bundles.py OUTDIR
"""

from __future__ import annotations

import sys
import tempfile
from dataclasses import replace
from pathlib import Path

import numpy as np

from danpack.model import FloatModel, Layer, save_model
from danpack.pack.build import PackOptions, pack_model
from danpack.runtime.tokenize import PRESETS, TokenizerSpec

REPO = Path(__file__).resolve().parents[3]
# the demo scenario's words (comments on public EV chargers), with accents and an apostrophe for the normal forms
TOKENS = ("charger", "slow", "fast", "card", "payment", "app", "cable", "broken", "screen", "queue", "kw", "refund",
          "plug", "stuck", "great", "never", "worked", "price", "receipt", "connector", "wait", "full", "bay", "café",
          "don't", "ß", "ss", "!", "?", "type-2", "<unk>")
LABELS = ("payment", "connector_cable", "charging_speed")
CORPUS = "the charger was slow\ncard payment failed, refund please\ncable stuck in the plug\ngreat fast charger\n"


def seeded_model(seed: int, activation: str = "relu", oov: str = "skip", tokenizer: TokenizerSpec | None = None,
                 dim: int = 8, hidden: int = 6) -> FloatModel:
    """A seeded float DAN over TOKENS: one hidden layer, three labels."""
    rng = np.random.default_rng(seed)
    first = Layer(rng.normal(size=(hidden, dim)).astype(np.float32), rng.normal(size=hidden).astype(np.float32), activation)
    second = Layer(rng.normal(size=(hidden, hidden)).astype(np.float32), rng.normal(size=hidden).astype(np.float32), activation)
    out = Layer(rng.normal(size=(len(LABELS), hidden)).astype(np.float32), rng.normal(size=len(LABELS)).astype(np.float32), None)
    return FloatModel(TOKENS, rng.normal(size=(len(TOKENS), dim)).astype(np.float32), (first, second, out), LABELS,
                      tokenizer=tokenizer or TokenizerSpec(), oov_policy=oov, unk_token="<unk>" if oov == "unk" else None)


def variants() -> dict[str, tuple[FloatModel, PackOptions]]:
    """name -> (model, pack options)."""
    out = {
        "base": (seeded_model(7), PackOptions()),
        "nofold_float": (seeded_model(8), PackOptions(fold="no", quantize=False)),
        "tanh_unk": (seeded_model(9, "tanh", "unk"), PackOptions(fold="no")),
        "rest": (seeded_model(10), PackOptions(pruned="rest", top=12)),
        "casefold_nfc": (seeded_model(11, tokenizer=TokenizerSpec("NFC", "casefold")), PackOptions()),
        "keep_none_16": (seeded_model(12, tokenizer=TokenizerSpec("none", "keep", max_tokens=16)), PackOptions()),
        "nfd_lower": (seeded_model(13, tokenizer=TokenizerSpec("NFD", "lower")), PackOptions()),
        "nfkd_keep": (seeded_model(14, tokenizer=TokenizerSpec("NFKD", "keep")), PackOptions()),
    }
    for i, preset in enumerate(sorted(PRESETS)):
        out[f"preset_{preset}"] = (seeded_model(20 + i, tokenizer=TokenizerSpec(pattern=preset)), PackOptions())
    return out


def write_bundles(outdir: str | Path) -> list[Path]:
    """Every test bundle into `outdir`; returns their paths."""
    outdir = Path(outdir)
    outdir.mkdir(parents=True, exist_ok=True)
    paths = []
    with tempfile.TemporaryDirectory() as tmp:
        corpus = Path(tmp) / "corpus.txt"
        corpus.write_text(CORPUS, encoding="utf-8")
        for name, (model, options) in variants().items():
            save_model(model, Path(tmp) / name)
            if options.top is not None:
                options = replace(options, corpora=(str(corpus),))
            path = outdir / f"{name}.bundle"
            pack_model(Path(tmp) / name, path, options)
            paths.append(path)
    for name in ("sentiment", "topic"):
        path = outdir / f"demo_{name}.bundle"
        pack_model(REPO / "models_demo" / "shipped" / name, path, PackOptions())
        paths.append(path)
    return paths


if __name__ == "__main__":
    if len(sys.argv) != 2:
        sys.exit(__doc__)
    for p in write_bundles(sys.argv[1]):
        print(p)
