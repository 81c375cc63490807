"""False-alarm budgets of configured charts, and the ``monitor design`` calculations.

A quality engineer decides what the crews will be woken for. For each configured chart this
module works out the in-control average run length (ARL) of every panel under its rules, the
false alarms to expect per day and per shift at the chart's sampling rate, and whether that
passes the configured budget. The ARLs come from :mod:`monitor.spc.arl` (Markov chains and
closed forms) under a normal process; the panels of one chart look at the same data, so the
combined rate (the sum of the panels' rates) is an approximation, said so where printed.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from scipy import special

from monitor.config import ChartConfig
from monitor.spc import ChartKind
from monitor.spc.arl import RunLength, cusum_arl, ewma_arl, shewhart_arl
from monitor.spc.charts._math import range_limits, sd_limits
from monitor.spc.constants import range_cdf

__all__ = ["ChartBudget", "PanelRunLength", "chart_budget", "spread_rate"]

SECONDS_PER_DAY = 86_400.0
SHIFT_HOURS = 8.0


@dataclass(frozen=True, slots=True)
class PanelRunLength:
    """The in-control ARL of one panel of a chart, and how it was obtained."""

    panel: str
    arl: float
    method: str


@dataclass(slots=True)
class ChartBudget:
    """In-control ARLs and expected false alarms of one configured chart."""

    chart: str
    panels: list[PanelRunLength] = field(default_factory=list)
    combined_arl: float | None = None
    subgroups_per_day: float | None = None
    false_alarms_per_day: float | None = None
    false_alarms_per_shift: float | None = None
    warning: str | None = None
    note: str | None = None

    def to_json(self) -> dict[str, object]:
        """As plain data for ``--json``."""
        return {
            "chart": self.chart,
            "panels": [{"panel": p.panel, "arl": p.arl, "method": p.method} for p in self.panels],
            "combined_arl": self.combined_arl,
            "subgroups_per_day": self.subgroups_per_day,
            "false_alarms_per_day": self.false_alarms_per_day,
            "false_alarms_per_shift": self.false_alarms_per_shift,
            "warning": self.warning,
            "note": self.note,
        }


def spread_rate(chart: ChartConfig, n: int) -> float:
    """Per-subgroup probability that the spread panel signals (normal readings)."""
    return 1.0 / _spread_arl(chart, n).arl


def _spread_arl(chart: ChartConfig, n: int) -> PanelRunLength:
    """ARL of a spread panel (range, S or moving range) beyond its limits, normal readings."""
    limit_sigma = chart.limit_sigma
    if ChartKind.XBAR_S in chart.kinds:
        f = sd_limits(n, limit_sigma)
        # (n - 1) S^2 / sigma^2 is chi-square with n - 1 degrees of freedom
        upper = float(special.chdtrc(n - 1, (n - 1) * f.upper**2))
        lower = float(special.chdtr(n - 1, (n - 1) * f.lower**2)) if f.lower > 0 else 0.0
        return PanelRunLength("sd", 1.0 / (upper + lower), "closed form")
    span = chart.moving_range_span if ChartKind.INDIVIDUALS in chart.kinds else n
    f = range_limits(span, limit_sigma)
    rate = (1.0 - range_cdf(f.upper, span)) + (range_cdf(f.lower, span) if f.lower > 0 else 0.0)
    if ChartKind.INDIVIDUALS in chart.kinds:
        return PanelRunLength("moving_range", 1.0 / rate, "per-point rate; consecutive moving ranges overlap")
    return PanelRunLength("range", 1.0 / rate, "numerical integration")


def chart_budget(chart: ChartConfig, *, budget_per_day: float | None = None) -> ChartBudget:
    """ARLs of every panel of ``chart`` and its expected false alarms (normal in-control process).

    Examples:
        >>> from monitor.config import load_config_text
        >>> text = '''charts:
        ...   - id: a
        ...     subgroup: {size: 5}
        ...     kinds: [xbar_r]
        ...     limits: {mean: 0, sigma: 1}
        ...     rules: none
        ...     readings_every: 60s'''
        >>> budget = chart_budget(load_config_text(text).charts[0])
        >>> round(budget.panels[0].arl, 1), round(budget.subgroups_per_day)
        (370.4, 288)
    """
    budget = ChartBudget(chart=chart.id)
    kinds = set(chart.kinds)
    size = chart.subgroup.size or chart.subgroup.min_size
    if kinds & {ChartKind.P, ChartKind.U}:
        budget.note = "p and u charts: the run length depends on the units inspected per subgroup"
    else:
        location = next(
            (k for k in chart.kinds if k in (ChartKind.XBAR_R, ChartKind.XBAR_S, ChartKind.INDIVIDUALS)), None
        )
        if location is not None:
            rules = chart.rule_objects()
            result: RunLength = shewhart_arl(rules, limit_sigma=chart.limit_sigma)
            name = "individual" if location is ChartKind.INDIVIDUALS else "mean"
            detail = ", ".join(r.id.value for r in rules)
            budget.panels.append(PanelRunLength(f"{name} ({detail})", result.arl, result.method))
            if size >= 2 or location is ChartKind.INDIVIDUALS:
                budget.panels.append(_spread_arl(chart, max(size, 2)))
        if ChartKind.EWMA in kinds:
            e = chart.ewma
            result = ewma_arl(
                e.smoothing, e.width, time_varying_limits=True, fast_initial_response=e.fast_initial_response
            )
            budget.panels.append(PanelRunLength("ewma", result.arl, result.method))
        if ChartKind.CUSUM in kinds:
            c = chart.cusum
            result = cusum_arl(c.k, c.h, head_start=c.head_start)
            budget.panels.append(PanelRunLength("cusum", result.arl, result.method))
        rate = sum(1.0 / p.arl for p in budget.panels)
        budget.combined_arl = 1.0 / rate if rate > 0 else math.inf
    if chart.subgroup.window is not None:
        budget.subgroups_per_day = SECONDS_PER_DAY / chart.subgroup.window
    elif chart.readings_every:
        budget.subgroups_per_day = SECONDS_PER_DAY / (chart.readings_every * (chart.subgroup.size or 1))
    if budget.subgroups_per_day is not None and budget.combined_arl:
        budget.false_alarms_per_day = budget.subgroups_per_day / budget.combined_arl
        budget.false_alarms_per_shift = budget.false_alarms_per_day * SHIFT_HOURS / 24.0
        if budget_per_day is not None and budget.false_alarms_per_day > budget_per_day:
            budget.warning = (
                f"about {budget.false_alarms_per_day:.2g} false alarms a day expected, over the budget "
                f"of {budget_per_day:g}: widen the limits, drop rules or sample less often"
            )
    elif budget.combined_arl and budget.note is None:
        budget.note = "set readings_every (or use a time window) to get false alarms per day"
    return budget
