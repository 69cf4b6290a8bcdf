"""alert states raised, noted, cleared; notes; frozen baselines; retired rules; traffic rules

Alerts were `open`, `acknowledged` and `resolved`; they become `raised`, `noted` and
`cleared`, with their times renamed alike (`raised_at`, `noted_at`, `cleared_at`). An alert
now keeps the first breached window (`started_at`, filled here from its breaches) and the
baseline it was raised against (filled by the next evaluation for an active alert that has
none). Notes get a table of their own. A deleted rule is retired (`retired_at`) instead of
removed with its alerts. Evaluated windows say whether the measure was back within tolerance
(`recovered`). Rules of kind `volume` become `traffic`.

Revision ID: 0007_alert_lifecycle
Revises: 0006_delays_by_class
Create Date: 2026-12-02 13:05:00
"""

from collections.abc import Sequence

import sqlalchemy as sa
from alembic import op
from sqlalchemy.dialects import postgresql

revision: str = "0007_alert_lifecycle"
down_revision: str | None = "0006_delays_by_class"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

STATES = (("open", "raised"), ("acknowledged", "noted"), ("resolved", "cleared"))
TIMES = (("opened_at", "raised_at"), ("acknowledged_at", "noted_at"), ("resolved_at", "cleared_at"))
EVENTS = (("alert.opened", "alert.raised"), ("alert.resolved", "alert.cleared"))
JSON = sa.JSON().with_variant(postgresql.JSONB(astext_type=sa.Text()), "postgresql")


def _rename_values(pairs: tuple[tuple[str, str], ...], table: str, column: str) -> None:
    for old, new in pairs:
        op.execute(
            sa.text(f"UPDATE {table} SET {column} = :new WHERE {column} = :old").bindparams(
                old=old, new=new
            )
        )


def _rename_column(table: str, old: str, new: str) -> None:
    # SQLite renames in place (3.25+): a batch copy of a parent table would fire the
    # ON DELETE CASCADE of its children when the old table is dropped
    op.execute(f"ALTER TABLE {table} RENAME COLUMN {old} TO {new}")


def _drop_column(table: str, column: str) -> None:
    if op.get_bind().dialect.name == "sqlite":
        op.execute(f"ALTER TABLE {table} DROP COLUMN {column}")  # in place, SQLite 3.35+
    else:
        op.drop_column(table, column)


def upgrade() -> None:
    op.create_table(
        "alert_notes",
        sa.Column(
            "id",
            sa.BigInteger().with_variant(sa.Integer(), "sqlite"),
            autoincrement=True,
            nullable=False,
        ),
        sa.Column("alert_id", sa.String(length=32), nullable=False),
        sa.Column("text", sa.Text(), nullable=False),
        sa.Column("author", sa.String(length=160), nullable=False),
        sa.Column("created_at", sa.DateTime(timezone=True), nullable=False),
        sa.ForeignKeyConstraint(
            ["alert_id"],
            ["alerts.id"],
            name=op.f("fk_alert_notes_alert_id_alerts"),
            ondelete="CASCADE",
        ),
        sa.PrimaryKeyConstraint("id", name=op.f("pk_alert_notes")),
    )
    with op.batch_alter_table("alert_notes", schema=None) as batch_op:
        batch_op.create_index(batch_op.f("ix_alert_notes_alert_id"), ["alert_id"], unique=False)

    for old, new in TIMES:
        _rename_column("alerts", old, new)
    op.add_column("alerts", sa.Column("started_at", sa.DateTime(timezone=True), nullable=True))
    op.add_column("alerts", sa.Column("baseline", JSON, nullable=True))
    _rename_values(STATES, "alerts", "state")
    op.execute(
        "UPDATE alerts SET started_at = (SELECT min(w.window_start) FROM rule_windows w"
        " WHERE w.alert_id = alerts.id AND w.breached)"
    )
    _rename_values(EVENTS, "deliveries", "event_type")

    op.add_column("rule_windows", sa.Column("recovered", sa.Boolean(), nullable=True))
    op.add_column("rules", sa.Column("retired_at", sa.DateTime(timezone=True), nullable=True))
    _rename_values((("volume", "traffic"),), "rules", "kind")


def downgrade() -> None:
    # notes are dropped; noted alerts go back to acknowledged at the time of their first note
    _rename_values((("traffic", "volume"),), "rules", "kind")
    # retired rules had no place before this revision: they go, with their alerts
    op.execute(
        "DELETE FROM rule_windows WHERE rule_id IN (SELECT id FROM rules"
        " WHERE retired_at IS NOT NULL)"
    )
    op.execute(
        "DELETE FROM alert_notes WHERE alert_id IN (SELECT a.id FROM alerts a JOIN rules r"
        " ON r.id = a.rule_id WHERE r.retired_at IS NOT NULL)"
    )
    op.execute(
        "DELETE FROM alerts WHERE rule_id IN (SELECT id FROM rules WHERE retired_at IS NOT NULL)"
    )
    op.execute("DELETE FROM rules WHERE retired_at IS NOT NULL")
    _drop_column("rules", "retired_at")
    _drop_column("rule_windows", "recovered")

    _rename_values(tuple((new, old) for old, new in EVENTS), "deliveries", "event_type")
    op.execute("DELETE FROM deliveries WHERE event_type = 'alert.noted'")
    _rename_values(tuple((new, old) for old, new in STATES), "alerts", "state")
    _drop_column("alerts", "baseline")
    _drop_column("alerts", "started_at")
    for old, new in TIMES:
        _rename_column("alerts", new, old)

    with op.batch_alter_table("alert_notes", schema=None) as batch_op:
        batch_op.drop_index(batch_op.f("ix_alert_notes_alert_id"))
    op.drop_table("alert_notes")
