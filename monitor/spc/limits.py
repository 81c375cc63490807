"""Process parameters for the charts: standard values, or a Phase I estimate from a baseline.

Charts are judged against the in-control process mean and sigma of single readings
(:class:`ProcessParameters`). Those come either from standard values (a target and a known
sigma) or from a baseline of subgroups believed in control, with sigma estimated by

* ``range``: the mean of R_i / d2(n_i) (R-bar / d2 for a constant n);
* ``sd``: the mean of S_i / c4(n_i) (S-bar / c4);
* ``pooled``: sqrt(sum (n_i - 1) S_i^2 / sum (n_i - 1)) / c4(sum (n_i - 1) + 1);
* ``moving_range``: MR-bar / d2(2), for one reading per subgroup.

The mean is the grand mean of all baseline readings. Optionally, subgroups whose mean or
spread fall beyond the trial limits are excluded and the estimate repeated, up to a cap on
the rounds and on the share excluded; the result reports every exclusion.

Examples:
    >>> rows = [[10.1, 9.8, 10.3], [9.9, 10.0, 10.2], [10.4, 9.7, 10.0], [9.6, 10.1, 9.9]]
    >>> est = phase_one(SubgroupBatch.from_rows(rows), estimator=SigmaEstimator.RANGE)
    >>> round(est.parameters.mean, 4), round(est.parameters.sigma, 4), est.excluded
    (10.0, 0.2954, ())
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from enum import StrEnum
from typing import Self

import numpy as np
from numpy.typing import NDArray

from monitor.spc._state import (
    check_header,
    get_bool,
    get_float,
    get_int,
    get_optional_float,
    get_state,
    get_state_list,
    get_str,
    header,
)
from monitor.spc.charts._math import (
    range_limits,
    row_means,
    row_ranges,
    row_sds,
    row_totals,
    sd_limits,
)
from monitor.spc.constants import c4, d2
from monitor.spc.errors import ConfigError, NotEnoughData, ReadingError
from monitor.spc.subgroups import SubgroupBatch
from monitor.spc.types import State, Statistic

__all__ = [
    "AttributeKind",
    "Exclusion",
    "PhaseOneEstimate",
    "ProcessParameters",
    "SigmaEstimator",
    "estimate_sigma",
    "phase_one",
    "phase_one_attribute",
]


class SigmaEstimator(StrEnum):
    """How a baseline's sigma of single readings is estimated."""

    RANGE = "range"
    SD = "sd"
    POOLED = "pooled"
    MOVING_RANGE = "moving_range"


class AttributeKind(StrEnum):
    """Which attribute statistic a baseline estimates."""

    P = "p"
    U = "u"


@dataclass(frozen=True, slots=True)
class ProcessParameters:
    """In-control parameters a chart is judged against.

    Attributes:
        mean: process mean of single readings (for p and u charts: p0 or u0).
        sigma: process sigma of single readings (None for p and u charts).
        source: ``standard`` (given values) or ``baseline`` (Phase I estimate).
    """

    mean: float
    sigma: float | None
    source: str = "standard"

    def __post_init__(self) -> None:
        if not math.isfinite(self.mean):
            raise ConfigError(f"process mean must be finite, got {self.mean!r}")
        if self.sigma is not None and not (math.isfinite(self.sigma) and self.sigma > 0):
            raise ConfigError(f"process sigma must be a positive number, got {self.sigma!r}")

    def require_sigma(self) -> float:
        """Sigma, or an error for charts that need it."""
        if self.sigma is None:
            raise ConfigError("this chart needs a process sigma; give one or estimate it from a baseline")
        return self.sigma

    def to_state(self) -> State:
        """As plain data."""
        return {"mean": self.mean, "sigma": self.sigma, "source": self.source}

    @classmethod
    def from_state(cls, state: State) -> Self:
        """Rebuild from :meth:`to_state`."""
        return cls(get_float(state, "mean"), get_optional_float(state, "sigma"), get_str(state, "source"))


