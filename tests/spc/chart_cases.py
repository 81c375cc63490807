"""Shared generators, runners and exact comparison keys for the chart property tests.

Data are built in sigma units around a target: each subgroup reading is
``mean + sigma * (shift + noise + jitter)``, where ``shift`` comes from stretches of a shift
profile (so signals really occur), ``noise`` is drawn by hypothesis and ``jitter`` is a small
fixed pattern that keeps subgroups from being constant when hypothesis shrinks the noise to 0.
"""

from __future__ import annotations

import itertools
import json
import math
from collections.abc import Sequence
from dataclasses import dataclass, field

from hypothesis import strategies as st

from monitor.spc import (
    BaselinePlan,
    ChartKind,
    ChartSet,
    ChartSpec,
    CusumChart,
    CusumSettings,
    EwmaChart,
    EwmaSettings,
    IndividualsChart,
    MonitorError,
    PChart,
    Point,
    ProcessParameters,
    Signal,
    State,
    Subgroup,
    SubgroupBatch,
    UChart,
    XbarRChart,
    XbarSChart,
    rule_preset,
)
from monitor.spc.charts import Chart

SHIFTS = (0.0, 0.0, 0.0, 1.0, -1.0, 2.0, -2.5, 3.5, -5.0)
"""Process shifts in sigma units of single readings; in control most of the time."""

_JITTER = (0.0, 0.13, -0.21, 0.34, -0.08, 0.27, -0.3)

CHART_KINDS = (
    "xbar_r",
    "xbar_s",
    "individuals_span_2",
    "individuals_span_3",
    "ewma",
    "ewma_fast_initial_response",
    "cusum",
    "cusum_head_start",
    "p",
    "u",
)
"""Every chart configuration the batch and snapshot properties cover."""

VARIABLE_KINDS = CHART_KINDS[:8]


def jitter(i: int, j: int) -> float:
    """A fixed small pattern (sigma units) for reading ``j`` of subgroup ``i``."""
    return 0.5 * _JITTER[(3 * i + 5 * j) % len(_JITTER)]


# ---------------------------------------------------------------- exact keys


def exact(value: float | None) -> str | None:
    """A float as its exact hex form (tells -0.0 and NaN apart); None stays None."""
    if value is None:
        return None
    return float(value).hex()


def point_key(point: Point) -> tuple[object, ...]:
    """Everything a point holds, floats bit for bit."""
    return (
        point.statistic.value,
        point.subgroup,
        point.n,
        exact(point.value),
        exact(point.center),
        exact(point.lower),
        exact(point.upper),
    )


def signal_key(signal: Signal) -> tuple[object, ...]:
    """Everything a signal holds, floats bit for bit."""
    return (
        signal.chart.value,
        signal.statistic.value,
        signal.rule.value,
        signal.side.value,
        signal.subgroup,
        signal.subgroups,
        exact(signal.value),
        exact(signal.center),
        exact(signal.lower),
        exact(signal.upper),
        exact(signal.z),
    )


def state_text(state: State) -> str:
    """A snapshot as canonical strict JSON; floats are written exactly (shortest repr)."""
    return json.dumps(state, sort_keys=True, allow_nan=False)


def through_json(state: State) -> State:
    """A snapshot after a trip through strict JSON text, as a store would keep it."""
    loaded: State = json.loads(json.dumps(state, allow_nan=False))
    return loaded


# ---------------------------------------------------------------- chart configurations


@dataclass(frozen=True)
class ChartConfig:
    """One chart kind with its parameters; ``build`` makes a fresh chart."""

    kind: str
    params: dict[str, object] = field(default_factory=dict)

    def build(self) -> Chart:
        """A new chart of this configuration."""
        p = dict(self.params)
        rules = rule_preset(str(p.pop("rules"))) if "rules" in p else None
        kind = self.kind
        if kind in {"xbar_r", "xbar_s"}:
            cls = XbarRChart if kind == "xbar_r" else XbarSChart
            return cls(rules=rules, **p)  # type: ignore[arg-type]
        if kind.startswith("individuals"):
            return IndividualsChart(rules=rules, **p)  # type: ignore[arg-type]
        if kind.startswith("ewma"):
            return EwmaChart(**p)  # type: ignore[arg-type]
        if kind.startswith("cusum"):
            return CusumChart(**p)  # type: ignore[arg-type]
        if kind == "p":
            return PChart(rules=rules, **p)  # type: ignore[arg-type]
        return UChart(rules=rules, **p)  # type: ignore[arg-type]


