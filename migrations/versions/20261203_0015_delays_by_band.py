"""label-delay histograms per actual class and score band in the rollups

Revision ID: 0015_delays_by_band
Revises: 0014_decided_again
Create Date: 2026-12-03 01:20:00

The new statistic (`delays_by_band`, declared in belated/store/statistics.py) feeds the
arrival curves per score band. Rows written before this revision lack it, so every hour
that has predictions is marked for a recompute from raw rows, as 0006 did (the refresh job
fills the column; `belated rebuild` does it at once).
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0015_delays_by_band"
down_revision: str | None = "0014_decided_again"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


def upgrade() -> None:
    # in place on both stores: no copy of a large table
    op.add_column("rollups", sa.Column("delays_by_band", sa.LargeBinary(), nullable=True))
    # marks are insert-only since 0010: one recompute mark per hour that has predictions
    op.execute(
        "INSERT INTO dirty_buckets (model_id, hour, marked_at, recompute)"
        " SELECT DISTINCT model_id, hour, CURRENT_TIMESTAMP, true FROM predictions"
    )


def downgrade() -> None:
    if op.get_bind().dialect.name == "sqlite":
        op.execute("ALTER TABLE rollups DROP COLUMN delays_by_band")  # SQLite 3.35+
    else:
        op.drop_column("rollups", "delays_by_band")
