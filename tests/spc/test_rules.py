"""Run rules: each pattern fires where the published rule says, and its near misses do not.

Sources (rule wording and parameters from memory, not read from the documents here):

* Western Electric Co. (1956), *Statistical Quality Control Handbook*: the four zone rules
  (one point beyond 3 sigma; 2 of 3 successive points beyond 2 sigma on one side; 4 of 5
  beyond 1 sigma on one side; 8 successive points on one side of the center line);
* Nelson, L. S. (1984), "The Shewhart control chart -- tests for special causes",
  *Journal of Quality Technology* 16: the eight tests (beyond zone A; 9 in a row on one side;
  6 in a row steadily increasing or decreasing; 14 in a row alternating up and down; 2 of 3
  in zone A or beyond; 4 of 5 in zone B or beyond; 15 in a row in zone C; 8 in a row on both
  sides with none in zone C). Tests 1, 2, 5, 6 apply to each half of the chart separately
  (value from memory).

The conventions below are common practice, no source; they are stated in the docstring of
``monitor.spc.rules``: "beyond" is strict (a point on a line is not beyond it), a point on the
center line ends a same-side run, equal neighbours end a trend or an alternation, the point
completing a pattern is part of it, and a rule fires again at each point while its pattern
persists.

All z values are in sigma units of the plotted statistic.
"""

from __future__ import annotations

import math

import mpmath as mp
import numpy as np
import pytest
from scipy import stats

from monitor.spc import (
    PRESETS,
    ConfigError,
    Rule,
    RuleId,
    RuleSet,
    Side,
    nelson,
    rule_preset,
    western_electric,
)

UP, DOWN, EITHER = Side.UPPER, Side.LOWER, Side.EITHER


def fed_one_by_one(rules, zs, first_index=0):
    """Hits of ``RuleSet.update`` called point by point, as comparable tuples."""
    rule_set = RuleSet(list(rules))
    found = []
    for offset, z in enumerate(zs):
        for hit in rule_set.update(float(z), index=first_index + offset):
            found.append((hit.index, hit.rule, hit.side, hit.subgroups))
    return found


def scanned(rules, zs, first_index=0, chunks=None):
    """Hits of ``RuleSet.scan`` over the sequence, whole or in chunks of the given sizes."""
    rule_set = RuleSet(list(rules))
    values = np.asarray(zs, dtype=float)
    sizes = [len(values)] if chunks is None else chunks
    found, start = [], 0
    for size in sizes:
        part = values[start : start + size]
        hits = rule_set.scan(part, first_index=first_index + start)
        found += [(h.index, h.rule, h.side, h.subgroups) for h in hits]
        start += size
    assert start == len(values)
    return found


def span(first, last):
    """Subgroup indices first..last inclusive."""
    return tuple(range(first, last + 1))


# ---------------------------------------------------------------- beyond the limits


def test_beyond_limits_fires_on_each_point_strictly_outside_three_sigma():
    """A point above +3 fires upper, below -3 fires lower, each involving only itself."""
    # Western Electric (1956) rule 1; Nelson (1984) test 1.
    hits = fed_one_by_one([Rule.beyond_limits()], [0.5, 3.2, -0.3, -3.01])
    assert hits == [
        (1, RuleId.BEYOND_LIMITS, UP, (1,)),
        (3, RuleId.BEYOND_LIMITS, DOWN, (3,)),
    ]


def test_beyond_limits_does_not_fire_on_a_point_exactly_on_three_sigma():
    """Points exactly on +/-3 sigma, or just inside, are not beyond the limits."""
    assert fed_one_by_one([Rule.beyond_limits()], [3.0, -3.0, 2.999999, -2.999999]) == []


def test_beyond_limits_follows_the_rule_sets_limit_sigma():
    """With limits at 2.5 sigma a point at 2.7 fires and a point at 2.5 does not."""
    rule_set = RuleSet([Rule.beyond_limits()], limit_sigma=2.5)
    assert rule_set.update(2.5, index=0) == []
    assert [h.side for h in rule_set.update(2.7, index=1)] == [UP]


# ---------------------------------------------------------------- 2 of 3 beyond 2 sigma