@st.composite
def shift_profile(draw: st.DrawFn, max_subgroups: int) -> list[float]:
    """Shifts per subgroup, in stretches of 1 to 12 subgroups."""
    stretches = draw(st.lists(st.tuples(st.integers(1, 12), st.sampled_from(SHIFTS)), min_size=1, max_size=8))
    shifts = [shift for length, shift in stretches for _ in range(length)]
    return shifts[:max_subgroups]


@st.composite
def variable_subgroups(
    draw: st.DrawFn,
    *,
    mean: float,
    sigma: float,
    sizes: st.SearchStrategy[int],
    max_subgroups: int = 40,
) -> tuple[Subgroup, ...]:
    """Measured subgroups around ``mean`` with shifted stretches; sizes fixed or varying."""
    shifts = draw(shift_profile(max_subgroups))
    fixed = draw(st.booleans())
    size = draw(sizes)
    out = []
    for i, shift in enumerate(shifts):
        n = size if fixed else draw(sizes)
        noise = draw(st.lists(st.floats(-3.0, 3.0), min_size=n, max_size=n))
        out.append(Subgroup(tuple(mean + sigma * (shift + e + jitter(i, j)) for j, e in enumerate(noise))))
    return tuple(out)


@st.composite
def count_subgroups(
    draw: st.DrawFn,
    *,
    kind: str,
    center: float,
    max_subgroups: int = 40,
    exposures: bool | None = None,
) -> tuple[Subgroup, ...]:
    """Reject (p) or defect (u) counts with exposures; the level follows a shift profile.

    ``exposures`` None lets each subgroup choose between given exposures and one unit per
    reading; True or False forces one of them for the whole sequence.
    """
    shifts = draw(shift_profile(max_subgroups))
    out = []
    for shift in shifts:
        n = draw(st.integers(1, 3))
        given = draw(st.booleans()) if exposures is None else exposures
        if kind == "p":
            level = min(1.0, max(0.0, center * (1.0 + shift / 2.0)))
            if given:
                units = [float(draw(st.integers(1, 40))) for _ in range(n)]
                counts = [float(min(e, max(0, round(e * level) + draw(st.integers(-2, 2))))) for e in units]
                out.append(Subgroup(tuple(counts), exposures=tuple(units)))
            else:
                counts = [float(draw(st.integers(0, 99)) < 100 * level) for _ in range(n)]
                out.append(Subgroup(tuple(counts)))
        else:
            level = max(0.0, center * (1.0 + shift / 2.0))
            if given:
                units = [draw(st.floats(0.5, 20.0)) for _ in range(n)]
                counts = [float(max(0, round(e * level) + draw(st.integers(-3, 3)))) for e in units]
                out.append(Subgroup(tuple(counts), exposures=tuple(units)))
            else:
                counts = [float(max(0, round(level) + draw(st.integers(-2, 2)))) for _ in range(n)]
                out.append(Subgroup(tuple(counts)))
    return tuple(out)


