"""New limits from good history: a Phase I baseline over a file of readings or the stored subgroups.

What ``monitor baseline`` does for one chart:

1. takes the subgroups: formed from a CSV or Parquet file exactly as the daemon forms them, or
   read back from the store (the readings of every stored subgroup, baseline ones included),
   optionally limited to a time span or to the first subgroups;
2. estimates the mean and sigma with the chart's sigma estimator (or the one asked for), with
   the chart's iterative exclusion of out-of-control subgroups, and reports each exclusion;
3. checks the readings of the kept subgroups for normality (Shapiro-Wilk up to 5000 readings,
   D'Agostino-Pearson above) and fits a parent model (:func:`monitor.spc.fit_parent`);
4. says which subgroup size keeps the true false-alarm rate of normal-theory limits for the
   mean near the nominal one under that parent (:func:`suggest_subgroup_size`);
5. optionally stores the result as a new limits version (the daemon puts it in force within
   ``storage.limits_poll`` seconds, no restart) and prints a YAML snippet for the chart.

The statistics here are pure functions of arrays; only :func:`stored_subgroups` and
:func:`save` touch the store.
"""

from __future__ import annotations

import math
import sys
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import IO, TYPE_CHECKING, Final

import numpy as np
from numpy.typing import NDArray
from scipy import stats

from monitor.config import ChartConfig
from monitor.spc import (
    ConfigError,
    MonitorError,
    NotEnoughData,
    PhaseOneEstimate,
    SigmaEstimator,
    SubgroupBatch,
    phase_one,
    phase_one_attribute,
)
from monitor.store import LimitsRow, Store, SubgroupRow

if TYPE_CHECKING:
    from monitor.spc.parents import Parent

__all__ = [
    "BaselineResult",
    "NormalityCheck",
    "ParentFit",
    "SizeRate",
    "SizeSuggestion",
    "estimate_baseline",
    "normality",
    "parse_moment",
    "print_result",
    "run_baseline",
    "save",
    "size_lines",
    "stored_subgroups",
    "suggest_subgroup_size",
    "yaml_snippet",
]

SOURCE = "baseline"
"""The ``source`` of limits versions written by ``monitor baseline``."""


@dataclass(frozen=True, slots=True)
class NormalityCheck:
    """How normal the baseline readings look."""

    test: str
    statistic: float
    p_value: float
    skewness: float
    excess_kurtosis: float
    readings: int

    @property
    def plausible(self) -> bool:
        """No evidence against normality at the 1 % level."""
        return self.p_value >= 0.01

    def to_json(self) -> dict[str, object]:
        """As plain data."""
        return {
            "test": self.test,
            "statistic": self.statistic,
            "p_value": self.p_value,
            "skewness": self.skewness,
            "excess_kurtosis": self.excess_kurtosis,
            "readings": self.readings,
            "normal_plausible": self.plausible,
        }


@dataclass(frozen=True, slots=True)
class ParentFit:
    """The parent model fitted to the baseline readings."""

    chosen: str
    best_family: str
    anderson_darling: float
    p_value: float
    fell_back: bool
    candidates: tuple[tuple[str, float], ...]
    """Each fitted family's description and AIC, best first."""
    method: str
    model: Parent | None = field(default=None, repr=False, compare=False)
    """The chosen parent itself (for the laws of chart statistics)."""
    how: str = ""
    """Why this parent (the daemon's rule for ``parent: auto``: normal within 2 AIC is kept)."""

    def to_json(self) -> dict[str, object]:
        """As plain data."""
        return {
            "chosen": self.chosen,
            "best_family": self.best_family,
            "anderson_darling": self.anderson_darling,
            "p_value": self.p_value,
            "fell_back_to_empirical": self.fell_back,
            "candidates": [{"parent": text, "aic": aic} for text, aic in self.candidates],
            "method": self.method,
            "how": self.how,
            "setting": None if self.model is None else _parent_setting(self.model),
        }


