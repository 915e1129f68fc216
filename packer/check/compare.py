"""`danpack check` figures: the packed bundle against its float original on one evaluation set.

Both models classify the same texts: the float original through the reference numpy
forward pass over its full float32 vocabulary, the bundle through `runtime.load`. The
figures are a flat dict (`CheckResult.figures`, keys described in `FIGURES`), so a later
figure is one more key and one more line in `FIGURES`. docs/check.md defines each figure.
"""

from __future__ import annotations

import math
import os
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from danpack import runtime
from danpack.check import BOOTSTRAP_SEED
from danpack.check.errors import CheckError
from danpack.check.latency import LatencyOptions, measure_check_latency
from danpack.files import file_sha256
from danpack.model import FloatModel, load_json_text, load_model, model_bytes, model_digest
from danpack.pack.quantize import dequantize_rows
from danpack.progress import Steps
from danpack.runtime.tokenize import Tokenizer
from danpack.textfile import iter_numbered_records

REFERENCE_TOLERANCE = 1e-5  # float reading vs the framework's probabilities: float32 rounding is ~1e-7
SHOWN_BAD_LABELS = 5  # bad eval labels listed (with line numbers) before exit 2
KL_EPSILON = 1e-12  # added to both distributions before the log: keeps KL finite when a probability underflows
DEFAULT_LABEL_FIELD = "label"  # the label field looked for when --label-field is not given


@dataclass(frozen=True)
class FigureInfo:
    """How a figure is named and shown."""

    title: str  # short human name
    unit: str  # share (0..1, shown as %), points, count, bytes, ratio, ms, rate, prob, nats, p


# Every figure of `CheckResult.figures`; None in the dict means "not measured" (no labels, --no-latency).
FIGURES: dict[str, FigureInfo] = {
    "texts": FigureInfo("texts evaluated", "count"),
    "accuracy_float": FigureInfo("accuracy of the float original", "share"),
    "accuracy_bundle": FigureInfo("accuracy of the bundle", "share"),
    "accuracy_drop_points": FigureInfo("accuracy drop (float - packed)", "points"),
    "accuracy_drop_ci_low": FigureInfo("drop, paired bootstrap interval low", "points"),
    "accuracy_drop_ci_high": FigureInfo("drop, paired bootstrap interval high", "points"),
    "accuracy_drop_exact_low": FigureInfo("drop, exact conditional interval low", "points"),
    "accuracy_drop_exact_high": FigureInfo("drop, exact conditional interval high", "points"),
    "only_float_correct": FigureInfo("texts only the float original gets right", "count"),
    "only_bundle_correct": FigureInfo("texts only the bundle gets right", "count"),
    "mcnemar_p": FigureInfo("exact McNemar p-value", "p"),
    "agreement": FigureInfo("prediction agreement", "share"),
    "disagreements": FigureInfo("texts predicted differently", "count"),
    "mean_abs_prob_diff": FigureInfo("mean probability change", "prob"),
    "max_abs_prob_diff": FigureInfo("largest probability change", "prob"),
    "mean_kl": FigureInfo("mean KL(float || packed)", "nats"),
    "max_kl": FigureInfo("largest KL(float || packed)", "nats"),
    "tokens": FigureInfo("tokens in the evaluation set", "count"),
    "float_known_tokens": FigureInfo("tokens the float original knows", "count"),
    "pruned_tokens": FigureInfo("known tokens the bundle pruned", "count"),
    "pruned_token_share": FigureInfo("share of known tokens pruned", "share"),
    "texts_with_pruned_share": FigureInfo("share of texts with a pruned token", "share"),
    "certified_share": FigureInfo("texts certified by the drift bound", "share"),
    "certified_share_of_covered": FigureInfo("certified among texts whose tokens are all kept", "share"),
    "certified_share_of_uncovered": FigureInfo("certified among texts with a token the bundle does not know", "share"),
    "runtime_certified_share": FigureInfo("texts the device certifies (packed margin)", "share"),
    "certified_changes": FigureInfo("certified texts whose prediction changed", "count"),
    "bound_premise_failing_rows": FigureInfo("kept rows outside the bound's premise", "count"),
    "bundle_bytes": FigureInfo("bundle size", "bytes"),
    "float_bytes": FigureInfo("float original size", "bytes"),
    "size_ratio": FigureInfo("size ratio (float / bundle)", "ratio"),
    "latency_p50_ms_float": FigureInfo("single-text p50, float ONNX", "ms"),
    "latency_p95_ms_float": FigureInfo("single-text p95, float ONNX", "ms"),
    "latency_p50_ms_bundle": FigureInfo("single-text p50, bundle", "ms"),
    "latency_p95_ms_bundle": FigureInfo("single-text p95, bundle", "ms"),
    "latency_ratio": FigureInfo("single-text p50 ratio (bundle / float)", "ratio"),
    "latency_p95_ratio": FigureInfo("single-text p95 ratio (bundle / float)", "ratio"),
    "throughput_float": FigureInfo("batched throughput, float ONNX", "rate"),
    "throughput_bundle": FigureInfo("batched throughput, bundle", "rate"),
    "throughput_ratio": FigureInfo("throughput ratio (bundle / float)", "ratio"),
    # with --reference-probs: the user's framework (PyTorch, ...) as the reference
    "reference_accuracy": FigureInfo("accuracy of the framework's outputs", "share"),
    "reference_accuracy_drop_points": FigureInfo("accuracy drop (framework - bundle)", "points"),
    "reference_agreement": FigureInfo("prediction agreement, framework vs bundle", "share"),
    "reference_float_agreement": FigureInfo("prediction agreement, framework vs float reading", "share"),
    "reference_float_max_abs_diff": FigureInfo("largest probability difference, framework vs float reading", "prob"),
    "reference_float_mismatches": FigureInfo("texts where the float reading differs from the framework", "count"),
}
REFERENCE_KEYS = tuple(k for k in FIGURES if k.startswith("reference_"))
LATENCY_KEYS = tuple(k for k in FIGURES if k.startswith(("latency_", "throughput_")))
LABEL_KEYS = tuple(k for k in FIGURES if k.startswith(("accuracy_", "only_", "mcnemar")))


