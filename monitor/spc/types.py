"""Small shared types of the core: JSON state, statistic and chart names."""

from __future__ import annotations

from enum import StrEnum
from typing import TypeAlias

__all__ = ["ChartKind", "JSONValue", "State", "Statistic"]

JSONValue: TypeAlias = str | int | float | bool | list["JSONValue"] | dict[str, "JSONValue"] | None
State: TypeAlias = dict[str, JSONValue]
"""A plain JSON-serialisable snapshot of an object's parameters and state."""


class ChartKind(StrEnum):
    """The chart kinds the core knows."""

    XBAR_R = "xbar_r"
    XBAR_S = "xbar_s"
    INDIVIDUALS = "individuals_mr"
    EWMA = "ewma"
    CUSUM = "cusum"
    P = "p"
    U = "u"


class Statistic(StrEnum):
    """A plotted statistic: what one point of one chart panel shows."""

    MEAN = "mean"
    RANGE = "range"
    SD = "sd"
    INDIVIDUAL = "individual"
    MOVING_RANGE = "moving_range"
    EWMA = "ewma"
    CUSUM_UPPER = "cusum_upper"
    CUSUM_LOWER = "cusum_lower"
    PROPORTION = "proportion"
    RATE = "rate"
