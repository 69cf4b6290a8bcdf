"""Alembic environment: the URL comes from settings (or the caller), SQLite gets batch mode."""

from __future__ import annotations

from alembic import context
from sqlalchemy import text

import belated.alerts.tables  # noqa: F401  (registers the alert tables)
import belated.store.rollup_tables  # noqa: F401  (registers the rollup tables)
from belated.config import get_settings
from belated.store.db import is_sqlite, make_engine
from belated.store.partitions import include_object
from belated.store.tables import Base

config = context.config
target_metadata = Base.metadata
# The advisory lock key that serialises concurrent `upgrade` runs on PostgreSQL.
MIGRATION_LOCK = 0x6265_6C61_7465_6400 & 0x7FFF_FFFF_FFFF_FFFF


def _url() -> str:
    return config.attributes.get("url") or get_settings().database_url


def run_offline() -> None:
    """Emit SQL without a connection."""
    url = _url()
    context.configure(
        url=url,
        target_metadata=target_metadata,
        literal_binds=True,
        compare_type=True,
        render_as_batch=is_sqlite(url),
        include_object=include_object("sqlite" if is_sqlite(url) else "postgresql"),
    )
    with context.begin_transaction():
        context.run_migrations()


def run_online() -> None:
    """Run against the store, holding an advisory lock on PostgreSQL."""
    url = _url()
    engine = make_engine(url)
    with engine.connect() as connection:
        if not is_sqlite(url):
            connection.execute(text("SELECT pg_advisory_lock(:k)"), {"k": MIGRATION_LOCK})
            connection.commit()
        try:
            context.configure(
                connection=connection,
                target_metadata=target_metadata,
                compare_type=True,
                render_as_batch=is_sqlite(url),
                include_object=include_object("sqlite" if is_sqlite(url) else "postgresql"),
            )
            with context.begin_transaction():
                context.run_migrations()
            connection.commit()
        finally:
            if not is_sqlite(url):
                connection.execute(text("SELECT pg_advisory_unlock(:k)"), {"k": MIGRATION_LOCK})
                connection.commit()
    engine.dispose()


if context.is_offline_mode():
    run_offline()
else:
    run_online()