@dataclass(frozen=True)
class CheckOptions:
    """What `danpack check` can be told about the evaluation (thresholds live in packer.verdict)."""

    text_field: str = "text"  # field (JSONL) or column (CSV/TSV) holding the text
    label_field: str | None = None  # None: "label" when the file has it, else an unlabelled check
    backend: str = "onnxruntime"  # runtime backend the bundle is run with
    batch_size: int = 256  # texts per forward call while evaluating (bounds memory)
    bootstrap: int = 2000  # paired bootstrap resamples for the accuracy-drop interval
    seed: int = BOOTSTRAP_SEED  # fixed: the same inputs always give the same bootstrap interval
    confidence: float = 0.95  # level of both intervals of the accuracy drop
    show_disagreements: int = 5  # texts listed where the two predictions differ
    tokens_per_disagreement: int = 8  # tokens listed per such text, largest mean shift first
    allow_other_reference: bool = False  # compare with a float model the bundle was not packed from (a warning)
    label_map: tuple[tuple[str, str], ...] = ()  # (the eval file's spelling, the model's label) pairs
    reference_probs: str | None = None  # JSONL of the framework's own outputs, one record per eval record
    reference_tolerance: float = REFERENCE_TOLERANCE  # largest probability difference counted as agreeing
    token_sample: str | None = None  # JSONL of texts and the user's tokens or ids, reproduced before the check

    def __post_init__(self) -> None:
        if self.batch_size < 1:
            raise CheckError(f"batch size {self.batch_size} must be at least 1")
        if self.bootstrap < 100:
            raise CheckError(f"bootstrap resamples {self.bootstrap} must be at least 100 (e.g. 2000)")
        if not 0.5 <= self.confidence < 1.0:
            raise CheckError(f"confidence {self.confidence} must be in [0.5, 1), e.g. 0.95")
        if self.show_disagreements < 0:
            raise CheckError(f"--show-disagreements {self.show_disagreements} must be 0 or more")


@dataclass(frozen=True)
class EvalSet:
    """The evaluation texts, their labels (None when unlabelled) and where they came from."""

    texts: tuple[str, ...]
    labels: tuple[str, ...] | None
    path: str
    sha256: str
    text_field: str
    label_field: str | None


@dataclass(frozen=True)
class CheckResult:
    """Everything the reports show: flat figures, per-class recall, disagreements, inputs, warnings."""

    figures: dict  # key -> float | int | None, keys of FIGURES
    per_class: list  # [{label, support, recall_float, recall_bundle}] (empty when unlabelled)
    disagreements: list  # top texts where the two predictions differ (see docs/check.md)
    inputs: dict  # bundle / reference / eval descriptions (paths, sha256, labels, sizes)
    settings: dict  # options that shaped the figures (seed, resamples, epsilon, latency settings)
    warnings: tuple[str, ...] = ()


# ---- statistics (exact binomial arithmetic in log space; no scipy at run time) -----------------

def _log_binom_pmf(n: int, p: float) -> np.ndarray:
    """(n + 1,) log P(X = k) for X ~ Binomial(n, p), 0 < p < 1."""
    k = np.arange(n + 1)
    log_fact = np.array([math.lgamma(i + 1.0) for i in range(n + 1)])  # (n + 1,)
    log_choose = log_fact[n] - log_fact - log_fact[::-1]
    return log_choose + k * math.log(p) + (n - k) * math.log1p(-p)


def _binom_cdf(k: int, n: int, p: float) -> float:
    """P(X <= k) for X ~ Binomial(n, p), exact up to float rounding."""
    if k < 0:
        return 0.0
    if k >= n:
        return 1.0
    if p <= 0.0:
        return 1.0
    if p >= 1.0:
        return 0.0
    logs = _log_binom_pmf(n, p)[: k + 1]
    top = logs.max()
    return float(min(1.0, math.exp(top) * np.exp(logs - top).sum()))


def mcnemar_exact_p(only_a: int, only_b: int) -> float:
    """Exact McNemar test: two-sided binomial p-value of the discordant split against 1/2.

    With p = 1/2 the binomial is symmetric, so the two-sided p-value (the mass of outcomes no
    more likely than the one observed) is 2 * P(X <= min(b, c)), capped at 1.
    """
    n = only_a + only_b
    if n == 0:
        return 1.0
    return min(1.0, 2.0 * _binom_cdf(min(only_a, only_b), n, 0.5))


def clopper_pearson(k: int, n: int, confidence: float = 0.95) -> tuple[float, float]:
    """Exact (Clopper-Pearson) interval for a binomial proportion k / n, by bisection on the CDF."""
    if n <= 0:
        return 0.0, 1.0
    alpha = 1.0 - confidence

    def solve(f: Callable[[float], float]) -> float:  # f increasing in p, root in (0, 1)
        lo, hi = 0.0, 1.0
        for _ in range(80):
            mid = (lo + hi) / 2
            lo, hi = (mid, hi) if f(mid) < 0 else (lo, mid)
        return (lo + hi) / 2

    # lower: P(X >= k | p) = alpha / 2 ; upper: P(X <= k | p) = alpha / 2
    low = 0.0 if k == 0 else solve(lambda p: (1.0 - _binom_cdf(k - 1, n, p)) - alpha / 2)
    high = 1.0 if k == n else solve(lambda p: alpha / 2 - _binom_cdf(k, n, p))
    return low, high


