"""The statistical core: control-chart math as a pure library (numpy and scipy only, no I/O).

Readings become subgroups (:mod:`~monitor.spc.subgroups`), subgroups feed charts
(:mod:`~monitor.spc.charts`) whose rules (:mod:`~monitor.spc.rules`) raise signals
(:mod:`~monitor.spc.signals`); limits come from standard values or a Phase I baseline
(:mod:`~monitor.spc.limits`); a :class:`ChartSet` runs every configured chart of one
characteristic. Every object snapshots to plain data and restores exactly.

Examples:
    >>> round(constants(5).A2, 3)
    0.577
"""

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
from monitor.spc.chartset import (
    BaselinePlan,
    ChartSet,
    ChartSpec,
    CusumSettings,
    EwmaSettings,
    SetResult,
)
from monitor.spc.constants import ChartConstants, constants
from monitor.spc.errors import ConfigError, MonitorError, NotEnoughData, ReadingError, StateError
from monitor.spc.limits import (
    AttributeKind,
    Exclusion,
    PhaseOneEstimate,
    ProcessParameters,
    SigmaEstimator,
    estimate_sigma,
    phase_one,
    phase_one_attribute,
)
from monitor.spc.pvalues import PValue, p_value, pattern_probability
from monitor.spc.rules import PRESETS, Rule, RuleHit, RuleSet, nelson, rule_preset, western_electric
from monitor.spc.signals import RuleId, Side, Signal
from monitor.spc.subgroups import (
    CountSubgrouper,
    Reading,
    Subgroup,
    SubgroupBatch,
    WindowSubgrouper,
)
from monitor.spc.types import ChartKind, JSONValue, State, Statistic

__all__ = [
    "PRESETS",
    "AttributeKind",
    "BaselinePlan",
    "BatchResult",
    "Chart",
    "ChartConstants",
    "ChartKind",
    "ChartSet",
    "ChartSpec",
    "ConfigError",
    "CountSubgrouper",
    "CusumChart",
    "CusumSettings",
    "EwmaChart",
    "EwmaSettings",
    "Exclusion",
    "IndividualsChart",
    "JSONValue",
    "MonitorError",
    "NotEnoughData",
    "PChart",
    "PValue",
    "PhaseOneEstimate",
    "Point",
    "ProcessParameters",
    "Reading",
    "ReadingError",
    "Rule",
    "RuleHit",
    "RuleId",
    "RuleSet",
    "SetResult",
    "Side",
    "SigmaEstimator",
    "Signal",
    "State",
    "StateError",
    "Statistic",
    "Subgroup",
    "SubgroupBatch",
    "Trace",
    "UChart",
    "WindowSubgrouper",
    "XbarRChart",
    "XbarSChart",
    "constants",
    "estimate_sigma",
    "nelson",
    "p_value",
    "pattern_probability",
    "phase_one",
    "phase_one_attribute",
    "rule_preset",
    "western_electric",
]
