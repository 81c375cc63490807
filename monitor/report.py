"""Pictures of control charts for people: a PNG or a self-contained HTML page per chart.

A :class:`ChartPicture` holds what one chart plotted, per chart kind and statistic: the points
(subgroup, time, n, value, center line, limits), the signals (subgroup, rule, side), the
baseline estimate if the limits came from one, and optionally what a distribution panel
shows. It is built from the JSON lines of ``monitor replay`` (:func:`pictures_from_replay`)
or from the store the daemon writes (:func:`pictures_from_store`), and drawn by
:func:`render_png` or :func:`render_html`. Where the readings of the baseline are known (the
store keeps them; :func:`baseline_readings_from_data` takes them from the replayed file),
:func:`with_fitted_distribution` fits a parent model to them and adds the distribution panel.

Design choices:

* Colours come from the eight-colour palette of Okabe and Ito, *Color Universal Design*
  (2008), chosen to stay distinguishable under the common colour-vision deficiencies. Nothing
  depends on colour alone: limits are dashed and center lines solid, and every rule has its
  own marker shape, so a greyscale print keeps every distinction.
* Panels stack from the top: where the process is (means, individuals, proportions or
  rates, with the 1-sigma and 2-sigma zones lightly shaded), how much it varies (ranges,
  standard deviations or moving ranges), then the EWMA and the CUSUM (the lower sum drawn
  below zero, sums far beyond the decision limit run off the panel with a note), then, when
  given, the distribution panel. Every time panel shares the subgroup axis.
* Signals sit in a lane under their panel: one row per rule that fired, a marker at each
  subgroup where it fired, the rule named in words with its count at the row's end. Rules
  that fire on long stretches stay readable and never hide the points. A point beyond a
  limit is also marked on the chart itself.
* Limits are drawn as steps wherever they change from point to point (subgroup sizes that
  vary, exposures that vary, EWMA limits that widen at the start), as flat lines otherwise;
  their latest values are written in the right margin.
* Each artist that carries data has a ``gid`` (``points|xbar_r|mean``,
  ``signals|xbar_r|mean|beyond_limits``, ``limit-upper|xbar_r|mean``...), so a test or a
  reader of an SVG export can find exactly what was drawn.
* Rendering uses matplotlib's ``Figure`` with the Agg canvas, never pyplot: no window, no
  global state, no GPU. matplotlib is imported only when a picture is drawn.

Examples:
    >>> lines = [
    ...     {"type": "point", "chart": "press/thickness", "kind": "xbar_r", "statistic": "mean",
    ...      "subgroup": 0, "n": 5, "start": None, "end": "2026-03-02T06:00:09Z",
    ...      "value": 8.01, "center": 8.0, "lower": 7.95, "upper": 8.05},
    ...     {"type": "signal", "chart": "press/thickness", "kind": "xbar_r", "statistic": "mean",
    ...      "rule": "beyond_limits", "side": "upper", "subgroup": 0, "value": 8.01},
    ... ]
    >>> picture = pictures_from_replay(lines)["press/thickness"]
    >>> [(s.kind.value, s.statistic.value, len(s.points), len(s.signals)) for s in picture.series.values()]
    [('xbar_r', 'mean', 1, 1)]
"""

from __future__ import annotations

import argparse
import asyncio
import base64
import html
import io
import math
import re
import sys
import textwrap
from collections import Counter
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Final, Literal

import numpy as np
import orjson
from numpy.typing import ArrayLike, NDArray

from monitor.alerts import ADVISORY
from monitor.config import ChartConfig, Config, ConfigProblems, load_config, storage_url
from monitor.spc import ChartKind, MonitorError, RuleId, Statistic

if TYPE_CHECKING:
    from matplotlib.axes import Axes
    from matplotlib.figure import Figure
    from matplotlib.typing import RcKeyType

    from monitor.spc.laws import Law
    from monitor.spc.parents import Parent
    from monitor.store import LimitsRow, Store

__all__ = [
    "DPI",
    "OKABE_ITO",
    "RULE_STYLES",
    "WIDTH_PX",
    "BaselineSummary",
    "ChartPicture",
    "DistributionLaws",
    "MarkedSignal",
    "PanelSummary",
    "PlottedPoint",
    "ReportError",
    "RuleStyle",
    "Series",
    "add_report_command",
    "baseline_readings_from_data",
    "cmd_report",
    "draw_figure",
    "figure_size_px",
    "file_stem",
    "fitted_distribution",
    "html_page",
    "main",
    "pictures_from_replay",
    "pictures_from_store",
    "render_html",
    "render_png",
    "summarize",
    "with_fitted_distribution",
]

FloatArray = NDArray[np.float64]
_SIGMA: Final = "\N{GREEK SMALL LETTER SIGMA}"


class ReportError(MonitorError):
    """A picture cannot be made: unreadable input, unknown chart, nothing to draw, or no matplotlib."""


# ---------------------------------------------------------------- the data model


@dataclass(frozen=True, slots=True)
class PlottedPoint:
    """One plotted point: the statistic of one subgroup, its center line and its limits there.

    ``time`` is when the subgroup closed, in seconds since the epoch (None if unknown);
    ``lower`` and ``upper`` are None where the chart has no such limit.
    """

    subgroup: int
    time: float | None
    n: int
    value: float
    center: float
    lower: float | None
    upper: float | None


@dataclass(frozen=True, slots=True)
class MarkedSignal:
    """One rule that fired on one statistic at one subgroup (``rule`` is a :class:`RuleId` value)."""

    subgroup: int
    rule: str
    side: str
    value: float


@dataclass(frozen=True, slots=True)
class Series:
    """Everything one statistic of one chart kind plotted: points and signals, in subgroup order."""

    kind: ChartKind
    statistic: Statistic
    points: tuple[PlottedPoint, ...]
    signals: tuple[MarkedSignal, ...]


@dataclass(frozen=True, slots=True)
class BaselineSummary:
    """A Phase I estimate the limits came from: the first ``subgroups`` subgroups, ``used`` of them kept."""

    mean: float
    sigma: float | None
    estimator: str
    subgroups: int
    used: int
    excluded: tuple[int, ...] = ()


def _array(values: ArrayLike, name: str) -> FloatArray:
    array = np.asarray(values, dtype=np.float64)
    if array.ndim != 1 or array.shape[0] < 2:
        raise ReportError(f"distribution panel: {name} must be a one-dimensional array of 2 or more numbers")
    return array


@dataclass(frozen=True, eq=False)
class DistributionLaws:
    """What the distribution panel shows, as plain arrays.

    Left: a histogram of the baseline ``readings`` (optional) with the fitted parent density
    ``parent_density`` over ``parent_x``. Right: the law of the mean of ``subgroup_size``
    readings, ``mean_density`` over ``mean_x``, against the normal curve ``normal_density``
    over the same ``mean_x``.
    """

    parent_name: str
    parent_x: FloatArray
    parent_density: FloatArray
    mean_x: FloatArray
    mean_density: FloatArray
    normal_density: FloatArray
    subgroup_size: int
    readings: FloatArray | None = None
    law_method: str = ""
    """How the law of the mean was computed (e.g. ``closed form``), if known."""

    def __post_init__(self) -> None:
        pairs = (
            ("parent_x", "parent_density", self.parent_x, self.parent_density),
            ("mean_x", "mean_density", self.mean_x, self.mean_density),
            ("mean_x", "normal_density", self.mean_x, self.normal_density),
        )
        for x_name, y_name, x, y in pairs:
            if _array(x, x_name).shape != _array(y, y_name).shape:
                raise ReportError(f"distribution panel: {x_name} and {y_name} differ in length")
        if self.subgroup_size < 1:
            raise ReportError("distribution panel: the subgroup size must be at least 1")

    @classmethod
    def from_arrays(
        cls,
        parent_name: str,
        *,
        parent_x: ArrayLike,
        parent_density: ArrayLike,
        mean_x: ArrayLike,
        mean_density: ArrayLike,
        normal_density: ArrayLike,
        subgroup_size: int,
        readings: ArrayLike | None = None,
        law_method: str = "",
    ) -> DistributionLaws:
        """Build from anything array-like (lists, numpy arrays)."""
        return cls(
            parent_name=parent_name,
            parent_x=_array(parent_x, "parent_x"),
            parent_density=_array(parent_density, "parent_density"),
            mean_x=_array(mean_x, "mean_x"),
            mean_density=_array(mean_density, "mean_density"),
            normal_density=_array(normal_density, "normal_density"),
            subgroup_size=subgroup_size,
            readings=None if readings is None else np.asarray(readings, dtype=np.float64).ravel(),
            law_method=law_method,
        )

    @classmethod
    def from_callables(
        cls,
        parent_name: str,
        *,
        parent_pdf: Callable[[FloatArray], ArrayLike],
        mean_pdf: Callable[[FloatArray], ArrayLike],
        normal_pdf: Callable[[FloatArray], ArrayLike],
        parent_range: tuple[float, float],
        mean_range: tuple[float, float],
        subgroup_size: int,
        readings: ArrayLike | None = None,
        resolution: int = 400,
    ) -> DistributionLaws:
        """Evaluate density functions on even grids over the given ranges."""
        parent_x = np.linspace(parent_range[0], parent_range[1], resolution)
        mean_x = np.linspace(mean_range[0], mean_range[1], resolution)
        return cls.from_arrays(
            parent_name,
            parent_x=parent_x,
            parent_density=parent_pdf(parent_x),
            mean_x=mean_x,
            mean_density=mean_pdf(mean_x),
            normal_density=normal_pdf(mean_x),
            subgroup_size=subgroup_size,
            readings=readings,
        )


_TAIL: Final = 1e-4
"""The distribution panel shows at least the central 1 - 2e-4 of each law."""


def _parent_words(parent: Parent) -> str:
    """A short name of a parent for a legend: ``gamma (shape 7.92, scale 1.56)``."""
    if parent.name == "empirical":
        readings = dict(parent.params).get("readings")
        count = "" if readings is None else f" of {round(readings)} readings"
        return f"empirical (smoothed{count})"
    inner = ", ".join(f"{key.replace('_', ' ')} {value:.4g}" for key, value in parent.params)
    return f"{parent.name} ({inner})"


