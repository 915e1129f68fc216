"""`danpack pack`: float model directory -> one bundle (prune, quantise, fold, export, write).

Each stage lives in its own module; this one only sequences them and gathers the
figures the summary and the manifest report.
"""

from __future__ import annotations

import itertools
import os
from dataclasses import asdict, dataclass, field
from pathlib import Path

import numpy as np

from danpack.runtime.bundle import decode_bundle
from danpack.runtime.errors import DanpackError
from danpack.runtime.forward import forward_logits, softmax
from danpack.runtime.tokenize import Tokenizer

from danpack import __version__
from danpack.pack.bundle import encode_bundle, encode_payload, encode_vocab
from danpack.pack.envelope import unknown_envelope
from danpack.files import file_sha256, write_atomic
from danpack.pack.fold import fold_first_layer, should_fold
from danpack.pack.graph import GraphSpec, build_graph, check_graph
from danpack.model import FloatModel, load_model, model_bytes, model_digest
from danpack.progress import Steps
from danpack.pack.quantize import quantize_rows
from danpack.textfile import iter_records
from danpack.pack.vocab import VocabOptions, VocabPlan, plan_vocab

PRUNED_POLICIES = ("skip", "unk", "rest")
DEFAULT_PRUNED = "skip"  # measured on the demo models (README, "Choosing the pruned-token policy")
PROBE_TEXTS = 8  # id sequences stored in the manifest, re-run by the runtime on load


class PackError(DanpackError):
    """Pack options that cannot be honoured (budget too small, policy the model cannot use, ...)."""


@dataclass(frozen=True)
class PackOptions:
    """Everything `danpack pack` can be told."""

    corpora: tuple[str, ...] = ()  # deployment-domain texts: plain lines, JSONL, CSV or TSV
    text_field: str = "text"  # field or column holding the text in JSONL / CSV / TSV corpora
    coverage: float = 0.995  # keep rows until this share of the corpus's known tokens is covered
    top: int | None = None  # or keep the N most frequent rows
    max_bytes: int | None = None  # or the most rows whose whole bundle fits this many bytes
    keep_words: tuple[str, ...] = ()  # always kept when the model knows them
    pruned: str = "auto"  # run-time fate of pruned tokens: skip | unk | rest | auto
    fold: str = "auto"  # fold the first hidden layer into the table: auto | yes | no
    quantize: bool = True  # int8 table; False keeps float32 (the unpruned float baseline)

    def __post_init__(self) -> None:
        if not 0.0 < self.coverage <= 1.0:
            raise PackError(f"coverage {self.coverage} must be in (0, 1], e.g. 0.995")
        if self.top is not None and self.top < 1:
            raise PackError(f"top {self.top} must be at least 1")
        if self.max_bytes is not None and self.max_bytes < 1:
            raise PackError(f"max-bytes {self.max_bytes} must be positive")
        if self.top is not None and self.max_bytes is not None:
            raise PackError("top and max-bytes both choose how many rows to keep; give one of them")
        if self.pruned not in (*PRUNED_POLICIES, "auto"):
            raise PackError(f"pruned-token policy {self.pruned!r} is not one of skip, unk, rest, auto")
        if self.fold not in ("auto", "yes", "no"):
            raise PackError(f"fold {self.fold!r} is not one of auto, yes, no")


@dataclass(frozen=True)
class PackResult:
    """What was written and the figures behind the summary."""

    path: Path | None
    data: bytes
    plan: VocabPlan
    policy: str
    folded: bool
    rows: int  # table rows in the bundle (kept tokens, plus the pruned-rest row if any)
    width: int
    source_rows: int
    source_bytes: int
    breakdown: dict[str, int] = field(default_factory=dict)  # bytes by part; sums to len(data)

    @property
    def bytes(self) -> int:
        return len(self.data)


def resolve_policy(model: FloatModel, requested: str) -> str:
    """The run-time fate of pruned tokens: the model's unknown row when it has one, else the default."""
    if requested == "auto":
        return "unk" if model.oov_policy == "unk" else DEFAULT_PRUNED
    if requested == "unk" and model.oov_policy != "unk":
        raise PackError("pruned-token policy 'unk' needs a model with an unknown-token row "
                        "(dan.json oov policy 'unk'); use 'skip' or 'rest'")
    return requested


def read_corpora(paths: tuple[str, ...], text_field: str):
    """All texts of the corpora, in order (None without corpora)."""
    if not paths:
        return None
    return (r[text_field] for r in itertools.chain.from_iterable(iter_records(p, text_field) for p in paths))


