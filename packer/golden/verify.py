"""A host's outputs against the golden records: which records differ, at which stage, by how much.

The host writes one JSON object per golden record, in the same order: "ids" (its row ids after the unknown-
word policy) and "probs" (in label order) are required; "normalized" and "tokens" are compared when given,
which names the stage of a difference more exactly; "n" (the record's number), when given, must match its
position. The stage of a record is the first step that differs:
normalisation, split (tokens), mapping (ids), model (probs beyond the tolerance, or the label).
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass

from .records import GoldenError

PROB_TOLERANCE = 1e-6  # float32 probabilities of two correct hosts differ by ~1e-7 (summation order)
STAGES = ("normalisation", "split", "mapping", "model")


@dataclass(frozen=True)
class Difference:
    """One record whose host output differs from the golden record."""

    index: int  # record number (0-based; line index + 2 in the golden file)
    case: str  # the stress case's name
    stage: str  # one of STAGES
    text: str
    expected: object
    found: object


@dataclass(frozen=True)
class Verdict:
    """What `danpack golden --verify` found."""

    records: int
    differences: tuple[Difference, ...]
    worst_prob_diff: float  # over all records whose ids agree

    @property
    def passed(self) -> bool:
        return not self.differences

    def by_stage(self) -> dict[str, int]:
        counts = Counter(d.stage for d in self.differences)
        return {stage: counts[stage] for stage in STAGES if counts[stage]}


def _check_output(i: int, out: dict, classes: int, source: str) -> None:
    """A host record must hold ids (integers) and probs (one number per label)."""
    if "n" in out and out["n"] != i:  # a host that echoes the record number: the order is checked too
        raise GoldenError(f"{source}: record {i} (line {i + 1}) has \"n\": {out['n']!r}; write the outputs in "
                          "the golden file's order, one per record")
    ids, probs = out.get("ids"), out.get("probs")
    if not isinstance(ids, list) or not all(isinstance(x, int) and not isinstance(x, bool) for x in ids):
        raise GoldenError(f"{source}: record {i} (line {i + 1}) needs \"ids\": a list of integers (the row ids)")
    if (not isinstance(probs, list) or len(probs) != classes
            or not all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in probs)):
        raise GoldenError(f"{source}: record {i} (line {i + 1}) needs \"probs\": a list of {classes} numbers in label order")
    for key in ("normalized", "tokens"):
        if key in out and not (isinstance(out[key], str) if key == "normalized"
                               else isinstance(out[key], list) and all(isinstance(t, str) for t in out[key])):
            raise GoldenError(f"{source}: record {i} (line {i + 1}) field {key!r} must be "
                              f"{'a string' if key == 'normalized' else 'a list of strings'}")


def verify_outputs(records: Sequence[dict], outputs: Sequence[dict], source: str = "outputs",
                   tolerance: float = PROB_TOLERANCE) -> Verdict:
    """Compare a host's outputs with the golden records (same order); raises GoldenError for a malformed file."""
    if len(outputs) != len(records):
        raise GoldenError(f"{source}: holds {len(outputs)} records, the golden file {len(records)}; write one JSON "
                          "object per golden record, in the same order")
    differences, worst = [], 0.0
    for i, (gold, out) in enumerate(zip(records, outputs)):
        _check_output(i, out, len(gold["probs"]), source)
        diff = None
        if "normalized" in out and out["normalized"] != gold["normalized"]:
            diff = ("normalisation", gold["normalized"], out["normalized"])
        elif "tokens" in out and out["tokens"] != gold["tokens"]:
            diff = ("split", gold["tokens"], out["tokens"])
        elif out["ids"] != gold["ids"]:
            diff = ("mapping", gold["ids"], out["ids"])
        else:
            gaps = [abs(float(a) - float(b)) for a, b in zip(out["probs"], gold["probs"])]
            gap = max(gaps, default=0.0) if all(map(math.isfinite, gaps)) else math.inf  # NaN never passes
            worst = max(worst, gap)
            if gap > tolerance:
                diff = ("model", gold["probs"], out["probs"])
            elif "label" in out and out["label"] != gold["label"]:
                diff = ("model", gold["label"], out["label"])
        if diff is not None:
            differences.append(Difference(i, str(gold.get("case", "")), diff[0], gold["text"], diff[1], diff[2]))
    return Verdict(len(records), tuple(differences), worst)


def describe_difference(d: Difference, limit: int = 160) -> list[str]:
    """Lines saying where one record differs."""

    def short(value: object) -> str:
        text = repr(value)
        return text if len(text) <= limit else text[: limit - 1] + "…"

    return [f"record {d.index} ({d.case}): {d.stage} differs",
            f"  text     {short(d.text)}",
            f"  expected {short(d.expected)}",
            f"  host     {short(d.found)}"]
