"""The daemon: MQTT in, subgroups, charts, storage, alerts out.

Data flow (one direction)::

    MqttLink -> decode -> route -> de-duplicate -> subgroups -> chart sets -> signals
             -> alert trackers -> one store transaction (subgroups, signals, alerts, limits,
                checkpoints) -> acknowledge the messages -> publish the alerts (outbox)

One task reads and processes messages and commits them in groups (it also advances time
windows when no message comes); one task publishes committed alerts until the broker
confirms each, and the retained chart states; the MQTT link runs in its own task.

A message is acknowledged only after everything it carried is committed, so a crash loses
nothing. A message the broker sends again after a crash or a reconnect keeps its packet id, so
it is recognised by (topic, packet id, payload digest) and counted once; when payloads carry a
sequence number, readings whose sequence does not increase are dropped as duplicates too.
"""

from __future__ import annotations

import asyncio
import base64
import bisect
import contextlib
import gc
import hashlib
import importlib
import math
import os
import re
import signal
import sys
import time
from collections import Counter, OrderedDict, deque
from collections.abc import Awaitable, Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, TypeVar

import numpy as np
import orjson
from numpy.typing import NDArray

from monitor import sdnotify
from monitor.alerts import (
    AckError,
    Alert,
    AlertSettings,
    AlertTracker,
    Severity,
    SignalContext,
    parse_ack,
    topics,
)
from monitor.config import ChartConfig, Config, ConfigProblems, load_config, resolve_password, storage_url
from monitor.health import (
    DatabaseWatch,
    GaugeSnapshot,
    HealthServer,
    Heartbeat,
    Metrics,
    Readiness,
    ReadinessLimits,
)
from monitor.ingest import Columns, Decoded, PayloadError, PayloadMapping, Router, decode, decode_columns
from monitor.logs import get_logger
from monitor.mqtt import BrokerSettings, Incoming, MqttLink, PublishError, TlsSettings
from monitor.sharding import owns, shard_client_id, shard_from_environment
from monitor.signal_pvalues import ChartPValues, LawWorkshop, shared_workshop
from monitor.spc import (
    ChartKind,
    ChartSet,
    ChartSpec,
    ConfigError,
    CountSubgrouper,
    PhaseOneEstimate,
    ProcessParameters,
    Reading,
    ReadingError,
    Signal,
    State,
    StateError,
    Statistic,
    Subgroup,
    SubgroupBatch,
    Trace,
    WindowSubgrouper,
)
from monitor.store import (
    AlertRow,
    CommitBatch,
    LimitsRow,
    Panel,
    SignalRow,
    Store,
    StoredAck,
    StoreError,
    SubgroupBlock,
    SubgroupRow,
)
from monitor.topics import minimal_filters

__all__ = ["ChartRuntime", "Daemon", "DaemonStats", "RedeliveryGuard", "run_daemon"]

_log = get_logger(component="daemon")
_T = TypeVar("_T")

_STATE_SCHEMA = 1
WATCHDOG_PROGRESS = 30.0
"""Seconds without a pass of the processing loop after which the systemd watchdog is not fed."""
RATE_WINDOW = 10.0
"""Seconds over which a chart's reading rate is compared with its configured rate."""
STOP_GRACE = 15.0
"""Seconds a stopping daemon keeps retrying an unreachable store before it leaves."""
_LINK_CHECKPOINT = "@link/"  # checkpoint key prefix; '@' cannot start a chart id
FRESH_ALERTS_HELD = 10_000
"""Committed alerts held in memory for publishing; beyond (a long disconnection) the outbox serves."""


def _now_ms() -> int:
    return int(time.time() * 1000)


def _ms(seconds: float | None) -> int | None:
    return None if seconds is None else round(seconds * 1000)


# ---------------------------------------------------------------- counters


@dataclass(slots=True)
class DaemonStats:
    """Counters of the daemon, for logs, health and metrics."""

    messages: int = 0
    readings: int = 0
    duplicate_messages: int = 0
    duplicate_readings: int = 0
    unrouted: int = 0
    rejected: Counter[str] = field(default_factory=Counter)
    subgroups: int = 0
    signals: int = 0
    alerts: int = 0
    commits: int = 0
    commit_seconds: float = 0.0
    store_failures: int = 0
    acks_received: int = 0
    acks_refused: int = 0
    published_alerts: int = 0
    publish_failures: int = 0
    floods: int = 0
    dead_letters: int = 0
    dead_letters_dropped: int = 0


# ---------------------------------------------------------------- redelivery


def _digest(payload: bytes) -> str:
    return hashlib.blake2b(payload, digest_size=8).hexdigest()


class RedeliveryGuard:
    """Identities of messages whose content is committed, to recognise the broker re-sending them.

    A QoS 1 message the broker sends again (after our crash, or after a reconnect) keeps its
    topic, packet id and payload. Identities of committed messages are kept (bounded) and the
    newest are stored with every commit, so that a restart recognises the re-sent copies.
    """

    def __init__(self, limit: int = 200_000) -> None:
        self.limit = limit
        self._seen: OrderedDict[tuple[str, int, str], None] = OrderedDict()
        self._recent: list[tuple[str, int, str]] = []
        self._previous: list[tuple[str, int, str]] = []

    @staticmethod
    def identity(message: Incoming) -> tuple[str, int, str] | None:
        """What identifies a re-sent message (None for QoS 0: never re-sent)."""
        return None if message.qos == 0 else (message.topic, message.mid, _digest(message.payload))

    def seen(self, key: tuple[str, int, str] | None) -> bool:
        """Whether the message of this identity was committed already."""
        return key is not None and key in self._seen

    def remember(self, key: tuple[str, int, str] | None) -> None:
        """Note a message (by identity) whose content is in the batch being committed."""
        if key is None:
            return
        self._seen[key] = None
        self._recent.append(key)
        while len(self._seen) > self.limit:
            self._seen.popitem(last=False)

    def checkpoint(self) -> dict[str, object]:
        """The identities of this batch and the one before, to store with this batch."""
        keys = self._previous + self._recent
        self._previous, self._recent = self._recent, []
        return {"schema": _STATE_SCHEMA, "messages": [list(k) for k in keys]}

    def restore(self, state: Mapping[str, object]) -> None:
        """Load the identities stored with the last commit."""
        messages = state.get("messages")
        if not isinstance(messages, list):
            return
        for item in messages:
            if isinstance(item, list) and len(item) == 3:
                topic, mid, digest = item
                if isinstance(topic, str) and isinstance(mid, int) and isinstance(digest, str):
                    self._seen[(topic, mid, digest)] = None


def _grouper_from(state: State) -> CountSubgrouper | WindowSubgrouper | None:
    """The subgroup former a checkpoint holds, or None if it cannot be read."""
    kind = state.get("kind")
    try:
        if kind == "count_subgrouper":
            return CountSubgrouper.from_state(state)
        if kind == "window_subgrouper":
            return WindowSubgrouper.from_state(state)
    except (StateError, ReadingError, ConfigError):
        return None
    return None


def _same_grouping(old: CountSubgrouper | WindowSubgrouper, new: CountSubgrouper | WindowSubgrouper) -> bool:
    if isinstance(old, CountSubgrouper) and isinstance(new, CountSubgrouper):
        return old.size == new.size
    if isinstance(old, WindowSubgrouper) and isinstance(new, WindowSubgrouper):
        return (old.width, old.min_size, old.lateness, old.origin, old.max_open) == (
            new.width,
            new.min_size,
            new.lateness,
            new.origin,
            new.max_open,
        )
    return False


