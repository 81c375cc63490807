"""Run rules as incremental detectors over standardized chart points.

Every rule looks at the plotted statistic in sigma units, ``z = (value - center) / sigma``,
so one implementation serves charts with varying subgroup sizes and any units. Each rule is
enabled and parameterised on its own; two presets collect the classical sets:

* ``western-electric``: the four zone rules of the Western Electric *Statistical Quality
  Control Handbook* (1956): beyond the limits, 2 of 3 beyond 2 sigma, 4 of 5 beyond 1 sigma,
  8 in a row on one side;
* ``nelson``: the eight tests of Nelson (1984, *Journal of Quality Technology* 16): the same
  zone rules with 9 in a row on one side, plus 6 in a steady trend, 14 alternating,
  15 within 1 sigma and 8 beyond 1 sigma on both sides.

Conventions (common practice, stated here so they are testable):

* "beyond" is strict: a point exactly on a limit or zone line is not beyond it, and so it
  counts as within that line;
* a point exactly on the center line ends a run on one side; equal neighbours end a trend
  or an alternation;
* a rule fires at the point that completes its pattern, and that point is part of the
  pattern (for "2 of 3 beyond 2 sigma", the newest point is one of the two);
* while a pattern persists the rule fires again at each further point (repeat suppression
  belongs to alerting, not to the statistics).

Examples:
    >>> rules = RuleSet(western_electric())
    >>> [h.rule.value for h in rules.scan([0.5, 2.5, 0.0, 2.2], first_index=0)]
    ['outer_zone_cluster']
    >>> hit = rules.update(3.4, index=4)[0]
    >>> hit.rule.value, hit.side.value, hit.subgroups
    ('beyond_limits', 'upper', (4,))
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Self

import numpy as np
from numpy.typing import ArrayLike, NDArray

from monitor.spc._state import (
    check_header,
    get_float,
    get_float_list,
    get_int,
    get_optional_float,
    get_state_list,
    get_str,
    header,
)
from monitor.spc.errors import ConfigError, StateError
from monitor.spc.signals import RuleId, Side
from monitor.spc.types import State

__all__ = [
    "PRESETS",
    "Rule",
    "RuleHit",
    "RuleSet",
    "nelson",
    "rule_preset",
    "western_electric",
]

_NO_INDEX = -(2**62)


@dataclass(frozen=True, slots=True)
class Rule:
    """One rule and its parameters.

    Args:
        id: which rule.
        length: points in the pattern (the window for the cluster rules).
        count: for the cluster rules, how many of the ``length`` points must be beyond ``sigma``.
        sigma: zone line in sigma units (cluster, hugging and avoiding rules); unused otherwise.

    Build rules with the class methods, which carry the classical defaults.

    Examples:
        >>> Rule.same_side_run(9)
        Rule(id=<RuleId.SAME_SIDE_RUN: 'same_side_run'>, length=9, count=9, sigma=0.0)
        >>> Rule.steady_trend(2)
        Traceback (most recent call last):
        ...
        monitor.spc.errors.ConfigError: steady_trend: length must be an integer of at least 3, got 2
    """

    id: RuleId
    length: int = 1
    count: int = 1
    sigma: float = 0.0

    def __post_init__(self) -> None:
        minimum = {
            RuleId.BEYOND_LIMITS: 1,
            RuleId.OUTER_ZONE_CLUSTER: 1,
            RuleId.MIDDLE_ZONE_CLUSTER: 1,
            RuleId.SAME_SIDE_RUN: 2,
            RuleId.STEADY_TREND: 3,
            RuleId.ALTERNATING_RUN: 3,
            RuleId.HUGGING_CENTER: 2,
            RuleId.AVOIDING_CENTER: 2,
        }[self.id]
        name = self.id.value
        if isinstance(self.length, bool) or not isinstance(self.length, int) or self.length < minimum:
            raise ConfigError(f"{name}: length must be an integer of at least {minimum}, got {self.length!r}")
        if self.id in _CLUSTERS:
            if isinstance(self.count, bool) or not isinstance(self.count, int):
                raise ConfigError(f"{name}: count must be an integer, got {self.count!r}")
            if not 1 <= self.count <= self.length:
                raise ConfigError(
                    f"{name}: count must be between 1 and the window ({self.length}), got {self.count}"
                )
        if self.id in _ZONED and not (math.isfinite(self.sigma) and self.sigma > 0):
            raise ConfigError(f"{name}: sigma must be a positive number, got {self.sigma!r}")

    @classmethod
    def beyond_limits(cls) -> Rule:
        """A point outside the chart's control limits."""
        return cls(RuleId.BEYOND_LIMITS)

    @classmethod
    def outer_zone_cluster(cls, count: int = 2, window: int = 3, sigma: float = 2.0) -> Rule:
        """``count`` of the last ``window`` points beyond ``sigma`` on one side."""
        return cls(RuleId.OUTER_ZONE_CLUSTER, length=window, count=count, sigma=sigma)

    @classmethod
    def middle_zone_cluster(cls, count: int = 4, window: int = 5, sigma: float = 1.0) -> Rule:
        """``count`` of the last ``window`` points beyond ``sigma`` on one side."""
        return cls(RuleId.MIDDLE_ZONE_CLUSTER, length=window, count=count, sigma=sigma)

    @classmethod
    def same_side_run(cls, length: int = 8) -> Rule:
        """``length`` points in a row on one side of the center line."""
        return cls(RuleId.SAME_SIDE_RUN, length=length, count=length)

    @classmethod
    def steady_trend(cls, length: int = 6) -> Rule:
        """``length`` points in a row, each above (or each below) the one before."""
        return cls(RuleId.STEADY_TREND, length=length, count=length)

    @classmethod
    def alternating_run(cls, length: int = 14) -> Rule:
        """``length`` points in a row alternating up and down."""
        return cls(RuleId.ALTERNATING_RUN, length=length, count=length)

    @classmethod
    def hugging_center(cls, length: int = 15, sigma: float = 1.0) -> Rule:
        """``length`` points in a row within ``sigma`` of the center line."""
        return cls(RuleId.HUGGING_CENTER, length=length, count=length, sigma=sigma)

    @classmethod
    def avoiding_center(cls, length: int = 8, sigma: float = 1.0) -> Rule:
        """``length`` points in a row beyond ``sigma``, with points on both sides."""
        return cls(RuleId.AVOIDING_CENTER, length=length, count=length, sigma=sigma)

    def to_state(self) -> State:
        """The rule as plain data."""
        return {
            "id": self.id.value,
            "length": self.length,
            "count": self.count,
            "sigma": self.sigma,
        }

    @classmethod
    def from_state(cls, state: State) -> Rule:
        """Rebuild from :meth:`to_state`."""
        try:
            rule_id = RuleId(get_str(state, "id"))
        except ValueError as exc:
            raise StateError(f"unknown rule {state.get('id')!r} in snapshot") from exc
        return cls(
            rule_id,
            length=get_int(state, "length"),
            count=get_int(state, "count"),
            sigma=get_float(state, "sigma"),
        )


