"""Apply Alembic migrations from code (`belated migrate`, `belated serve` on SQLite, tests)."""

from __future__ import annotations

import os
from pathlib import Path

from alembic import command
from alembic.config import Config

ROOT = Path(__file__).resolve().parents[3]


def migrations_dir() -> Path:
    """The migrations folder: BELATED_MIGRATIONS_DIR, the source tree's, or ./migrations."""
    candidates = [
        os.environ.get("BELATED_MIGRATIONS_DIR"),
        ROOT / "migrations",
        Path.cwd() / "migrations",
    ]
    for candidate in candidates:
        if candidate and (Path(candidate) / "env.py").is_file():
            return Path(candidate)
    raise FileNotFoundError(
        "cannot find the migrations folder; run from the source tree or set BELATED_MIGRATIONS_DIR"
    )


def alembic_config(url: str) -> Config:
    """An Alembic config bound to `url`, independent of the working directory."""
    cfg = Config()
    cfg.set_main_option("script_location", str(migrations_dir()))
    cfg.set_main_option("path_separator", "os")
    cfg.attributes["url"] = url
    return cfg


def upgrade(url: str, revision: str = "head") -> None:
    """Bring the store at `url` up to `revision`."""
    command.upgrade(alembic_config(url), revision)


def downgrade(url: str, revision: str = "base") -> None:
    """Take the store at `url` down to `revision`."""
    command.downgrade(alembic_config(url), revision)


def not_current(url: str) -> str | None:
    """Why the store at `url` cannot be served read-only (unreachable, or not migrated to
    this version's head), or None when it can; opens it read-only and writes nothing."""
    from alembic.runtime.migration import MigrationContext
    from alembic.script import ScriptDirectory
    from sqlalchemy.exc import SQLAlchemyError

    from belated.store.db import make_engine

    heads = set(ScriptDirectory.from_config(alembic_config(url)).get_heads())
    try:
        engine = make_engine(url, read_only=True)
    except ValueError as exc:
        return str(exc)
    try:
        with engine.connect() as conn:
            current = set(MigrationContext.configure(conn).get_current_heads())
    except SQLAlchemyError as exc:
        return f"the store does not answer ({type(exc).__name__}: {str(exc).splitlines()[0]})"
    finally:
        engine.dispose()
    if current != heads:
        at = ", ".join(sorted(current)) or "no migration"
        return (
            f"the store is at {at}, this version needs {', '.join(sorted(heads))}: run"
            " `belated migrate` against the primary (a replica is never migrated itself)"
        )
    return None