class SequenceTracker:
    """The sequence numbers seen on one topic, to drop readings sent twice without losing late ones.

    It keeps the highest number seen and the numbers below it not seen yet, as intervals
    ("gaps"), so a reading that arrives out of order still counts once, however far behind it
    comes (a broker may redeliver a newer message before older ones after a restart). A number
    at or below the highest that is in no gap is a duplicate. Gaps further than ``WINDOW``
    below the highest are forgotten, and only the ``MAX_GAPS`` newest are kept (sequence numbers
    that are not consecutive counters, such as timestamps, leave a gap at every reading).

    Examples:
        >>> tracker = SequenceTracker()
        >>> [tracker.accept(s) for s in (1, 2, 5, 3, 3, 4, 5, 6)]
        [True, True, True, True, False, True, False, True]
        >>> [tracker.accept(s) for s in (5000, 4000, 4000, 7)]  # far behind, still counted once
        [True, True, False, True]
    """

    WINDOW = 10_000_000
    MAX_GAPS = 256

    def __init__(self) -> None:
        self.highest: int | None = None
        self.gaps: list[tuple[int, int]] = []  # disjoint [low, high], ascending

    def accept(self, sequence: int) -> bool:
        """True the first time ``sequence`` is seen (within the window)."""
        highest = self.highest
        if highest is None or sequence > highest:
            if highest is None:  # numbers below the first one seen have not been seen either
                self.gaps.append((sequence - self.WINDOW, sequence - 1))
            elif sequence > highest + 1:
                self.gaps.append((max(highest + 1, sequence - self.WINDOW), sequence - 1))
            self.highest = sequence
            floor = sequence - self.WINDOW
            if self.gaps and (self.gaps[0][1] < floor or len(self.gaps) > self.MAX_GAPS):
                kept = [(max(low, floor), high) for low, high in self.gaps if high >= floor]
                self.gaps = kept[-self.MAX_GAPS :]
            return True
        at = bisect.bisect_right(self.gaps, (sequence, math.inf)) - 1
        if at < 0:
            return False
        low, high = self.gaps[at]
        if not low <= sequence <= high:
            return False
        parts = [(lo, hi) for lo, hi in ((low, sequence - 1), (sequence + 1, high)) if lo <= hi]
        self.gaps[at : at + 1] = parts
        return True

    def accept_many(self, sequences: NDArray[Any]) -> NDArray[np.bool_]:
        """:meth:`accept` for each number in turn; a run that continues the highest is one step.

        Examples:
            >>> tracker = SequenceTracker()
            >>> tracker.accept_many(np.array([1, 2, 3])).tolist()
            [True, True, True]
            >>> tracker.accept_many(np.array([4, 5, 3])).tolist()
            [True, True, False]
        """
        count = sequences.shape[0]
        highest = self.highest
        if (
            count
            and highest is not None
            and sequences.dtype == np.int64
            and int(sequences[0]) == highest + 1
            and (count == 1 or bool((np.diff(sequences) == 1).all()))
            and len(self.gaps) <= self.MAX_GAPS
            and (not self.gaps or self.gaps[0][1] >= int(sequences[-1]) - self.WINDOW)
        ):  # no gap opens, none falls out of the window: only the highest moves
            self.highest = int(sequences[-1])
            return np.ones(count, dtype=bool)
        return np.array([self.accept(int(s)) for s in sequences.tolist()], dtype=bool)

    def to_state(self) -> dict[str, object]:
        """As plain data."""
        return {"highest": self.highest, "gaps": [list(gap) for gap in self.gaps]}

    @classmethod
    def from_state(cls, state: Mapping[str, object]) -> SequenceTracker:
        """Rebuild from :meth:`to_state` (or from the older list of missing numbers)."""
        tracker = cls()
        highest = state.get("highest")
        tracker.highest = highest if isinstance(highest, int) else None
        gaps = state.get("gaps")
        if isinstance(gaps, list):
            tracker.gaps = [
                (int(g[0]), int(g[1]))
                for g in gaps
                if isinstance(g, list) and len(g) == 2 and all(isinstance(v, int) for v in g) and g[0] <= g[1]
            ]
            tracker.gaps.sort()
        missing = state.get("missing")
        if isinstance(missing, list):
            for number in sorted(m for m in missing if isinstance(m, int)):
                if tracker.gaps and tracker.gaps[-1][1] == number - 1:
                    tracker.gaps[-1] = (tracker.gaps[-1][0], number)
                else:
                    tracker.gaps.append((number, number))
        return tracker


# ---------------------------------------------------------------- one chart


@dataclass(slots=True)
class ChartOutput:
    """What feeding readings to charts produced, waiting to be committed."""

    subgroups: list[SubgroupRow] = field(default_factory=list)
    blocks: list[SubgroupBlock] = field(default_factory=list)
    signals: list[SignalRow] = field(default_factory=list)
    alerts: list[Alert] = field(default_factory=list)
    limits: list[LimitsRow] = field(default_factory=list)


@dataclass
class ChangeWatch:
    """The charts with something to do, so that no pass of the daemon visits every chart.

    ``dirty``: a checkpoint to commit; ``status``: a retained state to publish; ``timed``:
    charts that must be visited as time passes (time windows, a parent being fitted);
    ``holding``: charts holding batch readings to chart in one pass before the next commit.
    """

    dirty: set[ChartRuntime] = field(default_factory=set)
    status: set[ChartRuntime] = field(default_factory=set)
    timed: set[ChartRuntime] = field(default_factory=set)
    holding: set[ChartRuntime] = field(default_factory=set)

    def register(self, runtime: ChartRuntime) -> None:
        """Watch this chart from now on (what it already has to do included)."""
        runtime.watch = self
        if runtime.dirty:
            self.dirty.add(runtime)
        if runtime.status_dirty:
            self.status.add(runtime)
        if runtime.needs_time:
            self.timed.add(runtime)

    def forget(self, runtime: ChartRuntime) -> None:
        """Stop watching a chart that was removed (its pending checkpoint is still committed)."""
        self.status.discard(runtime)
        self.timed.discard(runtime)


