"""The verdict of a check: thresholds on its figures, and regressions against an earlier report.

Both are tables: a threshold is (option name, figure key, comparison, default limit); a
regression is (name, figure key, which direction is worse, tolerance kind, default). A new
gate (e.g. a certified share) is one more row here and one more option in the CLI.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping
from dataclasses import dataclass

from danpack.runtime.errors import DanpackError
from danpack.units import UnitError, parse_share


class VerdictError(DanpackError):
    """A limit or tolerance that cannot be applied (bad value, figure not measured, other lineage)."""


@dataclass(frozen=True)
class Threshold:
    """One gate: `figure <op> limit`."""

    name: str  # CLI option without the dashes, and the JUnit test case name
    key: str  # figure key in CheckResult.figures
    op: str  # "<=" (a maximum) or ">=" (a minimum)
    default: float | None  # limit used when the option is not given; None: not gated by default
    unit: str  # how values print (see danpack.check.compare.FIGURES units)
    title: str  # the figure's name in messages
    needs: str = ""  # what the figure needs when it is missing ("labels", "latency")
    # with --reference-probs the gate reads this figure instead: the chain the user cares about, framework -> bundle
    reference_key: str | None = None
    reference_title: str = ""


THRESHOLDS: tuple[Threshold, ...] = (
    # 1 point: well above what packing costs the demo models (0.00 / 0.10 points), below what a user notices
    Threshold("max-points-lost", "accuracy_drop_points", "<=", 1.0, "points", "accuracy drop", "labels",
              "reference_accuracy_drop_points", "accuracy drop framework -> bundle"),
    # 99%: the demo bundles agree on 99.8-100% of texts; a lower share means pruning costs decisions
    Threshold("min-agreement", "agreement", ">=", 0.99, "share", "prediction agreement", "",
              "reference_agreement", "prediction agreement framework vs bundle"),
    # no default: the byte budget is the device's, not ours
    Threshold("max-bytes", "bundle_bytes", "<=", None, "bytes", "bundle size"),
    # 1.0: a bundle larger than its float original defeats the purpose
    Threshold("min-size-ratio", "size_ratio", ">=", 1.0, "ratio", "size ratio float / bundle"),
    # no default: latency depends on the machine running the check
    Threshold("max-latency-ratio", "latency_ratio", "<=", None, "ratio", "p50 latency ratio bundle / float",
              "latency"),
    # no default: how much must be provably unchanged is the deployment's call (demo bundles: 75-83%)
    Threshold("min-certified", "certified_share", ">=", None, "share", "share certified by the drift bound", "bound"),
    # 0: a certified text that changed class means the bound itself is broken
    Threshold("max-certified-changes", "certified_changes", "<=", 0, "count", "certified texts that changed class",
              "bound"),
    # 0: with the pipeline declared right, danpack's float reading equals the framework's to float32 rounding
    Threshold("max-reference-mismatches", "reference_float_mismatches", "<=", 0, "count",
              "texts where danpack's float reading differs from the framework", "reference"),
)


@dataclass(frozen=True)
class Regression:
    """One comparison with a baseline report: how much worse `key` may get."""

    name: str  # --baseline-tolerance NAME=VALUE, and "baseline-NAME" as the check name
    key: str  # figure key
    worse: str  # "lower" or "higher": which direction is a regression
    kind: str  # "points": difference of shares x 100; "value": difference in the figure's unit; "percent": relative
    default: float | None  # tolerance; None: not compared unless given
    unit: str  # how values print
    title: str  # the figure's name in messages


REGRESSIONS: tuple[Regression, ...] = (
    # 0.5 point of accuracy or agreement: a handful of texts on a 1,000-text set
    Regression("accuracy", "accuracy_bundle", "lower", "points", 0.5, "share", "bundle accuracy"),
    Regression("drop", "accuracy_drop_points", "higher", "value", 0.5, "points", "accuracy drop"),
    Regression("agreement", "agreement", "lower", "points", 0.5, "share", "prediction agreement"),
    # 5%: a repack with a few more rows is fine, a doubled table is not
    Regression("bytes", "bundle_bytes", "higher", "percent", 5.0, "bytes", "bundle size"),
    # no default: even a side-by-side ratio moves between CI machines
    Regression("latency", "latency_ratio", "higher", "percent", None, "ratio", "p50 latency ratio"),
)


@dataclass(frozen=True)
class Outcome:
    """One line of the verdict (and one JUnit test case)."""

    name: str
    key: str
    op: str
    limit: float | None
    value: float | None
    status: str  # "pass", "fail" or "skip"
    message: str

    def to_dict(self) -> dict:
        return {"name": self.name, "figure": self.key, "op": self.op, "limit": self.limit, "value": self.value,
                "status": self.status, "message": self.message}

    @classmethod
    def from_dict(cls, d: Mapping) -> "Outcome":
        return cls(d["name"], d["figure"], d["op"], d["limit"], d["value"], d["status"], d["message"])


@dataclass(frozen=True)
class Verdict:
    """All outcomes; the check passes when none failed."""

    outcomes: tuple[Outcome, ...]

    @property
    def failures(self) -> tuple[Outcome, ...]:
        return tuple(o for o in self.outcomes if o.status == "fail")

    @property
    def passed(self) -> bool:
        return not self.failures

    @property
    def exit_code(self) -> int:
        return 0 if self.passed else 1


def format_value(value: float | None, unit: str) -> str:
    """A figure as printed in messages and tables."""
    if value is None:
        return "n/a"
    if unit == "share":
        return f"{100 * value:.2f}%"
    if unit == "points":
        return f"{value:+.2f} pt"
    if unit in ("count", "bytes"):
        return f"{int(value):,}" + (" B" if unit == "bytes" else "")
    if unit == "ratio":
        return f"{value:.2f}x"
    if unit == "ms":
        return f"{value:.3f} ms"
    if unit == "rate":
        return f"{value:,.0f}/s"
    if unit == "p":
        return f"{value:.3g}"
    return f"{value:.4g}"


def parse_limit(text: str | None, name: str) -> float | None:
    """A limit option: a number ("99%" for a share), or "off" to disable a default; None when not given."""
    if text is None:
        return None
    raw = text.strip()
    if raw.lower() in ("off", "none"):
        return math.nan  # marker: explicitly disabled
    threshold = {t.name: t for t in THRESHOLDS}.get(name)
    if threshold is not None and threshold.unit == "share":  # the one rule for shares (danpack.units)
        try:
            return parse_share(raw, f"--{name}")
        except UnitError as e:
            raise VerdictError(str(e)) from None
    if raw.endswith("%"):
        raise VerdictError(f"--{name} {text!r}: a percent sign fits only share limits such as --min-agreement 99%")
    try:
        value = float(raw)
    except ValueError:
        raise VerdictError(f"--{name} {text!r} is not a number; give a number or 'off'") from None
    if not math.isfinite(value):
        raise VerdictError(f"--{name} {text!r} must be a finite number")
    unit = threshold.unit if threshold is not None else ""
    if unit in ("bytes", "count", "ratio") and value < 0:
        raise VerdictError(f"--{name} {text!r} cannot be negative")
    if unit in ("bytes", "count") and value != int(value):
        raise VerdictError(f"--{name} {text!r} counts {unit}: give a whole number")
    return value


def resolve_limits(given: Mapping[str, float | None]) -> tuple[dict[str, float | None], set[str]]:
    """Limits in force (defaults overridden by `given`; NaN means "off") and the names given explicitly."""
    known = {t.name for t in THRESHOLDS}
    unknown = set(given) - known
    if unknown:
        raise VerdictError(f"unknown thresholds {sorted(unknown)}; known: {sorted(known)}")
    limits, explicit = {}, set()
    for t in THRESHOLDS:
        value = given.get(t.name)
        if value is None:
            limits[t.name] = t.default
        elif math.isnan(value):
            limits[t.name] = None
        else:
            limits[t.name] = value
            explicit.add(t.name)
    return limits, explicit


def check_threshold(t: Threshold, value: float | None, limit: float | None, explicit: bool) -> Outcome:
    """Apply one threshold to its figure."""
    shown = format_value(limit, t.unit)
    if limit is None:
        return Outcome(t.name, t.key, t.op, None, value, "skip", "not gated (no limit set)")
    if value is None:
        why = {"labels": "the evaluation set has no labels", "latency": "latency was not measured",
               "bound": "no drift bound applies (a float32 table, or a bundle not packed from --reference)",
               "reference": "no --reference-probs given"}.get(t.needs, "")
        if explicit:
            raise VerdictError(f"--{t.name} {limit:g} cannot be checked: {why or 'the figure is missing'}"
                               + (" (pass a labelled --eval)" if t.needs == "labels" else "")
                               + (" (drop --no-latency)" if t.needs == "latency" else ""))
        return Outcome(t.name, t.key, t.op, limit, None, "skip", f"not measured: {why or 'figure missing'}")
    ok = value <= limit if t.op == "<=" else value >= limit
    verb = "within" if ok else ("above" if t.op == "<=" else "below")
    message = f"{t.title} {format_value(value, t.unit)} is {verb} the limit {t.op} {shown}"
    return Outcome(t.name, t.key, t.op, limit, value, "pass" if ok else "fail", message)


def evaluate(figures: Mapping[str, float | None], limits: Mapping[str, float | None],
             explicit: set[str] = frozenset()) -> tuple[Outcome, ...]:
    """One outcome per threshold of THRESHOLDS, in table order."""
    out = []
    for t in THRESHOLDS:
        if t.reference_key is not None and figures.get(t.reference_key) is not None:
            t = dataclasses.replace(t, key=t.reference_key, title=t.reference_title)
        out.append(check_threshold(t, figures.get(t.key), limits.get(t.name), t.name in explicit))
    return tuple(out)


# ---- baseline -----------------------------------------------------------------------------------

def parse_tolerances(items: list[str]) -> dict[str, float | None]:
    """--baseline-tolerance NAME=VALUE items (VALUE a number, "5%" or "off") over the defaults."""
    known = {r.name: r for r in REGRESSIONS}
    tolerances = {r.name: r.default for r in REGRESSIONS}
    for item in items:
        name, sep, value = item.partition("=")
        name, value = name.strip(), value.strip().rstrip("%")
        if not sep or name not in known:
            raise VerdictError(f"--baseline-tolerance {item!r}: expected NAME=VALUE with NAME one of "
                               f"{sorted(known)}, e.g. accuracy=0.5 or bytes=5%")
        if value.lower() in ("off", "none"):
            tolerances[name] = None
            continue
        try:
            number = float(value)
        except ValueError:
            raise VerdictError(f"--baseline-tolerance {item!r}: {value!r} is not a number or 'off'") from None
        if not (math.isfinite(number) and number >= 0):
            raise VerdictError(f"--baseline-tolerance {item!r}: the tolerance must be a number >= 0")
        tolerances[name] = number
    return tolerances


def baseline_lineage(now: Mapping, before: Mapping) -> list[str]:
    """Compare the `inputs` of this check and of the baseline report: warnings for a baseline of the
    same lineage, VerdictError when it is not (other labels)."""
    if list(now["reference"]["labels"]) != list(before["reference"]["labels"]):
        raise VerdictError(f"the baseline report is for labels {before['reference']['labels']}, this check for "
                           f"{now['reference']['labels']}; compare only reports of the same model lineage")
    warnings = []
    if now["reference"]["sha256"] != before["reference"]["sha256"]:
        warnings.append("the float original differs from the baseline's (sha256 "
                        f"{before['reference']['sha256'][:16]}… then, {now['reference']['sha256'][:16]}… now)")
    if now["eval"]["sha256"] != before["eval"]["sha256"]:
        warnings.append("the evaluation set differs from the baseline's: changes may come from the data, "
                        "not from the bundle")
    return warnings


def compare_baseline(figures: Mapping[str, float | None], baseline_figures: Mapping[str, float | None],
                     tolerances: Mapping[str, float | None]) -> tuple[Outcome, ...]:
    """One outcome per regression rule: fails when the figure got worse by more than its tolerance."""
    out = []
    for r in REGRESSIONS:
        name, tol = f"baseline-{r.name}", tolerances.get(r.name)
        now, before = figures.get(r.key), baseline_figures.get(r.key)
        if tol is None:
            out.append(Outcome(name, r.key, "regression", None, now, "skip", "not compared (no tolerance set)"))
            continue
        if now is None or before is None:
            out.append(Outcome(name, r.key, "regression", tol, now, "skip",
                               "not compared: the figure is missing " + ("now" if now is None else "in the baseline")))
            continue
        if r.kind == "points":
            change, unit = 100.0 * (now - before), "points"
        elif r.kind == "value":
            change, unit = now - before, "points" if r.unit == "points" else r.unit
        else:
            change, unit = (100.0 * (now - before) / before if before else (0.0 if now == before else math.inf)), "%"
        worse = -change if r.worse == "lower" else change  # > 0: got worse
        ok = worse <= tol
        direction = "down" if change < 0 else "up"
        message = (f"{r.title} {format_value(now, r.unit)} vs {format_value(before, r.unit)} in the "
                   f"baseline: {direction} {abs(change):.2f} {unit} (tolerance {tol:g} {unit} "
                   f"{'lower' if r.worse == 'lower' else 'higher'})")
        out.append(Outcome(name, r.key, "regression", tol, now, "pass" if ok else "fail", message))
    return tuple(out)