def _law_density(
    law: Law, x: FloatArray, median: float, step: float, support: tuple[float, float]
) -> FloatArray:
    """The density of a law from its CDF below the median and its survival function above.

    The laws hold tail probabilities precisely, not densities, so the density is the difference
    quotient over ``[x - step, x + step]`` (cut at the ends of the support); the survival
    function keeps it precise in the upper tail.
    """
    a = np.maximum(x - step, support[0])
    b = np.minimum(x + step, support[1])
    below = x <= median
    density = np.empty_like(x)
    density[below] = (law.cdf(b[below]) - law.cdf(a[below])) / (b[below] - a[below])
    density[~below] = (law.sf(a[~below]) - law.sf(b[~below])) / (b[~below] - a[~below])
    return np.maximum(density, 0.0)


def fitted_distribution(
    readings: ArrayLike,
    subgroup_size: int,
    *,
    parent: Parent | None = None,
    limits: Sequence[float] = (),
    resolution: int = 400,
) -> DistributionLaws:
    """What the distribution panel shows for baseline ``readings`` and means of ``subgroup_size``.

    The parent is fitted to the readings as ``parent: auto`` would fit it
    (:func:`monitor.signal_pvalues.settle_fit`: normal kept within 2 AIC of the best) unless given.
    Left: its density over a range holding every reading and the parent's central 1 - 2e-4.
    Right: the law of the mean of ``subgroup_size`` readings under the parent
    (:func:`monitor.spc.laws.law_of_mean`) against the normal curve normal theory assumes, with
    the parent's mean and standard deviation over ``sqrt(subgroup_size)``, over a range holding
    the central 1 - 2e-4 of both (and ``limits``, within 8 standard deviations of the mean).

    Raises:
        ReportError: too few readings for a parent model, or its law could not be computed.
    """
    from monitor.signal_pvalues import settle_fit  # noqa: PLC0415
    from monitor.spc.laws import law_of_mean  # noqa: PLC0415 - the laws load only for this panel
    from monitor.spc.parents import EMPIRICAL_MIN_READINGS, fit_parent  # noqa: PLC0415

    x = np.asarray(readings, dtype=np.float64).ravel()
    x = x[np.isfinite(x)]
    if parent is None:
        if x.size < EMPIRICAL_MIN_READINGS:
            raise ReportError(
                f"{x.size} baseline readings: a parent model needs at least {EMPIRICAL_MIN_READINGS}"
            )
        try:
            parent = settle_fit(fit_parent(x))[0]
        except MonitorError as exc:
            raise ReportError(f"no parent model fitted: {exc}") from None
    try:
        law = law_of_mean(parent, subgroup_size)
        low_support, high_support = parent.support
        low = float(parent.ppf(_TAIL))
        high = float(parent.isf(_TAIL))
        if x.size:
            low, high = min(low, float(x.min())), max(high, float(x.max()))
        low, high = max(low, low_support), min(high, high_support)
        parent_x = np.linspace(low, high, resolution)
        parent_density = parent.pdf(parent_x)

        mean, spread = parent.mean(), parent.sd() / math.sqrt(subgroup_size)
        lows = [float(law.ppf(_TAIL)), mean - 4.0 * spread]
        highs = [float(law.isf(_TAIL)), mean + 4.0 * spread]
        for limit in limits:
            if math.isfinite(limit) and abs(limit - mean) <= 8.0 * spread:
                lows.append(limit - 0.25 * spread)
                highs.append(limit + 0.25 * spread)
        mean_x = np.linspace(max(min(lows), low_support), min(max(highs), high_support), resolution)
        median = float(law.ppf(0.5))
        mean_density = _law_density(law, mean_x, median, 1e-3 * spread, parent.support)
    except (ArithmeticError, ValueError, MonitorError) as exc:
        raise ReportError(
            f"the law of the mean of {subgroup_size} under {parent.describe()} could not be computed: {exc}"
        ) from None
    normal = np.exp(-0.5 * ((mean_x - mean) / spread) ** 2) / (spread * math.sqrt(2.0 * math.pi))
    if not (np.isfinite(parent_density).all() and np.isfinite(mean_density).all()):
        raise ReportError(f"the density of {parent.describe()} is not finite over the readings")
    return DistributionLaws.from_arrays(
        _parent_words(parent),
        parent_x=parent_x,
        parent_density=parent_density,
        mean_x=mean_x,
        mean_density=mean_density,
        normal_density=normal,
        subgroup_size=subgroup_size,
        readings=x if x.size else None,
        law_method=law.method,
    )


SeriesKey = tuple[ChartKind, Statistic]


@dataclass(frozen=True)
class ChartPicture:
    """What one chart's picture shows.

    Attributes:
        chart: the chart id.
        series: per (chart kind, statistic), the points and signals.
        title: what the crew calls the chart (empty: the id is shown).
        unit: unit of the readings (empty if none).
        limit_sigma: the width of the control limits in sigma (the zones are drawn at 1 and 2 sigma
            of this scale).
        baseline: the Phase I estimate the limits came from, if any.
        limits_note: where standard limits came from, in words (empty if unknown).
        ewma_lambda: weight of the newest subgroup in the EWMA, if known.
        cusum_k: reference value of the CUSUM in sigma of the mean, if known.
        baseline_readings: the readings of the baseline subgroups, where they were kept (the
            distribution panel's histogram uses them unless its laws bring their own).
        distribution: the distribution panel, if one is wanted.
    """

    chart: str
    series: Mapping[SeriesKey, Series]
    title: str = ""
    unit: str = ""
    limit_sigma: float = 3.0
    baseline: BaselineSummary | None = None
    limits_note: str = ""
    ewma_lambda: float | None = None
    cusum_k: float | None = None
    baseline_readings: tuple[float, ...] = ()
    distribution: DistributionLaws | None = None

    def with_distribution(self, laws: DistributionLaws | None) -> ChartPicture:
        """The same picture with (or without) a distribution panel."""
        return replace(self, distribution=laws)

    def histogram_readings(self) -> FloatArray | None:
        """The readings the distribution panel's histogram shows, if any."""
        laws = self.distribution
        if laws is not None and laws.readings is not None:
            return laws.readings
        if self.baseline_readings:
            return np.asarray(self.baseline_readings, dtype=np.float64)
        return None

    @property
    def heading(self) -> str:
        """The title, or the chart id when there is none."""
        return self.title or self.chart

    def times(self) -> tuple[float, float] | None:
        """The first and last subgroup closing times, if any are known."""
        known = [p.time for s in self.series.values() for p in s.points if p.time is not None]
        return (min(known), max(known)) if known else None


# ---------------------------------------------------------------- building pictures


def _field_float(
    record: Mapping[str, object], key: str, where: str, *, optional: bool = False
) -> float | None:
    value = record.get(key)
    if value is None and optional:
        return None
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        raise ReportError(f"{where}: field {key!r} is missing or not a finite number")
    return float(value)


def _field_int(record: Mapping[str, object], key: str, where: str) -> int:
    value = record.get(key)
    if isinstance(value, bool) or not isinstance(value, int):
        raise ReportError(f"{where}: field {key!r} is missing or not an integer")
    return value


def _field_str(record: Mapping[str, object], key: str, where: str) -> str:
    value = record.get(key)
    if not isinstance(value, str) or not value:
        raise ReportError(f"{where}: field {key!r} is missing or not text")
    return value


def _kind_statistic(record: Mapping[str, object], where: str) -> SeriesKey:
    kind, statistic = _field_str(record, "kind", where), _field_str(record, "statistic", where)
    try:
        return ChartKind(kind), Statistic(statistic)
    except ValueError:
        raise ReportError(f"{where}: unknown chart kind {kind!r} or statistic {statistic!r}") from None


def _seconds(text: object) -> float | None:
    if not isinstance(text, str):
        return None
    try:
        moment = datetime.fromisoformat(text)
    except ValueError:
        return None
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=UTC)
    return moment.timestamp()


def _point(
    record: Mapping[str, object], subgroup: int, n: int, time: float | None, where: str
) -> PlottedPoint:
    value = _field_float(record, "value", where)
    center = _field_float(record, "center", where)
    if value is None or center is None:  # pragma: no cover - _field_float raises first
        raise ReportError(f"{where}: no value")
    return PlottedPoint(
        subgroup=subgroup,
        time=time,
        n=n,
        value=value,
        center=center,
        lower=_field_float(record, "lower", where, optional=True),
        upper=_field_float(record, "upper", where, optional=True),
    )


@dataclass
class _Draft:
    """A picture while its lines are collected."""

    points: dict[SeriesKey, list[PlottedPoint]] = field(default_factory=dict)
    signals: dict[SeriesKey, list[MarkedSignal]] = field(default_factory=dict)
    baseline: BaselineSummary | None = None
    limits_note: str = ""
    baseline_readings: list[float] = field(default_factory=list)

    def build(self, chart: str, config: ChartConfig | None) -> ChartPicture:
        keys = sorted(set(self.points) | set(self.signals), key=_series_order)
        series = {
            key: Series(
                kind=key[0],
                statistic=key[1],
                points=tuple(sorted(self.points.get(key, []), key=lambda p: p.subgroup)),
                signals=tuple(sorted(self.signals.get(key, []), key=lambda s: (s.subgroup, s.rule))),
            )
            for key in keys
        }
        picture = ChartPicture(
            chart=chart,
            series=series,
            baseline=self.baseline,
            limits_note=self.limits_note,
            baseline_readings=tuple(self.baseline_readings),
        )
        return _labelled(picture, config)


def _labelled(picture: ChartPicture, config: ChartConfig | None) -> ChartPicture:
    """Fill in what only the configuration knows: title, unit, limit width, EWMA and CUSUM settings."""
    if config is None:
        return picture
    note = picture.limits_note
    limits = config.limits
    if not note and limits.baseline is None:
        if limits.mean is not None:
            note = f"standard values: mean {_num(limits.mean)}" + (
                f", {_SIGMA} {_num(limits.sigma)}" if limits.sigma is not None else ""
            )
        elif limits.proportion is not None:
            note = f"standard proportion {_num(limits.proportion)}"
        elif limits.rate is not None:
            note = f"standard rate {_num(limits.rate)} per unit"
    return replace(
        picture,
        title=picture.title or _fill_title(config, picture.chart),
        unit=picture.unit or config.unit,
        limit_sigma=config.limit_sigma,
        limits_note=note,
        ewma_lambda=config.ewma.smoothing if ChartKind.EWMA in config.kinds else None,
        cusum_k=config.cusum.k if ChartKind.CUSUM in config.kinds else None,
    )


