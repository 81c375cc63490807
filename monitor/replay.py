"""Offline replay: run the configured charts over a file of past readings with the daemon's engine.

The file is CSV or Parquet with one reading per row and the columns

* ``chart`` (a chart id) or ``topic`` (matched against the charts' topic filters; one topic
  may feed several charts),
* ``timestamp`` (ISO 8601, UTC unless an offset is given, or seconds since the epoch),
* ``value`` (the reading; for p and u charts the count of rejects or defects),
* optionally ``exposure`` (units inspected for that count).

Rows are taken in file order per chart. Readings form subgroups exactly as in the daemon
(count, or clock-aligned windows with the configured lateness); each chart set then runs its
vectorised batch path. The output is one JSON line per plotted point, signal or baseline,
and a ``summary`` line per chart (signals per rule, false alarms observed against expected,
labelled changes and their detection).
Rows that cannot be used are reported with their line numbers and skipped; nothing else is
dropped silently (incomplete subgroups at the end are reported as pending).
"""

from __future__ import annotations

import math
from collections import Counter
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import IO

import numpy as np
import orjson
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
from numpy.typing import NDArray
from scipy import special

from monitor.config import ChartConfig, Config
from monitor.spc import (
    ChartSet,
    CountSubgrouper,
    PhaseOneEstimate,
    Reading,
    ReadingError,
    SetResult,
    Signal,
    Subgroup,
    SubgroupBatch,
    WindowSubgrouper,
)
from monitor.topics import matches

__all__ = [
    "ChartReplay",
    "DataError",
    "ReadingTable",
    "ReplaySummary",
    "chart_subgroups",
    "read_table",
    "replay",
]

_MAX_LISTED = 20


class DataError(ReadingError):
    """The data file cannot be replayed at all (missing, unreadable, wrong columns)."""


@dataclass(frozen=True, slots=True)
class RowProblem:
    """A row of the data file that was skipped, and why."""

    line: int
    reason: str


@dataclass(frozen=True, eq=False)
class ReadingTable:
    """Readings of a data file as arrays, rows in file order."""

    key_column: str
    keys: list[str]
    key_index: NDArray[np.int64]
    times: NDArray[np.float64]
    values: NDArray[np.float64]
    exposures: NDArray[np.float64] | None
    lines: NDArray[np.int64]
    problems: list[RowProblem] = field(default_factory=list)
    problem_count: int = 0
    labels: NDArray[np.int64] | None = None
    """Per row, an index into ``label_names`` (the optional ``label`` column)."""
    label_names: list[str] = field(default_factory=list)


def _load_arrow(path: Path) -> tuple[pa.Table, int]:
    """The file as an Arrow table, and the number of the line holding its first row."""
    if not path.exists():
        raise DataError(f"{path}: no such file")
    try:
        if path.suffix.lower() in (".parquet", ".pq"):
            return pq.read_table(path), 1
        convert = pacsv.ConvertOptions(
            column_types={"chart": pa.string(), "topic": pa.string()}, strings_can_be_null=False
        )
        return pacsv.read_csv(path, convert_options=convert), 2
    except (pa.ArrowInvalid, OSError) as exc:
        raise DataError(
            f"{path}: cannot read as {'Parquet' if path.suffix == '.parquet' else 'CSV'}: {exc}"
        ) from None


def _seconds(column: pa.ChunkedArray, path: Path) -> tuple[NDArray[np.float64], NDArray[np.bool_]]:
    """Timestamps as float seconds since the epoch, and which rows failed to parse."""
    kind = column.type
    if pa.types.is_timestamp(kind):
        nanos = column.cast(pa.timestamp("ns", tz=kind.tz)).cast(pa.int64())
        values = nanos.to_numpy(zero_copy_only=False).astype(np.float64) / 1e9
        return values, np.asarray(column.is_null().to_numpy(zero_copy_only=False))
    if pa.types.is_integer(kind) or pa.types.is_floating(kind):
        values = column.cast(pa.float64()).to_numpy(zero_copy_only=False)
        return values, ~np.isfinite(values)
    if pa.types.is_string(kind) or pa.types.is_large_string(kind):
        texts = column.to_pylist()
        out = np.full(len(texts), np.nan)
        for i, text in enumerate(texts):
            out[i] = _parse_time(text)
        return out, ~np.isfinite(out)
    raise DataError(f"{path}: the timestamp column has type {kind}; use ISO 8601 or epoch seconds")


