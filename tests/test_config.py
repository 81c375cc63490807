"""The configuration loader: valid files load; every mistake names file, line and field."""

from __future__ import annotations

import textwrap
from pathlib import Path

import pytest
from scipy import special, stats

from monitor.config import ConfigProblems, load_config, load_config_text, parse_duration
from monitor.spc import ChartKind, ChartSet, RuleId, SigmaEstimator

ROOT = Path(__file__).resolve().parents[1]

GOOD = """\
charts:
  - id: press-1/thickness
    topic: brightwater/press-1/thickness
    subgroup: {size: 5}
    kinds: [xbar_r, ewma, cusum]
    limits: {mean: 8.0, sigma: 0.04}
    rules:
      - beyond_limits
      - same_side_run: {length: 9}
      - outer_zone_cluster: {count: 2, window: 3, sigma: 2}
    ewma: {lambda: 0.1, width: 2.7, fast_initial_response: true}
    cusum: {k: 0.5, h: 4, head_start: 2}
    hint: Check the die.
  - id: glaze-1/weight
    subgroup: {window: 1m, min_size: 3, lateness: 5s}
    kinds: [xbar_s]
    limits:
      baseline: {subgroups: 20, sigma_from: pooled}
"""


def problems(text: str) -> list[str]:
    with pytest.raises(ConfigProblems) as caught:
        load_config_text(textwrap.dedent(text), "plant.yaml")
    return str(caught.value).splitlines()


def test_shipped_configs_are_valid():
    """Every YAML file under config/ loads and builds its chart sets."""
    files = sorted((ROOT / "config").glob("*.yaml"))
    assert files
    for file in files:
        config = load_config(file)
        for chart in config.charts:
            ChartSet(chart.spec())
            chart.subgrouper()


def test_a_good_file_becomes_core_specs():
    """Values of a valid file reach the core objects unchanged."""
    config = load_config_text(GOOD, "good.yaml")
    press = config.chart("press-1/thickness").spec()
    assert press.kinds == (ChartKind.XBAR_R, ChartKind.EWMA, ChartKind.CUSUM)
    assert [r.id for r in press.rules] == [
        RuleId.BEYOND_LIMITS,
        RuleId.SAME_SIDE_RUN,
        RuleId.OUTER_ZONE_CLUSTER,
    ]
    assert press.rules[1].length == 9
    assert (press.rules[2].count, press.rules[2].length, press.rules[2].sigma) == (2, 3, 2.0)
    assert (press.ewma.smoothing, press.ewma.width, press.ewma.fast_initial_response) == (0.1, 2.7, True)
    assert (press.cusum.k, press.cusum.h, press.cusum.head_start) == (0.5, 4.0, 2.0)
    assert press.standard is not None
    assert (press.standard.mean, press.standard.sigma) == (8.0, 0.04)
    glaze = config.chart("glaze-1/weight")
    assert glaze.spec().baseline is not None
    assert glaze.spec().baseline.estimator is SigmaEstimator.POOLED
    grouper = glaze.subgrouper()
    assert (grouper.width, grouper.min_size, grouper.lateness) == (60.0, 3, 5.0)


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("90s", 90.0),
        ("5m", 300.0),
        ("1.5h", 5400.0),
        ("250ms", 0.25),
        ("2d", 172800.0),
        (7, 7.0),
        (0.5, 0.5),
    ],
)
def test_durations_are_read_in_seconds(text, expected):
    """Durations accept seconds or a number with a unit."""
    assert parse_duration(text) == expected


@pytest.mark.parametrize("text", ["5 minutes", "-3s", "", True, "1e5s", None])
def test_bad_durations_are_refused(text):
    """Anything else is refused with a message showing the allowed forms."""
    with pytest.raises(ValueError, match="duration"):
        parse_duration(text)