NOMINAL_LIMIT_SIGMA: Final = 3.0
CANDIDATE_SIZES: Final = (1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 12, 15, 20, 25)
"""Subgroup sizes :func:`suggest_subgroup_size` considers when every law of the mean is cheap."""
COSTLY_CANDIDATE_SIZES: Final = (1, 2, 3, 5, 8, 12, 25)
"""Fewer sizes for parents whose law of the mean is a numerical convolution (seconds per size)."""
RATE_TOLERANCE: Final = 0.25
"""How far (relative) from the nominal false-alarm rate a suggested size may leave the true one."""
_COSTLY_MEAN_LAWS: Final = frozenset({"lognormal", "weibull"})
"""Families whose law of the mean :mod:`monitor.spc.laws` builds by convolution, not in closed form."""


@dataclass(frozen=True, slots=True)
class SizeRate:
    """The true false-alarm rate of normal-theory limits for means of ``n`` readings, per side."""

    n: int
    lower: float
    upper: float

    @property
    def total(self) -> float:
        """Both sides together."""
        return self.lower + self.upper

    def to_json(self, nominal: float) -> dict[str, object]:
        """As plain data, with the rate as a multiple of the nominal one."""
        return {
            "n": self.n,
            "lower": self.lower,
            "upper": self.upper,
            "total": self.total,
            "times_nominal": self.total / nominal,
        }


SIZE_RULE: Final = (
    "the smallest candidate size from which on the true two-sided false-alarm rate of "
    "normal-theory limits for the mean stays within the tolerance of the nominal rate"
)


@dataclass(frozen=True, slots=True)
class SizeSuggestion:
    """Which subgroup size keeps normal-theory limits for the mean honest under the fitted parent.

    Attributes:
        parent: the parent model, as text.
        current: the chart's subgroup size (the usual one where windows vary it).
        limit_sigma: the width of the limits in sigma of the mean.
        nominal: the two-sided rate those limits promise for a normal process, 2 P(Z > limit_sigma).
        tolerance: relative distance from ``nominal`` a suggested size may leave.
        candidates: the sizes considered, smallest first.
        rates: every size computed (the current one included), smallest first.
        suggested: the suggested size, or None when no candidate qualifies (or a law failed).
        search: ``"every candidate"`` or ``"bisection"`` (see :func:`suggest_subgroup_size`).
        problem: why the search stopped early, if it did.
    """

    parent: str
    current: int
    limit_sigma: float
    nominal: float
    tolerance: float
    candidates: tuple[int, ...]
    rates: tuple[SizeRate, ...]
    suggested: int | None
    search: str
    problem: str | None = None

    def rate_at(self, n: int) -> SizeRate | None:
        """The rate computed for size ``n``, if it was."""
        return next((r for r in self.rates if r.n == n), None)

    def to_json(self) -> dict[str, object]:
        """Stable JSON for scripts."""
        current = self.rate_at(self.current)
        return {
            "parent": self.parent,
            "limit_sigma": self.limit_sigma,
            "nominal_rate": self.nominal,
            "tolerance": self.tolerance,
            "current": self.current,
            "current_rate": None if current is None else current.to_json(self.nominal),
            "suggested": self.suggested,
            "rule": SIZE_RULE,
            "search": self.search,
            "candidates": list(self.candidates),
            "rates": [r.to_json(self.nominal) for r in self.rates],
            "problem": self.problem,
        }


