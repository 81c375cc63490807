"""Interpolation tables of laws: fast CDF, survival function and quantiles once a law is built.

A table holds, on a piecewise-uniform grid (a dense core and segments whose spacing doubles
outwards), the log CDF on the lower side of the median and the log survival function on the
upper side, with the density. Between nodes it interpolates the log tail by a cubic Hermite
polynomial with the exact slopes ``f / F`` (lower) and ``-f / S`` (upper), so relative accuracy
holds in the far tails. The builder checks the interpolant at the midpoint of every cell against
values computed there and records the largest error, which is part of the law's stated bound.

Beyond the last node on each side the interpolated value (the log tail, or ``log(-log S)`` for
laws on a half line) is extended linearly in its coordinate with its end slope; the table
records where that begins (``lower_end``, ``upper_end``). A cell that touches a finite end of
the support continues the power law of its other node to that end.
"""

from __future__ import annotations

import bisect
import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

__all__ = ["Grid", "Table", "build_table", "check_errors", "tabulate"]

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]


@dataclass(frozen=True, slots=True)
class Grid:
    """Values of a law at increasing points; ``node`` marks the table's nodes.

    The other points (midpoints between nodes) only check the interpolation. NaN marks a
    value that is not precise enough; the table keeps the run of nodes around the median
    where the tail it uses (log CDF below the median, log survival above) is precise.
    """

    x: FloatArray
    log_cdf: FloatArray
    log_sf: FloatArray
    pdf: FloatArray
    node: NDArray[np.bool_]


def _hermite(
    y0: FloatArray, y1: FloatArray, m0: FloatArray, m1: FloatArray, t: FloatArray, h: FloatArray
) -> FloatArray:
    t2 = t * t
    t3 = t2 * t
    return (
        (2.0 * t3 - 3.0 * t2 + 1.0) * y0
        + (t3 - 2.0 * t2 + t) * h * m0
        + (-2.0 * t3 + 3.0 * t2) * y1
        + (t3 - t2) * h * m1
    )


