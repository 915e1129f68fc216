"""Tests of the check's outputs (packer/reports.py) and of --baseline comparisons.

Outside references: xml.etree.ElementTree (stdlib) parses the JUnit file; the JUnit XML
structure (testsuites > testsuite[tests, failures, skipped] > testcase > failure[message] /
skipped) is common practice for CI test reports; json (stdlib) reads the report back.
"""

from __future__ import annotations

import json
import xml.etree.ElementTree as ET

import numpy as np
import pytest

from danpack.check.compare import CheckOptions, run_check
from danpack.check.reports import (SCHEMA, VERSION, ReportError, build_report, read_report, render_junit, render_markdown,
                            render_table, write_report)
from danpack.check.verdict import Verdict, compare_baseline, evaluate, parse_tolerances, resolve_limits
from danpack.runtime import read_bundle
from test_check import NO_LATENCY, invoke, make_case, reencode


@pytest.fixture(scope="module")
def case(tmp_path_factory):
    return make_case(tmp_path_factory.mktemp("reports"))


@pytest.fixture(scope="module")
def heavy_report(case):
    """The report of a failing check (heavily pruned bundle), built in memory."""
    result = run_check(case.heavy, case.model_dir, case.eval_path, CheckOptions(show_disagreements=3))
    return build_report(result, Verdict(evaluate(result.figures, *resolve_limits({"max-bytes": 1.0}))))


def test_report_round_trip(heavy_report, tmp_path):
    path = write_report(tmp_path / "r.json", heavy_report)
    back = read_report(path)
    assert back == heavy_report
    assert back["schema"] == SCHEMA == "danpack-check-report" and back["version"] == VERSION == 1
    assert json.loads(path.read_text())["figures"]["texts"] == 1500
    # numbers survive exactly (JSON floats are shortest round-trip representations)
    assert back["figures"]["accuracy_drop_points"] == heavy_report["figures"]["accuracy_drop_points"]


def test_report_has_no_nan(heavy_report):
    text = json.dumps(heavy_report, allow_nan=False)  # raises on NaN / Infinity
    assert "latency_ratio" in text


@pytest.mark.parametrize("mutate,needle", [
    (lambda r: "not json {", "not valid JSON"),
    (lambda r: json.dumps([1, 2]), "schema is 'list'"),
    (lambda r: json.dumps({**r, "schema": "other-report"}), "schema is 'other-report'"),
    (lambda r: json.dumps({**r, "version": 2}), "newer than this danpack reads"),
    (lambda r: json.dumps({**r, "version": "1"}), "expected an integer"),
    (lambda r: json.dumps({k: v for k, v in r.items() if k != "figures"}), "lacks the fields ['figures']"),
    (lambda r: json.dumps({**r, "inputs": {"bundle": {}}}), "lacks"),
])
def test_read_report_refuses_bad_files(heavy_report, tmp_path, mutate, needle):
    path = tmp_path / "bad.json"
    path.write_text(mutate(heavy_report), encoding="utf-8")
    with pytest.raises(ReportError) as e:
        read_report(path)
    assert str(path) in str(e.value) and needle in str(e.value)


def test_junit_structure_and_counts(heavy_report, tmp_path):
    root = ET.fromstring(render_junit(heavy_report).encode("utf-8"))
    checks = heavy_report["verdict"]["checks"]
    n_fail = sum(c["status"] == "fail" for c in checks)
    n_skip = sum(c["status"] == "skip" for c in checks)
    assert n_fail >= 3 and n_skip >= 1  # agreement, accuracy drop and max-bytes fail; latency is not gated
    assert root.tag == "testsuites"
    suites = root.findall("testsuite")
    assert len(suites) == 1
    suite = suites[0]
    cases = suite.findall("testcase")
    assert int(suite.get("tests")) == len(cases) == len(checks)
    assert int(suite.get("failures")) == len(suite.findall("testcase/failure")) == n_fail
    assert int(suite.get("skipped")) == len(suite.findall("testcase/skipped")) == n_skip
    assert int(suite.get("errors")) == 0
    by_name = {c.get("name"): c for c in cases}
    failure = by_name["min-agreement"].find("failure")
    assert failure is not None and "below the limit >= 99.00%" in failure.get("message")
    assert by_name["min-size-ratio"].find("failure") is None  # passing cases carry no failure


