"""models.reference: the settled period standing for "as trained"

Revision ID: 0009_model_reference
Revises: 0008_implied_measures
Create Date: 2026-12-02 15:00:00
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op
from sqlalchemy.dialects import postgresql

revision: str = "0009_model_reference"
down_revision: str | None = "0008_implied_measures"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None


# In place on SQLite too (ADD and DROP COLUMN, SQLite 3.35+): a batch copy of `models` would
# drop the old table, and its ON DELETE CASCADE would take every model's data with it.
def upgrade() -> None:
    op.add_column(
        "models",
        sa.Column(
            "reference",
            sa.JSON().with_variant(postgresql.JSONB(astext_type=sa.Text()), "postgresql"),
            nullable=True,
        ),
    )


def downgrade() -> None:
    if op.get_bind().dialect.name == "sqlite":
        op.execute("ALTER TABLE models DROP COLUMN reference")
    else:
        op.drop_column("models", "reference")