def exact_drop_interval(only_float: int, only_packed: int, texts: int,
                        confidence: float = 0.95) -> tuple[float, float]:
    """Interval of the accuracy drop in points, exact conditional on the number of discordant texts.

    The drop is (b - c) / N = d (2 pi - 1) / N with d = b + c discordant texts and pi the share
    of them only the float original gets right; Clopper-Pearson on pi, mapped through that line.
    """
    d = only_float + only_packed
    if d == 0 or texts == 0:
        return 0.0, 0.0
    low, high = clopper_pearson(only_float, d, confidence)
    scale = 100.0 * d / texts
    return scale * (2 * low - 1), scale * (2 * high - 1)


def bootstrap_drop_interval(only_float: int, only_packed: int, texts: int, resamples: int, seed: int,
                            confidence: float = 0.95) -> tuple[float, float]:
    """Paired bootstrap percentile interval of the accuracy drop in points.

    Resampling N texts with replacement and taking mean(correct_float - correct_packed) depends
    only on how many drawn texts are float-only-right (+1) and packed-only-right (-1), so a
    multinomial draw of those counts is the same bootstrap, at a cost independent of N.
    """
    if texts == 0:
        return 0.0, 0.0
    rng = np.random.default_rng(seed)
    shares = [only_float / texts, only_packed / texts]
    counts = rng.multinomial(texts, shares + [max(0.0, 1.0 - sum(shares))], size=resamples)  # (R, 3)
    drops = 100.0 * (counts[:, 0] - counts[:, 1]) / texts  # (R,)
    tail = 100.0 * (1.0 - confidence) / 2
    low, high = np.percentile(drops, [tail, 100.0 - tail])
    return float(low), float(high)


def kl_divergence(p: np.ndarray, q: np.ndarray, eps: float = KL_EPSILON) -> np.ndarray:
    """(B, C), (B, C) -> (B,) KL(p || q) in nats, with `eps` added to both before the log."""
    p64, q64 = p.astype(np.float64), q.astype(np.float64)
    kl = (p64 * (np.log(p64 + eps) - np.log(q64 + eps))).sum(axis=1)  # (B,)
    return np.maximum(kl, 0.0)  # eps can push an exact 0 a hair below zero


# ---- inputs -------------------------------------------------------------------------------------

def parse_label_map(spec: str | None, labels: Sequence[str]) -> tuple[tuple[str, str], ...]:
    """--label-map: a file (JSON object, or one `spelling=label` / tab-separated pair per line) or inline
    `a=b,c=d`; every target must be one of the model's labels."""
    if not spec:
        return ()
    path = Path(spec)
    if path.is_file():
        try:
            text = path.read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError) as e:
            raise CheckError(f"--label-map {path}: cannot be read as UTF-8 text ({e})") from e
        where = str(path)
        if text.lstrip().startswith("{"):  # bounded as every JSON input: a deep or huge file is an error, not a crash
            pairs = [(str(k), v) for k, v in load_json_text(text, path, CheckError).items()]
        else:
            pairs = []
            for number, line in enumerate(text.splitlines(), start=1):
                if not line.strip():
                    continue
                key, sep, value = line.partition("\t") if "\t" in line else line.partition("=")
                if not sep:
                    raise CheckError(f"{path}:{number}: expected `spelling=label` (or a tab between them), "
                                     f"found {line[:60]!r}")
                pairs.append((key.strip(), value.strip()))
    else:
        where = f"--label-map {spec!r}"
        pairs = []
        for item in spec.split(","):
            key, sep, value = item.partition("=")
            if not sep:
                raise CheckError(f"{where}: item {item!r} is not `spelling=label`; e.g. --label-map 0=ham,1=spam "
                                 "(or give a file)")
            pairs.append((key.strip(), value.strip()))
    wrong = [(k, v) for k, v in pairs if v not in labels]
    if wrong:
        raise CheckError(f"{where}: maps {wrong[0][0]!r} to {wrong[0][1]!r}, which is not one of the model's labels "
                         f"{list(labels)}")
    return tuple(pairs)


def resolve_label(value: object, labels: Sequence[str], label_map: dict[str, str]) -> str | None:
    """A label as a user wrote it -> the model's label, or None. An integer (or, when no label is spelled with
    digits, a string of digits, as in CSV) indexes the model's labels in output order."""
    if isinstance(value, bool) or not isinstance(value, (int, str)):
        return None
    key = str(value)
    if key in label_map:
        return label_map[key]
    if isinstance(value, str) and value in labels:
        return value
    digits = isinstance(value, int) or (value.isdecimal() and value.isascii()
                                        and not any(label.isdecimal() for label in labels))
    if digits and 0 <= int(value) < len(labels):
        return labels[int(value)]
    return None


def _near_miss(value: object, labels: Sequence[str]) -> str:
    """A hint for one bad label: a case or spacing difference, or the index range."""
    if isinstance(value, int) and not isinstance(value, bool):
        return f"integer labels index the model's labels 0..{len(labels) - 1}"
    if isinstance(value, str):
        close = [label for label in labels if label.casefold() == value.strip().casefold()]
        if close:
            return f"did you mean {close[0]!r}? pass --label-map '{value}={close[0]}'"
    return ""


def report_bad_labels(path: Path, bad: list[tuple[int, object]], labels: Sequence[str], total: int) -> str:
    """One message for every bad label: the count, the first few with line numbers, and hints."""
    lines = [f"{path}: {len(bad):,} of {total:,} records have a label that is not one of the model's labels "
             f"{list(labels)} (integers index them in that order):"]
    for line, value in bad[:SHOWN_BAD_LABELS]:
        hint = _near_miss(value, labels)
        lines.append(f"  line {line}: {value!r}" + (f" ({hint})" if hint else ""))
    counts: dict[str, int] = {}
    for _, value in bad:
        counts[repr(value)] = counts.get(repr(value), 0) + 1
    lines.append("spellings found: " + ", ".join(f"{k} x{v}" for k, v in sorted(counts.items(), key=lambda kv: -kv[1])[:8]))
    lines.append("fix the labels, map them with --label-map 'yours=model,...', or pass the matching --reference model")
    return "\n".join(lines)


