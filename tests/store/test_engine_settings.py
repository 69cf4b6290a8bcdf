"""The settings belated's PostgreSQL connections run with, checked against the server's
defaults on a connection of the database's own client (psycopg, no options)."""

from __future__ import annotations

from collections.abc import Iterator

import psycopg
import pytest
from sqlalchemy import text

from belated.store.db import make_engine
from tests.conftest import create_pg_database, drop_pg_database, pg_url

# 100 million rows as estimated: costed far above jit_above_cost (100,000) and
# jit_optimize_above_cost (500,000), PostgreSQL's defaults (common practice to know them)
COSTLY = "EXPLAIN SELECT count(*) FROM generate_series(1, 100000000) AS g(i) WHERE i % 7 = 0"


@pytest.fixture()
def database() -> Iterator[str]:
    """An empty PostgreSQL database of its own (its SQLAlchemy URL), dropped afterwards."""
    name = create_pg_database("belated_settings")
    try:
        yield pg_url(name)
    finally:
        drop_pg_database(name)


def test_no_jit_compilation_on_the_services_connections(database: str) -> None:
    plain_url = database.replace("postgresql+psycopg://", "postgresql://", 1)
    with psycopg.connect(plain_url) as plain:  # the server's defaults: it would compile
        plan = "\n".join(r[0] for r in plain.execute(COSTLY).fetchall())
        assert "JIT:" in plan, plan
    engine = make_engine(database)
    try:
        with engine.connect() as conn:  # belated's: never (a label batch spent 18.6 of 19.3 s)
            assert conn.execute(text("SHOW jit")).scalar_one() == "off"
            plan = "\n".join(r[0] for r in conn.execute(text(COSTLY)))
            assert "JIT:" not in plan, plan
    finally:
        engine.dispose()