class ChartRuntime:
    """Everything the daemon keeps for one chart: subgroup former, chart set, alert tracker."""

    watch: ChangeWatch | None = None
    _dirty = False
    _status_dirty = False

    def __init__(
        self,
        chart_id: str,
        config: ChartConfig,
        alerts: AlertSettings,
        *,
        first_index: int = 0,
        workshop: LawWorkshop | None = None,
    ) -> None:
        self.chart_id = chart_id
        self.config = config
        self.spec = config.spec()
        choice = config.parent_choice()
        self.p_values = ChartPValues(chart_id, self.spec, choice, workshop or shared_workshop())
        self.mapping = PayloadMapping(**config.payload.model_dump())
        self.grouper: CountSubgrouper | WindowSubgrouper = config.subgrouper()
        self.chart_set = ChartSet(self.spec, first_index=first_index)
        self.alert_settings = alerts
        self.tracker = AlertTracker(chart_id, alerts, collecting_baseline=self.spec.baseline is not None)
        self.sequences: dict[str, SequenceTracker] = {}
        self.limits_version = 0
        self.readings = 0
        self.duplicates = 0
        self.floods = 0
        self.carried: list[Reading] = []
        self.new_settings = False
        self.refused_versions: set[int] = set()
        self.last_minute_readings = 0
        self._window_start = 0.0
        self._window_count = 0
        self._flood_noted = False
        self._held: list[tuple[NDArray[np.float64], NDArray[np.float64]]] = []
        self.dirty = True
        self.status_dirty = True
        self.p_values.prepare(self.chart_set.parameters, self.typical_n)
        if self.spec.exact_scale is not None:  # build the exact law now, not at the first subgroup
            self.spec.exact_scale.lines(self.typical_n, self.spec.limit_sigma)

    @property
    def dirty(self) -> bool:
        """Whether the chart has a checkpoint to commit."""
        return self._dirty

    @dirty.setter
    def dirty(self, value: bool) -> None:
        self._dirty = value
        if value and self.watch is not None:
            self.watch.dirty.add(self)

    @property
    def status_dirty(self) -> bool:
        """Whether the chart's retained state must be published again."""
        return self._status_dirty

    @status_dirty.setter
    def status_dirty(self, value: bool) -> None:
        self._status_dirty = value
        if value and self.watch is not None:
            self.watch.status.add(self)

    @property
    def needs_time(self) -> bool:
        """Whether the chart must be visited as time passes (time windows, a parent being fitted)."""
        return isinstance(self.grouper, WindowSubgrouper) or self.p_values.sample is not None

    def _watch_time(self) -> None:
        if self.watch is not None and self.needs_time:
            self.watch.timed.add(self)

    @property
    def typical_n(self) -> int:
        """The subgroup size the configuration asks for (the smallest one for time windows)."""
        sub = self.config.subgroup
        return sub.size if sub.size is not None else sub.min_size

    # -- state

    def to_state(self) -> dict[str, object]:
        """The full state as plain JSON data (a checkpoint)."""
        return {
            "schema": _STATE_SCHEMA,
            "template": self.config.id,
            "grouper": self.grouper.to_state(),
            "chart_set": self.chart_set.to_state(),
            "tracker": self.tracker.to_state(),
            "sequences": {topic: tracker.to_state() for topic, tracker in self.sequences.items()},
            "limits_version": self.limits_version,
            "carried": [[r.value, r.time, r.exposure] for r in self.carried],
            "readings": self.readings,
            "duplicates": self.duplicates,
            "parent": self.p_values.to_state(),
        }

    def restore(self, state: Mapping[str, object]) -> list[str]:
        """Continue from a checkpoint; returns what had to start afresh because the settings changed.

        Readings waiting for a subgroup are never dropped: under a new subgrouping they are fed
        to the new subgroup former. Raises StateError only for an unreadable checkpoint.
        """
        if state.get("schema") != _STATE_SCHEMA:
            raise StateError(f"checkpoint schema {state.get('schema')!r} is not {_STATE_SCHEMA}")
        grouper_state = state.get("grouper")
        set_state = state.get("chart_set")
        tracker_state = state.get("tracker")
        if (
            not isinstance(grouper_state, dict)
            or not isinstance(set_state, dict)
            or not isinstance(tracker_state, dict)
        ):
            raise StateError("checkpoint lacks its parts")
        notes: list[str] = []
        old_grouper = _grouper_from(grouper_state)
        if old_grouper is not None and _same_grouping(old_grouper, self.grouper):
            self.grouper = old_grouper
        else:
            # the subgrouping changed: the readings waiting for a subgroup go into the new one
            self.carried = [] if old_grouper is None else old_grouper.pending_readings()
            notes.append(f"subgrouping changed; {len(self.carried)} waiting readings carried over")
        try:
            self.chart_set = ChartSet.from_state(self.spec, set_state)
        except StateError as exc:
            next_index = set_state.get("next_index")
            first = next_index if isinstance(next_index, int) else 0
            self.chart_set = ChartSet(self.spec, first_index=first)
            kept = self._keep_limits(set_state)
            self.new_settings = not kept
            limits = "limits kept" if kept else "new limits"
            notes.append(f"chart settings changed ({exc}); charting continues at subgroup {first}, {limits}")
        try:
            self.tracker = AlertTracker.from_state(self.chart_id, self.alert_settings, tracker_state)
        except (StateError, ValueError) as exc:
            notes.append(f"alert state started afresh ({exc})")
        carried = state.get("carried")
        if isinstance(carried, list):
            for item in carried:
                if isinstance(item, list) and len(item) == 3:
                    value, moment, exposure = item
                    if isinstance(value, int | float) and isinstance(moment, int | float):
                        weight = float(exposure) if isinstance(exposure, int | float) else None
                        self.carried.append(Reading(float(value), float(moment), weight))
        sequences = state.get("sequences")
        if isinstance(sequences, dict):
            self.sequences = {
                str(topic): SequenceTracker.from_state(item)
                for topic, item in sequences.items()
                if isinstance(item, dict)
            }
        for name in ("limits_version", "readings", "duplicates"):
            value = state.get(name)
            if isinstance(value, int):
                setattr(self, name, value)
        parent_state = state.get("parent")
        if isinstance(parent_state, dict):
            self.p_values.restore(parent_state)
        self.p_values.prepare(self.chart_set.parameters, self.typical_n)
        self._watch_time()
        self.dirty = bool(notes)
        return notes

    def _keep_limits(self, set_state: Mapping[str, object]) -> bool:
        """Carry the old parameters into the new chart set if the limit settings did not change."""
        old_spec, old_parameters = set_state.get("spec"), set_state.get("parameters")
        if not isinstance(old_spec, dict) or not isinstance(old_parameters, dict):
            return False
        if ChartSpec.limit_settings(old_spec) != ChartSpec.limit_settings(self.spec.to_state()):
            return False
        old_estimate = set_state.get("estimate")
        try:
            estimate = PhaseOneEstimate.from_state(old_estimate) if isinstance(old_estimate, dict) else None
            self.chart_set.adopt(ProcessParameters.from_state(old_parameters), estimate)
        except (StateError, ConfigError, ValueError, KeyError):
            return False
        return True

    def adopt_limits(self, row: LimitsRow) -> None:
        """Judge from the next subgroup on against a stored limits version (a new baseline)."""
        source = row.source if row.source in ("standard", "baseline") else "baseline"
        self.chart_set.adopt(ProcessParameters(row.mean, row.sigma, source=source))
        self.limits_version = row.version
        stored_parent = row.detail.get("parent_record") if isinstance(row.detail, dict) else None
        self.p_values.adopt(stored_parent if isinstance(stored_parent, dict) else None)
        self.p_values.prepare(self.chart_set.parameters, self.typical_n)
        self.new_settings = False
        self.dirty = True
        self.status_dirty = True

    # -- readings

    def accept_sequence(self, topic: str, decoded: Decoded) -> bool:
        """False if this topic already had a reading with this sequence number (a duplicate)."""
        if decoded.sequence is None:
            return True
        if self.sequence_tracker(topic).accept(decoded.sequence):
            return True
        self.duplicates += 1
        return False

    def sequence_tracker(self, topic: str) -> SequenceTracker:
        """The sequence numbers seen on this topic (the 10,000 most recent topics are kept)."""
        tracker = self.sequences.get(topic)
        if tracker is None:
            tracker = self.sequences[topic] = SequenceTracker()
            if len(self.sequences) > 10_000:
                self.sequences.pop(next(iter(self.sequences)))
        return tracker

    def refused_times(self, times: NDArray[np.float64], received_at: float) -> NDArray[np.bool_] | None:
        """Where :meth:`event_time` refuses or replaces a time (None: nowhere), for a batch."""
        policy = self.config.timestamps
        if policy.max_ahead is None and policy.max_behind is None:
            return None
        ahead = times - received_at
        outside = np.zeros(times.shape[0], dtype=bool)
        if policy.max_ahead is not None:
            outside |= ahead > policy.max_ahead
        if policy.max_behind is not None:
            outside |= -ahead > policy.max_behind
        return outside if outside.any() else None

    def event_time(self, decoded: Decoded, received_at: float) -> float | None:
        """The reading's event time under the chart's timestamp policy (None: refused)."""
        policy = self.config.timestamps
        ahead = decoded.time - received_at
        if (policy.max_ahead is not None and ahead > policy.max_ahead) or (
            policy.max_behind is not None and -ahead > policy.max_behind
        ):
            return received_at if policy.outside == "receive_time" else None
        return decoded.time

    @property
    def expected_per_minute(self) -> float | None:
        """Readings a minute the configuration expects (from ``readings_every``)."""
        every = self.config.readings_every
        return None if not every else 60.0 / every

    def note_rate(self, count: int, now: float) -> bool:
        """Count readings in windows of RATE_WINDOW seconds; True once per window over the flood factor."""
        if now - self._window_start >= RATE_WINDOW:
            self._window_start, self._window_count, self._flood_noted = now, 0, False
        self._window_count += count
        expected = self.expected_per_minute
        if expected is None or self._flood_noted:
            return False
        if self._window_count > self.config.flood_factor * expected * RATE_WINDOW / 60.0:
            self._flood_noted = True
            self.last_minute_readings = round(self._window_count * 60.0 / RATE_WINDOW)
            self.floods += 1
            self.status_dirty = True
            return True
        return False

    def feed(self, readings: list[Reading], now_ms: int, out: ChartOutput) -> int:
        """Add readings; charts every subgroup they complete; returns how many that is."""
        charted = self.chart_held(now_ms, out) if self._held else 0  # batch readings that came first
        self.readings += len(readings)  # readings carried over were counted when they came
        if self.carried:
            readings, self.carried = [*self.carried, *readings], []
        self.dirty = True
        for reading in readings:
            made = self.grouper.add(reading)
            if made is None:
                continue
            for subgroup in [made] if isinstance(made, Subgroup) else made:
                self._chart(subgroup, now_ms, out)
                charted += 1
        return charted

    @property
    def batches(self) -> bool:
        """Whether readings may be held and charted as arrays.

        So they may for count subgroups, limits in place, a variables chart and no readings
        carried over from an older subgrouping.
        """
        return (
            isinstance(self.grouper, CountSubgrouper)
            and self.chart_set.monitoring
            and self.spec.attribute is None
            and not self.carried
        )

    def hold(self, values: NDArray[np.float64], times: NDArray[np.float64]) -> None:
        """Keep readings of a batch (see :attr:`batches`) for :meth:`chart_held`."""
        self.readings += values.shape[0]
        self._held.append((values, times))
        self.dirty = True
        if self.watch is not None:
            self.watch.holding.add(self)

    def chart_held(self, now_ms: int, out: ChartOutput) -> int:
        """Chart the held readings in one vectorised pass; returns the number of subgroups.

        The rows, signals and alerts are those that :meth:`feed` would give reading by reading.
        """
        held, self._held = self._held, []
        if not held:
            return 0
        values = held[0][0] if len(held) == 1 else np.concatenate([v for v, _ in held])
        times = held[0][1] if len(held) == 1 else np.concatenate([t for _, t in held])
        grouper = self.grouper
        if not isinstance(grouper, CountSubgrouper) or not self.chart_set.monitoring:  # settings changed
            self.readings -= values.shape[0]
            return self.feed(list(map(Reading, values.tolist(), times.tolist())), now_ms, out)
        batch = grouper.add_many(values, times)
        count = len(batch)
        if count == 0:
            return 0
        chart_set = self.chart_set
        first = chart_set.next_index
        result = chart_set.update_many(batch)
        if self.limits_version == 0 or self.new_settings:
            self.new_settings = False
            self._new_limits(now_ms, out)
        self._batch_rows(batch, first, result.traces, out)
        signals = result.signals
        if not signals:
            cleared = self.tracker.observe_quiet(first, first + count - 1, now_ms=now_ms)
            if cleared:
                self.status_dirty = True
                out.alerts.extend(cleared)
            return count
        self.status_dirty = True
        quiet_from = first
        start = 0
        while start < len(signals):
            index = signals[start].subgroup
            stop = start + 1
            while stop < len(signals) and signals[stop].subgroup == index:
                stop += 1
            out.alerts.extend(self.tracker.observe_quiet(quiet_from, index - 1, now_ms=now_ms))
            self._signalled(list(signals[start:stop]), batch.subgroup(index - first), index, now_ms, out)
            quiet_from, start = index + 1, stop
        out.alerts.extend(self.tracker.observe_quiet(quiet_from, first + count - 1, now_ms=now_ms))
        return count

    def _batch_rows(
        self,
        batch: SubgroupBatch,
        first: int,
        traces: Mapping[ChartKind, Mapping[Statistic, Trace]],
        out: ChartOutput,
    ) -> None:
        """The stored rows of a batch of subgroups, as one block of arrays."""
        count = len(batch)
        panels = []
        for kind, trace_of in traces.items():
            for statistic, trace in trace_of.items():
                arrays = [trace.value, trace.center, trace.lower, trace.upper]
                if len(trace) != count:  # a panel without a point for some subgroups (the first moving range)
                    arrays = [_spread(a, trace.subgroup - first, count) for a in arrays]
                panels.append(Panel(kind.value, statistic.value, *arrays))
        if batch.start is None or batch.end is None:  # pragma: no cover - count subgroups have times
            raise RuntimeError("a batch of readings without times")
        out.blocks.append(
            SubgroupBlock(self.chart_id, first, batch.start, batch.end, batch.values, tuple(panels))
        )

    def advance(self, now: float, out: ChartOutput) -> bool:
        """Close the time windows whose end (plus lateness) has passed; True if a parent was just fitted."""
        fitted = self.p_values.sample is not None and self.p_values.poll_fit()
        if fitted:
            self.dirty = True
            self.p_values.prepare(self.chart_set.parameters, self.typical_n)
        if isinstance(self.grouper, WindowSubgrouper):
            closed = self.grouper.advance(now)
            if closed:
                self.dirty = True
            for subgroup in closed:
                self._chart(subgroup, round(now * 1000), out)
        return fitted

    def _chart(self, subgroup: Subgroup, now_ms: int, out: ChartOutput) -> None:
        chart_set = self.chart_set
        charted = chart_set.monitoring  # the subgroup that completes a baseline is not charted
        baseline = () if charted else (*chart_set.baseline_subgroups, subgroup)
        signals = chart_set.update(subgroup)
        if not charted and chart_set.monitoring:
            self._baseline_done(baseline, index_after=chart_set.next_index)
        index = chart_set.next_index - 1
        if chart_set.monitoring and (self.limits_version == 0 or self.new_settings):
            self.new_settings = False
            self._new_limits(now_ms, out)
        attribute = self.spec.attribute is not None
        exposures = subgroup.exposures if attribute else None
        if not charted:
            self.status_dirty = True
            out.subgroups.append(
                SubgroupRow(
                    chart=self.chart_id,
                    index=index,
                    start_ms=_ms(subgroup.start),
                    end_ms=_ms(subgroup.end),
                    n=subgroup.n,
                    points={},
                    values=subgroup.values,
                    exposures=exposures,
                )
            )
            return
        points: dict[str, object] = {
            kind.value: {
                p.statistic.value: {"value": p.value, "center": p.center, "lower": p.lower, "upper": p.upper}
                for p in chart_points
            }
            for kind, chart_points in chart_set.last_points.items()
        }
        out.subgroups.append(
            SubgroupRow(
                chart=self.chart_id,
                index=index,
                start_ms=_ms(subgroup.start),
                end_ms=_ms(subgroup.end),
                n=subgroup.n,
                points=points,
                values=subgroup.values,
                exposures=exposures,
            )
        )
        self._signalled(signals, subgroup, index, now_ms, out)

    def _signalled(
        self, signals: list[Signal], subgroup: Subgroup, index: int, now_ms: int, out: ChartOutput
    ) -> None:
        """A charted subgroup's signals (often none) through the alert tracker, and their rows."""
        contexts = [self._context(s, subgroup) for s in signals]
        alerts = self.tracker.observe(signals, contexts, subgroup_index=index, now_ms=now_ms)
        if alerts or signals:
            self.status_dirty = True
        out.alerts.extend(alerts)
        active = self.tracker.active_alert_id
        for signal_, context in zip(signals, contexts, strict=True):
            out.signals.append(
                SignalRow(
                    chart=self.chart_id,
                    subgroup=signal_.subgroup,
                    kind=signal_.chart.value,
                    statistic=signal_.statistic.value,
                    rule=signal_.rule.value,
                    side=signal_.side.value,
                    value=signal_.value,
                    center=signal_.center,
                    lower=signal_.lower,
                    upper=signal_.upper,
                    z=signal_.z,
                    p_value=context.p_value,
                    method=context.p_value_method,
                    alert_id=active,
                )
            )

    def _baseline_done(self, baseline: tuple[Subgroup, ...], *, index_after: int) -> None:
        """Fit the parent model (if fitted) to the baseline readings the estimate kept."""
        estimate = self.chart_set.estimate
        excluded = set() if estimate is None else {e.subgroup for e in estimate.excluded}
        first = index_after - len(baseline)
        sample = [v for i, s in enumerate(baseline) if first + i not in excluded for v in s.values]
        self.p_values.fit(sample)
        self.p_values.prepare(self.chart_set.parameters, self.typical_n)
        self._watch_time()

    def _context(self, signal_: Signal, subgroup: Subgroup) -> SignalContext:
        n = subgroup.n
        if signal_.statistic.value == "moving_range":
            n = self.spec.moving_range_span
        result = self.p_values.of(signal_, n, self.chart_set.parameters)
        return SignalContext(
            chart_id=self.chart_id,
            hint=self.config.hint,
            limits_version=self.limits_version,
            subgroup_start_ms=_ms(subgroup.start),
            subgroup_end_ms=_ms(subgroup.end),
            subgroup_size=subgroup.n,
            p_value=result.value,
            p_value_method=result.method,
            parent_model=result.parent,
            unit=self.config.unit or None,
            name=self.config.title or None,
        )

    def _new_limits(self, now_ms: int, out: ChartOutput) -> None:
        parameters = self.chart_set.parameters
        if parameters is None:
            return
        self.limits_version += 1
        estimate = self.chart_set.estimate
        out.limits.append(
            LimitsRow(
                chart=self.chart_id,
                version=self.limits_version,
                mean=parameters.mean,
                sigma=parameters.sigma,
                source=parameters.source,
                detail={} if estimate is None else dict(estimate.to_state()),
                created_ms=now_ms,
            )
        )

    def status(self, now_ms: int) -> dict[str, object]:
        """The retained status message of this chart."""
        body = dict(self.tracker.status(now_ms))
        if not self.chart_set.monitoring:
            body["state"] = "collecting_baseline"
            plan = self.spec.baseline
            body["baseline"] = {
                "collected": self.chart_set.baseline_collected,
                "needed": 0 if plan is None else plan.subgroups,
            }
        parameters = self.chart_set.parameters
        if isinstance(self.grouper, WindowSubgrouper):
            window = self.grouper.stats
            body["windows"] = {
                "late_readings": window.late,
                "overflow_readings": window.overflow,
                "short_windows": window.short_windows,
                "short_window_readings": window.short_readings,
            }
        body.update(
            readings=self.readings,
            duplicates=self.duplicates,
            floods=self.floods,
            subgroups=self.chart_set.next_index,
            limits_version=self.limits_version,
            mean=None if parameters is None else parameters.mean,
            sigma=None if parameters is None else parameters.sigma,
        )
        return body