def _fill_title(config: ChartConfig, chart: str) -> str:
    """The configured title; for a chart expanded from a template, with its placeholders filled."""
    if not config.title or not config.placeholders:
        return config.title
    match = _template_pattern(config.id).fullmatch(chart)
    if match is None:
        return config.title
    return re.sub(r"\{(\w+)\}", lambda m: match.groupdict().get(m.group(1), m.group(0)), config.title)


def _template_pattern(chart_id: str) -> re.Pattern[str]:
    parts = re.split(r"(\{\w+\})", chart_id)
    regex = "".join(
        f"(?P<{part[1:-1]}>[^/]+)" if part.startswith("{") and part.endswith("}") else re.escape(part)
        for part in parts
    )
    return re.compile(regex)


def _chart_config(config: Config | None, chart: str) -> ChartConfig | None:
    """The configuration of a chart id (exactly, or the template it was expanded from)."""
    if config is None:
        return None
    for candidate in config.charts:
        if candidate.id == chart:
            return candidate
    for candidate in config.charts:
        if candidate.placeholders and _template_pattern(candidate.id).fullmatch(chart):
            return candidate
    return None


def pictures_from_replay(
    lines: Iterable[Mapping[str, object]], *, config: Config | None = None
) -> dict[str, ChartPicture]:
    """Collect the point, signal and baseline lines of a replay into one picture per chart.

    Lines of other types are ignored. With ``config``, titles, units, the limit width and the
    EWMA and CUSUM settings come from it. Charts appear in the order of their first line.

    Raises:
        ReportError: a line lacks a field or holds a value of the wrong type (the message
            names the line, counting from 1).
    """
    drafts: dict[str, _Draft] = {}
    for line_no, record in enumerate(lines, start=1):
        if not isinstance(record, Mapping):
            raise ReportError(f"line {line_no}: not a JSON object")
        kind = record.get("type")
        if kind not in {"point", "signal", "baseline"}:
            continue
        where = f"line {line_no}"
        chart = _field_str(record, "chart", where)
        draft = drafts.setdefault(chart, _Draft())
        if kind == "baseline":
            draft.baseline = _baseline_from_state(record, where)
            continue
        key = _kind_statistic(record, where)
        subgroup = _field_int(record, "subgroup", where)
        if kind == "point":
            n = _field_int(record, "n", where)
            point = _point(record, subgroup, n, _seconds(record.get("end")), where)
            draft.points.setdefault(key, []).append(point)
        else:
            value = _field_float(record, "value", where)
            signal = MarkedSignal(
                subgroup=subgroup,
                rule=_field_str(record, "rule", where),
                side=str(record.get("side") or "either"),
                value=0.0 if value is None else value,
            )
            draft.signals.setdefault(key, []).append(signal)
    return {chart: draft.build(chart, _chart_config(config, chart)) for chart, draft in drafts.items()}


def _baseline_from_state(state: Mapping[str, object], where: str) -> BaselineSummary:
    """A baseline from a replay's baseline line or a stored Phase I estimate (nested parameters)."""
    parameters = state.get("parameters")
    source: Mapping[str, object] = parameters if isinstance(parameters, Mapping) else state
    excluded_raw = state.get("excluded")
    entries = excluded_raw if isinstance(excluded_raw, list) else []
    excluded = [e.get("subgroup") for e in entries if isinstance(e, Mapping)]
    mean = _field_float(source, "mean", where)
    return BaselineSummary(
        mean=0.0 if mean is None else mean,
        sigma=_field_float(source, "sigma", where, optional=True),
        estimator=str(state.get("estimator") or "unknown"),
        subgroups=_field_int(state, "subgroups", where),
        used=_field_int(state, "used", where),
        excluded=tuple(sorted({x for x in excluded if isinstance(x, int)})),
    )


async def pictures_from_store(
    store: Store, chart_ids: Iterable[str], *, config: Config | None = None
) -> dict[str, ChartPicture]:
    """Read each chart's stored subgroups, signals and latest limits into a picture.

    Raises:
        ReportError: a stored row does not have the shape the daemon writes.
        StoreError: the database could not be read.
    """
    pictures: dict[str, ChartPicture] = {}
    for chart in chart_ids:
        draft = _Draft()
        uncharted: dict[int, tuple[float, ...]] = {}  # baseline subgroups collected, not charted
        readings: dict[int, tuple[float, ...]] = {}
        for row in await store.subgroups_for(chart):
            where = f"chart {chart}, subgroup {row.index}"
            time = None if row.end_ms is None else row.end_ms / 1000.0
            kept = getattr(row, "values", None)  # readings, on stores that keep them
            if kept:
                readings[row.index] = tuple(float(v) for v in kept)
                if not row.points:
                    uncharted[row.index] = readings[row.index]
            for kind_name, statistics in row.points.items():
                if not isinstance(statistics, Mapping):
                    raise ReportError(f"{where}: points of {kind_name!r} are not an object")
                for statistic_name, values in statistics.items():
                    key = _kind_statistic({"kind": kind_name, "statistic": statistic_name}, where)
                    if not isinstance(values, Mapping):
                        raise ReportError(f"{where}: point {kind_name}/{statistic_name} is not an object")
                    point = _point(values, row.index, row.n, time, where)
                    draft.points.setdefault(key, []).append(point)
        for signal in await store.signals_for(chart):
            where = f"chart {chart}, signal at subgroup {signal.subgroup}"
            key = _kind_statistic({"kind": signal.kind, "statistic": signal.statistic}, where)
            draft.signals.setdefault(key, []).append(
                MarkedSignal(signal.subgroup, signal.rule, signal.side, signal.value)
            )
        limits = await store.latest_limits(chart)
        if limits is not None:
            sigma = "" if limits.sigma is None else f", {_SIGMA} {_num(limits.sigma)}"
            draft.limits_note = (
                f"{limits.source} values (version {limits.version}): mean {_num(limits.mean)}{sigma}"
            )
            if limits.source == "baseline":
                try:
                    draft.baseline = _baseline_from_state(limits.detail, f"chart {chart}")
                except ReportError:
                    draft.baseline = None  # limits without the estimate's detail: the note says enough
        draft.baseline_readings = _stored_baseline_readings(draft.baseline, limits, uncharted, readings)
        pictures[chart] = draft.build(chart, _chart_config(config, chart))
    return pictures


def _excluded_numbers(entries: object) -> set[int]:
    items = entries if isinstance(entries, list) else []
    return {e["subgroup"] for e in items if isinstance(e, Mapping) and isinstance(e.get("subgroup"), int)}


def _stored_baseline_readings(
    baseline: BaselineSummary | None,
    limits: LimitsRow | None,
    uncharted: Mapping[int, tuple[float, ...]],
    readings: Mapping[int, tuple[float, ...]],
) -> list[float]:
    """The readings of the subgroups the limits in force were estimated from, excluded ones left out.

    Limits from the daemon's own Phase I baseline: the subgroups it collected without charting
    them. Limits stored by ``monitor baseline`` from the stored history: the stored subgroups
    from the first to the last it used. Otherwise (limits from a file, or none): the uncharted
    subgroups, if any.
    """
    detail = {} if limits is None else limits.detail
    span = detail.get("subgroups")
    if (
        baseline is None
        and detail.get("by") == "monitor baseline"
        and detail.get("data") == "stored history"
        and isinstance(span, list)
        and len(span) == 2
        and all(isinstance(i, int) for i in span)
    ):
        left_out = _excluded_numbers(detail.get("excluded"))
        first, last = span
        chosen = [i for i in sorted(readings) if first <= i <= last and i not in left_out]
        return [v for i in chosen for v in readings[i]]
    left_out = set(baseline.excluded) if baseline is not None else set()
    return [v for i in sorted(uncharted) if i not in left_out for v in uncharted[i]]


def _mean_size(picture: ChartPicture, config: ChartConfig | None) -> int | None:
    """The subgroup size of the plotted means (the most common where it varies); 1 for individuals."""
    statistics = {key[1] for key in picture.series}
    if statistics & {Statistic.PROPORTION, Statistic.RATE}:
        return None
    means = [p.n for key, s in picture.series.items() if key[1] is Statistic.MEAN for p in s.points]
    if means:
        return Counter(means).most_common(1)[0][0]
    if Statistic.INDIVIDUAL in statistics:
        return 1
    if config is not None and config.subgroup.size is not None and config.spec().attribute is None:
        return int(config.subgroup.size)
    return None


def with_fitted_distribution(
    picture: ChartPicture, config: ChartConfig | None = None
) -> tuple[ChartPicture, str | None]:
    """The picture with a distribution panel fitted to its baseline readings, and why not if it has none.

    Nothing to say (``None``) when the picture has no baseline readings or charts counts (p, u);
    otherwise a picture without the panel comes back with the reason (too few readings, a law
    that could not be computed).
    """
    if not picture.baseline_readings:
        return picture, None
    size = _mean_size(picture, config)
    if size is None:
        return picture, None
    limits = [value for _, value in _last_mean_limits(picture)]
    try:
        laws = fitted_distribution(picture.baseline_readings, size, limits=limits)
    except ReportError as exc:
        return picture, f"{picture.chart}: no distribution panel: {exc}"
    return picture.with_distribution(laws), None


def baseline_readings_from_data(
    pictures: Mapping[str, ChartPicture], data: str | Path, config: Config
) -> dict[str, ChartPicture]:
    """Give each picture with a baseline the readings of its baseline subgroups from the replayed file.

    The subgroups are formed from ``data`` exactly as the replay formed them; the first
    ``baseline.subgroups`` of them, less those the estimate left out, are the baseline.
    """
    from monitor.replay import chart_subgroups, read_table  # noqa: PLC0415 - pyarrow only for files

    table = read_table(data)
    out = dict(pictures)
    for chart, picture in pictures.items():
        chart_config = _chart_config(config, chart)
        baseline = picture.baseline
        if baseline is None or chart_config is None or chart_config.spec().attribute is not None:
            continue
        batch, _ = chart_subgroups(table, chart_config)
        left_out = set(baseline.excluded)
        kept = [i for i in range(min(baseline.subgroups, len(batch))) if i not in left_out]
        values = tuple(float(v) for i in kept for v in batch.values[i, : int(batch.sizes[i])])
        out[chart] = replace(picture, baseline_readings=values)
    return out