def test_markdown_summary(heavy_report):
    md = render_markdown(heavy_report)
    assert md.startswith("## danpack check: FAIL")
    assert "| min-agreement | **FAIL** |" in md
    assert "| accuracy |" in md and "recall float" in md and "<details>" in md
    # every table row has the same number of unescaped cell separators as its header
    for block in md.split("\n\n"):
        rows = [r for r in block.splitlines() if r.startswith("|")]
        if rows:
            widths = {len(r.replace("\\|", "").split("|")) for r in rows}
            assert len(widths) == 1, rows


def test_markdown_escapes_pipes_in_texts(heavy_report):
    report = json.loads(json.dumps(heavy_report))
    report["disagreements"][0]["text"] = "slow | broken `cable`"
    report["warnings"] = ["a | b"]
    md = render_markdown(report)
    assert "slow \\| broken 'cable'" in md and "a \\| b" in md


def test_markdown_and_table_escape_control_and_bidi_characters(heavy_report):
    # hostile-input trial: eval texts, ids and paths reached the check table and the --markdown file raw
    from danpack.runtime.safe_text import is_clean

    report = json.loads(json.dumps(heavy_report))
    report["disagreements"][0]["text"] = "slow \x1b[2J\x1b]0;title\x07 \u009b31m \u202eevil"
    report["warnings"] = ["path \u2028 with a line separator"]
    for text in (render_markdown(report), render_table(report)):
        assert all(is_clean(line) for line in text.splitlines()), text
        assert "\\u202e" in text


def test_table_shows_figures_and_verdict(heavy_report):
    text = render_table(heavy_report)
    assert "agreement" in text and "McNemar exact p" in text and "where they disagree (top 3 of" in text
    assert text.rstrip().splitlines()[-1].startswith("FAIL:")


def test_cli_writes_all_outputs(case, tmp_path):
    res = invoke(case.heavy, "--reference", case.model_dir, "--eval", case.eval_path, *NO_LATENCY,
                 "--report", tmp_path / "r.json", "--markdown", tmp_path / "r.md", "--junit", tmp_path / "r.xml")
    assert res.exit_code == 1
    report = read_report(tmp_path / "r.json")
    assert (tmp_path / "r.md").read_text().startswith("## danpack check: FAIL")
    suite = ET.parse(tmp_path / "r.xml").getroot().find("testsuite")
    assert int(suite.get("failures")) == report["verdict"]["failures"] >= 2


# ---- baseline ----------------------------------------------------------------------------------

@pytest.fixture(scope="module")
def good_baseline(case, tmp_path_factory):
    path = tmp_path_factory.mktemp("baseline") / "good.json"
    res = invoke(case.good, "--reference", case.model_dir, "--eval", case.eval_path, *NO_LATENCY, "--report", path)
    assert res.exit_code == 0, res.output
    return path


def test_baseline_same_bundle_holds(case, good_baseline, tmp_path):
    res = invoke(case.good, "--reference", case.model_dir, "--eval", case.eval_path, *NO_LATENCY,
                 "--baseline", good_baseline, "--report", tmp_path / "again.json")
    assert res.exit_code == 0, res.output
    report = read_report(tmp_path / "again.json")
    statuses = {c["name"]: c["status"] for c in report["verdict"]["checks"]}
    assert statuses["baseline-accuracy"] == statuses["baseline-agreement"] == statuses["baseline-bytes"] == "pass"
    assert statuses["baseline-latency"] == "skip"
    assert report["baseline"]["path"] == str(good_baseline) and not report["warnings"]


