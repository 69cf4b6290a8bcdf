"""Apply Alembic migrations from code (`belated migrate`, `belated serve` on SQLite, tests)."""

from __future__ import annotations

from pathlib import Path

from alembic import command
from alembic.config import Config

ROOT = Path(__file__).resolve().parents[3]


def alembic_config(url: str) -> Config:
    """An Alembic config bound to `url`, independent of the working directory."""
    cfg = Config(str(ROOT / "alembic.ini"))
    cfg.set_main_option("script_location", str(ROOT / "migrations"))
    cfg.attributes["url"] = url
    return cfg


def upgrade(url: str, revision: str = "head") -> None:
    """Bring the store at `url` up to `revision`."""
    command.upgrade(alembic_config(url), revision)


def downgrade(url: str, revision: str = "base") -> None:
    """Take the store at `url` down to `revision`."""
    command.downgrade(alembic_config(url), revision)
