"""The drift bound on the packer side: the worst case for `danpack inspect`, the certified share for `danpack check`.

The certification is runtime/certify.py's (one method for both sides). The packer adds what only it can
see: the float model's rows, to verify the premise on every kept row (each dequantised row lies within
the radius the runtime assumes; where one does not, the packer's own certification widens that row),
and the float model's labels, to count certified texts whose label changed (always 0 unless broken).
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from danpack.runtime.backends import NumpyBackend
from danpack.runtime.bundle import Bundle, read_bundle
from danpack.runtime.certify import (FOLD_MASS_STEPS, HALF_STEP, DriftBound, box_bound, certify_packed, drift_bound,
                                    encode_unknown, gamma, read_envelope, read_steps)
from danpack.runtime.encode import Encoder
from danpack.runtime.errors import DanpackError
from danpack.runtime.tokenize import Tokenizer

from danpack.model import FloatModel

BATCH = 1024  # texts per forward pass: bounds the padded (B, T, W) temporaries
CHUNK_ROWS = 65536  # table rows per block of the premise check
U64 = 2.0**-53  # unit roundoff of float64, for the premise check's own arithmetic


class BoundError(DanpackError):
    """A float model and a bundle that were not packed from each other."""


@dataclass(frozen=True)
class RowCheck:
    """Whether every kept row lies within the radius (and fold mass) the runtime assumes."""

    rows: int  # kept rows checked
    failing: int  # rows whose measured error or fold mass exceeds the runtime's assumption
    worst_radius: float  # largest measured error / assumed radius over rows (int8 rounding alone: ≈ 0.5/0.50002)
    worst_mass: float  # largest measured / assumed first-layer mass (folded tables; 0 otherwise)
    worst_token: str | None  # token of the row with the largest of the two ratios

    @property
    def holds(self) -> bool:
        return self.failing == 0


@dataclass(frozen=True)
class CertifiedReport:
    """Per-text certification of a bundle against its float model, with the counts `danpack check` reports."""

    labels: tuple[str, ...]
    certified: np.ndarray  # (B,) bool: the float model provably predicts the bundle's class (rows as measured)
    runtime_certified: np.ndarray  # (B,) bool: what Classifier.predict_certified says on the device (rows as assumed)
    covered: np.ndarray  # (B,) bool: every token has its own kept row
    pruned: np.ndarray  # (B,) bool: a token the float model knows was pruned from the bundle
    unknown: np.ndarray  # (B,) bool: a token neither the float model nor the bundle knows
    float_top: np.ndarray  # (B,) int: the float model's class
    packed_top: np.ndarray  # (B,) int: the bundle's class (runtime numpy backend)
    margins: np.ndarray  # (B,) float64: float logit margin, top class over the runner-up
    rows: RowCheck

    @property
    def texts(self) -> int:
        return int(self.certified.shape[0])

    @property
    def share(self) -> float:
        """Share of all texts certified (texts with no token of their own count as not certified)."""
        return float(self.certified.mean()) if self.texts else 1.0

    @property
    def runtime_share(self) -> float:
        return float(self.runtime_certified.mean()) if self.texts else 1.0

    @property
    def share_of_uncovered(self) -> float | None:
        """Share certified among texts holding a token the bundle does not know (pruned or unknown); None if none."""
        return float(self.certified[~self.covered].mean()) if (~self.covered).any() else None

    @property
    def disagreements(self) -> int:
        """Texts where the bundle's class differs from the float model's."""
        return int((self.float_top != self.packed_top).sum())

    @property
    def certified_disagreements(self) -> int:
        """Certified texts (either side) whose classes differ: always 0 unless the bound is broken."""
        return int(((self.certified | self.runtime_certified) & (self.float_top != self.packed_top)).sum())

    def to_dict(self) -> dict:
        """A JSON-ready summary."""
        uncovered = self.share_of_uncovered
        return {
            "texts": self.texts,
            "certified": int(self.certified.sum()),
            "certified_share": round(self.share, 6),
            "runtime_certified": int(self.runtime_certified.sum()),
            "runtime_certified_share": round(self.runtime_share, 6),
            "covered_texts": int(self.covered.sum()),
            "certified_share_of_covered": round(float(self.certified[self.covered].mean()), 6) if self.covered.any() else None,
            "uncovered_texts": int((~self.covered).sum()),
            "certified_share_of_uncovered": None if uncovered is None else round(uncovered, 6),
            "pruned_texts": int(self.pruned.sum()),
            "unknown_texts": int(self.unknown.sum()),
            "disagreements": self.disagreements,
            "certified_disagreements": self.certified_disagreements,
            "premise": {"holds": self.rows.holds, "rows": self.rows.rows, "failing_rows": self.rows.failing,
                        "worst_radius_ratio": round(self.rows.worst_radius, 6),
                        "worst_mass_ratio": round(self.rows.worst_mass, 6), "worst_token": self.rows.worst_token},
        }


def _as_bundle(bundle: Bundle | str | os.PathLike) -> Bundle:
    return bundle if isinstance(bundle, Bundle) else read_bundle(bundle)


def _certifiable_rows(bundle: Bundle) -> np.ndarray:
    """Row ids of the bundle's kept tokens, without the out-of-vocabulary row."""
    rows = np.arange(len(bundle.vocab))
    return rows[rows != bundle.oov_row] if bundle.oov_row is not None else rows