def _parse_time(text: str | None) -> float:
    from datetime import UTC, datetime  # noqa: PLC0415 - only for odd timestamp strings

    if text is None:
        return math.nan
    try:
        return float(text)
    except ValueError:
        pass
    try:
        moment = datetime.fromisoformat(text.strip())
    except ValueError:
        return math.nan
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=UTC)
    return moment.timestamp()


def _numbers(column: pa.ChunkedArray) -> NDArray[np.float64]:
    """A column as floats; unparseable entries become NaN (reported by the caller)."""
    if pa.types.is_integer(column.type) or pa.types.is_floating(column.type):
        return np.asarray(column.cast(pa.float64()).to_numpy(zero_copy_only=False), dtype=np.float64)
    out = np.full(len(column), np.nan)
    for i, text in enumerate(column.to_pylist()):
        try:
            out[i] = float(text)
        except (TypeError, ValueError):
            out[i] = math.nan
    return out


def read_table(path: str | Path) -> ReadingTable:
    """Read a CSV or Parquet file of readings; rows that cannot be used are listed, not fatal."""
    file = Path(path)
    table, first_line = _load_arrow(file)
    names = set(table.column_names)
    key_column = "chart" if "chart" in names else "topic" if "topic" in names else None
    missing = [c for c in ("timestamp", "value") if c not in names]
    if key_column is None or missing:
        need = ([] if key_column else ["chart or topic"]) + missing
        raise DataError(f"{file}: missing column(s) {', '.join(need)}; found {', '.join(table.column_names)}")
    rows = table.num_rows
    lines = np.arange(first_line, first_line + rows, dtype=np.int64)
    keys_column = table.column(key_column)
    if pa.types.is_dictionary(keys_column.type) and pa.types.is_string(keys_column.type.value_type):
        encoded = keys_column.unify_dictionaries().combine_chunks()  # Parquet keeps it encoded
    else:
        encoded = pc.dictionary_encode(keys_column.cast(pa.string())).combine_chunks()
    key_index = np.asarray(encoded.indices.to_numpy(zero_copy_only=False), dtype=np.int64)
    keys = [str(k) for k in encoded.dictionary.to_pylist()]
    key_bad = np.asarray(keys_column.is_null().to_numpy(zero_copy_only=False)) | (key_index < 0)
    if "" in keys:
        key_bad |= key_index == keys.index("")
    times, time_bad = _seconds(table.column("timestamp"), file)
    values = _numbers(table.column("value"))
    value_bad = ~np.isfinite(values)
    exposures = None
    exposure_bad = np.zeros(rows, dtype=bool)
    if "exposure" in names:
        column = table.column("exposure")
        given = ~np.asarray(column.is_null().to_numpy(zero_copy_only=False))
        if pa.types.is_string(column.type):
            given &= np.asarray(
                pc.not_equal(column, "").fill_null(value=False).to_numpy(zero_copy_only=False)
            )
        if given.any():
            parsed = _numbers(column)
            exposure_bad = given & ~(np.isfinite(parsed) & (parsed > 0))
            exposures = np.where(given, parsed, 1.0)
    bad = key_bad | time_bad | value_bad | exposure_bad
    problems: list[RowProblem] = []
    for pos in np.flatnonzero(bad)[:_MAX_LISTED].tolist():
        if key_bad[pos]:
            reason = f"empty {key_column}"
        elif time_bad[pos]:
            reason = "timestamp is not ISO 8601 or epoch seconds"
        elif value_bad[pos]:
            reason = "value is not a finite number"
        else:
            reason = "exposure is not a positive number"
        problems.append(RowProblem(int(lines[pos]), reason))
    good: slice | NDArray[np.bool_] = ~bad if problems else slice(None)  # copies only when rows drop
    labels, label_names = None, []
    if "label" in names:
        encoded_labels = pc.dictionary_encode(
            table.column("label").cast(pa.string()).fill_null("")
        ).combine_chunks()
        labels = np.asarray(encoded_labels.indices.to_numpy(zero_copy_only=False), dtype=np.int64)[good]
        label_names = [str(x) for x in encoded_labels.dictionary.to_pylist()]
    return ReadingTable(
        key_column=key_column,
        keys=keys,
        key_index=key_index[good],
        times=times[good],
        values=values[good],
        exposures=None if exposures is None else exposures[good],
        lines=lines[good],
        problems=problems,
        problem_count=int(bad.sum()),
        labels=labels,
        label_names=label_names,
    )


