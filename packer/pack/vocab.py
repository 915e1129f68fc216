"""Choosing the deployment vocabulary: which rows of the float table the bundle keeps.

Rows are ranked by how often the model's own tokenizer produces their token in the
deployment corpora; the most frequent are kept until a token-coverage target, a row
count, or (with the packer's help) a byte budget is reached. Rows the tokenizer can
never produce are dropped and reported; keep-words are always kept when known.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Container, Iterable, Sequence
from dataclasses import dataclass, replace

import numpy as np

from danpack.runtime.tokenize import Tokenizer


@dataclass(frozen=True)
class VocabOptions:
    """How many rows to keep."""

    coverage: float = 0.995  # keep frequent rows until this share of known corpus tokens is covered
    top: int | None = None  # or keep exactly the N most frequent rows (overrides coverage)
    keep_words: tuple[str, ...] = ()  # tokens always kept when the model knows them
    effect: np.ndarray | None = None  # (V,) per-row effect weight: rank by count × effect (None: by count alone)


@dataclass(frozen=True)
class VocabPlan:
    """The outcome of selection, with what the summary reports."""

    ranked_rows: np.ndarray  # (R,) int64: reachable float rows, most frequent first (ties: row order)
    row_counts: np.ndarray  # (R,) int64: corpus count of each ranked row
    forced: int  # how many leading ranked rows are forced (keep-words, unknown-token row)
    keep: int  # how many leading ranked rows are kept
    corpus_texts: int
    corpus_tokens: int  # all tokens the tokenizer produced
    known_tokens: int  # of those, tokens the float model has a row for
    unreachable: int  # float rows the tokenizer can never produce
    unreachable_examples: tuple[str, ...]
    unknown_keep_words: tuple[str, ...]  # keep-words the float model does not know or no text can produce
    has_corpus: bool
    absent: tuple[tuple[str, int], ...] = ()  # corpus tokens the float model does not know, with counts, most frequent first

    @property
    def kept_rows(self) -> np.ndarray:
        return self.ranked_rows[: self.keep]

    @property
    def coverage(self) -> float:
        """Share of known corpus tokens whose row is kept (1.0 without a corpus)."""
        if not self.has_corpus or self.known_tokens == 0:
            return 1.0
        return float(self.row_counts[: self.keep].sum()) / self.known_tokens

    def with_keep(self, keep: int) -> "VocabPlan":
        """The same ranking with a different cut (never below the forced rows)."""
        return replace(self, keep=max(self.forced, min(keep, len(self.ranked_rows))))


def find_unreachable(tokenizer: Tokenizer, vocab: Sequence[str]) -> np.ndarray:
    """(V,) bool: True where the tokenizer can never produce the row's token."""
    return np.fromiter((not tokenizer.is_reachable(t) for t in vocab), dtype=bool, count=len(vocab))


def count_tokens(tokenizer: Tokenizer, texts: Iterable[str]) -> tuple[Counter, int]:
    """Token frequencies over texts, and the number of texts."""
    counts: Counter = Counter()
    n = 0
    for text in texts:
        counts.update(tokenizer.tokenize(text))
        n += 1
    return counts, n


def absent_tokens(counter: Counter, known: Container[str]) -> tuple[tuple[str, int], ...]:
    """The counted tokens the float model does not know, with their counts, most frequent first (then by token)."""
    return tuple(sorted(((t, c) for t, c in counter.items() if t not in known), key=lambda x: (-x[1], x[0])))


def count_absent(plan: VocabPlan, vocab: Sequence[str], tokenizer: Tokenizer, texts: Iterable[str]) -> VocabPlan:
    """The plan whose list of tokens the float model does not know also counts `texts` (the held-out slice, once
    it has measured the candidates: the bundle may list its tokens too)."""
    counter, _ = count_tokens(tokenizer, texts)
    counter.update(dict(plan.absent))
    return replace(plan, absent=absent_tokens(counter, set(vocab)))


