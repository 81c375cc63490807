"""The first schema: charts, limits, subgroups, signals, alerts (the outbox), acks, checkpoints.

Revision ID: 0001_initial
Revises: none

Times are epoch milliseconds in BIGINT columns.
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision: str = "0001_initial"
down_revision: str | None = None
branch_labels: str | None = None
depends_on: str | None = None


def _chart(*, primary_key: bool = False) -> sa.Column[str]:
    return sa.Column("chart", sa.Text, sa.ForeignKey("charts.chart"), primary_key=primary_key, nullable=False)


def upgrade() -> None:
    """Create every table of the first schema."""
    op.create_table(
        "charts",
        sa.Column("chart", sa.Text, primary_key=True),
        sa.Column("first_seen_ms", sa.BigInteger, nullable=False),
    )
    op.create_table(
        "limits",
        _chart(primary_key=True),
        sa.Column("version", sa.Integer, primary_key=True),
        sa.Column("mean", sa.Double, nullable=False),
        sa.Column("sigma", sa.Double, nullable=True),
        sa.Column("source", sa.Text, nullable=False),
        sa.Column("detail", sa.JSON, nullable=False),
        sa.Column("created_ms", sa.BigInteger, nullable=False),
    )
    op.create_table(
        "subgroups",
        _chart(primary_key=True),
        sa.Column("idx", sa.BigInteger, primary_key=True),
        sa.Column("start_ms", sa.BigInteger, nullable=True),
        sa.Column("end_ms", sa.BigInteger, nullable=True),
        sa.Column("n", sa.Integer, nullable=False),
        sa.Column("points", sa.JSON, nullable=False),
    )
    op.create_table(
        "signals",
        sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
        _chart(),
        sa.Column("subgroup", sa.BigInteger, nullable=False),
        sa.Column("kind", sa.Text, nullable=False),
        sa.Column("statistic", sa.Text, nullable=False),
        sa.Column("rule", sa.Text, nullable=False),
        sa.Column("side", sa.Text, nullable=False),
        sa.Column("value", sa.Double, nullable=False),
        sa.Column("center", sa.Double, nullable=False),
        sa.Column("lower", sa.Double, nullable=True),
        sa.Column("upper", sa.Double, nullable=True),
        sa.Column("z", sa.Double, nullable=True),
        sa.Column("p_value", sa.Double, nullable=True),
        sa.Column("method", sa.Text, nullable=True),
        sa.Column("alert_id", sa.Text, nullable=True),
        sa.Column("created_ms", sa.BigInteger, nullable=False),
        sa.UniqueConstraint("chart", "subgroup", "kind", "statistic", "rule", name="uq_signals_natural_key"),
    )
    op.create_table(
        "alerts",
        sa.Column("id", sa.Text, primary_key=True),
        _chart(),
        sa.Column("event_type", sa.Text, nullable=False),
        sa.Column("created_ms", sa.BigInteger, nullable=False),
        sa.Column("event", sa.JSON, nullable=False),
        sa.Column("sent_ms", sa.BigInteger, nullable=True),
        sa.Column("attempts", sa.Integer, nullable=False, server_default=sa.text("0")),
    )
    unsent = sa.text("sent_ms IS NULL")
    op.create_index(
        "ix_alerts_unsent",
        "alerts",
        ["created_ms", "id"],
        sqlite_where=unsent,
        postgresql_where=unsent,
    )
    op.create_table(
        "acks",
        sa.Column("alert_id", sa.Text, sa.ForeignKey("alerts.id"), primary_key=True),
        _chart(),
        sa.Column("acked_by", sa.Text, primary_key=True),
        sa.Column("note", sa.Text, nullable=False),
        sa.Column("at_ms", sa.BigInteger, primary_key=True),
    )
    op.create_table(
        "checkpoints",
        _chart(primary_key=True),
        sa.Column("state", sa.JSON, nullable=False),
        sa.Column("updated_ms", sa.BigInteger, nullable=False),
    )


def downgrade() -> None:
    """Drop every table of the first schema."""
    for table in ("checkpoints", "acks", "alerts", "signals", "subgroups", "limits", "charts"):
        op.drop_table(table)
