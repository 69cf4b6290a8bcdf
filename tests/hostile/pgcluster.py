"""Helpers for tests that run the service as a real process on a store of their own.

`PrivateCluster`: the shared server on 127.0.0.1:5432 serves other engineers' tests and is
never stopped; tests that must stop and start the store run a cluster of their own, in a
temporary directory owned by the `postgres` OS user, on a free loopback port, and remove it
afterwards. It needs root (to run as `postgres`) and PostgreSQL's server binaries.

`ServiceProcess`: `belated serve` as a subprocess on a free loopback port, its log in a file.
"""

from __future__ import annotations

import glob
import os
import secrets
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import httpx
import psycopg

from tests.conftest import free_port


def bin_dir() -> Path:
    """The newest installed PostgreSQL server binaries."""
    found = sorted(
        glob.glob("/usr/lib/postgresql/*/bin/pg_ctl"), key=lambda p: int(Path(p).parent.parent.name)
    )
    if not found:
        raise RuntimeError("no PostgreSQL server binaries under /usr/lib/postgresql")
    return Path(found[-1]).parent


def _as_postgres(*argv: str) -> subprocess.CompletedProcess[str]:
    """Run a server binary as the `postgres` OS user (initdb and postgres refuse root)."""
    return subprocess.run(
        ["runuser", "-u", "postgres", "--", *argv],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )


class PrivateCluster:
    """initdb, start, stop and remove a throw-away cluster on a free loopback port."""

    def __init__(self) -> None:
        self.port = free_port()
        # not under pytest's tmp_path: the postgres user must be able to reach the directory
        self.root = Path(tempfile.mkdtemp(prefix="belated-pgcluster-"))
        self.data = self.root / "data"
        self.log = self.root / "server.log"
        self.bin = bin_dir()
        shutil.chown(self.root, user="postgres", group="postgres")
        os.chmod(self.root, 0o755)

    def url(self, dbname: str = "postgres") -> str:
        """A SQLAlchemy URL of a database on this cluster."""
        return f"postgresql+psycopg://postgres@127.0.0.1:{self.port}/{dbname}"

    def dsn(self, dbname: str = "postgres") -> str:
        """A libpq connection string of a database on this cluster."""
        return f"postgresql://postgres@127.0.0.1:{self.port}/{dbname}"

    def init(self) -> PrivateCluster:
        """Create the cluster (no fsync: it is thrown away after the test)."""
        done = _as_postgres(
            str(self.bin / "initdb"),
            "-D",
            str(self.data),
            "-A",
            "trust",
            "-U",
            "postgres",
            "-E",
            "UTF8",
            "--no-sync",
        )
        if done.returncode != 0:
            raise RuntimeError(f"initdb failed: {done.stderr.strip()}")
        return self

    def start(self, timeout: float = 30.0) -> None:
        """Start the server on 127.0.0.1:port and wait until it accepts connections."""
        opts = (
            f"-p {self.port} -k {self.root} -c listen_addresses=127.0.0.1 "
            "-c fsync=off -c max_connections=60"
        )
        done = _as_postgres(
            str(self.bin / "pg_ctl"),
            "-D",
            str(self.data),
            "-o",
            opts,
            "-l",
            str(self.log),
            "-w",
            "-t",
            str(int(timeout)),
            "start",
        )
        if done.returncode != 0:
            raise RuntimeError(f"pg_ctl start failed: {done.stderr.strip()} {self.tail()}")
        self.wait_ready(timeout)

    def stop(self, mode: str = "fast") -> None:
        """Stop the server (fast: disconnect clients and shut down cleanly)."""
        done = _as_postgres(
            str(self.bin / "pg_ctl"), "-D", str(self.data), "-m", mode, "-w", "stop"
        )
        if done.returncode != 0 and "server running" not in done.stderr:
            raise RuntimeError(f"pg_ctl stop failed: {done.stderr.strip()}")

    def running(self) -> bool:
        """Whether the server process of this cluster is up."""
        done = _as_postgres(str(self.bin / "pg_ctl"), "-D", str(self.data), "status")
        return done.returncode == 0

    def wait_ready(self, timeout: float = 30.0) -> None:
        """Wait until a connection succeeds."""
        deadline = time.monotonic() + timeout
        while True:
            try:
                with psycopg.connect(self.dsn(), connect_timeout=2):
                    return
            except psycopg.OperationalError:
                if time.monotonic() > deadline:
                    raise
                time.sleep(0.1)

    def create_database(self, name: str) -> str:
        """Create a database and return its SQLAlchemy URL."""
        with psycopg.connect(self.dsn(), autocommit=True) as conn:
            conn.execute(f'CREATE DATABASE "{name}"')
        return self.url(name)

    def tail(self, n: int = 20) -> str:
        """The last lines of the server log, for failure messages."""
        try:
            return "\n".join(self.log.read_text().splitlines()[-n:])
        except OSError:
            return ""

    def remove(self) -> None:
        """Stop the server if it runs and delete the cluster's directory."""
        try:
            if self.data.exists():
                self.stop(mode="immediate")
        finally:
            shutil.rmtree(self.root, ignore_errors=True)

    def __enter__(self) -> PrivateCluster:
        try:
            self.init()
            self.start()
        except BaseException:
            self.remove()
            raise
        return self

    def __exit__(self, *exc: object) -> None:
        self.remove()