@st.composite
def z_sequence(draw: st.DrawFn, max_points: int = 40) -> list[float]:
    """Standardized points in stretches that make every Nelson pattern likely.

    Stretches are a level (around 0, 0.5, 1.5, 2.5 or 3.5 sigma on either side), a steady
    trend, an alternation, or free noise; small hypothesis noise rides on the patterns.
    """
    stretches = draw(
        st.lists(
            st.tuples(
                st.sampled_from(["level", "trend", "alternate", "noise"]),
                st.integers(1, 16) | st.just(15),  # 15 in a row is the longest Nelson pattern
                st.sampled_from([0.0, 0.5, -0.5, 1.5, -1.5, 2.5, -2.5, 3.5, -3.5]),
            ),
            min_size=1,
            max_size=6,
        )
    )
    z: list[float] = []
    for pattern, length, level in stretches:
        for i in range(length):
            wiggle = draw(st.floats(-0.4, 0.4))
            if pattern == "level":
                z.append(level + wiggle)
            elif pattern == "trend":
                z.append(level + (0.3 if level >= 0 else -0.3) * i + 0.05 * wiggle)
            elif pattern == "alternate":
                z.append(level + (1.2 if i % 2 else -1.2) + 0.1 * wiggle)
            else:
                z.append(draw(st.floats(-4.5, 4.5)))
    return z[:max_points]


_PRESETS = st.sampled_from(["nelson", "western-electric", "none"])
_LIMIT_SIGMA = st.sampled_from([3.0, 2.5, 3.09])


@st.composite
def chart_case(
    draw: st.DrawFn, kind: str, max_subgroups: int = 40
) -> tuple[ChartConfig, tuple[Subgroup, ...]]:
    """A chart configuration of ``kind`` and a sequence of subgroups it accepts."""
    mean = draw(st.floats(-1000.0, 1000.0))
    sigma = draw(st.floats(0.001, 1000.0))
    if kind in {"xbar_r", "xbar_s"}:
        params: dict[str, object] = {
            "mean": mean,
            "sigma": sigma,
            "rules": draw(_PRESETS),
            "limit_sigma": draw(_LIMIT_SIGMA),
        }
        sizes = st.integers(2, 6)
    elif kind.startswith("individuals"):
        params = {
            "mean": mean,
            "sigma": sigma,
            "rules": draw(_PRESETS),
            "limit_sigma": draw(_LIMIT_SIGMA),
            "moving_range_span": int(kind.rsplit("_", 1)[1]),
        }
        sizes = st.just(1)
    elif kind.startswith("ewma"):
        params = {
            "mean": mean,
            "sigma": sigma,
            "smoothing": draw(st.sampled_from([0.05, 0.1, 0.2, 0.4, 1.0])),
            "width": draw(st.sampled_from([2.7, 3.0])),
            "fast_initial_response": kind == "ewma_fast_initial_response",
        }
        if kind == "ewma_fast_initial_response":
            params["response_fraction"] = draw(st.sampled_from([0.5, 0.25]))
            params["response_decay"] = draw(st.sampled_from([0.3, 0.05]))
        sizes = st.integers(1, 5)
    elif kind.startswith("cusum"):
        h = draw(st.sampled_from([4.0, 5.0]))
        params = {
            "mean": mean,
            "sigma": sigma,
            "k": draw(st.sampled_from([0.25, 0.5, 1.0])),
            "h": h,
            "head_start": h / 2 if kind == "cusum_head_start" else 0.0,
        }
        sizes = st.integers(1, 5)
    else:
        center = draw(st.floats(0.02, 0.6) if kind == "p" else st.floats(0.2, 6.0))
        params = {
            ("proportion" if kind == "p" else "rate"): center,
            "rules": draw(_PRESETS),
            "limit_sigma": draw(_LIMIT_SIGMA),
        }
        subgroups = draw(count_subgroups(kind=kind, center=center, max_subgroups=max_subgroups))
        return ChartConfig(kind, params), subgroups
    subgroups = draw(variable_subgroups(mean=mean, sigma=sigma, sizes=sizes, max_subgroups=max_subgroups))
    return ChartConfig(kind, params), subgroups


