"""The check's outputs: the versioned JSON report, and the terminal table, Markdown and JUnit XML drawn from it.

Every renderer takes the report dict, so a report read back from disk renders the same way.
The schema ("danpack-check-report", version 1) is specified in docs/check.md.
"""

from __future__ import annotations

import json
import math
import os
import xml.etree.ElementTree as ET
from pathlib import Path

from danpack.runtime.errors import DanpackError
from danpack.units import format_bytes

from danpack import __version__
from danpack.files import write_atomic
from danpack.check.compare import CheckResult
from danpack.check.verdict import Outcome, Verdict, format_value
from danpack.runtime.safe_text import escape_text

SCHEMA = "danpack-check-report"
VERSION = 1
TEXT_WIDTH = 100  # characters of a disagreeing text shown in the table and the Markdown
REQUIRED = {"schema", "version", "inputs", "settings", "figures", "per_class", "disagreements", "verdict",
            "baseline", "warnings"}


class ReportError(DanpackError):
    """A report file that is not a danpack check report this version can read."""


def _clean(obj):
    """JSON-safe copy: non-finite floats become null (JSON has no NaN), tuples become lists."""
    if isinstance(obj, dict):
        return {str(k): _clean(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_clean(v) for v in obj]
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    if hasattr(obj, "item") and not isinstance(obj, (str, bytes)):  # numpy scalars
        return _clean(obj.item())
    return obj


def build_report(result: CheckResult, verdict: Verdict, baseline: dict | None = None,
                 warnings: tuple[str, ...] = ()) -> dict:
    """The report dict of a finished check (schema version 1)."""
    return _clean({
        "schema": SCHEMA,
        "version": VERSION,
        "danpack": __version__,
        "inputs": result.inputs,
        "settings": result.settings,
        "figures": result.figures,
        "per_class": result.per_class,
        "disagreements": result.disagreements,
        "verdict": {
            "passed": verdict.passed,
            "exit_code": verdict.exit_code,
            "failures": len(verdict.failures),
            "checks": [o.to_dict() for o in verdict.outcomes],
        },
        "baseline": baseline,
        "warnings": list(result.warnings) + list(warnings),
    })


def dump_report(report: dict) -> str:
    return json.dumps(_clean(report), indent=2, ensure_ascii=False, allow_nan=False) + "\n"


def write_report(path: str | os.PathLike, report: dict) -> Path:
    """Write the JSON report atomically."""
    return write_atomic(path, dump_report(report).encode("utf-8"))


def read_report(path: str | os.PathLike) -> dict:
    """Read a report (e.g. a --baseline) and check it is one this version understands."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError as e:
        raise ReportError(f"{path}: no such report file") from e
    except (OSError, UnicodeDecodeError) as e:
        raise ReportError(f"{path}: cannot be read as UTF-8 text ({e})") from e
    try:
        report = json.loads(text)
    except json.JSONDecodeError as e:
        raise ReportError(f"{path}: not valid JSON (line {e.lineno}, column {e.colno}: {e.msg}); "
                          "pass a file written by `danpack check --report`") from e
    if not isinstance(report, dict) or report.get("schema") != SCHEMA:
        found = report.get("schema") if isinstance(report, dict) else type(report).__name__
        raise ReportError(f"{path}: schema is {found!r}, expected {SCHEMA!r}; "
                          "pass a file written by `danpack check --report`")
    version = report.get("version")
    if not isinstance(version, int) or isinstance(version, bool) or version < 1:
        raise ReportError(f"{path}: report version is {version!r}, expected an integer >= 1")
    if version > VERSION:
        raise ReportError(f"{path}: report version {version} is newer than this danpack reads ({VERSION}); "
                          "upgrade danpack")
    missing = REQUIRED - set(report)
    if missing:
        raise ReportError(f"{path}: report lacks the fields {sorted(missing)}")
    if not isinstance(report["figures"], dict):
        raise ReportError(f"{path}: field 'figures' must be an object")
    try:
        for part in ("reference", "eval", "bundle"):
            report["inputs"][part]["sha256"]  # noqa: B018  (presence check)
        list(report["inputs"]["reference"]["labels"])
    except (KeyError, TypeError) as e:
        raise ReportError(f"{path}: field 'inputs' lacks {e}; the report is incomplete") from e
    return report


def outcomes_of(report: dict) -> list[Outcome]:
    return [Outcome.from_dict(c) for c in report["verdict"]["checks"]]


# ---- shared pieces ------------------------------------------------------------------------------

def _size(n: float | None) -> str:
    return "n/a" if n is None else format_bytes(n)


def _short(text: str, width: int = TEXT_WIDTH) -> str:
    text = " ".join(text.split())
    return text if len(text) <= width else text[: width - 1] + "…"


def _rows(report: dict) -> list[tuple[str, str, str, str]]:
    """(figure, float, bundle, note) rows shared by the terminal table and the Markdown."""
    f, s = report["figures"], report["settings"]
    level = f"{100 * s['confidence']:g}%"
    rows = []
    if f.get("accuracy_float") is not None:
        rows.append(("accuracy", format_value(f["accuracy_float"], "share"), format_value(f["accuracy_bundle"], "share"),
                     f"drop {f['accuracy_drop_points']:+.2f} pt"))
        rows.append((f"  drop, {level} paired bootstrap", "", "",
                     f"{f['accuracy_drop_ci_low']:+.2f} .. {f['accuracy_drop_ci_high']:+.2f} pt "
                     f"({s['bootstrap_resamples']:,} resamples, seed {s['seed']})"))
        rows.append(("  McNemar exact p", "", "",
                     f"{f['mcnemar_p']:.3g} ({f['only_float_correct']} only float right, "
                     f"{f['only_bundle_correct']} only bundle right; p: how likely a split this uneven is "
                     "if both were equally accurate)"))
    rows.append(("agreement", "", format_value(f["agreement"], "share"),
                 f"{f['disagreements']:,} of {f['texts']:,} texts differ"))
    if f.get("reference_agreement") is not None:
        fw = "framework"
        if f.get("reference_accuracy") is not None:
            rows.append((f"accuracy, {fw} -> bundle", format_value(f["reference_accuracy"], "share"),
                         format_value(f["accuracy_bundle"], "share"),
                         f"drop {f['reference_accuracy_drop_points']:+.2f} pt (the '{fw}' column is your framework)"))
        rows.append((f"agreement with the {fw}", format_value(f["reference_float_agreement"], "share"),
                     format_value(f["reference_agreement"], "share"), "float reading | bundle"))
        diff = f.get("reference_float_max_abs_diff")
        rows.append((f"float reading vs {fw}", "", f"{f['reference_float_mismatches']:,} differ",
                     "" if diff is None else f"largest probability difference {diff:.2e} "
                     f"(tolerance {s.get('reference_tolerance') or 0:g})"))
    rows.append(("probability change, mean / max", "", f"{f['mean_abs_prob_diff']:.4f}",
                 f"max {f['max_abs_prob_diff']:.4f}"))
    rows.append(("KL(float || bundle), mean / max", "", f"{f['mean_kl']:.2e}",
                 f"max {f['max_kl']:.2e} nats (KL divergence: how far the probabilities moved, 0 = not at all)"))
    rows.append(("pruned share of known tokens", "", format_value(f["pruned_token_share"], "share"),
                 f"{f['pruned_tokens']:,} of {f['float_known_tokens']:,}; in "
                 f"{100 * f['texts_with_pruned_share']:.1f}% of texts"))
    if f.get("certified_share") is not None:
        covered, uncovered = f["certified_share_of_covered"], f.get("certified_share_of_uncovered")
        rows.append(("certified same class as float", "", format_value(f["certified_share"], "share"),
                     ("" if covered is None else f"{format_value(covered, 'share')} of texts with all tokens kept; ")
                     + ("" if uncovered is None else f"{format_value(uncovered, 'share')} of texts with unknown tokens; ")
                     + f"the device alone certifies {format_value(f['runtime_certified_share'], 'share')}"))
    rows.append(("size", _size(f["float_bytes"]), _size(f["bundle_bytes"]), f"{f['size_ratio']:.2f}x smaller"))
    if f.get("latency_ratio") is not None:
        lat = s.get("latency") or {}
        rows.append(("latency p50, one text", format_value(f["latency_p50_ms_float"], "ms"),
                     format_value(f["latency_p50_ms_bundle"], "ms"), f"{f['latency_ratio']:.2f}x"))
        rows.append(("latency p95, one text", format_value(f["latency_p95_ms_float"], "ms"),
                     format_value(f["latency_p95_ms_bundle"], "ms"), f"{f['latency_p95_ratio']:.2f}x"))
        rows.append((f"throughput, batch {lat.get('batch', '?')}", format_value(f["throughput_float"], "rate"),
                     format_value(f["throughput_bundle"], "rate"), f"{f['throughput_ratio']:.2f}x"))
    return rows


def _token_note(d: dict, limit: int = 5) -> str:
    parts = [f"{t['token']} {t['shift']:.3f}{' (pruned)' if t['status'] == 'pruned' else ''}"
             for t in d["tokens"][:limit]]
    return "; ".join(parts) if parts else "(no per-token shifts)"


# ---- terminal table -----------------------------------------------------------------------------

def render_table(report: dict) -> str:
    """The readable summary printed on stdout (warnings go to stderr, and into the JSON and Markdown)."""
    i = report["inputs"]
    ev = i["eval"]
    out = [f"danpack check: {i['bundle']['path']} against {i['reference']['path']} on {ev['path']} "
           f"({ev['texts']:,} texts, {'labelled' if ev['labelled'] else 'unlabelled'})", ""]
    rows = [("figure", "float", "bundle", "")] + _rows(report)
    w0 = max(len(r[0]) for r in rows)
    w1 = max(len(r[1]) for r in rows)
    w2 = max(len(r[2]) for r in rows)
    out += [f"{a:<{w0}}  {b:>{w1}}  {c:>{w2}}  {d}".rstrip() for a, b, c, d in rows]
    if report["per_class"]:
        out += ["", "recall by class"]
        wl = max(len(r["label"]) for r in report["per_class"])
        for r in report["per_class"]:
            out.append(f"  {r['label']:<{wl}}  float {format_value(r['recall_float'], 'share'):>7}  "
                       f"bundle {format_value(r['recall_bundle'], 'share'):>7}  ({r['support']:,} texts)")
    dis = report["disagreements"]
    if dis:
        total = report["figures"]["disagreements"]
        out += ["", f"where they disagree (top {len(dis)} of {total:,}, largest probability change first)"]
        for d in dis:
            label = f"label {d['label']} | " if d["label"] is not None else ""
            out.append(f"  #{d['index']}  {label}float {d['float']['label']} {d['float']['prob']:.2f} | "
                       f"bundle {d['bundle']['label']} {d['bundle']['prob']:.2f}")
            out.append(f"      {_short(d['text'])!r}")
            out.append(f"      pruned: {', '.join(d['pruned']) or 'none'}; mean shift by token: {_token_note(d)}")
    out += ["", "verdict"]
    outcomes = outcomes_of(report)
    width = max((len(o.name) for o in outcomes), default=0)  # the longest gate name sets the column
    for o in outcomes:
        out.append(f"  {o.status.upper():<4}  {o.name:<{width}}  {o.message}")
    v = report["verdict"]
    gated = sum(1 for c in v["checks"] if c["status"] != "skip")
    out.append(f"\n{'PASS' if v['passed'] else 'FAIL'}: {gated - v['failures']} of {gated} gates hold")
    return escape_text("\n".join(out), keep="\n") + "\n"  # labels, texts and paths shown, never obeyed


# ---- Markdown -----------------------------------------------------------------------------------

def _md(text: str) -> str:
    """Text safe inside a Markdown table cell."""
    return text.replace("\\", "\\\\").replace("|", "\\|").replace("\n", " ").replace("`", "'")


def render_markdown(report: dict) -> str:
    """A summary a CI job can post on a merge request."""
    i, v = report["inputs"], report["verdict"]
    ev = i["eval"]
    head = "PASS" if v["passed"] else f"FAIL ({v['failures']} failing)"
    out = [f"## danpack check: {head}", "",
           f"Bundle `{_md(Path(i['bundle']['path']).name)}` ({_size(i['bundle']['bytes'])}, sha256 "
           f"`{i['bundle']['sha256'][:12]}`) against float original `{_md(Path(i['reference']['path']).name)}` on "
           f"`{_md(Path(ev['path']).name)}` ({ev['texts']:,} {'labelled' if ev['labelled'] else 'unlabelled'} texts).",
           "", "| figure | float | bundle | note |", "|---|---:|---:|---|"]
    out += [f"| {_md(a.strip())} | {_md(b)} | {_md(c)} | {_md(d)} |" for a, b, c, d in _rows(report)]
    out += ["", "| gate | status | detail |", "|---|---|---|"]
    mark = {"pass": "pass", "fail": "**FAIL**", "skip": "skip"}
    out += [f"| {o.name} | {mark[o.status]} | {_md(o.message)} |" for o in outcomes_of(report)]
    if report["per_class"]:
        out += ["", "| label | recall float | recall bundle | texts |", "|---|---:|---:|---:|"]
        out += [f"| {_md(r['label'])} | {format_value(r['recall_float'], 'share')} | "
                f"{format_value(r['recall_bundle'], 'share')} | {r['support']:,} |" for r in report["per_class"]]
    if report["disagreements"]:
        out += ["", f"<details><summary>Texts where they disagree (top {len(report['disagreements'])} of "
                    f"{report['figures']['disagreements']:,})</summary>", ""]
        for d in report["disagreements"]:
            label = f"label {_md(d['label'])}; " if d["label"] is not None else ""
            out.append(f"- #{d['index']} {label}float **{_md(d['float']['label'])}** {d['float']['prob']:.2f}, "
                       f"bundle **{_md(d['bundle']['label'])}** {d['bundle']['prob']:.2f}: \"{_md(_short(d['text']))}\""
                       f" (pruned: {_md(', '.join(d['pruned'])) or 'none'}; shift: {_md(_token_note(d))})")
        out += ["", "</details>"]
    if report["warnings"]:
        out += [""] + [f"> warning: {_md(w)}" for w in report["warnings"]]
    return escape_text("\n".join(out), keep="\n") + "\n"


def write_markdown(path: str | os.PathLike, report: dict) -> Path:
    return write_atomic(path, render_markdown(report).encode("utf-8"))


# ---- JUnit XML ----------------------------------------------------------------------------------

def render_junit(report: dict) -> str:
    """One test suite; each threshold and baseline comparison a test case (failure / skipped / passed)."""
    outcomes = outcomes_of(report)
    failures = sum(o.status == "fail" for o in outcomes)
    skipped = sum(o.status == "skip" for o in outcomes)
    counts = {"tests": str(len(outcomes)), "failures": str(failures), "errors": "0", "skipped": str(skipped)}
    root = ET.Element("testsuites", name="danpack check", **counts)
    suite = ET.SubElement(root, "testsuite", name="danpack-check", **counts, time="0")
    props = ET.SubElement(suite, "properties")
    i = report["inputs"]
    for name, value in (("bundle", i["bundle"]["path"]), ("bundle_sha256", i["bundle"]["sha256"]),
                        ("reference", i["reference"]["path"]), ("eval", i["eval"]["path"]),
                        ("texts", str(i["eval"]["texts"])), ("report_schema", f"{SCHEMA}/{VERSION}")):
        ET.SubElement(props, "property", name=name, value=str(value))
    if report.get("warnings"):  # what a CI page shows: the warnings travel with the gates
        ET.SubElement(suite, "system-err").text = "\n".join(f"warning: {w}" for w in report["warnings"])
    for o in outcomes:
        group = "baseline" if o.name.startswith("baseline-") else "thresholds"
        case = ET.SubElement(suite, "testcase", classname=f"danpack.check.{group}", name=o.name, time="0")
        if o.status == "fail":
            failure = ET.SubElement(case, "failure", message=o.message, type=group)
            failure.text = f"figure {o.key} = {o.value!r}; limit {o.op} {o.limit!r}"
        elif o.status == "skip":
            ET.SubElement(case, "skipped", message=o.message)
        else:
            ET.SubElement(case, "system-out").text = o.message
    ET.indent(root)
    return ET.tostring(root, encoding="unicode", xml_declaration=True) + "\n"


def write_junit(path: str | os.PathLike, report: dict) -> Path:
    return write_atomic(path, render_junit(report).encode("utf-8"))
