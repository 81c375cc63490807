"""Average run length (ARL) of control charts, and chart design from it.

The run length is the number of plotted points up to and including the first signal. Every
function here takes the law of the standardized plotted point,
``z = (xbar - target) / (sigma / sqrt(n))``, as a plain vectorised CDF (:data:`ZCdf`; standard
normal by default), so any in-control model of the readings can be plugged in. A mean shift of
``shift`` sigma of the plotted point is modelled as ``cdf(z - shift)``. The law must be
continuous (no atoms on a zone line or a chain boundary); a mean of continuous readings is.

The methods:

* :func:`shewhart_arl` (a Shewhart chart with run rules, the conventions of
  :mod:`monitor.spc.rules`):

  - zone rules only (``beyond_limits``, the two cluster rules, ``same_side_run``,
    ``hugging_center``, ``avoiding_center``): an exact absorbing Markov chain. Each rule is an
    automaton over the zones of the point; their product is explored from the start state and
    reduced to its minimal form (states with the same future are merged), so the chain is as
    small as the rules' memory allows;
  - order rules only (``steady_trend``, ``alternating_run``, one or both): these compare
    neighbours, not zones. For independent continuous points their run-length law is the same
    for every continuous law and every mean shift (it depends on ranks only), and it is computed
    exactly from the relative rank of the newest point among all points so far (the new point's
    rank is uniform and independent of the past), with the geometric tail summed in closed
    form once its ratio has settled;
  - zone and order rules together (the Nelson set): a seeded simulation of the same automata
    (values drawn on the probability scale, so only the CDF is needed). ``error`` is then the
    95 % confidence half-width. The result is a deterministic function of the arguments and the
    seed.

* :func:`ewma_arl`: the Markov chain of Brook and Evans (1972) as used by Lucas and Saccucci
  (1990, *Technometrics* 32): the interval between the limits is cut into M cells, the chain
  moves between cell midpoints. Limits are the asymptotic ``+/- L sqrt(lambda / (2 - lambda))``
  as in the published tables, or (``time_varying_limits``, ``fast_initial_response``) the
  limits :class:`~monitor.spc.charts.EwmaChart` really uses: the first steps then run on a
  chain whose grid follows each step's limits exactly, until the limits have settled.

* :func:`cusum_arl`: the Brook and Evans (1972, *Biometrika* 59) chain for each one-sided sum
  (state 0 holds ``[0, w/2]``, state i ``((i - 1/2) w, (i + 1/2) w]``, ``h = (N - 1/2) w``).
  Two sides are combined by the relation of Lucas and Crosier (1982, *Technometrics* 24)::

      ARL = (A+(s) A-(0) + A-(s) A+(0) - A+(0) A-(0)) / (A+(0) + A-(0))

  (``s`` the head start; with none, ``1/ARL = 1/ARL+ + 1/ARL-``). It is exact, not an
  approximation, for ``k >= 0`` and a head start of at most ``h / 2``. Whatever one sum gains
  over a stretch of points, the other loses at least as much plus 2k per point (the increments
  are ``z - k`` and ``-z - k``). The signalling sum climbed from 0 (or from the head start)
  past h without touching 0, and each tail of that climb is a gain; the other sum was at most
  h when the climb began (at most the head start, with ``2 s <= h``, if it began at the start),
  so it is exactly 0 when the signal comes. The other side then restarts afresh, and a renewal
  argument (strong Markov property) gives the relation. For a larger head start a joint two-dimensional chain
  of both sums is used instead (at most 48 cells per side, so its stated error may exceed the
  tolerance below; about 1e-4 relative for k = 0.5, h = 5).

Every chain is refined (sizes doubled) and Richardson-extrapolated (the discretisation error is
of order ``1 / size**2``) until two successive extrapolations agree to ``1e-4`` relative;
``error`` is the difference of the last two, ``states`` the largest chain solved.

Design: :func:`cusum_decision_interval` and :func:`ewma_width` solve for the parameter that
gives a wanted in-control ARL; :func:`recommend_ewma` and :func:`recommend_cusum` choose a
chart for a shift to detect. :func:`cusum_tail` and :func:`ewma_tail` give the in-control law
of the plotted sums at an observed value (p-values of CUSUM and EWMA signals).

Examples:
    >>> from monitor.spc.rules import Rule, western_electric
    >>> round(shewhart_arl([Rule.beyond_limits()]).arl, 1)
    370.4
    >>> result = shewhart_arl(western_electric())
    >>> round(result.arl, 2), result.method
    (91.75, 'Markov chain')
    >>> round(cusum_arl(0.5, 5.0).arl)
    465
    >>> round(ewma_arl(0.1, 2.814).arl)
    500
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from functools import lru_cache
from typing import Final, Literal

import numpy as np
from numpy.typing import NDArray
from scipy import linalg, optimize, special

from monitor.spc.errors import ConfigError
from monitor.spc.rules import Rule
from monitor.spc.signals import RuleId

__all__ = [
    "DEFAULT_SMOOTHINGS",
    "CusumTailCurve",
    "Design",
    "RunLength",
    "ZCdf",
    "cusum_arl",
    "cusum_decision_interval",
    "cusum_tail",
    "cusum_tail_curve",
    "ewma_arl",
    "ewma_tail",
    "ewma_width",
    "normal_cdf",
    "recommend_cusum",
    "recommend_ewma",
    "shewhart_arl",
]

FloatArray = NDArray[np.float64]
ZCdf = Callable[[FloatArray], FloatArray]
"""The CDF of the standardized plotted point, applied element-wise to an array."""

DEFAULT_SMOOTHINGS: Final = (0.05, 0.10, 0.15, 0.20, 0.25, 0.30, 0.35, 0.40, 0.45, 0.50)
"""The grid of EWMA weights that :func:`recommend_ewma` searches."""

RELATIVE_TOLERANCE: Final = 1e-4
"""Refinement stops when two successive extrapolated ARLs agree to this (relative)."""

_EWMA_START = 50
_EWMA_MAX = 3200
_CUSUM_START = 25
_CUSUM_MAX = 1600
_JOINT_START = 12
_JOINT_MAX = 48
_LIMIT_SETTLED = 1e-7
_Z95 = 1.959963984540054


def normal_cdf(z: FloatArray) -> FloatArray:
    """The standard normal CDF, the default law of the standardized plotted point.

    Examples:
        >>> float(normal_cdf(np.array([0.0]))[0])
        0.5
    """
    return np.asarray(special.ndtr(z), dtype=np.float64)


@dataclass(frozen=True, slots=True)
class RunLength:
    """The run-length law of a chart, as far as the method gives it.

    Attributes:
        arl: average run length (points up to and including the first signal).
        sd: standard deviation of the run length, where the method gives it.
        method: how it was obtained ("closed form", "Markov chain", "rank recursion",
            "simulation").
        states: size of the (largest) chain solved, if any.
        error: stated accuracy of ``arl`` (absolute): the difference of the last two
            extrapolations for a refined chain, the 95 % confidence half-width for a
            simulation; None when the method is exact up to rounding.

    Examples:
        >>> result = cusum_arl(0.5, 5.0, two_sided=False)
        >>> round(result.arl, 1), round(result.sd, 1), result.method, result.states
        (930.9, 924.4, 'Markov chain', 100)
        >>> result.error < 1e-4 * result.arl
        True
    """

    arl: float
    sd: float | None
    method: str
    states: int | None
    error: float | None


@dataclass(frozen=True, slots=True)
class Design:
    """A chart design: its parameters and the ARLs they give.

    Attributes:
        chart: ``"ewma"`` or ``"cusum"``.
        params: ``{"smoothing", "width"}`` for EWMA, ``{"k", "h"}`` for CUSUM (sigma units of
            the plotted point).
        arl0: in-control ARL of the design.
        arl1: ARL at the shift it was designed for.
        shift: that shift, in sigma of the plotted point.

    Examples:
        >>> design = recommend_cusum(370.0, 2.0)
        >>> design.chart, design.params["k"], round(design.params["h"], 2), round(design.arl1, 2)
        ('cusum', 1.0, 2.52, 3.26)
    """

    chart: str
    params: dict[str, float]
    arl0: float
    arl1: float
    shift: float


# ---------------------------------------------------------------- validation


def _finite(name: str, value: float) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        raise ConfigError(f"{name} must be a finite number, got {value!r}")
    return float(value)


def _positive(name: str, value: float) -> float:
    number = _finite(name, value)
    if number <= 0:
        raise ConfigError(f"{name} must be greater than 0, got {value!r}")
    return number


def _smoothing(value: float) -> float:
    number = _finite("smoothing (lambda)", value)
    if not 0 < number <= 1:
        raise ConfigError(f"smoothing (lambda) must be in (0, 1], got {value!r}")
    return number


def _target_arl(value: float) -> float:
    number = _finite("arl0", value)
    if number <= 1:
        raise ConfigError(f"arl0 must be greater than 1 (points to the first false alarm), got {value!r}")
    return number


def _reference_value(value: float) -> float:
    number = _finite("k", value)
    if number < 0:
        raise ConfigError(f"k must be zero or more, got {value!r}")
    return number


def _state_count(value: int, minimum: int) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or (value != 0 and value < minimum):
        raise ConfigError(f"states must be 0 (automatic) or an integer of at least {minimum}, got {value!r}")
    return value


def _checked_cdf(cdf: ZCdf) -> ZCdf:
    """The CDF after a plausibility check, wrapped to return clipped float arrays."""
    if not callable(cdf):
        raise ConfigError(f"cdf must be a function from an array of z to probabilities, got {cdf!r}")
    probe = np.array([-8.0, -3.0, -1.0, 0.0, 1.0, 3.0, 8.0])
    try:
        values = np.asarray(cdf(probe), dtype=np.float64)
    except (TypeError, ValueError) as exc:
        raise ConfigError(f"cdf must accept a numpy array of z values: {exc}") from exc
    if values.shape != probe.shape:
        raise ConfigError(f"cdf must return one probability per z (shape {probe.shape}), got {values.shape}")
    if not np.all(np.isfinite(values)) or np.any(values < -1e-12) or np.any(values > 1 + 1e-12):
        raise ConfigError("cdf must return probabilities in [0, 1]")
    if np.any(np.diff(values) < -1e-12):
        raise ConfigError("cdf must be non-decreasing")

    def wrapped(z: FloatArray) -> FloatArray:
        return np.clip(np.asarray(cdf(z), dtype=np.float64), 0.0, 1.0)

    return wrapped


def _shifted(cdf: ZCdf, shift: float) -> ZCdf:
    if shift == 0.0:
        return cdf

    def moved(z: FloatArray) -> FloatArray:
        return cdf(z - shift)

    return moved


def _mirrored(cdf: ZCdf) -> ZCdf:
    """The CDF of -z (for the lower one-sided sum)."""

    def mirror(z: FloatArray) -> FloatArray:
        return 1.0 - cdf(-z)

    return mirror


# ---------------------------------------------------------------- absorbing chains


def _reach_absorption(Q: FloatArray) -> NDArray[np.bool_]:
    """States from which the absorbing state can be reached with positive probability."""
    exits = 1.0 - Q.sum(axis=1) > 1e-14
    edges = Q > 0
    reach = exits.copy()
    while True:
        grown: NDArray[np.bool_] = reach | edges[:, reach].any(axis=1)
        if np.array_equal(grown, reach):
            return grown
        reach = grown


def _tail_moments(Q: FloatArray, first: FloatArray, offset: int) -> tuple[float, float]:
    """Tail sums of the survival function from step ``offset`` on.

    ``first`` is the mass on the transient states after step ``offset`` (so
    ``P(T > offset + u) = first Q^u 1``). Returns ``sum_u P(T > offset + u)`` and
    ``sum_u (2 (offset + u) + 1) P(T > offset + u)``, the parts of ``E[T]`` and ``E[T^2]``.
    """
    reach = _reach_absorption(Q)
    if not reach.all():
        edges = Q > 0
        seen = first > 0
        while True:
            grown = seen | edges[seen].any(axis=0)
            if np.array_equal(grown, seen):
                break
            seen = grown
        if np.any(seen & ~reach):
            return math.inf, math.inf  # some mass can never be absorbed
        keep = np.flatnonzero(reach)
        Q = Q[np.ix_(keep, keep)]
        first = first[keep]
    n = Q.shape[0]
    factor = linalg.lu_factor(np.eye(n) - Q)
    mean = np.asarray(linalg.lu_solve(factor, np.ones(n)), dtype=np.float64)
    fundamental_mean = np.asarray(linalg.lu_solve(factor, mean), dtype=np.float64)
    tail_mean = float(first @ mean)
    # sum_u u Q^u 1 = N m - m with N = (I - Q)^-1 and m = N 1
    return tail_mean, (2 * offset + 1) * tail_mean + 2.0 * float(first @ (fundamental_mean - mean))


def _moments(Q: FloatArray, first: FloatArray) -> tuple[float, float]:
    """E[T] and E[T^2] of the run length; ``first`` is the mass after the first point."""
    tail_mean, tail_second = _tail_moments(Q, first, 1)
    return 1.0 + tail_mean, 1.0 + tail_second


def _sd(mean: float, second: float) -> float | None:
    if not (math.isfinite(mean) and math.isfinite(second)):
        return None
    return math.sqrt(max(second - mean * mean, 0.0))


@dataclass(frozen=True, slots=True)
class _Refined:
    mean: float
    second: float
    error: float
    states: int


def _refine(compute: Callable[[int], tuple[float, float]], start: int, most: int, states: int) -> _Refined:
    """Solve chains of doubling size and Richardson-extrapolate (error of order 1/size^2)."""
    if states:
        coarse = compute(max(states // 2, 2))
        fine = compute(states)
        return _Refined(fine[0], fine[1], abs(fine[0] - coarse[0]) / 3.0, states)
    raw: list[tuple[float, float]] = []
    extrapolated: list[tuple[float, float]] = []
    size = start
    while True:
        raw.append(compute(size))
        if not math.isfinite(raw[-1][0]):
            return _Refined(math.inf, math.inf, 0.0, size)
        if len(raw) >= 2:
            (m0, s0), (m1, s1) = raw[-2], raw[-1]
            # sizes double: the error of order size^-2 drops fourfold
            extrapolated.append((m1 + (m1 - m0) / 3.0, s1 + (s1 - s0) / 3.0))
        if len(extrapolated) >= 2:
            error = abs(extrapolated[-1][0] - extrapolated[-2][0])
            if error <= RELATIVE_TOLERANCE * abs(extrapolated[-1][0]) or size * 2 > most:
                mean, second = extrapolated[-1]
                return _Refined(mean, second, error, size)
        elif size * 2 > most:
            return _Refined(raw[-1][0], raw[-1][1], math.inf, size)
        size *= 2


# ---------------------------------------------------------------- Shewhart and run rules

_ORDER_RULES = frozenset({RuleId.STEADY_TREND, RuleId.ALTERNATING_RUN})
_CLUSTERS = frozenset({RuleId.OUTER_ZONE_CLUSTER, RuleId.MIDDLE_ZONE_CLUSTER})

_Memory = tuple[int, ...]
_Step = Callable[[_Memory, float], _Memory | None]


def _rule_automaton(rule: Rule, limit_sigma: float) -> tuple[_Memory, _Step]:
    """Start state and step function of one zone rule (None when the rule fires).

    Each mirrors :class:`~monitor.spc.rules.RuleSet` for a point strictly inside a zone.
    """
    rid = rule.id
    if rid is RuleId.BEYOND_LIMITS:

        def beyond(memory: _Memory, z: float) -> _Memory | None:
            return None if z > limit_sigma or z < -limit_sigma else memory

        return (), beyond
    if rid in _CLUSTERS:
        sigma, count, keep = rule.sigma, rule.count, rule.length - 1

        def cluster(memory: _Memory, z: float) -> _Memory | None:
            mark = 1 if z > sigma else -1 if z < -sigma else 0
            if mark and sum(1 for m in memory if m == mark) + 1 >= count:
                return None
            return (*memory, mark)[1:] if keep else ()

        return (0,) * keep, cluster
    if rid is RuleId.SAME_SIDE_RUN:
        length = rule.length

        def same_side(memory: _Memory, z: float) -> _Memory | None:
            run = memory[0]
            run = max(run, 0) + 1 if z > 0 else min(run, 0) - 1
            return None if abs(run) >= length else (run,)

        return (0,), same_side
    if rid is RuleId.HUGGING_CENTER:
        length, sigma = rule.length, rule.sigma

        def hugging(memory: _Memory, z: float) -> _Memory | None:
            run = memory[0] + 1 if abs(z) <= sigma else 0
            return None if run >= length else (run,)

        return (0,), hugging
    # AVOIDING_CENTER: (points in the current run beyond sigma, capped at length;
    # points since the last one above, since the last one below, capped at length)
    length, sigma = rule.length, rule.sigma

    def avoiding(memory: _Memory, z: float) -> _Memory | None:
        run, since_up, since_down = memory
        if abs(z) <= sigma:
            return (0, length, length)
        run = min(run + 1, length)
        if z > 0:
            since_up, since_down = 0, min(since_down + 1, length)
        else:
            since_up, since_down = min(since_up + 1, length), 0
        if run >= length and since_up < length and since_down < length:
            return None
        return (run, since_up, since_down)

    return (0, length, length), avoiding


@dataclass(frozen=True, slots=True)
class _ZoneChain:
    """A minimal automaton over zones: ``table[state, zone]`` is the next state, -1 a signal."""

    edges: tuple[float, ...]  # finite zone lines, increasing
    table: NDArray[np.int64]
    start: int


def _zone_lines(rules: Sequence[Rule], limit_sigma: float) -> tuple[float, ...]:
    lines: set[float] = set()
    for rule in rules:
        if rule.id is RuleId.BEYOND_LIMITS:
            lines |= {limit_sigma, -limit_sigma}
        elif rule.id is RuleId.SAME_SIDE_RUN:
            lines.add(0.0)
        elif rule.id not in _ORDER_RULES:
            lines |= {rule.sigma, -rule.sigma}
    return tuple(sorted(lines))


def _explore(start: _Memory, step: _Step, points: Sequence[float]) -> list[list[int]]:
    """Transition table of one automaton over the zone representatives (-1: fires)."""
    index = {start: 0}
    order = [start]
    table: list[list[int]] = []
    i = 0
    while i < len(order):
        row: list[int] = []
        for z in points:
            nxt = step(order[i], z)
            if nxt is None:
                row.append(-1)
                continue
            if nxt not in index:
                index[nxt] = len(order)
                order.append(nxt)
            row.append(index[nxt])
        table.append(row)
        i += 1
    return table


def _minimize(table: NDArray[np.int64]) -> tuple[NDArray[np.int64], int]:
    """Merge states with the same future (Moore's partition refinement); class of each state."""
    classes = np.zeros(table.shape[0], dtype=np.int64)
    count = 1
    while True:
        successor = np.where(table >= 0, classes[np.maximum(table, 0)], -1)
        _, refined = np.unique(np.column_stack([classes, successor]), axis=0, return_inverse=True)
        refined = refined.reshape(-1).astype(np.int64)
        new_count = int(refined.max()) + 1
        if new_count == count:
            return classes, count
        classes, count = refined, new_count


@lru_cache(maxsize=64)
def _zone_chain(rules: tuple[Rule, ...], limit_sigma: float) -> _ZoneChain:
    lines = _zone_lines(rules, limit_sigma)
    bounds = (-math.inf, *lines, math.inf)
    points = [
        lo + 1.0 if hi == math.inf else hi - 1.0 if lo == -math.inf else (lo + hi) / 2.0
        for lo, hi in itertools.pairwise(bounds)
    ]
    local = []
    for rule in rules:
        start, step = _rule_automaton(rule, limit_sigma)
        local.append(_explore(start, step, points))
    product_start = (0,) * len(local)
    index = {product_start: 0}
    order = [product_start]
    rows: list[list[int]] = []
    i = 0
    while i < len(order):
        state = order[i]
        row: list[int] = []
        for zone in range(len(points)):
            nxt: list[int] = []
            for rule_table, s in zip(local, state, strict=True):
                target = rule_table[s][zone]
                if target < 0:
                    break
                nxt.append(target)
            else:
                key = tuple(nxt)
                if key not in index:
                    index[key] = len(order)
                    order.append(key)
                row.append(index[key])
                continue
            row.append(-1)
        rows.append(row)
        i += 1
    table = np.asarray(rows, dtype=np.int64)
    classes, count = _minimize(table)
    representative = np.zeros(count, dtype=np.int64)
    representative[classes] = np.arange(classes.shape[0])
    reduced = table[representative]
    reduced = np.where(reduced >= 0, classes[np.maximum(reduced, 0)], -1)
    return _ZoneChain(lines, reduced, int(classes[0]))


def _zone_probabilities(lines: tuple[float, ...], cdf: ZCdf) -> FloatArray:
    at_lines = cdf(np.asarray(lines, dtype=np.float64)) if lines else np.zeros(0)
    cumulative = np.concatenate([[0.0], at_lines, [1.0]])
    return np.clip(np.diff(cumulative), 0.0, 1.0)


def _check_rules(rules: Sequence[Rule]) -> tuple[Rule, ...]:
    checked = tuple(rules)
    if not checked:
        raise ConfigError("rules must contain at least one rule")
    seen: set[RuleId] = set()
    for rule in checked:
        if not isinstance(rule, Rule):
            raise ConfigError(f"rules must be Rule objects, got {rule!r}")
        if rule.id in seen:
            raise ConfigError(f"rule {rule.id.value!r} is listed twice; keep one")
        seen.add(rule.id)
    return checked


def _zone_arl(chain: _ZoneChain, probabilities: FloatArray) -> RunLength:
    count = chain.table.shape[0]
    Q = np.zeros((count, count))
    rows = np.repeat(np.arange(count), chain.table.shape[1])
    targets = chain.table.reshape(-1)
    weights = np.tile(probabilities, count)
    live = targets >= 0
    np.add.at(Q, (rows[live], targets[live]), weights[live])
    first = Q[chain.start].copy()
    mean, second = _moments(Q, first)
    return RunLength(mean, _sd(mean, second), "Markov chain", count, None)


@lru_cache(maxsize=32)
def _order_rules(trend: int, alternation: int) -> RunLength:
    """Exact run-length law of steady_trend and/or alternating_run (0: absent) by ranks.

    After n points let r be the rank of the newest among all n. The next point's rank among
    n + 1 is uniform on 1..n+1 and independent of the past, and it lies above the newest point
    exactly when its rank exceeds r. So (direction, run counters, r) is an exact chain whose
    state space grows by one rank per step; the survival probabilities it gives settle into a
    geometric tail, which is summed in closed form.
    """
    # pattern states: (steps in the current monotone run, signs in the current alternation)
    if trend and alternation:
        patterns = [(j, 1) for j in range(1, trend - 1)] + [(1, a) for a in range(2, alternation - 1)]
    elif trend:
        patterns = [(j, 0) for j in range(1, trend - 1)]
    else:
        patterns = [(0, a) for a in range(1, alternation - 1)]
    position = {p: i for i, p in enumerate(patterns)}

    def onward(pattern: tuple[int, int]) -> int:  # the same direction again
        run = pattern[0] + 1 if trend else 0
        if trend and run >= trend - 1:
            return -1
        return position[(run, 1 if alternation else 0)]

    def turn(pattern: tuple[int, int]) -> int:  # the direction reverses
        alt = pattern[1] + 1 if alternation else 0
        if alternation and alt >= alternation - 1:
            return -1
        return position[(1 if trend else 0, alt)]

    count = len(patterns)
    same = np.array([onward(p) for p in patterns], dtype=np.int64)
    flip = np.array([turn(p) for p in patterns], dtype=np.int64)
    opening = position[(1 if trend else 0, 1 if alternation else 0)]
    # mass[d, pattern, rank]: d = 0 last step up, 1 last step down; ranks 0-based
    mass = np.zeros((2, count, 2))
    mass[0, opening, 1] = 0.5
    mass[1, opening, 0] = 0.5
    survival = [1.0, 1.0, 1.0]  # P(T > 0), P(T > 1), P(T > 2)
    longest = max(trend, alternation)
    n = 2
    settled = False
    ratio = 0.0
    change = math.inf
    while n < 20_000:
        cumulative = np.concatenate([np.zeros((2, count, 1)), np.cumsum(mass, axis=2)], axis=2)
        below = cumulative[:, :, : n + 1] / (n + 1)  # new point above the newest: its rank exceeds r
        above = (cumulative[:, :, n : n + 1] - cumulative[:, :, : n + 1]) / (n + 1)
        fresh = np.zeros((2, count, n + 1))
        for d, (up_to, down_to) in enumerate(((same, flip), (flip, same))):
            ok = up_to >= 0
            np.add.at(fresh[0], up_to[ok], below[d][ok])
            ok = down_to >= 0
            np.add.at(fresh[1], down_to[ok], above[d][ok])
        mass = fresh
        n += 1
        survival.append(float(mass.sum()))
        if survival[-1] <= 0.0:
            settled, ratio, change = True, 0.0, 0.0
            break
        new_ratio = survival[-1] / survival[-2]
        change = abs(new_ratio - ratio)
        ratio = new_ratio
        if n > 4 * longest + 20 and change <= 1e-15:
            settled = True
            break
    last = survival[-1]
    # the tail beyond the last step is summed as a geometric series; its ratio is known to
    # within ``change``, so the sum is known to within about last * change / (1 - ratio)^2
    error = 0.0 if ratio == 0 else last * max(change, 1e-16) / (1 - ratio) ** 2
    if not settled:
        error = max(error, last * ratio / (1 - ratio))
    terms = np.asarray(survival)
    steps = np.arange(terms.shape[0], dtype=np.float64)
    mean = float(terms.sum())
    second = float(((2 * steps + 1) * terms).sum())
    if ratio > 0:
        top = steps[-1]
        geometric = ratio / (1 - ratio)
        mean += last * geometric
        second += last * ((2 * top + 1) * geometric + 2 * ratio / (1 - ratio) ** 2)
    return RunLength(mean, _sd(mean, second), "rank recursion", None, error)


def _simulate_rules(
    chain: _ZoneChain,
    probabilities: FloatArray,
    trend: int,
    alternation: int,
    runs: int,
    seed: int,
) -> RunLength:
    """Seeded simulation of zone automaton plus order rules, on the probability scale."""
    rng = np.random.default_rng(seed)
    cuts = np.cumsum(probabilities)[:-1]
    state = np.full(runs, chain.start, dtype=np.int64)
    last = np.zeros(runs)
    up = np.zeros(runs, dtype=np.int64)
    down = np.zeros(runs, dtype=np.int64)
    alt = np.zeros(runs, dtype=np.int64)
    last_sign = np.zeros(runs, dtype=np.int64)
    lengths = np.empty(runs, dtype=np.int64)
    ids = np.arange(runs)
    t = 0
    while ids.shape[0]:
        t += 1
        u = rng.random(ids.shape[0])
        state = chain.table[state, np.searchsorted(cuts, u, side="right")]
        fired = state < 0
        if t > 1:
            sign = (u > last).astype(np.int64) - (u < last).astype(np.int64)
        else:
            sign = np.zeros(ids.shape[0], dtype=np.int64)
        if trend:
            up = np.where(sign > 0, up + 1, 0)
            down = np.where(sign < 0, down + 1, 0)
            fired |= (up >= trend - 1) | (down >= trend - 1)
        if alternation:
            alt = np.where(sign == 0, 0, np.where((last_sign != 0) & (sign == -last_sign), alt + 1, 1))
            fired |= alt >= alternation - 1
        last_sign, last = sign, u
        if fired.any():
            lengths[ids[fired]] = t
            keep = ~fired
            ids, state, last, up, down, alt, last_sign = (
                ids[keep],
                state[keep],
                last[keep],
                up[keep],
                down[keep],
                alt[keep],
                last_sign[keep],
            )
    values = lengths.astype(np.float64)
    mean = float(values.mean())
    sd = float(values.std(ddof=1))
    return RunLength(mean, sd, "simulation", None, _Z95 * sd / math.sqrt(runs))


def shewhart_arl(
    rules: Sequence[Rule],
    *,
    limit_sigma: float = 3.0,
    cdf: ZCdf = normal_cdf,
    shift: float = 0.0,
    simulation_runs: int = 200_000,
    seed: int = 1984,
) -> RunLength:
    """Run length of a Shewhart chart with run rules (conventions of :mod:`monitor.spc.rules`).

    Args:
        rules: the enabled rules, at most one of each kind.
        limit_sigma: control limits at this many sigma (for ``beyond_limits``).
        cdf: law of the standardized plotted point (continuous).
        shift: mean shift in sigma of the plotted point.
        simulation_runs: runs simulated when zone and order rules are mixed.
        seed: seed of that simulation.

    Exact (closed form, Markov chain or rank recursion) except for sets mixing zone rules with
    ``steady_trend`` or ``alternating_run`` (seeded simulation; see the module docstring).
    Order rules alone have the same run-length law for every continuous ``cdf`` and ``shift``:
    they cannot see a sustained mean shift.

    Examples:
        >>> round(shewhart_arl([Rule.beyond_limits()], shift=1.0).arl, 2)
        43.89
        >>> round(shewhart_arl([Rule.steady_trend(3)]).arl, 4)  # 2 sec(1) + 2 tan(1) - 2
        4.8164
    """
    checked = _check_rules(rules)
    limit = _positive("limit_sigma", limit_sigma)
    move = _finite("shift", shift)
    law = _shifted(_checked_cdf(cdf), move)
    if isinstance(simulation_runs, bool) or not isinstance(simulation_runs, int) or simulation_runs < 1000:
        raise ConfigError(f"simulation_runs must be an integer of at least 1000, got {simulation_runs!r}")
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise ConfigError(f"seed must be a non-negative integer, got {seed!r}")
    order = {r.id: r.length for r in checked if r.id in _ORDER_RULES}
    zone_rules = tuple(r for r in checked if r.id not in _ORDER_RULES)
    trend = order.get(RuleId.STEADY_TREND, 0)
    alternation = order.get(RuleId.ALTERNATING_RUN, 0)
    if not zone_rules:
        return _order_rules(trend, alternation)
    if zone_rules == (Rule.beyond_limits(),) and not order:
        p = float(_zone_probabilities((-limit, limit), law)[[0, 2]].sum())
        if p <= 0:
            return RunLength(math.inf, None, "closed form", None, None)
        return RunLength(1.0 / p, math.sqrt(1.0 - p) / p, "closed form", None, None)
    chain = _zone_chain(zone_rules, limit)
    probabilities = _zone_probabilities(chain.edges, law)
    if not order:
        return _zone_arl(chain, probabilities)
    return _simulate_rules(chain, probabilities, trend, alternation, simulation_runs, seed)


# ---------------------------------------------------------------- EWMA


def _ewma_limits(
    smoothing: float,
    width: float,
    *,
    time_varying: bool,
    fast_initial_response: bool,
    fraction: float,
    decay: float,
) -> tuple[float, tuple[float, ...]]:
    """Asymptotic half-width, and the half-widths of the first steps while they differ from it."""
    keep = 1.0 - smoothing
    asymptotic = width * math.sqrt(smoothing / (2.0 - smoothing))
    early: list[float] = []
    t = 1
    while t < 100_000:
        factor = 1.0 - (1.0 - fraction) ** (1.0 + decay * (t - 1)) if fast_initial_response else 1.0
        variance = 1.0 - keep ** (2 * t) if time_varying else 1.0
        half = asymptotic * factor * math.sqrt(variance)
        if abs(half / asymptotic - 1.0) <= _LIMIT_SETTLED:
            break
        early.append(half)
        t += 1
    return asymptotic, tuple(early)


def _ewma_moments(
    smoothing: float, asymptotic: float, early: tuple[float, ...], cells: int, law: ZCdf
) -> tuple[float, float]:
    keep = 1.0 - smoothing

    def grid(half: float) -> tuple[FloatArray, FloatArray]:
        edges = np.linspace(-half, half, cells + 1)
        return edges, (edges[:-1] + edges[1:]) / 2.0

    def moves(source: FloatArray, edges: FloatArray) -> FloatArray:
        cumulative = law((edges[None, :] - keep * source[:, None]) / smoothing)
        return np.diff(cumulative, axis=1)

    edges, mids = grid(asymptotic)
    Q = moves(mids, edges)
    source = np.zeros(1)
    distribution = np.ones(1)
    survived = [1.0]
    for half in early:
        step_edges, step_mids = grid(half)
        distribution = distribution @ moves(source, step_edges)
        survived.append(float(distribution.sum()))
        source = step_mids
    first = distribution @ moves(source, edges)
    terms = np.asarray(survived)  # P(T > t) for t = 0 .. len(early)
    steps = np.arange(terms.shape[0], dtype=np.float64)
    tail_mean, tail_second = _tail_moments(Q, first, terms.shape[0])
    mean = float(terms.sum()) + tail_mean
    second = float(((2 * steps + 1) * terms).sum()) + tail_second
    return mean, second


def ewma_arl(
    smoothing: float,
    width: float,
    *,
    shift: float = 0.0,
    cdf: ZCdf = normal_cdf,
    states: int = 0,
    fast_initial_response: bool = False,
    time_varying_limits: bool = False,
    response_fraction: float = 0.5,
    response_decay: float = 0.3,
) -> RunLength:
    """Run length of an EWMA chart of the standardized point (Brook-Evans chain).

    Args:
        smoothing: lambda, 0 < lambda <= 1.
        width: L; the limits are at ``+/- L`` standard deviations of the EWMA.
        shift: mean shift in sigma of the plotted point.
        cdf: law of the standardized plotted point (continuous).
        states: cells of the chain; 0 refines automatically to about 4 significant digits.
        fast_initial_response: narrow the first limits as
            :class:`~monitor.spc.charts.EwmaChart` does (Steiner 1999).
        time_varying_limits: use the exact variance of the EWMA at each step, as the chart
            does, instead of the asymptotic limits of the published tables.
        response_fraction: f of the fast initial response.
        response_decay: a of the fast initial response.

    Examples:
        >>> round(ewma_arl(0.1, 2.814, shift=1.0).arl, 1)
        10.3
    """
    lam = _smoothing(smoothing)
    big_l = _positive("width (L)", width)
    move = _finite("shift", shift)
    law = _shifted(_checked_cdf(cdf), move)
    size = _state_count(states, 5)
    fraction = _positive("response_fraction", response_fraction)
    if fraction >= 1:
        raise ConfigError(f"response_fraction must be below 1, got {response_fraction!r}")
    decay = _positive("response_decay", response_decay)
    asymptotic, early = _ewma_limits(
        lam,
        big_l,
        time_varying=bool(time_varying_limits),
        fast_initial_response=bool(fast_initial_response),
        fraction=fraction,
        decay=decay,
    )
    refined = _refine(
        lambda cells: _ewma_moments(lam, asymptotic, early, cells, law), _EWMA_START, _EWMA_MAX, size
    )
    return RunLength(
        refined.mean, _sd(refined.mean, refined.second), "Markov chain", refined.states, refined.error
    )


# ---------------------------------------------------------------- CUSUM


def _cusum_side(
    k: float, h: float, size: int, law: ZCdf, starts: FloatArray
) -> tuple[FloatArray, FloatArray]:
    """E[T] and E[T^2] of one upper sum ``max(0, C + z - k)`` from each exact start value."""
    w = 2.0 * h / (2 * size - 1)
    tops = (np.arange(size) + 0.5) * w

    def moves(source: FloatArray) -> FloatArray:
        cumulative = law(tops[None, :] - source[:, None] + k)
        return np.diff(np.concatenate([np.zeros((source.shape[0], 1)), cumulative], axis=1), axis=1)

    Q = moves(np.arange(size, dtype=np.float64) * w)
    rows = moves(starts)
    means = np.empty(starts.shape[0])
    seconds = np.empty(starts.shape[0])
    for i in range(starts.shape[0]):
        means[i], seconds[i] = _moments(Q, rows[i])
    return means, seconds


def _lucas_crosier(up_start: float, down_start: float, up_zero: float, down_zero: float) -> float:
    if math.isinf(up_zero) and math.isinf(down_zero):
        return math.inf
    if math.isinf(down_zero):
        return up_start
    if math.isinf(up_zero):
        return down_start
    return (up_start * down_zero + down_start * up_zero - up_zero * down_zero) / (up_zero + down_zero)


def _cusum_joint(k: float, h: float, head_start: float, size: int, law: ZCdf) -> float:
    """Mean run length of the two-sided CUSUM from a joint chain of both sums (any head start)."""
    w = 2.0 * h / (2 * size - 1)
    levels = np.arange(size) * w
    count = size * size
    Q = np.zeros((count, count))

    def row(x: float, y: float) -> FloatArray:
        # the upper sum lands in cell i when z - k + x <= (i + 1/2) w, the lower in cell j
        # when -z - k + y <= (j + 1/2) w; cut the z line at every such boundary
        ups = k - x + (np.arange(size) + 0.5) * w
        downs = y - k - (np.arange(size) + 0.5) * w
        cuts = np.unique(np.concatenate([ups, downs]))
        lo = cuts[:-1]
        hi = cuts[1:]
        middle = (lo + hi) / 2.0
        probs = np.diff(law(cuts))
        upper = np.searchsorted(ups, middle)  # first i with z <= ups[i]
        lower = np.searchsorted(-downs, -middle)  # first j with -z <= -downs[j]
        ok = (upper < size) & (lower < size)
        out = np.zeros(count)
        np.add.at(out, upper[ok] * size + lower[ok], probs[ok])
        # below the lowest cut the lower sum exceeds h, above the highest the upper one does
        return out

    for i in range(size):
        for j in range(size):
            Q[i * size + j] = row(levels[i], levels[j])
    mean, _ = _moments(Q, row(head_start, head_start))
    return mean


def cusum_arl(
    k: float,
    h: float,
    *,
    shift: float = 0.0,
    cdf: ZCdf = normal_cdf,
    head_start: float = 0.0,
    two_sided: bool = True,
    states: int = 0,
) -> RunLength:
    """Run length of a tabular CUSUM of the standardized point (Brook and Evans chain).

    Args:
        k: reference value (allowance), k >= 0, in sigma of the plotted point.
        h: decision interval, h > 0; a sum signals when it exceeds h.
        shift: mean shift in sigma of the plotted point.
        cdf: law of the standardized plotted point (continuous).
        head_start: starting value of the sums, 0 <= head start < h.
        two_sided: both sums (as :class:`~monitor.spc.charts.CusumChart`), or the upper only.
        states: states per side; 0 refines automatically to about 4 significant digits.

    The sd of the run length is given for one side only.

    Examples:
        >>> round(cusum_arl(0.5, 4.0).arl), round(cusum_arl(0.5, 4.0, shift=1.0).arl, 2)
        (168, 8.38)
    """
    ref = _reference_value(k)
    interval = _positive("h", h)
    move = _finite("shift", shift)
    start = _finite("head_start", head_start)
    if not 0 <= start < interval:
        raise ConfigError(f"head_start must be at least 0 and below h ({interval}), got {head_start!r}")
    base = _checked_cdf(cdf)
    size = _state_count(states, 3)
    up_law = _shifted(base, move)
    if not two_sided:
        refined = _refine(
            lambda n: _pair(_cusum_side(ref, interval, n, up_law, np.array([start]))),
            _CUSUM_START,
            _CUSUM_MAX,
            size,
        )
        return RunLength(
            refined.mean, _sd(refined.mean, refined.second), "Markov chain", refined.states, refined.error
        )
    down_law = _mirrored(up_law)
    if start <= interval / 2.0:
        starts = np.array([start, 0.0])

        def combined(n: int) -> tuple[float, float]:
            up_means, _ = _cusum_side(ref, interval, n, up_law, starts)
            down_means, _ = _cusum_side(ref, interval, n, down_law, starts)
            value = _lucas_crosier(
                float(up_means[0]), float(down_means[0]), float(up_means[1]), float(down_means[1])
            )
            return value, value * value

        refined = _refine(combined, _CUSUM_START, _CUSUM_MAX, size)
        return RunLength(refined.mean, None, "Markov chain", refined.states, refined.error)
    refined = _refine(
        lambda n: _pair_value(_cusum_joint(ref, interval, start, n, up_law)), _JOINT_START, _JOINT_MAX, size
    )
    return RunLength(refined.mean, None, "Markov chain", refined.states**2, refined.error)


def _pair(moments: tuple[FloatArray, FloatArray]) -> tuple[float, float]:
    return float(moments[0][0]), float(moments[1][0])


def _pair_value(value: float) -> tuple[float, float]:
    return value, value * value


# ---------------------------------------------------------------- design


def _solve_for(
    target: float,
    arl: Callable[[float, int], float],
    low: float,
    high: float,
    name: str,
    most: float,
    coarse: int,
) -> float:
    """The parameter in [low, ...] whose ARL is ``target`` (ARL increasing in it).

    ``arl(x, coarse)`` is a cheap fixed chain and ``arl(x, 0)`` the refined one. The root is
    found on the cheap chain (Brent), then corrected by the defect between the two chains at
    the current root (log ARL of the two differs by a nearly constant amount near the root),
    until the refined ARL is on target to 1e-7 relative; usually two refined evaluations.
    """
    goal = math.log(target)
    at_low = arl(low, coarse)
    if at_low > target:
        raise ConfigError(
            f"arl0 {target!r} is below the smallest ARL reachable by {name} ({at_low:.4g}); ask for more"
        )
    while arl(high, coarse) < target:
        low, high = high, high * 2.0
        if high > most:
            raise ConfigError(f"arl0 {target!r} needs {name} beyond {most}; ask for less")

    def cheap(x: float) -> float:
        return math.log(arl(x, coarse))

    root = float(optimize.brentq(lambda x: cheap(x) - goal, low, high, xtol=1e-9))
    for _ in range(8):
        miss = math.log(arl(root, 0)) - goal
        if abs(miss) <= 1e-6:
            return root
        defect = miss + goal - cheap(root)

        def corrected(x: float, defect: float = defect) -> float:
            return cheap(x) + defect - goal

        # corrected(root) == miss: step away from the root until the sign changes
        step = 1.0 - 0.02 * math.copysign(1.0, miss)
        other = root
        for _ in range(200):
            other *= step
            if corrected(other) * miss <= 0:
                break
        else:
            break
        root = float(optimize.brentq(corrected, min(root, other), max(root, other), xtol=1e-10))
    return float(optimize.brentq(lambda x: math.log(arl(x, 0)) - goal, low, high, xtol=1e-9))


def cusum_decision_interval(
    k: float,
    arl0: float,
    *,
    cdf: ZCdf = normal_cdf,
    head_start_fraction: float = 0.0,
    two_sided: bool = True,
) -> float:
    """The decision interval h whose in-control ARL is ``arl0``.

    Args:
        k: reference value, k >= 0.
        arl0: wanted in-control ARL (> 1).
        cdf: in-control law of the standardized point.
        head_start_fraction: head start as a fraction of h (0 <= f < 1; 0.5 is the usual
            fast initial response).
        two_sided: both sums or the upper only.

    Examples:
        >>> round(cusum_decision_interval(0.5, 465.0), 2)
        5.0
    """
    ref = _reference_value(k)
    target = _target_arl(arl0)
    law = _checked_cdf(cdf)
    fraction = _finite("head_start_fraction", head_start_fraction)
    if not 0 <= fraction < 1:
        raise ConfigError(f"head_start_fraction must be in [0, 1), got {head_start_fraction!r}")

    def arl(h: float, states: int) -> float:
        return cusum_arl(ref, h, cdf=law, head_start=fraction * h, two_sided=two_sided, states=states).arl

    return _solve_for(target, arl, 1e-3, 4.0, "h", 1e4, _CUSUM_START)


def ewma_width(
    smoothing: float,
    arl0: float,
    *,
    cdf: ZCdf = normal_cdf,
    fast_initial_response: bool = False,
    time_varying_limits: bool = False,
) -> float:
    """The width L whose in-control ARL is ``arl0`` for the EWMA weight ``smoothing``.

    Examples:
        >>> round(ewma_width(0.1, 500.0), 3)
        2.814
    """
    lam = _smoothing(smoothing)
    target = _target_arl(arl0)
    law = _checked_cdf(cdf)

    def arl(width: float, states: int) -> float:
        return ewma_arl(
            lam,
            width,
            cdf=law,
            states=states,
            fast_initial_response=fast_initial_response,
            time_varying_limits=time_varying_limits,
        ).arl

    return _solve_for(target, arl, 1e-3, 3.0, "width (L)", 100.0, _EWMA_START)


def recommend_ewma(
    arl0: float,
    shift: float,
    *,
    smoothings: Sequence[float] = DEFAULT_SMOOTHINGS,
    cdf: ZCdf = normal_cdf,
    time_varying_limits: bool = False,
) -> Design:
    """The EWMA weight (and its width) with the smallest ARL at ``shift`` for a given ARL0.

    Each weight on the grid gets the width that gives ``arl0`` in control (asymptotic limits,
    as the published tables, unless ``time_varying_limits``: the exact limits that
    :class:`~monitor.spc.charts.EwmaChart` uses); the one detecting ``shift`` fastest wins.

    Examples:
        >>> design = recommend_ewma(500.0, 1.0, smoothings=(0.1, 0.4))
        >>> design.params["smoothing"], round(design.params["width"], 3), round(design.arl1, 1)
        (0.1, 2.814, 10.3)
    """
    target = _target_arl(arl0)
    move = _finite("shift", shift)
    if move == 0:
        raise ConfigError("shift must be non-zero: the shift to detect, in sigma of the plotted point")
    grid = tuple(_smoothing(s) for s in smoothings)
    if not grid:
        raise ConfigError("smoothings must list at least one weight in (0, 1]")
    law = _checked_cdf(cdf)
    designs = []
    for lam in grid:
        width = ewma_width(lam, target, cdf=law, time_varying_limits=time_varying_limits)
        in_control = ewma_arl(lam, width, cdf=law, time_varying_limits=time_varying_limits).arl
        detected = ewma_arl(lam, width, cdf=law, shift=move, time_varying_limits=time_varying_limits).arl
        designs.append(Design("ewma", {"smoothing": lam, "width": width}, in_control, detected, move))
    return min(designs, key=lambda design: design.arl1)


def recommend_cusum(arl0: float, shift: float, *, cdf: ZCdf = normal_cdf) -> Design:
    """A two-sided CUSUM for detecting ``shift``: k = shift / 2, h from ``arl0``.

    k = half the shift is Page's reference value (common practice).

    Examples:
        >>> design = recommend_cusum(465.0, 1.0)
        >>> design.params["k"], round(design.params["h"], 2), round(design.arl1, 1)
        (0.5, 5.0, 10.4)
    """
    target = _target_arl(arl0)
    move = _finite("shift", shift)
    if move == 0:
        raise ConfigError("shift must be non-zero: the shift to detect, in sigma of the plotted point")
    law = _checked_cdf(cdf)
    k = abs(move) / 2.0
    h = cusum_decision_interval(k, target, cdf=law)
    in_control = cusum_arl(k, h, cdf=law).arl
    detected = cusum_arl(k, h, cdf=law, shift=move).arl
    return Design("cusum", {"k": k, "h": h}, in_control, detected, move)


# ---------------------------------------------------------------- laws of the plotted sums


def _check_steps(value: int | None) -> int | None:
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, int) or value < 1:
        raise ConfigError(f"subgroups_since_start must be a positive integer or None, got {value!r}")
    return value


