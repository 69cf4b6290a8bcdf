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
