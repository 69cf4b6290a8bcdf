"""A primary and a streaming hot standby, each a private cluster (tests/hostile/pgcluster.py).

The standby is a `pg_basebackup -R` copy of the primary (its standby.signal and
primary_conninfo written by the backup), started on a port of its own: it replays the
primary's WAL and refuses every write, as a production read replica does.
"""

from __future__ import annotations

import shutil

import psycopg

from tests.hostile.pgcluster import PrivateCluster, _as_postgres


class StandbyCluster(PrivateCluster):
    """A hot standby of `primary`, made by a base backup instead of initdb."""

    def __init__(self, primary: PrivateCluster) -> None:
        super().__init__()
        self.primary = primary

    def init(self) -> StandbyCluster:
        """Copy the primary with pg_basebackup -R (streaming WAL, recovery settings kept)."""
        done = _as_postgres(
            str(self.bin / "pg_basebackup"),
            "-h",
            "127.0.0.1",
            "-p",
            str(self.primary.port),
            "-U",
            "postgres",
            "-D",
            str(self.data),
            "-R",
            "-X",
            "stream",
            "--no-sync",
            "-c",
            "fast",
        )
        if done.returncode != 0:
            raise RuntimeError(f"pg_basebackup failed: {done.stderr.strip()}")
        return self

    def in_recovery(self) -> bool:
        """Whether the server replays as a standby."""
        with psycopg.connect(self.dsn(), connect_timeout=5) as conn:
            row = conn.execute("SELECT pg_is_in_recovery()").fetchone()
        return bool(row and row[0])


class Pair:
    """A primary and its standby, removed together."""

    def __init__(self) -> None:
        self.primary = PrivateCluster()
        self.standby: StandbyCluster | None = None

    def __enter__(self) -> Pair:
        try:
            self.primary.init()
            self.primary.start()
            self.standby = StandbyCluster(self.primary)
            self.standby.init()
            self.standby.start()
        except BaseException:
            self.remove()
            raise
        return self

    def remove(self) -> None:
        """Stop and delete both clusters (the standby first)."""
        try:
            if self.standby is not None:
                self.standby.remove()
        finally:
            self.primary.remove()
            shutil.rmtree(self.primary.root, ignore_errors=True)

    def __exit__(self, *exc: object) -> None:
        self.remove()