# ---------------------------------------------------------------- routing and subgroups


def _chart_rows(table: ReadingTable, chart: ChartConfig) -> NDArray[np.int64]:
    """Positions of the rows that feed ``chart``, in file order."""
    if table.key_column == "chart":
        wanted = [i for i, key in enumerate(table.keys) if key == chart.id]
    else:
        wanted = [
            i for i, key in enumerate(table.keys) if chart.topic is not None and matches(chart.topic, key)
        ]
    if not wanted:
        return np.empty(0, dtype=np.int64)
    return np.flatnonzero(np.isin(table.key_index, wanted))


@dataclass(slots=True)
class ChartReplay:
    """What a replay did for one chart."""

    chart: str
    readings: int = 0
    subgroups: int = 0
    pending: int = 0
    late: int = 0
    short_windows: int = 0
    short_readings: int = 0
    signals: Counter[tuple[str, str, str]] = field(default_factory=Counter)
    estimate: PhaseOneEstimate | None = None
    monitoring_from: int | None = None
    labelled: bool = False
    in_control_subgroups: int = 0
    rates: list[RuleRate] = field(default_factory=list)
    changes: list[ChangeDetection] = field(default_factory=list)

    def to_json(self) -> dict[str, object]:
        """The summary as a ``"type": "summary"`` JSON line (stable keys, for scripts)."""
        return {
            "type": "summary",
            "chart": self.chart,
            "readings": self.readings,
            "subgroups": self.subgroups,
            "pending_readings": self.pending,
            "late_readings": self.late,
            "short_windows": self.short_windows,
            "charted_from": self.monitoring_from,
            "signals": [
                {"kind": kind, "statistic": statistic, "rule": rule, "count": count}
                for (kind, statistic, rule), count in sorted(self.signals.items())
            ],
            "labelled": self.labelled,
            "in_control_subgroups": self.in_control_subgroups,
            "false_alarms": [
                {
                    "kind": r.kind,
                    "statistic": r.statistic,
                    "rule": r.rule,
                    "observed": r.observed,
                    "expected": r.expected,
                }
                for r in self.rates
            ],
            "changes": [
                {
                    "label": c.label,
                    "subgroup": c.subgroup,
                    "first_signal": c.first_signal,
                    "rule": c.rule,
                    "delay_subgroups": c.delay_subgroups,
                    "delay_seconds": c.delay_seconds,
                }
                for c in self.changes
            ],
        }


IN_CONTROL_LABELS = frozenset({"", "in control", "in-control", "in_control", "normal", "ok", "baseline"})
"""Labels (case-insensitive) that mean the process was in control; any other label is a change."""


@dataclass(frozen=True, slots=True)
class RuleRate:
    """Signals of one rule on one panel over the in-control stretches, and how many to expect."""

    kind: str
    statistic: str
    rule: str
    observed: int
    expected: float | None
    """Under a normal in-control process (None where not computed)."""


@dataclass(frozen=True, slots=True)
class ChangeDetection:
    """A labelled change and the first signal at or after it."""

    label: str
    subgroup: int
    time: float | None
    first_signal: int | None
    rule: str | None
    delay_subgroups: int | None
    delay_seconds: float | None


def _count_batch(
    chart: ChartConfig,
    times: NDArray[np.float64],
    values: NDArray[np.float64],
    exposures: NDArray[np.float64] | None,
    report: ChartReplay,
) -> SubgroupBatch:
    grouper = CountSubgrouper(size=chart.subgroup.size or 1)
    batch = grouper.add_many(values, times, exposures)
    report.pending = grouper.pending
    return batch


