"""Probability limits: judge subgroup means on the scale of their exact law.

Normal-theory limits put the mean chart's limits at ``mean -/+ L sigma / sqrt(n)``. For small
subgroups of a skewed process the real tail probabilities beyond those limits are not the
normal ``Phi(-L)``. An :class:`ExactScale` maps each subgroup mean to its *normal score* under
the exact in-control law ``F_n`` of the mean of ``n`` readings (:mod:`monitor.spc.laws`)::

    z = Phi^-1(F_n(xbar))

On that scale the rules work unchanged, and their lines become quantiles of the exact law:
the limits ``z = -/+ L`` are ``F_n^-1(Phi(-L))`` and ``F_n^-1(Phi(L))`` (probability limits
with tail probability ``Phi(-L)`` on each side, 0.00135 for L = 3), the zone lines are the
quantiles at ``Phi(-/+1)`` and ``Phi(-/+2)``, and the center line is the median of ``F_n``.
Every rule then has exactly the in-control false-alarm probability it has for a normal
process, and so does the whole rule set.

Examples:
    >>> from monitor.spc.parents import Parent
    >>> scale = ExactScale(Parent.of("exponential", mean=1.0))
    >>> center, lower, upper = scale.lines(4, 3.0)
    >>> round(lower, 4), round(upper, 4)  # gamma(4, 1/4) quantiles at 0.00135 and 0.99865
    (0.1163, 3.1701)
    >>> round(scale.z(3.1701, 4), 3)
    3.0
"""

from __future__ import annotations

from collections.abc import Mapping
from functools import lru_cache
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import NDArray
from scipy import special

from monitor.spc.errors import ConfigError
from monitor.spc.parents import Parent
from monitor.spc.types import State

if TYPE_CHECKING:
    from monitor.spc.laws import Law

__all__ = ["ExactScale"]

FloatArray = NDArray[np.float64]


class ExactScale:
    """Normal scores of subgroup means under the exact law of the mean for a parent model.

    Args:
        parent: the in-control model of single readings (an analytic family; empirical
            parents are not written into chart state).

    Laws are built on first use per parent and subgroup size and shared by every scale of that
    parent (milliseconds for closed forms, up to a second for a lognormal convolution: warm
    them at start-up with :meth:`lines`).
    """

    __slots__ = ("_lines", "parent")

    def __init__(self, parent: Parent) -> None:
        if not isinstance(parent, Parent):
            raise ConfigError(f"an exact scale needs a parent model, got {parent!r}")
        if parent.name == "empirical":
            raise ConfigError("probability limits need an analytic parent model (NAME:key=value)")
        self.parent = parent
        self._lines: dict[tuple[int, float], tuple[float, float, float]] = {}

    def __eq__(self, other: object) -> bool:
        """Same parent."""
        return isinstance(other, ExactScale) and other.parent == self.parent

    def __hash__(self) -> int:
        """Hash of the parent."""
        return hash(self.parent)

    def __repr__(self) -> str:
        """The parent it stands for."""
        return f"ExactScale({self.parent.describe()})"

    def _law(self, n: int) -> Law:
        return _mean_law(self.parent, n)

    def z(self, x: float, n: int) -> float:
        """The normal score of one subgroup mean of ``n`` readings."""
        return float(self.z_many(np.array([x], dtype=np.float64), np.array([n]))[0])

    def z_many(self, x: FloatArray, sizes: NDArray[np.int64]) -> FloatArray:
        """Normal scores of subgroup means (vectorised per distinct size)."""
        out = np.empty(x.shape, dtype=np.float64)
        for n in np.unique(sizes):
            at = sizes == n
            law = self._law(int(n))
            values = x[at]
            lower = np.asarray(law.cdf(values), dtype=np.float64)
            upper = np.asarray(law.sf(values), dtype=np.float64)
            # the smaller tail carries the precision: Phi^-1(F) below the median, -Phi^-1(S) above
            out[at] = np.where(lower <= upper, special.ndtri(lower), -special.ndtri(upper))
        return out

    def lines(self, n: int, limit_sigma: float) -> tuple[float, float, float]:
        """Center line (the median), lower and upper limits for means of ``n`` readings."""
        key = (n, limit_sigma)
        found = self._lines.get(key)
        if found is None:
            law = self._law(n)
            tail = float(special.ndtr(-limit_sigma))
            found = (float(law.ppf(0.5)), float(law.ppf(tail)), float(law.isf(tail)))
            self._lines[key] = found
        return found

    def lines_many(
        self, sizes: NDArray[np.int64], limit_sigma: float
    ) -> tuple[FloatArray, FloatArray, FloatArray]:
        """:meth:`lines` for each subgroup size."""
        center = np.empty(sizes.shape, dtype=np.float64)
        lower = np.empty(sizes.shape, dtype=np.float64)
        upper = np.empty(sizes.shape, dtype=np.float64)
        for n in np.unique(sizes):
            at = sizes == n
            center[at], lower[at], upper[at] = self.lines(int(n), limit_sigma)
        return center, lower, upper

    def to_state(self) -> State:
        """The parent as plain data."""
        return {"name": self.parent.name, "params": dict(self.parent.params)}

    @classmethod
    def from_state(cls, state: Mapping[str, object]) -> ExactScale:
        """Rebuild from :meth:`to_state`."""
        name, params = state.get("name"), state.get("params")
        if not isinstance(name, str) or not isinstance(params, Mapping):
            raise ConfigError(f"not an exact scale: {dict(state)!r}")
        values = tuple((str(k), float(v)) for k, v in params.items() if isinstance(v, int | float))
        return cls(Parent(name, values))


@lru_cache(maxsize=256)
def _mean_law(parent: Parent, n: int) -> Law:
    from monitor.spc.laws import law_of_mean  # noqa: PLC0415 - loaded only when used

    return law_of_mean(parent, n)
