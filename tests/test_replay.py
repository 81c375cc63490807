"""Offline replay: files of readings through the same engine, end to end through the command line."""

from __future__ import annotations

import csv
import json
import subprocess
import sys
import textwrap
from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
import pytest

from monitor.config import load_config_text
from monitor.replay import DataError, replay
from monitor.spc import ChartSet, Subgroup, constants
from tests.spc.data import PISTON_RING_DIAMETERS

# Montgomery, Introduction to Statistical Quality Control, Example 6.1 continued: the 15 further
# piston-ring samples (numbers 26-40) charted against the Phase I limits.
PISTON_RING_PHASE_TWO: tuple[tuple[float, ...], ...] = (
    (74.012, 74.015, 74.030, 73.986, 74.000),
    (73.995, 74.010, 73.990, 74.015, 74.001),
    (73.987, 73.999, 73.985, 74.000, 73.990),
    (74.008, 74.010, 74.003, 73.991, 74.006),
    (74.003, 74.000, 74.001, 73.986, 73.997),
    (73.994, 74.003, 74.015, 74.020, 74.004),
    (74.008, 74.002, 74.018, 73.995, 74.005),
    (74.001, 74.004, 73.990, 73.996, 73.998),
    (74.015, 74.000, 74.016, 74.025, 74.000),
    (74.030, 74.005, 74.000, 74.016, 74.012),
    (74.001, 73.990, 73.995, 74.010, 74.024),
    (74.015, 74.020, 74.024, 74.005, 74.019),
    (74.035, 74.010, 74.012, 74.015, 74.026),
    (74.017, 74.013, 74.036, 74.025, 74.026),
    (74.010, 74.005, 74.029, 74.000, 74.020),
)

PISTON_CONFIG = """\
charts:
  - id: piston-rings/inside-diameter
    subgroup: {size: 5}
    kinds: [xbar_r]
    limits:
      baseline: {subgroups: 25, sigma_from: range, exclude_out_of_control: false}
    rules: none
"""

START = datetime(2026, 1, 5, 6, 0, tzinfo=UTC)


def write_readings(path: Path, chart: str, rows: tuple[tuple[float, ...], ...], step_s: float = 60.0) -> None:
    with path.open("w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(["chart", "timestamp", "value"])
        k = 0
        for row in rows:
            for value in row:
                stamp = (START + timedelta(seconds=k * step_s)).isoformat().replace("+00:00", "Z")
                writer.writerow([chart, stamp, f"{value:.3f}"])
                k += 1


def run_cli(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "monitor", *args], capture_output=True, text=True, check=False, timeout=120
    )


def test_published_xbar_r_example_through_the_replay_command(tmp_path):
    """Montgomery's piston-ring X-bar/R example (Example 6.1) comes out of `monitor replay` as printed."""
    config = tmp_path / "pistons.yaml"
    config.write_text(PISTON_CONFIG)
    data = tmp_path / "rings.csv"
    write_readings(data, "piston-rings/inside-diameter", PISTON_RING_DIAMETERS + PISTON_RING_PHASE_TWO)
    out = tmp_path / "out.jsonl"
    result = run_cli("replay", "--config", str(config), "--data", str(data), "--out", str(out))
    assert result.returncode == 0, result.stderr
    lines = [json.loads(line) for line in out.read_text().splitlines()]
    (baseline,) = [x for x in lines if x["type"] == "baseline"]
    # Published (Montgomery Example 6.1): grand mean 74.001, R-bar 0.023, X-bar limits
    # 73.988 and 74.014, R chart LCL 0 and UCL 0.049, to three decimals. The book computes
    # the limits from the rounded mean and R-bar (74.001 + 0.577 x 0.023 = 74.0143), so the
    # unrounded limits agree with the printed ones to within one unit of the third decimal.
    r_bar = baseline["sigma"] * constants(5).d2
    assert round(baseline["mean"], 3) == 74.001
    assert round(r_bar, 3) == 0.023
    means = [x for x in lines if x["type"] == "point" and x["statistic"] == "mean"]
    ranges = [x for x in lines if x["type"] == "point" and x["statistic"] == "range"]
    assert len(means) == len(ranges) == 15
    assert means[0]["lower"] == pytest.approx(73.988, abs=1e-3)
    assert means[0]["upper"] == pytest.approx(74.014, abs=1e-3)
    assert (round(ranges[0]["lower"], 3), round(ranges[0]["upper"], 3)) == (0.0, 0.049)
    # Independent recomputation of the textbook formulas with numpy and the printed A2, D4
    # (Montgomery Appendix VI, n = 5: A2 = 0.577, D4 = 2.114).
    phase_one = np.array(PISTON_RING_DIAMETERS)
    grand, rbar = phase_one.mean(), np.ptp(phase_one, axis=1).mean()
    assert means[0]["upper"] == pytest.approx(grand + 0.577 * rbar, abs=5e-5)
    assert ranges[0]["upper"] == pytest.approx(2.114 * rbar, abs=5e-5)
    phase_two_means = np.array(PISTON_RING_PHASE_TWO).mean(axis=1)
    expected_out = [26 + i for i, m in enumerate(phase_two_means) if m > grand + 0.577 * rbar]
    # Value from memory: the text reports samples 37, 38 and 39 above the upper limit.
    assert expected_out == [37, 38, 39]
    signals = [x for x in lines if x["type"] == "signal"]
    assert [(s["subgroup"] + 1, s["statistic"], s["side"]) for s in signals] == [
        (37, "mean", "upper"),
        (38, "mean", "upper"),
        (39, "mean", "upper"),
    ]
    assert "piston-rings/inside-diameter: 200 readings, 40 subgroups" in result.stderr