# ---------------------------------------------------------------- words


_LOCATION = (Statistic.MEAN, Statistic.INDIVIDUAL, Statistic.PROPORTION, Statistic.RATE)
_SPREAD = (Statistic.RANGE, Statistic.SD, Statistic.MOVING_RANGE)
_NONNEGATIVE = (*_SPREAD, Statistic.PROPORTION, Statistic.RATE)
_STATISTIC_ORDER = (*_LOCATION, *_SPREAD, Statistic.EWMA, Statistic.CUSUM_UPPER, Statistic.CUSUM_LOWER)


def _series_order(key: SeriesKey) -> tuple[int, int]:
    kind_order = list(ChartKind).index(key[0])
    return _STATISTIC_ORDER.index(key[1]), kind_order


_STATISTIC_WORDS: Final[dict[Statistic, str]] = {
    Statistic.MEAN: "Subgroup means",
    Statistic.INDIVIDUAL: "Individual readings",
    Statistic.PROPORTION: "Proportion nonconforming",
    Statistic.RATE: "Defects per unit",
    Statistic.RANGE: "Subgroup ranges",
    Statistic.SD: "Subgroup standard deviations",
    Statistic.MOVING_RANGE: "Moving ranges of consecutive readings",
    Statistic.EWMA: "Exponentially weighted moving average (EWMA)",
    Statistic.CUSUM_UPPER: "Cumulative sums (CUSUM) of the standardized means",
    Statistic.CUSUM_LOWER: "Cumulative sums (CUSUM) of the standardized means",
}


@dataclass(frozen=True, slots=True)
class RuleStyle:
    """How one rule's signals look: short words for the lane label, a sentence, and the marker."""

    words: str
    sentence: str
    marker: str
    color: str
    filled: bool


OKABE_ITO: Final[dict[str, str]] = {
    "black": "#000000",
    "orange": "#E69F00",
    "sky blue": "#56B4E9",
    "bluish green": "#009E73",
    "yellow": "#F0E442",
    "blue": "#0072B2",
    "vermillion": "#D55E00",
    "reddish purple": "#CC79A7",
}
"""The colour-blind-safe palette of Okabe and Ito, *Color Universal Design* (2008)."""

_INK = "#222222"
_MUTED = "#5A5A5A"
_GUIDE = "#D9D9D9"
_POINTS = OKABE_ITO["blue"]
_LIMITS = OKABE_ITO["vermillion"]
_ZONE = OKABE_ITO["sky blue"]
_LIMIT_DASH = (0, (5.0, 2.5))

RULE_STYLES: Final[dict[str, RuleStyle]] = {
    RuleId.BEYOND_LIMITS.value: RuleStyle(
        "beyond a limit", "a point beyond a control limit", "D", OKABE_ITO["vermillion"], filled=True
    ),
    RuleId.OUTER_ZONE_CLUSTER.value: RuleStyle(
        "outer-zone cluster",
        f"several of the last few points beyond 2{_SIGMA} on one side",
        "^",
        OKABE_ITO["orange"],
        filled=True,
    ),
    RuleId.MIDDLE_ZONE_CLUSTER.value: RuleStyle(
        "middle-zone cluster",
        f"several of the last few points beyond 1{_SIGMA} on one side",
        "v",
        OKABE_ITO["bluish green"],
        filled=True,
    ),
    RuleId.SAME_SIDE_RUN.value: RuleStyle(
        "run on one side",
        "a run of points on one side of the center line",
        "s",
        OKABE_ITO["reddish purple"],
        filled=True,
    ),
    RuleId.STEADY_TREND.value: RuleStyle(
        "steady trend",
        "a run of points each higher (or each lower) than the one before",
        "P",
        OKABE_ITO["black"],
        filled=True,
    ),
    RuleId.ALTERNATING_RUN.value: RuleStyle(
        "alternating run", "a run of points alternating up and down", "X", OKABE_ITO["sky blue"], filled=True
    ),
    RuleId.HUGGING_CENTER.value: RuleStyle(
        "hugging the center",
        f"a run of points all within 1{_SIGMA} of the center line (too little variation)",
        "h",
        OKABE_ITO["black"],
        filled=False,
    ),
    RuleId.AVOIDING_CENTER.value: RuleStyle(
        "avoiding the center",
        f"a run of points all beyond 1{_SIGMA}, on both sides (a mixture)",
        "*",
        OKABE_ITO["yellow"],
        filled=True,
    ),
}
"""Marker, colour and words per rule: the shapes differ, so a greyscale print keeps every rule apart."""


def _rule_style(rule: str) -> RuleStyle:
    words = rule.replace("_", " ")
    return RULE_STYLES.get(rule, RuleStyle(words, words, "o", _INK, filled=False))


def _rule_rank(rule: str) -> tuple[int, str]:
    order = list(RULE_STYLES)
    return (order.index(rule) if rule in order else len(order), rule)


def _num(value: float | None) -> str:
    if value is None:
        return "none"
    if value == 0:
        return "0"
    return f"{value:.5g}".replace("-", "\N{MINUS SIGN}")


def _clock(seconds: float, *, date: bool) -> str:
    moment = datetime.fromtimestamp(seconds, UTC)
    return moment.strftime("%Y-%m-%d %H:%M" if date else "%H:%M")


def _time_span(times: tuple[float, float] | None) -> str:
    if times is None:
        return ""
    first, last = times
    same_day = _clock(first, date=True)[:10] == _clock(last, date=True)[:10]
    return f"{_clock(first, date=True)} to {_clock(last, date=not same_day)} UTC"


# ---------------------------------------------------------------- layout


PanelRole = Literal["location", "spread", "ewma", "cusum", "distribution", "empty"]

DPI: Final = 150
"""Pixels per inch of the PNG: the figure is 8 inches wide, readable in print at full page width."""
_WIDTH_IN: Final = 8.0
WIDTH_PX: Final = round(_WIDTH_IN * DPI)
_LEFT_IN: Final = 0.75
_AXES_W_IN: Final = 5.2
_HEADER_IN: Final = 0.9
_FOOTER_IN: Final = 0.45
_TOP_PAD_IN: Final = 0.32
_BOTTOM_PAD_IN: Final = 0.3
_XLABEL_IN: Final = 0.2
_LANE_GAP_IN: Final = 0.06
_LANE_ROW_IN: Final = 0.15
_LANE_PAD_IN: Final = 0.05
_AXES_H_IN: Final[dict[PanelRole, float]] = {
    "location": 2.3,
    "spread": 1.2,
    "ewma": 1.3,
    "cusum": 1.3,
    "distribution": 1.8,
    "empty": 0.4,
}
_CUSUM_CLIP: Final = 3.0
"""CUSUM panels show at most this many decision limits above and below zero (larger sums are noted)."""


@dataclass(frozen=True, slots=True)
class _Panel:
    role: PanelRole
    keys: tuple[SeriesKey, ...]
    title: str
    lanes: tuple[tuple[SeriesKey, str], ...] = ()
    """One signal lane per (series, rule) that fired in this panel, top to bottom."""

    def lane_height(self) -> float:
        if not self.lanes:
            return 0.0
        return _LANE_GAP_IN + len(self.lanes) * _LANE_ROW_IN + _LANE_PAD_IN


def _n_words(series: Series) -> str:
    sizes = {p.n for p in series.points}
    no_size = (Statistic.INDIVIDUAL, Statistic.MOVING_RANGE, Statistic.PROPORTION, Statistic.RATE)
    if not sizes or series.statistic in no_size:
        return ""
    low, high = min(sizes), max(sizes)
    return f" (n = {low})" if low == high else f" (n = {low} to {high}; limits follow each)"


def _lanes(picture: ChartPicture, keys: Sequence[SeriesKey]) -> tuple[tuple[SeriesKey, str], ...]:
    lanes: list[tuple[SeriesKey, str]] = []
    for key in keys:
        rules = {s.rule for s in picture.series[key].signals}
        lanes.extend((key, rule) for rule in sorted(rules, key=_rule_rank))
    return tuple(lanes)


def _panels(picture: ChartPicture) -> list[_Panel]:
    panels: list[_Panel] = []
    series = picture.series
    cusum_pair = (Statistic.CUSUM_UPPER, Statistic.CUSUM_LOWER)
    for key, one in series.items():
        statistic = one.statistic
        if statistic in _LOCATION or statistic in _SPREAD:
            role: PanelRole = "location" if statistic in _LOCATION else "spread"
            title = _STATISTIC_WORDS[statistic] + _n_words(one)
            panels.append(_Panel(role, (key,), title, _lanes(picture, (key,))))
        elif statistic is Statistic.EWMA:
            weight = "" if picture.ewma_lambda is None else f" (λ = {_num(picture.ewma_lambda)})"
            panels.append(
                _Panel("ewma", (key,), _STATISTIC_WORDS[statistic] + weight, _lanes(picture, (key,)))
            )
        elif statistic is Statistic.CUSUM_UPPER or (one.kind, Statistic.CUSUM_UPPER) not in series:
            keys = tuple(k for k in series if k[0] == one.kind and k[1] in cusum_pair)
            reference = "" if picture.cusum_k is None else f" (k = {_num(picture.cusum_k)})"
            panels.append(
                _Panel("cusum", keys, _STATISTIC_WORDS[statistic] + reference, _lanes(picture, keys))
            )
    order: tuple[PanelRole, ...] = ("location", "spread", "ewma", "cusum")
    panels.sort(key=lambda p: order.index(p.role))
    if not panels:
        panels.append(_Panel("empty", (), "Nothing charted yet"))
    if picture.distribution is not None:
        panels.append(_Panel("distribution", (), "Distribution"))
    return panels