@dataclass(frozen=True, slots=True)
class Exclusion:
    """A baseline subgroup left out of the estimate, and why."""

    subgroup: int
    statistic: Statistic
    value: float
    lower: float
    upper: float
    round: int

    def to_state(self) -> State:
        """As plain data."""
        return {
            "subgroup": self.subgroup,
            "statistic": self.statistic.value,
            "value": self.value,
            "lower": self.lower,
            "upper": self.upper,
            "round": self.round,
        }

    @classmethod
    def from_state(cls, state: State) -> Self:
        """Rebuild from :meth:`to_state`."""
        return cls(
            subgroup=get_int(state, "subgroup"),
            statistic=Statistic(get_str(state, "statistic")),
            value=get_float(state, "value"),
            lower=get_float(state, "lower"),
            upper=get_float(state, "upper"),
            round=get_int(state, "round"),
        )


@dataclass(frozen=True, slots=True)
class PhaseOneEstimate:
    """The outcome of a Phase I estimation.

    Attributes:
        parameters: the estimated mean and sigma (source ``baseline``).
        estimator: how sigma was estimated (``p``/``u`` for attribute baselines).
        subgroups: baseline subgroups offered.
        used: subgroups kept in the final estimate.
        excluded: subgroups left out, in the order found.
        rounds: estimation rounds run (at most ``max_rounds``; a last check that only decides
            ``settled`` is not counted).
        settled: False when the caps stopped the exclusion before it settled.
    """

    parameters: ProcessParameters
    estimator: str
    subgroups: int
    used: int
    excluded: tuple[Exclusion, ...]
    rounds: int
    settled: bool

    def to_state(self) -> State:
        """As plain data."""
        state = header("phase_one_estimate", 1)
        state.update(
            parameters=self.parameters.to_state(),
            estimator=self.estimator,
            subgroups=self.subgroups,
            used=self.used,
            excluded=[e.to_state() for e in self.excluded],
            rounds=self.rounds,
            settled=self.settled,
        )
        return state

    @classmethod
    def from_state(cls, state: State) -> Self:
        """Rebuild from :meth:`to_state`."""
        check_header(state, "phase_one_estimate", 1)
        return cls(
            parameters=ProcessParameters.from_state(get_state(state, "parameters")),
            estimator=get_str(state, "estimator"),
            subgroups=get_int(state, "subgroups"),
            used=get_int(state, "used"),
            excluded=tuple(Exclusion.from_state(e) for e in get_state_list(state, "excluded")),
            rounds=get_int(state, "rounds"),
            settled=get_bool(state, "settled"),
        )


def _grand_mean(batch: SubgroupBatch, keep: NDArray[np.bool_]) -> float:
    return float(row_totals(batch.values)[keep].sum() / batch.sizes[keep].sum())


def _moving_ranges(values: NDArray[np.float64], keep: NDArray[np.bool_]) -> NDArray[np.float64]:
    """Moving ranges of consecutive readings; those touching an excluded reading are dropped."""
    both = keep[1:] & keep[:-1]
    return np.abs(np.diff(values))[both]


def estimate_sigma(
    batch: SubgroupBatch, estimator: SigmaEstimator, keep: NDArray[np.bool_] | None = None
) -> float:
    """Sigma of single readings from the kept subgroups of a baseline.

    Examples:
        >>> batch = SubgroupBatch.from_rows([[1.0, 3.0], [2.0, 2.5]])
        >>> round(estimate_sigma(batch, SigmaEstimator.RANGE), 6)  # mean of (2, 0.5) / d2(2)
        1.107784
    """
    keep = np.ones(len(batch), dtype=bool) if keep is None else keep
    sizes = batch.sizes[keep]
    if estimator is SigmaEstimator.MOVING_RANGE:
        if int(batch.sizes.max(initial=1)) != 1:
            raise ConfigError(
                "the moving_range estimator needs one reading per subgroup; use range, sd or pooled"
            )
        ranges = _moving_ranges(batch.values[:, 0], keep)
        if ranges.shape[0] < 1:
            raise NotEnoughData(
                "a moving-range sigma estimate",
                needed=2,
                have=int(keep.sum()),
                unit="consecutive readings",
            )
        return float(ranges.mean() / d2(2))
    if sizes.shape[0] < 1 or int(sizes.min()) < 2:
        raise ConfigError(
            f"the {estimator.value} estimator needs subgroups of at least 2 readings; "
            "use moving_range for single readings"
        )
    distinct = np.unique(sizes)
    if estimator is SigmaEstimator.RANGE:
        factors = np.array([d2(int(n)) for n in distinct])[np.searchsorted(distinct, sizes)]
        return float((row_ranges(batch)[keep] / factors).mean())
    sds = row_sds(batch)[keep]
    if estimator is SigmaEstimator.SD:
        factors = np.array([c4(int(n)) for n in distinct])[np.searchsorted(distinct, sizes)]
        return float((sds / factors).mean())
    degrees = sizes - 1
    total = int(degrees.sum())
    pooled = math.sqrt(float((degrees * sds * sds).sum()) / total)
    return pooled / c4(total + 1)