class ServiceProcess:
    """`python -m belated serve` on a free loopback port, stdout and stderr to a log file."""

    def __init__(
        self,
        database_url: str,
        log: Path,
        *,
        env: dict[str, str] | None = None,
        port: int | None = None,
        set_port_setting: bool = True,
        args: tuple[str, ...] = (),
    ) -> None:
        self.port = port or free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        self.log = log
        self.env = {
            **os.environ,
            "BELATED_DATABASE_URL": database_url,
            "BELATED_HOST": "127.0.0.1",
            "BELATED_REFRESH_SECONDS": "1",
            "PYTHONUNBUFFERED": "1",
            **(env or {}),
        }
        for key in ("BELATED_PORT", "BELATED_WEBHOOK_PRIVATE"):
            if key not in (env or {}):
                self.env.pop(key, None)
        if set_port_setting:
            self.env["BELATED_PORT"] = str(self.port)
        self.args = args  # more options of `serve` (for example --read-only)
        self.proc: subprocess.Popen[bytes] | None = None
        self._cwd = tempfile.mkdtemp(prefix="belated-cwd-")  # no stray .env is read

    def start(self, timeout: float = 60.0) -> ServiceProcess:
        """Start the process and wait until /healthz answers."""
        with open(self.log, "ab") as out:
            self.proc = subprocess.Popen(
                [sys.executable, "-m", "belated", "serve", "--port", str(self.port), *self.args],
                stdout=out,
                stderr=subprocess.STDOUT,
                env=self.env,
                cwd=self._cwd,
            )
        deadline = time.monotonic() + timeout
        while True:
            if self.proc.poll() is not None:
                raise RuntimeError(f"the service exited: {self.log.read_text()[-2000:]}")
            try:
                httpx.get(self.url + "/healthz", timeout=2)
                return self
            except httpx.HTTPError:
                if time.monotonic() > deadline:
                    raise RuntimeError("the service did not start") from None
                time.sleep(0.1)

    def alive(self) -> bool:
        """Whether the process still runs."""
        return self.proc is not None and self.proc.poll() is None

    def stop(self, sig: int = signal.SIGTERM, timeout: float = 30.0) -> int | None:
        """Send a signal (SIGTERM: a clean stop; SIGKILL: a crash) and wait for the exit."""
        try:
            if self.proc is None or self.proc.poll() is not None:
                return None if self.proc is None else self.proc.returncode
            self.proc.send_signal(sig)
            try:
                return self.proc.wait(timeout=timeout)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                return self.proc.wait(timeout=timeout)
        finally:
            shutil.rmtree(self._cwd, ignore_errors=True)

    def __enter__(self) -> ServiceProcess:
        try:
            return self.start()
        except BaseException:
            self.stop(signal.SIGKILL)
            raise

    def __exit__(self, *exc: object) -> None:
        self.stop()


def random_name(prefix: str) -> str:
    """A name no other test uses."""
    return f"{prefix}-{secrets.token_hex(4)}"