def _block_heights(panels: Sequence[_Panel]) -> list[float]:
    """Height of each panel's block: title, axes, signal lanes, tick labels (and the axis label)."""
    time_panels = [i for i, p in enumerate(panels) if p.role not in ("distribution", "empty")]
    last_time = time_panels[-1] if time_panels else -1
    heights = []
    for i, panel in enumerate(panels):
        height = _TOP_PAD_IN + _AXES_H_IN[panel.role] + panel.lane_height() + _BOTTOM_PAD_IN
        if i == last_time or panel.role == "distribution":
            height += _XLABEL_IN
        heights.append(round(height, 4))
    return heights


def figure_size_px(picture: ChartPicture) -> tuple[int, int]:
    """Width and height in pixels of the PNG :func:`render_png` writes for ``picture``."""
    height_in = _HEADER_IN + sum(_block_heights(_panels(picture))) + _FOOTER_IN
    return WIDTH_PX, round(height_in * DPI)


_RC: Final[dict[RcKeyType, object]] = {
    "font.family": "DejaVu Sans",
    "font.size": 7.5,
    "axes.linewidth": 0.6,
    "axes.edgecolor": _MUTED,
    "axes.labelcolor": _INK,
    "axes.titlesize": 8.5,
    "axes.titleweight": "bold",
    "axes.titlelocation": "left",
    "axes.titlepad": 5.0,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "xtick.color": _MUTED,
    "ytick.color": _MUTED,
    "xtick.labelcolor": _INK,
    "ytick.labelcolor": _INK,
    "xtick.major.size": 3.0,
    "ytick.major.size": 3.0,
    "xtick.major.width": 0.6,
    "ytick.major.width": 0.6,
    "legend.fontsize": 6.5,
    "legend.frameon": False,
    "hatch.linewidth": 0.5,
    "hatch.color": "#B5B5B5",
    "svg.fonttype": "none",
}


# ---------------------------------------------------------------- drawing


def _agg_figure(width_in: float, height_in: float) -> Figure:
    try:
        from matplotlib.backends.backend_agg import FigureCanvasAgg  # noqa: PLC0415 - optional dependency
        from matplotlib.figure import Figure  # noqa: PLC0415
    except ImportError:
        raise ReportError("drawing charts needs matplotlib: pip install matplotlib") from None
    figure = Figure(figsize=(width_in, height_in), dpi=DPI, facecolor="white")
    FigureCanvasAgg(figure)
    return figure


def draw_figure(picture: ChartPicture) -> Figure:
    """Draw the picture on a matplotlib ``Figure`` with the Agg canvas (no pyplot, no window)."""
    try:
        import matplotlib as mpl  # noqa: PLC0415 - optional dependency, loaded only to draw
    except ImportError:
        raise ReportError("drawing charts needs matplotlib: pip install matplotlib") from None
    with mpl.rc_context(_RC):
        return _draw(picture)


class _Frame:
    """Converts the layout's inches (from the figure's bottom-left) into figure fractions."""

    def __init__(self, height_in: float) -> None:
        self.height_in = height_in

    def rect(
        self, left: float, bottom: float, width: float, height: float
    ) -> tuple[float, float, float, float]:
        return (left / _WIDTH_IN, bottom / self.height_in, width / _WIDTH_IN, height / self.height_in)


def _draw(picture: ChartPicture) -> Figure:
    panels = _panels(picture)
    heights = _block_heights(panels)
    height_in = figure_size_px(picture)[1] / DPI
    figure = _agg_figure(_WIDTH_IN, height_in)
    frame = _Frame(height_in)
    _header(figure, picture, height_in)
    top = height_in - _HEADER_IN
    shared: Axes | None = None
    bottoms: list[Axes] = []
    for panel, block in zip(panels, heights, strict=True):
        axes_top = top - _TOP_PAD_IN
        axes_bottom = axes_top - _AXES_H_IN[panel.role]
        if panel.role == "distribution" and picture.distribution is not None:
            _distribution(figure, frame, picture, picture.distribution, axes_bottom)
        else:
            ax = figure.add_axes(frame.rect(_LEFT_IN, axes_bottom, _AXES_W_IN, _AXES_H_IN[panel.role]))
            ax.set_title(panel.title)
            if panel.role == "empty":
                _empty(ax, picture)
            else:
                if shared is None:
                    shared = ax
                else:
                    ax.sharex(shared)
                _time_panel(ax, picture, panel)
                bottom_axes = ax
                if panel.lanes:
                    lane_height = len(panel.lanes) * _LANE_ROW_IN
                    lane_bottom = axes_bottom - _LANE_GAP_IN - lane_height
                    lane = figure.add_axes(frame.rect(_LEFT_IN, lane_bottom, _AXES_W_IN, lane_height))
                    lane.sharex(shared)
                    _signal_lanes(lane, picture, panel)
                    ax.tick_params(axis="x", labelbottom=False)
                    bottom_axes = lane
                bottoms.append(bottom_axes)
        top -= block
    if shared is not None:
        _subgroup_axis(shared, picture)
        bottoms[-1].set_xlabel("subgroup number")
    footer = textwrap.fill(ADVISORY, width=150)
    figure.text(_LEFT_IN / _WIDTH_IN, 0.1 / height_in, footer, fontsize=6.5, color=_MUTED, va="bottom")
    return figure


def _header(figure: Figure, picture: ChartPicture, height_in: float) -> None:
    x = _LEFT_IN / _WIDTH_IN
    figure.text(
        x, 1 - 0.16 / height_in, picture.heading, fontsize=12, fontweight="bold", color=_INK, va="top"
    )
    facts = [picture.chart] if picture.title else []
    charted = {p.subgroup for s in picture.series.values() for p in s.points}
    if charted:
        facts.append(f"{len(charted)} subgroups charted")
    span = _time_span(picture.times())
    if span:
        facts.append(span)
    source = _limits_source(picture)
    lines = ["   ·   ".join(facts)]
    if source:
        lines.append(source)
    figure.text(
        x, 1 - 0.46 / height_in, "\n".join(lines), fontsize=7.5, color=_MUTED, va="top", linespacing=1.5
    )


_ESTIMATOR_WORDS: Final[dict[str, str]] = {
    "range": f" ({_SIGMA} from the mean range)",
    "sd": f" ({_SIGMA} from the mean standard deviation)",
    "pooled": f" ({_SIGMA} pooled over the subgroups)",
    "moving_range": f" ({_SIGMA} from the mean moving range)",
    "p": "",
    "u": "",
}


def _limits_source(picture: ChartPicture) -> str:
    b = picture.baseline
    if b is None:
        return f"Limits from {picture.limits_note}." if picture.limits_note else ""
    unit = f" {picture.unit}" if picture.unit else ""
    sigma = "" if b.sigma is None else f", {_SIGMA} {_num(b.sigma)}{unit}"
    excluded = f", {len(b.excluded)} left out" if b.excluded else ""
    how = _ESTIMATOR_WORDS.get(b.estimator, f" ({_SIGMA} by {b.estimator})")
    return (
        f"Limits from a baseline of the first {b.subgroups} subgroups ({b.used} used{excluded}): "
        f"mean {_num(b.mean)}{unit}{sigma}{how}."
    )


def _empty(ax: Axes, picture: ChartPicture) -> None:
    ax.set_axis_off()
    if picture.baseline is None:
        text = "No points yet: the chart may still be collecting its baseline."
    else:
        text = "No points yet."
    ax.text(0.0, 0.5, text, transform=ax.transAxes, color=_INK, fontsize=8.5, va="center", gid="empty-note")


def _subgroup_axis(shared: Axes, picture: ChartPicture) -> None:
    subgroups = [p.subgroup for s in picture.series.values() for p in s.points]
    subgroups += [g.subgroup for s in picture.series.values() for g in s.signals]
    if not subgroups:
        return
    low, high = min(subgroups), max(subgroups)
    if picture.baseline is not None and picture.baseline.subgroups <= low:
        low = 0
    pad = max(0.5, 0.01 * (high - low))
    shared.set_xlim(low - pad, high + pad)
    from matplotlib.ticker import MaxNLocator  # noqa: PLC0415 - optional dependency

    shared.xaxis.set_major_locator(MaxNLocator(nbins=10, integer=True))


def _values(points: Sequence[PlottedPoint], name: str, sign: float = 1.0) -> FloatArray:
    raw = [getattr(p, name) for p in points]
    return np.asarray([math.nan if v is None else sign * v for v in raw], dtype=np.float64)


def _gid(what: str, key: SeriesKey, *more: str) -> str:
    return "|".join((what, key[0].value, key[1].value, *more))


def _varies(values: FloatArray) -> bool:
    known = values[np.isfinite(values)]
    return bool(known.size > 1 and not np.allclose(known, known[0], rtol=1e-12, atol=0.0))


def _line(ax: Axes, x: FloatArray, y: FloatArray, gid: str, *, stepped: bool, limit: bool) -> None:
    """A limit (dashed) or center line (solid): steps following every point if ``stepped``, else flat."""
    if not np.isfinite(y).any():
        return
    color, width, style = (_LIMITS, 1.0, _LIMIT_DASH) if limit else (_INK, 0.8, "solid")
    if stepped:
        ax.plot(x, y, drawstyle="steps-mid", gid=gid, color=color, lw=width, ls=style, zorder=2)
    else:
        level = float(y[np.isfinite(y)][0])
        ax.plot([x[0] - 0.5, x[-1] + 0.5], [level, level], gid=gid, color=color, lw=width, ls=style, zorder=2)


@dataclass
class _Labels:
    """Values named in the right margin, spread apart so that they never overprint."""

    entries: list[tuple[float, str]] = field(default_factory=list)

    def add(self, y: float, text: str) -> None:
        if math.isfinite(y):
            self.entries.append((y, text))

    def place(self, ax: Axes, axes_height_in: float) -> None:
        low, high = ax.get_ylim()
        gap = 0.13 / axes_height_in
        placed: list[tuple[float, str]] = []
        for y, text in sorted(self.entries):
            if not low <= y <= high:
                continue
            at = (y - low) / (high - low)
            if placed and at - placed[-1][0] < gap:
                at = placed[-1][0] + gap
            placed.append((at, text))
        for at, text in placed:
            ax.text(1.012, at, text, transform=ax.transAxes, va="center", ha="left", fontsize=6.5, color=_INK)


