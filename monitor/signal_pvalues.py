"""p-values of a chart's signals under its parent model, with exact laws built off the event loop.

A chart's ``parent`` setting says what the in-control readings look like:

* ``normal`` (the default): normal readings with the chart's own center and sigma; p-values
  from :mod:`monitor.spc.pvalues` (closed forms);
* ``NAME:key=value,...`` (for example ``gamma:shape=2,scale=1.5``): that model, in the chart's
  units, fixed;
* ``auto``: the families normal, lognormal, gamma and Weibull are fitted to the Phase I
  baseline readings by maximum likelihood and the lowest AIC wins, except that normal is kept
  when its AIC is within 2 of the best (the simpler model, when the data cannot tell them
  apart); when the winner fails its Anderson-Darling test, the empirical model is used;
* a family name alone (``gamma``, ``lognormal``, ...): that family fitted to the baseline;
* ``empirical``: a smoothed density of the baseline readings.

Laws of chart statistics take from microseconds (closed forms) to seconds (lognormal
convolutions), so they are built in a worker thread the first time they are needed and kept
(:class:`LawWorkshop`). Until a law is ready, a signal's p-value is the normal approximation,
and its method says so; the same holds while a fitted parent is being fitted. CUSUM sums get
the tail of their stationary law (a Markov chain, :func:`monitor.spc.arl.cusum_tail_curve`).

Examples:
    >>> choice = parse_parent_choice("auto")
    >>> choice.mode, choice.families
    ('fit', ('normal', 'lognormal', 'gamma', 'weibull'))
    >>> parse_parent_choice("gamma:shape=2,scale=1.5").parent.describe()
    'gamma(shape=2, scale=1.5)'
"""

from __future__ import annotations

import asyncio
import contextlib
import math
import threading
from collections import OrderedDict
from collections.abc import Callable, Mapping
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import dataclass
from functools import cache
from typing import TYPE_CHECKING, Literal

import numpy as np
import structlog

from monitor.spc.arl import CusumTailCurve, cusum_tail_curve, normal_cdf
from monitor.spc.chartset import ChartSpec
from monitor.spc.errors import ConfigError
from monitor.spc.limits import ProcessParameters
from monitor.spc.parents import (
    DEFAULT_CANDIDATES,
    FAMILIES,
    FitReport,
    Parent,
    empirical,
    fit_parent,
    parse_parent,
)
from monitor.spc.pvalues import PValue, p_value
from monitor.spc.signals import Side, Signal
from monitor.spc.types import Statistic

if TYPE_CHECKING:
    from monitor.spc.laws import Law, LawCache

__all__ = [
    "ChartPValues",
    "LawWorkshop",
    "ParentChoice",
    "choose_parent",
    "parent_from_record",
    "parent_record",
    "parent_setting",
    "parse_parent_choice",
    "settle_fit",
    "shared_workshop",
]

_log = structlog.get_logger("monitor.pvalues")

NORMAL_WITHIN_AIC = 2.0
"""A fitted non-normal family must beat normal by more than this much AIC to be chosen."""

MIN_FIT_READINGS = 20
"""Fewest baseline readings a parent is fitted to."""

_FIT_NAMES = ("normal", "lognormal", "gamma", "weibull", "exponential", "uniform")


@dataclass(frozen=True, slots=True)
class ParentChoice:
    """What a chart's ``parent`` setting asks for.

    Attributes:
        mode: ``normal`` (chart center and sigma), ``fixed`` (``parent`` given) or ``fit``
            (fitted to the baseline readings).
        parent: the fixed parent (mode ``fixed``).
        families: the candidate families (mode ``fit``); ``("empirical",)`` for the smoothed
            density of the readings themselves.
        text: the setting as written.
    """

    mode: Literal["normal", "fixed", "fit"]
    parent: Parent | None = None
    families: tuple[str, ...] = ()
    text: str = "normal"


