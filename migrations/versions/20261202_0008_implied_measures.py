"""rules on label-free measures: estimated_* renamed implied.*

Revision ID: 0008_implied_measures
Revises: 0007_alert_lifecycle
Create Date: 2026-12-02 14:30:00
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0008_implied_measures"
down_revision: str | None = "0007_alert_lifecycle"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

_NAMES = ("precision", "recall", "fbeta")


def _rename(old: str, new: str) -> None:
    for name in _NAMES:
        op.execute(
            sa.text("UPDATE rules SET measure = :new WHERE measure = :old").bindparams(
                old=old + name, new=new + name
            )
        )


def upgrade() -> None:
    _rename("estimated_", "implied.")


def downgrade() -> None:
    _rename("implied.", "estimated_")