def _rest_row(model: FloatModel, plan: VocabPlan) -> np.ndarray:
    """Frequency-weighted mean of the pruned reachable rows (uniform when none was seen)."""
    pruned = plan.ranked_rows[plan.keep :]  # (P,)
    if len(pruned) == 0:
        return np.zeros(model.embedding.shape[1], np.float32)
    weights = plan.row_counts[plan.keep :].astype(np.float64)  # (P,)
    if weights.sum() == 0:
        weights = np.ones_like(weights)
    return (weights @ model.embedding[pruned].astype(np.float64) / weights.sum()).astype(np.float32)  # (D,)


def _probe(table, scales, layers, rows: int, seed_ids: list[list[int]]) -> dict:
    """A few id sequences and their expected outputs, re-run by the runtime on load."""
    from danpack.runtime.forward import encode_batch

    ids, counts = encode_batch(seed_ids)
    probs = softmax(forward_logits(table, layers, ids, counts, scales))  # (P, C)
    return {"ids": [list(map(int, s)) for s in seed_ids], "probs": probs.astype(np.float32).tolist()}


def source_date_epoch() -> int | None:
    """SOURCE_DATE_EPOCH as the build time to record, None when unset (reproducible-builds.org: a
    malformed value is an error, never silently ignored)."""
    epoch = os.environ.get("SOURCE_DATE_EPOCH")
    if epoch is None:
        return None
    if not (epoch.isascii() and epoch.isdigit()):
        raise PackError(f"SOURCE_DATE_EPOCH={epoch!r} is not a count of seconds since 1970-01-01 UTC; "
                        "set it to digits only (e.g. the last commit's `git log -1 --format=%ct`) or unset it")
    return int(epoch)


def build_bundle(model: FloatModel, plan: VocabPlan, policy: str, fold_mode: str, quantize: bool,
                 source: dict, options: dict) -> tuple[bytes, dict[str, int], bool, int, int]:
    """Assemble the bundle bytes for a vocabulary plan; returns (bytes, breakdown, folded, rows, width)."""
    kept = plan.kept_rows  # (K,)
    vocab = [model.vocab[r] for r in kept]
    # every row kept still follows the ranking's order (the vocabulary's): only the identity order needs no copy
    same = len(kept) == len(model.vocab) and bool((kept == np.arange(len(kept))).all())
    table = model.embedding if same else model.embedding[kept]  # (K, D)
    oov_row = None
    if policy == "rest":
        table = np.vstack([table, _rest_row(model, plan)[None, :]])  # (K + 1, D)
        oov_row = len(vocab)
    elif policy == "unk":
        oov_row = vocab.index(model.unk_token)
    layers = model.layers
    folded = should_fold(table.shape[1], layers, fold_mode)
    if folded:
        table, layers = fold_first_layer(table, layers)  # (R, H1)
    tensors: dict[str, np.ndarray] = {}
    if quantize:
        tensors["table"], tensors["scales"] = quantize_rows(table)
    else:
        tensors["table"] = np.ascontiguousarray(table, dtype=np.float32)
    for i, layer in enumerate(layers):
        if layer.weight is not None:
            tensors[f"layer.{i}.weight"] = layer.weight
        tensors[f"layer.{i}.bias"] = layer.bias
    rows, width = tensors["table"].shape
    spec = GraphSpec(
        rows=rows, width=width, quantized=quantize,
        layers=tuple((layer.weight is not None, layer.activation) for layer in layers),
        layer_shapes=tuple((int(layer.bias.shape[0]), 0 if layer.weight is None else int(layer.weight.shape[1]))
                           for layer in layers),
        classes=len(model.labels),
    )
    graph = build_graph(spec)
    check_graph(graph)
    graph_bytes = graph.SerializeToString()
    probe_ids = [list(range(i, min(rows, i + 1 + 3 * i))) for i in range(min(PROBE_TEXTS, rows))]
    manifest = {
        "labels": list(model.labels),
        "tokenizer": model.tokenizer.to_dict(),
        "oov": {"policy": policy, "row": oov_row},
        "table": {"rows": rows, "width": width, "dtype": "int8" if quantize else "float32", "folded": folded,
                  "tokens": len(vocab)},
        "layers": [{"activation": layer.activation, "weight": layer.weight is not None} for layer in layers],
        "source": source,
        "selection": {
            "coverage": round(plan.coverage, 6), "corpus_texts": plan.corpus_texts, "corpus_tokens": plan.corpus_tokens,
            "known_tokens": plan.known_tokens, "unreachable_rows": plan.unreachable, "has_corpus": plan.has_corpus,
        },
        "pack": options,
        "packer": f"danpack {__version__}",
        "probe": _probe(tensors["table"], tensors.get("scales"), layers, rows, probe_ids),
        "unknown": unknown_envelope(model, kept, folded),  # what a token the bundle does not know may have done
    }
    epoch = source_date_epoch()
    if epoch is not None:
        manifest["created_epoch"] = epoch
    vocab_blob = encode_vocab(vocab)
    payload = encode_payload(manifest, vocab_blob, graph_bytes, tensors)
    data = encode_bundle(payload)
    breakdown = {
        "table": tensors["table"].nbytes,
        "scales": tensors["scales"].nbytes if quantize else 0,
        "layers": sum(t.nbytes for n, t in tensors.items() if n.startswith("layer.")),
        "vocab": len(vocab_blob),
        "graph": len(graph_bytes),
    }
    breakdown["other"] = len(data) - sum(breakdown.values())
    return data, breakdown, folded, rows, width


