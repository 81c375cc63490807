"""`monitor baseline` from files: Phase I estimates, exclusions, normality, the YAML snippet, errors."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from monitor.baseline import (
    CANDIDATE_SIZES,
    COSTLY_CANDIDATE_SIZES,
    estimate_baseline,
    normality,
    size_lines,
    suggest_subgroup_size,
    yaml_snippet,
)
from monitor.config import load_config_text
from monitor.signal_pvalues import parent_from_record, parse_parent_choice
from monitor.spc import SubgroupBatch, constants, laws
from monitor.spc.parents import Parent
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
    # the snippet pins the fitted model, in the form the configuration reads, and the stored
    # limits version carries it for a daemon whose chart fits its parent ("parent: auto")
    model = result.parent.model
    assert model is not None
    setting = next(line for line in yaml_snippet(result).splitlines() if line.startswith("parent:"))
    written = setting.split('"')[1]
    again = parse_parent_choice(written).parent
    assert again is not None
    assert again.name == model.name
    for key, value in model.params:
        assert again.param(key) == pytest.approx(value, rel=1e-6)
    assert parent_from_record(result.detail()["parent_record"]) == model


def test_near_normal_readings_keep_the_normal_model_as_the_daemon_would():
    """When normal is within 2 AIC of the best family, the baseline reports normal (no parent line)."""
    rng = np.random.default_rng(0)
    chart = load_config_text(
        "charts:\n  - id: kiln/draft\n    subgroup: {size: 4}\n    kinds: [xbar_r]\n"
        "    limits: {baseline: {subgroups: 25}}\n",
        "kiln.yaml",
    ).charts[0]
    result = estimate_baseline(chart, SubgroupBatch.from_rows(rng.normal(50.0, 2.0, (100, 4))), source="t")
    assert result.parent is not None
    assert result.parent.chosen.startswith("normal(")
    assert "parent:" not in yaml_snippet(result)


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


# ---------------------------------------------------------------- the subgroup-size suggestion

NOMINAL = 2.0 * stats.norm.sf(3.0)  # 0.0026998: two-sided tail of the normal beyond 3 sigma (scipy)


def size_chart(n: int):
    return load_config_text(
        f"charts:\n  - id: kiln/draft\n    subgroup: {{size: {n}}}\n    kinds: [xbar_r]\n"
        "    limits: {baseline: {subgroups: 25}}\n",
        "kiln.yaml",
    ).charts[0]


def witness(parent: Parent):
    """The same parent as a scipy.stats distribution: an independent sampler for Monte Carlo."""
    p = dict(parent.params)
    if parent.name == "gamma":
        return stats.gamma(p["shape"], scale=p["scale"])
    if parent.name == "lognormal":
        return stats.lognorm(p["log_sd"], scale=np.exp(p["log_mean"]))
    if parent.name == "weibull":
        return stats.weibull_min(p["shape"], scale=p["scale"])
    assert parent.name == "normal", parent.describe()
    return stats.norm(p["mean"], p["sd"])


def test_normal_readings_get_the_promised_rate_at_every_size_and_the_smallest_size():
    """Means of normal readings are normal: every size gives 2 P(Z > 3) = 0.0027 (scipy.stats.norm)."""
    rng = np.random.default_rng(8)
    result = estimate_baseline(
        size_chart(5), SubgroupBatch.from_rows(rng.normal(0.0, 1.0, (80, 5))), source="t"
    )
    size = result.size
    assert size is not None
    assert result.parent is not None
    assert result.parent.best_family == "normal"  # readings of both signs: only the normal family fits
    assert size.nominal == pytest.approx(NOMINAL, rel=1e-12)
    assert [r.n for r in size.rates] == [1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 12, 15, 20, 25]
    for r in size.rates:
        assert r.lower == pytest.approx(stats.norm.sf(3.0), rel=1e-9)
        assert r.upper == pytest.approx(stats.norm.sf(3.0), rel=1e-9)
    assert size.suggested == 1


def test_a_skewed_parent_gets_a_larger_suggested_size_than_a_normal_one():
    """The skewness of a mean of n readings is the parent's over sqrt(n) (common practice, no source).

    So seeded gamma readings (shape 8, skewness 0.71) need larger subgroups than normal ones
    before normal-theory limits keep their promise; at the chart's size the rate is too high.
    """
    rng = np.random.default_rng(12)
    skewed = estimate_baseline(
        size_chart(5), SubgroupBatch.from_rows(rng.gamma(8.0, 1.5, (100, 5))), source="t"
    )
    normal = estimate_baseline(
        size_chart(5), SubgroupBatch.from_rows(rng.normal(0.0, 1.0, (100, 5))), source="t"
    )
    assert skewed.size is not None
    assert normal.size is not None
    assert skewed.size.suggested is not None
    assert normal.size.suggested is not None
    assert skewed.size.suggested > normal.size.suggested
    at_five = skewed.size.rate_at(5)
    assert at_five is not None
    assert at_five.total > 1.25 * NOMINAL
    assert at_five.upper > at_five.lower  # a right-skewed mean crosses the upper limit more often
    # the rule as stated: from the suggestion on, every candidate is within 25 % of the promise
    for r in skewed.size.rates:
        inside = abs(r.total / NOMINAL - 1.0) <= 0.25
        assert inside == (r.n >= skewed.size.suggested)


@pytest.mark.parametrize(
    ("draw", "n"),
    [
        (lambda rng: rng.gamma(2.0, 1.5, (120, 4)), 4),
        (lambda rng: rng.lognormal(0.0, 0.5, (120, 5)), 5),
    ],
    ids=["gamma-readings", "lognormal-readings"],
)
def test_the_rate_at_the_current_size_agrees_with_a_monte_carlo_of_the_fitted_parent(draw, n):
    """Means of n draws from the fitted parent (sampled by scipy.stats) cross mean -/+ 3 sd / sqrt(n)
    as often as reported, within 4.5 binomial standard errors (seeded witness)."""
    result = estimate_baseline(
        size_chart(n), SubgroupBatch.from_rows(draw(np.random.default_rng(21))), source="t", exclude=False
    )
    assert result.parent is not None
    parent = result.parent.model
    assert parent is not None
    assert result.size is not None
    reported = result.size.rate_at(n)
    assert reported is not None
    subgroups = 400_000
    means = witness(parent).rvs(size=(subgroups, n), random_state=np.random.default_rng(99)).mean(axis=1)
    half = 3.0 * parent.sd() / np.sqrt(n)
    for side, count in (
        (reported.lower, int((means < parent.mean() - half).sum())),
        (reported.upper, int((means > parent.mean() + half).sum())),
    ):
        error = np.sqrt(max(side, 1.0 / subgroups) * (1.0 - side) / subgroups)
        assert abs(count / subgroups - side) <= 4.5 * error, (parent.describe(), side, count / subgroups)
    assert reported.total > 1.5 * NOMINAL  # and both parents really are far from the promise


def test_the_search_builds_few_laws_for_costly_parents_and_finds_the_stated_size(monkeypatch):
    """Lognormal laws take seconds each: a bisection over fewer sizes; cheap parents get every size.

    The rates come from a made-up decreasing function, so the answer is known by brute force.
    """
    calls: list[tuple[str, int]] = []

    def fake_rate(parent, n, *, limit_sigma=3.0):
        calls.append((parent.name, n))
        total = NOMINAL * (1.0 + 1.0 / np.sqrt(n))  # within 25 % from n = 16 on
        return 0.25 * total, 0.75 * total

    monkeypatch.setattr(laws, "true_false_alarm_rate", fake_rate)

    def brute_force(sizes):
        return min(n for n in sizes if all(1.0 / np.sqrt(m) <= 0.25 for m in sizes if m >= n))

    messages: list[str] = []
    costly = suggest_subgroup_size(
        Parent.of("lognormal", log_mean=0.0, log_sd=0.5), 4, progress=messages.append
    )
    assert len(messages) == len(calls)  # every law built is announced (seconds each)
    assert costly.search == "bisection"
    assert costly.suggested == brute_force(COSTLY_CANDIDATE_SIZES) == 25
    assert len(calls) <= 2 + int(np.ceil(np.log2(len(COSTLY_CANDIDATE_SIZES))))
    assert {n for _, n in calls} <= {4, *COSTLY_CANDIDATE_SIZES}
    assert costly.rate_at(4) is not None  # the current size is always reported
    calls.clear()
    cheap = suggest_subgroup_size(Parent.of("gamma", shape=3.0, scale=1.0), 4)
    assert cheap.search == "every candidate"
    assert cheap.suggested == brute_force(CANDIDATE_SIZES) == 20
    assert sorted(n for _, n in calls) == sorted(CANDIDATE_SIZES)


def test_a_law_that_fails_stops_the_search_with_the_reason(monkeypatch):
    """A law of the mean that cannot be built gives no suggestion and says why, instead of a traceback."""

    def failing(parent, n, *, limit_sigma=3.0):
        if n > 2:
            raise OverflowError("cannot convert float infinity to integer")
        return 0.001, 0.002

    monkeypatch.setattr(laws, "true_false_alarm_rate", failing)
    found = suggest_subgroup_size(Parent.of("gamma", shape=3.0, scale=1.0), 2)
    assert found.suggested is None
    assert found.problem is not None
    assert "mean of 3 readings" in found.problem
    assert "no suggestion" in "\n".join(size_lines(found))


def test_the_command_prints_the_size_suggestion_and_puts_it_in_the_json(pistons):
    """Text and --json both carry the rate at the chart's size (n = 5) and the suggestion, under stable keys."""
    config, data = pistons
    found = json.loads(
        run_cli("baseline", "--config", str(config), "--chart", CHART, "--data", str(data), "--json").stdout
    )
    size = found["subgroup_size"]
    assert set(size) == {
        "parent", "limit_sigma", "nominal_rate", "tolerance", "current", "current_rate", "suggested",
        "rule", "search", "candidates", "rates", "problem",
    }  # fmt: skip
    assert size["current"] == 5
    assert size["nominal_rate"] == pytest.approx(NOMINAL, rel=1e-12)
    assert set(size["current_rate"]) == {"n", "lower", "upper", "total", "times_nominal"}
    assert size["current_rate"]["n"] == 5
    assert size["parent"] == found["parent"]["chosen"]
    text = run_cli("baseline", "--config", str(config), "--chart", CHART, "--data", str(data))
    assert text.returncode == 0, text.stderr
    assert "x promised" in text.stdout
    assert "<- current size" in text.stdout
    assert "probability limits" in text.stdout
    if size["suggested"] is not None:
        assert f"suggested subgroup size: {size['suggested']} " in text.stdout