def test_baseline_regression_fails(case, good_baseline, tmp_path):
    # the pruned bundle passes every absolute gate, but is worse than the quantised-only baseline
    res = invoke(case.pruned, "--reference", case.model_dir, "--eval", case.eval_path, *NO_LATENCY,
                 "--baseline", good_baseline, "--baseline-tolerance", "accuracy=0.1",
                 "--baseline-tolerance", "agreement=0.1", "--junit", tmp_path / "b.xml")
    assert res.exit_code == 1, res.output
    fails = [line for line in res.stdout.splitlines() if line.strip().startswith("FAIL ")]
    assert any("baseline-agreement" in line and "down" in line for line in fails)
    assert any("baseline-accuracy" in line for line in fails)
    assert not any(line.split()[1] in ("min-agreement", "max-points-lost") for line in fails)
    names = {c.get("name") for c in ET.parse(tmp_path / "b.xml").getroot().iter("testcase") if c.find("failure") is not None}
    assert {"baseline-agreement", "baseline-accuracy"} <= names
    # with the default tolerances (0.5 points) the same change is accepted or not, as the figures say
    loose = invoke(case.pruned, "--reference", case.model_dir, "--eval", case.eval_path, *NO_LATENCY,
                   "--baseline", good_baseline, "--baseline-tolerance", "accuracy=off", "--baseline-tolerance",
                   "agreement=off", "--baseline-tolerance", "drop=off")
    assert loose.exit_code == 0, loose.output


def test_baseline_bytes_regression():
    figures = {"bundle_bytes": 1060, "accuracy_bundle": 0.9, "agreement": 0.99, "accuracy_drop_points": 0.2}
    before = {"bundle_bytes": 1000, "accuracy_bundle": 0.9, "agreement": 0.99, "accuracy_drop_points": 0.2}
    out = {o.name: o for o in compare_baseline(figures, before, parse_tolerances([]))}
    assert out["baseline-bytes"].status == "fail" and "up 6.00 %" in out["baseline-bytes"].message
    out = {o.name: o for o in compare_baseline(figures, before, parse_tolerances(["bytes=6"]))}
    assert out["baseline-bytes"].status == "pass"  # exactly at the tolerance holds
    smaller = {**figures, "bundle_bytes": 500, "accuracy_bundle": 0.95}
    assert all(o.status in ("pass", "skip") for o in compare_baseline(smaller, before, parse_tolerances([])))


def test_baseline_of_other_labels_exit_2(case, good_baseline, tmp_path):
    report = json.loads(good_baseline.read_text())
    report["inputs"]["reference"]["labels"] = ["bad", "good"]
    other = tmp_path / "other.json"
    other.write_text(json.dumps(report), encoding="utf-8")
    res = invoke(case.good, "--reference", case.model_dir, "--eval", case.eval_path, *NO_LATENCY, "--baseline", other)
    assert res.exit_code == 2 and "same model lineage" in res.stderr


def test_baseline_of_another_float_model_warns(case, good_baseline, tmp_path):
    report = json.loads(good_baseline.read_text())
    report["inputs"]["reference"]["sha256"] = "0" * 64
    other = tmp_path / "older.json"
    other.write_text(json.dumps(report), encoding="utf-8")
    res = invoke(case.good, "--reference", case.model_dir, "--eval", case.eval_path, *NO_LATENCY, "--baseline", other,
                 "--report", tmp_path / "r.json")
    assert res.exit_code == 0
    assert "float original differs from the baseline's" in res.stderr
    assert any("float original differs" in w for w in read_report(tmp_path / "r.json")["warnings"])


def test_baseline_unreadable_exit_2(case, tmp_path):
    res = invoke(case.good, "--reference", case.model_dir, "--eval", case.eval_path, *NO_LATENCY,
                 "--baseline", tmp_path / "none.json")
    assert res.exit_code == 2 and "no such report file" in res.stderr


def test_damaged_bundle_regresses_against_baseline(case, good_baseline, tmp_path):
    table = np.array(read_bundle(case.good).tensors["table"])
    table[::2] = 0
    damaged = reencode(case.good, tmp_path / "zeroed.dpk", table=table)
    res = invoke(damaged, "--reference", case.model_dir, "--eval", case.eval_path, *NO_LATENCY,
                 "--baseline", good_baseline, "--report", tmp_path / "d.json")
    assert res.exit_code == 1
    failed = {c["name"] for c in read_report(tmp_path / "d.json")["verdict"]["checks"] if c["status"] == "fail"}
    assert {"baseline-accuracy", "baseline-agreement", "baseline-drop", "min-agreement"} <= failed
