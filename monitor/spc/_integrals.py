"""Laws of the subgroup range and standard deviation under any parent, by numerical integration.

Range of n readings (any continuous parent, f its density, F its CDF, S = 1 - F):

    P(R <= r) = n * integral f(x) [F(x + r) - F(x)]^(n-1) dx
    P(R >  r) = n * integral f(x) S(x)^(n-1) [1 - (1 - S(x + r) / S(x))^(n-1)] dx
    density   = n (n - 1) * integral f(x) f(x + r) [F(x + r) - F(x)]^(n-2) dx

The second form has a positive integrand written with ``expm1`` and ``log1p``, so far tails keep
their relative precision. The integrals use composite Gauss-Legendre rules (16 nodes per panel)
on panels between quantiles evenly spaced in logit(probability), split at the density's kinks
and at the points where ``x + r`` meets them; the parent is cut at its 1e-24 quantiles (mass
counted in the error bound). The quadrature error is estimated by repeating a sample of the
points with every panel halved.

Standard deviation of n >= 3 readings from a non-normal parent: no one-dimensional formula is
known, so the law is an average over the first n - 1 readings, drawn by randomized
quasi-Monte Carlo (scrambled Sobol points, seeded: deterministic), with the last reading
integrated exactly: given the first n - 1 readings (mean m, sum of squares SS),

    P(S <= s | ...) = F(m + d) - F(m - d),   d = sqrt(n ((n - 1) s^2 - SS) / (n - 1))

(0 when ``(n - 1) s^2 < SS``). Draws from the parent give the body. The tails come from
importance sampling: proposals that favour small or large spreads, each a defensive mixture
with the parent (a fifth of the draws from the parent, so no weight exceeds 5), weighted by the
exact likelihood ratio:

* small spreads: the readings' mean from the parent and their deviations uniform in a ball of
  radius r (in the (n - 2)-dimensional space of deviations summing to zero); used for s up to
  r, where the ball holds the whole event S <= s, and down to the next ball;
* large spreads of a bounded parent (uniform, triangular, empirical): readings from a
  piecewise-constant density proportional to ``f(x) exp(a z^2)`` (z = -1 and 1 at the ends);
* large spreads of a positive parent (lognormal, gamma, Weibull): readings spread by a power
  about the median, and (heavy tails: a wide spread mostly comes from one large reading) one
  reading drawn beyond the parent's upper 10^-k quantile, used where any subgroup that wide
  needs a reading that large.

The error of each estimate is estimated from independent scramblings (three standard errors of
their mean); per point and tail the most precise estimate is kept, among the sources whose
draws reach that tail with their first n - 1 readings alone often enough (else the scatter of
the estimate misses what it never drew). Values are kept to 10 % (three standard errors).

Sums of positive readings (lognormal, Weibull; gamma too, to check the method against its closed
form), by convolution in x. A level is the law of a sum of k readings: one reading in closed
form, or a table. The law of ``S_a + S_b`` at s is split at s/2 so that every part is an
integral of positive terms (relative precision in both tails, no cancellation beyond a factor 2):

    f(s) = E[f_b(s - A); A <= s/2] + E[f_a(s - B); B <= s/2]
    F(s) = E[F_b(s - A); A <= s/2] + E[F_a(s - B); B <= s/2] - F_a(s/2) F_b(s/2)
    G(s) = G_a(s/2) G_b(s/2) + E[G_b(s - A); A <= s/2] + E[G_a(s - B); B <= s/2]

(A, B the two sums, G = 1 - F). Each expectation is a Gauss-Legendre sum in t = logit(F_A) on
fixed panels (8 nodes each, width 1 in the body growing to 3 in the tails, to probabilities of
1e-65), the readings at the nodes from the quantile function, and the last panel below s/2
graded geometrically toward it (an integrand peaked at its end). Nodes whose whole mass is below
1e-19 of a lower bound of the result are left out. Levels are built by doubling (1, 2, 4, ...
readings) and joined along the binary digits of n, each tabulated in u = log(s) (the smaller
tail by cubic Hermite with its exact slope: log F below the median, log(-log G) above, both
nearly straight for power, exponential, Weibull and lognormal tails) and refined until every
midpoint is interpolated to 1e-9. A level's error is the sum of its inputs' errors, its
interpolation error and its quadrature error, estimated at sample points by halving every panel
and deepening the grading. A weighted sum (the EWMA) is built the same way from scaled levels.
"""

from __future__ import annotations

import math
from typing import Final

import numpy as np
from numpy.typing import NDArray
from scipy import special
from scipy.stats import qmc

from monitor.spc.parents import Parent

__all__ = [
    "PositiveReading",
    "PositiveSum",
    "RangeIntegral",
    "ScaledLevel",
    "SdSimulation",
    "SumLevel",
    "level_error",
    "level_nodes",
    "sum_nodes",
    "sum_of",
    "weighted_sum",
]

FloatArray = NDArray[np.float64]
CUT: Final = 1e-24
_GL_X, _GL_W = (np.asarray(a, dtype=np.float64) for a in special.roots_legendre(16))
_GL4_X, _GL4_W = (np.asarray(a, dtype=np.float64) for a in special.roots_legendre(4))


def _floats(x: object) -> FloatArray:
    return np.asarray(x, dtype=np.float64)


def _edges(parent: Parent, panels: int) -> tuple[FloatArray, float, float]:
    lo, hi = parent.support
    low = lo if math.isfinite(lo) else float(parent.ppf(CUT))
    high = hi if math.isfinite(hi) else float(parent.isf(CUT))
    end = -float(special.logit(CUT))
    s = np.linspace(-end, end, panels + 1)
    inner = np.concatenate([parent.ppf(special.expit(s[s <= 0])), parent.isf(special.expit(-s[s > 0]))])
    grid = parent.grid
    if grid is not None:
        # the empirical density is a cubic spline with knots on its lattice: panels on the knots
        # over its central part
        a, b = float(parent.ppf(1e-7)), float(parent.isf(1e-7))
        first = math.floor((a - grid.origin) / grid.step)
        last = math.ceil((b - grid.origin) / grid.step)
        inner = np.concatenate([inner, grid.origin + grid.step * np.arange(first, last + 1)])
    edges = np.concatenate([[low, high], inner, np.asarray(parent.kinks)])
    edges = np.unique(edges[np.isfinite(edges) & (edges >= low) & (edges <= high)])
    return edges, low, high


def _rule(edges: FloatArray) -> tuple[FloatArray, FloatArray]:
    left = edges[:-1]
    width = np.diff(edges)
    x = (left[:, None] + 0.5 * width[:, None] * (_GL_X[None, :] + 1.0)).ravel()
    w = (0.5 * width[:, None] * _GL_W[None, :]).ravel()
    return x, w