_CLUSTERS = frozenset({RuleId.OUTER_ZONE_CLUSTER, RuleId.MIDDLE_ZONE_CLUSTER})
_ZONED = _CLUSTERS | {RuleId.HUGGING_CENTER, RuleId.AVOIDING_CENTER}


def western_electric() -> tuple[Rule, ...]:
    """The four Western Electric zone rules (1956 handbook)."""
    return (
        Rule.beyond_limits(),
        Rule.outer_zone_cluster(2, 3, 2.0),
        Rule.middle_zone_cluster(4, 5, 1.0),
        Rule.same_side_run(8),
    )


def nelson() -> tuple[Rule, ...]:
    """The eight tests of Nelson (1984), in his order."""
    return (
        Rule.beyond_limits(),
        Rule.same_side_run(9),
        Rule.steady_trend(6),
        Rule.alternating_run(14),
        Rule.outer_zone_cluster(2, 3, 2.0),
        Rule.middle_zone_cluster(4, 5, 1.0),
        Rule.hugging_center(15, 1.0),
        Rule.avoiding_center(8, 1.0),
    )


PRESETS: dict[str, tuple[Rule, ...]] = {
    "none": (Rule.beyond_limits(),),
    "western-electric": western_electric(),
    "nelson": nelson(),
}
"""Named rule sets; ``none`` keeps only the point-beyond-limits rule."""