def parse_parent_choice(text: str) -> ParentChoice:
    """Read a chart's ``parent`` setting; ConfigError naming the allowed forms otherwise.

    Examples:
        >>> parse_parent_choice("empirical").families
        ('empirical',)
        >>> parse_parent_choice("normal").mode
        'normal'
        >>> parse_parent_choice("cauchy")
        Traceback (most recent call last):
        ...
        monitor.spc.errors.ConfigError: unknown parent 'cauchy'; allowed: normal, auto, empirical, ...
    """
    if not isinstance(text, str) or not text.strip():
        raise ConfigError("parent must be a non-empty text")
    written = text.strip()
    word = written.lower()
    if word == "normal":
        return ParentChoice("normal", text=written)
    if word == "auto":
        return ParentChoice("fit", families=tuple(DEFAULT_CANDIDATES), text=written)
    if word == "empirical":
        return ParentChoice("fit", families=("empirical",), text=written)
    if word in _FIT_NAMES:
        return ParentChoice("fit", families=(word,), text=written)
    if ":" in written or "(" in written:
        return ParentChoice("fixed", parent=parse_parent(written), text=written)
    raise ConfigError(
        f"unknown parent {written!r}; allowed: normal, auto, empirical, a family to fit "
        f"({', '.join(_FIT_NAMES)}), or NAME:key=value,... with NAME one of {', '.join(FAMILIES)}"
    )


def choose_parent(sample: np.ndarray | list[float], choice: ParentChoice) -> tuple[Parent, str]:
    """The parent for a baseline sample under a ``fit`` choice, and a sentence on how it was chosen.

    Examples:
        >>> rng = np.random.default_rng(3)
        >>> parent, how = choose_parent(rng.normal(10.0, 2.0, 200), parse_parent_choice("auto"))
        >>> parent.name
        'normal'
    """
    x = np.asarray(sample, dtype=np.float64)
    x = x[np.isfinite(x)]
    if x.shape[0] < MIN_FIT_READINGS:
        raise ConfigError(f"a parent is fitted to at least {MIN_FIT_READINGS} readings, got {x.shape[0]}")
    if choice.families == ("empirical",):
        return empirical(x), f"empirical: smoothed density of {x.shape[0]} baseline readings"
    return settle_fit(fit_parent(x, choice.families))


def settle_fit(report: FitReport) -> tuple[Parent, str]:
    """The parent a fit report leads to, keeping normal when it is within 2 AIC of the best.

    Examples:
        >>> rng = np.random.default_rng(3)
        >>> parent, how = settle_fit(fit_parent(rng.gamma(2.0, 1.0, 400), bootstrap=99))
        >>> parent.name, how.startswith("gamma by AIC")
        ('gamma', True)
    """
    chosen = report.chosen
    how = (
        f"{chosen.name} by AIC among {', '.join(c.parent.name for c in report.candidates)}; "
        f"Anderson-Darling p = {report.p_value:.3g}"
    )
    if report.fell_back:
        return chosen, (
            f"empirical: no family fitted (best {report.best.name}, "
            f"Anderson-Darling p = {report.p_value:.3g})"
        )
    normal = next((c for c in report.candidates if c.parent.name == "normal"), None)
    best = report.candidates[0]
    if normal is not None and chosen.name != "normal" and normal.aic - best.aic <= NORMAL_WITHIN_AIC:
        return normal.parent, (
            f"normal: within {NORMAL_WITHIN_AIC:g} AIC of the best family ({best.parent.name}); "
            f"Anderson-Darling p = {report.p_value:.3g} for {best.parent.name}"
        )
    return chosen, how


def parent_setting(parent: Parent) -> str | None:
    """The ``parent`` setting that fixes an analytic parent (None for an empirical one).

    Examples:
        >>> parent_setting(Parent.of("gamma", shape=2.0, scale=0.123456789))
        'gamma:shape=2,scale=0.1234568'
    """
    if parent.name == "empirical":
        return None
    return f"{parent.name}:" + ",".join(f"{k}={v:.7g}" for k, v in parent.params)


def parent_record(parent: Parent, sample: np.ndarray | list[float] | None = None) -> dict[str, object]:
    """A parent as plain JSON data (an empirical one keeps its sample, from which it is rebuilt).

    Examples:
        >>> parent_from_record(parent_record(Parent.of("uniform", low=0.0, high=2.0))).describe()
        'uniform(low=0, high=2)'
    """
    if parent.name == "empirical":
        if sample is None:
            raise ConfigError("an empirical parent is recorded with its sample")
        return {"name": "empirical", "sample": [float(v) for v in np.asarray(sample, dtype=np.float64)]}
    return {"name": parent.name, "params": dict(parent.params)}