def test_outer_zone_cluster_fires_on_two_of_three_beyond_two_sigma_on_one_side():
    """2 of 3 beyond +2 fires at the second one and names the two points, not the middle one."""
    # Western Electric (1956) rule 2; Nelson (1984) test 5.
    hits = fed_one_by_one([Rule.outer_zone_cluster()], [0.5, 2.5, 0.3, 2.1])
    assert hits == [(3, RuleId.OUTER_ZONE_CLUSTER, UP, (1, 3))]


def test_outer_zone_cluster_fires_below_as_well():
    """Two successive points below -2 fire lower at the second."""
    hits = fed_one_by_one([Rule.outer_zone_cluster()], [0.0, -2.2, -2.6])
    assert hits == [(2, RuleId.OUTER_ZONE_CLUSTER, DOWN, (1, 2))]


def test_outer_zone_cluster_needs_the_newest_point_beyond():
    """After 2.5, 2.5 the rule fires once; the next point inside zone does not fire again."""
    hits = fed_one_by_one([Rule.outer_zone_cluster()], [2.5, 2.5, 0.0])
    assert hits == [(1, RuleId.OUTER_ZONE_CLUSTER, UP, (0, 1))]


def test_outer_zone_cluster_fires_again_while_the_points_stay_beyond():
    """Three points beyond +2 fire at the second and the third (3 involved at the third)."""
    hits = fed_one_by_one([Rule.outer_zone_cluster()], [2.5, 2.5, 2.5])
    assert hits == [
        (1, RuleId.OUTER_ZONE_CLUSTER, UP, (0, 1)),
        (2, RuleId.OUTER_ZONE_CLUSTER, UP, (0, 1, 2)),
    ]


@pytest.mark.parametrize(
    "zs",
    [
        pytest.param([2.5, -2.5, 0.1], id="opposite-sides"),
        pytest.param([0.1, 2.5, -2.5], id="opposite-sides-newest-below"),
        pytest.param([2.5, 2.0, 0.0], id="second-exactly-on-two-sigma"),
        pytest.param([2.5, 0.1, 0.2, 2.5], id="two-beyond-four-apart"),
        pytest.param([-2.0, -2.0, -2.0], id="all-exactly-on-minus-two-sigma"),
    ],
)
def test_outer_zone_cluster_near_misses_do_not_fire(zs):
    """Opposite sides, points exactly on 2 sigma, or two beyond but not within 3 do not fire."""
    assert fed_one_by_one([Rule.outer_zone_cluster()], zs) == []


# ---------------------------------------------------------------- 4 of 5 beyond 1 sigma


def test_middle_zone_cluster_fires_on_four_of_five_beyond_one_sigma_on_one_side():
    """4 of 5 beyond +1 fire at the fourth beyond point, naming the four points."""
    # Western Electric (1956) rule 3; Nelson (1984) test 6.
    zs = [0.1, -0.2, 0.3, 0.0, 1.5, 1.2, 0.5, 1.8, 1.1]
    hits = fed_one_by_one([Rule.middle_zone_cluster()], zs)
    assert hits == [(8, RuleId.MIDDLE_ZONE_CLUSTER, UP, (4, 5, 7, 8))]


def test_middle_zone_cluster_fires_below_as_well():
    """Four successive points below -1 fire lower at the fourth."""
    zs = [0.2, 0.1, -0.3, 0.0, 0.4, -1.3, -1.1, -2.2, -1.05]
    hits = fed_one_by_one([Rule.middle_zone_cluster()], zs)
    assert hits == [(8, RuleId.MIDDLE_ZONE_CLUSTER, DOWN, (5, 6, 7, 8))]


def test_middle_zone_cluster_fires_at_the_fourth_point_when_the_first_four_are_beyond():
    """The first four points all beyond +1 fire at the fourth, as 2 of the first 2 do for 2 of 3."""
    # The window holds fewer than five points at the start; four of four beyond is the
    # pattern (the batch path already fires here, and so does the 2-of-3 rule at point 2).
    hits = fed_one_by_one([Rule.middle_zone_cluster()], [1.5, 1.5, 1.5, 1.5])
    assert hits == [(3, RuleId.MIDDLE_ZONE_CLUSTER, UP, (0, 1, 2, 3))]


