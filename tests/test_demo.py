"""`danpack demo` end to end at full scenario size (about 5 s): every step runs and every file is written."""

from __future__ import annotations

import json

from typer.testing import CliRunner

from danpack.cli import app

RUNNER = CliRunner()


def test_demo_runs_the_whole_job(tmp_path):
    out = tmp_path / "demo"
    result = RUNNER.invoke(app, ["demo", "--out", str(out), "--no-latency", "--quiet"])
    assert result.exit_code == 0, result.stdout + result.stderr
    for name in ("sentiment.danpack", "stream-output.jsonl", "check-report.json", "check-summary.md",
                 "check-junit.xml", "data/stream.txt", "data/sentiment/test.jsonl"):
        assert (out / name).is_file(), name
    records = [json.loads(line) for line in (out / "stream-output.jsonl").read_text().splitlines()]
    assert len(records) == 200 and all(r["label"] in ("negative", "positive") for r in records)
    report = json.loads((out / "check-report.json").read_text())
    assert report["verdict"]["exit_code"] == 0 and report["verdict"]["passed"]
    assert report["figures"]["agreement"] >= 0.99
    assert "PASS" in result.stdout and "smaller than the float model" in result.stdout


def test_demo_refuses_an_unknown_task(tmp_path):
    result = RUNNER.invoke(app, ["demo", "--out", str(tmp_path), "--task", "weather"])
    assert result.exit_code == 2 and "not a shipped demo model" in result.stderr


def test_small_demo_passes_its_own_check(tmp_path):
    result = RUNNER.invoke(app, ["demo", "--out", str(tmp_path / "d"), "--small", "--no-latency", "--quiet"])
    assert result.exit_code == 0 and "PASS" in result.stdout, result.stdout


def test_demo_refuses_a_file_as_its_folder(tmp_path):
    (tmp_path / "afile").write_text("x")
    result = RUNNER.invoke(app, ["demo", "--out", str(tmp_path / "afile")])
    assert result.exit_code == 2 and "is a file; give a folder" in result.stderr
