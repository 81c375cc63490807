"""Rows for the storage tests, one small factory per kind of row."""

from __future__ import annotations

from monitor.store import AlertRow, CommitBatch, LimitsRow, SignalRow, SubgroupRow

T0 = 1_767_225_600_000  # 2026-01-01T00:00:00Z in epoch milliseconds


def subgroup(chart: str, index: int, *, n: int = 5) -> SubgroupRow:
    points: dict[str, object] = {
        "xbar_r": {"mean": {"value": 8.0 + index / 100, "center": 8.0, "lower": 7.9, "upper": 8.1}}
    }
    return SubgroupRow(chart, index, T0 + 1000 * index, T0 + 1000 * index + 999, n, points)


def signal(chart: str, index: int, *, rule: str = "beyond_limits", alert_id: str | None = None) -> SignalRow:
    return SignalRow(
        chart=chart,
        subgroup=index,
        kind="xbar_r",
        statistic="mean",
        rule=rule,
        side="upper",
        value=8.2,
        center=8.0,
        lower=7.9,
        upper=8.1,
        z=4.0,
        p_value=6.3e-5,
        method="normal",
        alert_id=alert_id,
    )


def alert(chart: str, alert_id: str, *, created_ms: int = T0) -> AlertRow:
    event: dict[str, object] = {
        "specversion": "1.0",
        "id": alert_id,
        "source": f"monitor/{chart}",
        "type": "line.monitor.signal",
        "data": {"chart": chart, "rules": ["beyond_limits"]},
    }
    return AlertRow(alert_id, chart, "line.monitor.signal", created_ms, event)


def limits(chart: str, version: int, *, mean: float = 8.0, created_ms: int = T0) -> LimitsRow:
    return LimitsRow(chart, version, mean, 0.04, "standard", {"note": "from the drawing"}, created_ms)


def full_batch(chart: str) -> CommitBatch:
    """Two subgroups, a signal with its alert, limits and a checkpoint of one chart."""
    return CommitBatch(
        subgroups=[subgroup(chart, 1), subgroup(chart, 2)],
        signals=[signal(chart, 2, alert_id=f"{chart}-a2")],
        alerts=[alert(chart, f"{chart}-a2")],
        limits=[limits(chart, 1)],
        checkpoints={chart: {"kind": "chart_set", "schema": 1, "subgroups": 2}},
    )