def _window_batch(
    chart: ChartConfig,
    times: NDArray[np.float64],
    values: NDArray[np.float64],
    exposures: NDArray[np.float64] | None,
    report: ChartReplay,
) -> SubgroupBatch:
    grouper = chart.subgrouper()
    if not isinstance(grouper, WindowSubgrouper):  # pragma: no cover - guarded by the caller
        raise TypeError("window subgrouping expected")
    if times.shape[0] == 0:
        return SubgroupBatch.from_subgroups([])
    if bool((np.diff(times) >= 0).all()):
        # Readings in time order: every window closes in turn and none is late, so the
        # windows are runs of equal window numbers (the streaming grouper gives the same).
        windows = np.floor((times - grouper.origin) / grouper.width).astype(np.int64)
        cuts = np.flatnonzero(np.diff(windows)) + 1
        starts = np.concatenate([[0], cuts])
        sizes = np.diff(np.concatenate([starts, [times.shape[0]]]))
        keep = sizes >= grouper.min_size
        report.short_windows = int((~keep).sum())
        report.short_readings = int(sizes[~keep].sum())
        take = np.repeat(keep, sizes)
        kept_windows = windows[starts][keep]
        return SubgroupBatch.from_ragged(
            values[take],
            sizes[keep],
            exposures=None if exposures is None else exposures[take],
            start=grouper.origin + kept_windows * grouper.width,
            end=grouper.origin + (kept_windows + 1) * grouper.width,
        )
    subgroups: list[Subgroup] = []
    for i in range(times.shape[0]):
        exposure = None if exposures is None else float(exposures[i])
        subgroups.extend(grouper.add(Reading(float(values[i]), float(times[i]), exposure)))
    subgroups.extend(grouper.flush())
    report.late = grouper.stats.late
    report.short_windows = grouper.stats.short_windows
    report.short_readings = grouper.stats.short_readings
    return SubgroupBatch.from_subgroups(subgroups)


def chart_subgroups(
    table: ReadingTable, chart: ChartConfig, rows: NDArray[np.int64] | None = None
) -> tuple[SubgroupBatch, ChartReplay]:
    """The subgroups the daemon would form for ``chart`` from the table's rows, and a tally.

    ``rows`` are the positions feeding the chart (by default found from its id or topic).
    """
    if rows is None:
        rows = _chart_rows(table, chart)
    report = ChartReplay(chart=chart.id, readings=int(rows.shape[0]))
    times, values = table.times[rows], table.values[rows]
    attribute = chart.spec().attribute is not None
    exposures = None if table.exposures is None or not attribute else table.exposures[rows]
    if chart.subgroup.window is not None:
        batch = _window_batch(chart, times, values, exposures, report)
    else:
        batch = _count_batch(chart, times, values, exposures, report)
    return batch, report


# ---------------------------------------------------------------- output


def _iso(seconds: NDArray[np.float64] | None, count: int) -> list[str | None]:
    if seconds is None:
        return [None] * count
    known = np.isfinite(seconds)
    millis = np.where(known, np.round(seconds * 1000.0), 0).astype("datetime64[ms]")
    texts = np.datetime_as_string(millis, unit="ms", timezone="UTC")
    return [str(t).replace("+0000", "Z") if k else None for t, k in zip(texts, known, strict=True)]


def _finite(value: float) -> float | None:
    return value if math.isfinite(value) else None


def _signal_line(chart_id: str, signal: Signal, start: str | None, end: str | None) -> dict[str, object]:
    return {
        "type": "signal",
        "chart": chart_id,
        "kind": signal.chart.value,
        "statistic": signal.statistic.value,
        "rule": signal.rule.value,
        "side": signal.side.value,
        "subgroup": signal.subgroup,
        "subgroups": list(signal.subgroups),
        "start": start,
        "end": end,
        "value": signal.value,
        "center": signal.center,
        "lower": signal.lower,
        "upper": signal.upper,
        "z": signal.z,
        "run_start": signal.run_start,
    }


def _estimate_line(chart_id: str, estimate: PhaseOneEstimate) -> dict[str, object]:
    return {
        "type": "baseline",
        "chart": chart_id,
        "mean": estimate.parameters.mean,
        "sigma": estimate.parameters.sigma,
        "estimator": estimate.estimator,
        "subgroups": estimate.subgroups,
        "used": estimate.used,
        "rounds": estimate.rounds,
        "settled": estimate.settled,
        "excluded": [e.to_state() for e in estimate.excluded],
    }