@pytest.mark.parametrize(
    "zs",
    [
        pytest.param([0, 0, 0, 0, 1.5, 0.2, 1.5, 0.3, 1.5], id="three-of-five"),
        pytest.param([0, 0, 0, 0, 1.5, 1.5, 1.0, 1.5, 0.0], id="one-exactly-on-one-sigma"),
        pytest.param([0, 0, 0, 0, 1.5, -1.5, 1.5, -1.5, 1.5], id="opposite-sides"),
        pytest.param([0, 0, 0, 0, 1.5, 1.5, 1.5, 0.5, 0.5, 1.5], id="four-within-six"),
    ],
)
def test_middle_zone_cluster_near_misses_do_not_fire(zs):
    """3 of 5, a point exactly on 1 sigma, mixed sides, or four spread over six do not fire."""
    assert fed_one_by_one([Rule.middle_zone_cluster()], zs) == []


# ---------------------------------------------------------------- run on one side


def test_same_side_run_fires_on_the_eighth_point_above_the_center_line():
    """Eight points above the center line fire upper at the eighth, naming all eight."""
    # Western Electric (1956) rule 4 (8 in a row); Nelson (1984) test 2 uses 9.
    hits = fed_one_by_one([Rule.same_side_run(8)], [0.1] * 8)
    assert hits == [(7, RuleId.SAME_SIDE_RUN, UP, span(0, 7))]


def test_same_side_run_fires_below_and_again_while_the_run_lasts():
    """Nine points below fire lower at the eighth and at the ninth (the last eight each time)."""
    hits = fed_one_by_one([Rule.same_side_run(8)], [0.4] + [-0.2] * 9)
    assert hits == [
        (8, RuleId.SAME_SIDE_RUN, DOWN, span(1, 8)),
        (9, RuleId.SAME_SIDE_RUN, DOWN, span(2, 9)),
    ]


def test_nelson_same_side_run_needs_nine_points():
    """With Nelson's length 9, eight points on one side do not fire and the ninth does."""
    hits = fed_one_by_one([Rule.same_side_run(9)], [0.3] * 9)
    assert hits == [(8, RuleId.SAME_SIDE_RUN, UP, span(0, 8))]


@pytest.mark.parametrize(
    "zs",
    [
        pytest.param([0.5] * 7, id="seven-above"),
        pytest.param([0.5] * 4 + [0.0] + [0.5] * 4, id="center-line-breaks-run"),
        pytest.param([0.5] * 4 + [-0.5] + [0.5] * 4, id="one-below-breaks-run"),
        pytest.param([-0.5] * 7 + [0.0], id="seven-below-then-center"),
    ],
)
def test_same_side_run_near_misses_do_not_fire(zs):
    """Seven on one side, or eight broken by a point on or across the center line, do not fire."""
    assert fed_one_by_one([Rule.same_side_run(8)], zs) == []


# ---------------------------------------------------------------- trend


def test_steady_trend_fires_on_six_rising_points():
    """Six points each above the one before fire upper at the sixth, naming the six."""
    # Nelson (1984) test 3.
    hits = fed_one_by_one([Rule.steady_trend()], [3.0, -1.0, -0.6, -0.2, 0.2, 0.6, 1.0])
    assert hits == [(6, RuleId.STEADY_TREND, UP, span(1, 6))]


def test_steady_trend_fires_on_six_falling_points():
    """Six points each below the one before fire lower at the sixth."""
    hits = fed_one_by_one([Rule.steady_trend()], [1.0, 0.7, 0.4, 0.1, -0.2, -0.5])
    assert hits == [(5, RuleId.STEADY_TREND, DOWN, span(0, 5))]


@pytest.mark.parametrize(
    "zs",
    [
        pytest.param([0.0, 0.2, 0.4, 0.6, 0.8], id="five-rising"),
        pytest.param([0.0, 0.2, 0.4, 0.4, 0.6, 0.8, 1.0], id="tie-inside-trend"),
        pytest.param([0.0, 0.2, 0.4, 0.3, 0.6, 0.8, 1.0], id="one-dip-inside-trend"),
    ],
)
def test_steady_trend_near_misses_do_not_fire(zs):
    """Five rising points, or six and more broken by a tie or a dip, do not fire."""
    assert fed_one_by_one([Rule.steady_trend()], zs) == []