def rule_preset(name: str) -> tuple[Rule, ...]:
    """The rules of a named preset.

    Examples:
        >>> len(rule_preset("nelson"))
        8
    """
    try:
        return PRESETS[name]
    except KeyError:
        allowed = ", ".join(sorted(PRESETS))
        raise ConfigError(f"unknown rule preset {name!r}; allowed: {allowed}") from None


@dataclass(frozen=True, slots=True)
class RuleHit:
    """A rule that fired at one point: the chart turns it into a Signal."""

    index: int
    rule: RuleId
    side: Side
    subgroups: tuple[int, ...]


def _long_runs(flags: NDArray[np.bool_], initial: int, length: int) -> NDArray[np.bool_]:
    """Where the run of True ending at each position is at least ``length`` long.

    ``initial`` is the run carried in from before the array.
    """
    m = flags.shape[0]
    head = np.zeros(length, dtype=np.int32)
    carried = min(initial, length)
    if carried:
        head[length - carried :] = 1
    totals = np.zeros(length + m + 1, dtype=np.int32)
    np.cumsum(np.concatenate([head, flags.astype(np.int32)]), out=totals[1:])
    long_enough: NDArray[np.bool_] = (totals[length + 1 :] - totals[1 : m + 1]) == length
    return long_enough


def _final_run(flags: NDArray[np.bool_], initial: int) -> int:
    """Length of the run of True at the end of the array, continuing ``initial``."""
    breaks = np.flatnonzero(~flags)
    if breaks.shape[0] == 0:
        return initial + int(flags.shape[0])
    return int(flags.shape[0]) - 1 - int(breaks[-1])


_SCHEMA = 1