def _lines(
    chart_id: str, batch: SubgroupBatch, result: SetResult, first: int, points: bool
) -> Iterator[dict[str, object]]:
    """Output lines in subgroup order: the points of a subgroup, then its signals."""
    m = len(batch)
    if result.established is not None:
        yield _estimate_line(chart_id, result.established)
    signals_at: dict[int, list[Signal]] = {}
    for signal in result.signals:
        signals_at.setdefault(signal.subgroup, []).append(signal)
    if not points:  # only the subgroups with signals: no text nor lookup for the millions of others
        wanted = np.array(sorted(signals_at), dtype=np.int64) - first
        starts = _iso(None if batch.start is None else batch.start[wanted], len(wanted))
        ends = _iso(None if batch.end is None else batch.end[wanted], len(wanted))
        for k, index in enumerate(sorted(signals_at)):
            for signal in signals_at[index]:
                yield _signal_line(chart_id, signal, starts[k], ends[k])
        return
    starts, ends = _iso(batch.start, m), _iso(batch.end, m)
    traces = [
        (kind, trace, dict(zip(trace.subgroup.tolist(), range(len(trace)), strict=True)))
        for kind, by_statistic in result.traces.items()
        for trace in by_statistic.values()
    ]
    charted = sorted({i for _, trace, _ in traces for i in trace.subgroup.tolist()} | set(signals_at))
    for index in charted:
        pos = index - first
        if points:
            for kind, trace, where in traces:
                at = where.get(index)
                if at is None:
                    continue
                yield {
                    "type": "point",
                    "chart": chart_id,
                    "kind": kind.value,
                    "statistic": trace.statistic.value,
                    "subgroup": index,
                    "n": int(trace.n[at]),
                    "start": starts[pos],
                    "end": ends[pos],
                    "value": float(trace.value[at]),
                    "center": float(trace.center[at]),
                    "lower": _finite(float(trace.lower[at])),
                    "upper": _finite(float(trace.upper[at])),
                }
        for signal in signals_at.get(index, ()):
            yield _signal_line(chart_id, signal, starts[pos], ends[pos])


@dataclass(slots=True)
class ReplaySummary:
    """What a replay did, per chart, plus the rows it could not use."""

    charts: list[ChartReplay]
    rows_skipped: int
    problems: list[RowProblem]
    unrouted: int


def _subgroup_labels(
    batch: SubgroupBatch, times: NDArray[np.float64], labels: NDArray[np.int64], names: list[str]
) -> list[str]:
    """The label in force at each subgroup's end: that of the latest reading by then."""
    order = np.argsort(times, kind="stable")
    ordered_times, ordered_labels = times[order], labels[order]
    ends = batch.end if batch.end is not None else np.full(len(batch), np.inf)
    positions = np.searchsorted(ordered_times, ends, side="right") - 1
    positions = np.clip(positions, 0, max(0, ordered_times.shape[0] - 1))
    return [names[int(ordered_labels[p])] if ordered_labels.shape[0] else "" for p in positions.tolist()]


def _expected_rate(chart: ChartConfig, statistic: str, rule: str, n: int) -> float | None:
    """Per-subgroup probability that a rule fires on a panel of a normal in-control process."""
    from monitor.design import spread_rate  # noqa: PLC0415 - the ARL machinery only when judging
    from monitor.spc.arl import cusum_tail  # noqa: PLC0415
    from monitor.spc.pvalues import pattern_probability  # noqa: PLC0415

    if statistic in ("mean", "individual", "proportion", "rate"):
        found = next((r for r in chart.rule_objects() if r.id.value == rule), None)
        return None if found is None else pattern_probability(found, chart.limit_sigma)
    if statistic in ("range", "sd", "moving_range"):
        return spread_rate(chart, n)
    if statistic == "ewma":
        # the EWMA of a normal process is normal with the variance its limits use, at every t
        return float(2.0 * special.ndtr(-chart.ewma.width))
    if statistic in ("cusum_upper", "cusum_lower"):
        c = chart.cusum
        if statistic == "cusum_upper":
            return cusum_tail(c.k, c.h, c.h, side="upper")
        return cusum_tail(c.k, c.h, c.h, side="lower")  # stationary P(sum >= h): a signal while above
    return None


