"""The tables of the monitor's database, as SQLAlchemy Core tables.

Times are epoch milliseconds in BIGINT columns (never ``DateTime``: SQLite would drop the
time zone). JSON columns use the generic :class:`sqlalchemy.JSON` type, which works on SQLite
and PostgreSQL alike. Every table that names a chart refers to ``charts``.

The migrations (``0001_initial``, then ``0002_subgroup_readings``) create exactly these tables;
a test holds the two together.
"""

from __future__ import annotations

from sqlalchemy import (
    JSON,
    BigInteger,
    Column,
    Double,
    ForeignKey,
    Index,
    Integer,
    MetaData,
    Table,
    Text,
    UniqueConstraint,
    text,
)

__all__ = ["acks", "alerts", "charts", "checkpoints", "limits", "metadata", "signals", "subgroups"]

metadata = MetaData()


def _chart_column(*, primary_key: bool = False) -> Column[str]:
    return Column("chart", Text, ForeignKey("charts.chart"), primary_key=primary_key, nullable=False)


charts = Table(
    "charts",
    metadata,
    Column("chart", Text, primary_key=True),
    Column("first_seen_ms", BigInteger, nullable=False),
)

limits = Table(
    "limits",
    metadata,
    _chart_column(primary_key=True),
    Column("version", Integer, primary_key=True),
    Column("mean", Double, nullable=False),
    Column("sigma", Double, nullable=True),
    Column("source", Text, nullable=False),
    Column("detail", JSON, nullable=False),
    Column("created_ms", BigInteger, nullable=False),
)

subgroups = Table(
    "subgroups",
    metadata,
    _chart_column(primary_key=True),
    Column("idx", BigInteger, primary_key=True),
    Column("start_ms", BigInteger, nullable=True),
    Column("end_ms", BigInteger, nullable=True),
    Column("n", Integer, nullable=False),
    Column("points", JSON, nullable=False),
    Column("readings", JSON, nullable=True),
)

signals = Table(
    "signals",
    metadata,
    Column("id", Integer, primary_key=True, autoincrement=True),
    _chart_column(),
    Column("subgroup", BigInteger, nullable=False),
    Column("kind", Text, nullable=False),
    Column("statistic", Text, nullable=False),
    Column("rule", Text, nullable=False),
    Column("side", Text, nullable=False),
    Column("value", Double, nullable=False),
    Column("center", Double, nullable=False),
    Column("lower", Double, nullable=True),
    Column("upper", Double, nullable=True),
    Column("z", Double, nullable=True),
    Column("p_value", Double, nullable=True),
    Column("method", Text, nullable=True),
    Column("alert_id", Text, nullable=True),
    Column("created_ms", BigInteger, nullable=False),
    UniqueConstraint("chart", "subgroup", "kind", "statistic", "rule", name="uq_signals_natural_key"),
)

alerts = Table(
    "alerts",
    metadata,
    Column("id", Text, primary_key=True),
    _chart_column(),
    Column("event_type", Text, nullable=False),
    Column("created_ms", BigInteger, nullable=False),
    Column("event", JSON, nullable=False),
    Column("sent_ms", BigInteger, nullable=True),
    Column("attempts", Integer, nullable=False, server_default=text("0")),
)
UNSENT_ALERTS = text("sent_ms IS NULL")
Index(
    "ix_alerts_unsent",
    alerts.c.created_ms,
    alerts.c.id,
    sqlite_where=UNSENT_ALERTS,
    postgresql_where=UNSENT_ALERTS,
)

acks = Table(
    "acks",
    metadata,
    Column("alert_id", Text, ForeignKey("alerts.id"), primary_key=True),
    _chart_column(),
    Column("acked_by", Text, primary_key=True),
    Column("note", Text, nullable=False),
    Column("at_ms", BigInteger, primary_key=True),
)

checkpoints = Table(
    "checkpoints",
    metadata,
    _chart_column(primary_key=True),
    Column("state", JSON, nullable=False),
    Column("updated_ms", BigInteger, nullable=False),
)
