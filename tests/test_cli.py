"""The command line: the design calculations in their documented forms, and check's budgets."""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap

import pytest


def monitor(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "monitor", *args], capture_output=True, text=True, check=False, timeout=180
    )


def as_json(*args: str) -> dict[str, object]:
    result = monitor(*args)
    assert result.returncode == 0, result.stderr
    return json.loads(result.stdout)


def test_cusum_arl_in_the_documented_form_matches_the_published_table():
    """Two-sided CUSUM k = 0.5, h = 4 at a 1-sigma shift: ARL 8.38 (Montgomery and Runger table)."""
    out = as_json("design", "arl", "--chart", "cusum", "--k", "0.5", "--h", "4", "--shift", "1.0", "--json")
    assert round(out["arl"], 2) == 8.38


def test_ewma_arl_in_the_documented_form_matches_lucas_and_saccucci():
    """EWMA lambda = 0.10, L = 2.814 in control: ARL 500 (Lucas and Saccucci 1990, via Montgomery)."""
    out = as_json(
        "design", "arl", "--chart", "ewma", "--lambda", "0.1", "--width", "2.814", "--shift", "0", "--json"
    )
    assert out["arl"] == pytest.approx(500, abs=1)


def test_shewhart_arl_with_and_without_the_western_electric_rules():
    """91.75 with the four Western Electric rules (Champ and Woodall 1987); 370.4 for the point rule alone."""
    with_rules = as_json(
        "design", "arl", "--chart", "shewhart", "--rules", "western-electric", "--shift", "0", "--json"
    )
    alone = as_json("design", "arl", "--chart", "shewhart", "--rules", "none", "--shift", "0", "--json")
    assert round(with_rules["arl"], 2) == 91.75
    assert round(alone["arl"], 1) == 370.4


def test_recommend_gives_designs_that_meet_the_wanted_in_control_arl():
    """The recommended EWMA and CUSUM designs have the requested in-control ARL and report ARL1."""
    ewma = as_json("design", "recommend", "--chart", "ewma", "--arl0", "500", "--shift", "1.0", "--json")
    cusum = as_json("design", "recommend", "--chart", "cusum", "--arl0", "465", "--shift", "1.0", "--json")
    assert ewma["arl0"] == pytest.approx(500, rel=1e-3)
    assert 0 < ewma["lambda"] <= 1
    assert ewma["arl1"] < 20
    # k = 0.5 and h = 5 give an in-control ARL of 465 (Montgomery and Runger table)
    assert cusum["k"] == 0.5
    assert cusum["h"] == pytest.approx(5.0, abs=0.01)


def test_check_prints_in_control_arls_and_warns_about_a_trigger_happy_chart(tmp_path):
    """check shows each panel's in-control ARL, false alarms a day at the sampling rate, and the budget warning."""
    config = tmp_path / "plant.yaml"
    config.write_text(
        textwrap.dedent(
            """\
            alerts: {false_alarm_budget: 2}
            charts:
              - id: calm
                subgroup: {size: 5}
                kinds: [xbar_r]
                limits: {mean: 0, sigma: 1}
                rules: none
                readings_every: 5m
              - id: nervous
                subgroup: {size: 5}
                kinds: [xbar_r]
                limits: {mean: 0, sigma: 1}
                rules: western-electric
                readings_every: 1s
            """
        )
    )
    result = monitor("check", "--config", str(config), "--json")
    assert result.returncode == 0, result.stderr
    charts = {c["id"]: c["budget"] for c in json.loads(result.stdout)["charts"]}
    calm, nervous = charts["calm"], charts["nervous"]
    # calm: 86400 / (300 s x 5) = 57.6 subgroups a day; the mean's 370.4 and the range's rate combine
    assert calm["subgroups_per_day"] == pytest.approx(57.6)
    assert calm["panels"][0]["arl"] == pytest.approx(370.4, abs=0.1)
    assert calm["false_alarms_per_day"] == pytest.approx(57.6 / calm["combined_arl"])
    assert calm["warning"] is None
    assert nervous["panels"][0]["arl"] == pytest.approx(91.75, abs=0.01)
    assert nervous["warning"] is not None
    text = monitor("check", "--config", str(config)).stdout
    assert "false alarms expected" in text
    assert "WARNING" in text
    assert "not a safety system" in text


def test_check_gives_the_in_control_arl_under_the_charts_parent_model(tmp_path):
    """Under a fixed exponential parent the mean panel's ARL is 1 / P(beyond the limits) of the exact law.

    Reference: the mean of 4 exponential readings of mean 2 is gamma(4, scale 0.5) (scipy.stats);
    with probability limits the rate is the normal one, ARL 370.4 (1 / (2 Phi(-3))).
    """
    from scipy import stats  # noqa: PLC0415

    config = tmp_path / "plant.yaml"
    config.write_text(
        textwrap.dedent(
            """\
            charts:
              - id: dryer/time
                subgroup: {size: 4}
                kinds: [xbar_r]
                limits: {mean: 2, sigma: 2}
                rules: none
                parent: "exponential:mean=2"
              - id: dryer/time-exact
                subgroup: {size: 4}
                kinds: [xbar_r]
                limits: {mean: 2, sigma: 2}
                rules: none
                parent: "exponential:mean=2"
                probability_limits: true
            """
        )
    )
    result = monitor("check", "--config", str(config), "--json")
    assert result.returncode == 0, result.stderr
    charts = {c["id"]: c["budget"] for c in json.loads(result.stdout)["charts"]}
    plain, exact = charts["dryer/time"], charts["dryer/time-exact"]
    assert plain["parent"] == "exponential(mean=2)"
    # limits 2 -/+ 3 * 2 / sqrt(4): the lower one (-1) cannot be reached
    assert plain["panels"][0]["arl"] == pytest.approx(1.0 / stats.gamma(4, scale=0.5).sf(5.0), rel=1e-4)
    assert plain["panels"][0]["arl"] < 370.4 / 3  # normal-theory limits alarm far more often here
    assert exact["panels"][0]["arl"] == pytest.approx(370.4, abs=0.1)
    text = monitor("check", "--config", str(config)).stdout
    assert "parent:    exponential(mean=2)" in text


def _leaf_parsers() -> dict[str, object]:
    """Every command and sub-command of `monitor`, by its words."""
    import argparse  # noqa: PLC0415

    from monitor.cli import build_parser  # noqa: PLC0415

    found: dict[str, object] = {}

    def walk(parser: argparse.ArgumentParser, words: tuple[str, ...]) -> None:
        actions = [a for a in parser._actions if isinstance(a, argparse._SubParsersAction)]
        if not actions:
            found[" ".join(words)] = parser
        for action in actions:
            for name, child in action.choices.items():
                walk(child, (*words, name))

    walk(build_parser(), ())
    return found


def test_every_command_has_help_with_a_runnable_looking_example():
    """Each leaf command's --help has an examples section that starts with `monitor <its words>`."""
    leaves = _leaf_parsers()
    assert {"check", "replay", "run", "baseline", "report", "design arl"} <= set(leaves)
    for words, parser in leaves.items():
        text = parser.format_help()  # type: ignore[attr-defined]
        assert "example" in text, words
        assert f"monitor {words} " in text, words
