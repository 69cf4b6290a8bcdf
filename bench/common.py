"""Helpers shared by the benchmarks: a throwaway PostgreSQL database, the service as a
subprocess, process memory and CPU from /proc, and a markdown table."""

from __future__ import annotations

import os
import secrets
import signal
import socket
import subprocess
import tempfile
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import httpx
import psycopg

PG_ADMIN = os.environ.get("BELATED_BENCH_PG_ADMIN", "postgresql://postgres@127.0.0.1:5432/test")
ROOT = Path(__file__).resolve().parents[1]
BELATED = ROOT / ".venv" / "bin" / "belated"


def pg_url(dbname: str) -> str:
    """The libpq URL of a database on the benchmark server."""
    return f"{PG_ADMIN.rsplit('/', 1)[0]}/{dbname}"


def create_database(prefix: str) -> str:
    """Create a uniquely named database and return its name."""
    name = f"{prefix}_{os.getpid()}_{secrets.token_hex(4)}"
    with psycopg.connect(PG_ADMIN, autocommit=True) as conn:
        conn.execute(f'CREATE DATABASE "{name}"')
    return name


def drop_database(name: str) -> None:
    """Drop a benchmark database, disconnecting whoever is left."""
    with psycopg.connect(PG_ADMIN, autocommit=True) as conn:
        conn.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


def free_port() -> int:
    """A TCP port on loopback that nobody listens on right now."""
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


class Service:
    """`belated serve --no-jobs` in a subprocess, on loopback, against `database_url`."""

    def __init__(
        self, database_url: str, extra_env: dict[str, str] | None = None, workers: int = 1
    ) -> None:
        self.port = free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        # A directory of its own, so no stray .env or SQLite file is picked up or left behind.
        self.workdir = Path(tempfile.mkdtemp(prefix="belated_bench_"))
        self.log_path = self.workdir / "service.log"
        env = {
            **os.environ,
            "BELATED_DATABASE_URL": database_url,
            "BELATED_JOBS": "false",
            **(extra_env or {}),
        }
        self._log = self.log_path.open("wb")
        self.proc = subprocess.Popen(
            [str(BELATED), "serve", "--host", "127.0.0.1", "--port", str(self.port), "--no-jobs"]
            # `serve` reads its process count from the command line only
            + (["--workers", str(workers)] if workers > 1 else []),
            cwd=self.workdir,
            env=env,
            stdout=self._log,
            stderr=subprocess.STDOUT,
        )

    @property
    def pid(self) -> int:
        """The service's process id."""
        return self.proc.pid

    def wait_ready(self, timeout: float = 60.0) -> None:
        """Poll /healthz until the service answers 200."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError(
                    f"the service exited early; see {self.log_path}:\n"
                    + self.log_path.read_text()[-4000:]
                )
            try:
                if httpx.get(self.url + "/healthz", timeout=2.0).status_code == 200:
                    return
            except httpx.HTTPError:
                pass
            time.sleep(0.2)
        raise RuntimeError(f"the service did not become ready in {timeout} s; see {self.log_path}")

    def stop(self) -> None:
        """Stop the service (SIGTERM, then SIGKILL after 10 s)."""
        if self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(10)
        self._log.close()

    def log_tail(self, chars: int = 4000) -> str:
        """The end of the service's output."""
        return self.log_path.read_text(errors="replace")[-chars:]


def code_version() -> str:
    """The commit of the working tree, with a mark when files under service/ differ from it."""

    def git(*args: str) -> str:
        return subprocess.run(
            ["git", "-C", str(ROOT), *args], capture_output=True, text=True, check=False
        ).stdout.strip()

    head = git("rev-parse", "--short", "HEAD") or "unknown"
    dirty = git("status", "--porcelain", "--", "service")
    return head + (" with uncommitted changes under service/" if dirty else "")


def peak_rss_mib(pid: int) -> float:
    """Peak resident set size (VmHWM) of a process, in MiB."""
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):
            return int(line.split()[1]) / 1024.0
    raise RuntimeError(f"no VmHWM for pid {pid}")


def cpu_seconds(pid: int) -> float:
    """User plus system CPU time a process has used so far (all its threads)."""
    fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    # fields[11] and [12] are utime and stime (fields 14 and 15 of proc(5)).
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def process_tree(pid: int) -> list[int]:
    """A process and its descendants (the API processes of `serve --workers N`)."""
    parent: dict[int, int] = {}
    for stat in Path("/proc").glob("[0-9]*/stat"):
        try:
            fields = stat.read_text().rsplit(")", 1)[1].split()
        except OSError:  # gone meanwhile
            continue
        parent[int(stat.parent.name)] = int(fields[1])
    tree, frontier = [pid], [pid]
    while frontier:
        frontier = [c for c, p in parent.items() if p in frontier]
        tree += frontier
    return tree