def _time_panel(ax: Axes, picture: ChartPicture, panel: _Panel) -> None:
    labels = _Labels()
    if picture.baseline is not None:
        _baseline_band(ax, picture, panel)
    highest = 0.0
    for key in panel.keys:
        series = picture.series[key]
        sign = -1.0 if key[1] is Statistic.CUSUM_LOWER else 1.0
        points = series.points
        if points:
            x = np.asarray([p.subgroup for p in points], dtype=np.float64)
            values = _values(points, "value", sign)
            center = _values(points, "center", sign)
            lower = _values(points, "lower", sign)
            upper = _values(points, "upper", sign)
            sizes = np.asarray([p.n for p in points], dtype=np.float64)
            stepped = _varies(sizes) or _varies(lower) or _varies(upper)
            highest = max(highest, float(np.nanmax(np.abs(values))))
            if panel.role == "location":
                _zones(ax, picture, key, x, center, lower, upper, stepped)
            if panel.role == "cusum":
                # Each sum runs away from zero (the lower one downward); its decision limit is "upper".
                _line(ax, x, upper, _gid("limit-upper", key), stepped=_varies(upper), limit=True)
                labels.add(_last(upper), f"limit {_num(_last(upper))}")
                if key[1] is Statistic.CUSUM_UPPER or (key[0], Statistic.CUSUM_UPPER) not in panel.keys:
                    _line(ax, x, np.zeros_like(x), _gid("center", key), stepped=False, limit=False)
            else:
                _line(ax, x, center, _gid("center", key), stepped=_varies(center), limit=False)
                _line(ax, x, upper, _gid("limit-upper", key), stepped=stepped, limit=True)
                if not _lower_is_floor(key, lower):
                    _line(ax, x, lower, _gid("limit-lower", key), stepped=stepped, limit=True)
                    labels.add(_last(lower), f"lower {_num(_last(lower))}")
                labels.add(_last(upper), f"upper {_num(_last(upper))}")
                labels.add(_last(center), f"center {_num(_last(center))}")
            ax.plot(
                x,
                values,
                color=_POINTS,
                lw=0.8,
                marker="o",
                ms=2.4,
                mew=0,
                gid=_gid("points", key),
                label=_STATISTIC_WORDS[key[1]].lower(),
                zorder=3,
            )
            _flag_beyond(ax, series, sign)
    if panel.role == "cusum":
        _cusum_scale(ax, picture, panel, highest)
    _ylabel(ax, picture, panel)
    if panel.role == "location" and any(picture.series[k].points for k in panel.keys):
        _zone_key(ax)
    labels.place(ax, _AXES_H_IN[panel.role])


def _last(values: FloatArray) -> float:
    known = values[np.isfinite(values)]
    return float(known[-1]) if known.size else math.nan


def _lower_is_floor(key: SeriesKey, lower: FloatArray) -> bool:
    """A lower limit of zero on a statistic that cannot go below zero is no limit at all: not drawn."""
    return key[1] in _NONNEGATIVE and bool(np.all(np.nan_to_num(lower, nan=0.0) == 0.0))


def _ylabel(ax: Axes, picture: ChartPicture, panel: _Panel) -> None:
    statistic = panel.keys[0][1]
    if panel.role == "cusum":
        ax.set_ylabel(f"{_SIGMA} of the mean")
    elif statistic is Statistic.PROPORTION:
        ax.set_ylabel("proportion")
    elif statistic is Statistic.RATE:
        ax.set_ylabel("per unit")
    elif picture.unit:
        ax.set_ylabel(picture.unit)


def _cusum_scale(ax: Axes, picture: ChartPicture, panel: _Panel, highest: float) -> None:
    """Keep the decision limits readable: sums far beyond them run off the panel, with a note saying so."""
    limits = [p.upper for k in panel.keys for p in picture.series[k].points if p.upper is not None]
    if not limits:
        return
    h = max(limits)
    has_lower = any(k[1] is Statistic.CUSUM_LOWER for k in panel.keys)
    has_upper = any(k[1] is Statistic.CUSUM_UPPER for k in panel.keys)
    reach = min(max(highest * 1.05, 1.3 * h), _CUSUM_CLIP * h)
    ax.set_ylim(-reach if has_lower else -0.1 * h, reach if has_upper else 0.1 * h)
    if highest > reach:
        ax.text(
            0.99,
            0.97,
            f"off the scale: sums up to {_num(highest)} (shown to ±{_num(reach)})",
            transform=ax.transAxes,
            ha="right",
            va="top",
            fontsize=6.5,
            color=_MUTED,
            gid="clipped-note",
        )
    ax.text(0.005, 0.97, "upper sum ↑", transform=ax.transAxes, fontsize=6.5, color=_MUTED, va="top")
    if has_lower:
        ax.text(0.005, 0.03, "lower sum ↓", transform=ax.transAxes, fontsize=6.5, color=_MUTED, va="bottom")


def _zone_key(ax: Axes) -> None:
    from matplotlib.patches import Patch  # noqa: PLC0415 - optional dependency

    handles = [
        Patch(facecolor=_ZONE, alpha=0.4, edgecolor="none", label=f"2{_SIGMA} to the limit"),
        Patch(facecolor=_ZONE, alpha=0.17, edgecolor="none", label=f"1{_SIGMA} to 2{_SIGMA}"),
    ]
    anchor = 1.0 + 1.0 / _AXES_W_IN
    ax.legend(
        handles=handles,
        loc="upper left",
        bbox_to_anchor=(anchor, 1.0),
        borderaxespad=0.0,
        handlelength=1.2,
        title="zones",
        title_fontproperties={"size": 6.5, "weight": "bold"},
        alignment="left",
    )


def _sigma_of_statistic(
    center: FloatArray, lower: FloatArray, upper: FloatArray, limit_sigma: float
) -> FloatArray:
    """The sigma of the plotted statistic at each point, from the upper limit (the lower may be clipped)."""
    from_upper = (upper - center) / limit_sigma
    from_lower = (center - lower) / limit_sigma
    return np.where(np.isfinite(from_upper), from_upper, from_lower)


def _zones(
    ax: Axes,
    picture: ChartPicture,
    key: SeriesKey,
    x: FloatArray,
    center: FloatArray,
    lower: FloatArray,
    upper: FloatArray,
    stepped: bool,
) -> None:
    sigma = _sigma_of_statistic(center, lower, upper, picture.limit_sigma)
    if not np.isfinite(sigma).any():
        return
    floor = np.where(np.isfinite(lower), lower, -np.inf)
    ceiling = np.where(np.isfinite(upper), upper, np.inf)
    if stepped:
        xs: FloatArray = x
    else:
        xs = np.asarray([x[0] - 0.5, x[-1] + 0.5])
        center, sigma, floor, ceiling = (
            np.full(2, _last(a) if np.isfinite(a).any() else a[0]) for a in (center, sigma, floor, ceiling)
        )
    bands = ((1.0, 2.0, 0.17, "zone-1-2"), (2.0, picture.limit_sigma, 0.4, "zone-2-limit"))
    for inner, outer, alpha, name in bands:
        if outer <= inner:
            continue
        for side in (1.0, -1.0):
            a = np.clip(center + side * inner * sigma, floor, ceiling)
            b = np.clip(center + side * outer * sigma, floor, ceiling)
            ax.fill_between(
                xs,
                a,
                b,
                step="mid" if stepped else None,
                facecolor=_ZONE,
                alpha=alpha,
                linewidth=0,
                gid=_gid(name, key, "upper" if side > 0 else "lower"),
                zorder=0.5,
            )


def _flag_beyond(ax: Axes, series: Series, sign: float) -> None:
    """On the chart itself, mark the points beyond a limit (the one rule about a single point)."""
    plotted = {p.subgroup: p.value for p in series.points}
    hits = [s for s in series.signals if s.rule == RuleId.BEYOND_LIMITS.value and s.subgroup in plotted]
    if not hits:
        return
    style = _rule_style(RuleId.BEYOND_LIMITS.value)
    ax.plot(
        [s.subgroup for s in hits],
        [sign * plotted[s.subgroup] for s in hits],
        ls="none",
        marker=style.marker,
        ms=4.6,
        mfc=style.color,
        mec=_INK,
        mew=0.5,
        gid=_gid("flagged", (series.kind, series.statistic), RuleId.BEYOND_LIMITS.value),
        zorder=4,
    )


def _lane_words(panel: _Panel, key: SeriesKey, rule: str, count: int) -> str:
    words = _rule_style(rule).words
    if panel.role == "cusum":
        words = ("upper sum " if key[1] is Statistic.CUSUM_UPPER else "lower sum ") + words
    return f"{words} · {count}"


def _signal_lanes(lane: Axes, picture: ChartPicture, panel: _Panel) -> None:
    """One row per rule that fired, a marker at each subgroup where it fired; the row says which rule."""
    rows = len(panel.lanes)
    lane.set_ylim(rows - 0.5, -0.5)
    lane.set_yticks([])
    lane.spines["left"].set_visible(False)
    lane.tick_params(axis="y", length=0)
    lane.set_ylabel("signals", rotation=0, ha="right", va="center", fontsize=6.5, color=_MUTED)
    for row, (key, rule) in enumerate(panel.lanes):
        hits = [s for s in picture.series[key].signals if s.rule == rule]
        style = _rule_style(rule)
        lane.axhline(row, color=_GUIDE, lw=0.5, zorder=1)
        lane.plot(
            [s.subgroup for s in hits],
            [row] * len(hits),
            ls="none",
            marker=style.marker,
            ms=4.2,
            mfc=style.color if style.filled else "none",
            mec=_INK if style.filled else style.color,
            mew=0.4 if style.filled else 0.9,
            gid=_gid("signals", key, rule),
            label=style.words,
            zorder=3,
        )
        lane.text(
            1.012,
            (rows - 1 - row + 0.5) / rows,
            _lane_words(panel, key, rule, len(hits)),
            transform=lane.transAxes,
            va="center",
            ha="left",
            fontsize=6.5,
            color=_INK,
        )