def worst_case_bound(bundle: Bundle | str | os.PathLike) -> dict:
    """The bound for any text of kept tokens: δ_max, per-class logit bound, and the smallest margin always safe."""
    bundle = _as_bundle(bundle)
    bound = drift_bound(bundle)
    rows = _certifiable_rows(bundle)
    n = bound.max_tokens

    def worst(values: np.ndarray) -> float:
        return float(values[rows].max()) if rows.size else 0.0

    delta = worst(bound.radius) + float(gamma(n + 2)) * worst(bound.spread)
    if bound.fold_terms:
        delta += float(gamma(n + bound.fold_terms)) * worst(bound.fold_mass)
    logit = delta * bound.gain + bound.allowance  # (C,)
    pair = np.sort(logit)[-2:].sum()  # max over c ≠ c' of b_c + b_c'
    labels = bundle.labels
    return {
        "method": "interval bound propagation of the int8 table error; activations relaxed to Lipschitz 1 "
                  "(worst case over texts of kept tokens; predict_certified bounds each text on its own box)",
        "table": bundle.manifest["table"]["dtype"],
        "folded": bound.fold_terms > 0,
        "max_tokens": n,
        "half_step_max": worst(read_steps(bundle)) / 2.0,
        "delta_max": delta,
        "gain": dict(zip(labels, bound.gain.tolist())),
        "rounding_allowance": dict(zip(labels, bound.allowance.tolist())),
        "logit_bound": dict(zip(labels, logit.tolist())),
        "safe_margin": float(pair),
        "unknown_tokens": _describe_envelope(bundle),
        "premise": (f"every kept row within {HALF_STEP:g} quantisation steps of its float row"
                    + (f" (plus float32 folding reserve), first-layer mass Σ|W1||E| at most {FOLD_MASS_STEPS:g} steps"
                       if bound.fold_terms else "")
                    + "; verified against the float model by certify_texts (`danpack check`)"),
    }