class Table:
    """Cubic Hermite interpolation of the log tails on nodes (see the module notes).

    Coordinates: ``log(x - a)`` below the median when the support starts at a finite ``a``
    (power laws at that end become straight lines), else ``x``; above the median
    ``-log(b - x)`` when it ends at a finite ``b``, else ``log(x - a)`` with the value
    ``log(-log S)`` when only the lower end is finite (exponential, Weibull-like and
    lognormal-like upper tails are then nearly straight), else ``x``.
    """

    def __init__(
        self,
        x: FloatArray,
        log_cdf: FloatArray,
        log_sf: FloatArray,
        pdf: FloatArray,
        *,
        support: tuple[float, float],
    ) -> None:
        order = np.argsort(x)
        self.x = np.ascontiguousarray(x[order])
        lc = log_cdf[order]
        ls = log_sf[order]
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            # each side is computed where it is precise; the other side is its complement
            lc = np.where(np.isnan(lc), np.log1p(-np.minimum(np.exp(ls), 1.0)), lc)
            ls = np.where(np.isnan(ls), np.log1p(-np.minimum(np.exp(lc), 1.0)), ls)
        lc = np.minimum(np.maximum.accumulate(lc), 0.0)
        ls = np.minimum(np.maximum.accumulate(ls[::-1])[::-1], 0.0)
        self.log_cdf = lc
        self.log_sf = ls
        self.pdf = np.maximum(np.nan_to_num(pdf[order]), 0.0)
        self.support = support
        a, b = support
        self.loglog = math.isfinite(a) and not math.isfinite(b)
        x_ = self.x
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            if math.isfinite(a):
                self.t_low = np.log(np.maximum(x_ - a, 0.0))
                scale_low = x_ - a
            else:
                self.t_low = x_.copy()
                scale_low = np.ones_like(x_)
            if math.isfinite(b):
                self.t_high = -np.log(np.maximum(b - x_, 0.0))
                scale_high = b - x_
            elif self.loglog:
                self.t_high = self.t_low
                scale_high = x_ - a
            else:
                self.t_high = x_.copy()
                scale_high = np.ones_like(x_)
            self.slope_cdf = np.where(np.isfinite(lc), self.pdf * np.exp(-lc) * scale_low, 0.0)
            self.slope_sf = np.where(np.isfinite(ls), -self.pdf * np.exp(-ls) * scale_high, 0.0)
            if self.loglog:
                self.v_high = np.log(-ls)
                self.m_high = np.where(ls < 0, self.slope_sf / ls, 0.0)
            else:
                self.v_high = ls
                self.m_high = self.slope_sf
        # upper formulas from the first node whose survival is below one half
        self.split = int(np.searchsorted(-ls, math.log(2.0)))
        self.lower_end = float(self.x[0])
        self.upper_end = float(self.x[-1])
        self._nodes = self.x

    def _side(self, upper: bool) -> tuple[FloatArray, FloatArray, FloatArray]:
        """Coordinates, interpolated values and their slopes of one side."""
        if upper:
            return self.t_high, self.v_high, self.m_high
        return self.t_low, self.log_cdf, self.slope_cdf

    def _to_log_tail(self, v: FloatArray, *, upper: bool) -> FloatArray:
        if upper and self.loglog:
            with np.errstate(over="ignore"):
                return np.asarray(-np.exp(v), np.float64)
        return v

    def _coordinate(self, q: FloatArray, *, upper: bool) -> FloatArray:
        a, b = self.support
        with np.errstate(divide="ignore", invalid="ignore"):
            if upper and math.isfinite(b):
                return np.asarray(-np.log(np.maximum(b - q, 0.0)), np.float64)
            if (upper and self.loglog) or (not upper and math.isfinite(a)):
                return np.asarray(np.log(np.maximum(q - a, 0.0)), np.float64)
            return np.asarray(q, np.float64)

    # ------------------------------------------------------------ vectorised

    def _log_tail(self, q: FloatArray, *, upper: bool) -> FloatArray:
        """Log F(q) (upper False) or log S(q) (upper True), interpolated or extrapolated."""
        x = self.x
        i = np.clip(np.searchsorted(x, q, side="right") - 1, 0, x.shape[0] - 2)
        coordinate, values, slopes = self._side(upper)
        tq = self._coordinate(q, upper=upper)
        y0, y1 = values[i], values[i + 1]
        t0, t1 = coordinate[i], coordinate[i + 1]
        m0, m1 = slopes[i], slopes[i + 1]
        with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
            h = t1 - t0
            t = (tq - t0) / h
            inner = self._to_log_tail(_hermite(y0, y1, m0, m1, t, h), upper=upper)
            # a cell touching a finite end of the support (coordinate and value infinite there):
            # the power law of the other node continues to the end
            from_right = self._to_log_tail(y1 + m1 * (tq - t1), upper=upper)
            from_left = self._to_log_tail(y0 + m0 * (tq - t0), upper=upper)
            # any other cell touching a zero tail is interpolated linearly in probability
            p0 = np.exp(self._to_log_tail(y0, upper=upper))
            p1 = np.exp(self._to_log_tail(y1, upper=upper))
            frac = (q - x[i]) / (x[i + 1] - x[i])
            linear = np.log(np.maximum((1.0 - frac) * p0 + frac * p1, 0.0))
        smooth = np.isfinite(y0) & np.isfinite(y1) & np.isfinite(t0) & np.isfinite(t1) & (h > 0)
        left_end = np.isinf(t0) & (t0 < 0) & np.isfinite(y1) & np.isfinite(t1)
        right_end = np.isinf(t1) & (t1 > 0) & np.isfinite(y0) & np.isfinite(t0)
        out = np.where(smooth, inner, np.where(left_end, from_right, np.where(right_end, from_left, linear)))
        below = q < x[0]
        above = q > x[-1]
        with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
            return self._extend(out, tq, below, above, upper=upper)

    def _extend(
        self,
        out: FloatArray,
        tq: FloatArray,
        below: NDArray[np.bool_],
        above: NDArray[np.bool_],
        *,
        upper: bool,
    ) -> FloatArray:
        """Beyond the nodes: the interpolated value continues linearly in the coordinate."""
        coordinate, values, slopes = self._side(upper)
        if upper:
            out = np.where(below, np.log1p(-np.minimum(np.exp(self.log_cdf[0]), 1.0)), out)
            extended = self._to_log_tail(values[-1] + slopes[-1] * (tq - coordinate[-1]), upper=True)
            out = np.where(above, extended, out)
            out = np.where(np.isinf(tq) & (tq > 0), -np.inf, out)
        else:
            out = np.where(above, np.log1p(-np.minimum(np.exp(self.log_sf[-1]), 1.0)), out)
            out = np.where(below, values[0] + slopes[0] * (tq - coordinate[0]), out)
            out = np.where(np.isinf(tq) & (tq < 0), -np.inf, out)
        return np.asarray(np.minimum(out, 0.0), dtype=np.float64)

    def cdf(self, q: ArrayLike) -> FloatArray:
        """P(Y <= q)."""
        qa = np.asarray(q, dtype=np.float64)
        median = self.x[min(self.split, self.x.shape[0] - 1)]
        with np.errstate(over="ignore"):
            lower = np.exp(self._log_tail(qa, upper=False))
            upper = -np.expm1(self._log_tail(qa, upper=True))
        return np.asarray(np.where(qa < median, lower, upper), dtype=np.float64)

    def sf(self, q: ArrayLike) -> FloatArray:
        """P(Y > q)."""
        qa = np.asarray(q, dtype=np.float64)
        median = self.x[min(self.split, self.x.shape[0] - 1)]
        with np.errstate(over="ignore"):
            lower = -np.expm1(self._log_tail(qa, upper=False))
            upper = np.exp(self._log_tail(qa, upper=True))
        return np.asarray(np.where(qa < median, lower, upper), dtype=np.float64)

    def _invert(self, p: FloatArray, *, upper: bool) -> FloatArray:
        """Solve log tail(x) = log p on the interpolant (bisection inside, closed form beyond)."""
        with np.errstate(divide="ignore"):
            target = np.log(p)
        log_tail = self.log_sf if upper else self.log_cdf
        coordinate, values, slopes = self._side(upper)
        x = self.x
        key = -log_tail if upper else log_tail
        i = np.clip(np.searchsorted(key, -target if upper else target, side="left") - 1, 0, x.shape[0] - 2)
        lo = x[i].copy()
        hi = x[i + 1].copy()
        # outside the table: invert the linear extension
        first, last = log_tail[0], log_tail[-1]
        a, b = self.support
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            if upper:
                beyond = target < last
                goal = np.log(-target) if self.loglog else target
                t_ext = coordinate[-1] + (goal - values[-1]) / np.where(slopes[-1] != 0, slopes[-1], -1.0)
                if math.isfinite(b):
                    ext = b - np.exp(-t_ext)
                elif self.loglog:
                    ext = a + np.exp(t_ext)
                else:
                    ext = t_ext
                before = target > first
            else:
                beyond = target < first
                t_ext = coordinate[0] + (target - values[0]) / np.where(slopes[0] != 0, slopes[0], 1.0)
                ext = a + np.exp(t_ext) if math.isfinite(a) else t_ext
                before = target > last
        for _ in range(60):
            mid = 0.5 * (lo + hi)
            v = self._log_tail(mid, upper=upper)
            go_right = v > target if upper else v < target
            lo = np.where(go_right, mid, lo)
            hi = np.where(go_right, hi, mid)
        out = 0.5 * (lo + hi)
        out = np.where(beyond, ext, out)
        edge = x[0] if upper else x[-1]
        return np.asarray(np.where(before, edge, out), dtype=np.float64)

    def ppf(self, p: ArrayLike) -> FloatArray:
        """The q-quantile: smallest y with P(Y <= y) >= q."""
        pa = np.asarray(p, dtype=np.float64)
        low = self._invert(np.clip(pa, 1e-320, 1.0), upper=False)
        high = self._invert(np.clip(1.0 - pa, 1e-320, 1.0), upper=True)
        out = np.where(pa <= 0.5, low, high)
        out = np.where(pa <= 0.0, self.support[0], out)
        return np.asarray(np.where(pa >= 1.0, self.support[1], out), dtype=np.float64)

    def isf(self, p: ArrayLike) -> FloatArray:
        """The upper quantile: y with P(Y > y) = p (accurate for small p)."""
        pa = np.asarray(p, dtype=np.float64)
        high = self._invert(np.clip(pa, 1e-320, 1.0), upper=True)
        low = self._invert(np.clip(1.0 - pa, 1e-320, 1.0), upper=False)
        out = np.where(pa <= 0.5, high, low)
        out = np.where(pa <= 0.0, self.support[1], out)
        return np.asarray(np.where(pa >= 1.0, self.support[0], out), dtype=np.float64)

    # ------------------------------------------------------------ one value (microseconds)

    def tail(self, q: float, *, upper: bool) -> float:
        """P(Y > q) (upper) or P(Y < q), for one value, without array overhead."""
        support_low, support_high = self.support
        if q >= support_high:
            return 0.0 if upper else 1.0
        if q <= support_low:
            return 1.0 if upper else 0.0
        nodes = self._nodes
        n = nodes.shape[0]
        i = bisect.bisect_right(nodes, q) - 1
        use_upper = i >= min(self.split, n - 1)
        loglog = False
        if use_upper:
            coordinate, values, slopes = self.t_high, self.v_high, self.m_high
            if math.isfinite(support_high):
                tq = -math.log(support_high - q)
            elif self.loglog:
                tq = math.log(q - support_low) if q > support_low else -math.inf
                loglog = True
            else:
                tq = q
        else:
            coordinate, values, slopes = self.t_low, self.log_cdf, self.slope_cdf
            tq = math.log(q - support_low) if math.isfinite(support_low) else q
        if i < 0 or i >= n - 1:
            j = 0 if i < 0 else n - 1
            same_side = (i < 0) != use_upper
            if not same_side:
                return 1.0 if use_upper == upper else 0.0
            v = float(values[j]) + float(slopes[j]) * (tq - float(coordinate[j]))
        else:
            y0, y1 = float(values[i]), float(values[i + 1])
            t0, t1 = float(coordinate[i]), float(coordinate[i + 1])
            finite = math.isfinite(y0) and math.isfinite(y1) and math.isfinite(t0) and math.isfinite(t1)
            if finite and t1 > t0:
                h = t1 - t0
                t = (tq - t0) / h
                t2 = t * t
                t3 = t2 * t
                v = (
                    (2.0 * t3 - 3.0 * t2 + 1.0) * y0
                    + (t3 - 2.0 * t2 + t) * h * float(slopes[i])
                    + (-2.0 * t3 + 3.0 * t2) * y1
                    + (t3 - t2) * h * float(slopes[i + 1])
                )
            elif math.isinf(t0) and t0 < 0 and math.isfinite(y1) and math.isfinite(t1):
                v = y1 + float(slopes[i + 1]) * (tq - t1)
            elif math.isinf(t1) and t1 > 0 and math.isfinite(y0) and math.isfinite(t0):
                v = y0 + float(slopes[i]) * (tq - t0)
            else:
                x0, x1 = float(nodes[i]), float(nodes[i + 1])
                frac = (q - x0) / (x1 - x0)
                lp0 = -math.exp(y0) if loglog else y0
                lp1 = -math.exp(y1) if loglog else y1
                p = (1.0 - frac) * math.exp(lp0) + frac * math.exp(lp1)
                log_value = math.log(p) if p > 0 else -math.inf
                log_value = min(log_value, 0.0)
                return math.exp(log_value) if use_upper == upper else -math.expm1(log_value)
        if loglog:
            log_value = -math.exp(v) if v < 700.0 else -math.inf
        else:
            log_value = v
        log_value = min(log_value, 0.0)
        if use_upper == upper:
            return math.exp(log_value)
        return -math.expm1(log_value)