@st.composite
def chart_set_case(
    draw: st.DrawFn, limits: str, max_subgroups: int = 40
) -> tuple[ChartSpec, tuple[Subgroup, ...]]:
    """A chart set spec (several kinds together, or p/u alone) and subgroups it accepts.

    ``limits`` is ``"standard"`` (given values) or ``"baseline"`` (a Phase I plan).
    """
    family = draw(st.sampled_from(["means", "means", "singles", "singles", "p", "u"]))
    mean = draw(st.floats(-100.0, 100.0))
    sigma = draw(st.floats(0.01, 100.0))
    if family == "means":
        pool = [ChartKind.XBAR_R, ChartKind.XBAR_S, ChartKind.EWMA, ChartKind.CUSUM]
    elif family == "singles":
        pool = [ChartKind.INDIVIDUALS, ChartKind.EWMA, ChartKind.CUSUM]
    else:
        pool = [ChartKind.P if family == "p" else ChartKind.U]
    order = draw(st.permutations(pool))
    kinds = tuple(order[: draw(st.integers(min(2, len(pool)), len(pool)))])
    if family in {"p", "u"}:
        center = draw(st.floats(0.05, 0.5) if family == "p" else st.floats(0.5, 5.0))
        standard = ProcessParameters(center, None)
        subgroups = draw(
            count_subgroups(
                kind=family,
                center=center,
                max_subgroups=max_subgroups,
                exposures=draw(st.booleans()),
            )
        )
    else:
        standard = ProcessParameters(mean, sigma)
        sizes = st.integers(2, 5) if family == "means" else st.just(1)
        subgroups = draw(variable_subgroups(mean=mean, sigma=sigma, sizes=sizes, max_subgroups=max_subgroups))
    common: dict[str, object] = {
        "kinds": kinds,
        "rules": rule_preset(draw(_PRESETS)),
        "limit_sigma": draw(_LIMIT_SIGMA),
        "ewma": EwmaSettings(
            smoothing=draw(st.sampled_from([0.1, 0.2, 0.5])),
            fast_initial_response=draw(st.booleans()),
        ),
        "cusum": CusumSettings(k=0.5, h=draw(st.sampled_from([4.0, 5.0])), head_start=0.0),
        "moving_range_span": draw(st.integers(2, 3)),
    }
    if limits == "standard":
        spec = ChartSpec(standard=standard, **common)  # type: ignore[arg-type]
    else:
        plan = BaselinePlan(subgroups=draw(st.integers(2, 12)), exclude_out_of_control=draw(st.booleans()))
        spec = ChartSpec(baseline=plan, **common)  # type: ignore[arg-type]
    return spec, subgroups


@st.composite
def chunk_plan(draw: st.DrawFn, m: int, *, mixed: bool) -> list[tuple[int, int, bool]]:
    """Random chunks ``(begin, stop, batched)`` covering ``range(m)``; empty chunks allowed.

    With ``mixed`` False every chunk goes through ``update_many``; otherwise each chunk
    chooses between ``update_many`` and ``update`` in a loop.
    """
    cuts = sorted(draw(st.lists(st.integers(0, m), max_size=6)))
    bounds = [0, *cuts, m]
    return [
        (begin, stop, draw(st.booleans()) if mixed else True) for begin, stop in itertools.pairwise(bounds)
    ]


# ---------------------------------------------------------------- runners


Target = Chart | ChartSet


def _last_points_key(target: Target) -> tuple[object, ...]:
    if isinstance(target, ChartSet):
        return tuple(
            (kind.value, tuple(point_key(p) for p in points)) for kind, points in target.last_points.items()
        )
    return tuple(point_key(p) for p in target.last_points)


def _trace_rows(traces: dict) -> dict[int, tuple[object, ...]]:  # type: ignore[type-arg]
    rows: dict[int, list[object]] = {}
    for trace in traces.values():
        for point in trace.points():
            rows.setdefault(point.subgroup, []).append(point_key(point))
    return {i: tuple(v) for i, v in rows.items()}


def _batch_rows(target: Target, result: object) -> dict[int, tuple[object, ...]]:
    traces = result.traces  # type: ignore[attr-defined]
    if not isinstance(target, ChartSet):
        return _trace_rows(traces)
    per_kind = {kind.value: _trace_rows(t) for kind, t in traces.items()}
    indices = sorted({i for rows in per_kind.values() for i in rows})
    return {i: tuple((kind, rows[i]) for kind, rows in per_kind.items() if i in rows) for i in indices}