class RangeIntegral:
    """The law of the range of ``n`` readings, point by point (see the module notes)."""

    def __init__(self, parent: Parent, n: int) -> None:
        self.parent = parent
        self.n = n
        self.edges, self.low, self.high = _edges(parent, 64)
        self.cut = (
            2.0 * n * CUT
            if not (math.isfinite(parent.support[0]) and math.isfinite(parent.support[1]))
            else 0.0
        )
        self.quadrature_error = 0.0

    def _difference(self, x: FloatArray, r: float) -> FloatArray:
        """F(x + r) - F(x), with relative precision (from the side of x with the smaller tail)."""
        p = self.parent
        if r < 0.02 * p.sd():
            # integral of the density over [x, x + r] by 4-point Gauss: positive, relative
            nodes = x[:, None] + 0.5 * r * (_GL4_X[None, :] + 1.0)
            return np.asarray(0.5 * r * (p.pdf(nodes.ravel()).reshape(nodes.shape) @ _GL4_W), np.float64)
        lower = p.cdf(x)
        use_upper = lower > 0.5
        from_upper = p.sf(x) - p.sf(x + r)
        from_lower = p.cdf(x + r) - lower
        return np.maximum(np.where(use_upper, from_upper, from_lower), 0.0)

    def _one(self, r: float, edges: FloatArray) -> tuple[float, float, float]:
        n = self.n
        p = self.parent
        extra = np.asarray(p.kinks) - r
        all_edges = np.unique(np.concatenate([edges, extra[(extra > self.low) & (extra < self.high)]]))
        x, w = _rule(all_edges)
        f = p.pdf(x) * w
        d = self._difference(x, r)
        s = p.sf(x)
        s_shift = p.sf(x + r)
        with np.errstate(divide="ignore", invalid="ignore", under="ignore"):
            cdf = n * float(np.dot(f, d ** (n - 1)))
            ratio = np.where(s > 0, s_shift / s, 0.0)
            inner = -np.expm1((n - 1) * np.log1p(-np.minimum(ratio, 1.0)))
            sf = n * float(np.dot(f, np.where(s > 0, s ** (n - 1) * inner, 0.0)))
            density = n * (n - 1) * float(np.dot(f, p.pdf(x + r) * d ** (n - 2)))
        return cdf, sf, density

    def evaluate(self, r: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
        """Log CDF, log survival, density and estimated relative error at each r."""
        cdf = np.empty(r.shape[0])
        sf = np.empty(r.shape[0])
        pdf = np.empty(r.shape[0])
        for i, value in enumerate(r.tolist()):
            if value <= 0:
                cdf[i], sf[i], pdf[i] = 0.0, 1.0, 0.0
                continue
            cdf[i], sf[i], pdf[i] = self._one(value, self.edges)
        # error: the same integrals on halved panels, at a sample of the points
        halved = np.sort(np.concatenate([self.edges, 0.5 * (self.edges[1:] + self.edges[:-1])]))
        sample = np.flatnonzero(r > 0)[:: max(1, r.shape[0] // 12)]
        worst = 0.0
        for i in sample.tolist():
            c2, s2, _ = self._one(float(r[i]), halved)
            for a, b in ((cdf[i], c2), (sf[i], s2)):
                if b > 1e-280:
                    worst = max(worst, abs(a / b - 1.0))
        self.quadrature_error = max(self.quadrature_error, worst)
        relative = np.full(r.shape[0], max(worst, 1e-14))
        with np.errstate(divide="ignore"):
            return np.log(np.clip(cdf, 0.0, 1.0)), np.log(np.clip(sf, 0.0, 1.0)), pdf, relative


_DEFENSIVE: Final = 0.2
"""Share of the parent itself in every importance-sampling proposal (weights stay below 5)."""
_BALL_TOP: Final = 0.7
"""The largest ball of small spreads (radius per reading, in sd), for the lower tail."""
_BALL_DEPTH: Final = 1e-12
"""Balls shrink until ``radius^(n - 1)`` (about the lower tail there) falls below this."""
_COVERED: Final = 0.001
"""A source's tail estimate at s counts only if this share of its draws reach that tail alone."""
_SPREAD_TILTS: Final = (0.5, 1.0, 1.7, 2.6, 3.8, 5.5, 8.0, 11.5, 16.5, 24.0)
"""Strengths a of the tilts exp(a z^2) toward both ends of a bounded parent (z = -1 and 1 at the
ends), for the upper tail."""
_SPREAD_POWERS: Final = (1.2, 1.45, 1.75, 2.1, 2.5, 3.0, 3.6)
"""Powers c of x = m (y / m)^c spreading positive parents, for the upper tail."""
_EXCEEDANCES: Final = tuple(10.0**-k for k in range(1, 15))
"""Upper tail probabilities beyond which one reading is drawn, for positive parents' upper tail."""


class _Draws:
    """The first n - 1 readings of a proposal: their mean, sum of squares and log weight."""

    def __init__(
        self,
        x: FloatArray,
        log_weight: FloatArray,
        replica: NDArray[np.int64],
        proposed: NDArray[np.bool_],
        replicates: int,
    ) -> None:
        kept = np.isfinite(log_weight)  # zero weight: a reading outside the parent's support
        x = x[kept]
        self.mean = x.mean(axis=1)
        self.ss = ((x - self.mean[:, None]) ** 2).sum(axis=1)
        self.weight = np.exp(log_weight[kept])
        self.proposed = proposed[kept]
        replica = replica[kept]
        # draws are in replicate order: each replicate's slice starts at its offset (every
        # replicate keeps the draws from the parent's own share of the mixture)
        self.totals = np.bincount(replica, minlength=replicates).astype(np.float64)
        if bool(np.any(self.totals == 0)):
            raise ValueError("a scrambling kept no draws")  # pragma: no cover - see above
        self.offsets = np.searchsorted(replica, np.arange(replicates))


class SdSimulation:
    """The law of the sample sd of ``n >= 3`` readings by conditional randomized QMC.

    The first n - 1 readings are drawn from the parent (the body) and from proposals that favour
    small or large spreads (the tails), each a defensive mixture with the parent, weighted by
    the likelihood ratio; the last reading is integrated exactly. Every estimate's error comes
    from independent scramblings; per point and tail the estimate with the smallest is kept.
    """

    def __init__(
        self,
        parent: Parent,
        n: int,
        *,
        points: int = 4096,
        replicates: int = 8,
        seed: int = 20261,
        rung_points: int = 2048,
    ) -> None:
        self.parent = parent
        self.n = n
        self.replicates = replicates
        self.points = points
        self.sd = parent.sd()
        self.plain = self._draw(points, seed, None)
        low, high = parent.support
        half = (n - 1) // 2
        # the largest sum of squares of n - 1 readings (half at each end of a bounded support)
        self._widest_first = (high - low) ** 2 * half * (n - 1 - half) / (n - 1)
        self.rungs: list[tuple[float, float, _Draws]] = []
        for k, proposal in enumerate(self._proposals()):
            draws = self._draw(rung_points, seed + 1000 * (k + 1), proposal)
            if draws.ss.shape[0] < 16 * replicates:
                continue
            kind, value = proposal
            if kind == "ball":
                # the event S <= s lies inside the ball for s up to its radius (per reading), so the
                # proposal covers it all; below about the next radius a smaller ball does better
                lo, hi = value * self._ball_step() * self.sd, value * self.sd
            else:
                # up to where too few draws reach the tail with their first n - 1 readings alone
                # (see ``evaluate``)
                hi = float(np.quantile(np.sqrt(draws.ss / (n - 1)), 1.0 - _COVERED))
                if kind == "beyond":
                    # above the widest spread of n readings at most t, the event S > s needs a
                    # reading beyond t, which the proposal always has
                    half = n // 2
                    width = float(parent.isf(value)) - parent.support[0]
                    lo = width * math.sqrt(half * (n - half) / (n * (n - 1.0)))
                else:
                    # from the middle of the spreads the proposal itself draws
                    lo = float(np.median(np.sqrt(draws.ss[draws.proposed] / (n - 2))))
            self.rungs.append((lo, hi, draws))
        # the parent's own draws, where enough of them reach either tail alone
        spread = np.sqrt(self.plain.ss / (n - 1))
        self._plain_range = (float(np.quantile(spread, _COVERED)), float(np.quantile(spread, 1.0 - _COVERED)))
        self.rung_points = rung_points

    # -- proposals ---------------------------------------------------------------------------

    def _ball_step(self) -> float:
        """Ratio of successive ball radii.

        Over a rung's range of s the event S <= s keeps at least a quarter of the proposal's
        draws (uniform in a ball of n - 2 dimensions).
        """
        return max(0.62, float(0.25 ** (1.0 / max(self.n - 2, 1))))

    def _proposals(self) -> list[tuple[str, float]]:
        name = self.parent.name
        step = self._ball_step()
        out: list[tuple[str, float]] = []
        radius = _BALL_TOP
        while radius ** (self.n - 1) >= _BALL_DEPTH and len(out) < 40:
            out.append(("ball", radius))
            radius *= step
        low, high = self.parent.support
        if math.isfinite(low) and math.isfinite(high):
            out += [("tilt", a) for a in _SPREAD_TILTS]
        elif name in ("lognormal", "gamma", "exponential", "weibull"):
            out += [("power", c) for c in _SPREAD_POWERS]
            # heavy upper tails: a wide spread mostly comes from one large reading
            out += [("beyond", q) for q in _EXCEEDANCES]
        return out

    def _draw(self, points: int, seed: int, proposal: tuple[str, float] | None) -> _Draws:
        n, p = self.n, self.parent
        dims = n + 2
        xs, logs, replica, flags = [], [], [], []
        for r in range(self.replicates):
            u = qmc.Sobol(d=dims, scramble=True, rng=np.random.default_rng(seed + r)).random(points)
            u = np.clip(u, 1e-300, 1.0 - 1e-16)
            plain = np.where(u[:, : n - 1] < 0.5, p.ppf(u[:, : n - 1]), p.isf(1.0 - u[:, : n - 1]))
            if proposal is None:
                xs.append(plain)
                logs.append(np.zeros(points))
                replica.append(np.full(points, r))
                flags.append(np.zeros(points, dtype=bool))
                continue
            kind, value = proposal
            other = self._proposal_draw(kind, value, u)
            use_other = u[:, n - 1] >= _DEFENSIVE
            x = np.where(use_other[:, None], other, plain)
            with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
                each = p.logpdf(x)
                log_f = each.sum(axis=1)
                ratio = np.exp(np.minimum(self._log_ratio(kind, value, x, each), 700.0))
                log_w = -np.log(_DEFENSIVE + (1.0 - _DEFENSIVE) * np.where(np.isnan(ratio), np.inf, ratio))
            log_w = np.where(np.isfinite(log_f), log_w, -np.inf)
            xs.append(x)
            logs.append(log_w)
            replica.append(np.full(points, r))
            flags.append(use_other)
        return _Draws(
            np.concatenate(xs),
            np.concatenate(logs),
            np.concatenate(replica),
            np.concatenate(flags),
            self.replicates,
        )

    def _proposal_draw(self, kind: str, value: float, u: FloatArray) -> FloatArray:
        n, p = self.n, self.parent
        m = n - 1
        if kind == "ball":
            center = p.ppf(np.clip(u[:, n], 1e-12, 1.0 - 1e-12))
            # a direction in the zero-sum subspace, from normal scores of the first n - 1 coordinates
            z = special.ndtri(u[:, :m])
            z -= z.mean(axis=1, keepdims=True)
            norm = np.linalg.norm(z, axis=1, keepdims=True)
            radius = value * self.sd * math.sqrt(m) * u[:, n + 1 : n + 2] ** (1.0 / max(m - 1, 1))
            return np.asarray(center[:, None] + radius * z / np.maximum(norm, 1e-300), np.float64)
        if kind == "power":
            y = np.where(u[:, :m] < 0.5, p.ppf(u[:, :m]), p.isf(1.0 - u[:, :m]))
            median = float(p.ppf(0.5))
            return np.asarray(median * (y / median) ** value, np.float64)
        if kind == "beyond":
            # one reading (chosen by the last coordinate) drawn above the parent's upper
            # ``value`` quantile, the others from the parent
            y = np.where(u[:, :m] < 0.5, p.ppf(u[:, :m]), p.isf(1.0 - u[:, :m]))
            which = np.minimum((u[:, n + 1] * m).astype(np.int64), m - 1)
            rows = np.arange(y.shape[0])
            y[rows, which] = p.isf(value * u[rows, which])
            return np.asarray(y, np.float64)
        cells, masses, low, width = self._tilt_cells(value)
        cumulative = np.concatenate([[0.0], np.cumsum(masses)])
        position = np.interp(u[:, :m], cumulative / cumulative[-1], np.arange(cells + 1.0))
        return np.asarray(low + width * position, np.float64)

    def _tilt_cells(self, a: float) -> tuple[int, FloatArray, float, float]:
        """A piecewise-constant density on equal cells of the support, prop. to f exp(a z^2).

        Any piecewise-constant density is a valid proposal: the weights use it exactly.
        """
        low, high = self.parent.support
        cells = 4096
        width = (high - low) / cells
        mid = low + width * (np.arange(cells) + 0.5)
        z = (mid - 0.5 * (low + high)) / (0.5 * (high - low))  # -1 and 1 at the ends
        with np.errstate(divide="ignore"):
            log_mass = self.parent.logpdf(mid) + a * z * z
        mass = np.exp(log_mass - np.max(log_mass))
        return cells, mass, low, width

    def _log_ratio(self, kind: str, value: float, x: FloatArray, log_f: FloatArray) -> FloatArray:
        """Log of the proposal component's density over the parent's, per draw.

        ``log_f`` holds the parent's log density of each reading.
        """
        n, p = self.n, self.parent
        m = n - 1
        total = log_f.sum(axis=1)
        with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
            if kind == "ball":
                center = x.mean(axis=1)
                e = x - center[:, None]
                norm = np.sqrt((e * e).sum(axis=1))
                radius = value * self.sd * math.sqrt(m)
                dim = m - 1
                log_volume = (
                    0.5 * dim * math.log(math.pi) - math.lgamma(0.5 * dim + 1.0) + dim * math.log(radius)
                )
                inside = norm <= radius
                log_g = np.where(inside, p.logpdf(center) - log_volume - 0.5 * math.log(m), -np.inf)
                return np.asarray(log_g - total, np.float64)
            if kind == "power":
                median = float(p.ppf(0.5))
                y = median * (np.maximum(x, 0.0) / median) ** (1.0 / value)
                one = np.where(x > 0, p.logpdf(y) + np.log(y) - math.log(value) - np.log(x), -np.inf)
                return np.asarray(one.sum(axis=1) - total, np.float64)
            if kind == "beyond":
                # a mixture over which reading was drawn beyond: mean over j of 1{x_j > t} / value
                over = (x > float(p.isf(value))).sum(axis=1)
                return np.asarray(np.log(over / m) - math.log(value), np.float64)
            cells, mass, low, width = self._tilt_cells(value)
            density = mass / (mass.sum() * width)
            index = np.clip(((x - low) / width).astype(np.int64), 0, cells - 1)
            return np.asarray(np.log(density[index]).sum(axis=1) - total, np.float64)

    # -- estimates ---------------------------------------------------------------------------

    def _estimate(self, draws: _Draws, s: FloatArray) -> tuple[FloatArray, ...]:
        """Per scrambling: CDF, survival and density estimates at s (arrays replicates x len(s)).

        And the share of draws whose first n - 1 readings alone have a spread below s.
        """
        n, p = self.n, self.parent
        count = s.shape[0]
        weight = draws.weight
        totals = draws.totals
        cdf = np.zeros((self.replicates, count))
        sf = np.zeros((self.replicates, count))
        pdf = np.zeros((self.replicates, count))
        below = np.zeros(count)
        for start in range(0, count, 16):
            chunk = s[start : start + 16]
            gap = (n - 1) * chunk[None, :] ** 2 - draws.ss[:, None]
            below[start : start + 16] = np.mean(gap > 0, axis=0)
            with np.errstate(invalid="ignore", divide="ignore"):
                d = np.sqrt(np.maximum(gap, 0.0) * n / (n - 1))
                inside = gap > 0
                lo = draws.mean[:, None] - d
                hi = draws.mean[:, None] + d
                below_band = p.cdf(lo)
                c = np.where(inside, p.cdf(hi) - below_band, 0.0)
                t = np.where(inside, below_band + p.sf(hi), 1.0)
                dens = np.where(
                    inside & (d > 0),
                    (p.pdf(hi) + p.pdf(lo)) * n * chunk[None, :] / np.maximum(d, 1e-300),
                    0.0,
                )
            for target, values in ((cdf, c), (sf, t), (pdf, dens)):
                sums = np.add.reduceat(values * weight[:, None], draws.offsets, axis=0)
                target[:, start : start + 16] = sums / totals[:, None]
        return cdf, sf, pdf, below

    def evaluate(self, s: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
        """Log CDF, log survival, density and estimated relative error (3 standard errors)."""
        n = self.n
        spread = 3.0 / math.sqrt(self.replicates)
        best = [np.full(s.shape[0], np.nan), np.full(s.shape[0], np.nan)]
        best_err = [np.full(s.shape[0], np.inf), np.full(s.shape[0], np.inf)]
        best_pdf = [np.full(s.shape[0], np.nan), np.full(s.shape[0], np.nan)]
        lo, hi = self._plain_range
        body = (s >= lo) & ((s <= hi) | ((n - 1) * s**2 > self._widest_first))
        sources: list[tuple[_Draws, NDArray[np.bool_]]] = [(self.plain, body)]
        for lo, hi, draws in self.rungs:
            sources.append((draws, (s >= lo) & (s <= hi)))
        for draws, where in sources:
            if not bool(np.any(where)):
                continue
            cdf, sf, pdf, below = self._estimate(draws, s[where])
            # where a source's draws seldom reach a tail with the first n - 1 readings alone, its
            # estimate stands on the last reading's exact part and its scatter misses what the
            # first readings would add (one large reading of a heavy-tailed parent): not trusted,
            # unless the first n - 1 readings cannot reach that tail at all (a bounded parent)
            alone = (n - 1) * s[where] ** 2 <= self._widest_first
            reach = (below, np.where(alone, 1.0 - below, 1.0))
            for side, values in enumerate((cdf, sf)):
                mean = values.mean(axis=0)
                with np.errstate(divide="ignore", invalid="ignore"):
                    err = spread * values.std(axis=0, ddof=1) / mean
                trusted = (reach[side] >= _COVERED) | (mean >= 0.05)
                err = np.where(np.isfinite(err) & (mean > 0) & trusted, err, np.inf)
                idx = np.flatnonzero(where)
                better = err < best_err[side][idx]
                best[side][idx[better]] = mean[better]
                best_err[side][idx[better]] = err[better]
                best_pdf[side][idx[better]] = pdf.mean(axis=0)[better]
        c_mean, s_mean = best
        smaller_is_cdf = np.nan_to_num(c_mean, nan=1.0) < np.nan_to_num(s_mean, nan=1.0)
        relative = np.where(smaller_is_cdf, best_err[0], best_err[1])
        density = np.where(smaller_is_cdf, best_pdf[0], best_pdf[1])
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.log(c_mean), np.log(s_mean), density, relative


# ---------------------------------------------------------------- sums of positive readings

POSITIVE_FLOOR: Final = 1e-32
"""Tail probabilities of sums of positive readings are computed down to about this."""
_NODE_EDGE: Final = 150.0
"""Quadrature nodes cover logit(F) in [-150, 150] (probabilities down to about 7e-66)."""
_DOMAIN: Final = math.log(1e-60)
"""Each level is tabulated where both its tails are above 1e-60."""
_PRUNE: Final = math.log(1e-19)
_LEVEL_TOLERANCE: Final = 1e-9
_FAR: Final = math.log(1e-250)
_GL8_X, _GL8_W = (np.asarray(a, dtype=np.float64) for a in special.roots_legendre(8))
_GRADING: Final = 10
"""The top panel of each integral is split geometrically toward its end, smallest 2**-10 of it."""


def _log_diff_exp(big: FloatArray, small: FloatArray) -> FloatArray:
    """log(exp(big) - exp(small)) for big >= small (-inf where they are equal)."""
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        return np.asarray(big + np.log(-np.expm1(np.minimum(small - big, 0.0))), np.float64)


def _t_edges(scale: float) -> FloatArray:
    """Panel edges in t = logit(F): width 1 in the body, growing to 3 in the tails (times scale)."""
    upper = [0.0]
    while upper[-1] < _NODE_EDGE:
        t = upper[-1]
        upper.append(t + scale * min(3.0, 1.0 + 0.1 * max(0.0, t - 4.0)))
    half = np.asarray(upper)
    return np.concatenate([-half[:0:-1], half])


_EDGES: Final = _t_edges(1.0)
_FINE_EDGES: Final = _t_edges(0.5)


class PositiveReading:
    """One reading of a positive parametric parent: exact log density, log CDF, log survival."""

    def __init__(self, parent: Parent) -> None:
        if parent.name not in ("lognormal", "weibull", "gamma", "exponential"):
            raise ValueError(f"no positive reading model for {parent.name}")
        self.parent = parent
        self.count = 1
        self.mean = parent.mean()
        self.sd = parent.sd()
        p = dict(parent.params)
        self._name = parent.name
        if parent.name == "exponential":
            self._name, p = "gamma", {"shape": 1.0, "scale": p["mean"]}
        self._p = p
        if self._name == "gamma":
            self._log_norm = math.lgamma(p["shape"]) + math.log(p["scale"])
        self.u_low = math.log(float(parent.ppf(1e-60)))
        self.u_high = math.log(float(parent.isf(1e-60)))

    def values(self, x: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray]:
        """Log density, log CDF and log survival at x > 0 (any shape)."""
        p = self._p
        with np.errstate(divide="ignore", invalid="ignore", over="ignore", under="ignore"):
            if self._name == "lognormal":
                logx = np.log(x)
                z = (logx - p["log_mean"]) / p["log_sd"]
                lf = -0.5 * z * z - logx - math.log(p["log_sd"] * math.sqrt(2.0 * math.pi))
                return lf, special.log_ndtr(z), special.log_ndtr(-z)
            if self._name == "weibull":
                k, lam = p["shape"], p["scale"]
                y = x / lam
                w = np.power(y, k)
                lf = math.log(k / lam) + (k - 1.0) * np.log(y) - w
                return lf, np.log(-np.expm1(-w)), -w
            a, scale = p["shape"], p["scale"]
            y = x / scale
            lf = (a - 1.0) * np.log(y) - y - self._log_norm
            return lf, np.log(special.gammainc(a, y)), np.log(special.gammaincc(a, y))

    def linear(self, x: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray]:
        """Density, CDF and survival at x > 0 (any shape)."""
        p = self._p
        with np.errstate(divide="ignore", invalid="ignore", over="ignore", under="ignore"):
            if self._name == "lognormal":
                logx = np.log(x)
                z = (logx - p["log_mean"]) / p["log_sd"]
                f = np.exp(-0.5 * z * z - logx) * (1.0 / (p["log_sd"] * math.sqrt(2.0 * math.pi)))
                return f, special.ndtr(z), special.ndtr(-z)
            if self._name == "weibull":
                k, lam = p["shape"], p["scale"]
                y = x / lam
                w = np.power(y, k)
                g = np.exp(-w)
                return (k / lam) * w / y * g, -np.expm1(-w), g
            a, scale = p["shape"], p["scale"]
            y = x / scale
            f = np.exp((a - 1.0) * np.log(y) - y - self._log_norm)
            return f, _floats(special.gammainc(a, y)), _floats(special.gammaincc(a, y))

    def x_of_t(self, t: FloatArray) -> FloatArray:
        """The reading whose logit(CDF) is t."""
        with np.errstate(over="ignore", under="ignore"):
            low = self.parent.ppf(special.expit(np.minimum(t, 0.0)))
            high = self.parent.isf(special.expit(-np.maximum(t, 0.0)))
        return np.asarray(np.where(t <= 0, low, high), np.float64)


def _hermite_cells(
    u: FloatArray, y: FloatArray, slope: FloatArray
) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
    """Cubic coefficients per cell (in the local variable s = u - u_i) of the Hermite interpolant."""
    h = np.diff(u)
    dy = np.diff(y) / h
    m0, m1 = slope[:-1], slope[1:]
    c2 = (3.0 * dy - 2.0 * m0 - m1) / h
    c3 = (m0 + m1 - 2.0 * dy) / (h * h)
    return y[:-1].copy(), m0.copy(), c2, c3


class SumLevel:
    """The law of a sum of ``count`` readings, tabulated (see the module notes).

    Nodes in u = log(s). The smaller tail is interpolated by cubic Hermite polynomials in u
    with its exact slope (from the density): log F below the median node (lower tails are
    powers or lognormal-like: nearly straight or parabolic in u) and log(-log G) from it on
    (nearly straight in u for Weibull, gamma and lognormal-like upper tails). The density is
    carried as the log of the tail's slope, ``log(s f / F)`` or ``log(s f / G)`` (nearly
    straight too), interpolated with finite-difference slopes; it only shapes the interpolation
    of the next levels, whose values are checked.
    """

    def __init__(
        self,
        count: int,
        u: FloatArray,
        lf: FloatArray,
        lF: FloatArray,
        lG: FloatArray,
        mean: float,
        sd: float,
        error: float,
    ) -> None:
        self.count, self.mean, self.sd, self.error = count, mean, sd, error
        self.u, self.lf, self.lF, self.lG = u, lf, lF, lG
        self.u_low, self.u_high = float(u[0]), float(u[-1])
        size = u.shape[0]
        self._split = min(max(int(np.searchsorted(-lG, math.log(2.0))), 1), size - 1)
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            rate_F = u + lf - lF  # log(d log F / du)
            rate_G = u + lf - lG  # log(-d log G / du)
            w = np.log(-np.minimum(lG, -1e-300))  # log(-log G)
            slope_w = np.exp(rate_G) / -np.minimum(lG, -1e-300)
        lower = (np.arange(size - 1) < self._split)[:, None]
        self._tail = np.where(
            lower,
            np.stack(_hermite_cells(u, lF, np.exp(rate_F)), axis=1),
            np.stack(_hermite_cells(u, w, slope_w), axis=1),
        )
        self._rate = np.where(
            lower,
            np.stack(_hermite_cells(u, rate_F, np.gradient(rate_F, u)), axis=1),
            np.stack(_hermite_cells(u, rate_G, np.gradient(rate_G, u)), axis=1),
        )
        self._tail_columns = tuple(np.ascontiguousarray(self._tail[:, k]) for k in range(4))
        self._rate_columns = tuple(np.ascontiguousarray(self._rate[:, k]) for k in range(4))
        self._ends = (
            (float(lF[0]), float(np.exp(rate_F[0])), float(rate_F[0])),
            (float(w[-1]), float(slope_w[-1]), float(rate_G[-1])),
        )
        # the quantile function: u against t = logit(F), a Hermite guess polished by Newton steps
        t = lF - lG
        ok = np.concatenate([[True], np.diff(t) > 0])
        self._t = t[ok]
        with np.errstate(over="ignore"):
            dt_du = np.exp(rate_F[ok]) + np.exp(rate_G[ok])
        self._quantile = np.stack(_hermite_cells(self._t, u[ok], 1.0 / np.maximum(dt_du, 1e-300)), axis=1)

    def _small_side(self, q: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray, NDArray[np.bool_]]:
        """At u = q: log of the smaller tail, log of its slope magnitude in u, log density, side."""
        u = self.u
        i = np.searchsorted(u, q, side="right")
        i -= 1
        np.clip(i, 0, u.shape[0] - 2, out=i)
        lower = i < self._split
        s = np.clip(q, u[0], u[-1])
        s -= u.take(i)
        c0, c1, c2, c3 = self._tail_columns
        y = c3.take(i)
        y *= s
        y += c2.take(i)
        y *= s
        y += c1.take(i)
        y *= s
        y += c0.take(i)
        r0_, r1_, r2_, r3_ = self._rate_columns
        rate = r3_.take(i)
        rate *= s
        rate += r2_.take(i)
        rate *= s
        rate += r1_.take(i)
        rate *= s
        rate += r0_.take(i)
        below, above = q < u[0], q > u[-1]
        if bool(np.any(below)) or bool(np.any(above)):
            (F0, dF0, r0), (w1, dw1, r1) = self._ends
            y = np.where(below, F0 + dF0 * (q - u[0]), np.where(above, w1 + dw1 * (q - u[-1]), y))
            rate = np.where(below, r0, np.where(above, r1 + (q - u[-1]) * dw1, rate))
            lower = below | (lower & ~above)
        with np.errstate(over="ignore"):
            small = np.where(lower, np.minimum(y, 0.0), -np.exp(y))
        return small, rate, small + rate - q, lower

    def values(self, x: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray]:
        """Log density, log CDF and log survival at x > 0."""
        with np.errstate(divide="ignore"):
            q = np.log(x)
        small, _, lf, lower = self._small_side(q)
        with np.errstate(divide="ignore", under="ignore"):
            large = np.log1p(-np.exp(small))
        return lf, np.where(lower, small, large), np.where(lower, large, small)

    def linear(self, x: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray]:
        """Density, CDF and survival at x > 0 (the smaller tail interpolated in logs)."""
        with np.errstate(divide="ignore"):
            q = np.log(x)
        small, _, lf, lower = self._small_side(q)
        with np.errstate(under="ignore"):
            p = np.exp(small)
            f = np.exp(lf)
        return f, np.where(lower, p, 1.0 - p), np.where(lower, 1.0 - p, p)

    def x_of_t(self, t: FloatArray) -> FloatArray:
        """The sum whose logit(CDF) is t, consistent with the interpolated tails."""
        tt = self._t
        i = np.clip(np.searchsorted(tt, t, side="right") - 1, 0, tt.shape[0] - 2)
        target = np.clip(t, tt[0], tt[-1])
        s = target - tt[i]
        c = self._quantile[i]
        u = c[..., 0] + s * (c[..., 1] + s * (c[..., 2] + s * c[..., 3]))
        for _ in range(2):
            small, rate, _, lower = self._small_side(u)
            with np.errstate(divide="ignore", under="ignore", over="ignore", invalid="ignore"):
                large = np.log1p(-np.exp(small))
                # t = log F - log G and its slope in u, from the smaller side
                value = np.where(lower, small - large, large - small)
                slope = np.exp(rate) * (1.0 + np.exp(small - large))
                step = np.where(slope > 0, (target - value) / slope, 0.0)
            u = u + np.clip(step, -0.5, 0.5)
        return np.asarray(np.exp(u), np.float64)


class ScaledLevel:
    """A level times a positive constant (the law of c S)."""

    def __init__(self, level: Level, scale: float) -> None:
        self.level, self.scale = level, scale
        self.count: int = level.count
        self.mean: float = scale * level.mean
        self.sd: float = scale * level.sd
        self.error = level_error(level)
        self._log_scale = math.log(scale)

    def values(self, x: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray]:
        """Log density, log CDF and log survival at x > 0."""
        lf, lF, lG = self.level.values(x / self.scale)
        return lf - self._log_scale, lF, lG

    def linear(self, x: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray]:
        """Density, CDF and survival at x > 0."""
        f, F, G = self.level.linear(x / self.scale)
        return f / self.scale, F, G

    def x_of_t(self, t: FloatArray) -> FloatArray:
        """The value whose logit(CDF) is t."""
        return self.scale * self.level.x_of_t(t)


Level = PositiveReading | SumLevel | ScaledLevel


class _Nodes:
    """Fixed quadrature nodes of one level's law: Gauss-Legendre in t = logit(F) on fixed panels."""

    def __init__(self, level: Level, edges: FloatArray = _EDGES, grading: int = _GRADING) -> None:
        self.grading = grading
        left, width = edges[:-1], np.diff(edges)
        t = (left[:, None] + 0.5 * width[:, None] * (_GL8_X[None, :] + 1.0)).ravel()
        w = (0.5 * width[:, None] * _GL8_W[None, :]).ravel()
        self.t = t
        self.x = level.x_of_t(t)
        self.w = w * special.expit(t) * special.expit(-t)
        self.edges = edges


def _top_nodes(
    level: Level, start: FloatArray, end: FloatArray, grading: int
) -> tuple[FloatArray, FloatArray]:
    """Per-row nodes on [start, end] in t, graded geometrically toward end; (x, log weight)."""
    fractions = np.concatenate([[0.0], 2.0 ** -np.arange(grading, -1, -1.0)])  # 0, 2^-G, ..., 1/2, 1
    bounds = 1.0 - fractions[::-1]  # 0 .. 1 with panels shrinking toward 1
    lo, hi = bounds[:-1], bounds[1:]
    span = (end - start)[:, None, None]
    t = start[:, None, None] + span * (lo[None, :, None] + 0.5 * (hi - lo)[None, :, None] * (_GL8_X + 1.0))
    w = span * 0.5 * (hi - lo)[None, :, None] * _GL8_W
    t = t.reshape(t.shape[0], -1)
    weight = w.reshape(t.shape) * special.expit(t) * special.expit(-t)
    return level.x_of_t(t.ravel()).reshape(t.shape), weight


def _direction(
    weights: Level, nodes: _Nodes, functions: Level, s: FloatArray, low_cut: FloatArray
) -> FloatArray:
    """Log E[H(s - X); X <= s/2] for H = f, F, G of ``functions``, X from ``weights``: shape (3, len s)."""
    half = 0.5 * s
    _, lF, lG = weights.values(half)
    t_star = np.clip(lF - lG, -_NODE_EDGE - 20.0, _NODE_EDGE + 20.0)
    edges = nodes.edges
    panels = edges.shape[0] - 1
    # fixed panels wholly below t* - 1/2; the rest of the way up is graded toward t*
    k = np.searchsorted(edges, t_star - 0.5, side="right") - 1
    inside = k >= 0
    kk = np.clip(k, 0, panels)
    start = np.where(inside, edges[kk], t_star - 10.0)
    end = np.maximum(t_star, start)
    full_end = np.where(inside, kk * _GL8_X.shape[0], 0)
    cut = np.searchsorted(nodes.t, low_cut)
    out = np.full((3, s.shape[0]), -np.inf)
    order = np.argsort(full_end)
    block = 64
    for b in range(0, s.shape[0], block):
        rows = order[b : b + block]
        first = int(np.min(cut[rows]))
        last = int(np.max(full_end[rows]))
        x_top, w_top = _top_nodes(weights, start[rows], end[rows], nodes.grading)
        if last > first:
            xs = nodes.x[first:last]
            q = np.arange(first, last)
            keep = (q[None, :] >= cut[rows][:, None]) & (q[None, :] < full_end[rows][:, None])
            w = np.where(keep, nodes.w[first:last], 0.0)
            x_all = np.concatenate([np.broadcast_to(xs, w.shape), x_top], axis=1)
            w_all = np.concatenate([w, w_top], axis=1)
        else:
            x_all, w_all = x_top, w_top
        y = s[rows][:, None] - x_all
        y = np.where(y > 0, y, s[rows][:, None])
        values = functions.linear(y)
        with np.errstate(divide="ignore"):
            for j, v in enumerate(values):
                out[j, rows] = np.log(np.einsum("ij,ij->i", w_all, v))
    return out


def combine(
    a: Level, nodes_a: _Nodes, b: Level, nodes_b: _Nodes, s: FloatArray
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Log density, log CDF and log survival of S_a + S_b at the points s > 0.

    With the split at s/2 every part is a positive integral (no cancellation beyond a factor 2):
    ``f = E[f_b(s - A); A <= s/2] + E[f_a(s - B); B <= s/2]``,
    ``F = E[F_b(s - A); A <= s/2] + E[F_a(s - B); B <= s/2] - F_a(s/2) F_b(s/2)``,
    ``G = G_a(s/2) G_b(s/2) + E[G_b(s - A); A <= s/2] + E[G_a(s - B); B <= s/2]``.
    """
    half = 0.5 * s
    _, lFa, lGa = a.values(half)
    _, lFb, lGb = b.values(half)
    _, lF_sa, lG_sa = a.values(s)
    _, lF_sb, lG_sb = b.values(s)
    # nodes below these cuts contribute less than 1e-19 of the result (bounds in the notes)
    lower_F = lFa + lFb
    low_G = np.maximum(lG_sa, lG_sb)
    cut_a = np.minimum(_PRUNE + lower_F - lF_sb, _PRUNE + low_G)
    cut_b = np.minimum(_PRUNE + lower_F - lF_sa, _PRUNE + low_G)
    first = _direction(a, nodes_a, b, s, cut_a)
    second = first if a is b else _direction(b, nodes_b, a, s, cut_b)
    lf = np.logaddexp(first[0], second[0])
    lF = _log_diff_exp(np.logaddexp(first[1], second[1]), lFa + lFb)
    lG = np.logaddexp(np.logaddexp(first[2], second[2]), lGa + lGb)
    return lf, np.minimum(lF, 0.0), np.minimum(lG, 0.0)


def _initial_u(mean: float, sd: float, u_low: float, u_high: float) -> FloatArray:
    """Nodes in u = log s: every cv/8 over +/- 4 cv about log(mean), then spacing growing by 1.5."""
    center = math.log(mean)
    cv = min(sd / mean, 1.0)
    step = cv / 8.0
    core = center + step * np.arange(-32, 33)
    growth = np.cumsum(1.5 ** np.arange(1, 60))
    up = center + 4.0 * cv + step * growth
    down = center - 4.0 * cv - step * growth
    u = np.concatenate(
        [core, up[: int(np.searchsorted(up, u_high)) + 1], down[: int(np.searchsorted(-down, -u_low)) + 1]]
    )
    return np.unique(u)


def _relative_misses(
    level: SumLevel, u: FloatArray, lf: FloatArray, lF: FloatArray, lG: FloatArray
) -> FloatArray:
    """Relative error of the level's interpolation at points u (small tail sides; density looser)."""
    jf, jF, jG = level.values(np.exp(u))
    with np.errstate(invalid="ignore", over="ignore"):
        small_F = np.where(lF < math.log(0.5), np.abs(np.expm1(jF - lF)), 0.0)
        small_G = np.where(lG < math.log(0.5), np.abs(np.expm1(jG - lG)), 0.0)
        dens = 1e-3 * np.abs(np.expm1(jf - lf))
    out = np.fmax(np.fmax(small_F, small_G), dens)
    return np.where(np.isfinite(out), out, np.inf)


def _quadrature_error(a: Level, b: Level, s: FloatArray, nodes: tuple[_Nodes, _Nodes]) -> float:
    """Largest relative change at sample points when every panel is halved and grading deepened."""
    fine = (_Nodes(a, _FINE_EDGES, _GRADING + 4), _Nodes(b, _FINE_EDGES, _GRADING + 4))
    coarse_values = combine(a, nodes[0], b, nodes[1], s)
    fine_values = combine(a, fine[0], b, fine[1], s)
    worst = 0.0
    for (x, y), side in zip(zip(coarse_values, fine_values, strict=True), (None, "F", "G"), strict=True):
        if side is None:
            continue
        with np.errstate(invalid="ignore", over="ignore"):
            small = (x < math.log(0.5)) & np.isfinite(y) & (y > _DOMAIN)
            rel = np.abs(np.expm1(x - y))[small]
        if rel.shape[0]:
            worst = max(worst, float(np.max(rel)))
    return worst


def _sum_level(a: Level, b: Level, tolerance: float = _LEVEL_TOLERANCE) -> SumLevel:
    """The law of S_a + S_b tabulated in u = log s, refined until it interpolates to ``tolerance``."""
    nodes = (_Nodes(a), _Nodes(b))
    mean = a.mean + b.mean
    sd = math.hypot(a.sd, b.sd)
    s_low = min(float(a.x_of_t(np.array([-69.0]))[0]), float(b.x_of_t(np.array([-69.0]))[0]))
    s_high = 2.0 * max(float(a.x_of_t(np.array([138.0]))[0]), float(b.x_of_t(np.array([138.0]))[0]))
    u = _initial_u(mean, sd, math.log(s_low), math.log(s_high))
    lf, lF, lG = combine(a, nodes[0], b, nodes[1], np.exp(u))
    # keep the nodes where both tails are above the domain floor, and one more at each end,
    # brought in (by bisection) to within 0.25 in u of the last one or to tails above 1e-250
    ok = np.flatnonzero((lF > _DOMAIN) & (lG > _DOMAIN) & np.isfinite(lf))
    lo, hi = max(int(ok[0]) - 1, 0), min(int(ok[-1]) + 2, u.shape[0])
    u, lf, lF, lG = u[lo:hi], lf[lo:hi], lF[lo:hi], lG[lo:hi]
    for _ in range(40):
        ends = []
        if lF[0] <= _DOMAIN and (u[1] - u[0] > 0.25 or lF[0] < _FAR):
            ends.append(0.5 * (u[0] + u[1]))
        if lG[-1] <= _DOMAIN and (u[-1] - u[-2] > 0.25 or lG[-1] < _FAR):
            ends.append(0.5 * (u[-1] + u[-2]))
        if not ends:
            break
        mid = np.asarray(ends)
        mf, mF, mG = combine(a, nodes[0], b, nodes[1], np.exp(mid))
        for m, vf, vF, vG in zip(mid.tolist(), mf.tolist(), mF.tolist(), mG.tolist(), strict=True):
            lower = m < u[1]
            outside = (vF <= _DOMAIN) if lower else (vG <= _DOMAIN)
            j = 0 if lower else u.shape[0] - 1
            if outside:
                u[j], lf[j], lF[j], lG[j] = m, vf, vF, vG
            else:
                k = 1 if lower else u.shape[0] - 1
                u, lf, lF, lG = (np.insert(v, k, w) for v, w in ((u, m), (lf, vf), (lF, vF), (lG, vG)))
    lf, lF, lG = (np.maximum(v, 3.0 * _DOMAIN) for v in (lf, lF, lG))
    interpolation = 0.0
    pending = np.ones(u.shape[0] - 1, dtype=bool)
    for _ in range(10):
        level = SumLevel(a.count + b.count, u, lf, lF, lG, mean, sd, 0.0)
        cells = np.flatnonzero(pending)
        if cells.shape[0] == 0:
            break
        mid = 0.5 * (u[cells] + u[cells + 1])
        mf, mF, mG = combine(a, nodes[0], b, nodes[1], np.exp(mid))
        mf, mF, mG = (np.maximum(v, 3.0 * _DOMAIN) for v in (mf, mF, mG))
        miss = _relative_misses(level, mid, mf, mF, mG)
        interpolation = max(interpolation, float(np.max(np.where(miss <= tolerance, miss, 0.0))))
        bad = miss > tolerance
        if not bool(np.any(bad)):
            break
        # the failing midpoints become nodes; the cells on both sides are checked next round
        u = np.concatenate([u, mid[bad]])
        lf, lF, lG = (np.concatenate([v, w[bad]]) for v, w in ((lf, mf), (lF, mF), (lG, mG)))
        order = np.argsort(u)
        u, lf, lF, lG = u[order], lf[order], lF[order], lG[order]
        new = np.zeros(u.shape[0], dtype=bool)
        new[np.searchsorted(u, mid[bad])] = True
        pending = new[:-1] | new[1:]
    else:
        interpolation = max(interpolation, tolerance)
    sample = np.exp(u[:: max(1, u.shape[0] // 12)])
    quadrature = _quadrature_error(a, b, sample, nodes)
    error = level_error(a) + level_error(b) + interpolation + quadrature
    return SumLevel(a.count + b.count, u, lf, lF, lG, mean, sd, error)


def level_error(level: Level) -> float:
    """The relative error carried by a level (rounding only for one reading: closed forms)."""
    return 1e-15 if isinstance(level, PositiveReading) else level.error


def sum_of(parent: Parent, n: int) -> Level:
    """The law of the sum of n readings as a level (tabulated for n >= 2)."""
    reading = PositiveReading(parent)
    powers: list[Level] = [reading]
    while 2 ** len(powers) <= n:
        powers.append(_sum_level(powers[-1], powers[-1]))
    total: Level | None = None
    for j in range(len(powers) - 1, -1, -1):
        if n >> j & 1:
            total = powers[j] if total is None else _sum_level(total, powers[j])
    assert total is not None  # noqa: S101 - n >= 1
    return total


def weighted_sum(level: Level, first: float, ratio: float, terms: int) -> Level:
    """The law of ``sum_(j < terms) first ratio^j X_j`` for independent copies X_j of ``level``.

    Blocks of 1, 2, 4, ... terms are built by doubling (a block of 2k terms is a block of k
    plus the same block times ratio^k) and the blocks of the binary digits of ``terms``
    joined, each scaled by ratio to the number of terms before it.
    """
    blocks: list[Level] = [ScaledLevel(level, first)]
    while 2 ** len(blocks) <= terms:
        k = 2 ** (len(blocks) - 1)
        block = blocks[-1]
        blocks.append(_sum_level(block, ScaledLevel(block, ratio**k)))
    total: Level | None = None
    before = 0
    for j in range(len(blocks)):
        if terms >> j & 1:
            part = blocks[j] if before == 0 else ScaledLevel(blocks[j], ratio**before)
            total = part if total is None else _sum_level(total, part)
            before += 2**j
    assert total is not None  # noqa: S101 - terms >= 1
    return total


class PositiveSum:
    """The law of the sum of ``n`` positive readings by repeated convolution in x (see the notes)."""

    def __init__(self, parent: Parent, n: int) -> None:
        reading = PositiveReading(parent)
        powers: list[Level] = [reading]
        while 2 ** len(powers) <= n:
            last = powers[-1]
            powers.append(_sum_level(last, last))
        parts = [powers[j] for j in range(len(powers)) if n >> j & 1]
        parts.reverse()
        total = parts[0]
        for part in parts[1:-1]:
            total = _sum_level(total, part)
        self.n = n
        self.levels = [*powers[1:], total] if len(parts) > 2 else powers[1:]
        self.mean = n * reading.mean
        self.sd = math.sqrt(n) * reading.sd
        if len(parts) == 1:
            # a power of two: its last doubling is the final step
            half = powers[-2] if len(powers) >= 2 else reading
            self._a: Level = half
            self._b: Level = half
        else:
            self._a, self._b = total, parts[-1]
        self._nodes = (_Nodes(self._a), _Nodes(self._b) if self._b is not self._a else None)
        self.quadrature_error = _quadrature_error(
            self._a,
            self._b,
            self.mean * np.array([0.3, 0.6, 0.9, 1.0, 1.1, 1.5, 2.0, 3.0]),
            (self._nodes[0], self._nodes[1] or self._nodes[0]),
        )
        self.error = level_error(self._a) + level_error(self._b) + self.quadrature_error

    def values(self, s: FloatArray) -> tuple[FloatArray, FloatArray, FloatArray]:
        """Log density, log CDF and log survival of the sum at s > 0."""
        na = self._nodes[0]
        nb = self._nodes[1] or na
        return combine(self._a, na, self._b, nb, s)


def sum_nodes(total: PositiveSum) -> FloatArray:
    """Starting nodes (values of the sum) for tabulating ``total``: its body and both tails."""
    a, b = total._a, total._b
    s_low = min(float(a.x_of_t(np.array([-69.0]))[0]), float(b.x_of_t(np.array([-69.0]))[0]))
    s_high = 2.0 * max(float(a.x_of_t(np.array([138.0]))[0]), float(b.x_of_t(np.array([138.0]))[0]))
    return np.exp(_initial_u(total.mean, total.sd, math.log(s_low), math.log(s_high)))


def level_nodes(level: Level) -> FloatArray:
    """Starting nodes for tabulating a level: its body and both tails."""
    low = float(level.x_of_t(np.array([-92.0]))[0])
    high = float(level.x_of_t(np.array([92.0]))[0])
    return np.exp(_initial_u(level.mean, level.sd, math.log(low), math.log(high)))