def plan_vocab(
    vocab: Sequence[str],
    tokenizer: Tokenizer,
    corpus: Iterable[str] | None,
    options: VocabOptions,
    always_rows: Sequence[int] = (),
) -> VocabPlan:
    """Rank the reachable rows by corpus frequency and cut by coverage or top-N."""
    unreachable = find_unreachable(tokenizer, vocab)  # (V,)
    unreachable[list(always_rows)] = False  # the unknown-token row is kept though no text produces it ("<unk>")
    index = {token: row for row, token in enumerate(vocab)}
    freq = np.zeros(len(vocab), dtype=np.int64)  # (V,)
    corpus_tokens = corpus_texts = 0
    if corpus is not None:
        counter, corpus_texts = count_tokens(tokenizer, corpus)
        corpus_tokens = sum(counter.values())
        for token, c in counter.items():
            row = index.get(token)
            if row is not None:
                freq[row] = c
    known_tokens = int(freq.sum())
    absent = absent_tokens(counter, index) if corpus is not None else ()

    # keep-words as the tokenizer would see them ("Not" -> "not"); those the model lacks, or has only on
    # rows no text can reach, are reported in the user's spelling, never invented
    keep = [(w, tokenizer.normalize(w)) for w in options.keep_words]
    unknown_keep = tuple(w for w, t in keep if t not in index or unreachable[index[t]])
    forced = [index[t] for _, t in keep if t in index] + list(always_rows)
    forced = list(dict.fromkeys(r for r in forced if not unreachable[r]))  # unique, order kept
    forced_set = set(forced)
    reachable = np.flatnonzero(~unreachable)  # (R,)
    rest = np.array([r for r in reachable if r not in forced_set], dtype=np.int64) if forced_set else reachable
    # most frequent (or count × effect) first; stable sort keeps row order among ties (deterministic)
    score = freq[rest] if options.effect is None else freq[rest] * options.effect[rest]  # (R,)
    rest = rest[np.argsort(-score, kind="stable")]
    ranked = np.concatenate([np.array(forced, dtype=np.int64), rest]).astype(np.int64)
    row_counts = freq[ranked]

    if corpus is None:
        keep = len(ranked)
    elif options.top is not None:
        keep = options.top
    else:
        keep = _rows_for_coverage(row_counts, len(forced), known_tokens, options.coverage)
    examples = tuple(vocab[r] for r in np.flatnonzero(unreachable)[:8])
    plan = VocabPlan(
        ranked_rows=ranked, row_counts=row_counts, forced=len(forced), keep=len(ranked),
        corpus_texts=corpus_texts, corpus_tokens=corpus_tokens, known_tokens=known_tokens,
        unreachable=int(unreachable.sum()), unreachable_examples=examples,
        unknown_keep_words=unknown_keep, has_corpus=corpus is not None, absent=absent,
    )
    return plan.with_keep(keep)


def row_effects(embedding: np.ndarray, first_weight: np.ndarray | None) -> np.ndarray:
    """(V,) float64: how far each row moves the first layer's input, |W1 (E_t − ē)| (or |E_t − ē| without a
    hidden layer), ē the table's mean row: a cheap proxy of a token's effect on the decision."""
    centre = embedding.mean(axis=0, dtype=np.float64)  # (D,)
    out = np.empty(embedding.shape[0], np.float64)  # (V,)
    for start in range(0, embedding.shape[0], 65536):
        block = embedding[start : start + 65536].astype(np.float64) - centre  # (b, D)
        if first_weight is not None:
            block = block @ first_weight.T.astype(np.float64)  # (b, H1)
        out[start : start + 65536] = np.sqrt((block * block).sum(axis=1))
    return out


def pruned_mean_row(embedding: np.ndarray, plan: VocabPlan) -> np.ndarray:
    """(D,) float32: the pruned-rest row, the corpus-frequency-weighted mean of the pruned reachable rows
    (their plain mean when the corpus saw none of them; zeros when nothing is pruned)."""
    pruned = plan.ranked_rows[plan.keep :]  # (P,)
    if len(pruned) == 0:
        return np.zeros(embedding.shape[1], np.float32)
    weights = plan.row_counts[plan.keep :].astype(np.float64)  # (P,)
    seen = np.flatnonzero(weights)  # only rows with a weight contribute
    if seen.size:
        total = weights[seen] @ embedding[pruned[seen]].astype(np.float64)  # (D,)
        return (total / weights[seen].sum()).astype(np.float32)
    total = np.zeros(embedding.shape[1], np.float64)  # (D,)
    for start in range(0, len(pruned), 65536):  # in blocks: a 400k-row table stays out of a float64 copy
        total += embedding[pruned[start : start + 65536]].astype(np.float64).sum(axis=0)
    return (total / len(pruned)).astype(np.float32)


def _rows_for_coverage(row_counts: np.ndarray, forced: int, known: int, target: float) -> int:
    """Smallest cut (>= forced rows, >= 1) whose kept rows cover `target` of the known tokens."""
    if known == 0:
        return max(forced, 1)
    covered = np.cumsum(row_counts)  # (R,)
    need = target * known
    cut = int(np.searchsorted(covered, need - 1e-9 * known, side="left")) + 1
    seen = int(np.count_nonzero(row_counts))  # never keep unseen rows for coverage
    return max(forced, min(cut, max(seen, forced)), 1)
