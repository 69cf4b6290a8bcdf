"""Stores for tests: the PostgreSQL test server's databases, and fresh migrated stores.

Every PostgreSQL database a test creates is uniquely named and dropped afterwards.
"""

from __future__ import annotations

import os
import secrets
import shutil
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import psycopg

from belated.store.migrate import upgrade

PG_ADMIN = os.environ.get("BELATED_TEST_PG_ADMIN", "postgresql://postgres@127.0.0.1:5432/test")
STORES = [s.strip() for s in os.environ.get("BELATED_TEST_STORES", "sqlite,postgresql").split(",")]


def pg_url(dbname: str) -> str:
    """The SQLAlchemy URL of a database on the test server."""
    base = PG_ADMIN.rsplit("/", 1)[0].replace("postgresql://", "postgresql+psycopg://", 1)
    return f"{base}/{dbname}"


def create_pg_database(prefix: str = "belated_t") -> str:
    """Create a uniquely named database and return its name."""
    name = f"{prefix}_{os.getpid()}_{secrets.token_hex(4)}"
    with psycopg.connect(PG_ADMIN, autocommit=True) as conn:
        conn.execute(f'CREATE DATABASE "{name}"')
    return name


def drop_pg_database(name: str) -> None:
    """Drop a test database, disconnecting whoever is left."""
    with psycopg.connect(PG_ADMIN, autocommit=True) as conn:
        conn.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


@contextmanager
def fresh_store(kind_of: str, prefix: str = "belated_h") -> Iterator[str]:
    """A new migrated store of the same kind as the URL (or the name) `kind_of`, removed
    afterwards: a SQLite file in a temporary directory, or a uniquely named database on the
    test server."""
    if kind_of.startswith("sqlite"):
        root = Path(tempfile.mkdtemp(prefix="belated-store-"))
        url = f"sqlite:///{root / 'belated.db'}"
        try:
            upgrade(url)
            yield url
        finally:
            shutil.rmtree(root, ignore_errors=True)
        return
    name = create_pg_database(prefix)
    try:
        upgrade(pg_url(name))
        yield pg_url(name)
    finally:
        drop_pg_database(name)