def _fit_budget(model: FloatModel, plan: VocabPlan, budget: int, fold_mode: str, quantize: bool, build) -> VocabPlan:
    """The largest cut of the ranking whose bundle fits `budget` bytes (exact: checked by building)."""
    smallest = plan.with_keep(max(plan.forced, 1))
    base = len(build(smallest)[0])
    if base > budget:
        raise PackError(f"--max-bytes {budget} is below the smallest possible bundle ({base} bytes with "
                        f"{smallest.keep} row(s)); raise the budget")
    dim = model.embedding.shape[1]
    width = int(model.layers[0].bias.shape[0]) if should_fold(dim, model.layers, fold_mode) else dim
    ranked = plan.ranked_rows[smallest.keep :]
    # per-row cost: the row (int8 or float32), its float32 scale, the token and its newline
    per_row = width * (1 if quantize else 4) + (4 if quantize else 0)
    costs = np.fromiter((per_row + len(model.vocab[r].encode("utf-8")) + 1 for r in ranked), np.int64, len(ranked))
    keep = smallest.keep + int(np.searchsorted(np.cumsum(costs), budget - base, side="right"))

    def fits(k: int) -> bool:
        return len(build(plan.with_keep(k))[0]) <= budget

    # msgpack headers may grow by a few bytes at size boundaries: settle the estimate row by row
    while keep > smallest.keep and not fits(keep):
        keep -= 1
    while keep < len(plan.ranked_rows) and fits(keep + 1):
        keep += 1
    return plan.with_keep(keep)


def pack_model(model_dir: str | os.PathLike, out: str | os.PathLike | None, options: PackOptions = PackOptions(),
               steps: Steps | None = None) -> PackResult:
    """Pack a float model directory into a bundle at `out` (None: only build the bytes)."""
    steps = steps or Steps(6, quiet=True)
    source_date_epoch()  # a malformed value fails before any work
    with steps.step(f"reading float model {model_dir}"):
        model = load_model(model_dir)
        source = {"sha256": model_digest(model_dir), "rows": len(model.vocab),
                  "embedding_dim": int(model.embedding.shape[1]), "bytes": model_bytes(model_dir)}
    steps.note(f"{len(model.vocab):,} rows x {model.embedding.shape[1]}, labels {', '.join(model.labels)}")
    policy = resolve_policy(model, options.pruned)
    always = [model.vocab.index(model.unk_token)] if model.oov_policy == "unk" else []
    with steps.step("choosing the deployment vocabulary"):
        corpus = read_corpora(options.corpora, options.text_field)
        vocab_options = VocabOptions(coverage=options.coverage, top=options.top, keep_words=options.keep_words)
        plan = plan_vocab(model.vocab, Tokenizer(model.tokenizer), corpus, vocab_options, always)
    if plan.has_corpus and plan.known_tokens == 0:  # the cut would keep one arbitrary row: a useless bundle
        raise PackError(f"the corpus ({plan.corpus_texts:,} texts, {plan.corpus_tokens:,} tokens) holds no token the "
                        f"model knows; check the file, --text-field ({options.text_field!r}) and that the corpus is "
                        "from the model's domain, or pack without --corpus to keep every row")
    pack_record = {k: (list(v) if isinstance(v, tuple) else v) for k, v in asdict(options).items()}
    # names and digests: a changed corpus changes the manifest even when the selection stays the same
    pack_record["corpora"] = [{"name": Path(p).name, "sha256": file_sha256(p)} for p in options.corpora]
    pack_record["pruned"] = policy

    def build(p: VocabPlan):
        return build_bundle(model, p, policy, options.fold, options.quantize, source, pack_record)

    if options.max_bytes is not None:
        with steps.step(f"fitting the byte budget ({options.max_bytes:,} bytes)"):
            plan = _fit_budget(model, plan, options.max_bytes, options.fold, options.quantize, build)
    with steps.step("quantising, folding and exporting the graph"):
        data, breakdown, folded, rows, width = build(plan)
    with steps.step("verifying the bundle with the runtime reader"):
        decode_bundle(data, "packed bundle")
    path = None
    if out is not None:
        with steps.step(f"writing {out}"):
            path = write_atomic(out, data)
    return PackResult(path, data, plan, policy, folded, rows, width, len(model.vocab), source["bytes"], breakdown)