def parent_from_record(record: Mapping[str, object]) -> Parent:
    """The parent of :func:`parent_record` (ConfigError if the record is not one)."""
    name = record.get("name")
    if name == "empirical":
        sample = record.get("sample")
        if not isinstance(sample, list):
            raise ConfigError("empirical parent record lacks its sample")
        return empirical(np.asarray(sample, dtype=np.float64))
    params = record.get("params")
    if not isinstance(name, str) or not isinstance(params, dict):
        raise ConfigError(f"not a parent record: {dict(record)!r}")
    return Parent(name, tuple((str(k), float(v)) for k, v in params.items()))


# ---------------------------------------------------------------- building off the loop


class LawPendingError(Exception):
    """The law is being built; ask again later."""


class LawWorkshop:
    """Things that take long to compute, built once in a worker thread and kept (bounded, LRU).

    ``get(key, build)`` returns the value if it is ready, else starts the build (once) and
    returns None. Only the thread that owns the workshop calls ``get``; the worker only builds.
    A build that fails is remembered as failed (None forever, logged once).
    """

    def __init__(self, maxsize: int = 512, workers: int = 1) -> None:
        self.maxsize = maxsize
        self._ready: OrderedDict[object, object] = OrderedDict()
        self._failed: dict[object, str] = {}
        self._pending: dict[object, Future[object]] = {}
        self._executor = ThreadPoolExecutor(max_workers=workers, thread_name_prefix="laws")
        self._lock = threading.Lock()
        self.built = 0

    def get(self, key: object, build: Callable[[], object]) -> object | None:
        """The value for ``key`` if built; otherwise start building it and return None."""
        with self._lock:
            if key in self._ready:
                self._ready.move_to_end(key)
                return self._ready[key]
            if key in self._failed or key in self._pending:
                return None
            self._pending[key] = future = self._executor.submit(build)
        future.add_done_callback(lambda done: self._finish(key, done))
        return None

    def failure(self, key: object) -> str | None:
        """Why the build for ``key`` failed, if it did."""
        return self._failed.get(key)

    def _finish(self, key: object, done: Future[object]) -> None:
        with self._lock:
            self._pending.pop(key, None)
            error = done.exception()
            if error is not None:
                self._failed[key] = str(error) or type(error).__name__
                _log.warning("law_failed", key=repr(key)[:200], error=self._failed[key])
                return
            self._ready[key] = done.result()
            self.built += 1
            _log.info("law_ready", what=_describe_key(key))
            while len(self._ready) > self.maxsize:
                self._ready.popitem(last=False)

    @property
    def pending(self) -> int:
        """Builds under way or queued."""
        with self._lock:
            return len(self._pending)

    async def settled(self, within: float = 60.0) -> bool:
        """Wait until no build is under way (True) or ``within`` seconds pass (False)."""
        deadline = asyncio.get_running_loop().time() + within
        while self.pending:
            if asyncio.get_running_loop().time() >= deadline:
                return False
            await asyncio.sleep(0.01)
        return True

    def close(self) -> None:
        """Stop the worker (builds under way finish; queued ones are dropped)."""
        self._executor.shutdown(wait=False, cancel_futures=True)


def _describe_key(key: object) -> str:
    """A short text for a workshop key (parents by their description)."""
    parts = key if isinstance(key, tuple) else (key,)
    return " ".join(p.describe() if isinstance(p, Parent) else str(p) for p in parts)[:200]


_SHARED: list[LawWorkshop] = []


def shared_workshop() -> LawWorkshop:
    """The process's workshop (made on first use), shared by its charts so equal laws are built once."""
    if not _SHARED:
        _SHARED.append(LawWorkshop())
    return _SHARED[0]


@cache
def _workshop_laws() -> type[LawCache]:
    """A law cache whose misses are built in a workshop (made on first use: laws load slowly)."""
    from monitor.spc.laws import LawCache  # noqa: PLC0415

    class WorkshopLaws(LawCache):
        def __init__(self, workshop: LawWorkshop) -> None:
            super().__init__(maxsize=1)
            self._workshop = workshop

        def _get(self, key: tuple[object, ...], build: Callable[[], Law]) -> Law:
            law = self._workshop.get(("law", *key), build)
            if law is None:
                failure = self._workshop.failure(("law", *key))
                raise LawPendingError(failure or "being built")
            return law  # type: ignore[return-value]

    return WorkshopLaws