def _describe_envelope(bundle: Bundle) -> dict | None:
    """What the manifest's `unknown` envelope says, for `danpack inspect` (None: packed before it existed)."""
    env = read_envelope(bundle)
    if env is None:
        return None
    buckets = env.buckets[np.isfinite(env.buckets[:, 0]).all(axis=1)] if env.buckets is not None else None
    return {"rows": env.rows, "skipped": env.skipped,
            "mean_width": float((env.hi - env.lo).mean()) if env.rows else 0.0,
            "buckets": env.hash_buckets, "absent_tokens": int(env.absent.size),
            "absent_bits": env.absent_bits,
            "bucket_mean_width": float((buckets[:, 1] - buckets[:, 0]).mean()) if buckets is not None and
            buckets.size else None,
            "outlier_filter_bytes": env.outliers.bits.size // 8 if env.outliers is not None else 0}


def describe_bound(worst: dict) -> list[str]:
    """Human-readable lines of `worst_case_bound` for `danpack inspect`."""
    bounds = ", ".join(f"{k} {v:.3g}" for k, v in worst["logit_bound"].items())
    return [
        "drift bound: how far int8 rounding can move the model's scores; a label whose lead is larger is provably "
        "the float model's",
        f"quantisation drift: each mean moves by at most {worst['delta_max']:.3g} per coordinate "
        f"(rounding error of one stored value, half an int8 step: up to {worst['half_step_max']:.3g})",
        f"logit bound per class: {bounds}",
        f"any prediction whose logit margin exceeds {worst['safe_margin']:.3g} cannot be changed by quantisation "
        "(texts whose tokens are all kept)",
        _envelope_line(worst.get("unknown_tokens")),
    ]


def _envelope_line(env: dict | None) -> str:
    if env is None:
        return "tokens the bundle does not know: no envelope (packed by an older danpack), such texts are never certified"
    if not env["rows"]:
        return "tokens the bundle does not know: the float model never knew them either (every row kept); certified per text"
    return (f"tokens the bundle does not know: each may stand for any of {env['rows']:,} float rows"
            + (" or be left out" if env["skipped"] else "")
            + f" (envelope, mean width {env['mean_width']:.3g}"
            + (f"; {env['buckets']} hash buckets, mean width {env['bucket_mean_width']:.3g}"
               if env.get("bucket_mean_width") is not None else "")
            + (f" over the rows inside the tails; a {env['outlier_filter_bytes']:,}-byte filter sends the tokens of "
               "the rows beyond them to the one envelope" if env.get("outlier_filter_bytes") else "")
            + (f"; {env['absent_tokens']:,} listed {env['absent_bits']}-bit fingerprints of tokens the float model "
               "never knew" if env.get("absent_tokens") else "")
            + "); texts holding them are certified per text")


def _check_pair(model: FloatModel, bundle: Bundle, source: str) -> None:
    """Refuse a bundle that was not packed from this float model."""

    def fail(what: str) -> BoundError:
        return BoundError(f"{source}: {what}; pass the float model directory this bundle was packed from")

    if tuple(model.labels) != bundle.labels:
        raise fail(f"labels {list(bundle.labels)} differ from the float model's {list(model.labels)}")
    if model.tokenizer.to_dict() != bundle.manifest["tokenizer"]:
        raise fail("tokenizer spec differs from the float model's")
    index = set(model.vocab)
    missing = [t for t in bundle.vocab if t not in index]
    if missing:
        raise fail(f"{len(missing)} bundle token(s) are not in the float model's vocabulary, e.g. {missing[0]!r}")
    specs = bundle.manifest["layers"]
    if len(specs) != len(model.layers):
        raise fail(f"{len(specs)} layers, the float model has {len(model.layers)}")
    for i, (spec, layer) in enumerate(zip(specs, model.layers)):
        weight = bundle.tensors.get(f"layer.{i}.weight")
        same = np.array_equal(bundle.tensors[f"layer.{i}.bias"], layer.bias) and (
            weight is None and i == 0 and not spec["weight"] or weight is not None and np.array_equal(weight, layer.weight))
        if not same:
            raise fail(f"layer {i} weights differ from the float model's")


def check_rows(model: FloatModel, bundle: Bundle, bound: DriftBound | None = None) -> tuple[RowCheck, np.ndarray, np.ndarray]:
    """Measure each kept row against the exact float row: (RowCheck, (R,) radius needed, (R,) fold mass needed).

    Exact rows are computed in float64 from the float32 tensors; the float64 rounding of E·W1ᵀ is added
    with the same γ bound (unit roundoff 2⁻⁵³), so the measured values are themselves upper bounds.
    """
    bound = bound or drift_bound(bundle)
    table = bundle.tensors["table"]  # (R, W)
    scales = bundle.tensors.get("scales") if bundle.manifest["table"]["dtype"] == "int8" else None
    folded = not bundle.manifest["layers"][0]["weight"]
    index = {t: i for i, t in enumerate(model.vocab)}
    rows = _certifiable_rows(bundle)  # (K,)
    need_radius = np.zeros(table.shape[0])  # (R,)
    need_mass = np.zeros(table.shape[0])  # (R,)
    w1 = model.layers[0].weight.astype(np.float64) if folded else None  # (H1, D)
    g64 = model.embedding.shape[1] * U64 / (1 - model.embedding.shape[1] * U64)  # γ_D in float64
    for start in range(0, rows.size, CHUNK_ROWS):
        part = rows[start : start + CHUNK_ROWS]  # (k,)
        emb = model.embedding[[index[bundle.vocab[r]] for r in part]].astype(np.float64)  # (k, D)
        deq = table[part].astype(np.float64)  # (k, W): q·s below is exact in float64 (8 + 24 bits)
        if scales is not None:
            deq = deq * scales[part].astype(np.float64)[:, None]
        if folded:
            mass = np.abs(emb) @ np.abs(w1).T * (1 + g64)  # (k, H1): Σ_d |E_td||W1_hd|, rounded up
            err = np.abs(deq - emb @ w1.T) + g64 * mass  # (k, H1)
            need_mass[part] = mass.max(axis=1)
        else:
            err = np.abs(deq - emb)  # (k, D)
        need_radius[part] = err.max(axis=1) * (1 + 4 * U64)
    with np.errstate(divide="ignore", invalid="ignore"):
        radius_ratio = np.where(need_radius > 0, need_radius / bound.radius, 0.0)[rows]  # (K,): x/0 is inf
        mass_ratio = np.where(need_mass > 0, need_mass / bound.fold_mass, 0.0)[rows]  # (K,)
    ratio = np.maximum(radius_ratio, mass_ratio)  # (K,)
    if not rows.size:
        return RowCheck(0, 0, 0.0, 0.0, None), need_radius, need_mass
    check = RowCheck(int(rows.size), int((ratio > 1.0).sum()), float(radius_ratio.max()), float(mass_ratio.max()),
                     bundle.vocab[int(rows[ratio.argmax()])])
    return check, need_radius, need_mass


def _token_flags(model: FloatModel, bundle: Bundle, texts: Sequence[str]) -> tuple[np.ndarray, np.ndarray]:
    """(B,) pruned (a known token left out of the bundle) and (B,) unknown (a token neither knows)."""
    tokenize = Tokenizer(bundle.tokenizer).tokenize
    known = set(model.vocab)
    kept = {t for i, t in enumerate(bundle.vocab) if i != bundle.oov_row}
    pruned = np.zeros(len(texts), dtype=bool)
    unknown = np.zeros(len(texts), dtype=bool)
    for i, text in enumerate(texts):
        tokens = set(tokenize(text))
        pruned[i] = any(t in known and t not in kept for t in tokens)
        unknown[i] = any(t not in known for t in tokens)
    return pruned, unknown


def certify_texts(model: FloatModel, bundle: Bundle | str | os.PathLike, texts: Sequence[str]) -> CertifiedReport:
    """Certify each text against the float model: the float model provably predicts the bundle's class."""
    source = "bundle" if isinstance(bundle, Bundle) else str(bundle)
    bundle = _as_bundle(bundle)
    texts = list(texts)
    _check_pair(model, bundle, source)
    runtime_bound = box_bound(bundle)
    rows, need_radius, need_mass = check_rows(model, bundle)
    # the packer's side is rigorous even when the premise fails: widen the rows that break it
    packer_bound = runtime_bound if rows.holds else box_bound(bundle, need_radius, need_mass)
    encoder = Encoder(Tokenizer(bundle.tokenizer), bundle.vocab, bundle.oov_row)
    float_encoder = model.encoder()
    backend = NumpyBackend(bundle)
    parts = []
    for start in range(0, len(texts), BATCH):
        batch = texts[start : start + BATCH]
        ids, counts, unknown = encode_unknown(encoder, batch, runtime_bound.envelope)  # (b, T), (b,), (b,) or (b, U)
        float_logits = model.predict_logits(batch, float_encoder)  # (b, C)
        packed_logits = backend.run(ids, counts)[1]  # (b, C)
        top2 = np.sort(float_logits.astype(np.float64), axis=1)[:, -2:]  # (b, 2)
        parts.append((
            certify_packed(packer_bound, packed_logits, ids, counts, unknown),
            certify_packed(runtime_bound, packed_logits, ids, counts, unknown),
            (unknown < 0).all(axis=1) if unknown.ndim == 2 else unknown == 0,
            float_logits.argmax(axis=1), packed_logits.argmax(axis=1), top2[:, 1] - top2[:, 0],
        ))
    empty = (np.zeros(0, bool), np.zeros(0, bool), np.zeros(0, bool), np.zeros(0, np.int64), np.zeros(0, np.int64),
             np.zeros(0))
    cols = [np.concatenate(c) for c in zip(*parts)] if parts else list(empty)
    pruned, unknown = _token_flags(model, bundle, texts)
    return CertifiedReport(bundle.labels, cols[0], cols[1], cols[2], pruned, unknown, cols[3], cols[4], cols[5], rows)


def check_certified(report: CertifiedReport, min_share: float) -> list[str]:
    """Problems for `danpack check --min-certified`: an empty list means the gate passes."""
    problems = []
    if report.share < min_share:
        problems.append(
            f"certified share {report.share:.2%} is below the required {min_share:.2%} "
            f"({int(report.certified.sum())} of {report.texts} texts; {int(report.pruned.sum())} hold pruned tokens and "
            f"{int(report.unknown.sum())} unknown tokens, which widen the bound); keep more rows (--coverage) or "
            "lower --min-certified")
    if not report.rows.holds:
        problems.append(
            f"{report.rows.failing} of {report.rows.rows} kept rows break the bound's premise (worst measured/assumed: "
            f"radius {report.rows.worst_radius:.3g}, first-layer mass {report.rows.worst_mass:.3g}, at token "
            f"{report.rows.worst_token!r}): the device's predict_certified may over-claim for texts using them; "
            "repack with --fold no")
    if report.certified_disagreements:
        problems.append(f"{report.certified_disagreements} certified text(s) changed class: the bound is broken; "
                        "report this as a danpack bug")
    return problems