# ---------------------------------------------------------------- alternation


def _alternating(count, start=0):
    return [0.5 if (i + start) % 2 == 0 else -0.5 for i in range(count)]


def test_alternating_run_fires_on_fourteen_alternating_points():
    """Fourteen points alternating up and down fire at the fourteenth, naming all fourteen."""
    # Nelson (1984) test 4.
    hits = fed_one_by_one([Rule.alternating_run()], _alternating(14))
    assert hits == [(13, RuleId.ALTERNATING_RUN, EITHER, span(0, 13))]


def test_alternating_run_fires_again_on_the_fifteenth_point():
    """A fifteenth alternating point fires again with the last fourteen."""
    hits = fed_one_by_one([Rule.alternating_run()], _alternating(15))
    assert [(h[0], h[3]) for h in hits] == [(13, span(0, 13)), (14, span(1, 14))]


@pytest.mark.parametrize(
    "zs",
    [
        pytest.param(_alternating(13), id="thirteen-alternating"),
        pytest.param([*_alternating(7), -0.5, *_alternating(7, start=1)], id="tie-in-the-middle"),
        pytest.param([*_alternating(7), -0.7, *_alternating(7, start=1)], id="two-rises-in-a-row"),
    ],
)
def test_alternating_run_near_misses_do_not_fire(zs):
    """Thirteen alternating points, or fifteen broken by a tie or two rises in a row, do not fire."""
    assert fed_one_by_one([Rule.alternating_run()], zs) == []


# ---------------------------------------------------------------- hugging the center


def test_hugging_center_fires_on_fifteen_points_within_one_sigma():
    """Fifteen points within 1 sigma on both sides fire at the fifteenth, naming the fifteen."""
    # Nelson (1984) test 7.
    zs = [1.4] + [0.9, -0.9, 0.3, 0.0, -0.5] * 3
    hits = fed_one_by_one([Rule.hugging_center()], zs)
    assert hits == [(15, RuleId.HUGGING_CENTER, EITHER, span(1, 15))]


@pytest.mark.parametrize(
    "zs",
    [
        pytest.param([0.2, -0.2] * 7, id="fourteen-within"),
        pytest.param([0.2, -0.2] * 4 + [-1.2] + [0.2, -0.2] * 4, id="one-beyond-in-the-middle"),
    ],
)
def test_hugging_center_near_misses_do_not_fire(zs):
    """Fourteen points within 1 sigma, or a run broken by one point beyond, do not fire."""
    assert fed_one_by_one([Rule.hugging_center()], zs) == []


# ---------------------------------------------------------------- avoiding the center


def test_avoiding_center_fires_on_eight_points_beyond_one_sigma_on_both_sides():
    """Eight points beyond 1 sigma with some on each side fire at the eighth, naming the eight."""
    # Nelson (1984) test 8.
    zs = [0.2, 1.5, -1.5, 1.2, 1.8, -1.1, -2.0, 1.3, -1.4]
    hits = fed_one_by_one([Rule.avoiding_center()], zs)
    assert hits == [(8, RuleId.AVOIDING_CENTER, EITHER, span(1, 8))]


def test_avoiding_center_stops_once_the_last_eight_are_all_on_one_side():
    """After one low point and eight high ones, only the window holding the low point fires."""
    hits = fed_one_by_one([Rule.avoiding_center()], [-1.5] + [1.5] * 8)
    assert hits == [(7, RuleId.AVOIDING_CENTER, EITHER, span(0, 7))]


@pytest.mark.parametrize(
    "zs",
    [
        pytest.param([1.5, -1.5, 1.5, -1.5, 1.5, -1.5, 1.5], id="seven-beyond"),
        pytest.param([1.5, 1.2, 1.8, 1.1, 2.0, 1.3, 1.4, 1.6], id="eight-beyond-all-above"),
        pytest.param([1.5, -1.5, 1.5, -1.0, 1.5, -1.5, 1.5, -1.5], id="one-exactly-on-one-sigma"),
    ],
)
def test_avoiding_center_near_misses_do_not_fire(zs):
    """Seven beyond, eight beyond all on one side, or one exactly on 1 sigma, do not fire."""
    assert fed_one_by_one([Rule.avoiding_center()], zs) == []


