"""`danpack pack`: float model directory -> one bundle (prune, quantise, fold, export, write).

Each stage lives in its own module; this one only sequences them and gathers the
figures the summary and the manifest report.
"""

from __future__ import annotations

import itertools
import os
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path

import numpy as np

from danpack.runtime.bundle import decode_bundle
from danpack.runtime.encode import Encoder
from danpack.runtime.errors import DanpackError
from danpack.runtime.forward import forward_logits, softmax
from danpack.runtime.graph import GraphSpec, write_graph
from danpack.runtime.tokenize import Tokenizer

from danpack import __version__
from danpack.pack.bundle import encode_bundle, encode_payload, encode_vocab
from danpack.pack.envelope import EnvelopeOptions, unknown_envelope
from danpack.files import file_sha256, write_atomic
from danpack.pack.fold import fold_first_layer, should_fold
from danpack.model import FloatModel, load_model, model_bytes, model_digest
from danpack.progress import Steps
from danpack.pack.quantize import quantize_rows
from danpack.textfile import iter_records
from danpack.pack.choose import Searcher
from danpack.pack.heldout import Candidate, Estimator, HeldOut, Measure, split_heldout
from danpack.pack.vocab import VocabOptions, VocabPlan, count_absent, plan_vocab, pruned_mean_row, row_effects

PRUNED_POLICIES = ("skip", "unk", "rest")
RANKINGS = ("frequency", "effect")
DEFAULT_PRUNED = "skip"  # measured on the demo models (README, "Choosing the pruned-token policy")
PROBE_TEXTS = 8  # id sequences stored in the manifest, re-run by the runtime on load
DEFAULT_LOSS = 0.001  # measured default: the smallest bundle within 0.1 pt of every row's held-out agreement
FALLBACK_COVERAGE = 0.995  # the cut when nothing can be measured (no held-out text)
MIN_HELDOUT_TEXTS = 20  # fewer held-out texts (a corpus under about 130) measure nothing: the corpus is not split
PROBE_SAMPLE = 32  # vocabulary tokens spread over the probe texts (5 texts of about 16 tokens)


class PackError(DanpackError):
    """Pack options that cannot be honoured (budget too small, policy the model cannot use, ...)."""


@dataclass(frozen=True)
class PackOptions:
    """Everything `danpack pack` can be told."""

    corpora: tuple[str, ...] = ()  # deployment-domain texts: plain lines, JSONL, CSV or TSV
    text_field: str = "text"  # field or column holding the text in JSONL / CSV / TSV corpora
    coverage: float | None = None  # keep rows until this share of the selection texts' known tokens is covered
    top: int | None = None  # or keep the N most frequent rows
    max_bytes: int | None = None  # or the most rows whose whole bundle fits this many bytes
    target_agreement: float | None = None  # or the smallest bundle with at least this held-out agreement
    # none of the four: the smallest bundle within DEFAULT_LOSS of keeping every row, measured (README, "Packing")
    keep_words: tuple[str, ...] = ()  # always kept when the model knows them
    pruned: str = "auto"  # run-time fate of pruned tokens: skip | unk | rest | auto (measured on the held-out slice)
    fold: str = "auto"  # fold the first hidden layer into the table: auto | yes | no
    quantize: bool = True  # int8 table; False keeps float32 (the unpruned float baseline)
    rank: str = "frequency"  # row ranking: frequency, or effect (count × |W1 (E_t − ē)|; bench/MEASURED.md compares)
    measure: bool = True  # hold out a slice of the corpus and choose by measurement; False: the fixed rules only
    envelope: EnvelopeOptions = EnvelopeOptions()  # how finely the `unknown` envelope tells tokens apart

    def __post_init__(self) -> None:
        if self.coverage is not None and not 0.0 < self.coverage <= 1.0:
            raise PackError(f"coverage {self.coverage} must be in (0, 1], e.g. 0.995")
        if self.top is not None and self.top < 1:
            raise PackError(f"top {self.top} must be at least 1")
        if self.max_bytes is not None and self.max_bytes < 1:
            raise PackError(f"max-bytes {self.max_bytes} must be positive")
        if self.target_agreement is not None and not 0.0 < self.target_agreement <= 1.0:
            raise PackError(f"target-agreement {self.target_agreement} must be in (0, 1], e.g. 0.995")
        chosen = [name for name, value in (("coverage", self.coverage), ("top", self.top), ("max-bytes", self.max_bytes),
                                           ("target-agreement", self.target_agreement)) if value is not None]
        if len(chosen) > 1:
            raise PackError(f"{' and '.join(chosen)} each choose how many rows to keep; give one of them")
        if self.target_agreement is not None and not self.corpora:
            raise PackError("target-agreement is measured on a held-out slice of the corpus; give --corpus")
        if self.pruned not in (*PRUNED_POLICIES, "auto"):
            raise PackError(f"pruned-token policy {self.pruned!r} is not one of skip, unk, rest, auto")
        if self.fold not in ("auto", "yes", "no"):
            raise PackError(f"fold {self.fold!r} is not one of auto, yes, no")
        if self.rank not in RANKINGS:
            raise PackError(f"rank {self.rank!r} is not one of {', '.join(RANKINGS)}")
        if self.target_agreement is not None and not self.measure:
            raise PackError("target-agreement is measured on a held-out slice; it cannot be combined with measure off")