def suggest_subgroup_size(
    parent: Parent,
    current: int,
    *,
    limit_sigma: float = NOMINAL_LIMIT_SIGMA,
    tolerance: float = RATE_TOLERANCE,
    candidates: Sequence[int] | None = None,
    progress: Callable[[str], None] | None = None,
) -> SizeSuggestion:
    """The true false-alarm rate of normal-theory limits for the mean at each size, and a size to use.

    Limits at ``mean -/+ limit_sigma * sd / sqrt(n)`` promise the two-sided rate
    ``2 P(Z > limit_sigma)`` (0.0027 at 3 sigma) only when the mean of ``n`` readings is normal.
    Under the fitted parent the true rate comes from the exact law of the mean
    (:func:`monitor.spc.laws.true_false_alarm_rate`); as ``n`` grows that law approaches the
    normal and the rate approaches the promised one. The suggested size is the smallest
    candidate from which on the rate stays within ``tolerance`` (relative) of the promise;
    None when even the largest candidate misses it. Probability limits
    (:func:`monitor.spc.laws.probability_limits` on the law of the mean) hold the promised rate
    at any size, so a small subgroup with probability limits is the other way out.

    Bounded work: the rate at ``current`` is always computed. For parents whose law of the
    mean is cheap (normal, gamma, exponential, empirical...) every candidate is computed and
    the rule applied as written. For lognormal and Weibull parents each size costs seconds, so
    the candidates are fewer (:data:`COSTLY_CANDIDATE_SIZES`) and the size is found by bisection,
    which assumes that the distance from the promise shrinks as ``n`` grows: at most
    ``2 + log2(len(candidates))`` laws are built.

    If a law cannot be computed the search stops: ``suggested`` is None and ``problem`` says why.
    ``progress``, if given, is called with a short message before each law is built.

    Examples:
        >>> from monitor.spc.parents import Parent
        >>> found = suggest_subgroup_size(Parent.of("normal", mean=8.0, sd=0.04), 5)
        >>> found.suggested, round(found.rate_at(5).total, 4)  # 2 P(Z > 3) at every size
        (1, 0.0027)
    """
    from monitor.spc import laws  # noqa: PLC0415 - the laws load only when a parent is fitted

    if isinstance(current, bool) or not isinstance(current, int) or current < 1:
        raise ConfigError(f"the current subgroup size must be a positive integer, got {current!r}")
    if not 0.0 < tolerance < 1.0:
        raise ConfigError(f"the tolerance must be a fraction in (0, 1), got {tolerance!r}")
    costly = parent.name in _COSTLY_MEAN_LAWS
    sizes = tuple(sorted(set(candidates or (COSTLY_CANDIDATE_SIZES if costly else CANDIDATE_SIZES))))
    if not sizes or sizes[0] < 1:
        raise ConfigError(f"candidate subgroup sizes must be positive integers, got {candidates!r}")
    nominal = float(2.0 * stats.norm.sf(limit_sigma))
    computed: dict[int, SizeRate] = {}

    def rate(n: int) -> SizeRate:
        if n not in computed:
            if progress is not None:
                progress(f"law of the mean of {n} readings under {parent.name}")
            lower, upper = laws.true_false_alarm_rate(parent, n, limit_sigma=limit_sigma)
            computed[n] = SizeRate(n, float(lower), float(upper))
        return computed[n]

    def within(n: int) -> bool:
        return abs(rate(n).total / nominal - 1.0) <= tolerance

    suggested: int | None = None
    problem: str | None = None
    search = "bisection" if costly else "every candidate"
    at = current
    try:
        rate(current)
        if costly:
            at = sizes[-1]
            if within(sizes[-1]):
                low, high = -1, len(sizes) - 1  # sizes[high] qualifies; sizes[low] does not (or low = -1)
                while high - low > 1:
                    middle = (low + high) // 2
                    at = sizes[middle]
                    if within(at):
                        high = middle
                    else:
                        low = middle
                suggested = sizes[high]
        else:
            for at in sizes:
                rate(at)
            for n in reversed(sizes):
                if not within(n):
                    break
                suggested = n
    except (ArithmeticError, ValueError, MonitorError) as exc:
        suggested = None
        problem = f"the law of the mean of {at} readings could not be computed ({type(exc).__name__}: {exc})"
    return SizeSuggestion(
        parent=parent.describe(),
        current=current,
        limit_sigma=float(limit_sigma),
        nominal=nominal,
        tolerance=float(tolerance),
        candidates=sizes,
        rates=tuple(computed[n] for n in sorted(computed)),
        suggested=suggested,
        search=search,
        problem=problem,
    )


