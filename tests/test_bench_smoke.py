"""Smoke test of the bench's helpers on synthetic numbers: statistics, formatting, tables, targets.

No timing is asserted anywhere (performance lives in bench/ itself); these only check that the
helpers the report is built from compute and format what they claim.
"""

from __future__ import annotations

import statistics

import numpy as np
import pytest

from bench import contenders as ct
from bench.cases import CaseReport
from bench.report import judge, render_results, targets_table
from bench.stats import (fmt_bytes, fmt_percent, fmt_rate, fmt_ratio, fmt_seconds, fmt_spread, paired_ratios,
                         summarize)
from bench.tables import Table, make_table, render_markdown, render_text
from bench.timing import interleave


def test_summarize_matches_numpy_and_statistics():
    values = np.random.default_rng(3).lognormal(mean=-10, sigma=0.5, size=501)  # latency-like, right-skewed
    s = summarize(values)
    assert s.n == 501
    assert s.median == pytest.approx(statistics.median(values))  # stdlib statistics.median
    q1, q3, p99 = np.percentile(values, [25, 75, 99])  # numpy's linear percentiles (the documented method)
    assert (s.q1, s.q3, s.p99) == pytest.approx((q1, q3, p99))
    assert s.iqr == pytest.approx(q3 - q1)
    assert (s.low, s.high) == (values.min(), values.max())
    assert s.scaled(1e6).median == pytest.approx(s.median * 1e6)
    with pytest.raises(ValueError):
        summarize([])


def test_paired_ratios_are_round_by_round():
    a, b = [2.0, 9.0, 4.0], [1.0, 3.0, 8.0]
    assert list(paired_ratios(a, b)) == [2.0, 3.0, 0.5]
    assert summarize(paired_ratios(a, b)).median == 2.0  # median of ratios, not ratio of medians (4/3)
    with pytest.raises(ValueError):
        paired_ratios([1.0], [1.0, 2.0])


def test_formatting_helpers():
    assert fmt_seconds(41.23e-6) == "41.2 µs"
    assert fmt_seconds(3.071e-3) == "3.07 ms"
    assert fmt_seconds(0.2504) == "250.4 ms"
    assert fmt_seconds(12.4) == "12.40 s"
    assert fmt_rate(41_234.0) == "41,200/s"
    assert fmt_rate(123_456.0) == "123,000/s"
    assert fmt_rate(12.34) == "12.3/s"
    assert fmt_bytes(83_415_694) == "83.42 MB"
    assert fmt_bytes(1_250_000_000) == "1.25 GB"
    assert fmt_bytes(999) == "999 B"
    assert fmt_ratio(1780.9) == "1780.9x" and fmt_ratio(1.234) == "1.23x"
    assert fmt_percent(0.9955) == "99.55%"
    s = summarize([1e-6, 2e-6, 3e-6, 4e-6, 5e-6])
    assert fmt_spread(s, fmt_seconds) == "3.0 µs (IQR 2.0 µs–4.0 µs)"


def test_tables_render_markdown_and_text():
    t = make_table("Speed", ["contender", "p50", "rate"], [("packed | ort", "41.2 µs", "40,000/s"), ("float", "50.0 µs", "n/a")],
                   note="medians")
    md = render_markdown(t)
    lines = md.splitlines()
    assert lines[0] == "**Speed**"
    assert lines[2] == "| contender | p50 | rate |"
    assert lines[3] == "|---|---:|---:|"  # figures right-aligned, labels left
    assert "packed \\| ort" in md  # a pipe inside a cell is escaped, the grid stays intact
    assert md.rstrip().endswith("_medians_")
    text = render_text(t).splitlines()
    assert text[0] == "Speed"
    widths = {len(line) for line in text[2:5]}
    assert len(widths) == 1  # header, rule and rows padded to the same width


def test_table_refuses_a_row_of_the_wrong_length():
    with pytest.raises(ValueError, match="has 2 cells, expected 3"):
        Table("t", ("a", "b", "c"), (("1", "2"),))


def test_interleave_rotates_the_order_each_round():
    order: list[str] = []
    calls = {name: (lambda i, n=name: order.append(f"{n}{i}")) for name in "ABC"}
    seconds = interleave(calls, rounds=3, warmup=0)
    assert order == ["A0", "B0", "C0", "B1", "C1", "A1", "C2", "A2", "B2"]
    assert set(seconds) == {"A", "B", "C"} and all(len(v) == 3 and (v >= 0).all() for v in seconds.values())