class TargetError(PackError):
    """No candidate reaches the requested held-out agreement (the CLI exits 1: a finding, not bad input)."""


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
    heldout: Measure | None = None  # the bundle's figures on the held-out slice (None: no corpus or empty slice)
    heldout_texts: int = 0
    choice: str = ""  # how the rows, policy and fold were chosen, in words

    @property
    def bytes(self) -> int:
        return len(self.data)


def resolve_policy(model: FloatModel, requested: str) -> str:
    """The run-time fate of pruned tokens without a measurement: the model's unknown row when it has one, else
    the default (`auto` with a held-out slice is decided by `candidate_policies` and measurement instead)."""
    if requested == "auto":
        return "unk" if model.oov_policy == "unk" else DEFAULT_PRUNED
    if requested == "unk" and model.oov_policy != "unk":
        raise PackError("pruned-token policy 'unk' needs a model with an unknown-token row "
                        "(dan.json oov policy 'unk'); use 'skip' or 'rest'")
    return requested


def candidate_policies(model: FloatModel, requested: str) -> tuple[str, ...]:
    """The policies a measured choice may take: all the model can use for `auto`, else the one requested."""
    if requested == "auto":
        return tuple(p for p in PRUNED_POLICIES if p != "unk" or model.oov_policy == "unk")
    return (resolve_policy(model, requested),)


def candidate_folds(model: FloatModel, requested: str, measured: bool) -> tuple[bool, ...]:
    """Fold modes to try: both for a measured search with `auto` (when the model has a hidden layer), else the rule."""
    dim = model.embedding.shape[1]
    if measured and requested == "auto" and len(model.layers) > 1:
        return (should_fold(dim, model.layers, "auto"), not should_fold(dim, model.layers, "auto"))
    return (should_fold(dim, model.layers, requested),)


def read_corpora(paths: tuple[str, ...], text_field: str):
    """All texts of the corpora, in order (None without corpora)."""
    if not paths:
        return None
    return (r[text_field] for r in itertools.chain.from_iterable(iter_records(p, text_field) for p in paths))


def _probe(table, scales, layers, seed_ids: list[list[int]], texts: list[str], encoder: Encoder) -> dict:
    """A few id sequences and texts with their expected outputs, re-run by the runtime on load."""
    from danpack.runtime.forward import encode_batch

    ids, counts = encode_batch(seed_ids)
    probs = softmax(forward_logits(table, layers, ids, counts, scales))  # (P, C)
    text_ids, text_counts = encoder.encode(texts)  # (S, T), (S,)
    text_probs = softmax(forward_logits(table, layers, text_ids, text_counts, scales))  # (S, C)
    return {"ids": [list(map(int, s)) for s in seed_ids], "probs": probs.astype(np.float32).tolist(),
            "texts": texts, "text_probs": text_probs.astype(np.float32).tolist()}