@dataclass(slots=True)
class BaselineResult:
    """Everything ``monitor baseline`` found for one chart."""

    chart: str
    source: str
    estimate: PhaseOneEstimate
    indices: list[int]
    """The subgroup number (file order, or stored index) of each baseline subgroup."""
    readings: int
    normality: NormalityCheck | None = None
    parent: ParentFit | None = None
    size: SizeSuggestion | None = None
    notes: list[str] = field(default_factory=list)
    saved: LimitsRow | None = None
    parent_record: dict[str, object] | None = None
    """The fitted parent as the daemon reads it from a stored limits version."""

    def excluded(self) -> list[dict[str, object]]:
        """The excluded subgroups with their own numbers, why, and in which round."""
        return [
            {
                "subgroup": self.indices[e.subgroup],
                "statistic": e.statistic.value,
                "value": e.value,
                "lower": e.lower,
                "upper": e.upper,
                "round": e.round,
            }
            for e in self.estimate.excluded
        ]

    def detail(self) -> dict[str, object]:
        """What a stored limits version keeps about how it was made."""
        return {
            "by": "monitor baseline",
            "data": self.source,
            "estimate": dict(self.estimate.to_state()),
            "subgroups": [self.indices[0], self.indices[-1]] if self.indices else [],
            "excluded": self.excluded(),
            "normality": None if self.normality is None else self.normality.to_json(),
            "parent": None if self.parent is None else self.parent.to_json(),
            "parent_record": self.parent_record,
            "subgroup_size": None if self.size is None else self.size.to_json(),
        }

    def to_json(self) -> dict[str, object]:
        """Stable JSON for scripts."""
        p = self.estimate.parameters
        return {
            "chart": self.chart,
            "data": self.source,
            "mean": p.mean,
            "sigma": p.sigma,
            "estimator": self.estimate.estimator,
            "subgroups_offered": self.estimate.subgroups,
            "subgroups_used": self.estimate.used,
            "readings": self.readings,
            "settled": self.estimate.settled,
            "rounds": self.estimate.rounds,
            "excluded": self.excluded(),
            "normality": None if self.normality is None else self.normality.to_json(),
            "parent": None if self.parent is None else self.parent.to_json(),
            "subgroup_size": None if self.size is None else self.size.to_json(),
            "notes": list(self.notes),
            "saved_version": None if self.saved is None else self.saved.version,
            "yaml": yaml_snippet(self),
        }


def normality(readings: NDArray[np.float64]) -> NormalityCheck:
    """Shapiro-Wilk for 3..5000 readings, D'Agostino-Pearson K^2 above (scipy.stats).

    Examples:
        >>> rng = np.random.default_rng(1)
        >>> check = normality(rng.normal(10.0, 0.5, 200))
        >>> check.test, check.plausible
        ('Shapiro-Wilk', True)
    """
    x = np.asarray(readings, dtype=np.float64)
    if x.shape[0] < 3:
        raise NotEnoughData("a normality check", needed=3, have=int(x.shape[0]), unit="readings")
    if x.shape[0] <= 5000:
        name = "Shapiro-Wilk"
        statistic, p_value = stats.shapiro(x)
    else:
        name = "D'Agostino-Pearson"
        statistic, p_value = stats.normaltest(x)
    return NormalityCheck(
        test=name,
        statistic=float(statistic),
        p_value=float(p_value),
        skewness=float(stats.skew(x, bias=False)),
        excess_kurtosis=float(stats.kurtosis(x, bias=False)),
        readings=int(x.shape[0]),
    )


