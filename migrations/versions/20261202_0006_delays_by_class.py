"""label-delay histograms per actual class in the rollups

Revision ID: 0006_delays_by_class
Revises: 0005_negative_cutoff
Create Date: 2026-12-02 13:40:00

The new statistic is declared in belated/store/statistics.py; rows written before this
revision lack it, so every hour that has predictions is marked for a recompute from raw
rows (the refresh job fills the column; `belated rebuild` does it at once).
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0006_delays_by_class"
down_revision: str | None = "0005_negative_cutoff"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    # in place on both stores: no copy of a large table
    op.add_column("rollups", sa.Column("delays_by_class", sa.LargeBinary(), nullable=True))
    # a fresh version per hour: any mark a refresh holds now is replaced, never mistaken
    op.execute(
        "INSERT INTO dirty_buckets (model_id, hour, version, marked_at, recompute)"
        " SELECT model_id, hour, 1 + (model_id * 1000003 + hour) % 4611686018427387903,"
        " CURRENT_TIMESTAMP, true FROM (SELECT DISTINCT model_id, hour FROM predictions) AS h"
        " WHERE NOT EXISTS (SELECT 1 FROM dirty_buckets d"
        " WHERE d.model_id = h.model_id AND d.hour = h.hour)"
    )
    op.execute("UPDATE dirty_buckets SET recompute = true")


def downgrade() -> None:
    if op.get_bind().dialect.name == "sqlite":
        op.execute("ALTER TABLE rollups DROP COLUMN delays_by_class")  # SQLite 3.35+
    else:
        op.drop_column("rollups", "delays_by_class")
