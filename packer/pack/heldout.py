"""Measuring candidate bundles on a held-out slice of the deployment corpus, before any bundle is written.

The slice: every corpus text whose salted sha256 falls in the first HELDOUT_PERCENT of 100 buckets (a text
always lands on the same side, whatever the file order; the salt keeps the slice independent of any other
hash split of the same texts, such as the real-data loader's train/dev/test). Rows are ranked on the other
texts only; the slice is labelled by the float model itself (no human labels needed).

A candidate is (rows kept, pruned-token policy, folded or not). It is measured with the runtime's own forward
pass (`runtime.forward.forward_logits`) on a compact table: the int8 rows of the tokens the slice uses (the
whole table is quantised once per fold mode: per-row quantisation makes a row's bytes independent of the
others), with rows the candidate prunes zeroed and never referenced, plus the candidate's out-of-vocabulary
row. Figures: agreement with the float model's class, mean |Δp| (largest class change per text, as `danpack
check`), and the certified share by the device's box method of runtime/certify.py (the premise each kept row lies
within its assumed radius is taken as holding, as on the device; `danpack check` verifies it).
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterable, Iterator
from dataclasses import dataclass

import numpy as np

from danpack.runtime.bundle import Bundle
from danpack.runtime.certify import box_bound, certify_packed, hash_token, row_reach, slot_table
from danpack.runtime.forward import Layer, forward_logits, softmax
from danpack.runtime.tokenize import Tokenizer

from danpack.model import FloatModel
from danpack.pack.envelope import EnvelopeIndex, EnvelopeOptions
from danpack.pack.fold import fold_first_layer
from danpack.pack.quantize import quantize_rows
from danpack.pack.vocab import VocabPlan

HELDOUT_PERCENT = 15  # share of corpus texts held out for measurement, in buckets of 100
HELDOUT_SALT = b"danpack-heldout-v1\x00"  # decorrelates the slice from other sha256 splits of the same texts
BATCH = 1024  # texts per forward pass: bounds the padded (B, T, W) temporaries
POLICY_ORDER = ("skip", "unk", "rest")  # tie-break among policies of equal measure
CALIBRATION_ROWS = 32  # the byte estimate's exact build: at least the 29 rows the manifest's probe uses
TARGET_Z = 1.2816  # one-sided 90% normal quantile: a target is met by the Wilson lower bound, not the point figure


def wilson_lower(share: float, n: int, z: float = TARGET_Z) -> float:
    """One-sided lower confidence bound of a share observed on n texts (Wilson score interval; Wilson 1927,
    the standard formula: (p + z²/2n − z·sqrt(p(1−p)/n + z²/4n²)) / (1 + z²/n)); 0 when n is 0."""
    if n == 0:
        return 0.0
    z2 = z * z
    centre = share + z2 / (2 * n)
    spread = z * np.sqrt(max(share * (1 - share), 0.0) / n + z2 / (4 * n * n))
    return float((centre - spread) / (1 + z2 / n))


def is_heldout(text: str) -> bool:
    """True when the text belongs to the held-out slice (a fixed function of the text alone)."""
    digest = hashlib.sha256(HELDOUT_SALT + text.encode("utf-8", errors="surrogatepass")).digest()
    return int.from_bytes(digest[:8], "big") % 100 < HELDOUT_PERCENT


def split_heldout(texts: Iterable[str], heldout: list[str]) -> Iterator[str]:
    """Yield the selection texts; append the held-out ones to `heldout` (streams: the selection is never stored)."""
    for text in texts:
        if is_heldout(text):
            heldout.append(text)
        else:
            yield text


@dataclass(frozen=True)
class Candidate:
    """One bundle the packer could write: rows kept (a cut of the ranking), policy, fold."""

    keep: int
    policy: str  # skip | unk | rest
    folded: bool


@dataclass(frozen=True)
class Measure:
    """A candidate's figures on the held-out slice."""

    candidate: Candidate
    bytes: int  # bundle bytes (estimated for candidates, exact once built; see Estimator)
    agreement: float  # share of held-out texts whose class matches the float model's
    mean_abs_prob_diff: float  # mean over texts of the largest |p_packed − p_float| over classes
    certified_share: float  # share of held-out texts the drift bound certifies
    texts: int
    accuracy: float | None = None  # share matching gold labels, when the texts have them (frontier --eval)

    @property
    def agreement_low(self) -> float:
        """90% one-sided lower bound of the agreement on texts like the slice (what a target must reach)."""
        return wilson_lower(self.agreement, self.texts)

    def to_dict(self) -> dict:
        return {"rows": self.candidate.keep, "pruned": self.candidate.policy, "folded": self.candidate.folded,
                "bytes": self.bytes, "agreement": round(self.agreement, 6),
                "agreement_low": round(self.agreement_low, 6),
                "mean_abs_prob_diff": round(self.mean_abs_prob_diff, 6),
                "certified_share": round(self.certified_share, 6), "texts": self.texts,
                **({} if self.accuracy is None else {"accuracy": round(self.accuracy, 6)})}