def _kept_readings(batch: SubgroupBatch, estimate: PhaseOneEstimate) -> NDArray[np.float64]:
    keep = np.ones(len(batch), dtype=bool)
    for e in estimate.excluded:
        keep[e.subgroup] = False
    mask = batch.mask & keep[:, None]
    return batch.values[mask]


def estimate_baseline(
    chart: ChartConfig,
    batch: SubgroupBatch,
    *,
    source: str,
    indices: list[int] | None = None,
    estimator: SigmaEstimator | None = None,
    exclude: bool | None = None,
    fit: bool = True,
    suggest: bool = True,
    progress: Callable[[str], None] | None = None,
) -> BaselineResult:
    """Phase I estimate for ``chart`` from ``batch``, with the checks of the readings.

    Args:
        chart: the chart's configuration (its baseline plan, if any, gives the defaults).
        batch: the baseline subgroups.
        source: where they came from (shown and stored).
        indices: each subgroup's own number (default 0, 1, 2, ...).
        estimator: sigma estimator (default: the chart's).
        exclude: iterative exclusion of out-of-control subgroups (default: the chart's plan, else on).
        fit: check normality and fit a parent model (variables charts).
        suggest: with a fitted parent, the true false-alarm rate of normal-theory limits for
            the mean at the chart's subgroup size and a suggested size
            (:func:`suggest_subgroup_size`).
        progress: called with a short message before each law of the mean is built.
    """
    spec = chart.spec()
    plan = spec.baseline
    if len(batch) < 2:
        raise NotEnoughData(f"baseline of chart {chart.id!r}", needed=2, have=len(batch), unit="subgroups")
    exclude_out = (plan.exclude_out_of_control if plan is not None else True) if exclude is None else exclude
    max_rounds = plan.max_rounds if plan is not None else 10
    max_share = plan.max_excluded_share if plan is not None else 0.25
    attribute = spec.attribute
    if attribute is not None:
        estimate = phase_one_attribute(
            batch,
            kind=attribute,
            limit_sigma=spec.limit_sigma,
            exclude_out_of_control=exclude_out,
            max_rounds=max_rounds,
            max_excluded_share=max_share,
        )
    else:
        chosen = estimator or spec.estimator_for(batch)
        if chosen is not SigmaEstimator.MOVING_RANGE and int(batch.sizes.max()) < 2:
            raise ConfigError(
                f"{chart.id}: sigma from {chosen.value} needs subgroups of 2 or more readings; "
                "these have one each (use moving_range)"
            )
        estimate = phase_one(
            batch,
            estimator=chosen,
            limit_sigma=spec.limit_sigma,
            exclude_out_of_control=exclude_out,
            max_rounds=max_rounds,
            max_excluded_share=max_share,
        )
    result = BaselineResult(
        chart=chart.id,
        source=source,
        estimate=estimate,
        indices=list(range(len(batch))) if indices is None else list(indices),
        readings=int(batch.sizes.sum()),
    )
    if not estimate.settled:
        result.notes.append(
            "the exclusion stopped at its caps before settling: the history is not in control; "
            "choose a calmer stretch"
        )
    if attribute is None and fit:
        kept = _kept_readings(batch, estimate)
        if kept.shape[0] >= 3:
            result.normality = normality(kept)
        result.parent = _fit(kept, result.notes)
        model = None if result.parent is None else result.parent.model
        if model is not None:
            from monitor.signal_pvalues import parent_record  # noqa: PLC0415

            result.parent_record = parent_record(model, kept if model.name == "empirical" else None)
        if suggest and model is not None:
            result.size = suggest_subgroup_size(
                model, _usual_size(chart, batch), limit_sigma=spec.limit_sigma, progress=progress
            )
    return result


def _usual_size(chart: ChartConfig, batch: SubgroupBatch) -> int:
    """The chart's subgroup size; for time windows, the median size of the baseline subgroups."""
    if chart.subgroup.size is not None:
        return int(chart.subgroup.size)
    return max(1, round(float(np.median(batch.sizes))))