def _fake_reports() -> dict[str, CaseReport]:
    demo = CaseReport("demo-sentiment", "1. Demo sentiment")
    demo.figures.update({
        f"latency_p50.{ct.PACKED_ORT}": 45e-6, f"latency_p99.{ct.PACKED_ORT}": 300e-6,
        f"throughput.256.{ct.PACKED_ORT}": 52_000.0, "stream_lines_per_s": 30_000.0, f"cold.{ct.PACKED_ORT}": 0.02,
        f"speedup.32.{ct.FLOAT_ONNX}": 1.3, f"speedup.256.{ct.FLOAT_ONNX}": 1.1, f"throughput.256.{ct.FLOAT_ONNX}": 50_000.0,
        "profile.256.tokenize": 8e-6, "profile.256.encode": 9e-6, "profile.256.backend": 2e-6,
        "profile.256.predict": 11e-6, "profile.1.tokenize": 8e-6, "profile.1.encode": 10e-6,
        "profile.1.backend": 20e-6, "profile.1.predict": 45e-6,
    })
    demo.tables.append(make_table("Size", ["artifact", "bytes"], [("bundle", "42.8 kB")]))
    glove = CaseReport("glove", "2. GloVe")
    glove.figures.update({"size_ratio": 1700.0, f"agreement.{ct.PACKED_ORT}": 0.994})
    synthetic = CaseReport("synthetic", "3. Synthetic")
    synthetic.figures.update({"pack_seconds": 3.2, "pack_peak": 820e6, "table_bytes": 480e6, "rows": 400_000, "dim": 300})
    return {r.key: r for r in (demo, glove, synthetic)}


def test_judge_marks_met_missed_and_unmeasured():
    targets = {t.name: t for t in judge(_fake_reports())}
    assert targets["GloVe bundle size"].met is True
    assert targets["GloVe bundle agreement"].met is False  # 99.4% < 99.5%
    assert targets["demo sentiment: single predict p50"].met is True
    p99 = targets["demo sentiment: single predict p99"]
    assert p99.met is False and "tokenizer" in p99.why  # a missed target says where the time goes
    assert targets["demo sentiment: batch 32 throughput vs float ONNX model"].met is True
    missed = targets["demo sentiment: batch 256 throughput vs float ONNX model"]
    assert missed.met is False
    # Amdahl's law: ratio 1.1 measured, tokenizer + lookup 9 of 11 µs shared -> 1.1 / (9 / 11) = 1.34x at most
    assert "at most 1.10x / 0.82 = 1.34x" in missed.why
    assert targets["demo topic: batch 32 throughput vs float ONNX model"].met is None  # not in this run
    assert targets["synthetic 400,000 x 300: pack peak memory"].measured.startswith("1.71x")


def test_render_results_names_machine_targets_and_misses():
    machine = {"date": "2030-01-01 00:00 UTC", "cpu": "Test CPU", "cores": 2, "usable_cores": 2, "memory": 8e9,
               "system": "Linux", "libraries": {"numpy": "2.0"}, "threads": {"OMP_NUM_THREADS": "1"},
               "load_average": (0.1, 0.2, 0.3)}
    reports = _fake_reports()
    targets = judge(reports)
    text = render_results(machine, list(reports.values()), targets, 600.0, False, "python -m bench")
    assert "Test CPU" in text and "2030-01-01" in text and "numpy 2.0" in text
    assert "### Missed targets" in text and "**GloVe bundle agreement**" in text
    assert "## 1. Demo sentiment" in text and "| bundle | 42.8 kB |" in text
    assert render_markdown(targets_table(targets)).count("MISSED") == sum(t.met is False for t in targets)


def test_hostile_bounds_child_measures_a_refusal_and_the_memory_it_took(tmp_path):
    # bench.hostile_bounds: one fresh child per attack; its figures must see a real allocation (a crafted bundle
    # carrying a 16 MiB inline constant is read whole before the graph comparison refuses it)
    import onnx

    from bench import hostile_bounds as hb

    corpus = hb._corpus_maker()
    base = corpus.build_base_bundle(tmp_path)
    heavy = tmp_path / "heavy.bundle"
    heavy.write_bytes(corpus.with_graph(base, lambda m: m.graph.initializer.append(
        onnx.numpy_helper.from_array(np.ones(4 << 20, np.float32), "ballast"))))
    attack = hb.Attack("g", "heavy", "load", (str(heavy),), (str(heavy),))
    result = hb.run_attack(attack, tmp_path / "run")
    assert result["outcome"].startswith("refused (BundleError): {source}: graph is not the one danpack writes")
    assert 16 << 20 <= result["extra"] <= 10 * heavy.stat().st_size and 0 <= result["cpu"] < 5
    assert hb.within_rule(heavy.stat().st_size, result) == (True, True)
    assert hb.within_rule(1000, {"extra": 33 << 20, "cpu": 0.1}) == (False, True)  # 32 MiB allowance
    assert hb.within_rule(4 << 20, {"extra": 33 << 20, "cpu": 1.0}) == (True, True)  # 10 x 4 MiB
    assert hb.within_rule(2048, {"extra": 0, "cpu": 2.5}) == (True, False)  # 1 s per KB: 2 s


def test_hostile_vocab_probe_codes_budget():
    from bench.hostile_vocab_probe import coded_texts, codes_budget

    assert codes_budget(32) == 33 and codes_budget(32 * 512) == 5609  # empty code, 32 of weight 1, 496, 4960, 120
    texts = coded_texts(600, 512)
    membership = {row: tuple(b for b, t in enumerate(texts) if row in t) for row in range(600)}
    assert len(set(membership.values())) == 600 and coded_texts(400_000, 512) is None
