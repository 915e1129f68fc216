"""Texts -> padded token ids, through the one tokenizer and a vocabulary.

A token outside the vocabulary goes to `oov_id` (an unknown-token row, or the
pruned-rest row of a bundle) or, when `oov_id` is None, is left out of the mean.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from .forward import encode_batch
from .tokenize import Tokenizer


class Encoder:
    """Maps texts to (ids, counts) for `runtime.forward` and the ONNX graph."""

    def __init__(self, tokenizer: Tokenizer, vocab: Sequence[str], oov_id: int | None) -> None:
        self.tokenizer = tokenizer
        self.index = {token: row for row, token in enumerate(vocab)}
        self.oov_id = oov_id

    def map_tokens(self, tokens: list[str]) -> list[int]:
        """Row ids of tokens, in order, after the OOV policy (the one place that applies it)."""
        get, oov = self.index.get, self.oov_id
        if oov is not None:
            return [get(token, oov) for token in tokens]
        return [i for i in map(get, tokens) if i is not None]  # skip: left out of the mean

    def token_ids(self, text: str) -> list[int]:
        """Row ids of one text's tokens, in order, after the OOV policy."""
        return self.map_tokens(self.tokenizer.tokenize(text))

    def encode(self, texts: Sequence[str]) -> tuple[np.ndarray, np.ndarray]:
        """(B,) texts -> (B, T) int64 ids (padding 0) and (B,) int64 counts."""
        return encode_batch([self.token_ids(text) for text in texts])

    def encode_known(self, texts: Sequence[str]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(B,) texts -> (B, T) ids and (B,) counts as `encode`, and (B,) int64 known: how many of each text's
        tokens have a row of their own (not the unknown-word row, not left out). 0 means the model knew
        nothing of the text: its answer is the model's answer to an empty text."""
        index, tokenize, map_tokens = self.index, self.tokenizer.tokenize, self.map_tokens
        id_lists, known = [], np.zeros(len(texts), dtype=np.int64)
        for i, text in enumerate(texts):
            tokens = tokenize(text)
            known[i] = sum(token in index for token in tokens)
            id_lists.append(map_tokens(tokens))
        ids, counts = encode_batch(id_lists)
        return ids, counts, known