# ---------------------------------------------------------------- presets


def _describe(rule):
    """The parameters that define a rule, by kind."""
    if rule.id is RuleId.BEYOND_LIMITS:
        return (rule.id,)
    if rule.id in {RuleId.OUTER_ZONE_CLUSTER, RuleId.MIDDLE_ZONE_CLUSTER}:
        return (rule.id, rule.count, rule.length, rule.sigma)
    if rule.id in {RuleId.HUGGING_CENTER, RuleId.AVOIDING_CENTER}:
        return (rule.id, rule.length, rule.sigma)
    return (rule.id, rule.length)


def test_western_electric_preset_is_the_four_zone_rules_of_the_1956_handbook():
    """One beyond 3 sigma; 2 of 3 beyond 2; 4 of 5 beyond 1; 8 in a row on one side."""
    # Western Electric Co. (1956), Statistical Quality Control Handbook, rules 1-4.
    expected = [
        (RuleId.BEYOND_LIMITS,),
        (RuleId.OUTER_ZONE_CLUSTER, 2, 3, 2.0),
        (RuleId.MIDDLE_ZONE_CLUSTER, 4, 5, 1.0),
        (RuleId.SAME_SIDE_RUN, 8),
    ]
    assert [_describe(r) for r in western_electric()] == expected
    assert [_describe(r) for r in rule_preset("western-electric")] == expected


def test_nelson_preset_is_the_eight_tests_of_nelson_1984_in_his_order():
    """Tests 1-8: beyond; 9 one side; 6 trend; 14 alternating; 2 of 3; 4 of 5; 15 in C; 8 off C."""
    # Nelson (1984), Journal of Quality Technology 16, tests 1 to 8 in that order.
    expected = [
        (RuleId.BEYOND_LIMITS,),
        (RuleId.SAME_SIDE_RUN, 9),
        (RuleId.STEADY_TREND, 6),
        (RuleId.ALTERNATING_RUN, 14),
        (RuleId.OUTER_ZONE_CLUSTER, 2, 3, 2.0),
        (RuleId.MIDDLE_ZONE_CLUSTER, 4, 5, 1.0),
        (RuleId.HUGGING_CENTER, 15, 1.0),
        (RuleId.AVOIDING_CENTER, 8, 1.0),
    ]
    assert [_describe(r) for r in nelson()] == expected
    assert [_describe(r) for r in rule_preset("nelson")] == expected


def test_the_none_preset_keeps_only_the_beyond_limits_rule():
    """The preset named none holds the point-beyond-limits rule alone."""
    assert [_describe(r) for r in PRESETS["none"]] == [(RuleId.BEYOND_LIMITS,)]


def test_an_unknown_preset_name_raises_config_error_naming_the_allowed_ones():
    """rule_preset refuses an unknown name and lists the names it knows."""
    with pytest.raises(ConfigError, match="nelson") as caught:
        rule_preset("shewhart-plus")
    assert "western-electric" in str(caught.value)


# ---------------------------------------------------------------- update and scan agree


def _sequences():
    rng = np.random.default_rng(19560101)
    crafted = (
        [0.5, 2.5, 0.3, 2.1, 3.4, -3.2]
        + [0.1] * 9
        + [-1.0, -0.6, -0.2, 0.2, 0.6, 1.0]
        + _alternating(15)
        + [0.9, -0.9, 0.3, 0.0, -0.5] * 3
        + [1.5, -1.5, 1.2, 1.8, -1.1, -2.0, 1.3, -1.4]
        + [0.0, 1.5, 1.2, 0.5, 1.8, 1.1, 2.0, 2.0, 3.0, -3.0, 1.0, -1.0]
    )
    return {
        "normal": rng.standard_normal(600).tolist(),
        "wide-normal": (1.7 * rng.standard_normal(600)).tolist(),
        "integers-with-ties-and-lines": rng.integers(-3, 4, 600).astype(float).tolist(),
        "drifting": (np.cumsum(rng.standard_normal(600)) * 0.3).tolist(),
        "crafted-patterns": crafted,
        "starts-with-four-beyond-one-sigma": [1.5, 1.5, 1.5, 1.5, 0.2, -1.2, 1.1, 1.3, 1.4],
    }