def _baseline_band(ax: Axes, picture: ChartPicture, panel: _Panel) -> None:
    baseline = picture.baseline
    if baseline is None:
        return
    first = min((p.subgroup for k in panel.keys for p in picture.series[k].points), default=None)
    if first is None or first < baseline.subgroups:
        return
    ax.axvspan(
        -0.5,
        baseline.subgroups - 0.5,
        facecolor="#F4F4F4",
        edgecolor="#B5B5B5",
        hatch="////",
        linewidth=0.0,
        gid="baseline",
        zorder=0,
    )
    if panel.role == "location":
        ax.text(
            baseline.subgroups / 2 - 0.5,
            0.5,
            "baseline",
            transform=ax.get_xaxis_transform(),
            rotation=90,
            ha="center",
            va="center",
            fontsize=6.5,
            color=_MUTED,
            bbox={"facecolor": "#F4F4F4", "edgecolor": "none", "pad": 1.0},
        )


def _distribution(
    figure: Figure, frame: _Frame, picture: ChartPicture, laws: DistributionLaws, bottom: float
) -> None:
    gap = 0.7
    width = (_AXES_W_IN - gap) / 2
    height = _AXES_H_IN["distribution"]
    left = figure.add_axes(frame.rect(_LEFT_IN, bottom, width, height))
    right = figure.add_axes(frame.rect(_LEFT_IN + width + gap, bottom, width, height))
    unit = f" ({picture.unit})" if picture.unit else ""
    left.set_title("Baseline readings and fitted parent")
    readings = picture.histogram_readings()
    if readings is not None and readings.size:
        edges = np.histogram_bin_edges(readings, bins="fd")
        bins = int(np.clip(edges.size - 1, 8, 40))
        left.hist(
            readings,
            bins=bins,
            density=True,
            color=_ZONE,
            alpha=0.5,
            edgecolor="white",
            linewidth=0.4,
            gid="histogram",
            label=f"readings ({readings.size})",
        )
    left.plot(
        laws.parent_x, laws.parent_density, color=_INK, lw=1.2, gid="parent-density", label=laws.parent_name
    )
    left.set_xlabel(f"reading{unit}")
    left.set_ylabel("density")
    _headroom(left)
    left.legend(loc="upper left", **_BOXED_LEGEND)

    what = "Single readings" if laws.subgroup_size == 1 else f"Mean of {laws.subgroup_size}"
    right.set_title(f"{what}: exact law and normal curve")
    right.plot(
        laws.mean_x, laws.mean_density, color=_POINTS, lw=1.4, gid="mean-law", label="exact law of the mean"
    )
    right.plot(
        laws.mean_x,
        laws.normal_density,
        color=_INK,
        lw=1.0,
        ls=(0, (1.2, 1.6)),
        gid="normal-law",
        label="normal curve",
    )
    low, high = float(laws.mean_x.min()), float(laws.mean_x.max())
    shown = [(name, value) for name, value in _last_mean_limits(picture) if low <= value <= high]
    for i, (name, value) in enumerate(shown):
        right.axvline(
            value,
            color=_LIMITS,
            lw=1.0,
            ls=_LIMIT_DASH,
            gid=f"mean-limit-{name}",
            label="control limits" if i == 0 else None,
        )
    right.set_xlabel(f"subgroup mean{unit}")
    _headroom(right)
    right.legend(loc="upper left", **_BOXED_LEGEND)


_BOXED_LEGEND: Final[dict[str, object]] = {
    "frameon": True,
    "facecolor": "white",
    "edgecolor": "none",
    "framealpha": 0.9,
    "borderpad": 0.3,
    "handlelength": 1.6,
}


def _headroom(ax: Axes) -> None:
    """Room above the curves for the legend, so that it never covers them."""
    _, top = ax.get_ylim()
    ax.set_ylim(0.0, top * 1.45)


def _last_mean_limits(picture: ChartPicture) -> list[tuple[str, float]]:
    for key, series in picture.series.items():
        if key[1] in (Statistic.MEAN, Statistic.INDIVIDUAL) and series.points:
            last = series.points[-1]
            return [(n, v) for n, v in (("lower", last.lower), ("upper", last.upper)) if v is not None]
    return []


# ---------------------------------------------------------------- summaries


@dataclass(frozen=True, slots=True)
class PanelSummary:
    """A panel in plain words: its title and a few sentences."""

    title: str
    sentences: tuple[str, ...]


def _range_words(values: FloatArray) -> str:
    known = values[np.isfinite(values)]
    if not known.size:
        return "none"
    low, high = float(known.min()), float(known.max())
    return _num(low) if not _varies(known) else f"{_num(low)} to {_num(high)}"


def _signal_sentence(signals: Sequence[MarkedSignal]) -> str:
    if not signals:
        return "No signals."
    counts = Counter(s.rule for s in signals)
    parts = []
    for rule in sorted(counts, key=_rule_rank):
        sides = Counter(s.side for s in signals if s.rule == rule)
        side_words = ", ".join(f"{c} {side}" for side, c in sorted(sides.items()) if side != "either")
        style = _rule_style(rule)
        extra = f" ({side_words})" if side_words else ""
        times = "once" if counts[rule] == 1 else f"{counts[rule]} times"
        parts.append(f"{rule} fired {times}, {style.sentence}{extra}")
    total = len(signals)
    return f"{total} signal{'s' if total != 1 else ''}: " + "; ".join(parts) + "."


def summarize(picture: ChartPicture) -> list[PanelSummary]:
    """Each panel of the picture in plain sentences: points, limits and signals per rule."""
    summaries: list[PanelSummary] = []
    unit = f" {picture.unit}" if picture.unit else ""
    for panel in _panels(picture):
        if panel.role == "empty":
            summaries.append(PanelSummary(panel.title, ("No points have been charted yet.",)))
            continue
        if panel.role == "distribution" and picture.distribution is not None:
            laws = picture.distribution
            shown = picture.histogram_readings()
            readings = "" if shown is None else f"a histogram of {shown.size} baseline readings with "
            summaries.append(
                PanelSummary(
                    panel.title,
                    (
                        f"Left: {readings}the fitted parent, {laws.parent_name}.",
                        (
                            f"Right: the exact law of the mean of {laws.subgroup_size} readings"
                            f"{f' ({laws.law_method})' if laws.law_method else ''} against "
                            "the normal curve; where they part, normal-theory limits misjudge the "
                            "false-alarm rate."
                        ),
                    ),
                )
            )
            continue
        sentences: list[str] = []
        for key in panel.keys:
            series = picture.series[key]
            points = series.points
            name = (
                _STATISTIC_WORDS[key[1]].lower()
                if panel.role != "cusum"
                else ("upper sums" if key[1] is Statistic.CUSUM_UPPER else "lower sums")
            )
            if points:
                span = _time_span(_point_times(points))
                when = f" ({span})" if span else ""
                sentences.append(
                    f"{len(points)} {name} plotted, "
                    f"subgroups {points[0].subgroup} to {points[-1].subgroup}{when}."
                )
                center, lower, upper = (_values(points, n) for n in ("center", "lower", "upper"))
                if panel.role == "cusum":
                    sentences.append(f"Decision limit {_range_words(upper)} {_SIGMA} of the mean.")
                else:
                    limits_unit = unit if key[1] not in (Statistic.PROPORTION, Statistic.RATE) else ""
                    limit_words = _limit_words(key, lower, upper, limits_unit)
                    zones = (
                        f" at {_num(picture.limit_sigma)}{_SIGMA}, zones shaded at 1{_SIGMA} and 2{_SIGMA}"
                        if panel.role == "location"
                        else ""
                    )
                    sentences.append(f"Center {_range_words(center)}{limits_unit}; {limit_words}{zones}.")
            else:
                sentences.append(f"No {name} in the input (signals only).")
            said = _signal_sentence(series.signals)
            if panel.role == "cusum":
                said = f"{name.capitalize()}: {said[0].lower()}{said[1:]}"
            sentences.append(said)
        summaries.append(PanelSummary(panel.title, tuple(sentences)))
    return summaries


def _limit_words(key: SeriesKey, lower: FloatArray, upper: FloatArray, unit: str) -> str:
    if _varies(lower) or _varies(upper):
        lower_words = "" if _lower_is_floor(key, lower) else f"lower {_range_words(lower)}, "
        return f"limits change from point to point: {lower_words}upper {_range_words(upper)}{unit}"
    if _lower_is_floor(key, lower):
        return f"upper limit {_range_words(upper)}{unit} (the lower limit is 0, not drawn)"
    return f"lower limit {_range_words(lower)}, upper limit {_range_words(upper)}{unit}"


def _point_times(points: Sequence[PlottedPoint]) -> tuple[float, float] | None:
    known = [p.time for p in points if p.time is not None]
    return (min(known), max(known)) if known else None


# ---------------------------------------------------------------- files


def _png_bytes(picture: ChartPicture) -> bytes:
    figure = draw_figure(picture)
    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=DPI, facecolor="white", metadata={"Title": picture.heading})
    return buffer.getvalue()


def render_png(picture: ChartPicture, path: str | Path) -> Path:
    """Write the picture as a PNG of :func:`figure_size_px` pixels; returns the path."""
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    target.write_bytes(_png_bytes(picture))
    return target


_PAGE_STYLE = """
body { font-family: "DejaVu Sans", "Segoe UI", Arial, sans-serif; color: #222; background: #fff;
       margin: 2rem auto; max-width: 62rem; padding: 0 1rem; line-height: 1.45; }
h1 { font-size: 1.5rem; margin: 0 0 .2rem; }
h2 { font-size: 1.05rem; margin: 1.4rem 0 .3rem; }
p.facts { color: #5a5a5a; margin: 0 0 1rem; }
img { max-width: 100%; height: auto; border: 1px solid #ddd; }
dl.rules dt { font-weight: bold; } dl.rules dd { margin: 0 0 .4rem 1.2rem; }
code { font-size: .9em; }
p.advisory { border-left: 4px solid #D55E00; padding: .4rem .8rem; background: #fbf3ee; margin-top: 2rem; }
@media print { body { margin: 0; max-width: none; } img { border: none; } }
"""