def _fit(readings: NDArray[np.float64], notes: list[str]) -> ParentFit | None:
    from monitor.spc.parents import EMPIRICAL_MIN_READINGS, fit_parent  # noqa: PLC0415 - fitting is slow

    if readings.shape[0] < EMPIRICAL_MIN_READINGS:
        notes.append(f"no parent model fitted: fewer than {EMPIRICAL_MIN_READINGS} readings")
        return None
    from monitor.signal_pvalues import settle_fit  # noqa: PLC0415

    try:
        report = fit_parent(readings)
    except (ConfigError, ValueError) as exc:
        notes.append(f"no parent model fitted: {exc}")
        return None
    model, how = settle_fit(report)
    return ParentFit(
        chosen=model.describe(),
        best_family=report.best.name,
        anderson_darling=report.anderson_darling,
        p_value=report.p_value,
        fell_back=report.fell_back,
        candidates=tuple((c.parent.describe(), c.aic) for c in report.candidates),
        method=report.method,
        model=model,
        how=how,
    )


def _parent_setting(parent: Parent) -> str | None:
    from monitor.signal_pvalues import parent_setting  # noqa: PLC0415

    return parent_setting(parent)


def _number(value: float) -> str:
    """Enough digits to reproduce the limits to a part in a million."""
    return f"{value:.7g}"


def yaml_snippet(result: BaselineResult) -> str:
    """The chart's ``limits`` as YAML, to pin the result in the configuration.

    Examples:
        >>> from monitor.spc import ProcessParameters
        >>> params = ProcessParameters(8.0012, 0.03991, source="baseline")
        >>> est = PhaseOneEstimate(params, "range", 25, 25, (), 1, True)
        >>> print(yaml_snippet(BaselineResult("press-1/thickness", "history.csv", est, [], 125)))
        # press-1/thickness: sigma from range over 25 of 25 subgroups of history.csv
        limits: {mean: 8.0012, sigma: 0.03991}
    """
    p = result.estimate.parameters
    e = result.estimate
    head = (
        f"# {result.chart}: sigma from {e.estimator} over {e.used} of {e.subgroups} subgroups of "
        f"{result.source}"
    )
    if result.saved is not None:
        head += f" (stored as limits version {result.saved.version})"
    body = f"limits: {{mean: {_number(p.mean)}"
    body += "}" if p.sigma is None else f", sigma: {_number(p.sigma)}}}"
    model = None if result.parent is None else result.parent.model
    if model is not None:
        setting = _parent_setting(model)
        if setting is None:
            body += "\nparent: empirical   # the smoothed density of the baseline readings"
        elif model.name != "normal":
            body += f'\nparent: "{setting}"   # fitted to the baseline readings'
    return f"{head}\n{body}"


# ---------------------------------------------------------------- the store


def _millis(moment: datetime | None) -> int | None:
    if moment is None:
        return None
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=UTC)
    return round(moment.timestamp() * 1000)


async def stored_subgroups(
    store: Store,
    chart: str,
    *,
    since: datetime | None = None,
    until: datetime | None = None,
    first: int | None = None,
) -> tuple[SubgroupBatch, list[int], int]:
    """The stored subgroups of a chart with their readings, their indices, and how many lacked readings.

    Subgroups stored without their readings (written by an older version) cannot be used and
    are counted. ``first`` keeps only the first that many usable subgroups.
    """
    rows: list[SubgroupRow] = await store.subgroups_for(
        chart, since_ms=_millis(since), until_ms=_millis(until)
    )
    usable = [r for r in rows if r.values]
    if first is not None:
        usable = usable[:first]
    missing = sum(1 for r in rows if not r.values)
    if not usable:
        return SubgroupBatch.from_subgroups([]), [], missing
    sizes = np.array([len(r.values or ()) for r in usable], dtype=np.int64)
    values = np.concatenate([np.asarray(r.values, dtype=np.float64) for r in usable])
    exposures = None
    if all(r.exposures is not None for r in usable):
        exposures = np.concatenate([np.asarray(r.exposures, dtype=np.float64) for r in usable])
    start = np.array([math.nan if r.start_ms is None else r.start_ms / 1000 for r in usable])
    end = np.array([math.nan if r.end_ms is None else r.end_ms / 1000 for r in usable])
    batch = SubgroupBatch.from_ragged(values, sizes, exposures=exposures, start=start, end=end)
    return batch, [r.index for r in usable], missing