def probe_texts(tokenizer: Tokenizer, vocab: list[str], sample: int = PROBE_SAMPLE) -> list[str]:
    """Texts that run the bundle's whole path (tokenizer, vocabulary, graph) at load, so a permuted or edited
    vocabulary or tokenizer is refused: up to `sample` reachable tokens (the most frequent half, then spread over
    the rest), and text b holds the tokens whose 1-based sample index has bit b set. Any two sampled tokens differ
    in some bit, so swapping them changes at least one text's ids."""
    def reachable(candidates, k: int) -> list[int]:  # checked lazily: a 400k vocabulary costs no more than 32 rows
        return list(itertools.islice((r for r in candidates if tokenizer.is_reachable(vocab[r])), k))

    head = reachable(range(len(vocab)), sample // 2)
    start = head[-1] + 1 if head else len(vocab)
    step = max(1, (len(vocab) - start) // max(sample - len(head), 1))
    rows = head + reachable(range(start, len(vocab), step), sample - len(head))
    return [" ".join(vocab[row] for j, row in enumerate(rows) if (j + 1) >> bit & 1)
            for bit in range(len(rows).bit_length())]


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
                 source: dict, options: dict, measured: dict | None = None,
                 envelope: EnvelopeOptions = EnvelopeOptions()) -> tuple[bytes, dict[str, int], bool, int, int]:
    """Assemble the bundle bytes for a vocabulary plan; returns (bytes, breakdown, folded, rows, width).

    `measured`: the held-out figures and the choice, recorded in the manifest's selection."""
    kept = plan.kept_rows  # (K,)
    vocab = [model.vocab[r] for r in kept]
    # every row in row order needs no copy; any other selection (a corpus ranking keeping every row too) does
    in_order = len(kept) == len(model.vocab) and bool((kept == np.arange(len(kept))).all())
    table = model.embedding if in_order else model.embedding[kept]  # (K, D), row i is the token vocab[i]
    oov_row = None
    if policy == "rest":
        table = np.vstack([table, pruned_mean_row(model.embedding, plan)[None, :]])  # (K + 1, D)
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
    graph_bytes = write_graph(spec)  # onnx.checker runs on it in tests/test_graph.py, off the packing path
    probe_ids = [list(range(i, min(rows, i + 1 + 3 * i))) for i in range(min(PROBE_TEXTS, rows))]
    tokenizer = Tokenizer(model.tokenizer)
    texts = probe_texts(tokenizer, vocab)
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
            **(measured or {}),
        },
        "pack": options,
        "packer": f"danpack {__version__}",
        "probe": _probe(tensors["table"], tensors.get("scales"), layers, probe_ids, texts,
                        Encoder(tokenizer, vocab, oov_row)),
        # what a token the bundle does not know may have done
        "unknown": unknown_envelope(model, kept, folded, plan.absent, envelope),
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


@dataclass(frozen=True)
class Prepared:
    """A pack's inputs once read: the model, the ranking on the selection texts, the held-out texts."""

    model: FloatModel
    source: dict
    plan: VocabPlan
    policies: tuple[str, ...]
    heldout_texts: list
    pack_record: dict
    options: PackOptions

    def build(self, plan: VocabPlan, policy: str, fold_mode: str, measured: dict | None = None):
        """The bundle bytes of a plan (build_bundle with this pack's source and options)."""
        return build_bundle(self.model, plan, policy, fold_mode, self.options.quantize, self.source,
                            {**self.pack_record, "pruned": policy}, measured, self.options.envelope)

    def searcher(self, heldout: HeldOut) -> Searcher:
        blank = measured_record(None, "", self.plan, len(heldout))  # the manifest's held-out entry, for the estimate

        def build(plan: VocabPlan, policy: str, fold_mode: str):
            return self.build(plan, policy, fold_mode, blank)

        return Searcher(self.model, self.plan, heldout, Estimator(self.model, self.plan, build))