CATALOGUE = [
    # (description, yaml, expected "line: field: fragment")
    (
        "a typo in a key",
        """\
        charts:
          - id: a
            kinds: [xbar_r]
            subgroup: {size: 5}
            limtis: {mean: 1, sigma: 1}
        """,
        [
            "plant.yaml:2: charts[0].limits: required field is missing",
            "plant.yaml:5: charts[0].limtis: unknown field (did you mean 'limits'?)",
        ],
    ),
    (
        "a wrong type",
        """\
        charts:
          - id: a
            kinds: [xbar_r]
            subgroup: {size: five}
            limits: {mean: 1, sigma: 1}
        """,
        ["plant.yaml:4: charts[0].subgroup.size: Input should be a valid integer"],
    ),
    (
        "an impossible sigma",
        """\
        charts:
          - id: a
            kinds: [xbar_r]
            subgroup: {size: 5}
            limits:
              mean: 1
              sigma: -2
        """,
        ["plant.yaml:7: charts[0].limits.sigma: Input should be greater than 0 (got -2)"],
    ),
    (
        "lambda above one",
        """\
        charts:
          - id: a
            kinds: [ewma]
            limits: {mean: 1, sigma: 1}
            ewma:
              lambda: 1.5
        """,
        ["plant.yaml:6: charts[0].ewma.lambda: Input should be less than or equal to 1 (got 1.5)"],
    ),
    (
        "an unknown rule",
        """\
        charts:
          - id: a
            kinds: [individuals_mr]
            limits: {mean: 1, sigma: 1}
            rules:
              - beyond_limits
              - nine_in_a_row
        """,
        ["plant.yaml:7: charts[0].rules[1]: unknown rule 'nine_in_a_row'; allowed: beyond_limits"],
    ),
    (
        "an unknown rule set",
        """\
        charts:
          - id: a
            kinds: [individuals_mr]
            limits: {mean: 1, sigma: 1}
            rules: western
        """,
        [
            "plant.yaml:5: charts[0].rules: unknown rule set 'western'; allowed: nelson, none, western-electric"
        ],
    ),
    (
        "bad rule parameters",
        """\
        charts:
          - id: a
            kinds: [individuals_mr]
            limits: {mean: 1, sigma: 1}
            rules:
              - outer_zone_cluster: {count: 4, window: 3}
              - steady_trend: {window: 6}
        """,
        [
            "plant.yaml:6: charts[0].rules[0].outer_zone_cluster: outer_zone_cluster: count must be between 1 and the window (3), got 4",
            "plant.yaml:7: charts[0].rules[1].steady_trend.window: steady_trend takes no window; use length",
        ],
    ),
    (
        "duplicate chart ids",
        """\
        charts:
          - id: line/a
            kinds: [individuals_mr]
            limits: {mean: 1, sigma: 1}
          - id: line/a
            kinds: [individuals_mr]
            limits: {mean: 1, sigma: 1}
        """,
        ["plant.yaml:5: charts[1].id: chart id 'line/a' is also used by charts[0]"],
    ),
    (
        "a bad chart id",
        """\
        charts:
          - id: line//a
            kinds: [individuals_mr]
            limits: {mean: 1, sigma: 1}
        """,
        ["plant.yaml:2: charts[0].id: Value error, a chart id is 1-200 characters"],
    ),
    (
        "a bad topic filter",
        """\
        charts:
          - id: a
            topic: plant/#/thickness
            kinds: [individuals_mr]
            limits: {mean: 1, sigma: 1}
        """,
        ["plant.yaml:3: charts[0].topic: Value error, '#' may only be a whole last level"],
    ),
    (
        "a partial plus wildcard",
        """\
        charts:
          - id: a
            topic: plant/press+/thickness
            kinds: [individuals_mr]
            limits: {mean: 1, sigma: 1}
        """,
        ["plant.yaml:3: charts[0].topic: Value error, '+' must fill a whole level"],
    ),
    (
        "an X-bar chart on single readings",
        """\
        charts:
          - id: a
            subgroup: {size: 1}
            kinds: [xbar_r]
            limits: {mean: 1, sigma: 1}
        """,
        ["plant.yaml:3: charts[0].subgroup.size: xbar_r needs subgroups of at least 2 readings"],
    ),
    (
        "an individuals chart on subgroups",
        """\
        charts:
          - id: a
            subgroup: {size: 4}
            kinds: [individuals_mr]
            limits: {mean: 1, sigma: 1}
        """,
        ["plant.yaml:3: charts[0].subgroup.size: individuals_mr needs subgroup size 1"],
    ),
    (
        "an unknown chart kind",
        """\
        charts:
          - id: a
            kinds: [xbar_mr]
            limits: {mean: 1, sigma: 1}
        """,
        [
            "plant.yaml:3: charts[0].kinds[0]: Input should be 'xbar_r', 'xbar_s', 'individuals_mr', 'ewma', 'cusum', 'p' or 'u'"
        ],
    ),
    (
        "a p chart mixed with others and no proportion",
        """\
        charts:
          - id: a
            kinds: [p, ewma]
            limits: {mean: 1, sigma: 1}
        """,
        [
            "plant.yaml:3: charts[0].kinds: p and u charts stand alone",
            "plant.yaml:4: charts[0].limits: a p chart needs limits.proportion or limits.baseline",
        ],
    ),
    (
        "standard values and a baseline at once",
        """\
        charts:
          - id: a
            kinds: [individuals_mr]
            limits:
              mean: 1
              baseline: {subgroups: 20}
        """,
        ["plant.yaml:5: charts[0].limits.mean: give standard values or a baseline, not both"],
    ),
    (
        "no sigma",
        """\
        charts:
          - id: a
            kinds: [individuals_mr]
            limits: {mean: 1}
        """,
        [
            "plant.yaml:4: charts[0].limits: give limits.mean and limits.sigma, or limits.baseline (missing sigma)"
        ],
    ),
    (
        "a head start beyond h",
        """\
        charts:
          - id: a
            kinds: [cusum]
            limits: {mean: 1, sigma: 1}
            cusum: {h: 4, head_start: 4}
        """,
        ["plant.yaml:5: charts[0].cusum.head_start: head_start must be below h (4.0)"],
    ),
    (
        "both a size and a window",
        """\
        charts:
          - id: a
            kinds: [xbar_r]
            subgroup: {size: 5, window: 1m}
            limits: {mean: 1, sigma: 1}
        """,
        ["plant.yaml:4: charts[0].subgroup: give either size (readings) or window (a duration)"],
    ),
    (
        "a bad window",
        """\
        charts:
          - id: a
            kinds: [xbar_r]
            subgroup: {window: soon}
            limits: {mean: 1, sigma: 1}
        """,
        ["plant.yaml:4: charts[0].subgroup.window: Value error, 'soon' is not a duration"],
    ),
    (
        "an unknown parent model",
        """\
        charts:
          - id: a
            kinds: [xbar_r]
            subgroup: {size: 4}
            limits: {mean: 1, sigma: 1}
            parent: cauchy
        """,
        ["plant.yaml:6: charts[0].parent: unknown parent 'cauchy'; allowed: normal, auto, empirical"],
    ),
    (
        "a parent model with a missing parameter",
        """\
        charts:
          - id: a
            kinds: [xbar_r]
            subgroup: {size: 4}
            limits: {mean: 1, sigma: 1}
            parent: "gamma:shape=2"
        """,
        ["plant.yaml:6: charts[0].parent: gamma takes parameters shape, scale; missing: scale"],
    ),
    (
        "a fitted parent without a baseline to fit it to",
        """\
        charts:
          - id: a
            kinds: [xbar_r]
            subgroup: {size: 4}
            limits: {mean: 1, sigma: 1}
            parent: auto
        """,
        ["plant.yaml:6: charts[0].parent: parent 'auto' is fitted to the Phase I baseline readings"],
    ),
    (
        "a parent model on a count chart",
        """\
        charts:
          - id: a
            kinds: [p]
            subgroup: {size: 1}
            limits: {proportion: 0.02}
            parent: "gamma:shape=2,scale=1"
        """,
        ["plant.yaml:6: charts[0].parent: a parent model describes measured readings"],
    ),
    (
        "probability limits without a parent model",
        """\
        charts:
          - id: a
            kinds: [xbar_r]
            subgroup: {size: 4}
            limits: {mean: 1, sigma: 1}
            probability_limits: true
        """,
        [
            "plant.yaml:6: charts[0].probability_limits: probability limits need a parent model other than normal"
        ],
    ),
    (
        "probability limits with a parent still to be fitted",
        """\
        charts:
          - id: a
            kinds: [xbar_r]
            subgroup: {size: 4}
            limits: {baseline: {subgroups: 20}}
            parent: auto
            probability_limits: true
        """,
        [
            "plant.yaml:7: charts[0].probability_limits: probability limits need the parent model with its parameters"
        ],
    ),
    (
        "probability limits on a chart without a mean panel",
        """\
        charts:
          - id: a
            kinds: [ewma]
            subgroup: {size: 4}
            limits: {mean: 1, sigma: 1}
            parent: "gamma:shape=2,scale=0.5"
            probability_limits: true
        """,
        ["plant.yaml:7: charts[0].probability_limits: probability limits apply to the mean and individuals"],
    ),
    (
        "no charts",
        """\
        charts: []
        """,
        ["plant.yaml:1: charts: List should have at least 1 item"],
    ),
    (
        "a duplicate key",
        """\
        charts:
          - id: a
            kinds: [xbar_r]
            kinds: [xbar_s]
        """,
        ['plant.yaml:4: (top level): YAML: found duplicate key "kinds"'],
    ),
    (
        "broken YAML",
        """\
        charts:
          - id: [a
            kinds: [xbar_r]
        """,
        ["plant.yaml:3: (top level): YAML:"],
    ),
    (
        "not a mapping",
        """\
        - just a list
        """,
        ["plant.yaml:1: (top level): the file must hold a mapping with a 'charts' list"],
    ),
]