async def save(store: Store, result: BaselineResult) -> LimitsRow:
    """Store the result as the chart's next limits version (the daemon adopts it)."""
    p = result.estimate.parameters
    row = await store.add_limits(
        result.chart, mean=p.mean, sigma=p.sigma, source=SOURCE, detail=result.detail()
    )
    result.saved = row
    return row


# ---------------------------------------------------------------- the command


def parse_moment(text: str) -> datetime:
    """An ISO 8601 time from the command line; UTC unless it names an offset."""
    try:
        moment = datetime.fromisoformat(text)
    except ValueError as exc:
        raise ConfigError(f"{text!r} is not an ISO 8601 time (e.g. 2026-11-30T06:00Z)") from exc
    return moment if moment.tzinfo is not None else moment.replace(tzinfo=UTC)


def _in_span(batch: SubgroupBatch, since: datetime | None, until: datetime | None) -> NDArray[np.bool_]:
    keep = np.ones(len(batch), dtype=bool)
    if batch.end is None:
        return keep
    if since is not None:
        keep &= batch.end >= since.timestamp()
    if until is not None:
        keep &= batch.end < until.timestamp()
    return keep


def _from_file(
    chart: ChartConfig, data: str, since: datetime | None, until: datetime | None, first: int | None
) -> tuple[SubgroupBatch, list[int], list[str]]:
    from monitor.replay import chart_subgroups, read_table  # noqa: PLC0415 - pyarrow only for files

    table = read_table(data)
    batch, tally = chart_subgroups(table, chart)
    notes = [f"{p.line}: {p.reason}" for p in table.problems]
    if table.problem_count > len(table.problems):
        notes.append(f"... {table.problem_count - len(table.problems)} more unusable rows")
    if tally.pending:
        notes.append(f"{tally.pending} readings at the end did not fill a subgroup")
    positions = np.flatnonzero(_in_span(batch, since, until))
    if first is not None:
        positions = positions[:first]
    if positions.shape[0] < len(batch):
        batch = SubgroupBatch.from_subgroups([batch.subgroup(int(i)) for i in positions])
    return batch, [int(i) for i in positions], notes


def _say_progress(message: str) -> None:
    """One line on the terminal, overwritten by the next."""
    print(f"\r\033[K{message} ...", end="", file=sys.stderr, flush=True)


async def run_baseline(
    chart: ChartConfig,
    *,
    url: str,
    data: str | None,
    since: datetime | None,
    until: datetime | None,
    first: int | None,
    estimator: SigmaEstimator | None,
    exclude: bool | None,
    write: bool,
) -> BaselineResult:
    """Make (and optionally store) a baseline for one chart from a file or from the store."""
    notes: list[str] = []
    if data is not None:
        batch, indices, notes = _from_file(chart, data, since, until, first)
        source = data
    else:
        async with await Store.open(url) as store:
            batch, indices, missing = await stored_subgroups(
                store, chart.id, since=since, until=until, first=first
            )
        if missing:
            notes.append(f"{missing} stored subgroups have no readings (stored by an older version)")
        source = "stored history"
    if len(batch) < 2:
        raise NotEnoughData(
            f"baseline of chart {chart.id!r} from {source}", needed=2, have=len(batch), unit="subgroups"
        )
    progress = _say_progress if sys.stderr.isatty() else None
    result = estimate_baseline(
        chart, batch, source=source, indices=indices, estimator=estimator, exclude=exclude, progress=progress
    )
    if progress is not None:
        print("\r\033[K", end="", file=sys.stderr, flush=True)
    result.notes[:0] = notes
    if write:
        async with await Store.open(url) as store:
            await save(store, result)
    return result