@dataclass(frozen=True)
class _Table:
    """The whole table quantised once for one fold mode, and the layers that follow it."""

    q: np.ndarray  # (V, W) int8
    scales: np.ndarray  # (V,) float32
    layers: tuple[Layer, ...]
    worst: np.ndarray  # (V,) float64: each row's reach (runtime/certify.py `row_reach`; the largest kept one counts)
    envelopes: EnvelopeIndex  # the manifest's `unknown` field of every cut of the ranking


class HeldOut:
    """The held-out slice, tokenized once against the float vocabulary, and the float model's answers on it."""

    def __init__(self, model: FloatModel, plan: VocabPlan, texts: list[str], gold: np.ndarray | None = None,
                 envelope: EnvelopeOptions = EnvelopeOptions()) -> None:
        self.model, self.plan, self.texts, self.gold = model, plan, texts, gold  # gold: (N,) class ids or None
        self.envelope_options = envelope
        tokenize = Tokenizer(model.tokenizer).tokenize
        index = {t: i for i, t in enumerate(model.vocab)}
        token_lists = [tokenize(x) for x in texts]
        row_lists = [[index.get(t, -1) for t in tokens] for tokens in token_lists]
        # shortest first: batches of similar lengths pad little (the figures do not depend on the order)
        by_length = sorted(range(len(texts)), key=lambda i: len(row_lists[i]))
        texts = [texts[i] for i in by_length]
        row_lists = [row_lists[i] for i in by_length]
        self.texts = texts
        self.gold = None if gold is None else np.asarray(gold)[by_length]
        counts = np.fromiter(map(len, row_lists), np.int64, len(row_lists))  # (N,)
        width = max(int(counts.max()) if len(texts) else 0, 1)
        rows = np.full((len(texts), width), -1, np.int64)  # (N, T): float row, -1 for a token the model lacks
        hashes = np.zeros((len(texts), width), np.uint32)  # (N, T): each token's FNV-1a, for the envelope's slots
        for i, (r, j) in enumerate(zip(row_lists, by_length)):
            rows[i, : len(r)] = r
            hashes[i, : len(r)] = [hash_token(t) for t in token_lists[j]]
        self.hashes = hashes
        self.counts = counts
        self.valid = np.arange(width)[None, :] < counts[:, None]  # (N, T)
        # compact rows: every float row the slice uses, plus the unknown-token row
        unk = [model.vocab.index(model.unk_token)] if model.oov_policy == "unk" else []
        self.used = np.unique(np.concatenate([rows[self.valid & (rows >= 0)], np.array(unk, np.int64)]))  # (U,)
        self.unk_local = int(np.searchsorted(self.used, unk[0])) if unk else None
        local = np.searchsorted(self.used, np.maximum(rows, 0))  # (N, T)
        self.local = np.where(rows >= 0, local, -1)  # (N, T): compact id, -1 for a token the model lacks
        rank = np.full(len(model.vocab), np.iinfo(np.int64).max, np.int64)  # (V,): position in the ranking
        rank[plan.ranked_rows] = np.arange(len(plan.ranked_rows))
        self.rank_local = rank[self.used]  # (U,)
        encoder = model.encoder()  # built once: a 400k-row index takes a noticeable fraction of a second
        logits = [model.predict_logits(texts[s : s + BATCH], encoder) for s in range(0, len(texts), BATCH)]
        self.float_logits = np.concatenate(logits) if logits else np.zeros((0, len(model.labels)), np.float32)
        self.float_probs = softmax(self.float_logits)  # (N, C)
        self._tables: dict[bool, _Table] = {}

    def __len__(self) -> int:
        return len(self.texts)

    def _table(self, folded: bool) -> _Table:
        """The quantised table of a fold mode (computed on first use, then kept)."""
        if folded not in self._tables:
            table, layers = self.model.embedding, self.model.layers
            if folded:
                table, layers = fold_first_layer(table, layers)  # (V, H1)
            q, scales = quantize_rows(table)
            worst = row_reach(_stand_in(self.model, q, scales, layers, None))  # (V,)
            envelopes = EnvelopeIndex(self.model, self.plan.ranked_rows, folded, self.plan.absent,
                                      self.envelope_options)
            self._tables[folded] = _Table(q, scales, layers, worst, envelopes)
        return self._tables[folded]

    def measure(self, candidate: Candidate, rest_row: np.ndarray | None = None, size: int = 0) -> Measure:
        """Figures of one candidate on the slice; `rest_row` (D,) float32 is the pruned-rest row for policy rest."""
        t = self._table(candidate.folded)
        kept_local = self.rank_local < candidate.keep  # (U,)
        kept = self.valid & (self.local >= 0) & kept_local[np.maximum(self.local, 0)]  # (N, T)
        # 1. the compact table: used rows (pruned ones zeroed, never referenced), largest kept row, oov row
        q = np.where(kept_local[:, None], t.q[self.used], 0).astype(np.int8)  # (U, W)
        scales = np.where(kept_local, t.scales[self.used], 0).astype(np.float32)  # (U,)
        kept_rows = self.plan.ranked_rows[: candidate.keep]
        worst_row = int(kept_rows[np.argmax(t.worst[kept_rows])]) if kept_rows.size else 0
        q, scales = np.vstack([q, t.q[worst_row][None, :]]), np.append(scales, t.scales[worst_row])
        oov = None
        if candidate.policy == "rest":
            extra = rest_row[None, :]  # (1, D)
            if candidate.folded:
                extra = fold_first_layer(extra, self.model.layers)[0]  # (1, H1)
            rq, rs = quantize_rows(extra)
            q, scales, oov = np.vstack([q, rq]), np.append(scales, rs).astype(np.float32), q.shape[0]
        elif candidate.policy == "unk":
            oov = self.unk_local
        # 2. ids as the encoder maps them: kept tokens keep their row; the others leave (skip) or go to oov
        if candidate.policy == "skip":
            order = np.argsort(~kept, axis=1, kind="stable")  # kept tokens first, in text order
            ids = np.take_along_axis(np.where(kept, self.local, 0), order, axis=1)  # (N, T)
            counts = kept.sum(axis=1)  # (N,)
            ids = np.where(np.arange(ids.shape[1])[None, :] < counts[:, None], ids, 0)
        else:
            ids = np.where(kept, self.local, oov)  # (N, T)
            ids = np.where(self.valid, ids, 0)
            counts = self.counts
        # tokens without a row of their own, as runtime/certify.py `encode_unknown` counts them
        if candidate.policy == "skip":
            where = self.valid & ~kept  # (N, T): left out
        else:
            where = self.valid & (ids == oov)  # (N, T): on the out-of-vocabulary row
        unknown = where.sum(axis=1)  # (N,)
        # 3. forward, figures, certification (the device's box method, with this cut's envelope)
        envelope = t.envelopes.envelope(candidate.keep)
        bound = box_bound(_stand_in(self.model, q, scales, t.layers, oov, envelope))
        if bound.envelope is not None and bound.envelope.by_token:  # each unknown token's slot, as encode_unknown
            unknown = slot_table(unknown, bound.envelope.slots_of(self.hashes[where]))  # (N, U)
        agree, moved, certified, right = [], [], [], []
        for s in range(0, len(self), BATCH):
            part = slice(s, s + BATCH)
            width = max(int(counts[part].max()), 1) if counts[part].size else 1
            b_ids, b_counts = ids[part, :width], counts[part]
            logits = forward_logits(q, t.layers, b_ids, b_counts, scales)  # (b, C)
            probs = softmax(logits)  # (b, C)
            agree.append(probs.argmax(axis=1) == self.float_probs[part].argmax(axis=1))
            if self.gold is not None:
                right.append(probs.argmax(axis=1) == self.gold[part])
            moved.append(np.abs(self.float_probs[part].astype(np.float64) - probs).max(axis=1))
            certified.append(certify_packed(bound, logits, b_ids, b_counts, unknown[part]))
        n = len(self)
        mean = (lambda parts: float(np.concatenate(parts).mean()) if n else 1.0)
        accuracy = None if self.gold is None else mean(right)
        return Measure(candidate, size, mean(agree), mean(moved) if n else 0.0, mean(certified), n, accuracy)