def test_replay_equals_the_streaming_engine_on_the_demo_plant(tmp_path):
    """Replay (batch) gives the same signals as feeding the same readings one by one to the chart sets."""
    sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "scripts"))
    import plant_simulator  # noqa: PLC0415

    config_text = (Path(__file__).resolve().parents[1] / "config" / "demo.yaml").read_text()
    config = load_config_text(config_text, "demo.yaml")
    data = tmp_path / "plant.csv"
    plant_simulator.write_csv(data, minutes=60, seed=3)
    out = tmp_path / "signals.jsonl"
    with out.open("wb") as handle:
        summary = replay(config, data, handle, points=False)
    batch_signals = [json.loads(line) for line in out.read_text().splitlines() if '"signal"' in line]
    streamed = []
    for chart in config.charts:
        grouper = chart.subgrouper()
        chart_set = ChartSet(chart.spec())
        from monitor.spc import Reading  # noqa: PLC0415

        subgroups: list[Subgroup] = []
        for r in plant_simulator.readings(60, seed=3):
            if r.chart == chart.id:
                made = grouper.add(
                    Reading(r.value, round(r.time, 3), r.exposure if chart.spec().attribute else None)
                )
                subgroups.extend([made] if isinstance(made, Subgroup) else (made or []))
        if hasattr(grouper, "flush"):
            subgroups.extend(grouper.flush())
        for subgroup in subgroups:
            for signal in chart_set.update(subgroup):
                streamed.append((chart.id, signal.chart.value, signal.rule.value, signal.subgroup))
    assert [(s["chart"], s["kind"], s["rule"], s["subgroup"]) for s in batch_signals] == streamed
    assert sum(c.readings for c in summary.charts) > 0


def test_bad_rows_are_listed_and_skipped(tmp_path):
    """Rows with unusable values or times are reported by line number; the others are charted."""
    config = load_config_text(
        textwrap.dedent(
            """\
            charts:
              - id: a
                kinds: [individuals_mr]
                limits: {mean: 10, sigma: 1}
            """
        )
    )
    data = tmp_path / "mixed.csv"
    data.write_text(
        "chart,timestamp,value\n"
        "a,2026-01-05T06:00:00Z,10.1\n"
        "a,2026-01-05T06:00:01Z,ten\n"
        "a,yesterday,10.2\n"
        "a,2026-01-05T06:00:03Z,nan\n"
        ",2026-01-05T06:00:04Z,10.4\n"
        "b,2026-01-05T06:00:05Z,10.5\n"
        "a,1767592806,9.9\n"
    )
    summary = replay(config, data, None)
    assert [(p.line, p.reason) for p in summary.problems] == [
        (3, "value is not a finite number"),
        (4, "timestamp is not ISO 8601 or epoch seconds"),
        (5, "value is not a finite number"),
        (6, "empty chart"),
    ]
    assert summary.rows_skipped == 4
    assert summary.unrouted == 1
    assert summary.charts[0].readings == 2