def prepare_pack(model_dir: str | os.PathLike, options: PackOptions, steps: Steps) -> Prepared:
    """Read the model and the corpora; rank rows on the selection texts and keep the held-out ones aside."""
    source_date_epoch()  # a malformed value fails before any work
    with steps.step(f"reading float model {model_dir}"):
        model = load_model(model_dir)
        source = {"sha256": model_digest(model_dir), "rows": len(model.vocab),
                  "embedding_dim": int(model.embedding.shape[1]), "bytes": model_bytes(model_dir)}
    steps.note(f"{len(model.vocab):,} rows x {model.embedding.shape[1]}, labels {', '.join(model.labels)}")
    policies = candidate_policies(model, options.pruned)  # refuses unk for a model without an unknown row
    always = [model.vocab.index(model.unk_token)] if model.oov_policy == "unk" else []
    heldout_texts: list[str] = []
    with steps.step("choosing the deployment vocabulary"):
        corpus = read_corpora(options.corpora, options.text_field)
        selection = corpus if corpus is None or not options.measure else split_heldout(corpus, heldout_texts)
        cut = options.coverage if options.coverage is not None else FALLBACK_COVERAGE
        effect = None
        if options.rank == "effect":
            effect = row_effects(model.embedding, model.layers[0].weight if len(model.layers) > 1 else None)
        vocab_options = VocabOptions(coverage=cut, top=options.top, keep_words=options.keep_words, effect=effect)
        plan = plan_vocab(model.vocab, Tokenizer(model.tokenizer), selection, vocab_options, always)
        if 0 < len(heldout_texts) < MIN_HELDOUT_TEXTS and options.target_agreement is None:
            # too few texts to measure anything: every text ranks rows and the fixed rules apply
            heldout_texts = []
            plan = plan_vocab(model.vocab, Tokenizer(model.tokenizer), read_corpora(options.corpora, options.text_field),
                              vocab_options, always)
    if plan.has_corpus and plan.known_tokens == 0:  # the cut would keep one arbitrary row: a useless bundle
        raise PackError(f"the corpus ({plan.corpus_texts + len(heldout_texts):,} texts, {plan.corpus_tokens:,} tokens "
                        "outside the held-out slice) holds no token the model knows; check the file, --text-field "
                        f"({options.text_field!r}) and that the corpus is from the model's domain, or pack without "
                        "--corpus to keep every row")
    # the envelope options are visible in the manifest's `unknown` field itself (its buckets and absent list)
    pack_record = {k: (list(v) if isinstance(v, tuple) else v) for k, v in asdict(options).items() if k != "envelope"}
    # names and digests: a changed corpus changes the manifest even when the selection stays the same
    pack_record["corpora"] = [{"name": Path(p).name, "sha256": file_sha256(p)} for p in options.corpora]
    return Prepared(model, source, plan, policies, heldout_texts, pack_record, options)


def pack_model(model_dir: str | os.PathLike, out: str | os.PathLike | None, options: PackOptions = PackOptions(),
               steps: Steps | None = None) -> PackResult:
    """Pack a float model directory into a bundle at `out` (None: only build the bytes).

    With a corpus, a held-out slice (heldout.py) measures the candidates; the rows, the policy (`auto`) and,
    for a target or the measured default, the fold are chosen by that measurement. Only the chosen bundle is
    built in full and written."""
    steps = steps or Steps(6, quiet=True)
    prep = prepare_pack(model_dir, options, steps)
    model, plan, heldout_texts = prep.model, prep.plan, prep.heldout_texts
    fold_rule = "yes" if should_fold(model.embedding.shape[1], model.layers, options.fold) else "no"
    if heldout_texts and options.quantize:
        with steps.step(f"measuring candidates on {len(heldout_texts):,} held-out texts"):
            searcher = prep.searcher(HeldOut(model, plan, heldout_texts, envelope=options.envelope))
            plan, chosen, choice = _choose(model, plan, options, prep.policies, searcher, prep.build, fold_rule)
        policy, fold_mode = chosen.candidate.policy, "yes" if chosen.candidate.folded else "no"
    else:
        if options.target_agreement is not None:
            raise PackError(f"the corpus holds no text in the held-out slice ({plan.corpus_texts:,} texts, about "
                            f"1 in 7 is held out); --target-agreement needs a larger corpus, or use --coverage / --top")
        policy, fold_mode = resolve_policy(model, options.pruned), fold_rule
        chosen, choice = None, _describe_cut(plan, options)
        if options.max_bytes is not None:
            with steps.step(f"fitting the byte budget ({options.max_bytes:,} bytes)"):
                plan = _fit_budget(model, plan, options.max_bytes, fold_mode, options.quantize,
                                   lambda p: prep.build(p, policy, fold_mode))
    measured = None if chosen is None else measured_record(chosen, choice, plan, len(heldout_texts))
    if heldout_texts and options.max_bytes is None:  # measured without them; the bundle lists their tokens too
        plan = count_absent(plan, model.vocab, Tokenizer(model.tokenizer), heldout_texts)
    with steps.step("quantising, folding and exporting the graph"):
        data, breakdown, folded, rows, width = prep.build(plan, policy, fold_mode, measured)
    with steps.step("verifying the bundle with the runtime reader"):
        decode_bundle(data, "packed bundle")
    if chosen is not None:
        chosen = replace(chosen, bytes=len(data))
    path = None
    if out is not None:
        with steps.step(f"writing {out}"):
            path = write_atomic(out, data)
    return PackResult(path, data, plan, policy, folded, rows, width, len(model.vocab), prep.source["bytes"], breakdown,
                      chosen, len(heldout_texts), choice)


