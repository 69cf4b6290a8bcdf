"""rollups.cut renamed negative_cutoff (the implied-negative cutoff an hour was aggregated with)

Revision ID: 0005_negative_cutoff
Revises: 0004_alert_sequences
Create Date: 2026-12-02 13:00:00
"""

from collections.abc import Sequence

from alembic import op

revision: str = "0005_negative_cutoff"
down_revision: str | None = "0004_alert_sequences"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


# In place on both stores (SQLite 3.25+ renames columns): no copy of a large table.
def _rename(old: str, new: str) -> None:
    op.execute(f"ALTER TABLE rollups RENAME COLUMN {old} TO {new}")


def upgrade() -> None:
    _rename("cut", "negative_cutoff")


def downgrade() -> None:
    _rename("negative_cutoff", "cut")