def _usable(grid: Grid) -> NDArray[np.bool_]:
    """Points inside the run of precise values around the median."""
    with np.errstate(invalid="ignore"):
        past = (grid.log_cdf >= math.log(0.5)) | (grid.log_sf <= math.log(0.5))
    median = int(np.argmax(past)) if bool(np.any(past)) else grid.x.shape[0] - 1
    index = np.arange(grid.x.shape[0])
    value = np.where(index >= median, grid.log_sf, grid.log_cdf)
    ok = ~np.isnan(value)
    keep = np.zeros(grid.x.shape[0], dtype=bool)
    bad_above = np.flatnonzero(~ok[median:])
    end = median + int(bad_above[0]) if bad_above.shape[0] else grid.x.shape[0]
    bad_below = np.flatnonzero(~ok[:median][::-1])
    begin = median - int(bad_below[0]) if bad_below.shape[0] else 0
    keep[begin:end] = True
    return keep


def _check(
    grid: Grid, support: tuple[float, float]
) -> tuple[Table, NDArray[np.bool_], FloatArray, FloatArray]:
    """The table on the grid's precise nodes, the checked midpoints and their errors."""
    keep = _usable(grid)
    nodes = keep & grid.node
    idx = np.flatnonzero(nodes)
    table = Table(grid.x[idx], grid.log_cdf[idx], grid.log_sf[idx], grid.pdf[idx], support=support)
    checks = keep & ~grid.node & (grid.x > table.x[0]) & (grid.x < table.x[-1])
    q = grid.x[checks]
    median = table.x[min(table.split, table.x.shape[0] - 1)]
    lower = q < median
    exact = np.where(lower, grid.log_cdf[checks], grid.log_sf[checks])
    got = np.where(lower, table._log_tail(q, upper=False), table._log_tail(q, upper=True))
    with np.errstate(invalid="ignore", over="ignore"):
        rel = np.abs(np.expm1(got - exact))
        rel = np.where(np.isfinite(exact) | np.isfinite(got), rel, 0.0)
        rel = np.where(np.isnan(rel), np.inf, rel)
        absolute = rel * np.exp(np.where(np.isfinite(exact), exact, -np.inf))
    return table, checks, rel, absolute