_MOST_STEPS: Final = 5000
_MOST_CELLS: Final = 1200


def _propagated_tail(
    moves: FloatArray, first: FloatArray, above: NDArray[np.bool_], steps: int | None
) -> tuple[float, FloatArray]:
    """Mass in ``above`` after ``steps`` points (None: stationary) and the distribution used.

    ``first`` is the distribution after the first point; ``moves`` the one-step matrix.
    Propagation stops early once a step changes the distribution by less than 1e-15
    (it has become stationary); past ``_MOST_STEPS`` steps the stationary law is solved for.
    """
    if steps is not None and steps - 1 <= _MOST_STEPS:
        distribution = first
        for _ in range(steps - 1):
            moved = distribution @ moves
            change = float(np.abs(moved - distribution).sum())
            distribution = moved
            if change <= 1e-15:
                break
        return float(distribution[above].sum()), distribution
    n = moves.shape[0]
    system = moves.T - np.eye(n)
    system[-1] = 1.0
    rhs = np.zeros(n)
    rhs[-1] = 1.0
    stationary = np.clip(np.linalg.solve(system, rhs), 0.0, None)
    stationary /= stationary.sum()
    return float(stationary[above].sum()), stationary


def cusum_tail(
    k: float,
    h: float,
    value: float,
    *,
    cdf: ZCdf = normal_cdf,
    subgroups_since_start: int | None = None,
    head_start: float = 0.0,
    side: Literal["upper", "lower"] = "upper",
    cell: float = 0.05,
) -> float:
    """P(C >= value) for one CUSUM sum of an in-control process: the p-value of a sum.

    Args:
        k: reference value (k > 0 for the stationary law).
        h: the chart's decision interval. It only bounds the head start:
            :class:`~monitor.spc.charts.CusumChart` does not reset its sums after a signal,
            so their law does not depend on h.
        value: observed sum, in sigma of the plotted point.
        cdf: in-control law of the standardized point (continuous).
        subgroups_since_start: t, the subgroups the chart has seen including this one; None for
            the stationary law (the limit for large t, which needs k > 0).
        head_start: starting value of the sums.
        side: ``"upper"`` for ``C+``, ``"lower"`` for ``C-``.
        cell: grid spacing of the chain; spacings ``cell`` and ``2 cell`` are solved and
            Richardson-extrapolated (coarsened if the grid would exceed 1200 cells).

    The sum is a reflected random walk, ``C = max(0, C + z - k)``. Its law is carried on a grid
    (an atom at 0, cells aligned so that ``value`` is a cell boundary, and a top cell holding
    what lies beyond; the grid reaches far enough above ``value`` that the top cell holds less
    than 1e-9 of the answer) from the exact head start, step by step, or solved for the
    stationary vector.

    Examples:
        >>> cusum_tail(0.5, 5.0, 0.0)
        1.0
        >>> round(cusum_tail(0.5, 5.0, 3.0, subgroups_since_start=1), 6)  # P(z >= 3.5)
        0.000233
    """
    ref = _reference_value(k)
    interval = _positive("h", h)
    observed = _finite("value", value)
    start = _finite("head_start", head_start)
    if not 0 <= start < interval:
        raise ConfigError(f"head_start must be at least 0 and below h ({interval}), got {head_start!r}")
    steps = _check_steps(subgroups_since_start)
    if steps is None and ref <= 0:
        raise ConfigError("k must be greater than 0 for the stationary law of the sum (or give the steps)")
    if side not in ("upper", "lower"):
        raise ConfigError(f"side must be 'upper' or 'lower', got {side!r}")
    spacing = _positive("cell", cell)
    base = _checked_cdf(cdf)
    law = base if side == "upper" else _mirrored(base)
    if observed <= 0:
        return 1.0

    def tail(width: float, margin: float) -> tuple[float, float]:
        width = max(width, (observed + margin) / _MOST_CELLS)
        below = max(1, round(observed / width))
        w = observed / below
        cells = below + max(1, math.ceil(margin / w))
        tops = np.arange(1, cells + 1) * w
        centers = np.concatenate([[0.0], tops - w / 2.0])
        bounds = np.concatenate([[0.0], tops])

        def moves(source: FloatArray) -> FloatArray:
            cumulative = law(bounds[None, :] - source[:, None] + ref)
            out = np.diff(np.concatenate([np.zeros((source.shape[0], 1)), cumulative], axis=1), axis=1)
            out[:, -1] += 1.0 - cumulative[:, -1]  # the top cell keeps what goes beyond it
            return out

        above = np.arange(cells + 1) > below
        found, distribution = _propagated_tail(moves(centers), moves(np.array([start]))[0], above, steps)
        return found, float(distribution[-1])

    # for a normal point the stationary tail falls like exp(-2 k x): 28 / (2 k) is e^-28
    margin = 14.0 / ref if ref > 0 else 8.0 * math.sqrt(steps or 1) + 8.0
    for _ in range(6):
        coarse, top = tail(2 * spacing, margin)
        if top <= 1e-9 * coarse:
            break
        margin *= 2.0
    fine, _ = tail(spacing, margin)
    return float(min(1.0, max(0.0, fine + (fine - coarse) / 3.0)))