def test_missing_columns_and_files_are_clear_errors(tmp_path):
    """A file without the needed columns, or no file at all, is one clear error."""
    config = load_config_text(
        "charts:\n  - id: a\n    kinds: [individuals_mr]\n    limits: {mean: 1, sigma: 1}\n"
    )
    bad = tmp_path / "bad.csv"
    bad.write_text("when,reading\n1,2\n")
    with pytest.raises(DataError, match="missing column"):
        replay(config, bad)
    with pytest.raises(DataError, match="no such file"):
        replay(config, tmp_path / "absent.csv")
    result = run_cli("replay", "--config", "/nonexistent.yaml", "--data", str(bad))
    assert result.returncode == 1
    assert "no such file" in result.stderr
    assert "Traceback" not in result.stderr


def test_topics_route_rows_to_every_matching_chart(tmp_path):
    """A topic column is matched against the charts' filters; one topic may feed several charts."""
    config = load_config_text(
        textwrap.dedent(
            """\
            charts:
              - id: all-presses
                topic: plant/+/thickness
                kinds: [individuals_mr]
                limits: {mean: 8, sigma: 0.1}
              - id: press-1
                topic: plant/press-1/#
                kinds: [individuals_mr]
                limits: {mean: 8, sigma: 0.1}
            """
        )
    )
    data = tmp_path / "topics.csv"
    data.write_text(
        "topic,timestamp,value\n"
        "plant/press-1/thickness,0,8.0\n"
        "plant/press-2/thickness,1,8.1\n"
        "plant/press-1/width,2,3.0\n"
        "other/press-1/thickness,3,8.0\n"
    )
    summary = replay(config, data)
    assert [(c.chart, c.readings) for c in summary.charts] == [("all-presses", 2), ("press-1", 2)]
    assert summary.unrouted == 1


def test_time_windows_in_replay_match_the_streaming_window_former(tmp_path):
    """Out-of-order readings go through the same window former as in the daemon."""
    config = load_config_text(
        textwrap.dedent(
            """\
            charts:
              - id: w
                subgroup: {window: 10s, min_size: 2, lateness: 2s}
                kinds: [xbar_s]
                limits: {mean: 0, sigma: 1}
                rules: none
            """
        )
    )
    data = tmp_path / "w.csv"
    rows = [(0, 1.0), (3, 2.0), (11, 3.0), (9, 4.0), (13, 5.0), (8, 6.0), (15, 7.0), (25, 8.0), (27, 9.0)]
    data.write_text("chart,timestamp,value\n" + "".join(f"w,{t},{v}\n" for t, v in rows))
    out = tmp_path / "w.jsonl"
    with out.open("wb") as handle:
        summary = replay(config, data, handle)
    points = [json.loads(x) for x in out.read_text().splitlines()]
    means = [p["value"] for p in points if p["type"] == "point" and p["statistic"] == "mean"]
    # window [0,10): 1, 2, 4 (9 arrives within the lateness); 8 arrives after 13 - 2 > 10: late
    # window [10,20): 3, 5, 7; window [20,30): 8, 9
    assert means == [pytest.approx(7 / 3), pytest.approx(5.0), pytest.approx(8.5)]
    assert summary.charts[0].late == 1


LABELLED_CONFIG = """\
charts:
  - id: kiln-7/exit-temperature
    subgroup: {size: 1}
    kinds: [individuals_mr]
    limits: {mean: 900.0, sigma: 4.0}
    rules: [beyond_limits]
"""


