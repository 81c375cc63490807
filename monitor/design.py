"""False-alarm budgets of configured charts, and the ``monitor design`` calculations.

A quality engineer decides what the crews will be woken for. For each configured chart this
module works out the in-control average run length (ARL) of every panel under its rules, the
false alarms to expect per day and per shift at the chart's sampling rate, and whether that
passes the configured budget. The ARLs come from :mod:`monitor.spc.arl` (Markov chains and
closed forms) under the chart's parent model (normal by default; a fixed parent through the
exact law of the subgroup mean; spread panels under normal readings); the panels of one
chart look at the same data, so the combined rate (the sum of the panels' rates) is an
approximation, said so where printed.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

from scipy import special

from monitor.config import ChartConfig
from monitor.spc import ChartKind
from monitor.spc.arl import RunLength, ZCdf, cusum_arl, ewma_arl, normal_cdf, shewhart_arl
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
    parent: str = "normal"
    """The in-control model the ARLs were computed under."""

    def to_json(self) -> dict[str, object]:
        """As plain data for ``--json``."""
        return {
            "chart": self.chart,
            "parent": self.parent,
            "panels": [{"panel": p.panel, "arl": p.arl, "method": p.method} for p in self.panels],
            "combined_arl": self.combined_arl,
            "subgroups_per_day": self.subgroups_per_day,
            "false_alarms_per_day": self.false_alarms_per_day,
            "false_alarms_per_shift": self.false_alarms_per_shift,
            "warning": self.warning,
            "note": self.note,
        }


def _point_law(chart: ChartConfig, n: int) -> tuple[ZCdf, str]:
    """The law of the standardized subgroup mean the chart will see, and the model's name.

    A fixed parent gives the exact law of the mean of ``n`` readings, standardized by the
    chart's standard values (or the parent's own mean and sd when the limits come from a
    baseline). A parent fitted at run time is not known yet: normal, said so.
    """
    if chart.parent.strip().lower() == "normal" or chart.kinds[0] in (ChartKind.P, ChartKind.U):
        return normal_cdf, "normal"
    choice = chart.parent_choice()
    if choice.parent is None:
        return normal_cdf, f"normal ({chart.parent} is fitted to the baseline at run time)"
    from monitor.spc.laws import standardized_mean_cdf  # noqa: PLC0415 - only for charts with a parent

    parent, limits = choice.parent, chart.limits
    cdf = standardized_mean_cdf(parent, n, mean=limits.mean, sd=limits.sigma)
    return cdf, parent.describe() + (
        " (probability limits on the mean panel)" if chart.probability_limits else ""
    )


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
    cdf, budget.parent = _point_law(chart, size)
    if kinds & {ChartKind.P, ChartKind.U}:
        budget.note = "p and u charts: the run length depends on the units inspected per subgroup"
    else:
        location = next(
            (k for k in chart.kinds if k in (ChartKind.XBAR_R, ChartKind.XBAR_S, ChartKind.INDIVIDUALS)), None
        )
        if location is not None:
            rules = chart.rule_objects()
            result: RunLength = shewhart_arl(
                rules, limit_sigma=chart.limit_sigma, cdf=normal_cdf if chart.probability_limits else cdf
            )
            name = "individual" if location is ChartKind.INDIVIDUALS else "mean"
            detail = ", ".join(r.id.value for r in rules)
            budget.panels.append(PanelRunLength(f"{name} ({detail})", result.arl, result.method))
            if size >= 2 or location is ChartKind.INDIVIDUALS:
                budget.panels.append(_spread_arl(chart, max(size, 2)))
        if ChartKind.EWMA in kinds:
            e = chart.ewma
            result = ewma_arl(
                e.smoothing,
                e.width,
                time_varying_limits=True,
                fast_initial_response=e.fast_initial_response,
                cdf=cdf,
            )
            budget.panels.append(PanelRunLength("ewma", result.arl, result.method))
        if ChartKind.CUSUM in kinds:
            c = chart.cusum
            result = cusum_arl(c.k, c.h, head_start=c.head_start, cdf=cdf)
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


# ---------------------------------------------------------------- tails and probability limits


def tail_report(parent_text: str, n: int, at: float) -> dict[str, object]:
    """P(mean of n >= at) under a parent, the lower tail, and what normal theory would say.

    Examples:
        >>> out = tail_report("triangular:low=0,mode=16,high=32", 25, 18.0)
        >>> round(out["p_value"], 4), round(out["normal_approx"], 4), out["method"]
        (0.063, 0.0629, 'closed form')
    """
    from monitor.spc.laws import law_of_mean  # noqa: PLC0415 - the laws load only when asked
    from monitor.spc.parents import parse_parent  # noqa: PLC0415

    parent = parse_parent(parent_text)
    law = law_of_mean(parent, n)
    spread = parent.sd() / math.sqrt(n)
    z = (at - parent.mean()) / spread
    return {
        "parent": parent.describe(),
        "n": n,
        "at": at,
        "p_value": law.tail(at, upper=True),
        "lower_tail": law.tail(at, upper=False),
        "normal_approx": float(special.ndtr(-z)),
        "normal_lower_tail": float(special.ndtr(z)),
        "z": z,
        "method": law.method,
        "error_bound": law.error_bound,
        "tail_floor": getattr(law, "tail_floor", 0.0),
        "detail": law.detail,
        "mean": parent.mean(),
        "sd_of_mean": spread,
    }


def limits_report(
    parent_text: str,
    n: int,
    *,
    limit_sigma: float = 3.0,
    lower_tail: float = 0.00135,
    upper_tail: float = 0.00135,
) -> dict[str, object]:
    """The true false-alarm rate of normal-theory limits for the mean under a parent.

    With it, the probability limits (exact quantiles of the mean) that give the wanted tails.

    Examples:
        >>> out = limits_report("exponential:mean=1", 4)
        >>> round(out["false_alarm_above"], 5), out["false_alarm_below"]
        (0.01034, 0.0)
        >>> round(out["probability_limits"]["upper"], 3)  # gamma(4, 1/4) upper 0.00135 point
        3.17
    """
    from monitor.spc.laws import law_of_mean, probability_limits, true_false_alarm_rate  # noqa: PLC0415
    from monitor.spc.parents import parse_parent  # noqa: PLC0415

    parent = parse_parent(parent_text)
    law = law_of_mean(parent, n)
    below, above = true_false_alarm_rate(parent, n, limit_sigma=limit_sigma)
    half = limit_sigma * parent.sd() / math.sqrt(n)
    nominal = float(special.ndtr(-limit_sigma))
    low, high = probability_limits(law, lower_tail=lower_tail, upper_tail=upper_tail)
    total = below + above
    return {
        "parent": parent.describe(),
        "n": n,
        "limit_sigma": limit_sigma,
        "normal_limits": {"lower": parent.mean() - half, "upper": parent.mean() + half},
        "false_alarm_below": below,
        "false_alarm_above": above,
        "false_alarm_rate": total,
        "nominal_each_side": nominal,
        "ratio_to_nominal": total / (2.0 * nominal),
        "arl_normal_limits": 1.0 / total if total > 0 else math.inf,
        "arl_nominal": 1.0 / (2.0 * nominal),
        "probability_limits": {
            "lower": low,
            "upper": high,
            "lower_tail": lower_tail,
            "upper_tail": upper_tail,
        },
        "method": law.method,
        "error_bound": law.error_bound,
        "detail": law.detail,
    }