def html_page(picture: ChartPicture) -> str:
    """The picture as one self-contained HTML page: inline PNG, summaries, the caution; no network."""
    png = base64.b64encode(_png_bytes(picture)).decode("ascii")
    width, height = figure_size_px(picture)
    esc = html.escape
    facts = [picture.chart]
    span = _time_span(picture.times())
    if span:
        facts.append(span)
    source = _limits_source(picture)
    if source:
        facts.append(source)
    fired = sorted(
        {s.rule for series in picture.series.values() for s in series.signals},
        key=_rule_rank,
    )
    sections = []
    summaries = summarize(picture)
    for summary in summaries:
        items = "".join(f"<li>{esc(s)}</li>" for s in summary.sentences)
        sections.append(f"<section><h2>{esc(summary.title)}</h2><ul>{items}</ul></section>")
    if fired:
        rules = "".join(
            f"<dt>{esc(_rule_style(r).words)} (<code>{esc(r)}</code>)</dt>"
            f"<dd>{esc(_rule_style(r).sentence)}; "
            f"marked {esc(_marker_words(r))}.</dd>"
            for r in fired
        )
        sections.append(f'<section><h2>Rules that fired</h2><dl class="rules">{rules}</dl></section>')
    panels = "; ".join(s.title for s in summaries)
    alt = f"Control charts of {picture.heading}: {panels}. The same facts are written out below."
    return (
        '<!DOCTYPE html>\n<html lang="en">\n<head>\n<meta charset="utf-8">\n'
        '<meta http-equiv="Content-Security-Policy" content="default-src \'none\'; img-src data:; '
        "style-src 'unsafe-inline'\">\n"
        '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
        f"<title>{esc(picture.heading)}</title>\n<style>{_PAGE_STYLE}</style>\n</head>\n<body>\n<main>\n"
        f'<h1>{esc(picture.heading)}</h1>\n<p class="facts">{esc(" · ".join(facts))}</p>\n'
        f'<figure><img src="data:image/png;base64,{png}" width="{width}" height="{height}" '
        f'alt="{esc(alt)}"></figure>\n'
        + "\n".join(sections)
        + f'\n<p class="advisory">{esc(ADVISORY)}</p>\n</main>\n</body>\n</html>\n'
    )


_MARKER_WORDS: Final[dict[str, str]] = {
    "D": "diamond",
    "^": "triangle pointing up",
    "v": "triangle pointing down",
    "s": "square",
    "P": "plus",
    "X": "cross",
    "h": "hexagon",
    "*": "star",
    "o": "circle",
}


def _marker_words(rule: str) -> str:
    style = _rule_style(rule)
    fill = "filled" if style.filled else "open"
    colour = next((name for name, code in OKABE_ITO.items() if code == style.color), "dark")
    return f"with a {fill} {colour} {_MARKER_WORDS.get(style.marker, 'marker')}"


def render_html(picture: ChartPicture, path: str | Path) -> Path:
    """Write the picture as a self-contained HTML page (see :func:`html_page`); returns the path."""
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    target.write_text(html_page(picture), encoding="utf-8")
    return target


# ---------------------------------------------------------------- the command


_EXAMPLES = """\
examples:
  monitor report --config config/demo.yaml --replay signals.jsonl --out report/
  monitor report --config config/demo.yaml --replay signals.jsonl --chart press-2/thickness \\
      --out docs/images --format png
  monitor report --config plant.yaml --store --out /tmp/charts --format both
  monitor report --config config/demo.yaml --replay signals.jsonl --data readings.csv --out report/

The distribution panel (baseline histogram with the fitted parent model; the law of the
subgroup mean against the normal curve) is drawn for charts whose baseline readings are known:
from the store, or from the replayed file given with --data.

One file per chart and format is written to --out, named after the chart id with '/' as '-'
(press-2/thickness -> press-2-thickness.png). The pictures are advisory: statistical evidence
for people, not a safety system.
"""


def add_report_command(
    subparsers: argparse._SubParsersAction[argparse.ArgumentParser],
) -> argparse.ArgumentParser:
    """Register ``report`` on the ``monitor`` command's sub-parsers; returns its parser."""
    report = subparsers.add_parser(
        "report",
        help="draw each chart as a PNG or a self-contained HTML page",
        description=(
            "Draw control-chart pictures for people: points, center lines, limits, zones and every "
            "signal marked by rule, from a replay's JSON lines or from the daemon's database."
        ),
        epilog=_EXAMPLES,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    _report_arguments(report)
    return report


def _report_arguments(parser: argparse.ArgumentParser) -> None:
    parser.add_argument(
        "--config", required=True, metavar="FILE", help="YAML configuration file (titles, units, storage)"
    )
    source = parser.add_mutually_exclusive_group(required=True)
    source.add_argument("--replay", metavar="FILE", help="JSON lines written by 'monitor replay'")
    source.add_argument("--store", action="store_true", help="read the database named in the configuration")
    parser.add_argument("--chart", action="append", metavar="ID", help="draw only this chart (repeatable)")
    parser.add_argument("--out", required=True, metavar="DIR", help="directory for the pictures")
    parser.add_argument(
        "--format", choices=["png", "html", "both"], default="png", help="what to write (default: png)"
    )
    parser.add_argument(
        "--data",
        metavar="FILE",
        help=(
            "with --replay: the CSV or Parquet file the replay ran on; its Phase I baseline "
            "readings feed the distribution panel"
        ),
    )
    parser.add_argument(
        "--distribution",
        action=argparse.BooleanOptionalAction,
        default=True,
        help=(
            "draw the distribution panel (baseline histogram, fitted parent, law of the mean) "
            "where baseline readings are known (default: yes; lognormal and Weibull parents "
            "take seconds per chart)"
        ),
    )
    parser.set_defaults(run=cmd_report)


def file_stem(chart: str) -> str:
    """The file name (without suffix) of a chart's picture.

    Examples:
        >>> file_stem("press-2/thickness")
        'press-2-thickness'
    """
    return chart.replace("/", "-")


def _read_replay(path: Path, config: Config) -> dict[str, ChartPicture]:
    try:
        raw = path.read_bytes()
    except FileNotFoundError:
        raise ReportError(f"{path}: no such file") from None
    except OSError as exc:
        raise ReportError(f"{path}: cannot read: {exc.strerror}") from None
    records: list[Mapping[str, object]] = []
    for line_no, line in enumerate(raw.splitlines(), start=1):
        if not line.strip():
            continue
        try:
            record = orjson.loads(line)
        except orjson.JSONDecodeError:
            raise ReportError(f"{path}:{line_no}: not a JSON line") from None
        if not isinstance(record, dict):
            raise ReportError(f"{path}:{line_no}: not a JSON object")
        records.append(record)
    try:
        return pictures_from_replay(records, config=config)
    except ReportError as exc:
        raise ReportError(f"{path}: {exc}") from None


def _sqlite_file(url: str) -> Path | None:
    if not url.startswith("sqlite") or ":///" not in url:
        return None
    return Path(url.split(":///", 1)[1].split("?", 1)[0])


async def _read_store(
    url: str, charts: Sequence[str] | None, config: Config
) -> tuple[dict[str, ChartPicture], list[str]]:
    """The pictures of ``charts`` (default: every chart stored), and the charts the database holds."""
    from monitor.store import Store  # noqa: PLC0415 - SQLAlchemy loads only for --store

    database = _sqlite_file(url)
    if database is not None and not database.exists():
        raise ReportError(f"no database at {database}: run the daemon first, or draw from a replay")
    store = await Store.open(url, migrate=False)
    try:
        available = sorted(await store.chart_positions())
        pictures = await pictures_from_store(store, available if charts is None else charts, config=config)
    finally:
        await store.close()
    return pictures, available


def cmd_report(args: argparse.Namespace) -> int:
    """Draw the pictures the arguments ask for; print where each went. Errors are one line."""
    try:
        written = _report(args)
    except ConfigProblems as exc:
        print(str(exc), file=sys.stderr)
        return 1
    except MonitorError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 1
    except OSError as exc:
        where = f" {exc.filename}" if exc.filename else ""
        print(f"error: cannot write{where}: {exc.strerror or exc}", file=sys.stderr)
        return 1
    for path in written:
        print(f"wrote {path}")
    return 0


def _report(args: argparse.Namespace) -> list[Path]:
    config_path = Path(args.config)
    config = load_config(config_path)
    wanted: list[str] | None = args.chart
    data: str | None = getattr(args, "data", None)
    if data is not None and not args.replay:
        raise ReportError("--data goes with --replay: the store keeps the baseline readings itself")
    if args.replay:
        pictures = _read_replay(Path(args.replay), config)
        where = args.replay
        available = [chart for chart, picture in pictures.items() if picture.series]
    else:
        url = storage_url(config, config_path)
        pictures, available = asyncio.run(_read_store(url, wanted, config))
        where = "the database"
    if wanted is not None:
        missing = [c for c in wanted if c not in pictures or not pictures[c].series]
        if missing:
            known = ", ".join(available) or "none"
            raise ReportError(f"nothing charted for {', '.join(missing)} in {where} (charts there: {known})")
        pictures = {c: pictures[c] for c in wanted}
    if not pictures:
        raise ReportError(f"no charts in {where}")
    if getattr(args, "distribution", True):
        if data is not None:
            pictures = baseline_readings_from_data(pictures, data, config)
        for chart, picture in pictures.items():
            pictures[chart], note = with_fitted_distribution(picture, _chart_config(config, chart))
            if note is not None:
                print(note, file=sys.stderr)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    formats = ("png", "html") if args.format == "both" else (args.format,)
    written: list[Path] = []
    for chart, picture in pictures.items():
        for suffix in formats:
            target = out / f"{file_stem(chart)}.{suffix}"
            written.append(render_png(picture, target) if suffix == "png" else render_html(picture, target))
    return written


def main(argv: Sequence[str] | None = None) -> int:
    """Run ``report`` on its own (``python -m monitor.report``), until it is wired into ``monitor``."""
    parser = argparse.ArgumentParser(
        prog="python -m monitor.report",
        description="Draw control-chart pictures from a replay or the store. " + ADVISORY,
        epilog=_EXAMPLES.replace("monitor report", "python -m monitor.report"),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    _report_arguments(parser)
    args = parser.parse_args(argv)
    return cmd_report(args)


if __name__ == "__main__":
    sys.exit(main())