def read_eval_set(path: str | os.PathLike, labels: Sequence[str], text_field: str = "text",
                  label_field: str | None = None, label_map: Sequence[tuple[str, str]] = ()) -> EvalSet:
    """Read texts (and labels, when the file has them) from JSONL, CSV or TSV.

    Without `label_field`, the field "label" is used when the first record has it. Every record
    must then have a label naming one of `labels` (after `label_map`), or an integer indexing them;
    every bad label is counted and the first few reported together.
    """
    path = Path(path)
    mapping = dict(label_map)
    texts: list[str] = []
    gold: list[str] = []
    bad: list[tuple[int, object]] = []
    field_name = label_field
    for number, (line, record) in enumerate(iter_numbered_records(path, text_field), start=1):
        if number == 1:
            if label_field is None:
                field_name = DEFAULT_LABEL_FIELD if DEFAULT_LABEL_FIELD in record else None
            elif label_field not in record:
                raise CheckError(f"{path}: record 1 has no field {label_field!r} (fields: {sorted(record)}); "
                                 "name the label field with --label-field, or leave it out for an unlabelled check")
        texts.append(record[text_field])
        if field_name is None:
            continue
        if field_name not in record:
            raise CheckError(f"{path}:{line}: record {number} has no field {field_name!r} but record 1 has one; "
                             "label every record or none")
        value = resolve_label(record[field_name], labels, mapping)
        if value is None:
            bad.append((line, record[field_name]))
        gold.append(value)
    if not texts:
        raise CheckError(f"{path}: holds no records; an evaluation set needs at least one text")
    if bad:
        raise CheckError(report_bad_labels(path, bad, labels, len(texts)))
    return EvalSet(tuple(texts), tuple(gold) if field_name is not None else None, str(path),
                   file_sha256(path), text_field, field_name)


@dataclass(frozen=True)
class FrameworkOutputs:
    """The user's framework's own outputs on the eval texts: probabilities (model label order) or labels."""

    probs: np.ndarray | None  # (N, C) float64, or None when only labels were given
    predicted: np.ndarray  # (N,) int64 label index (argmax of probs when given)
    path: str
    sha256: str


def read_reference_probs(path: str | os.PathLike, texts: Sequence[str], labels: Sequence[str],
                         label_map: Sequence[tuple[str, str]] = ()) -> FrameworkOutputs:
    """One JSONL record per eval record, same order: {"probs": [...]} in the model's label order, or
    {"label": ...}; a "text" field, when present, must be the eval record's text."""
    path = Path(path)
    mapping = dict(label_map)
    rows: list[list[float] | None] = []
    predicted: list[int] = []
    number = 0
    for line_no, record in iter_numbered_records(path, None, fmt="jsonl"):  # the one text-file reader
        if "probs" not in record and "label" not in record:
            raise CheckError(f"{path}:{line_no}: expected an object with 'probs' (the model's probabilities in "
                             f"label order {list(labels)}) or 'label'")
        if number < len(texts) and isinstance(record.get("text"), str) and record["text"] != texts[number]:
            raise CheckError(f"{path}:{line_no}: text {record['text'][:60]!r} is not eval record {number + 1}'s "
                             f"text {texts[number][:60]!r}; write one record per eval record, in the same order")
        if "probs" in record:
            p = record["probs"]
            if (not isinstance(p, list) or len(p) != len(labels)
                    or not all(isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x)
                               for x in p)):
                raise CheckError(f"{path}:{line_no}: 'probs' must be {len(labels)} finite numbers (label order "
                                 f"{list(labels)}), found {str(p)[:80]}")
            if abs(sum(p) - 1.0) > 1e-3 or min(p) < 0:
                raise CheckError(f"{path}:{line_no}: 'probs' sum to {sum(p):.4g}; give probabilities "
                                 "(softmax of the logits), not logits")
            rows.append([float(x) for x in p])
            predicted.append(int(np.argmax(p)))
        else:
            value = resolve_label(record["label"], labels, mapping)
            if value is None:
                hint = _near_miss(record["label"], labels)
                raise CheckError(f"{path}:{line_no}: label {record['label']!r} is not one of the model's labels "
                                 f"{list(labels)}" + (f" ({hint})" if hint else ""))
            rows.append(None)
            predicted.append(list(labels).index(value))
        number += 1
    if number != len(texts):
        raise CheckError(f"{path}: has {number:,} records but the evaluation set has {len(texts):,}; write one "
                         "record per eval record, in the same order")
    probs = np.array(rows, dtype=np.float64) if all(r is not None for r in rows) else None  # (N, C)
    return FrameworkOutputs(probs, np.array(predicted, dtype=np.int64), str(path), file_sha256(path))


# ---- running both models ------------------------------------------------------------------------