SEQUENCES = _sequences()


@pytest.mark.parametrize("name", sorted(SEQUENCES))
@pytest.mark.parametrize("preset", ["western-electric", "nelson"])
def test_update_in_a_loop_and_scan_give_the_same_hits(name, preset):
    """Feeding points one by one and scanning the array give identical hits in identical order."""
    zs = SEQUENCES[name]
    rules = rule_preset(preset)
    expected = fed_one_by_one(rules, zs, first_index=100)
    assert scanned(rules, zs, first_index=100) == expected


@pytest.mark.parametrize("name", sorted(SEQUENCES))
def test_scan_in_chunks_gives_the_same_hits_as_one_scan(name):
    """Scanning in uneven chunks carries every partial pattern across the chunk boundaries."""
    zs = SEQUENCES[name]
    sizes, left, step = [], len(zs), 0
    while left:
        size = min(left, (3, 1, 2, 7, 5, 11)[step % 6])
        sizes.append(size)
        left -= size
        step += 1
    assert scanned(nelson(), zs, chunks=sizes) == scanned(nelson(), zs)


# ---------------------------------------------------------------- configuration errors


def test_a_rule_listed_twice_raises_config_error():
    """Two rules of the same kind in one set are refused, even with different parameters."""
    with pytest.raises(ConfigError, match="twice"):
        RuleSet([Rule.beyond_limits(), Rule.beyond_limits()])
    with pytest.raises(ConfigError, match="same_side_run"):
        RuleSet([Rule.same_side_run(8), Rule.same_side_run(9)])


@pytest.mark.parametrize(
    ("build", "message"),
    [
        (lambda: Rule.same_side_run(1), "at least 2"),
        (lambda: Rule.steady_trend(2), "at least 3"),
        (lambda: Rule.alternating_run(2), "at least 3"),
        (lambda: Rule.hugging_center(1), "at least 2"),
        (lambda: Rule.avoiding_center(1), "at least 2"),
        (lambda: Rule.same_side_run(8.5), "integer"),
        (lambda: Rule.same_side_run(True), "integer"),
        (lambda: Rule.outer_zone_cluster(count=4, window=3), "between 1 and the window"),
        (lambda: Rule.middle_zone_cluster(count=0), "between 1 and the window"),
        (lambda: Rule.middle_zone_cluster(count=2.5), "count must be an integer"),
        (lambda: Rule.outer_zone_cluster(sigma=0.0), "sigma must be a positive"),
        (lambda: Rule.middle_zone_cluster(sigma=-1.0), "sigma must be a positive"),
        (lambda: Rule.hugging_center(sigma=math.nan), "sigma must be a positive"),
        (lambda: Rule.avoiding_center(sigma=math.inf), "sigma must be a positive"),
        (lambda: RuleSet([Rule.beyond_limits()], limit_sigma=0.0), "limit_sigma"),
        (lambda: RuleSet([Rule.beyond_limits()], limit_sigma=math.nan), "limit_sigma"),
    ],
)
def test_bad_rule_parameters_raise_config_error_naming_the_parameter(build, message):
    """Lengths below a rule's minimum, bad counts, zone lines and limits are refused."""
    with pytest.raises(ConfigError, match=message):
        build()


# ---------------------------------------------------------------- false alarms on iid data


def _zigzag_by_boustrophedon(n):
    """Euler zigzag number A_n (alternating permutations) by the Seidel-Entringer triangle."""
    row = [1]
    for k in range(1, n + 1):
        new = [0]
        for j in range(k):
            new.append(new[-1] + row[k - 1 - j])
        row = new
    return row[-1]


