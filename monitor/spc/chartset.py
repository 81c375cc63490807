"""A chart set: every chart kind configured for one characteristic, fed the same subgroups.

The set owns the in-control parameters: standard values given up front, or a Phase I
estimate from the first subgroups it sees (the baseline; those subgroups are not charted).
Once the parameters are known it builds one chart object per kind and feeds them each
subgroup. Like the charts, it has a streaming ``update``, a vectorised ``update_many`` that
gives identical results, and a plain-data snapshot.

Examples:
    >>> kinds = (ChartKind.XBAR_R, ChartKind.CUSUM)
    >>> spec = ChartSpec(kinds=kinds, baseline=BaselinePlan(subgroups=3))
    >>> charts = ChartSet(spec)
    >>> for values in ([10.1, 9.9, 10.0], [10.2, 9.8, 10.1], [9.9, 10.0, 10.3]):
    ...     charts.update(Subgroup(tuple(values)))
    []
    []
    []
    >>> charts.monitoring, round(charts.parameters.mean, 3)
    (True, 10.033)
    >>> [s.rule.value for s in charts.update(Subgroup((11.0, 11.2, 10.9)))]
    ['beyond_limits', 'beyond_limits']
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Self

from monitor.spc._state import (
    check_header,
    get_float_list,
    get_int,
    get_optional_float,
    get_optional_state,
    get_state,
    get_state_list,
    get_str,
    header,
)
from monitor.spc.charts import (
    BatchResult,
    Chart,
    CusumChart,
    EwmaChart,
    IndividualsChart,
    PChart,
    Point,
    Trace,
    UChart,
    XbarRChart,
    XbarSChart,
)
from monitor.spc.errors import ConfigError, StateError
from monitor.spc.exact_scale import ExactScale
from monitor.spc.limits import (
    AttributeKind,
    PhaseOneEstimate,
    ProcessParameters,
    SigmaEstimator,
    phase_one,
    phase_one_attribute,
)
from monitor.spc.rules import Rule, western_electric
from monitor.spc.signals import Signal
from monitor.spc.subgroups import Subgroup, SubgroupBatch
from monitor.spc.types import ChartKind, State, Statistic

__all__ = ["BaselinePlan", "ChartSet", "ChartSpec", "CusumSettings", "EwmaSettings", "SetResult"]

_ATTRIBUTES = frozenset({ChartKind.P, ChartKind.U})
_CLASSES: dict[ChartKind, type[Chart]] = {
    ChartKind.XBAR_R: XbarRChart,
    ChartKind.XBAR_S: XbarSChart,
    ChartKind.INDIVIDUALS: IndividualsChart,
    ChartKind.EWMA: EwmaChart,
    ChartKind.CUSUM: CusumChart,
    ChartKind.P: PChart,
    ChartKind.U: UChart,
}


@dataclass(frozen=True, slots=True)
class EwmaSettings:
    """EWMA parameters (see :class:`~monitor.spc.charts.EwmaChart`)."""

    smoothing: float = 0.2
    width: float = 3.0
    fast_initial_response: bool = False


@dataclass(frozen=True, slots=True)
class CusumSettings:
    """CUSUM parameters (see :class:`~monitor.spc.charts.CusumChart`)."""

    k: float = 0.5
    h: float = 5.0
    head_start: float = 0.0


@dataclass(frozen=True, slots=True)
class BaselinePlan:
    """Estimate the in-control parameters from the first ``subgroups`` subgroups.

    ``estimator`` None picks the usual one for the chart kinds: sd for X-bar/S, moving range
    for single readings, range otherwise.
    """

    subgroups: int = 25
    estimator: SigmaEstimator | None = None
    exclude_out_of_control: bool = True
    max_rounds: int = 10
    max_excluded_share: float = 0.25

    def __post_init__(self) -> None:
        if isinstance(self.subgroups, bool) or not isinstance(self.subgroups, int) or self.subgroups < 2:
            raise ConfigError(f"a baseline needs at least 2 subgroups, got {self.subgroups!r}")


@dataclass(frozen=True, slots=True)
class ChartSpec:
    """What to chart for one characteristic: the kinds, the rules and where the limits come from.

    Exactly one of ``standard`` (given parameters) and ``baseline`` (a Phase I plan) is set.
    """

    kinds: tuple[ChartKind, ...]
    rules: tuple[Rule, ...] = field(default_factory=western_electric)
    limit_sigma: float = 3.0
    standard: ProcessParameters | None = None
    baseline: BaselinePlan | None = None
    ewma: EwmaSettings = field(default_factory=EwmaSettings)
    cusum: CusumSettings = field(default_factory=CusumSettings)
    moving_range_span: int = 2
    exact_scale: ExactScale | None = None

    def __post_init__(self) -> None:
        if not self.kinds:
            raise ConfigError("a chart needs at least one kind")
        if len(set(self.kinds)) != len(self.kinds):
            raise ConfigError("a chart kind is listed twice")
        attributes = [k for k in self.kinds if k in _ATTRIBUTES]
        if attributes and len(self.kinds) > 1:
            raise ConfigError("p and u charts stand alone: list one of them and no other kind")
        if (self.standard is None) == (self.baseline is None):
            raise ConfigError(
                "give either standard values or a baseline plan for the limits, not both or neither"
            )
        if self.standard is not None and not attributes and self.standard.sigma is None:
            raise ConfigError("standard values for variables charts need a sigma")

    @property
    def attribute(self) -> AttributeKind | None:
        """The attribute kind if this is a p or u chart."""
        if self.kinds[0] is ChartKind.P:
            return AttributeKind.P
        if self.kinds[0] is ChartKind.U:
            return AttributeKind.U
        return None

    def estimator_for(self, batch: SubgroupBatch) -> SigmaEstimator:
        """The sigma estimator this spec uses on a baseline."""
        plan = self.baseline
        if plan is not None and plan.estimator is not None:
            return plan.estimator
        if ChartKind.XBAR_S in self.kinds:
            return SigmaEstimator.SD
        if ChartKind.INDIVIDUALS in self.kinds or int(batch.sizes.max(initial=1)) == 1:
            return SigmaEstimator.MOVING_RANGE
        return SigmaEstimator.RANGE

    def to_state(self) -> State:
        """Everything this spec fixes, as plain data (stored with each chart-set snapshot)."""
        baseline: State | None = None
        if self.baseline is not None:
            b = self.baseline
            baseline = {
                "subgroups": b.subgroups,
                "estimator": None if b.estimator is None else b.estimator.value,
                "exclude_out_of_control": b.exclude_out_of_control,
                "max_rounds": b.max_rounds,
                "max_excluded_share": b.max_excluded_share,
            }
        state: State = {
            "kinds": [k.value for k in self.kinds],
            "rules": [r.to_state() for r in self.rules],
            "limit_sigma": self.limit_sigma,
            "standard": None if self.standard is None else self.standard.to_state(),
            "baseline": baseline,
            "ewma": {
                "smoothing": self.ewma.smoothing,
                "width": self.ewma.width,
                "fast_initial_response": self.ewma.fast_initial_response,
            },
            "cusum": {"k": self.cusum.k, "h": self.cusum.h, "head_start": self.cusum.head_start},
            "moving_range_span": self.moving_range_span,
        }
        if self.exact_scale is not None:  # only when set: older snapshots stay comparable
            state["probability_limits"] = self.exact_scale.to_state()
        return state

    @staticmethod
    def limit_settings(spec_state: State) -> State:
        """The part of a spec's :meth:`to_state` that decides the in-control parameters.

        Two specs with equal limit settings get the same parameters from the same data, so
        parameters can be carried across a change of the other settings (rules, kinds).
        """
        kinds = spec_state.get("kinds")
        kinds_list = kinds if isinstance(kinds, list) else []
        attribute = next((k for k in kinds_list if k in (ChartKind.P.value, ChartKind.U.value)), None)
        return {
            "standard": spec_state.get("standard"),
            "baseline": spec_state.get("baseline"),
            "attribute": attribute,
        }

    def build(self, parameters: ProcessParameters, first_index: int) -> tuple[Chart, ...]:
        """One chart object per kind, judged against ``parameters``."""
        return tuple(self._build_one(kind, parameters, first_index) for kind in self.kinds)

    def _build_one(self, kind: ChartKind, parameters: ProcessParameters, first_index: int) -> Chart:
        rules, limit_sigma = self.rules, self.limit_sigma
        if kind is ChartKind.P:
            return PChart(
                proportion=parameters.mean, rules=rules, limit_sigma=limit_sigma, first_index=first_index
            )
        if kind is ChartKind.U:
            return UChart(rate=parameters.mean, rules=rules, limit_sigma=limit_sigma, first_index=first_index)
        mean, sigma = parameters.mean, parameters.require_sigma()
        if kind is ChartKind.EWMA:
            e = self.ewma
            return EwmaChart(
                mean=mean,
                sigma=sigma,
                smoothing=e.smoothing,
                width=e.width,
                fast_initial_response=e.fast_initial_response,
                first_index=first_index,
            )
        if kind is ChartKind.CUSUM:
            c = self.cusum
            return CusumChart(
                mean=mean, sigma=sigma, k=c.k, h=c.h, head_start=c.head_start, first_index=first_index
            )
        if kind is ChartKind.INDIVIDUALS:
            return IndividualsChart(
                mean=mean,
                sigma=sigma,
                rules=rules,
                limit_sigma=limit_sigma,
                moving_range_span=self.moving_range_span,
                first_index=first_index,
                scale=self.exact_scale,
            )
        shewhart = XbarRChart if kind is ChartKind.XBAR_R else XbarSChart
        return shewhart(
            mean=mean,
            sigma=sigma,
            rules=rules,
            limit_sigma=limit_sigma,
            first_index=first_index,
            scale=self.exact_scale,
        )


@dataclass(frozen=True, eq=False)
class SetResult:
    """What a batch update of a chart set produced."""

    signals: list[Signal] = field(default_factory=list)
    traces: dict[ChartKind, dict[Statistic, Trace]] = field(default_factory=dict)
    established: PhaseOneEstimate | None = None
    """The Phase I estimate, if this batch completed the baseline."""


_SCHEMA = 1


class ChartSet:
    """The charts of one characteristic over the same subgroups.

    Args:
        spec: what to chart.
        first_index: index of the first subgroup this set sees.
    """

    def __init__(self, spec: ChartSpec, *, first_index: int = 0) -> None:
        self.spec = spec
        self._next = first_index
        self._baseline: list[Subgroup] = []
        self.estimate: PhaseOneEstimate | None = None
        self.parameters: ProcessParameters | None = spec.standard
        self.charts: tuple[Chart, ...] = ()
        if spec.standard is not None:
            self.charts = spec.build(spec.standard, first_index)

    def __repr__(self) -> str:
        """Kinds, phase and next index."""
        kinds = [k.value for k in self.spec.kinds]
        phase = "monitoring" if self.monitoring else f"baseline {len(self._baseline)}/{self._needed}"
        return f"ChartSet({kinds}, {phase}, next_index={self._next})"

    @property
    def _needed(self) -> int:
        return 0 if self.spec.baseline is None else self.spec.baseline.subgroups

    @property
    def monitoring(self) -> bool:
        """Whether the limits are set (False while the baseline is being collected)."""
        return bool(self.charts)

    @property
    def baseline_collected(self) -> int:
        """Baseline subgroups collected so far."""
        return len(self._baseline)

    @property
    def baseline_subgroups(self) -> tuple[Subgroup, ...]:
        """The baseline subgroups collected so far (empty once the limits are set)."""
        return tuple(self._baseline)

    @property
    def next_index(self) -> int:
        """Index the next subgroup will get."""
        return self._next

    @property
    def last_points(self) -> dict[ChartKind, tuple[Point, ...]]:
        """Latest points of every chart."""
        return {chart.kind: chart.last_points for chart in self.charts}

    def _establish(self) -> PhaseOneEstimate:
        plan = self.spec.baseline
        if plan is None:  # pragma: no cover - guarded by the callers
            raise ConfigError("no baseline plan")
        batch = SubgroupBatch.from_subgroups(self._baseline)
        first = self._next - len(self._baseline)
        attribute = self.spec.attribute
        if attribute is not None:
            estimate = phase_one_attribute(
                batch,
                kind=attribute,
                limit_sigma=self.spec.limit_sigma,
                exclude_out_of_control=plan.exclude_out_of_control,
                max_rounds=plan.max_rounds,
                max_excluded_share=plan.max_excluded_share,
                first_index=first,
            )
        else:
            estimate = phase_one(
                batch,
                estimator=self.spec.estimator_for(batch),
                limit_sigma=self.spec.limit_sigma,
                exclude_out_of_control=plan.exclude_out_of_control,
                max_rounds=plan.max_rounds,
                max_excluded_share=plan.max_excluded_share,
                first_index=first,
            )
        self.estimate = estimate
        self.parameters = estimate.parameters
        self.charts = self.spec.build(estimate.parameters, self._next)
        self._baseline = []
        return estimate

    def adopt(self, parameters: ProcessParameters, estimate: PhaseOneEstimate | None = None) -> None:
        """Judge the subgroups from the next one on against new in-control parameters.

        For limits set outside the stream (a baseline made from history, limits kept over a
        change of other settings). The charts start afresh at the next index: rule windows,
        EWMA and CUSUM statistics begin again; subgroups collected for a baseline are dropped.

        Examples:
            >>> spec = ChartSpec(kinds=(ChartKind.XBAR_R,), baseline=BaselinePlan(subgroups=20))
            >>> charts = ChartSet(spec)
            >>> charts.adopt(ProcessParameters(10.0, 0.2, source="baseline"))
            >>> charts.monitoring, [s.rule.value for s in charts.update(Subgroup((11.0, 11.1, 10.9)))]
            (True, ['beyond_limits'])
        """
        charts = self.spec.build(parameters, self._next)  # raises ConfigError for unusable values
        self.charts = charts
        self.parameters = parameters
        self.estimate = estimate
        self._baseline = []

    def update(self, subgroup: Subgroup) -> list[Signal]:
        """Add one subgroup; return the signals of all charts (none during the baseline)."""
        if not self.charts:
            self._baseline.append(subgroup)
            self._next += 1
            if len(self._baseline) >= self._needed:
                self._establish()
            return []
        signals: list[Signal] = []
        for chart in self.charts:
            signals.extend(chart.update(subgroup))
        self._next += 1
        return signals

    def update_many(self, batch: SubgroupBatch) -> SetResult:
        """Add many subgroups (vectorised); identical to ``update`` on each in turn."""
        start = 0
        established = None
        if not self.charts:
            take = min(len(batch), self._needed - len(self._baseline))
            self._baseline.extend(batch.subgroup(i) for i in range(take))
            self._next += take
            start = take
            if len(self._baseline) >= self._needed:
                established = self._establish()
        rest = batch if start == 0 else batch.slice(start, len(batch))
        if not self.charts or len(rest) == 0:
            return SetResult(established=established)
        results: list[tuple[ChartKind, BatchResult]] = [(c.kind, c.update_many(rest)) for c in self.charts]
        self._next += len(rest)
        signals = [s for _, r in results for s in r.signals]
        signals.sort(key=lambda s: s.subgroup)  # stable: keeps kind order, then each chart's own
        return SetResult(
            signals=signals, traces={kind: r.traces for kind, r in results}, established=established
        )

    def to_state(self) -> State:
        """Everything needed to continue exactly where this set is, as plain data."""
        state = header("chart_set", _SCHEMA)
        state.update(
            spec=self.spec.to_state(),
            next_index=self._next,
            baseline=[_subgroup_state(s) for s in self._baseline],
            estimate=None if self.estimate is None else self.estimate.to_state(),
            parameters=None if self.parameters is None else self.parameters.to_state(),
            charts=[c.to_state() for c in self.charts],
        )
        return state

    @classmethod
    def from_state(cls, spec: ChartSpec, state: State) -> Self:
        """Rebuild a set of this spec from :meth:`to_state`."""
        check_header(state, "chart_set", _SCHEMA)
        stored_spec = get_state(state, "spec")
        wanted = spec.to_state()
        if stored_spec != wanted:
            changed = sorted(
                k for k in wanted.keys() | stored_spec.keys() if wanted.get(k) != stored_spec.get(k)
            )
            details = "; ".join(
                f"{k}: snapshot {_short(stored_spec.get(k))}, configuration {_short(wanted.get(k))}"
                for k in changed
            )
            raise StateError(
                f"snapshot was taken with other chart settings ({details}); "
                "start the chart afresh or restore the old configuration"
            )
        chart_set = cls(spec)
        chart_set._next = get_int(state, "next_index")
        chart_set._baseline = [_subgroup_from(s) for s in get_state_list(state, "baseline")]
        estimate = get_optional_state(state, "estimate")
        chart_set.estimate = None if estimate is None else PhaseOneEstimate.from_state(estimate)
        parameters = get_optional_state(state, "parameters")
        chart_set.parameters = None if parameters is None else ProcessParameters.from_state(parameters)
        stored = get_state_list(state, "charts")
        kinds = [get_str(s, "kind") for s in stored]
        if stored and kinds != [k.value for k in spec.kinds]:
            raise StateError(
                f"snapshot holds charts {kinds} but the configuration asks for "
                f"{[k.value for k in spec.kinds]}; start the chart afresh or restore "
                "the old configuration"
            )
        chart_set.charts = tuple(_CLASSES[k].from_state(s) for k, s in zip(spec.kinds, stored, strict=False))
        return chart_set


def _short(value: object, limit: int = 120) -> str:
    text = repr(value)
    return text if len(text) <= limit else text[: limit - 3] + "..."


def _subgroup_state(subgroup: Subgroup) -> State:
    return {
        "values": list(subgroup.values),
        "start": subgroup.start,
        "end": subgroup.end,
        "exposures": None if subgroup.exposures is None else list(subgroup.exposures),
    }


def _subgroup_from(state: State) -> Subgroup:
    exposures = None if state.get("exposures") is None else tuple(get_float_list(state, "exposures"))
    return Subgroup(
        values=tuple(get_float_list(state, "values")),
        start=get_optional_float(state, "start"),
        end=get_optional_float(state, "end"),
        exposures=exposures,
    )
