"""The high-volume tables drop their foreign key to `models`

Every row inserted into predictions, prediction_ids, labels, pending_labels, dirty_buckets
and label_changes had PostgreSQL check the model row and lock it FOR KEY SHARE, after the
statement, one look-up per row: about 40% of PostgreSQL's CPU for a bulk batch of
predictions and a fifth for labels (docs/benchmarks.md), and a lock that every writer of a
model takes on the same row. A model's data is deleted table by table (store/purge.py),
which also sweeps rows that a write racing the deletion committed after it. SQLite: the
tables are rebuilt without the constraint (batch mode copies them).

Revision ID: 0021_data_without_fk
Revises: 0020_fillfactor
Create Date: 2026-12-03 21:20:00
"""

from collections.abc import Sequence

from alembic import op

revision: str = "0021_data_without_fk"
down_revision: str | None = "0020_fillfactor"
branch_labels: str | Sequence[str] | None = None
depends_on: str | Sequence[str] | None = None

_BOTH = ("predictions", "labels", "pending_labels", "dirty_buckets", "label_changes")
_POSTGRES_ONLY = ("prediction_ids",)  # the id registry of the day partitions


def _tables() -> tuple[str, ...]:
    postgres = op.get_bind().dialect.name == "postgresql"
    return _BOTH + (_POSTGRES_ONLY if postgres else ())


def _name(table: str) -> str:
    return f"fk_{table}_model_id_models"


def upgrade() -> None:
    for table in _tables():
        with op.batch_alter_table(table) as batch:
            batch.drop_constraint(_name(table), type_="foreignkey")


def downgrade() -> None:
    for table in _tables():
        # rows of deleted models that the sweep has not yet removed would refuse the key
        op.execute(f"DELETE FROM {table} WHERE model_id NOT IN (SELECT id FROM models)")
        with op.batch_alter_table(table) as batch:
            batch.create_foreign_key(
                _name(table), "models", ["model_id"], ["id"], ondelete="CASCADE"
            )