# ---------------------------------------------------------------- the daemon


@dataclass(slots=True)
class _Pending:
    output: ChartOutput = field(default_factory=ChartOutput)
    messages: list[Incoming] = field(default_factory=list)
    identities: list[tuple[str, int, str] | None] = field(default_factory=list)
    """Of the handled messages, for the redelivery guard (the digest is taken once)."""

    def empty(self) -> bool:
        o = self.output
        return not (self.messages or o.subgroups or o.blocks or o.signals or o.alerts or o.limits)


@dataclass(slots=True)
class _Prepared:
    """A transaction taken from a batch: the rows and checkpoints, and the messages it settles."""

    batch: CommitBatch
    pending: _Pending


class Daemon:
    """The monitor daemon for one configuration.

    Args:
        config: the validated configuration.
        config_path: where it was read from (the default SQLite file goes next to it).
        environ: environment for secrets (the broker password).
        max_batch: most messages per store transaction.
        tick: seconds between time-window checks when no message comes.
        group_window: seconds a message waits at most for others to share its transaction.
        group_messages: messages that make a transaction without waiting (below the broker's
            in-flight window, 20 by default in Mosquitto: messages are acknowledged after their
            commit, so a larger group would stall the broker's sending).
    """

    def __init__(
        self,
        config: Config,
        config_path: Path,
        *,
        environ: Mapping[str, str] | None = None,
        max_batch: int = 2000,
        tick: float = 0.5,
        group_window: float = 0.002,
        group_messages: int = 16,
    ) -> None:
        env = os.environ if environ is None else environ
        _check_daemon_config(config)
        self.config = config
        self.config_path = config_path
        self.environ = env
        self.url = storage_url(config, config_path, env)
        self.shard = shard_from_environment(env)
        a = config.alerts
        self.alert_settings = AlertSettings(
            prefix=a.prefix,
            source=a.source or f"urn:line-monitor:{config.broker.client_id}",
            repeat_after_ms=round(a.repeat_every * 1000),
            clear_after_subgroups=a.clear_after,
            severity={**AlertSettings().severity, **{k: Severity(v) for k, v in a.severity.items()}},
        )
        b = config.broker
        tls = None
        if b.tls is not None:
            tls = TlsSettings(b.tls.ca, b.tls.cert, b.tls.key, b.tls.verify_hostname)
        self.broker = BrokerSettings(
            host=b.host,
            port=b.port,
            client_id=b.client_id if self.shard is None else shard_client_id(b.client_id, self.shard[0]),
            username=b.username,
            password=resolve_password(b, env),
            tls=tls,
            qos=b.qos,
            persistent_session=b.persistent_session,
            keepalive=b.keepalive,
            reconnect_max=b.reconnect_max,
        )
        self.ack_filter = f"{a.prefix}/ack/#"
        self._set_charts(config)
        self.presence_topic = f"{a.prefix}/daemon/{self.broker.client_id}"
        self.max_batch = max_batch
        self.tick = tick
        self.group_window = group_window
        self.group_messages = max(1, min(group_messages, max_batch))
        self.stats = DaemonStats()
        self.runtimes: dict[str, ChartRuntime] = {}
        self.watch = ChangeWatch()
        self.guard = RedeliveryGuard()
        self.store: Store | None = None
        self.link: MqttLink | None = None
        self._checkpoints: dict[str, dict[str, object]] = {}
        self._positions: dict[str, tuple[int, int]] = {}
        self._stored_limits: dict[str, LimitsRow] = {}
        self._limits_checked = 0.0
        self._limits_poll = config.storage.limits_poll
        self._dead_letters: deque[tuple[str, dict[str, object]]] = deque(maxlen=1000)
        # alerts committed and not yet published, in commit order: published from memory, while
        # the outbox row (unsent until marked) keeps them across a crash
        self._fresh: deque[AlertRow] = deque()
        self._outbox_backlog = True  # the outbox may hold unsent alerts that are not in _fresh
        self._to_mark: list[tuple[str, int]] = []  # published; marked sent by the next commit
        self._unmarked: set[str] = set()  # published, the mark not committed yet
        self._committing: asyncio.Task[bool] | None = None
        self._commits_refused = False  # a commit was given up at stop: none may follow it
        self._counted = (0, 0, 0)  # messages, readings, subgroups already in the metrics
        self._publish_wake = asyncio.Event()
        self._stopping = asyncio.Event()
        self._stopped_at: float | None = None
        self._reload_requested = False
        self._batch_received: float | None = None
        self.ready = asyncio.Event()
        self.heartbeat = Heartbeat()
        self.database: DatabaseWatch | None = None
        self.metrics = Metrics(snapshot=self._gauges)
        self.health: HealthServer | None = None

    # -- ownership and topics

    def _set_charts(self, config: Config) -> None:
        """Templates, routing and subscriptions for the charts this instance owns."""
        self.templates = {c.id: c for c in config.charts}
        self.router = Router([(c.id, c.topic or "") for c in config.charts])
        mine = [c for c in config.charts if c.placeholders or self.owns(c.id)]
        self.subscriptions = minimal_filters([*(_filter_of(c) for c in mine), self.ack_filter])

    def owns(self, chart_id: str) -> bool:
        """Whether this instance keeps ``chart_id`` (always, unless sharded)."""
        return self.shard is None or owns(chart_id, self.shard[0], self.shard[1])

    def lag(self) -> float:
        """Seconds the oldest message of the batch in hand has waited (0 when idle)."""
        received = self._batch_received
        return 0.0 if received is None else max(0.0, time.time() - received)

    def _gauges(self) -> GaugeSnapshot:
        return GaugeSnapshot(0 if self.link is None else self.link.queued, self.lag(), len(self.runtimes))

    # -- charts

    def runtime(self, chart_id: str, template: ChartConfig) -> ChartRuntime:
        """The runtime of a chart, created on first use (from its checkpoint if there is one)."""
        existing = self.runtimes.get(chart_id)
        if existing is not None:
            return existing
        runtime = ChartRuntime(chart_id, template, self.alert_settings)
        stored = self._checkpoints.pop(chart_id, None)
        if stored is not None:
            try:
                notes = runtime.restore(stored)
                _log.info("checkpoint_restored", chart=chart_id, subgroups=runtime.chart_set.next_index)
                for note in notes:
                    _log.warning("checkpoint_partly_restored", chart=chart_id, reason=note)
            except (StateError, ReadingError, ValueError, KeyError) as exc:
                next_index, version = self._positions.get(chart_id, (0, 0))
                runtime = ChartRuntime(chart_id, template, self.alert_settings, first_index=next_index)
                runtime.limits_version = version
                _log.warning(
                    "checkpoint_discarded", chart=chart_id, reason=str(exc), continuing_at_subgroup=next_index
                )
        elif chart_id in self._positions:
            # stored history without a checkpoint: continue after it
            next_index, version = self._positions[chart_id]
            runtime = ChartRuntime(chart_id, template, self.alert_settings, first_index=next_index)
            runtime.limits_version = version
        self.runtimes[chart_id] = runtime
        self.watch.register(runtime)
        self._sync_limits(runtime)
        return runtime

    def _sync_limits(self, runtime: ChartRuntime) -> bool:
        """Put in force a stored limits version newer than the chart's; True if it did."""
        row = self._stored_limits.get(runtime.chart_id)
        if row is None or row.version <= runtime.limits_version or row.version in runtime.refused_versions:
            return False
        try:
            runtime.adopt_limits(row)
        except ConfigError as exc:
            runtime.refused_versions.add(row.version)
            _log.error("limits_refused", chart=runtime.chart_id, version=row.version, reason=str(exc))
            return False
        _log.info(
            "limits_adopted",
            chart=runtime.chart_id,
            version=row.version,
            source=row.source,
            mean=row.mean,
            sigma=row.sigma,
            from_subgroup=runtime.chart_set.next_index,
        )
        return True

    async def _refresh_limits(self, store: Store) -> bool:
        """Read the newest stored limits of the charts in hand; True if any was put in force."""
        self._limits_checked = time.monotonic()
        if not self.runtimes:
            return False
        try:
            self._stored_limits = await store.latest_limits_all()
        except StoreError as exc:
            _log.warning("limits_check_failed", error=str(exc))
            return False
        adopted = [self._sync_limits(runtime) for runtime in self.runtimes.values()]
        return any(adopted)

    # -- processing

    def handle(self, message: Incoming, pending: _Pending) -> None:
        """Process one chart message into pending output (nothing is committed here)."""
        self.stats.messages += 1
        pending.messages.append(message)
        identity = self.guard.identity(message)
        pending.identities.append(identity)
        if self.guard.seen(identity):
            self.stats.duplicate_messages += 1
            self.metrics.count_duplicate("message")
            _log.info("message_duplicated", topic=message.topic, mid=message.mid)
            return
        routing = self.router.resolve(message.topic)
        for refused in routing.rejected:
            self.stats.rejected[refused.reason] += 1
            _log.warning(
                "topic_refused", topic=message.topic, chart=refused.template_id, reason=refused.reason
            )
            self.metrics.count_decode_error(refused.reason)
            self._dead_letter(message, None, refused.reason, refused.detail)
        routes = [r for r in routing.routes if self.owns(r.chart_id)]
        if routing.routes and not routes:
            return  # another shard keeps these charts
        if not routes:
            self.stats.unrouted += 1
            return
        now_ms = _now_ms()
        out = pending.output
        decoded_by_mapping: dict[PayloadMapping, list[Decoded] | Columns | PayloadError] = {}
        for route in routes:
            template = self.templates[route.template_id]
            runtime = self.runtime(route.chart_id, template)
            mapping = runtime.mapping
            decoded = decoded_by_mapping.get(mapping)
            if decoded is None:
                try:
                    if mapping.batch == "none":
                        decoded = decode(message.payload, mapping, message.received_at)
                    else:
                        decoded = decode_columns(message.payload, mapping, message.received_at)
                except PayloadError as exc:
                    decoded = exc
                decoded_by_mapping[mapping] = decoded
            if isinstance(decoded, PayloadError):
                self.stats.rejected[decoded.reason] += 1
                self.metrics.count_decode_error(decoded.reason)
                _log.warning(
                    "reading_rejected",
                    chart=route.chart_id,
                    topic=message.topic,
                    reason=decoded.reason,
                    detail=decoded.detail,
                )
                self._dead_letter(message, route.chart_id, decoded.reason, decoded.detail)
                continue
            if isinstance(decoded, Columns):
                count = self._take_columns(message, route.chart_id, runtime, decoded, now_ms, out)
            else:
                readings = self._take_readings(message, route.chart_id, runtime, decoded)
                count = len(readings)
                self.stats.readings += count
                self.stats.subgroups += runtime.feed(readings, now_ms, out)
            if runtime.note_rate(count, message.received_at):
                self.stats.floods += 1
                _log.warning(
                    "topic_flooded",
                    chart=route.chart_id,
                    readings_per_minute=runtime.last_minute_readings,
                    expected_per_minute=runtime.expected_per_minute,
                )

    def _take_readings(
        self, message: Incoming, chart_id: str, runtime: ChartRuntime, decoded: list[Decoded]
    ) -> list[Reading]:
        """The readings of a message for one chart: duplicates and refused times left out."""
        readings = []
        for item in decoded:
            if not runtime.accept_sequence(message.topic, item):
                self.stats.duplicate_readings += 1
                self.metrics.count_duplicate("reading")
                continue
            moment = runtime.event_time(item, message.received_at)
            if moment is None:
                self._refuse_time(message, chart_id, item.time)
                continue
            readings.append(Reading(item.value, moment, item.exposure))
        return readings

    def _take_columns(
        self,
        message: Incoming,
        chart_id: str,
        runtime: ChartRuntime,
        columns: Columns,
        now_ms: int,
        out: ChartOutput,
    ) -> int:
        """A batch's readings for one chart, as arrays; returns how many were kept.

        What :meth:`_take_readings` would keep is held for one vectorised pass before the
        commit (or fed at once where the chart takes no arrays).
        """
        values, times, exposures = columns.values, columns.times, columns.exposures
        keep: NDArray[np.bool_] | None = None
        if columns.sequences is not None:
            accepted = runtime.sequence_tracker(message.topic).accept_many(columns.sequences)
            if not accepted.all():
                keep = accepted
                dropped = int((~accepted).sum())
                runtime.duplicates += dropped
                self.stats.duplicate_readings += dropped
                self.metrics.count_duplicate("reading", dropped)
        outside = runtime.refused_times(times, message.received_at)
        if outside is not None:
            if runtime.config.timestamps.outside == "receive_time":
                times = np.where(outside, message.received_at, times)
            else:
                refused = outside if keep is None else outside & keep
                for i in np.flatnonzero(refused).tolist():
                    self._refuse_time(message, chart_id, float(times[i]))
                keep = ~outside if keep is None else keep & ~outside
        if keep is not None:
            values, times = values[keep], times[keep]
            exposures = None if exposures is None else exposures[keep]
        count = int(values.shape[0])
        self.stats.readings += count
        if count and runtime.batches:
            runtime.hold(values, times)
        elif count:
            weights = [None] * count if exposures is None else exposures.tolist()
            readings = list(map(Reading, values.tolist(), times.tolist(), weights))
            self.stats.subgroups += runtime.feed(readings, now_ms, out)
        return count

    def chart_held(self, out: ChartOutput) -> None:
        """Chart the batch readings every chart holds (before a commit, or new limits)."""
        holding = self.watch.holding
        if not holding:
            return
        now_ms = _now_ms()
        for runtime in holding:
            self.stats.subgroups += runtime.chart_held(now_ms, out)
        holding.clear()

    def _refuse_time(self, message: Incoming, chart_id: str, moment: float) -> None:
        reason = "time_too_far_ahead" if moment > message.received_at else "time_too_far_behind"
        self.stats.rejected[reason] += 1
        self.metrics.count_decode_error(reason)
        _log.warning(
            "reading_rejected",
            chart=chart_id,
            topic=message.topic,
            reason=reason,
            detail=f"event time {moment:.3f} against receive time {message.received_at:.3f}",
        )

    def _dead_letter(self, message: Incoming, chart_id: str | None, reason: str, detail: str) -> None:
        """Keep a copy of a refused message for the dead-letter topic (when configured; bounded)."""
        if not self.config.alerts.dead_letters:
            return
        if len(self._dead_letters) == self._dead_letters.maxlen:
            self.stats.dead_letters_dropped += 1
        self.metrics.count_dead_letter()
        body = message.payload[:65536]
        try:
            payload, encoding = body.decode("utf-8"), "utf-8"
        except UnicodeDecodeError:
            payload, encoding = base64.b64encode(body).decode("ascii"), "base64"
        self._dead_letters.append(
            (
                f"{self.alert_settings.prefix}/dead-letters/{chart_id or 'unrouted'}",
                {
                    "topic": message.topic,
                    "chart": chart_id,
                    "reason": reason,
                    "detail": detail,
                    "received": round(message.received_at * 1000),
                    "payload": payload,
                    "payload_encoding": encoding,
                    "payload_bytes": len(message.payload),
                },
            )
        )
        self._publish_wake.set()

    async def _handle_ack(self, message: Incoming) -> None:
        """An acknowledgement from a crew on ``<prefix>/ack/<chart>``."""
        chart_id = message.topic[len(self.ack_filter) - 1 :]
        store = self.store
        runtime = self.runtimes.get(chart_id)
        try:
            request = parse_ack(message.payload, chart_id)
        except AckError as exc:
            self.stats.acks_refused += 1
            _log.warning("ack_refused", chart=chart_id, reason=str(exc))
            return
        if runtime is None or store is None:
            self.stats.acks_refused += 1
            _log.warning("ack_refused", chart=chart_id, alert=request.alert_id, reason="no such chart")
            return
        owner = await self._retrying("reading an alert", lambda: store.alert_chart(request.alert_id))
        if owner != chart_id:
            self.stats.acks_refused += 1
            _log.warning(
                "ack_refused", chart=chart_id, alert=request.alert_id, reason="no such alert on this chart"
            )
            return
        at_ms = _now_ms()
        ack = StoredAck(request.alert_id, chart_id, request.by, request.note or "", at_ms)
        stored = await self._retrying("storing an acknowledgement", lambda: store.record_ack(ack))
        if stored and runtime.tracker.acknowledge(request.alert_id, request.by, at_ms):
            runtime.dirty = runtime.status_dirty = True
            self._publish_wake.set()
        self.stats.acks_received += 1
        _log.info("alert_acknowledged", chart=chart_id, alert=request.alert_id, by=request.by)

    def _note_store_failure(self, exc: StoreError) -> None:
        self.stats.store_failures += 1
        self.metrics.count_store_failure()
        self.heartbeat.beat()  # waiting for the database is not a stuck loop
        if self.database is not None:
            self.database.failed(str(exc))

    async def _retrying(self, what: str, operation: Callable[[], Awaitable[_T]]) -> _T:
        """Run a store operation, retrying with capped backoff while the store is unreachable."""
        delay = 0.2
        while True:
            try:
                return await operation()
            except StoreError as exc:
                self._note_store_failure(exc)
                if self._stopped_at is not None and time.monotonic() - self._stopped_at > STOP_GRACE:
                    raise
                _log.error("store_operation_failed", operation=what, error=str(exc), retry_in=round(delay, 1))
                await asyncio.sleep(delay)
                delay = min(delay * 2, 10.0)

    async def _commit(self, pending: _Pending) -> bool:
        """Store everything pending in one transaction, then acknowledge its messages.

        Waits for a commit in flight first (commits keep their order).
        """
        prepared = self._prepare(pending)
        await self._settle()
        return await self._store(prepared)

    async def _settle(self) -> bool:
        """Wait for the commit in flight, if any; False if it was given up."""
        task, self._committing = self._committing, None
        return True if task is None else await task

    def _prepare(self, pending: _Pending) -> _Prepared:
        """The transaction for what is pending, with the checkpoints as they are now.

        Taken before the previous commit has finished, so that the event loop goes on
        handling messages while the store works (the next batch's changes mark the charts
        dirty again and go into the next transaction).
        """
        self.chart_held(pending.output)
        for identity in pending.identities:
            self.guard.remember(identity)
        self._count_handled()
        dirty = list(self.watch.dirty)
        checkpoints = {rt.chart_id: rt.to_state() for rt in dirty}
        for runtime in dirty:
            runtime.dirty = False
        self.watch.dirty.clear()
        link_state = self.guard.checkpoint()
        link_state["subscriptions"] = list(self.subscriptions)
        checkpoints[_LINK_CHECKPOINT + self.broker.client_id] = link_state
        out = pending.output
        sent, self._to_mark = self._to_mark, []
        batch = CommitBatch(
            subgroups=out.subgroups,
            blocks=out.blocks,
            signals=out.signals,
            alerts=[AlertRow(a.id, a.chart_id, a.kind.value, a.created_ms, a.event) for a in out.alerts],
            limits=out.limits,
            checkpoints=checkpoints,
            sent=sent,
        )
        return _Prepared(batch, pending)

    def _count_handled(self) -> None:
        """Bring the message, reading and subgroup counters of the metrics up to the stats."""
        stats, counted = self.stats, self._counted
        self.metrics.count_messages(stats.messages - counted[0])
        self.metrics.count_readings(stats.readings - counted[1])
        self.metrics.count_subgroups(stats.subgroups - counted[2])
        self._counted = (stats.messages, stats.readings, stats.subgroups)

    async def _store(self, prepared: _Prepared) -> bool:
        """Commit a prepared transaction, then acknowledge its messages and hand its alerts on.

        While the store is unreachable this retries with capped backoff (intake waits meanwhile,
        so memory stays bounded and the broker keeps the unacknowledged messages). When the
        daemon is stopping it gives up after ``STOP_GRACE`` seconds without acknowledging:
        the broker sends those messages again at the next start, so nothing is lost; no later
        transaction is committed after one given up (its checkpoints would count those
        messages as done).
        """
        store, link = self.store, self.link
        if store is None or link is None or self._commits_refused:
            return False
        batch, pending = prepared.batch, prepared.pending
        delay = 0.2
        while True:
            started = time.perf_counter()
            try:
                await store.commit(batch)
                break
            except StoreError as exc:
                self._note_store_failure(exc)
                if self._stopped_at is not None and time.monotonic() - self._stopped_at > STOP_GRACE:
                    _log.error(
                        "store_unreachable_at_stop", error=str(exc), unacknowledged=len(pending.messages)
                    )
                    self._commits_refused = True
                    return False
                _log.error("store_commit_failed", error=str(exc), retry_in=round(delay, 1))
                await asyncio.sleep(delay)
                delay = min(delay * 2, 10.0)
        self.stats.commits += 1
        elapsed = time.perf_counter() - started
        self.stats.commit_seconds += elapsed
        self.metrics.observe_commit(elapsed)
        if self.database is not None:
            self.database.succeeded()
        self._unmarked.difference_update(alert_id for alert_id, _ in batch.sent)
        for message in pending.messages:
            link.ack(message)
        out = pending.output
        for row in out.signals:
            self.metrics.count_signal(row.chart, row.rule)
        for alert in out.alerts:
            self.metrics.count_alert(alert.chart_id, alert.kind.value)
        self.stats.signals += len(out.signals)
        self.stats.alerts += len(out.alerts)
        for alert in out.alerts:
            _log.info("alert_raised", chart=alert.chart_id, alert=alert.id, kind=alert.kind.value)
        if batch.alerts:
            self._fresh.extend(batch.alerts)
            if len(self._fresh) > FRESH_ALERTS_HELD:  # long disconnected: the outbox keeps them
                self._fresh.clear()
                self._outbox_backlog = True
        if batch.alerts or self.watch.status:
            self._publish_wake.set()
        return True

    async def _process_loop(self) -> None:
        """Take messages, handle them and commit them in groups.

        A group is committed (and its messages acknowledged) as soon as it holds an alert, once
        it holds ``group_messages`` messages (or more: all those already waiting, up to
        ``max_batch``), or ``group_window`` seconds after its first message: one transaction
        carries many messages without keeping any waiting long.
        While a commit runs on the store's thread (PostgreSQL) the next messages are handled.
        """
        link = self.link
        if link is None:
            return
        held: list[Incoming] = []  # taken from the link, not handled yet (after an alert)
        pending = _Pending()
        opened: float | None = None  # when the group's first message was taken (monotonic)
        closing: asyncio.TimerHandle | None = None  # wakes the wait below when the group is due
        loop = asyncio.get_running_loop()
        while not self._stopping.is_set():
            self.heartbeat.beat()
            if self._reload_requested:
                if opened is not None:  # the group belongs to the charts as they are
                    await self._commit_group(pending)
                    pending, opened = _Pending(), None
                self._reload_requested = False
                await self._reload(link)
            if held:
                messages, held = held, []
            else:
                first = None
                if opened is not None:  # the group's timer wakes this wait when the group is due
                    first = await link.next_message()
                else:
                    with contextlib.suppress(TimeoutError):
                        async with asyncio.timeout(self.tick):
                            first = await link.next_message()
                messages = [first] if first is not None else []
            # what is already waiting joins the group (a backlog drains in large transactions)
            room = self.max_batch - len(pending.messages) - len(messages)
            messages += link.take_ready(max(room, 0))
            if messages and opened is None:
                opened = time.monotonic()
                self._batch_received = messages[0].received_at
                closing = loop.call_later(self.group_window, link.wake)
            for i, message in enumerate(messages):
                if message.topic.startswith(self.ack_filter[:-1]):
                    await self._handle_ack(message)
                    link.ack(message)
                    continue
                self.handle(message, pending)
                if pending.output.alerts and i + 1 < len(messages):
                    # an alert waits for its commit: commit what is handled, the rest comes next
                    held = messages[i + 1 :]
                    break
            now = time.time()
            fitted = False
            for runtime in list(self.watch.timed):
                fitted = runtime.advance(now, pending.output) or fitted
                if not runtime.needs_time:
                    self.watch.timed.discard(runtime)
            adopted = fitted  # a parent fitted to a baseline is checkpointed at once
            if self.store is not None and time.monotonic() - self._limits_checked >= self._limits_poll:
                self.chart_held(pending.output)  # readings that came before new limits are judged by the old
                adopted = await self._refresh_limits(self.store)
            due = (
                adopted
                or bool(pending.output.alerts)
                or len(pending.messages) >= self.group_messages
                or (opened is not None and time.monotonic() - opened >= self.group_window)
                or (opened is None and not pending.empty())  # output without messages (time windows)
            )
            if due:
                if closing is not None:
                    closing.cancel()
                    closing = None
                if adopted or not pending.empty():
                    await self._commit_group(pending)
                pending, opened = _Pending(), None  # (a group of acknowledgements only: nothing)
                self._batch_received = None
        if closing is not None:
            closing.cancel()
        if not pending.empty():  # stopping: what was handled is committed and acknowledged
            await self._commit_group(pending)
        await self._settle()

    async def _commit_group(self, pending: _Pending) -> None:
        """Take the group's transaction now and commit it once the one in flight is done.

        On the store's thread (PostgreSQL) the commit runs while the next messages are handled;
        SQLite commits on the event loop thread, at once.
        """
        prepared = self._prepare(pending)
        await self._settle()
        if self.store is not None and self.store.inline:  # no thread to overlap with: commit now
            await self._store(prepared)
        else:
            self._committing = asyncio.create_task(self._store(prepared), name="monitor.store.commit")
        self._batch_received = None

    async def _publish_loop(self) -> None:
        store, link = self.store, self.link
        if store is None or link is None:
            return
        while True:
            idle = False
            try:
                async with asyncio.timeout(1.0):
                    await self._publish_wake.wait()
            except TimeoutError:
                idle = True
            self._publish_wake.clear()
            try:
                if idle:  # a quiet second: no commit is coming to carry the marks
                    await self._mark_published(store)
                if link.connected:
                    await self.publish_pending(store, link)
            except StoreError as exc:  # the outbox keeps them; try again at the next wake
                _log.error("store_read_failed", error=str(exc))

    async def publish_pending(self, store: Store, link: MqttLink) -> None:
        """Publish unsent alerts (oldest first) and changed chart states; stop at the first failure.

        Alerts committed by this process are published from memory right after their commit;
        the outbox is read only for alerts that memory does not hold (from before a restart, or
        after a failed publish). Published alerts are marked sent by the next commit.
        """
        if self._outbox_backlog and not await self._publish_outbox(store, link):
            return
        while self._fresh:
            row = self._fresh[0]
            if not await self._publish_alert(store, link, row.id, row.chart, row.event):
                self._fresh.clear()  # all unsent in the outbox: read from there, in order
                self._outbox_backlog = True
                return
            self._fresh.popleft()
        while self._dead_letters:
            topic, body = self._dead_letters[0]
            try:
                await link.publish(topic, orjson.dumps(body), qos=1)
            except PublishError:
                break
            self._dead_letters.popleft()
            self.stats.dead_letters += 1
        now_ms = _now_ms()
        for runtime in sorted(self.watch.status, key=lambda rt: rt.chart_id):
            if not runtime.status_dirty:
                self.watch.status.discard(runtime)
                continue
            _, status_topic, _ = topics(self.alert_settings, runtime.chart_id)
            try:
                await link.publish(status_topic, orjson.dumps(runtime.status(now_ms)), qos=1, retain=True)
            except PublishError:
                break
            runtime.status_dirty = False
            self.watch.status.discard(runtime)

    async def _publish_alert(
        self, store: Store, link: MqttLink, alert_id: str, chart: str, event: dict[str, object]
    ) -> bool:
        """Publish one alert; once the broker has it, it waits to be marked sent (next commit)."""
        alert_topic, _, _ = topics(self.alert_settings, chart)
        try:
            await link.publish(alert_topic, orjson.dumps(event), qos=1)
        except PublishError as exc:
            self.stats.publish_failures += 1
            await store.note_attempt([alert_id])
            _log.warning("alert_publish_failed", chart=chart, alert=alert_id, error=str(exc))
            return False
        self._to_mark.append((alert_id, _now_ms()))
        self._unmarked.add(alert_id)
        self.stats.published_alerts += 1
        return True

    async def _publish_outbox(self, store: Store, link: MqttLink) -> bool:
        """Publish the outbox's unsent alerts that memory does not hold; True once it is drained."""
        while True:
            held = {row.id for row in self._fresh} | self._unmarked
            rows = [row for row in await store.pending_alerts(500) if row.id not in held]
            if not rows:
                self._outbox_backlog = False
                return True
            for row in rows:
                if not await self._publish_alert(store, link, row.id, row.chart, row.event):
                    return False

    async def _mark_published(self, store: Store) -> None:
        """Mark published alerts sent now, when no commit came along to carry the marks."""
        if not self._to_mark or (self._committing is not None and not self._committing.done()):
            return
        marks, self._to_mark = self._to_mark, []
        try:
            await store.commit(CommitBatch(sent=marks))
        except StoreError:
            self._to_mark = marks + self._to_mark  # the next commit or quiet second tries again
            raise
        self._unmarked.difference_update(alert_id for alert_id, _ in marks)

    # -- life cycle

    def _owned_description(self) -> str:
        fixed = [c for c in self.config.charts if not c.placeholders]
        if self.shard is None:
            return f"{len(self.config.charts)} configured"
        mine = sum(1 for c in fixed if self.owns(c.id))
        index, count = self.shard
        return f"{mine} of {len(fixed)} fixed charts (shard {index} of {count})"

    def describe_start(self) -> list[str]:
        """What the daemon prints at start: subscriptions, storage and charts owned."""
        filters = [f for f in self.subscriptions if f != self.ack_filter]
        expanding = [c.id for c in self.config.charts if c.placeholders]
        lines = [
            f"line-monitor: broker {self.broker.describe()}",
            f"  subscribed to: {', '.join(filters)} (and {self.ack_filter} for acknowledgements)",
            f"  storing in: {_safe_url(self.url)}",
            f"  charts owned: {self._owned_description()}"
            + (f" ({len(expanding)} expand per topic level)" if expanding else ""),
            (
                f"  alerts on {self.alert_settings.prefix}/alerts/<chart>, "
                f"states on {self.alert_settings.prefix}/status/<chart>"
            ),
        ]
        return lines

    async def run(self, *, announce: Callable[[str], None] | None = None) -> None:
        """Run until :meth:`stop`; then flush, checkpoint, publish what is pending and disconnect."""
        sdnotify.extend_timeout(300)
        sdnotify.status("opening the database")
        store = await Store.open(self.url)
        self.store = store
        self.database = DatabaseWatch(store.ping)
        self.database.succeeded()
        try:
            self._checkpoints = await store.load_checkpoints()
            self._positions = await store.chart_positions()
            self._stored_limits = await store.latest_limits_all()
            self._limits_checked = time.monotonic()
            link_state = self._checkpoints.pop(_LINK_CHECKPOINT + self.broker.client_id, None)
            forget: list[str] = []
            if link_state is not None:
                self.guard.restore(link_state)
                before = link_state.get("subscriptions")
                if isinstance(before, list):
                    forget = [str(f) for f in before if f not in self.subscriptions]
            if any(chart.payload.batch != "none" for chart in self.config.charts):
                # the batch path's filters (scipy.signal, ~1 s to import) load now, not at the first batch
                await asyncio.to_thread(importlib.import_module, "scipy.signal")
            for chart in self.config.charts:
                if not chart.placeholders and self.owns(chart.id):
                    self.runtime(chart.id, chart)
            for chart_id, state in list(self._checkpoints.items()):
                template = self.templates.get(str(state.get("template")))
                if template is not None and template.placeholders and self.owns(chart_id):
                    self.runtime(chart_id, template)
            offline = orjson.dumps({"online": False, "client_id": self.broker.client_id})
            online = orjson.dumps({"online": True, "client_id": self.broker.client_id})
            link = MqttLink(
                self.broker,
                self.subscriptions,
                will=(self.presence_topic, offline),
                online=online,
                queue_size=self.config.broker.max_buffered_messages,
                forget=forget,
            )
            self.link = link
            link.on_connect(self._publish_wake.set)
            link.on_connect(self.metrics.note_connect)
            self._start_health(link)
            for line in self.describe_start():
                (announce or _stderr)(line)
            _log.info(
                "daemon_started",
                broker=self.broker.describe(),
                subscriptions=self.router.filters(),
                storage=_safe_url(self.url),
                charts=len(self.config.charts),
            )
            watchdog = sdnotify.Watchdog(
                lambda: self.heartbeat.age() < WATCHDOG_PROGRESS, environ=self.environ
            )
            async with asyncio.TaskGroup() as group:
                link_task = group.create_task(link.run(), name="monitor.mqtt.link")
                publisher = group.create_task(self._publish_loop(), name="monitor.alerts.publisher")
                helpers = [group.create_task(self.database.run(), name="monitor.store.watch")]
                if watchdog.enabled:
                    helpers.append(group.create_task(watchdog.run(), name="monitor.systemd.watchdog"))
                # What start-up loaded (libraries, configuration, checkpoints) lives as long as the
                # daemon: out of the collector's full passes, which otherwise took ~0.2 s each.
                gc.freeze()
                self.ready.set()
                sdnotify.ready(
                    f"subscribed to {len(self.subscriptions)} filters, {len(self.runtimes)} charts"
                )
                await self._process_loop()
                # stopping: everything taken is committed; publish what is left, then leave
                await self._final_flush(store, link)
                publisher.cancel()
                for helper in helpers:
                    helper.cancel()
                link.stop()
                link_task.cancel()
        finally:
            if self.health is not None:
                await asyncio.to_thread(self.health.stop)
            await store.close()
            _log.info("daemon_stopped", **_stats_summary(self.stats))

    def _start_health(self, link: MqttLink) -> None:
        settings = self.config.health
        if settings is None:
            return
        database = self.database

        def readiness() -> Readiness:
            return Readiness(link.connected, None if database is None else database.age(), self.lag())

        self.health = HealthServer(
            settings.host,
            settings.port,
            heartbeat=self.heartbeat.age,
            readiness=readiness,
            metrics=self.metrics,
            loop=asyncio.get_running_loop(),
            limits=ReadinessLimits(
                database_within=settings.database_within,
                lag_within=settings.max_lag,
                heartbeat_within=settings.heartbeat_within,
            ),
        )
        self.health.start()
        _log.info("health_endpoint_started", url=self.health.url)

    async def _final_flush(self, store: Store, link: MqttLink) -> None:
        pending = _Pending()
        for runtime in self.runtimes.values():
            runtime.dirty = True
        await self._commit(pending)
        with contextlib.suppress(TimeoutError, PublishError, StoreError):
            async with asyncio.timeout(5.0):
                if link.connected:
                    await self.publish_pending(store, link)
                await self._mark_published(store)
                if link.connected:
                    await link.publish(
                        self.presence_topic,
                        orjson.dumps({"online": False, "client_id": self.broker.client_id}),
                        qos=1,
                        retain=True,
                    )

    def stop(self) -> None:
        """Ask the daemon to finish: stop taking messages, commit, publish, disconnect."""
        if self._stopped_at is None:
            self._stopped_at = time.monotonic()
            sdnotify.stopping("committing and disconnecting")
        self._stopping.set()

    def request_reload(self) -> None:
        """Ask the daemon to read its configuration again between two batches (SIGHUP)."""
        self._reload_requested = True

    async def _reload(self, link: MqttLink) -> None:
        """Apply a changed configuration: changed charts continue from their state, others run on.

        An invalid file is refused with its messages and the running configuration stays. The
        broker, storage, alerts and health sections need a restart; changes there are reported.
        """
        try:
            new = load_config(self.config_path)
            _check_daemon_config(new)
        except (ConfigProblems, ConfigError) as exc:
            _log.error("config_reload_refused", problems=str(exc).splitlines())
            return
        fixed_sections = [
            s for s in ("broker", "storage", "alerts", "health") if getattr(new, s) != getattr(self.config, s)
        ]
        if fixed_sections:
            _log.warning("config_reload_partial", needs_restart=fixed_sections)
        new = new.model_copy(update={s: getattr(self.config, s) for s in fixed_sections})
        old_subscriptions = self.subscriptions
        self._set_charts(new)
        self.config = new
        added, changed, removed = [], [], []
        for chart_id, runtime in list(self.runtimes.items()):
            template = self.templates.get(runtime.config.id)
            if template is None or not self.owns(chart_id):
                self.watch.forget(self.runtimes.pop(chart_id))  # its checkpoint stays stored
                removed.append(chart_id)
            elif template != runtime.config:
                fresh = ChartRuntime(chart_id, template, self.alert_settings)
                notes = fresh.restore(runtime.to_state())
                if runtime.dirty:  # what the old one had not committed yet is the new one's to commit
                    fresh.dirty = True
                self.watch.forget(runtime)
                self.watch.dirty.discard(runtime)
                self.runtimes[chart_id] = fresh
                self.watch.register(fresh)
                changed.append(chart_id)
                for note in notes:
                    _log.warning("chart_reconfigured", chart=chart_id, reason=note)
        for chart in new.charts:
            if not chart.placeholders and self.owns(chart.id) and chart.id not in self.runtimes:
                self.runtime(chart.id, chart)
                added.append(chart.id)
        if self.subscriptions != old_subscriptions:
            await link.update_subscriptions(self.subscriptions)
        _log.info(
            "config_reloaded", added=added, changed=changed, removed=removed, subscriptions=self.subscriptions
        )