def run_batched(predict: Callable[[Sequence[str]], np.ndarray], texts: Sequence[str], batch_size: int,
                steps: Steps | None = None, what: str = "") -> np.ndarray:
    """(N,) texts -> (N, C) probabilities, `batch_size` texts per call (progress every ~10%)."""
    out = []
    every = max(1, len(texts) // batch_size // 10)
    for i, start in enumerate(range(0, len(texts), batch_size)):
        out.append(np.asarray(predict(texts[start : start + batch_size]), dtype=np.float32))  # (b, C)
        if steps is not None and len(texts) > 20 * batch_size and (i + 1) % every == 0:
            steps.note(f"{what}: {min(len(texts), start + batch_size):,} / {len(texts):,} texts")
    return np.concatenate(out, axis=0)  # (N, C)


def align_labels(bundle_labels: Sequence[str], model_labels: Sequence[str], bundle_path: str) -> np.ndarray:
    """Column order taking the bundle's outputs into the float model's label order, matched by name."""
    if sorted(bundle_labels) != sorted(model_labels):
        raise CheckError(f"{bundle_path}: the bundle's labels {list(bundle_labels)} are not the float model's "
                         f"labels {list(model_labels)}; pass the --reference model this bundle was packed from")
    return np.array([list(bundle_labels).index(label) for label in model_labels], dtype=np.int64)  # (C,)


# ---- figures ------------------------------------------------------------------------------------

def accuracy_figures(gold: np.ndarray, pred_float: np.ndarray, pred_packed: np.ndarray,
                     options: CheckOptions) -> dict:
    """Accuracy of each, the drop in points, its two intervals and the exact McNemar p-value."""
    n = len(gold)
    right_f, right_p = pred_float == gold, pred_packed == gold  # (N,) bool
    only_f = int(np.count_nonzero(right_f & ~right_p))
    only_p = int(np.count_nonzero(~right_f & right_p))
    acc_f, acc_p = float(right_f.mean()), float(right_p.mean())
    boot = bootstrap_drop_interval(only_f, only_p, n, options.bootstrap, options.seed, options.confidence)
    exact = exact_drop_interval(only_f, only_p, n, options.confidence)
    return {
        "accuracy_float": acc_f,
        "accuracy_bundle": acc_p,
        "accuracy_drop_points": 100.0 * (only_f - only_p) / n,  # = 100 (acc_f - acc_p), exactly
        "accuracy_drop_ci_low": boot[0],
        "accuracy_drop_ci_high": boot[1],
        "accuracy_drop_exact_low": exact[0],
        "accuracy_drop_exact_high": exact[1],
        "only_float_correct": only_f,
        "only_bundle_correct": only_p,
        "mcnemar_p": mcnemar_exact_p(only_f, only_p),
    }


def agreement_figures(probs_float: np.ndarray, probs_packed: np.ndarray) -> dict:
    """Agreement of the argmax, and how far the probabilities moved (per text: max over classes)."""
    agree = probs_float.argmax(axis=1) == probs_packed.argmax(axis=1)  # (N,)
    moved = np.abs(probs_float.astype(np.float64) - probs_packed).max(axis=1)  # (N,)
    kl = kl_divergence(probs_float, probs_packed)  # (N,)
    return {
        "agreement": float(agree.mean()),
        "disagreements": int(np.count_nonzero(~agree)),
        "mean_abs_prob_diff": float(moved.mean()),
        "max_abs_prob_diff": float(moved.max()),
        "mean_kl": float(kl.mean()),
        "max_kl": float(kl.max()),
    }


def per_class_recall(gold: np.ndarray, pred_float: np.ndarray, pred_packed: np.ndarray,
                     labels: Sequence[str]) -> list[dict]:
    """Recall of each label for both models (None for a label absent from the set)."""
    rows = []
    for c, label in enumerate(labels):
        mask = gold == c
        support = int(mask.sum())
        rows.append({
            "label": label,
            "support": support,
            "recall_float": float((pred_float[mask] == c).mean()) if support else None,
            "recall_bundle": float((pred_packed[mask] == c).mean()) if support else None,
        })
    return rows


@dataclass(frozen=True)
class TokenView:
    """Each text's tokens as the float original sees them, and which ones the bundle pruned."""

    tokens: list  # per text: tokens the float model knows (entering its mean), in order
    counts: np.ndarray  # (N,) tokens entering the float mean (its n)
    pruned: list  # per text: set of tokens the float model knows and the bundle does not


def view_tokens(model: FloatModel, bundle_vocab: Sequence[str], texts: Sequence[str]) -> tuple[TokenView, dict]:
    """Tokenize with the float model's tokenizer; count tokens known to it and pruned from the bundle."""
    encoder = model.encoder()
    float_index, bundle_index = encoder.index, set(bundle_vocab)
    total = known = pruned = with_pruned = 0
    seen, counts, pruned_sets = [], np.zeros(len(texts), np.int64), []
    for i, text in enumerate(texts):
        tokens = encoder.tokenizer.tokenize(text)
        kept = [t for t in tokens if t in float_index]
        gone = [t for t in kept if t not in bundle_index]
        total += len(tokens)
        known += len(kept)
        pruned += len(gone)
        with_pruned += bool(gone)
        seen.append(kept)
        counts[i] = len(tokens) if encoder.oov_id is not None else len(kept)  # tokens in the float mean
        pruned_sets.append(set(gone))
    figures = {
        "tokens": total,
        "float_known_tokens": known,
        "pruned_tokens": pruned,
        "pruned_token_share": pruned / known if known else 0.0,
        "texts_with_pruned_share": with_pruned / len(texts),
    }
    return TokenView(seen, counts, pruned_sets), figures


class MeanShift:
    """How far each token's packing moved a text's mean vector, in the bundle table's space.

    For a kept token: ||float row - dequantised bundle row|| / n; for a pruned token:
    ||float row|| / n under the skip policy, ||float row - dequantised OOV row|| / n under unk
    or rest; n is the number of tokens in the float original's mean. When the bundle folds the
    first hidden layer, float rows are mapped through that layer's weight first.
    """

    def __init__(self, model: FloatModel, bundle: runtime.Bundle) -> None:
        self.model = model
        self.float_index = {t: i for i, t in enumerate(model.vocab)}
        self.bundle_index = {t: i for i, t in enumerate(bundle.vocab)}
        t = bundle.tensors
        self.table, self.scales = t["table"], t.get("scales") if t["table"].dtype == np.int8 else None
        self.project = model.layers[0].weight.T if bundle.manifest["table"].get("folded") else None  # (D, H1)
        self.oov_row = bundle.oov_row
        width = model.embedding.shape[1] if self.project is None else self.project.shape[1]
        self.usable = self.table.shape[1] == width

    def _bundle_row(self, row: int) -> np.ndarray:
        r = self.table[row : row + 1]  # (1, W)
        if self.scales is None:
            return r[0].astype(np.float32)
        return dequantize_rows(r, self.scales[row : row + 1])[0]  # (W,)

    def _float_row(self, token: str) -> np.ndarray:
        row = self.model.embedding[self.float_index[token]]  # (D,)
        return row if self.project is None else row @ self.project  # (W,)

    def shifts(self, tokens: Sequence[str], pruned: set, n: int) -> list[dict]:
        """One entry per distinct known token: status and shift (largest first)."""
        if not self.usable or n == 0:
            return []
        out = []
        for token in dict.fromkeys(tokens):
            mult = tokens.count(token)
            f = self._float_row(token)
            if token in pruned:
                b = np.zeros_like(f) if self.oov_row is None else self._bundle_row(self.oov_row)
            else:
                b = self._bundle_row(self.bundle_index[token])
            shift = mult * float(np.linalg.norm(f.astype(np.float64) - b)) / n
            out.append({"token": token, "status": "pruned" if token in pruned else "kept", "count": mult,
                        "shift": shift})
        out.sort(key=lambda e: (-e["shift"], e["token"]))
        return out


def list_disagreements(texts, gold, labels, probs_float, probs_packed, view: TokenView, shift: MeanShift,
                       options: CheckOptions) -> list[dict]:
    """The texts where the argmax differs, the largest probability change first."""
    pf, pp = probs_float.argmax(axis=1), probs_packed.argmax(axis=1)  # (N,)
    moved = np.abs(probs_float.astype(np.float64) - probs_packed).max(axis=1)  # (N,)
    idx = np.flatnonzero(pf != pp)
    idx = idx[np.lexsort((idx, -moved[idx]))][: options.show_disagreements]  # largest change, then position
    out = []
    for i in idx.tolist():
        tokens = shift.shifts(view.tokens[i], view.pruned[i], int(view.counts[i]))
        out.append({
            "index": i,
            "text": texts[i],
            "label": None if gold is None else labels[gold[i]],
            "float": {"label": labels[pf[i]], "prob": float(probs_float[i, pf[i]])},
            "bundle": {"label": labels[pp[i]], "prob": float(probs_packed[i, pp[i]])},
            "max_abs_prob_diff": float(moved[i]),
            "pruned": sorted(view.pruned[i]),
            "tokens": tokens[: options.tokens_per_disagreement],
        })
    return out


# ---- the user's framework as the reference -----------------------------------------------------

DIAGNOSIS_TEXTS = 300  # differing texts (and as many agreeing ones) re-read under each candidate pipeline
DIAGNOSIS_EXAMPLES = 3  # example texts named in the diagnosis


def reference_figures(framework: FrameworkOutputs, probs_float: np.ndarray, probs_packed: np.ndarray,
                      gold: np.ndarray | None, tolerance: float) -> tuple[dict, np.ndarray]:
    """Bundle and float reading against the framework's outputs; also (N,) bool: float reading differs."""
    pred_f, pred_p = probs_float.argmax(axis=1), probs_packed.argmax(axis=1)  # (N,)
    figures = {"reference_agreement": float((pred_p == framework.predicted).mean()),
               "reference_float_agreement": float((pred_f == framework.predicted).mean()),
               "reference_float_max_abs_diff": None, "reference_accuracy": None,
               "reference_accuracy_drop_points": None}
    if framework.probs is not None:
        diff = np.abs(probs_float.astype(np.float64) - framework.probs).max(axis=1)  # (N,)
        differs = diff > tolerance
        figures["reference_float_max_abs_diff"] = float(diff.max())
    else:
        differs = pred_f != framework.predicted
    figures["reference_float_mismatches"] = int(np.count_nonzero(differs))
    if gold is not None:
        right_r, right_p = framework.predicted == gold, pred_p == gold
        figures["reference_accuracy"] = float(right_r.mean())
        figures["reference_accuracy_drop_points"] = 100.0 * float(right_r.mean() - right_p.mean())
    return figures, differs


def _matches(probs: np.ndarray, framework: FrameworkOutputs, idx: np.ndarray, tolerance: float) -> np.ndarray:
    """(K,) bool: the candidate's (K, C) probabilities agree with the framework on texts `idx`."""
    if framework.probs is not None:
        return np.abs(probs.astype(np.float64) - framework.probs[idx]).max(axis=1) <= tolerance
    return probs.argmax(axis=1) == framework.predicted[idx]


def _padding_model(model: FloatModel) -> tuple[FloatModel, str] | None:
    """The model with its dropped padding row back (a zero row) as the unknown-word row: how a pipeline that
    sends unknown words to the padding index reads text. None when conversion dropped no row."""
    dropped = (model.metadata.get("converted_from") or {}).get("dropped_rows") or []
    if not dropped:
        return None
    token = dropped[0].get("token") or "<pad>"
    if token in model.vocab:
        return None
    table = np.vstack([model.embedding, np.zeros((1, model.embedding.shape[1]), np.float32)])  # (V + 1, D)
    import dataclasses

    return dataclasses.replace(model, vocab=model.vocab + (token,), embedding=table, oov_policy="unk",
                               unk_token=token), token


def diagnose_reference(model: FloatModel, texts: Sequence[str], framework: FrameworkOutputs, differs: np.ndarray,
                       tolerance: float) -> list[str]:
    """Why danpack's float reading differs from the framework: the tokenizer, the unknown-word policy or the
    padding row, found by re-reading the differing texts under each pipeline danpack could have been told."""
    from danpack.pipeline import Pipeline, candidate_pipelines, first_difference, show_tokens

    bad = np.flatnonzero(differs)[:DIAGNOSIS_TEXTS]
    good = np.flatnonzero(~differs)[:DIAGNOSIS_TEXTS]
    idx = np.concatenate([bad, good])  # (K,)
    subset = [texts[i] for i in idx]
    current = Pipeline.of(model)
    out = [f"danpack's float reading differs from the framework's outputs on {int(differs.sum()):,} of "
           f"{len(texts):,} texts (tolerance {tolerance:g}); danpack reads text with {current.describe()}"]
    best, best_score = None, -1
    for cand in candidate_pipelines(current, model.vocab):
        if cand == current:
            continue
        score = int(_matches(cand.apply(model).predict_proba(subset), framework, idx, tolerance).sum())
        if score > best_score:
            best, best_score = cand, score
    padded = _padding_model(model)
    pad_score = -1
    if padded is not None:
        pad_score = int(_matches(padded[0].predict_proba(subset), framework, idx, tolerance).sum())
    tokenizer = Tokenizer(model.tokenizer)
    long = [i for i in bad if len(tokenizer.tokenize(texts[i])) >= model.tokenizer.max_tokens]
    if pad_score > best_score and pad_score == len(idx):
        out.append(f"likely cause: the padding row. Unknown words read as the dropped padding row "
                   f"{padded[1]!r} (a zero vector counted in the mean) reproduce the framework on all {len(idx):,} "
                   f"texts re-read; convert again with --padding-row none --oov unk --unk-token {padded[1]}")
        unknown = padded[0].encoder()
        for i in bad[:DIAGNOSIS_EXAMPLES]:
            words = [t for t in unknown.tokenizer.tokenize(texts[i]) if t not in unknown.index or t == padded[1]]
            out.append(f"  e.g. {texts[i][:80]!r}: unknown words {words[:8]}")
    elif best is not None and best_score > int(_matches(model.predict_proba(subset), framework, idx,
                                                        tolerance).sum()):
        causes = []
        if best.tokenizer != current.tokenizer:
            causes.append("the tokenizer")
        if (best.oov_policy, best.unk_token) != (current.oov_policy, current.unk_token):
            causes.append("the unknown-word policy")
        full = best_score == len(idx)
        out.append(f"likely cause: {' and '.join(causes)}. With {' '.join(best.changes_from(current))} danpack's "
                   f"float reading matches the framework on {best_score:,} of {len(idx):,} texts re-read"
                   + (" (all)" if full else "") + "; convert the model again with those options")
        here, there = current.encoder(model.vocab), best.encoder(model.vocab)
        for i in bad[:DIAGNOSIS_EXAMPLES]:
            ours, theirs = here.tokenizer.tokenize(texts[i]), there.tokenizer.tokenize(texts[i])
            if ours != theirs:
                at = first_difference(ours, theirs)
                out.append(f"  e.g. {texts[i][:80]!r}: danpack reads {show_tokens(ours, at, width=10)}, "
                           f"the fix reads {show_tokens(theirs, at, width=10)}")
            else:
                unknown = [t for t in ours if t not in here.index]
                out.append(f"  e.g. {texts[i][:80]!r}: unknown words {unknown[:8]} "
                           f"({'skipped' if current.oov_policy == 'skip' else 'read as ' + repr(current.unk_token)} "
                           f"by danpack, {'skipped' if best.oov_policy == 'skip' else 'read as ' + repr(best.unk_token)} "
                           "by the fix)")
    elif long:
        out.append(f"likely cause: text length. {len(long)} differing texts reach the tokenizer's max_tokens "
                   f"{model.tokenizer.max_tokens}, where danpack stops reading; raise --max-tokens")
    else:
        out.append("no preset, case, normalization, unknown-word policy or padding treatment reproduces the "
                   "framework: check that the eval file and --reference-probs are in the same order, that the "
                   "model averages over real tokens only (padding masked), and declare a custom --pattern")
    return out


CERTIFIED_KEYS = ("certified_share", "certified_share_of_covered", "certified_share_of_uncovered",
                  "runtime_certified_share", "certified_changes", "bound_premise_failing_rows")


def certified_figures(model: FloatModel, bundle, texts: Sequence[str], warnings: list[str]) -> dict:
    """The drift bound's figures (packer.bound); None for a float32 bundle, which quantisation did not touch,
    and for a bundle not packed from this model (a warning says why)."""
    if bundle.manifest["table"]["dtype"] != "int8":
        return {k: None for k in CERTIFIED_KEYS}
    from danpack.check.bound import BoundError, certify_texts

    try:
        summary = certify_texts(model, bundle, texts).to_dict()
    except BoundError as e:
        warnings.append(f"no drift-bound figures: {e}")
        return {k: None for k in CERTIFIED_KEYS}
    return {"certified_share": summary["certified_share"],
            "certified_share_of_covered": summary["certified_share_of_covered"],
            "certified_share_of_uncovered": summary["certified_share_of_uncovered"],
            "runtime_certified_share": summary["runtime_certified_share"],
            "certified_changes": summary["certified_disagreements"],
            "bound_premise_failing_rows": summary["premise"]["failing_rows"]}


def run_check(bundle_path: str | os.PathLike, model_dir: str | os.PathLike, eval_path: str | os.PathLike,
              options: CheckOptions = CheckOptions(), latency: LatencyOptions | None = None,
              steps: Steps | None = None) -> CheckResult:
    """Evaluate the bundle against its float original; `latency` (LatencyOptions or None) adds timings."""
    steps = steps or Steps(6, quiet=True)
    warnings: list[str] = []
    with steps.step(f"reading float original {model_dir}"):
        model = load_model(model_dir)
        float_sha = model_digest(model_dir)
    with steps.step(f"reading bundle {bundle_path}"):
        clf = runtime.load(bundle_path, backend=options.backend)
        bundle = clf.bundle
    order = align_labels(bundle.labels, model.labels, str(bundle_path))
    labels = model.labels
    if list(bundle.labels) != list(labels):
        warnings.append(f"the bundle lists its labels as {list(bundle.labels)}, the float original as "
                        f"{list(labels)}; outputs are compared by label name")
    source_sha = (bundle.manifest.get("source") or {}).get("sha256")
    if source_sha != float_sha:
        other = (f"the bundle was packed from a float model with sha256 {str(source_sha)[:16]}…, not from --reference "
                 f"{model_dir} (sha256 {float_sha[:16]}…)")
        if not options.allow_other_reference:  # a wrong folder would make every figure meaningless
            raise CheckError(f"{other}; give the float model folder the bundle was packed from, or pass "
                             "--allow-other-reference to compare with this one anyway")
        warnings.append(other)
    if bundle.tokenizer != model.tokenizer:
        warnings.append("the bundle's tokenizer spec differs from the float original's")
    sample = None
    if options.token_sample is not None:
        from danpack.pipeline import check_token_sample

        sample = check_token_sample(options.token_sample, model, style="model")
    with steps.step(f"reading evaluation set {eval_path}"):
        evalset = read_eval_set(eval_path, labels, options.text_field, options.label_field, options.label_map)
        framework = None
        if options.reference_probs is not None:
            framework = read_reference_probs(options.reference_probs, evalset.texts, labels, options.label_map)
    steps.note(f"{len(evalset.texts):,} texts, " + ("labelled" if evalset.labels is not None else "unlabelled"))
    texts = list(evalset.texts)
    with steps.step("running the float original (numpy, full vocabulary, float32)"):
        probs_float = run_batched(model.predict_proba, texts, options.batch_size, steps, "float")  # (N, C)
    with steps.step(f"running the bundle ({options.backend})"):
        probs_packed = run_batched(clf.predict_proba, texts, options.batch_size, steps, "bundle")[:, order]  # (N, C)
    for name, probs in (("float original", probs_float), ("bundle", probs_packed)):
        if not np.isfinite(probs).all():  # no figure means anything then: refuse plainly (exit 2), never crash
            row = int(np.argwhere(~np.isfinite(probs))[0][0])
            raise CheckError(f"the {name} gives a non-finite probability (NaN or Inf) for text {row + 1} of "
                             f"{eval_path}; the {'bundle' if name == 'bundle' else 'model'} is damaged or crafted")
    with steps.step("computing figures"):
        figures: dict = {"texts": len(texts)}
        figures.update({k: None for k in LABEL_KEYS})
        gold = None
        per_class: list = []
        pred_f, pred_p = probs_float.argmax(axis=1), probs_packed.argmax(axis=1)  # (N,)
        if evalset.labels is not None:
            label_index = {label: i for i, label in enumerate(labels)}
            gold = np.array([label_index[g] for g in evalset.labels], dtype=np.int64)  # (N,)
            figures.update(accuracy_figures(gold, pred_f, pred_p, options))
            per_class = per_class_recall(gold, pred_f, pred_p, labels)
        figures.update(agreement_figures(probs_float, probs_packed))
        figures.update({k: None for k in REFERENCE_KEYS})
        if framework is not None:
            reference, differs = reference_figures(framework, probs_float, probs_packed, gold,
                                                   options.reference_tolerance)
            figures.update(reference)
            if differs.any():
                warnings.append("\n".join(diagnose_reference(model, texts, framework, differs,
                                                             options.reference_tolerance)))
        view, token_figures = view_tokens(model, bundle.vocab, texts)
        figures.update(token_figures)
        float_bytes = model_bytes(model_dir)
        figures.update({"bundle_bytes": bundle.size, "float_bytes": float_bytes,
                        "size_ratio": float_bytes / bundle.size})
        figures.update(certified_figures(model, bundle, texts, warnings))
        shift = MeanShift(model, bundle)
        if not shift.usable:
            warnings.append("the bundle's table width does not match the float original's layers; "
                            "per-token mean shifts are not reported")
        disagreements = list_disagreements(texts, gold, labels, probs_float, probs_packed, view, shift, options)
    figures.update({k: None for k in LATENCY_KEYS})
    latency_info = None
    if latency is not None:
        with steps.step(f"measuring latency side by side ({latency.texts} single texts, batches of {latency.batch})"):
            timing = measure_check_latency(model_dir, clf, texts, latency, options.backend)
        figures.update(timing.figures())
        latency_info = timing.settings()
    inputs = {
        "bundle": {"path": str(bundle_path), "sha256": bundle.sha256, "bytes": bundle.size,
                   "labels": list(bundle.labels), "source_sha256": source_sha,
                   "oov_policy": bundle.manifest["oov"]["policy"], "table": dict(bundle.manifest["table"]),
                   "tokens": len(bundle.vocab)},
        "reference": {"path": str(model_dir), "sha256": float_sha, "bytes": float_bytes, "labels": list(labels),
                      "rows": len(model.vocab), "embedding_dim": int(model.embedding.shape[1])},
        "eval": {"path": evalset.path, "sha256": evalset.sha256, "texts": len(texts),
                 "text_field": evalset.text_field, "label_field": evalset.label_field,
                 "labelled": evalset.labels is not None},
    }
    if framework is not None:
        inputs["framework"] = {"path": framework.path, "sha256": framework.sha256,
                               "kind": "probs" if framework.probs is not None else "labels"}
    if sample is not None:
        inputs["token_sample"] = {"path": sample.path, "records": sample.records, "kind": sample.kind}
    settings = {"backend": options.backend, "bootstrap_resamples": options.bootstrap, "seed": options.seed,
                "confidence": options.confidence, "kl_epsilon": KL_EPSILON, "latency": latency_info,
                "reference_tolerance": options.reference_tolerance if framework is not None else None}
    return CheckResult(figures, per_class, disagreements, inputs, settings, tuple(warnings))