def _spread_check(
    batch: SubgroupBatch, estimator: SigmaEstimator, sigma: float, limit_sigma: float
) -> tuple[Statistic, NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """Spread statistic of every subgroup with its limits under a trial sigma."""
    if estimator is SigmaEstimator.MOVING_RANGE:
        values = batch.values[:, 0]
        moving = np.concatenate([[0.0], np.abs(np.diff(values))])
        f = range_limits(2, limit_sigma)
        m = len(batch)
        return (
            Statistic.MOVING_RANGE,
            moving,
            np.full(m, f.lower * sigma),
            np.full(m, f.upper * sigma),
        )
    if estimator is SigmaEstimator.RANGE:
        statistic, values, table = Statistic.RANGE, row_ranges(batch), range_limits
    else:
        statistic, values, table = Statistic.SD, row_sds(batch), sd_limits
    lower = np.array([table(int(n), limit_sigma).lower for n in batch.sizes]) * sigma
    upper = np.array([table(int(n), limit_sigma).upper for n in batch.sizes]) * sigma
    return statistic, values, lower, upper


def phase_one(
    batch: SubgroupBatch,
    *,
    estimator: SigmaEstimator,
    limit_sigma: float = 3.0,
    exclude_out_of_control: bool = True,
    max_rounds: int = 10,
    max_excluded_share: float = 0.25,
    first_index: int = 0,
) -> PhaseOneEstimate:
    """Estimate the process mean and sigma from a baseline, optionally excluding outliers.

    In each round the trial limits come from the subgroups still kept; a kept subgroup whose
    mean or spread lies beyond its trial limits is excluded (for single readings, a moving
    range beyond its limit excludes its later reading unless the earlier one is itself out).
    The rounds stop when nothing new is excluded. When a further round would still exclude
    something after ``max_rounds`` rounds, or would push the excluded share past
    ``max_excluded_share``, its exclusions are not made and ``settled`` is False.

    Args:
        batch: the baseline subgroups.
        estimator: how to estimate sigma.
        limit_sigma: trial limits at this many sigma.
        exclude_out_of_control: run the exclusion rounds at all.
        max_rounds: most exclusion rounds.
        max_excluded_share: most of the baseline that may be excluded (0 to 1).
        first_index: index of the first baseline subgroup, for the report.
    """
    m = len(batch)
    needed = 2
    if m < needed:
        raise NotEnoughData("a Phase I estimate", needed=needed, have=m, unit="subgroups")
    if not 0 <= max_excluded_share < 1:
        raise ConfigError(f"max_excluded_share must be at least 0 and below 1, got {max_excluded_share!r}")
    keep = np.ones(m, dtype=bool)
    excluded: list[Exclusion] = []
    means = row_means(batch)
    rounds, settled = 0, True
    mean, sigma = _grand_mean(batch, keep), estimate_sigma(batch, estimator, keep)
    while exclude_out_of_control:
        rounds += 1
        half = limit_sigma * sigma / np.sqrt(batch.sizes)
        mean_out = keep & ((means > mean + half) | (means < mean - half))
        statistic, spread, low, high = _spread_check(batch, estimator, sigma, limit_sigma)
        spread_out = keep & ~mean_out & ((spread > high) | (spread < low))
        if estimator is SigmaEstimator.MOVING_RANGE:
            # A moving range spans a reading and the one before: it adds nothing when that
            # earlier reading is itself beyond its limits or already excluded.
            earlier_fine = np.concatenate([[False], keep[:-1] & ~mean_out[:-1]])
            spread_out &= earlier_fine
        new = mean_out | spread_out
        if not new.any():
            break
        too_many = (m - int(keep.sum()) + int(new.sum())) > max_excluded_share * m
        if rounds > max_rounds or too_many or int((keep & ~new).sum()) < needed:
            settled = False
            break
        for pos in np.flatnonzero(new).tolist():
            if mean_out[pos]:
                found = Exclusion(
                    first_index + pos,
                    Statistic.MEAN if estimator is not SigmaEstimator.MOVING_RANGE else Statistic.INDIVIDUAL,
                    float(means[pos]),
                    float(mean - half[pos]),
                    float(mean + half[pos]),
                    rounds,
                )
            else:
                found = Exclusion(
                    first_index + pos,
                    statistic,
                    float(spread[pos]),
                    float(low[pos]),
                    float(high[pos]),
                    rounds,
                )
            excluded.append(found)
        keep &= ~new
        mean, sigma = _grand_mean(batch, keep), estimate_sigma(batch, estimator, keep)
    return PhaseOneEstimate(
        parameters=ProcessParameters(mean, sigma, "baseline"),
        estimator=estimator.value,
        subgroups=m,
        used=int(keep.sum()),
        excluded=tuple(excluded),
        rounds=min(rounds, max_rounds),
        settled=settled,
    )


def phase_one_attribute(
    batch: SubgroupBatch,
    *,
    kind: AttributeKind,
    limit_sigma: float = 3.0,
    exclude_out_of_control: bool = True,
    max_rounds: int = 10,
    max_excluded_share: float = 0.25,
    first_index: int = 0,
) -> PhaseOneEstimate:
    """Estimate p0 (total rejects / total inspected) or u0 from a baseline of counts.

    Exclusion works as in :func:`phase_one`, on the proportion or rate against its limits.
    """
    m = len(batch)
    if m < 2:
        raise NotEnoughData("a Phase I estimate", needed=2, have=m, unit="subgroups")
    counts = row_totals(batch.values)
    exposure = (
        batch.sizes.astype(np.float64)
        if batch.exposures is None
        else row_totals(np.where(batch.mask, batch.exposures, 0.0))
    )
    rates = counts / exposure
    keep = np.ones(m, dtype=bool)
    excluded: list[Exclusion] = []
    statistic = Statistic.PROPORTION if kind is AttributeKind.P else Statistic.RATE
    rounds, settled = 0, True

    def center_of(mask: NDArray[np.bool_]) -> float:
        return float(counts[mask].sum() / exposure[mask].sum())

    center = center_of(keep)
    while exclude_out_of_control:
        rounds += 1
        unit = center * (1.0 - center) if kind is AttributeKind.P else center
        half = limit_sigma * np.sqrt(unit / exposure)
        low, high = np.maximum(0.0, center - half), center + half
        new = keep & ((rates > high) | (rates < low))
        if not new.any():
            break
        too_many = (m - int(keep.sum()) + int(new.sum())) > max_excluded_share * m
        if rounds > max_rounds or too_many or int((keep & ~new).sum()) < 2:
            settled = False
            break
        excluded.extend(
            Exclusion(
                first_index + pos,
                statistic,
                float(rates[pos]),
                float(low[pos]),
                float(high[pos]),
                rounds,
            )
            for pos in np.flatnonzero(new).tolist()
        )
        keep &= ~new
        center = center_of(keep)
    if not center > 0 or (kind is AttributeKind.P and not center < 1):
        raise ReadingError(
            f"the baseline gives {kind.value}0 = {center}; a {kind.value} chart needs a baseline "
            "with some (and, for p, not only) rejects or defects"
        )
    return PhaseOneEstimate(
        parameters=ProcessParameters(center, None, "baseline"),
        estimator=kind.value,
        subgroups=m,
        used=int(keep.sum()),
        excluded=tuple(excluded),
        rounds=min(rounds, max_rounds),
        settled=settled,
    )