# ---------------------------------------------------------------- one chart


def _fit_key(chart: str, version: int) -> tuple[object, ...]:
    return ("fit", chart, version)


class ChartPValues:
    """The p-values of one chart's signals under its parent model.

    Args:
        chart_id: the chart (part of the key of its parent fit).
        spec: the chart's settings (rules, limit width, EWMA and CUSUM parameters).
        choice: the ``parent`` setting.
        workshop: where laws and fits are built.
    """

    def __init__(self, chart_id: str, spec: ChartSpec, choice: ParentChoice, workshop: LawWorkshop) -> None:
        self.chart_id = chart_id
        self.spec = spec
        self.choice = choice
        self.workshop = workshop
        self.parent: Parent | None = choice.parent
        self.parent_how = "fixed in the configuration" if choice.parent is not None else ""
        self.record: dict[str, object] | None = None
        self.sample: list[float] | None = None  # baseline readings waiting for a fit
        self._fit_version = 0
        self._cache: LawCache | None = None

    @property
    def _laws(self) -> LawCache:
        if self._cache is None:
            self._cache = _workshop_laws()(self.workshop)  # type: ignore[arg-type]
        return self._cache

    # -- the parent

    @property
    def described(self) -> str:
        """The parent model as text (``normal`` for the chart's own normal model)."""
        if self.choice.mode == "normal":
            return "normal"
        if self.parent is None:
            return f"{self.choice.text} ({self.parent_how or 'not fitted yet'})"
        return self.parent.describe()

    def fit(self, sample: list[float]) -> None:
        """Fit the parent (mode ``fit``) to baseline readings, in the workshop."""
        if self.choice.mode != "fit":
            return
        self.sample = [float(v) for v in sample if math.isfinite(v)]
        self.parent = None
        self.record = None
        self.parent_how = ""
        self._fit_version += 1
        self.poll_fit()

    def poll_fit(self) -> bool:
        """Take the fitted parent if its fit has finished (True then)."""
        if self.sample is None or self.parent is not None:
            return False
        sample, choice = np.asarray(self.sample), self.choice
        key = (*_fit_key(self.chart_id, self._fit_version), len(sample), float(sample.sum()))
        found = self.workshop.get(key, lambda: choose_parent(sample, choice))
        if found is None:
            failure = self.workshop.failure(key)
            if failure is not None:  # normal approximations from now on, and said so
                self.parent_how = f"fit failed: {failure}"
                self.sample = None
                _log.warning("parent_fit_failed", chart=self.chart_id, error=failure)
            return False
        if not isinstance(found, tuple):  # pragma: no cover - the workshop keeps what choose_parent made
            return False
        parent: Parent = found[0]
        how: str = found[1]
        self.parent, self.parent_how = parent, how
        self.record = parent_record(parent, self.sample)
        self.sample = None
        _log.info("parent_fitted", chart=self.chart_id, parent=parent.describe(), how=how)
        return True

    def adopt(self, record: Mapping[str, object] | None) -> None:
        """Take a parent stored with a limits version (fitted by ``monitor baseline``)."""
        if record is None or self.choice.mode != "fit":
            return
        try:
            parent = parent_from_record(record)
        except (ConfigError, ValueError, TypeError) as exc:
            _log.warning("parent_record_unreadable", chart=self.chart_id, error=str(exc))
            return
        self.parent, self.record, self.sample = parent, dict(record), None
        self.parent_how = "stored with the limits"

    def to_state(self) -> dict[str, object]:
        """The fitted parent (or the readings waiting for a fit) as plain data."""
        return {"record": self.record, "sample": self.sample, "how": self.parent_how}

    def restore(self, state: Mapping[str, object]) -> None:
        """Continue from :meth:`to_state` (fixed parents come from the configuration)."""
        if self.choice.mode != "fit":
            return
        record, sample, how = state.get("record"), state.get("sample"), state.get("how")
        if isinstance(record, dict):
            self.adopt(record)
            if isinstance(how, str):
                self.parent_how = how
        elif isinstance(sample, list):
            self.fit([float(v) for v in sample if isinstance(v, int | float)])

    # -- laws the chart will need, started early

    def prepare(self, parameters: ProcessParameters | None, n: int) -> None:
        """Start building the laws the chart's signals will need at subgroup size ``n``."""
        self.poll_fit()
        if parameters is None or self.spec.attribute is not None:
            return
        if self.parent is not None:
            for size in {n, 1}:
                with contextlib.suppress(LawPendingError):
                    self._laws.mean(self.parent, size)
        if any(k.value == "cusum" for k in self.spec.kinds):
            for side in ("upper", "lower"):
                self._cusum_curve(parameters, n, side)

    # -- p-values

    def _cusum_curve(
        self, parameters: ProcessParameters, n: int, side: str
    ) -> tuple[CusumTailCurve | None, str]:
        k, h = self.spec.cusum.k, self.spec.cusum.h
        if self.parent is None or self.choice.mode == "normal":
            key: tuple[object, ...] = ("cusum", "normal", k, h)  # both sides alike

            def build() -> object:
                return cusum_tail_curve(k, h, cdf=normal_cdf)

            method = "Markov chain (stationary law of the sum, normal points)"
        else:
            parent, mean, sigma = self.parent, parameters.mean, parameters.sigma or 1.0
            key = ("cusum", parent, n, mean, sigma, k, h, side)

            def build() -> object:
                from monitor.spc.laws import law_of_mean  # noqa: PLC0415

                law = law_of_mean(parent, n)
                spread = sigma / math.sqrt(n)

                def cdf(z: np.ndarray) -> np.ndarray:
                    return law.cdf(mean + np.asarray(z, dtype=np.float64) * spread)

                return cusum_tail_curve(k, h, cdf=cdf, side="upper" if side == "upper" else "lower")

            method = "Markov chain (stationary law of the sum under the parent's law of the mean)"
        curve = self.workshop.get(key, build)
        return (curve if isinstance(curve, CusumTailCurve) else None), method

    def of(self, signal: Signal, n: int, parameters: ProcessParameters | None) -> PValue:
        """The p-value of one signal (normal approximation, said so, while a law is being built)."""
        self.poll_fit()
        described = self.described
        if signal.statistic in (Statistic.CUSUM_UPPER, Statistic.CUSUM_LOWER):
            if parameters is None:
                return PValue(None, "not computed (no limits)", described)
            side = "upper" if signal.side is Side.UPPER else "lower"
            curve, method = self._cusum_curve(parameters, n, side)
            if curve is None:
                return PValue(None, "not computed yet (the law of the sum is being built)", described)
            return PValue(curve(signal.value), method, described)
        normal = p_value(signal, n=n, rules=self.spec.rules, limit_sigma=self.spec.limit_sigma)
        if self.choice.mode == "normal" or self.spec.attribute is not None:
            return PValue(normal.value, normal.method, normal.parent)
        if self.spec.exact_scale is not None and signal.statistic in (Statistic.MEAN, Statistic.INDIVIDUAL):
            # probability limits: the point's z is its normal score under the exact law, so the
            # normal tail of z is the exact tail, and zones are exact quantiles
            how = "closed form on the exact law's normal scores (probability limits)"
            return PValue(normal.value, how, described)
        if self.parent is None:
            return PValue(normal.value, f"normal approximation (parent {described})", described)
        smoothing = self.spec.ewma.smoothing if signal.statistic is Statistic.EWMA else None
        from monitor.spc.laws import signal_p_value  # noqa: PLC0415 - loaded only for non-normal parents

        try:
            exact = signal_p_value(
                signal,
                parent=self.parent,
                n=n,
                rules=self.spec.rules,
                limit_sigma=self.spec.limit_sigma,
                smoothing=smoothing,
                cache=self._laws,
            )
        except LawPendingError as pending:
            why = "being built" if str(pending) == "being built" else f"failed: {pending}"
            return PValue(normal.value, f"normal approximation (the exact law is {why})", described)
        except ConfigError as exc:
            return PValue(normal.value, f"normal approximation ({exc})", described)
        return PValue(exact.value, exact.method, exact.parent)