def check_errors(grid: Grid, *, support: tuple[float, float]) -> FloatArray:
    """Relative interpolation error of the table at every point (0 except at checked midpoints)."""
    _, checks, rel, _ = _check(grid, support)
    out = np.zeros(grid.x.shape[0])
    out[np.flatnonzero(checks)] = rel
    return out


def build_table(grid: Grid, *, support: tuple[float, float]) -> tuple[Table, float, float]:
    """The table on the grid's precise nodes and its interpolation errors at the midpoints.

    Returns the table, and twice the largest absolute error in probability and twice the
    largest relative error of a tail probability found at the checked midpoints.
    """
    table, _, rel, absolute = _check(grid, support)
    if rel.shape[0] == 0:
        return table, 0.0, 0.0
    # the cubic Hermite error kernel t^2 (1 - t)^2 peaks at the midpoint; the factor 2 covers the
    # change of the fourth derivative across a cell
    return table, 2.0 * float(np.max(absolute)), 2.0 * float(np.max(rel))


def tabulate(
    evaluate: Callable[[FloatArray], tuple[FloatArray, FloatArray, FloatArray, FloatArray]],
    nodes: FloatArray,
    *,
    support: tuple[float, float],
    tolerance: float = 1e-10,
    rounds: int = 8,
) -> tuple[Grid, float, float]:
    """Values of a law computed point by point, on nodes refined where interpolation needs it.

    ``evaluate(x)`` returns log CDF, log survival, density and the relative error of the tail
    values at x (NaN where not precise). Nodes are bisected where the table misses the value
    at a midpoint by more than ``tolerance`` (or than four times the values' own error).
    Returns the grid and the largest relative and absolute errors of the values kept.
    """
    x_nodes = np.unique(nodes)
    mids = 0.5 * (x_nodes[1:] + x_nodes[:-1])
    x = np.concatenate([x_nodes, mids])
    node = np.concatenate([np.ones(x_nodes.shape[0], dtype=bool), np.zeros(mids.shape[0], dtype=bool)])
    values: list[FloatArray] = list(evaluate(x))
    for _ in range(rounds):
        order = np.argsort(x)
        x, node = x[order], node[order]
        values = [v[order] for v in values]
        grid = Grid(x, values[0], values[1], values[2], node)
        relative = check_errors(grid, support=support)
        known = np.where(np.isfinite(values[3]), values[3], 0.0)
        bad = np.flatnonzero(relative > np.maximum(tolerance, 4.0 * known))
        if bad.shape[0] == 0:
            break
        # the failing midpoints become nodes; new midpoints on both sides
        left = 0.5 * (x[bad - 1] + x[bad])
        right = 0.5 * (x[bad] + x[bad + 1])
        node[bad] = True
        new = np.concatenate([left, right])
        extra = evaluate(new)
        x = np.concatenate([x, new])
        node = np.concatenate([node, np.zeros(new.shape[0], dtype=bool)])
        values = [np.concatenate([a, b]) for a, b in zip(values, extra, strict=True)]
    order = np.argsort(x)
    x, node = x[order], node[order]
    values = [v[order] for v in values]
    finite = np.isfinite(values[3])
    kept = values[3][finite]
    with np.errstate(over="ignore", invalid="ignore"):
        smaller = np.exp(np.fmin(values[0], values[1]))[finite]
    largest = float(np.max(kept)) if kept.shape[0] else 0.0
    absolute = float(np.nanmax(kept * smaller)) if kept.shape[0] else 0.0
    return Grid(x, values[0], values[1], values[2], node), largest, absolute