def _charting(target: Target) -> bool:
    return not isinstance(target, ChartSet) or target.monitoring


@dataclass
class Run:
    """What a run produced: signals, points per subgroup, last points, final state or error."""

    signals: list[tuple[object, ...]] = field(default_factory=list)
    points: dict[int, tuple[object, ...]] = field(default_factory=dict)
    last_points: dict[int, tuple[object, ...]] = field(default_factory=dict)
    state: str | None = None
    error: tuple[str, str] | None = None
    raw_signals: list[Signal] = field(default_factory=list)


def run_streaming(target: Target, subgroups: Sequence[Subgroup], first: int = 0) -> Run:
    """``update`` on each subgroup in turn, recording the points after each one."""
    run = Run()
    try:
        for i, subgroup in enumerate(subgroups, start=first):
            charting = _charting(target)
            signals = target.update(subgroup)
            run.raw_signals.extend(signals)
            run.signals.extend(signal_key(s) for s in signals)
            if charting:
                run.points[i] = _last_points_key(target)
                run.last_points[i] = run.points[i]
    except MonitorError as exc:
        run.error = (type(exc).__name__, str(exc))
        return run
    run.state = state_text(target.to_state())
    return run


def run_chunked(target: Target, subgroups: Sequence[Subgroup], plan: Sequence[tuple[int, int, bool]]) -> Run:
    """Feed the chunks of ``plan``: ``update_many`` on batched chunks, ``update`` on the others."""
    run = Run()
    try:
        for begin, stop, batched in plan:
            part = subgroups[begin:stop]
            if batched:
                result = target.update_many(SubgroupBatch.from_subgroups(part))
                run.raw_signals.extend(result.signals)
                run.signals.extend(signal_key(s) for s in result.signals)
                run.points.update(_batch_rows(target, result))
            else:
                for i, subgroup in enumerate(part, start=begin):
                    charting = _charting(target)
                    signals = target.update(subgroup)
                    run.raw_signals.extend(signals)
                    run.signals.extend(signal_key(s) for s in signals)
                    if charting:
                        run.points[i] = _last_points_key(target)
            if stop > begin and (stop - 1) in run.points:
                run.last_points[stop - 1] = _last_points_key(target)
    except MonitorError as exc:
        run.error = (type(exc).__name__, str(exc))
        return run
    run.state = state_text(target.to_state())
    return run


def _first_difference(left: Sequence[object], right: Sequence[object]) -> str:
    for i, (a, b) in enumerate(zip(left, right, strict=False)):
        if a != b:
            return f"first difference at item {i}:\n  streamed: {a}\n  chunked:  {b}"
    return f"lengths differ: streamed {len(left)}, chunked {len(right)}"


def assert_same_run(streamed: Run, chunked: Run) -> None:
    """Signals, points, last points after every chunk and final state agree bit for bit."""
    if streamed.error or chunked.error:
        assert chunked.error == streamed.error, f"errors: {streamed.error} vs {chunked.error}"
        return
    assert chunked.signals == streamed.signals, "signals: " + _first_difference(
        streamed.signals, chunked.signals
    )
    for index in sorted(set(streamed.points) | set(chunked.points)):
        assert chunked.points.get(index) == streamed.points.get(index), (
            f"points of subgroup {index}:\n  streamed: {streamed.points.get(index)}"
            f"\n  chunked:  {chunked.points.get(index)}"
        )
    for index, key in chunked.last_points.items():
        assert key == streamed.last_points[index], f"last points after subgroup {index}"
    assert chunked.state == streamed.state, "final state: " + _first_difference(
        [streamed.state], [chunked.state]
    )


def finite(value: float | None) -> bool:
    """Whether a value is a finite float (None and NaN are not)."""
    return value is not None and math.isfinite(value)