@pytest.mark.parametrize(("description", "text", "expected"), CATALOGUE, ids=[c[0] for c in CATALOGUE])
def test_each_mistake_gets_one_clear_line(description, text, expected):
    """Each mistake in the catalogue is reported with its file, line, field and what is allowed."""
    lines = problems(text)
    assert len(lines) == len(expected), lines
    for line, fragment in zip(lines, expected, strict=True):
        assert line.startswith(fragment), (description, line)
    assert all("Traceback" not in line for line in lines)


def test_a_missing_file_is_reported_plainly(tmp_path):
    """A missing file is one clear line, not a traceback."""
    with pytest.raises(ConfigProblems, match="no such file"):
        load_config(tmp_path / "absent.yaml")


def test_probability_limits_reach_the_chart_as_an_exact_scale():
    """A fixed parent with probability_limits gives the mean panel the law's quantiles as limits."""
    config = load_config_text(
        textwrap.dedent(
            """\
            charts:
              - id: dryer/time
                kinds: [xbar_r]
                subgroup: {size: 4}
                limits: {mean: 2, sigma: 2}
                parent: "exponential:mean=2"
                probability_limits: true
            """
        ),
        "plant.yaml",
    )
    spec = config.charts[0].spec()
    assert spec.exact_scale is not None
    _, lower, upper = spec.exact_scale.lines(4, 3.0)
    law = stats.gamma(4, scale=0.5)  # the mean of 4 exponentials of mean 2
    assert (lower, upper) == (
        pytest.approx(law.ppf(special.ndtr(-3.0)), rel=1e-9),
        pytest.approx(law.isf(special.ndtr(-3.0)), rel=1e-9),
    )