def write_labelled(path: Path, values: np.ndarray, labels: list[str]) -> None:
    with path.open("w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(["chart", "timestamp", "value", "label"])
        for k, (value, label) in enumerate(zip(values.tolist(), labels, strict=True)):
            stamp = (START + timedelta(seconds=10 * k)).isoformat().replace("+00:00", "Z")
            writer.writerow(["kiln-7/exit-temperature", stamp, f"{value:.4f}", label])


def test_false_alarms_on_labelled_in_control_stretch_match_the_normal_rate(tmp_path):
    """Over a long in-control stretch, observed beyond-limits signals agree with 0.0027 per point.

    0.0027 = 2 * Phi(-3), the two-sided 3-sigma tail of the normal law (Montgomery, Introduction to
    Statistical Quality Control, section 5.3: in-control ARL 370). The check is a Poisson 99.9 %
    interval around the expected count, so a wrong rate or a wrong stretch length fails it.
    """
    rng = np.random.default_rng(20261202)
    quiet = 20_000
    values = np.concatenate([rng.normal(900.0, 4.0, quiet), rng.normal(900.0 + 3 * 4.0, 4.0, 200)])
    labels = ["in control"] * quiet + ["burner fluttering"] * 200
    data = tmp_path / "kiln.csv"
    write_labelled(data, values, labels)
    summary = replay(load_config_text(LABELLED_CONFIG, "kiln.yaml"), data, None)
    (chart,) = summary.charts
    assert chart.labelled
    assert chart.in_control_subgroups == quiet
    rates = {(r.statistic, r.rule): r for r in chart.rates}
    individual = rates[("individual", "beyond_limits")]
    from scipy import stats  # noqa: PLC0415

    expected = 2 * stats.norm.sf(3.0) * quiet
    assert individual.expected == pytest.approx(expected, rel=1e-9)
    low, high = stats.poisson.interval(0.999, expected)
    assert low <= individual.observed <= high
    # the observed count is the signals inside the in-control stretch only, not those after the change
    total = chart.signals[("individuals_mr", "individual", "beyond_limits")]
    assert individual.observed < total
    assert ("moving_range", "beyond_limits") in rates


def test_labelled_changes_report_the_first_signal_after_them(tmp_path):
    """A labelled 3-sigma shift is flagged at or after its start, with the delay in subgroups and seconds."""
    rng = np.random.default_rng(7)
    values = np.concatenate(
        [
            rng.normal(900.0, 4.0, 300),
            rng.normal(900.0 + 5 * 4.0, 4.0, 50),  # a large shift: caught within a few points
            rng.normal(900.0, 4.0, 300),
            rng.normal(900.0, 4.0, 50),  # labelled trouble that never shows: no signal expected here
        ]
    )
    labels = ["ok"] * 300 + ["burner fluttering"] * 50 + ["ok"] * 300 + ["thermocouple check"] * 50
    data = tmp_path / "kiln.csv"
    write_labelled(data, values, labels)
    summary = replay(load_config_text(LABELLED_CONFIG, "kiln.yaml"), data, None)
    (chart,) = summary.charts
    changes = {c.label: c for c in chart.changes}
    assert set(changes) == {"burner fluttering", "thermocouple check"}
    shift = changes["burner fluttering"]
    assert shift.subgroup == 300
    assert shift.first_signal is not None
    assert 300 <= shift.first_signal < 310
    assert shift.delay_subgroups == shift.first_signal - 300
    assert shift.delay_seconds == pytest.approx(10.0 * shift.delay_subgroups)
    assert shift.rule == "beyond_limits"
    assert changes["thermocouple check"].subgroup == 650


def test_replay_summary_prints_rates_and_changes(tmp_path):
    """The command line shows observed against expected false alarms and each change's detection."""
    config = tmp_path / "kiln.yaml"
    config.write_text(LABELLED_CONFIG)
    rng = np.random.default_rng(11)
    values = np.concatenate([rng.normal(900.0, 4.0, 500), rng.normal(930.0, 4.0, 20)])
    data = tmp_path / "kiln.csv"
    write_labelled(data, values, ["in control"] * 500 + ["burner fluttering"] * 20)
    result = run_cli("replay", "--config", str(config), "--data", str(data), "--signals-only", "--quiet")
    assert result.returncode == 0, result.stderr
    (summary,) = [line for line in map(json.loads, result.stdout.splitlines()) if line["type"] == "summary"]
    assert summary["in_control_subgroups"] == 500
    assert summary["changes"][0]["label"] == "burner fluttering"
    assert summary["changes"][0]["first_signal"] == 500
    rates = {(r["statistic"], r["rule"]): r for r in summary["false_alarms"]}
    assert rates[("individual", "beyond_limits")]["expected"] == pytest.approx(500 * 0.0026998, rel=1e-4)
    assert "false alarms over 500 subgroups (labelled in control)" in result.stderr
    assert "beyond_limits on individual:" in result.stderr
    assert "change 'burner fluttering' at subgroup 500: first signal at subgroup 500" in result.stderr


def test_without_labels_everything_charted_counts_as_in_control(tmp_path):
    """No label column: rates are over all charted subgroups and no changes are reported."""
    rng = np.random.default_rng(5)
    data = tmp_path / "kiln.csv"
    with data.open("w", newline="") as handle:
        writer = csv.writer(handle)
        writer.writerow(["chart", "timestamp", "value"])
        for k, value in enumerate(rng.normal(900.0, 4.0, 400).tolist()):
            writer.writerow(["kiln-7/exit-temperature", 1_700_000_000 + 10 * k, value])
    summary = replay(load_config_text(LABELLED_CONFIG, "kiln.yaml"), data, None)
    (chart,) = summary.charts
    assert not chart.labelled
    assert chart.in_control_subgroups == 400
    assert chart.changes == []