def _stand_in(model: FloatModel, q: np.ndarray, scales: np.ndarray, layers: tuple[Layer, ...],
              oov_row: int | None, unknown: dict | None = None) -> Bundle:
    """A Bundle holding only what the certification reads (table, scales, layers, manifest fields)."""
    tensors = {"table": q, "scales": scales}
    for i, layer in enumerate(layers):
        if layer.weight is not None:
            tensors[f"layer.{i}.weight"] = layer.weight
        tensors[f"layer.{i}.bias"] = layer.bias
    manifest = {"table": {"dtype": "int8"}, "oov": {"row": oov_row}, "tokenizer": model.tokenizer.to_dict(),
                "source": {"embedding_dim": int(model.embedding.shape[1])},
                "layers": [{"activation": l.activation, "weight": l.weight is not None} for l in layers]}
    if unknown is not None:
        manifest["unknown"] = unknown
    return Bundle(manifest, (), b"", tensors, "", 0, 0)


class Estimator:
    """Bundle bytes of a candidate without building it: one exact build per (policy, fold) at the smallest cut,
    plus the int8 row and float32 scale of each further row and the exact deflated vocabulary."""

    def __init__(self, model: FloatModel, plan: VocabPlan, build) -> None:
        self.model, self.plan, self.build = model, plan, build  # build(plan, policy, fold_mode) -> (bytes, ..)
        self._base: dict[tuple[str, bool], tuple[int, int, int]] = {}
        self._vocab: dict[int, int] = {}

    def vocab_bytes(self, keep: int) -> int:
        if keep not in self._vocab:
            from danpack.pack.bundle import encode_vocab

            self._vocab[keep] = len(encode_vocab([self.model.vocab[r] for r in self.plan.ranked_rows[:keep]]))
        return self._vocab[keep]

    def bytes(self, c: Candidate) -> int:
        key = (c.policy, c.folded)
        if key not in self._base:  # calibrated past the rows the manifest's probe reads (they change its size)
            keep = self.plan.with_keep(max(self.plan.forced, CALIBRATION_ROWS)).keep
            data, breakdown, _, rows, width = self.build(self.plan.with_keep(keep), c.policy, "yes" if c.folded else "no")
            self._base[key] = (len(data) - breakdown["vocab"], keep, width)
        base, keep0, width = self._base[key]
        return base + (c.keep - keep0) * (width + 4) + self.vocab_bytes(c.keep)

