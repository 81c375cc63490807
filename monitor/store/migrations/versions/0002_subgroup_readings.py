"""Keep each subgroup's readings, and store baseline subgroups too.

Revision ID: 0002_subgroup_readings
Revises: 0001_initial

``subgroups.readings`` holds the readings' values (and, for attribute charts, their
exposures) so that a new Phase I baseline, a parent-model fit or a picture can be made from
stored history. Rows written before this revision have it NULL.
"""

from __future__ import annotations

import sqlalchemy as sa
from alembic import op

revision: str = "0002_subgroup_readings"
down_revision: str | None = "0001_initial"
branch_labels: str | None = None
depends_on: str | None = None


def upgrade() -> None:
    """Add the nullable ``readings`` column."""
    with op.batch_alter_table("subgroups") as batch:
        batch.add_column(sa.Column("readings", sa.JSON, nullable=True))


def downgrade() -> None:
    """Drop it again."""
    with op.batch_alter_table("subgroups") as batch:
        batch.drop_column("readings")
