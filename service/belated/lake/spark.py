"""The Spark engine of the lake job (any cluster; `local[*]` on one machine):
`pip install 'belated[spark]'`, with Java 17 (Debian: openjdk-17-jre-headless)."""

from __future__ import annotations

from typing import Any

from belated.lake.job import as_list


class SparkEngine:
    """Parquet paths or DataFrames queried with Spark SQL.

    Without a session of its own, the engine takes the active one or starts a local one
    (`local[*]`, UTC session time zone); it never stops a session, which is costly to start
    again and may be the caller's.
    """

    def __init__(self, session: Any = None, master: str = "local[*]") -> None:
        if session is None:
            from pyspark.sql import SparkSession

            session = (
                SparkSession.builder.master(master)
                .appName("belated-lake")
                .config("spark.sql.session.timeZone", "UTC")
                .config("spark.ui.enabled", "false")
                .config("spark.sql.shuffle.partitions", "4")
                .config("spark.ui.showConsoleProgress", "false")
                .getOrCreate()
            )
        self.spark = session
        self._views: list[str] = []
        self._cached: list[Any] = []

    def register(self, name: str, source: Any) -> None:
        """Parquet paths (one, several or a glob), or a DataFrame."""
        if isinstance(source, str | list | tuple):
            frame = self.spark.read.parquet(*as_list(source))
        else:
            frame = source
        frame.createOrReplaceTempView(name)
        self._views.append(name)

    def columns(self, name: str) -> list[str]:
        """The column names of a registered relation."""
        return [str(c) for c in self.spark.table(name).columns]

    def materialize(self, name: str, sql: str) -> None:
        """Keep a query's result cached as a view."""
        frame = self.spark.sql(sql).cache()
        frame.count()
        frame.createOrReplaceTempView(name)
        self._views.append(name)
        self._cached.append(frame)

    def rows(self, sql: str) -> list[tuple[Any, ...]]:
        """Run a query and collect its rows."""
        return [tuple(r) for r in self.spark.sql(sql).collect()]

    def epoch_us(self, expr: str) -> str:
        """Microseconds since the epoch."""
        return f"unix_micros({expr})"

    def ident(self, name: str) -> str:
        """A quoted identifier."""
        return "`" + name.replace("`", "``") + "`"

    def literal(self, value: str) -> str:
        """A string literal (Spark reads backslash escapes inside)."""
        return "'" + value.replace("\\", "\\\\").replace("'", "\\'") + "'"

    def portable(self, sql: str) -> str:
        """The declared SQL in Spark's spelling of two type names."""
        return sql.replace("DOUBLE PRECISION", "DOUBLE").replace("VARCHAR(256)", "STRING")

    def close(self) -> None:
        """Drop the views and cached results (the session stays)."""
        for frame in self._cached:
            frame.unpersist()
        for name in self._views:
            self.spark.catalog.dropTempView(name)
        self._views, self._cached = [], []
