"""The formulas every chart shares, written once for one subgroup and once for arrays.

The two forms perform the same floating-point operations in the same order, so the
streaming and the batch paths of a chart give bit-identical results: sums run left to
right over a subgroup's readings in both forms, never pairwise.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from numpy.typing import NDArray

from monitor.spc.constants import constants
from monitor.spc.subgroups import SubgroupBatch

__all__ = [
    "SpreadLimits",
    "mean_of",
    "range_limits",
    "range_of",
    "row_means",
    "row_ranges",
    "row_sds",
    "row_totals",
    "sd_limits",
    "sd_of",
    "total_of",
]


def total_of(values: Sequence[float]) -> float:
    """Sum of values, left to right."""
    total = 0.0
    for value in values:
        total += value
    return total


def mean_of(values: Sequence[float]) -> float:
    """Mean of a subgroup (left-to-right sum divided by n)."""
    return total_of(values) / len(values)


def range_of(values: Sequence[float]) -> float:
    """Range of a subgroup."""
    return max(values) - min(values)


def sd_of(values: Sequence[float], mean: float) -> float:
    """Sample standard deviation (divisor n - 1) around a known subgroup mean."""
    squares = 0.0
    for value in values:
        deviation = value - mean
        squares += deviation * deviation
    return math.sqrt(squares / (len(values) - 1))


def row_totals(values: NDArray[np.float64]) -> NDArray[np.float64]:
    """Left-to-right row sums of a zero-padded batch, column by column."""
    totals = np.zeros(values.shape[0])
    for column in range(values.shape[1]):
        totals += values[:, column]
    return totals


def row_means(batch: SubgroupBatch) -> NDArray[np.float64]:
    """Mean of every subgroup of a batch (shared by the charts of a set through the cache)."""
    cached = batch.cached("mean")
    if cached is not None:
        return cached
    return batch.remember("mean", row_totals(batch.values) / batch.sizes)


def row_ranges(batch: SubgroupBatch) -> NDArray[np.float64]:
    """Range of every subgroup of a batch."""
    cached = batch.cached("range")
    if cached is not None:
        return cached
    values = batch.values
    if batch.uniform:
        # column by column: much faster than a reduction along short rows
        high = values[:, 0].copy()
        low = values[:, 0].copy()
        for column in range(1, values.shape[1]):
            np.maximum(high, values[:, column], out=high)
            np.minimum(low, values[:, column], out=low)
        ranges = high - low
    else:
        mask = batch.mask
        ranges = np.where(mask, values, -np.inf).max(axis=1) - np.where(mask, values, np.inf).min(axis=1)
    return batch.remember("range", ranges)


def row_sds(batch: SubgroupBatch) -> NDArray[np.float64]:
    """Sample standard deviation of every subgroup of a batch (NaN where n = 1)."""
    cached = batch.cached("sd")
    if cached is not None:
        return cached
    means = row_means(batch)
    squares = np.zeros(len(batch))
    uniform = batch.uniform
    for column in range(batch.values.shape[1]):
        deviation = batch.values[:, column] - means
        if not uniform:
            deviation = np.where(column < batch.sizes, deviation, 0.0)
        squares += deviation * deviation
    with np.errstate(divide="ignore", invalid="ignore"):
        sds = np.sqrt(squares / (batch.sizes - 1))
    return batch.remember("sd", sds)


@dataclass(frozen=True, slots=True)
class SpreadLimits:
    """Center and limits of a spread statistic as multiples of the process sigma."""

    center: float
    lower: float
    upper: float


@lru_cache(maxsize=4096)
def range_limits(n: int, limit_sigma: float) -> SpreadLimits:
    """Range chart factors for subgroups of n: d2, max(0, d2 - L d3), d2 + L d3."""
    k = constants(n)
    return SpreadLimits(k.d2, max(0.0, k.d2 - limit_sigma * k.d3), k.d2 + limit_sigma * k.d3)


@lru_cache(maxsize=4096)
def sd_limits(n: int, limit_sigma: float) -> SpreadLimits:
    """S chart factors for subgroups of n: c4 and c4 -/+ L sqrt(1 - c4^2), floored at 0."""
    k = constants(n)
    spread = limit_sigma * math.sqrt(1.0 - k.c4 * k.c4)
    return SpreadLimits(k.c4, max(0.0, k.c4 - spread), k.c4 + spread)
