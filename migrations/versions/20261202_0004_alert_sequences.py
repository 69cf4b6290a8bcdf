"""alert numbers from a per-project sequence, unique in their project

Alert numbers were count(*) + 1 over every project: two alerts could share one after a rule
was deleted, and paging by number then skipped alerts. The existing alerts of each project
are numbered 1..n in their old order, the sequence of each project starts past its last
number, and (project_id, seq) becomes unique.

Revision ID: 0004_alert_sequences
Revises: 0003_label_changes
Create Date: 2026-12-02 12:31:55
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op

revision: str = "0004_alert_sequences"
down_revision: str | None = "0003_label_changes"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

ALERTS = sa.table(
    "alerts",
    sa.column("id", sa.String()),
    sa.column("seq", sa.Integer()),
    sa.column("project_id", sa.Integer()),
    sa.column("opened_at", sa.DateTime(timezone=True)),
)


def _renumber() -> None:
    """Number each project's alerts 1..n, keeping their order (old number, then opening)."""
    conn = op.get_bind()
    rows = conn.execute(
        sa.select(ALERTS.c.id, ALERTS.c.project_id).order_by(
            ALERTS.c.project_id, ALERTS.c.seq, ALERTS.c.opened_at, ALERTS.c.id
        )
    ).all()
    last: dict[int, int] = {}
    updates = []
    for alert_id, project_id in rows:
        last[project_id] = last.get(project_id, 0) + 1
        updates.append({"alert_id": alert_id, "number": last[project_id]})
    if updates:
        conn.execute(
            ALERTS.update()
            .where(ALERTS.c.id == sa.bindparam("alert_id"))
            .values(seq=sa.bindparam("number")),
            updates,
        )
    op.execute(
        "INSERT INTO alert_sequences (project_id, last_seq) "
        "SELECT project_id, max(seq) FROM alerts GROUP BY project_id"
    )


def upgrade() -> None:
    op.create_table(
        "alert_sequences",
        sa.Column("project_id", sa.Integer(), nullable=False),
        sa.Column("last_seq", sa.Integer(), nullable=False),
        sa.ForeignKeyConstraint(
            ["project_id"],
            ["projects.id"],
            name=op.f("fk_alert_sequences_project_id_projects"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("project_id", name=op.f("pk_alert_sequences")),
    )
    _renumber()
    with op.batch_alter_table("alerts", schema=None) as batch_op:
        batch_op.create_unique_constraint("uq_alerts_project_seq", ["project_id", "seq"])


def downgrade() -> None:
    # the numbers given since stay as they are: unique, which the old code did not need
    with op.batch_alter_table("alerts", schema=None) as batch_op:
        batch_op.drop_constraint("uq_alerts_project_seq", type_="unique")
    op.drop_table("alert_sequences")