def tree_cpu_seconds(pid: int) -> float:
    """`cpu_seconds` summed over a process and its live descendants."""
    total = 0.0
    for p in process_tree(pid):
        try:
            total += cpu_seconds(p)
        except OSError:
            pass
    return total


def tree_peak_rss_mib(pid: int) -> float:
    """Peak RSS (VmHWM) summed over a process and its live descendants, in MiB: an upper
    bound (the peaks need not coincide, and shared pages count once per process)."""
    total = 0.0
    for p in process_tree(pid):
        try:
            total += peak_rss_mib(p)
        except (OSError, RuntimeError):  # gone meanwhile
            pass
    return total


def backend_pids(dbname: str) -> list[int]:
    """PostgreSQL server processes connected to `dbname` (readable when the server is local)."""
    with psycopg.connect(PG_ADMIN, autocommit=True) as conn:
        rows = conn.execute(
            "SELECT pid FROM pg_stat_activity WHERE datname = %s", (dbname,)
        ).fetchall()
    return [int(r[0]) for r in rows]


def percentile(values: Sequence[float], q: float) -> float:
    """The q-quantile (0..1) by linear interpolation; NaN for no values."""
    if not values:
        return float("nan")
    xs = sorted(values)
    pos = q * (len(xs) - 1)
    lo = int(pos)
    hi = min(lo + 1, len(xs) - 1)
    return xs[lo] + (xs[hi] - xs[lo]) * (pos - lo)


def markdown_table(headers: Sequence[str], rows: Sequence[Sequence[Any]]) -> str:
    """A GitHub-flavoured markdown table, numbers right-aligned."""
    cells = [[str(h) for h in headers]] + [[str(c) for c in row] for row in rows]
    widths = [max(len(r[i]) for r in cells) for i in range(len(headers))]
    numeric = [all(_is_number(r[i]) for r in cells[1:]) for i in range(len(headers))]

    def fmt(row: list[str]) -> str:
        parts = [
            c.rjust(w) if num else c.ljust(w)
            for c, w, num in zip(row, widths, numeric, strict=True)
        ]
        return "| " + " | ".join(parts) + " |"

    rule = (
        "| "
        + " | ".join(
            ("-" * (w - 1) + ":") if num else "-" * w
            for w, num in zip(widths, numeric, strict=True)
        )
        + " |"
    )
    return "\n".join([fmt(cells[0]), rule, *(fmt(r) for r in cells[1:])])


def _is_number(text: str) -> bool:
    if text == "-":  # an empty numeric cell
        return True
    try:
        float(text.replace(",", "").rstrip("%x"))
    except ValueError:
        return False
    return True


def setup_store(db_url: str) -> tuple[str, int]:
    """Migrate, create a project and an all-scope token; return the token and project id."""
    from belated.store import keys
    from belated.store.db import make_engine, make_sessionmaker, transaction
    from belated.store.migrate import upgrade

    sa_url = db_url.replace("postgresql://", "postgresql+psycopg://", 1)
    upgrade(sa_url)
    engine = make_engine(sa_url)
    with transaction(make_sessionmaker(engine)) as session:
        project = keys.get_or_create_project(session=session, name="furniture-shop")
        _, token = keys.create(
            session=session, project_id=project.id, scopes=["admin", "ingest", "read"], name="bench"
        )
        project_id = project.id
    engine.dispose()
    return token, project_id


def start_profiler(pid: int, out: Path) -> subprocess.Popen[bytes]:
    """py-spy sampling the service (all threads, idle ones too) into collapsed stacks."""
    spy = ROOT / ".venv" / "bin" / "py-spy"
    proc = subprocess.Popen(
        [
            str(spy),
            "record",
            "--pid",
            str(pid),
            "--format",
            "raw",
            "--idle",
            "--threads",
            "--rate",
            "200",
            "--nonblocking",
            "-o",
            str(out),
        ],
        stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL,
    )
    time.sleep(1.5)  # let it attach before the clock starts
    return proc


def stop_profiler(proc: subprocess.Popen[bytes]) -> None:
    """Stop py-spy; it writes its file on SIGINT."""
    proc.send_signal(signal.SIGINT)
    proc.wait(60)
