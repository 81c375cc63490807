"""`monitor baseline` from files: Phase I estimates, exclusions, normality, the YAML snippet, errors."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from monitor.baseline import estimate_baseline, normality
from monitor.config import load_config_text
from monitor.spc import SubgroupBatch, constants
from tests.spc.data import PISTON_RING_DIAMETERS
from tests.test_replay import PISTON_CONFIG, write_readings

CHART = "piston-rings/inside-diameter"


def run_cli(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "monitor", *args], capture_output=True, text=True, check=False, timeout=120
    )


@pytest.fixture
def pistons(tmp_path: Path) -> tuple[Path, Path]:
    config = tmp_path / "pistons.yaml"
    config.write_text(PISTON_CONFIG)
    data = tmp_path / "rings.csv"
    write_readings(data, CHART, PISTON_RING_DIAMETERS)
    return config, data


def test_published_piston_ring_baseline_through_the_command(pistons):
    """Montgomery, Introduction to Statistical Quality Control, Example 6.1: x-double-bar 74.001, R-bar 0.023.

    Sigma is R-bar / d2 with d2(5) = 2.326 (the book's Appendix VI); the command prints limits
    that reproduce the book's to its three printed decimals.
    """
    config, data = pistons
    result = run_cli("baseline", "--config", str(config), "--chart", CHART, "--data", str(data), "--json")
    assert result.returncode == 0, result.stderr
    found = json.loads(result.stdout)
    assert found["mean"] == pytest.approx(74.001, abs=5e-4)
    assert found["sigma"] * 2.326 == pytest.approx(0.023, abs=5e-4)
    assert found["estimator"] == "range"
    assert (found["subgroups_offered"], found["subgroups_used"], found["readings"]) == (25, 25, 125)
    assert found["excluded"] == []
    # the book's X-bar limits 73.988 and 74.014 from the printed snippet's values
    a2 = constants(5).A2
    r_bar = found["sigma"] * constants(5).d2
    assert found["mean"] - a2 * r_bar == pytest.approx(73.988, abs=1e-3)
    assert found["mean"] + a2 * r_bar == pytest.approx(74.014, abs=1e-3)
    assert (
        found["yaml"].splitlines()[1] == f"limits: {{mean: {found['mean']:.7g}, sigma: {found['sigma']:.7g}}}"
    )
    text = run_cli("baseline", "--config", str(config), "--chart", CHART, "--data", str(data))
    assert text.returncode == 0, text.stderr
    assert "25 used of 25 (125 readings)" in text.stdout
    assert "limits: {mean: 74.00118" in text.stdout


def test_an_out_of_control_subgroup_is_excluded_and_named_by_its_number(tmp_path):
    """A subgroup with a range beyond its limit is left out with its own number; the rest is the book's."""
    wild = (73.950, 74.050, 74.000, 73.990, 74.010)  # range 0.100 against the book's UCL 0.049
    rows = (*PISTON_RING_DIAMETERS[:10], wild, *PISTON_RING_DIAMETERS[10:])
    config = tmp_path / "pistons.yaml"
    config.write_text(PISTON_CONFIG)
    data = tmp_path / "rings.csv"
    write_readings(data, CHART, rows)
    result = run_cli(
        "baseline", "--config", str(config), "--chart", CHART, "--data", str(data), "--exclude", "--json"
    )
    assert result.returncode == 0, result.stderr
    found = json.loads(result.stdout)
    assert [(e["subgroup"], e["statistic"]) for e in found["excluded"]] == [(10, "range")]
    clean = np.array(PISTON_RING_DIAMETERS)
    assert found["mean"] == pytest.approx(clean.mean(), rel=1e-12)
    assert found["rounds"] == 2
    ranges = clean.max(axis=1) - clean.min(axis=1)
    assert found["sigma"] == pytest.approx(ranges.mean() / constants(5).d2, rel=1e-12)
    # without exclusion the wild subgroup stays in
    kept = run_cli(
        "baseline", "--config", str(config), "--chart", CHART, "--data", str(data), "--no-exclude", "--json"
    )
    assert json.loads(kept.stdout)["excluded"] == []


def test_first_and_time_span_select_the_subgroups(pistons):
    """--first keeps the first N subgroups; --since/--until keep those ending in the span."""
    config, data = pistons
    first = json.loads(
        run_cli(
            "baseline",
            "--config",
            str(config),
            "--chart",
            CHART,
            "--data",
            str(data),
            "--first",
            "10",
            "--json",
        ).stdout
    )
    assert first["subgroups_offered"] == 10
    assert first["mean"] == pytest.approx(np.array(PISTON_RING_DIAMETERS[:10]).mean(), rel=1e-12)
    # readings a minute apart from 06:00: subgroup k ends at 06:00 + (5k + 4) minutes
    span = json.loads(
        run_cli(
            "baseline", "--config", str(config), "--chart", CHART, "--data", str(data),
            "--since", "2026-01-05T06:24:00Z", "--until", "2026-01-05T07:00:00Z", "--json",
        ).stdout
    )  # fmt: skip
    assert span["subgroups_offered"] == 8  # subgroups 4..11 end at 06:24 .. 06:59
    assert span["mean"] == pytest.approx(np.array(PISTON_RING_DIAMETERS[4:12]).mean(), rel=1e-12)


def test_normality_check_tells_a_skewed_process_from_a_normal_one():
    """Shapiro-Wilk (scipy.stats.shapiro) keeps normal readings and rejects lognormal ones (sd of log 0.8)."""
    rng = np.random.default_rng(42)
    assert normality(rng.normal(10.0, 1.0, 300)).plausible
    skewed = normality(rng.lognormal(0.0, 0.8, 300))
    assert not skewed.plausible
    assert skewed.skewness > 1.0
    assert normality(rng.normal(0.0, 1.0, 6000)).test == "D'Agostino-Pearson"


def test_a_skewed_baseline_gets_a_skewed_parent_model():
    """Gamma readings (shape 2) are fitted by a right-skewed family, not the normal."""
    rng = np.random.default_rng(3)
    chart = load_config_text(
        "charts:\n  - id: kiln/draft\n    subgroup: {size: 4}\n    kinds: [xbar_r]\n"
        "    limits: {baseline: {subgroups: 25}}\n",
        "kiln.yaml",
    ).charts[0]
    batch = SubgroupBatch.from_rows(rng.gamma(2.0, 1.5, (100, 4)))
    result = estimate_baseline(chart, batch, source="test", exclude=False)
    assert result.parent is not None
    assert result.parent.best_family in ("gamma", "weibull", "lognormal")
    assert result.normality is not None
    assert not result.normality.plausible


def test_bad_requests_get_clear_errors(pistons, tmp_path):
    """Unknown chart, too few subgroups, a bad time and a missing file each get one clear message."""
    config, data = pistons
    unknown = run_cli("baseline", "--config", str(config), "--chart", "press/none", "--data", str(data))
    assert unknown.returncode == 1
    assert "no chart 'press/none'" in unknown.stderr
    few = run_cli("baseline", "--config", str(config), "--chart", CHART, "--data", str(data), "--first", "1")
    assert few.returncode == 1
    assert "from " in few.stderr
    assert "needs 2 subgroups, has 1" in few.stderr
    when = run_cli(
        "baseline", "--config", str(config), "--chart", CHART, "--data", str(data), "--since", "yesterday"
    )
    assert when.returncode == 1
    assert "'yesterday' is not an ISO 8601 time" in when.stderr
    missing = run_cli(
        "baseline", "--config", str(config), "--chart", CHART, "--data", str(tmp_path / "nothing.csv")
    )
    assert missing.returncode == 1
    assert "nothing.csv" in missing.stderr
    assert "Traceback" not in unknown.stderr + few.stderr + when.stderr + missing.stderr