def ewma_tail(
    smoothing: float,
    value: float,
    *,
    cdf: ZCdf = normal_cdf,
    subgroups_since_start: int | None = None,
    side: Literal["upper", "lower"] = "upper",
    cells: int = 800,
) -> float:
    """P(E >= value) (``side="lower"``: P(E <= value)) for the in-control EWMA: its p-value.

    ``E`` is the EWMA of the standardized points, started at 0, in sigma of the plotted point
    (not of the EWMA): ``E = (ewma - target) / (sigma / sqrt(n))``. For :func:`normal_cdf` the
    law is normal with variance ``lambda / (2 - lambda) (1 - (1 - lambda)^(2t))`` (closed form);
    for another law it is carried on a grid of ``cells`` cells (and half as many, then
    Richardson-extrapolated) aligned on ``value``, wide enough that its end cells hold less
    than 1e-9 of the answer.

    Examples:
        >>> round(ewma_tail(0.2, 0.6, subgroups_since_start=1), 5)  # P(0.2 z >= 0.6) = P(z >= 3)
        0.00135
        >>> round(ewma_tail(1.0, 3.0), 5)
        0.00135
    """
    lam = _smoothing(smoothing)
    observed = _finite("value", value)
    steps = _check_steps(subgroups_since_start)
    if side not in ("upper", "lower"):
        raise ConfigError(f"side must be 'upper' or 'lower', got {side!r}")
    if isinstance(cells, bool) or not isinstance(cells, int) or cells < 20:
        raise ConfigError(f"cells must be an integer of at least 20, got {cells!r}")
    signed = observed if side == "upper" else -observed
    if cdf is normal_cdf:
        keep = (1.0 - lam) ** (2 * steps) if steps is not None else 0.0
        sd = math.sqrt(lam / (2.0 - lam) * (1.0 - keep))
        return float(special.ndtr(-signed / sd))
    base = _checked_cdf(cdf)
    law = base if side == "upper" else _mirrored(base)
    keep = 1.0 - lam
    spread = math.sqrt(lam / (2.0 - lam))

    def tail(count: int, reach: float) -> tuple[float, float]:
        low = min(signed, 0.0) - reach * spread
        high = max(signed, 0.0) + reach * spread
        w = (high - low) / count
        position = (signed - low) / w
        edges = low + (position - math.floor(position)) * w + np.arange(count + 1) * w
        mids = (edges[:-1] + edges[1:]) / 2.0

        def moves(source: FloatArray) -> FloatArray:
            cumulative = law((edges[None, :] - keep * source[:, None]) / lam)
            out = np.diff(cumulative, axis=1)
            out[:, 0] += cumulative[:, 0]  # the end cells keep what goes beyond them
            out[:, -1] += 1.0 - cumulative[:, -1]
            return out

        above = mids > signed
        found, distribution = _propagated_tail(moves(mids), moves(np.zeros(1))[0], above, steps)
        return found, float(distribution[0] + distribution[-1])

    reach = 12.0
    for _ in range(6):
        coarse, ends = tail(cells // 2, reach)
        if ends <= 1e-9 * coarse:
            break
        reach *= 2.0
    fine, _ = tail(cells, reach)
    return float(min(1.0, max(0.0, fine + (fine - coarse) / 3.0)))


@dataclass(frozen=True, slots=True)
class CusumTailCurve:
    """The stationary upper tail ``P(C > x)`` of one CUSUM sum, tabulated once, read in microseconds.

    Attributes:
        xs: grid of sums (sigma of the plotted point), from 0 up to the reach.
        log_tails: natural log of the tail at each grid point.
        precision: largest relative Richardson correction over the grid (an error estimate of
            the chain's discretisation; the interpolation between points adds far less).

    Between grid points the log tail is interpolated linearly; beyond the table (its reach,
    or where the tail falls below 1e-11, the round-off floor of the solved chain) it is
    extended with the slope of the last grid step (the tail of a reflected random walk
    falls exponentially, Cramer-Lundberg).
    """

    xs: FloatArray
    log_tails: FloatArray
    precision: float

    def __call__(self, value: float) -> float:
        """P(C > value); 1 at or below 0."""
        if value <= 0.0:
            return 1.0
        xs, logs = self.xs, self.log_tails
        if value >= xs[-1]:
            slope = (logs[-1] - logs[-2]) / (xs[-1] - xs[-2])
            return float(math.exp(logs[-1] + slope * (value - xs[-1])))
        return float(math.exp(float(np.interp(value, xs, logs))))


def cusum_tail_curve(
    k: float,
    h: float,
    *,
    cdf: ZCdf = normal_cdf,
    side: Literal["upper", "lower"] = "upper",
    reach: float | None = None,
    cell: float = 0.05,
) -> CusumTailCurve:
    """The stationary law of one CUSUM sum as a tail curve: one chain solve for every p-value.

    Like :func:`cusum_tail` with ``subgroups_since_start=None``, but the stationary vector of
    the chain is solved once on a grid aligned at 0 (spacings ``cell`` and ``2 cell``,
    Richardson-extrapolated at the common points) and kept, so that the p-value of any later
    sum is an interpolation. ``reach`` (default ``4 h``) is where the table ends.

    Examples:
        >>> curve = cusum_tail_curve(0.5, 5.0)
        >>> abs(curve(5.5) / cusum_tail(0.5, 5.0, 5.5) - 1.0) < 1e-3
        True
    """
    ref = _reference_value(k)
    if ref <= 0:
        raise ConfigError("k must be greater than 0 for the stationary law of the sum")
    interval = _positive("h", h)
    top = 4.0 * interval if reach is None else _positive("reach", reach)
    if side not in ("upper", "lower"):
        raise ConfigError(f"side must be 'upper' or 'lower', got {side!r}")
    spacing = _positive("cell", cell)
    base = _checked_cdf(cdf)
    law = base if side == "upper" else _mirrored(base)
    margin = 14.0 / ref
    width = max(spacing, (top + margin) / _MOST_CELLS)
    width = (top / 2.0) / max(1, math.floor(top / (2.0 * width)))  # 2 * width divides the reach

    def tails(w: float) -> FloatArray:
        cells = math.ceil((top + margin) / w)
        bounds = np.arange(cells + 1) * w
        centers = np.concatenate([[0.0], bounds[1:] - w / 2.0])
        cumulative = law(bounds[None, :] - centers[:, None] + ref)
        moves = np.diff(np.concatenate([np.zeros((cells + 1, 1)), cumulative], axis=1), axis=1)
        moves[:, -1] += 1.0 - cumulative[:, -1]
        _, distribution = _propagated_tail(moves, moves[0], np.zeros(cells + 1, dtype=np.bool_), None)
        beyond = np.cumsum(distribution[::-1])[::-1]  # beyond[i]: mass in cells i, i + 1, ...
        return beyond[1:]  # P(C > j w), j = 0 .. cells - 1

    fine = tails(width)
    coarse = tails(2.0 * width)
    points = round(top / (2.0 * width)) + 1
    fine_common = fine[0 : 2 * points : 2][:points]
    coarse_common = coarse[:points]
    extrapolated = fine_common + (fine_common - coarse_common) / 3.0
    extrapolated = np.clip(extrapolated, 1e-300, 1.0).astype(np.float64)
    # below about 1e-11 the solved vector is at its round-off floor: end the table there
    reliable = int(np.argmax(extrapolated < _CURVE_FLOOR)) if np.any(extrapolated < _CURVE_FLOOR) else points
    points = max(3, reliable)
    extrapolated = extrapolated[:points]
    change = np.abs(fine_common - coarse_common)[:points] / 3.0
    precision = float(np.max(change / extrapolated))
    xs = np.arange(points, dtype=np.float64) * 2.0 * width
    return CusumTailCurve(xs, np.log(extrapolated).astype(np.float64), precision)


_CURVE_FLOOR: Final = 1e-11