def _spread(array: NDArray[np.float64], at: NDArray[np.int64], count: int) -> NDArray[np.float64]:
    """``array`` placed at positions ``at`` of ``count``, NaN elsewhere."""
    out = np.full(count, np.nan)
    out[at] = array
    return out


def _check_daemon_config(config: Config) -> None:
    """What the daemon needs beyond the schema: a topic per chart and a consistent routing."""
    missing_topic = [c.id for c in config.charts if not c.topic]
    if missing_topic:
        raise ConfigError(f"the daemon needs a topic for every chart; none for {', '.join(missing_topic)}")
    Router([(c.id, c.topic or "") for c in config.charts])


def _filter_of(chart: ChartConfig) -> str:
    """The subscription filter of a chart (placeholders subscribe as '+')."""
    return re.sub(r"\{[A-Za-z_][A-Za-z0-9_]*\}", "+", chart.topic or "")


def _safe_url(url: str) -> str:
    """A storage URL without its password."""
    if "@" not in url or "://" not in url:
        return url
    scheme, rest = url.split("://", 1)
    credentials, host = rest.rsplit("@", 1)
    user = credentials.split(":", 1)[0]
    return f"{scheme}://{user}:***@{host}"


def _stderr(line: str) -> None:
    print(line, file=sys.stderr, flush=True)


def _stats_summary(stats: DaemonStats) -> dict[str, object]:
    return {
        "messages": stats.messages,
        "readings": stats.readings,
        "duplicates": stats.duplicate_messages + stats.duplicate_readings,
        "rejected": sum(stats.rejected.values()),
        "subgroups": stats.subgroups,
        "signals": stats.signals,
        "alerts": stats.alerts,
        "commits": stats.commits,
    }


async def run_daemon(config: Config, config_path: Path) -> int:
    """Run the daemon until SIGTERM or SIGINT; return the exit status."""
    daemon = Daemon(config, config_path)
    loop = asyncio.get_running_loop()
    for number in (signal.SIGTERM, signal.SIGINT):
        loop.add_signal_handler(number, daemon.stop)
    loop.add_signal_handler(signal.SIGHUP, daemon.request_reload)
    await daemon.run()
    return 0
