"""The DuckDB engine of the lake job (one machine): `pip install 'belated[duckdb]'`."""

from __future__ import annotations

from typing import Any

from belated.lake.job import as_list, literal


class DuckEngine:
    """Parquet files (or an Arrow table) queried in an in-process DuckDB database."""

    def __init__(self, threads: int | None = None) -> None:
        import duckdb

        self.con = duckdb.connect(":memory:")
        self.con.execute("SET TimeZone = 'UTC'")
        if threads is not None:
            self.con.execute(f"SET threads = {int(threads)}")
        self._kept: dict[str, Any] = {}

    def register(self, name: str, source: Any) -> None:
        """Paths of Parquet files (a glob, one path or several), or an Arrow table."""
        if isinstance(source, str | list | tuple):
            files = ", ".join(literal(p) for p in as_list(source))
            self.con.execute(
                f"CREATE OR REPLACE VIEW {name} AS SELECT * FROM read_parquet([{files}])"
            )
        else:
            self._kept[name] = source
            self.con.register(f"{name}_source", source)
            self.con.execute(f"CREATE OR REPLACE VIEW {name} AS SELECT * FROM {name}_source")

    def columns(self, name: str) -> list[str]:
        """The column names of a registered relation."""
        return [str(r[0]) for r in self.con.execute(f"DESCRIBE {name}").fetchall()]

    def materialize(self, name: str, sql: str) -> None:
        """Keep a query's result as a temporary table."""
        self.con.execute(f"CREATE OR REPLACE TEMP TABLE {name} AS {sql}")

    def rows(self, sql: str) -> list[tuple[Any, ...]]:
        """Run a query."""
        return [tuple(r) for r in self.con.execute(sql).fetchall()]

    def epoch_us(self, expr: str) -> str:
        """Microseconds since the epoch."""
        return f"epoch_us({expr})"

    def ident(self, name: str) -> str:
        """A quoted identifier."""
        return '"' + name.replace('"', '""') + '"'

    def literal(self, value: str) -> str:
        """A string literal (DuckDB takes backslashes as they are)."""
        return literal(value)

    def portable(self, sql: str) -> str:
        """DuckDB reads the declared SQL as PostgreSQL spells it."""
        return sql

    def close(self) -> None:
        """Close the database."""
        self.con.close()