def _judge(
    chart: ChartConfig,
    batch: SubgroupBatch,
    result: SetResult,
    report: ChartReplay,
    times: NDArray[np.float64],
    labels: NDArray[np.int64] | None,
    names: list[str],
) -> None:
    """Observed against expected signals over in-control stretches, and detection of labelled changes."""
    first = report.monitoring_from
    if first is None or len(batch) <= first:
        return
    report.labelled = labels is not None
    subgroup_labels: list[str] = []
    if labels is None:  # every subgroup in control: no list of millions of labels to build
        quiet = np.ones(len(batch), dtype=bool)
    else:
        subgroup_labels = _subgroup_labels(batch, times, labels, names)
        quiet = np.array(
            [label.strip().lower() in IN_CONTROL_LABELS for label in subgroup_labels], dtype=bool
        )
    charted = range(first, len(batch))
    report.in_control_subgroups = int(quiet[first:].sum())
    n = int(np.median(batch.sizes)) if len(batch) else 1
    observed: Counter[tuple[str, str, str]] = Counter()
    for signal in result.signals:
        if quiet[signal.subgroup]:
            observed[(signal.chart.value, signal.statistic.value, signal.rule.value)] += 1
    panels = {(k.value, s.value) for k, traces in result.traces.items() for s in traces}
    location = ("mean", "individual", "proportion", "rate")
    rules = [r.id.value for r in chart.rule_objects()]
    wanted: set[tuple[str, str, str]] = set(observed)
    for kind, statistic in panels:
        for rule in rules if statistic in location else ["beyond_limits"]:
            wanted.add((kind, statistic, rule))
    for key in sorted(wanted):
        rate = _expected_rate(chart, key[1], key[2], n)
        expected = None if rate is None else rate * report.in_control_subgroups
        report.rates.append(RuleRate(key[0], key[1], key[2], observed[key], expected))
    if labels is None:
        return
    signal_at = sorted((s.subgroup, s.rule.value) for s in result.signals)
    ends = batch.end
    for i in charted:
        if quiet[i] or (i > first and subgroup_labels[i] == subgroup_labels[i - 1]):
            continue
        after = next(((g, rule) for g, rule in signal_at if g >= i), None)
        start_time = None if ends is None else float(ends[i])
        delay_seconds = None
        if after is not None and ends is not None:
            delay_seconds = float(ends[after[0]]) - float(ends[i])
        report.changes.append(
            ChangeDetection(
                label=subgroup_labels[i],
                subgroup=i,
                time=start_time,
                first_signal=None if after is None else after[0],
                rule=None if after is None else after[1],
                delay_subgroups=None if after is None else after[0] - i,
                delay_seconds=delay_seconds,
            )
        )


def replay(
    config: Config,
    data: str | Path,
    out: IO[bytes] | None = None,
    *,
    points: bool = True,
    progress: Callable[[str], None] | None = None,
) -> ReplaySummary:
    """Replay a data file through the configured charts, writing JSON lines to ``out``.

    Args:
        config: the validated configuration.
        data: CSV or Parquet file of readings.
        out: binary stream for the JSON lines; None writes nothing.
        points: write a line per plotted point (else signals and baselines only).
        progress: called with a short message as each chart starts.
    """
    table = read_table(data)
    routed = np.zeros(table.key_index.shape[0], dtype=bool)
    reports: list[ChartReplay] = []
    for chart in config.charts:
        if progress is not None:
            progress(chart.id)
        rows = _chart_rows(table, chart)
        routed[rows] = True
        batch, report = chart_subgroups(table, chart, rows)
        times = table.times[rows]
        chart_set = ChartSet(chart.spec())
        result = chart_set.update_many(batch)
        report.subgroups = len(batch)
        report.estimate = chart_set.estimate
        plan = chart_set.spec.baseline
        if chart_set.monitoring:
            report.monitoring_from = 0 if plan is None else min(plan.subgroups, len(batch))
        for signal in result.signals:
            report.signals[(signal.chart.value, signal.statistic.value, signal.rule.value)] += 1
        chart_labels = None if table.labels is None else table.labels[rows]
        _judge(chart, batch, result, report, times, chart_labels, table.label_names)
        if out is not None:
            for line in _lines(chart.id, batch, result, 0, points):
                out.write(orjson.dumps(line))
                out.write(b"\n")
            out.write(orjson.dumps(report.to_json()))
            out.write(b"\n")
        reports.append(report)
    return ReplaySummary(
        charts=reports,
        rows_skipped=table.problem_count,
        problems=table.problems,
        unrouted=int((~routed).sum()),
    )