def size_lines(size: SizeSuggestion) -> list[str]:
    """The subgroup-size suggestion in words: a table of true rates, the suggestion, the way out."""
    width = f"{size.limit_sigma:g}-sigma"
    percent = f"{size.tolerance:.0%}"
    lines = [
        (
            f"subgroup size: true false-alarm rate of normal-theory {width} limits for the mean under "
            f"{size.parent} (promised {size.nominal:.4f} for a normal process)"
        ),
        "     n   below LCL   above UCL       total   x promised",
    ]
    for r in size.rates:
        mark = "   <- current size" if r.n == size.current else ""
        times = r.total / size.nominal
        lines.append(f"  {r.n:4d}  {r.lower:10.3g}  {r.upper:10.3g}  {r.total:10.3g}  {times:11.2f}{mark}")
    largest = size.candidates[-1]
    if size.search == "bisection":
        lines.append(
            "  (the law of the mean of this parent is a numerical convolution: only the sizes "
            "needed were computed, by bisection over " + ", ".join(str(n) for n in size.candidates) + ")"
        )
    if size.problem is not None:
        lines.append(f"no suggestion: {size.problem}")
    elif size.suggested is None:
        lines.append(
            f"no size up to {largest} keeps the rate within {percent} of {size.nominal:.4f}: "
            "the mean stays too skewed for normal-theory limits"
        )
    else:
        lines.append(
            f"suggested subgroup size: {size.suggested} (the smallest from which on the rate stays within "
            f"{percent} of {size.nominal:.4f}; larger subgroups still detect smaller shifts)"
        )
    lines.append(
        "probability limits (quantiles of the law of the mean under this parent) keep the "
        f"promised {size.nominal:.4f} at any size"
    )
    return lines


def print_result(result: BaselineResult, out: IO[str]) -> None:
    """The human-readable report of a baseline."""
    e, p = result.estimate, result.estimate.parameters

    def say(line: str = "") -> None:
        print(line, file=out)

    say(f"{result.chart}: baseline from {result.source}")
    say(f"  subgroups: {e.used} used of {e.subgroups} ({result.readings} readings), {e.rounds} round(s)")
    sigma = "-" if p.sigma is None else f"{p.sigma:.6g}"
    say(f"  mean {p.mean:.6g}, sigma {sigma} (sigma from {e.estimator})")
    for item in result.excluded():
        say(
            f"  excluded subgroup {item['subgroup']}: {item['statistic']} {item['value']:.6g} outside "
            f"{item['lower']:.6g} to {item['upper']:.6g} (round {item['round']})"
        )
    check = result.normality
    if check is not None:
        verdict = "no evidence against normality" if check.plausible else "NOT normal"
        say(
            f"  normality: {check.test} p = {check.p_value:.3g} ({verdict}); skewness "
            f"{check.skewness:.3g}, excess kurtosis {check.excess_kurtosis:.3g}"
        )
    fit = result.parent
    if fit is not None:
        how = " (best family rejected: empirical)" if fit.fell_back else ""
        say(f"  parent model: {fit.chosen}{how}")
        say(f"    Anderson-Darling {fit.anderson_darling:.3g}, p = {fit.p_value:.3g} ({fit.method})")
        for text, aic in fit.candidates:
            say(f"    candidate {text}: AIC {aic:.1f}")
    if result.size is not None:
        for line in size_lines(result.size):
            say(f"  {line}")
    for note in result.notes:
        say(f"  note: {note}")
    if result.saved is not None:
        version = result.saved.version
        say(f"  stored as limits version {version}; a running daemon puts it in force at its next check")
    say()
    say(yaml_snippet(result))
