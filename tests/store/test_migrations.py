"""Migrations on a fresh SQLite file and a fresh PostgreSQL database: up, down, up again, and
the tables the code defines are exactly what the migrations build."""

from __future__ import annotations

import importlib
import pkgutil
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from alembic.autogenerate import compare_metadata
from alembic.migration import MigrationContext
from sqlalchemy import MetaData, inspect

import belated
import belated.store.rollup_tables  # noqa: F401  (registers the rollup tables)
from belated.store import partitions
from belated.store.db import make_engine
from belated.store.migrate import downgrade, upgrade
from belated.store.tables import Base
from tests.conftest import STORES, create_pg_database, drop_pg_database, pg_url


def table_metadata() -> MetaData:
    """Base.metadata after importing every module of the package that defines tables."""
    for info in pkgutil.walk_packages(belated.__path__, "belated."):
        if info.name.rsplit(".", 1)[-1].endswith("tables"):
            importlib.import_module(info.name)
    return Base.metadata


@pytest.fixture(params=STORES)
def fresh_url(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str]:
    """An empty store of each kind, dropped afterwards."""
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'fresh.db'}"
        return
    name = create_pg_database("belated_mig")
    try:
        yield pg_url(name)
    finally:
        drop_pg_database(name)


def differences(url: str) -> list[Any]:
    """What autogenerate would change to make the store match the code's tables."""
    engine = make_engine(url)
    try:
        with engine.connect() as conn:
            hook = partitions.include_object(conn.dialect.name)
            context = MigrationContext.configure(
                conn, opts={"compare_type": True, "include_object": hook}
            )
            return list(compare_metadata(context, table_metadata()))
    finally:
        engine.dispose()


def tables(url: str) -> set[str]:
    """The tables present in the store, the predictions' day partitions left out."""
    engine = make_engine(url)
    try:
        return {t for t in inspect(engine).get_table_names() if not partitions.is_partition(t)}
    finally:
        engine.dispose()


def test_upgrade_downgrade_upgrade_matches_the_code(fresh_url: str) -> None:
    expected = set(table_metadata().tables)
    if fresh_url.startswith("sqlite"):  # the id registry serves the partitioned layout only
        expected.discard(partitions.REGISTRY)
    assert {"predictions", "labels", "pending_labels", "dirty_buckets", "rollups"} <= expected
    assert tables(fresh_url) == set()
    upgrade(fresh_url)
    assert tables(fresh_url) == expected | {"alembic_version"}
    assert differences(fresh_url) == []
    downgrade(fresh_url, "base")
    assert tables(fresh_url) <= {"alembic_version"}
    upgrade(fresh_url)
    assert tables(fresh_url) == expected | {"alembic_version"}
    assert differences(fresh_url) == []
    upgrade(fresh_url)  # a second upgrade at head changes nothing
    assert differences(fresh_url) == []