def test_zigzag_number_for_fourteen_agrees_between_two_methods():
    """A_14 = 199360981 both by the boustrophedon and by the Taylor series of sec + tan."""
    # A_n counts alternating permutations (OEIS A000111); value from memory: A_14 = 199360981.
    # P(14 iid continuous points alternate, either way) = 2 A_14 / 14!.
    with mp.workdps(40):
        coefficient = mp.taylor(lambda x: mp.sec(x) + mp.tan(x), 0, 14)[14]
        from_series = int(mp.nint(coefficient * mp.factorial(14)))
    assert _zigzag_by_boustrophedon(14) == from_series == 199360981


def _exact_rate(rule):
    """P(the rule fires at a given point) for iid N(0,1) points, past the first length - 1."""
    q1, q2, q3 = stats.norm.sf(1.0), stats.norm.sf(2.0), stats.norm.sf(3.0)
    rid = rule.id
    if rid is RuleId.BEYOND_LIMITS:
        return 2 * q3  # 0.0026998 (two-sided normal tail beyond 3)
    if rid is RuleId.OUTER_ZONE_CLUSTER:
        # the newest beyond +2, and at least one of the two before it too; times two sides
        return 2 * q2 * (1 - (1 - q2) ** 2)
    if rid is RuleId.MIDDLE_ZONE_CLUSTER:
        # the newest beyond +1, and at least 3 of the 4 before it too; times two sides
        return 2 * q1 * stats.binom.sf(2, 4, q1)
    if rid is RuleId.SAME_SIDE_RUN:
        return 2 * 0.5**rule.length
    if rid is RuleId.STEADY_TREND:
        return 2 / math.factorial(rule.length)  # one of n! orders is increasing
    if rid is RuleId.ALTERNATING_RUN:
        return 2 * _zigzag_by_boustrophedon(rule.length) / math.factorial(rule.length)
    if rid is RuleId.HUGGING_CENTER:
        return (1 - 2 * q1) ** rule.length
    # avoiding the center: all beyond 1 sigma, minus all above or all below
    return (2 * q1) ** rule.length - 2 * q1**rule.length


@pytest.mark.parametrize(
    ("rule", "points"),
    [
        pytest.param(Rule.beyond_limits(), 1_000_000, id="beyond-3-sigma"),
        pytest.param(Rule.outer_zone_cluster(), 1_500_000, id="2-of-3-beyond-2"),
        pytest.param(Rule.middle_zone_cluster(), 1_500_000, id="4-of-5-beyond-1"),
        pytest.param(Rule.same_side_run(8), 1_500_000, id="8-on-one-side"),
        pytest.param(Rule.steady_trend(6), 1_500_000, id="6-trend"),
        pytest.param(Rule.alternating_run(14), 2_000_000, id="14-alternating"),
        pytest.param(Rule.hugging_center(15), 2_000_000, id="15-within-1"),
        pytest.param(Rule.avoiding_center(8), 8_000_000, id="8-beyond-1-both-sides"),
    ],
)
def test_false_alarm_rate_per_point_matches_the_exact_probability(rule, points):
    """On seeded iid N(0,1) points, each rule fires at the exact per-point rate (4 binomial SE)."""
    # A rule firing at point i depends only on the last `length` points, so points spaced
    # `length` apart give independent Bernoulli trials: only those are counted.
    length = rule.length
    rule_set = RuleSet([rule])
    rng = np.random.default_rng(1984 + length)
    chunk, fired, seen = 2_000_000, 0, 0
    while seen < points:
        size = min(chunk, points - seen)
        hits = rule_set.scan(rng.standard_normal(size), first_index=seen)
        fired += sum(1 for h in hits if h.index % length == length - 1)
        seen += size
    trials = points // length
    p = _exact_rate(rule)
    standard_error = math.sqrt(p * (1 - p) / trials)
    assert abs(fired / trials - p) < 4 * standard_error, (fired, trials, p)


def test_beyond_three_sigma_rate_is_0_0026998():
    """The exact two-sided rate used above is 2(1 - Phi(3)) = 0.0026998."""
    # Standard normal table value (e.g. Montgomery, Appendix II); value from memory.
    assert _exact_rate(Rule.beyond_limits()) == pytest.approx(0.0026998, abs=1e-7)