def measured_record(measure: Measure | None, choice: str, plan: VocabPlan, texts: int) -> dict:
    """The manifest's record of the measurement (in `selection`); with no measure yet, a blank of the same
    encoded size (for fitting a byte budget before the figures are known)."""
    figures = {"agreement": 0.0, "agreement_low": 0.0, "mean_abs_prob_diff": 0.0, "certified_share": 0.0, "texts": texts}
    if measure is not None:
        figures = {k: v for k, v in measure.to_dict().items() if k in figures}
    return {"heldout": figures, "choice": choice, "selection_texts": plan.corpus_texts}


def _describe_cut(plan: VocabPlan, options: PackOptions) -> str:
    if not plan.has_corpus:
        return "no corpus: every reachable row"
    if not options.measure and options.coverage is None and options.top is None and options.max_bytes is None:
        return f"measurement off: coverage {FALLBACK_COVERAGE}"
    if options.max_bytes is not None:
        return f"--max-bytes {options.max_bytes}"
    if options.top is not None:
        return f"--top {options.top}"
    if options.coverage is not None:
        return f"--coverage {options.coverage}"
    return (f"corpus too small to hold out a slice (under {MIN_HELDOUT_TEXTS} held-out texts): "
            f"coverage {FALLBACK_COVERAGE}")


def _choose(model: FloatModel, plan: VocabPlan, options: PackOptions, policies: tuple[str, ...], searcher: Searcher,
            build, fold_rule: str) -> tuple[VocabPlan, Measure, str]:
    """The rows, policy and fold to build, by measurement on the held-out slice; (plan, its measure, the rule)."""
    folded_rule = fold_rule == "yes"
    if options.max_bytes is not None:  # exact fit per policy, then the policy that measures best
        rule = f"--max-bytes {options.max_bytes}"
        # fitted with the manifest's held-out entry in place: its figures are floats, always 9 bytes in msgpack
        blank = measured_record(None, rule, plan, len(searcher.heldout))
        fits = {p: _fit_budget(model, plan, options.max_bytes, fold_rule, True,
                               lambda q, p=p: build(q, p, fold_rule, blank)) for p in policies}
        best = searcher.best(searcher.measure(Candidate(fits[p].keep, p, folded_rule)) for p in policies)
        return fits[best.candidate.policy], best, rule
    if options.top is not None or options.coverage is not None:  # rows fixed: the policy that measures best
        best = searcher.best(searcher.measure(Candidate(plan.keep, p, folded_rule)) for p in policies)
        rule = f"--top {options.top}" if options.top is not None else f"--coverage {options.coverage}"
        return plan, best, rule + (" (policy by held-out agreement)" if len(policies) > 1 else "")
    combos = [(p, f) for f in candidate_folds(model, options.fold, True) for p in policies]
    if options.target_agreement is not None:  # met by the 90% lower bound: the promise carries to unseen texts
        threshold, rule = options.target_agreement, f"--target-agreement {options.target_agreement}"
    else:  # the measured default: within DEFAULT_LOSS of keeping every reachable row
        full = searcher.best(searcher.measure(Candidate(len(plan.ranked_rows), p, f)) for p, f in combos)
        threshold = full.agreement - DEFAULT_LOSS
        rule = (f"default: smallest within {DEFAULT_LOSS * 100:g} pt of every row's held-out agreement "
                f"({full.agreement:.2%})")
    target = options.target_agreement is not None
    found = searcher.smallest(combos, threshold, bound=target)
    if found is None:
        for p, f in combos:  # the best figure within reach: every reachable row
            searcher.measure(Candidate(len(plan.ranked_rows), p, f))
        best = searcher.best(searcher.measured.values())
        raise TargetError(
            f"no candidate reaches held-out agreement {threshold:.2%} (90% lower bound, {len(searcher.heldout):,} "
            f"held-out texts): the best is {best.agreement:.2%}, lower bound {best.agreement_low:.2%} "
            f"({best.candidate.keep:,} rows, pruned {best.candidate.policy}, "
            f"{'folded' if best.candidate.folded else 'not folded'}, about {best.bytes:,} bytes); lower "
            "--target-agreement, or give more corpus texts from the deployment; no bundle written")
    return plan.with_keep(found.candidate.keep), found, rule