class RuleSet:
    """The enabled rules of one chart panel, evaluated point by point or over arrays.

    Args:
        rules: the rules, at most one of each kind; signals come out in this order.
        limit_sigma: where the control limits are, in sigma (used by ``beyond_limits``).

    ``update`` (one point) and ``scan`` (an array) give identical hits and leave identical
    state, so a chart can mix both.
    """

    def __init__(self, rules: Sequence[Rule], *, limit_sigma: float = 3.0) -> None:
        seen: set[RuleId] = set()
        for rule in rules:
            if rule.id in seen:
                raise ConfigError(f"rule {rule.id.value!r} is listed twice; keep one")
            seen.add(rule.id)
        if not (math.isfinite(limit_sigma) and limit_sigma > 0):
            raise ConfigError(f"limit_sigma must be a positive number, got {limit_sigma!r}")
        self.rules = tuple(rules)
        self.limit_sigma = float(limit_sigma)
        clusters = [r.length for r in self.rules if r.id in _CLUSTERS]
        self._history = max(clusters, default=1) - 1
        enabled = {r.id for r in self.rules}
        self._track_sides = RuleId.SAME_SIDE_RUN in enabled
        self._track_trend = RuleId.STEADY_TREND in enabled
        self._track_alternation = RuleId.ALTERNATING_RUN in enabled
        self._reset()

    def _reset(self) -> None:
        self._recent: list[float] = []  # the last few z for the cluster rules
        self._last_z: float | None = None
        self._pos_run = 0
        self._neg_run = 0
        self._inc_run = 0
        self._dec_run = 0
        self._alt_run = 0
        self._last_sign = 0
        self._inside_run = 0
        self._outside_run = 0
        self._last_pos_out = _NO_INDEX
        self._last_neg_out = _NO_INDEX

    def __repr__(self) -> str:
        """The rule ids."""
        return f"RuleSet({[r.id.value for r in self.rules]})"

    @property
    def max_length(self) -> int:
        """The longest pattern of the set, in points."""
        return max((r.length for r in self.rules), default=1)

    # ------------------------------------------------------------ one point

    def update(self, z: float, *, index: int) -> list[RuleHit]:
        """Feed one standardized point; return the rules it makes fire, in rule order."""
        if self._track_sides:
            if z > 0:
                self._pos_run += 1
                self._neg_run = 0
            elif z < 0:
                self._neg_run += 1
                self._pos_run = 0
            else:
                self._pos_run = self._neg_run = 0
        if self._track_trend or self._track_alternation:
            last = self._last_z
            sign = 0
            if last is not None:
                if z > last:
                    sign = 1
                elif z < last:
                    sign = -1
            if self._track_trend:
                if sign > 0:
                    self._inc_run += 1
                    self._dec_run = 0
                elif sign < 0:
                    self._dec_run += 1
                    self._inc_run = 0
                else:
                    self._inc_run = self._dec_run = 0
            if self._track_alternation:
                if sign == 0:
                    self._alt_run = 0
                elif self._last_sign != 0 and sign == -self._last_sign:
                    self._alt_run += 1
                else:
                    self._alt_run = 1
                self._last_sign = sign
        self._last_z = z

        hits: list[RuleHit] = []
        for rule in self.rules:
            hit = self._check(rule, z, index)
            if hit is not None:
                hits.append(hit)
        if self._history:
            self._recent.append(z)
            if len(self._recent) > self._history:
                del self._recent[0]
        return hits

    def _check(self, rule: Rule, z: float, index: int) -> RuleHit | None:
        rid, length = rule.id, rule.length
        run = tuple(range(index - length + 1, index + 1))
        if rid is RuleId.BEYOND_LIMITS:
            if z > self.limit_sigma:
                return RuleHit(index, rid, Side.UPPER, (index,))
            if z < -self.limit_sigma:
                return RuleHit(index, rid, Side.LOWER, (index,))
            return None
        if rid in _CLUSTERS:
            return self._check_cluster(rule, z, index)
        if rid is RuleId.SAME_SIDE_RUN:
            if self._pos_run >= length:
                return RuleHit(index, rid, Side.UPPER, run)
            if self._neg_run >= length:
                return RuleHit(index, rid, Side.LOWER, run)
            return None
        if rid is RuleId.STEADY_TREND:
            if self._inc_run >= length - 1:
                return RuleHit(index, rid, Side.UPPER, run)
            if self._dec_run >= length - 1:
                return RuleHit(index, rid, Side.LOWER, run)
            return None
        if rid is RuleId.ALTERNATING_RUN:
            return RuleHit(index, rid, Side.EITHER, run) if self._alt_run >= length - 1 else None
        if rid is RuleId.HUGGING_CENTER:
            self._inside_run = self._inside_run + 1 if abs(z) <= rule.sigma else 0
            return RuleHit(index, rid, Side.EITHER, run) if self._inside_run >= length else None
        # AVOIDING_CENTER
        if abs(z) > rule.sigma:
            self._outside_run += 1
            if z > 0:
                self._last_pos_out = index
            else:
                self._last_neg_out = index
        else:
            self._outside_run = 0
        first = index - length + 1
        if self._outside_run >= length and self._last_pos_out >= first and self._last_neg_out >= first:
            return RuleHit(index, rid, Side.EITHER, run)
        return None

    def _check_cluster(self, rule: Rule, z: float, index: int) -> RuleHit | None:
        if z > rule.sigma:
            side = Side.UPPER
        elif z < -rule.sigma:
            side = Side.LOWER
        else:
            return None
        carried = self._recent[max(0, len(self._recent) - (rule.length - 1)) :] if rule.length > 1 else []
        window = [*carried, z]
        first = index - len(window) + 1
        if side is Side.UPPER:
            involved = tuple(first + i for i, v in enumerate(window) if v > rule.sigma)
        else:
            involved = tuple(first + i for i, v in enumerate(window) if v < -rule.sigma)
        return RuleHit(index, rule.id, side, involved) if len(involved) >= rule.count else None

    # ------------------------------------------------------------ many points

    def scan(self, z: ArrayLike, *, first_index: int) -> list[RuleHit]:
        """Feed many standardized points at once (vectorised); same hits as ``update`` in a loop."""
        values = np.asarray(z, dtype=np.float64)
        m = values.shape[0]
        if m == 0:
            return []
        index = first_index + np.arange(m, dtype=np.int64)
        found: list[tuple[int, int, RuleHit]] = []
        positive = values > 0

        signs = np.zeros(0, dtype=np.int8)
        if self._track_trend or self._track_alternation:
            previous = np.empty(m)
            previous[1:] = values[:-1]
            previous[0] = math.nan if self._last_z is None else self._last_z
            signs = (values > previous).astype(np.int8) - (values < previous).astype(np.int8)

        def emit(where: NDArray[np.bool_], rule: Rule, order: int, side: Side) -> None:
            length = rule.length
            for pos in np.flatnonzero(where).tolist():
                i = int(index[pos])
                found.append((i, order, RuleHit(i, rule.id, side, tuple(range(i - length + 1, i + 1)))))

        for order, rule in enumerate(self.rules):
            rid, length = rule.id, rule.length
            if rid is RuleId.BEYOND_LIMITS:
                beyond = (values > self.limit_sigma) | (values < -self.limit_sigma)
                for pos in np.flatnonzero(beyond).tolist():
                    i = int(index[pos])
                    side = Side.UPPER if values[pos] > 0 else Side.LOWER
                    found.append((i, order, RuleHit(i, rid, side, (i,))))
            elif rid in _CLUSTERS:
                found.extend((h.index, order, h) for h in self._scan_cluster(rule, values, first_index))
            elif rid is RuleId.SAME_SIDE_RUN:
                emit(_long_runs(positive, self._pos_run, length), rule, order, Side.UPPER)
                emit(_long_runs(values < 0, self._neg_run, length), rule, order, Side.LOWER)
            elif rid is RuleId.STEADY_TREND:
                emit(_long_runs(signs > 0, self._inc_run, length - 1), rule, order, Side.UPPER)
                emit(_long_runs(signs < 0, self._dec_run, length - 1), rule, order, Side.LOWER)
            elif rid is RuleId.ALTERNATING_RUN:
                previous_signs = np.empty(m, dtype=np.int8)
                previous_signs[1:] = signs[:-1]
                previous_signs[0] = self._last_sign
                continues = (signs != 0) & (signs == -previous_signs)
                carried = max(self._alt_run - 1, 0)
                emit(_long_runs(continues, carried, length - 2), rule, order, Side.EITHER)
                self._alt_run = 0 if signs[-1] == 0 else _final_run(continues, carried) + 1
                self._last_sign = int(signs[-1])
            elif rid is RuleId.HUGGING_CENTER:
                inside = np.abs(values) <= rule.sigma
                emit(_long_runs(inside, self._inside_run, length), rule, order, Side.EITHER)
                self._inside_run = _final_run(inside, self._inside_run)
            else:  # AVOIDING_CENTER
                out = np.abs(values) > rule.sigma
                last_pos = np.maximum.accumulate(np.where(out & positive, index, self._last_pos_out))
                last_neg = np.maximum.accumulate(np.where(out & ~positive, index, self._last_neg_out))
                first = index - length + 1
                both = (last_pos >= first) & (last_neg >= first)
                emit(_long_runs(out, self._outside_run, length) & both, rule, order, Side.EITHER)
                self._outside_run = _final_run(out, self._outside_run)
                self._last_pos_out, self._last_neg_out = int(last_pos[-1]), int(last_neg[-1])

        if self._track_sides:
            self._pos_run = _final_run(positive, self._pos_run)
            self._neg_run = _final_run(values < 0, self._neg_run)
        if self._track_trend:
            self._inc_run = _final_run(signs > 0, self._inc_run)
            self._dec_run = _final_run(signs < 0, self._dec_run)
        self._last_z = float(values[-1])
        if self._history:
            self._recent = [*self._recent, *values[-self._history :].tolist()][-self._history :]
        found.sort(key=lambda item: (item[0], item[1]))
        return [hit for _, _, hit in found]

    def _scan_cluster(self, rule: Rule, values: NDArray[np.float64], first_index: int) -> list[RuleHit]:
        carried = self._recent[max(0, len(self._recent) - (rule.length - 1)) :] if rule.length > 1 else []
        joined = np.concatenate([np.asarray(carried, dtype=np.float64), values])
        offset = len(carried)
        hits: list[RuleHit] = []
        for side, beyond in ((Side.UPPER, joined > rule.sigma), (Side.LOWER, joined < -rule.sigma)):
            totals = np.concatenate([[0], np.cumsum(beyond, dtype=np.int64)])
            ends = np.arange(offset, joined.shape[0])
            starts = np.maximum(ends + 1 - rule.length, 0)
            counts = totals[ends + 1] - totals[starts]
            for pos in np.flatnonzero(beyond[offset:] & (counts >= rule.count)).tolist():
                end = pos + offset
                start = int(starts[pos])
                i = first_index + pos
                involved = tuple(i - (end - j) for j in range(start, end + 1) if beyond[j])
                hits.append(RuleHit(i, rule.id, side, involved))
        return hits

    # ------------------------------------------------------------ state

    def to_state(self) -> State:
        """Rules, parameters and every partial pattern as plain data."""
        state = header("rule_set", _SCHEMA)
        state.update(
            rules=[r.to_state() for r in self.rules],
            limit_sigma=self.limit_sigma,
            recent=list(self._recent),
            last_z=self._last_z,
            pos_run=self._pos_run,
            neg_run=self._neg_run,
            inc_run=self._inc_run,
            dec_run=self._dec_run,
            alt_run=self._alt_run,
            last_sign=self._last_sign,
            inside_run=self._inside_run,
            outside_run=self._outside_run,
            last_pos_out=self._last_pos_out,
            last_neg_out=self._last_neg_out,
        )
        return state

    @classmethod
    def from_state(cls, state: State) -> Self:
        """Rebuild from :meth:`to_state`."""
        check_header(state, "rule_set", _SCHEMA)
        rules = [Rule.from_state(s) for s in get_state_list(state, "rules")]
        rule_set = cls(rules, limit_sigma=get_float(state, "limit_sigma"))
        rule_set._recent = get_float_list(state, "recent")
        rule_set._last_z = get_optional_float(state, "last_z")
        rule_set._pos_run = get_int(state, "pos_run")
        rule_set._neg_run = get_int(state, "neg_run")
        rule_set._inc_run = get_int(state, "inc_run")
        rule_set._dec_run = get_int(state, "dec_run")
        rule_set._alt_run = get_int(state, "alt_run")
        rule_set._last_sign = get_int(state, "last_sign")
        rule_set._inside_run = get_int(state, "inside_run")
        rule_set._outside_run = get_int(state, "outside_run")
        rule_set._last_pos_out = get_int(state, "last_pos_out")
        rule_set._last_neg_out = get_int(state, "last_neg_out")
        return rule_set
