"""Eight writer processes against one real service process, on PostgreSQL and on SQLite.

Each writer (its own process and HTTP client) posts batches of predictions and labels:
labels before their predictions, labels racing them in concurrent requests, deliberate
repeats of whole batches, and (in the first test) corrections. A 503 with Retry-After is
retried; any other failure fails the test. Afterwards the stored rows are read with SQL and
the API's hour and day windows are compared with a recount from the writers' own logs of
what was acknowledged (2xx): the expected figures come from those logs alone.

- With the jobs running (refresh every second) for 20 s: after the next full refresh every
  stored label is the last one acknowledged, nothing is pending or dirty, and the windows
  equal the recount, before and after `belated rebuild`.
- Without jobs (`serve --no-jobs`) for 10 s: the first read already counts every
  acknowledged label, those that raced their predictions included (DESIGN: "every answer
  reflects all data acknowledged before the request").
"""

from __future__ import annotations

from collections import Counter, defaultdict
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import httpx
import pytest

from tests.conftest import STORES
from tests.reliability.procs import (
    LoadPlan,
    Service,
    Store,
    belated,
    create_model,
    create_token,
    make_store,
    model_id,
    run_writers,
)
from tests.support.polling import wait_until

SECONDS = 20.0
MODEL = "returns-load"


def hour_of(ts: str) -> int:
    """The epoch hour of an RFC 3339 time."""
    return int(datetime.fromisoformat(ts.replace("Z", "+00:00")).timestamp() // 3600)


def expected(logs: list[dict[str, Any]]) -> tuple[dict[str, list[Any]], dict[str, str]]:
    """Acknowledged predictions (id → [ts, score]) and each id's last acknowledged label."""
    preds: dict[str, list[Any]] = {}
    final: dict[str, str] = {}
    for log in logs:
        preds.update(log["preds"])
        # a writer owns its ids, and its label requests for one id never overlap in time,
        # so the order of acknowledgement is the order of application
        for _seq, pid, actual in sorted(log["labels"], key=lambda x: x[0]):
            final[pid] = actual
    return preds, final


def recount(
    preds: dict[str, list[Any]], final: dict[str, str], hours_per_window: int
) -> dict[int, tuple[int, ...]]:
    """Per window start (epoch hour): predictions, labelled, tp, fp, fn, tn."""
    out: dict[int, list[int]] = defaultdict(lambda: [0] * 6)
    for pid, (ts, score) in preds.items():
        h = hour_of(ts)
        row = out[h - h % hours_per_window]
        row[0] += 1
        actual = final.get(pid)
        if actual is None:
            continue
        predicted = "1" if score >= 0.5 else "0"  # the model's default threshold 0.5
        row[1] += 1
        row[
            2 + {("1", "1"): 0, ("1", "0"): 1, ("0", "1"): 2, ("0", "0"): 3}[(predicted, actual)]
        ] += 1
    return {k: tuple(v) for k, v in out.items()}


def api_windows(
    client: httpx.Client, granularity: str, start: int, end: int
) -> dict[int, tuple[int, ...]]:
    """The API's windows (refreshed on read) as the same tuples, empty windows left out."""
    r = client.get(
        f"/v1/models/{MODEL}/metrics",
        params={
            "granularity": granularity,
            "measures": "precision,recall",
            "start": datetime.fromtimestamp(start * 3600, UTC).isoformat(),
            "end": datetime.fromtimestamp(end * 3600, UTC).isoformat(),
        },
    )
    assert r.status_code == 200, r.text
    out: dict[int, tuple[int, ...]] = {}
    for w in r.json()["windows"]:
        if w["predictions"]:
            c = w["confusion"]
            out[hour_of(w["start"])] = (
                w["predictions"],
                w["labelled"],
                c["tp"],
                c["fp"],
                c["fn"],
                c["tn"],
            )
    return out


def check_statuses(logs: list[dict[str, Any]]) -> Counter[int]:
    """Every request answered 2xx, or 503 with Retry-After (then retried); nothing else."""
    statuses: Counter[int] = Counter()
    for log in logs:
        statuses.update(status for _k, status, _s, _ra, _n in log["requests"])
        assert not log["failures"], log["failures"][:5]
        bad = [
            (s, ra)
            for _k, s, _t, ra, _n in log["requests"]
            if not 200 <= s < 300 and not (s == 503 and ra)
        ]
        assert not bad, bad[:5]
    return statuses


def stored_pids(store: Store, mid: int) -> dict[str, str | None]:
    """Every stored prediction id of the model with its label, read with SQL."""
    twice = store.rows(
        "SELECT pid, count(*) FROM predictions WHERE model_id = ? GROUP BY pid HAVING count(*) > 1",
        mid,
    )
    assert not twice, f"ids stored more than once: {twice[:5]}"
    return {
        r[0]: r[1]
        for r in store.rows("SELECT pid, actual FROM predictions WHERE model_id = ?", mid)
    }


def last_refresh(service: Service) -> datetime | None:
    """When the jobs last finished a refresh, as /healthz says."""
    at = service.health()["last_refresh"]
    return datetime.fromisoformat(at.replace("Z", "+00:00")) if at else None


def wait_for_a_full_refresh(service: Service, seconds: float = 30) -> None:
    """Wait for a refresh run that started after now: the second run to end from now on."""

    def ended_after(moment: datetime) -> Callable[[], bool]:
        return lambda: (last_refresh(service) or moment) > moment

    moment = datetime.now(UTC)
    for _ in range(2):  # runs never overlap (max_instances=1): the second began after now
        wait_until(
            ended_after(moment),
            seconds,
            what=lambda: f"a refresh ended: {service.health()}",
        )
        moment = last_refresh(service) or moment


@dataclass
class Run:
    """One load run: the store, the service, and what the writers saw acknowledged."""

    store: Store
    service: Service
    token: str
    mid: int
    plan: LoadPlan
    logs: list[dict[str, Any]]
    preds: dict[str, list[Any]]
    final: dict[str, str]

    def windows_match_the_logs(self) -> None:
        """The API's hour and day windows equal the recount from the writers' logs."""
        lo, hi = self.plan.end_hour - self.plan.hours - 24, self.plan.end_hour + 25
        with self.service.client(self.token) as client:
            for granularity, span in (("hour", 1), ("day", 24)):
                got = api_windows(client, granularity, lo, hi)
                want = recount(self.preds, self.final, span)
                diff = {
                    h: (got.get(h), want.get(h))
                    for h in got.keys() | want.keys()
                    if got.get(h) != want.get(h)
                }
                assert not diff, (
                    f"{granularity} windows (API, recount) differ in {len(diff)}"
                    f" windows: {sorted(diff.items())[:4]}; stranded labels: "
                    f"{stranded(self.store, self.mid)}"
                )

    def stored_labels_match_the_logs(self) -> None:
        """Each stored prediction carries its last acknowledged label, read with SQL."""
        stored = stored_pids(self.store, self.mid)
        wrong = {p: (v, self.final.get(p)) for p, v in stored.items() if v != self.final.get(p)}
        assert not wrong, (
            f"{len(wrong)} of {len(stored)} stored labels (stored, last "
            f"acknowledged) differ: {sorted(wrong.items())[:5]}"
        )


def stranded(store: Store, mid: int) -> int:
    """Pending labels whose prediction is stored (written in concurrent transactions)."""
    return int(
        store.scalar(
            "SELECT count(*) FROM pending_labels l JOIN predictions p ON p.model_id = l.model_id"
            " AND p.pid = l.pid WHERE l.model_id = ?",
            mid,
        )
    )


@contextmanager
def load(
    kind: str, tmp_path: Path, *, jobs: bool, seconds: float, corrections: float
) -> Iterator[Run]:
    """Run the eight writers against one service process and check the raw rows."""
    with make_store(kind, tmp_path) as store:
        token = create_token(store)
        service = Service(store, tmp_path, jobs=jobs, refresh_seconds=1.0)
        try:
            create_model(service.url, token, MODEL)
            mid = model_id(store, MODEL)
            plan = LoadPlan(
                url=service.url,
                token=token,
                model=MODEL,
                seconds=seconds,
                end_hour=int(datetime.now(UTC).timestamp() // 3600),
                correction_share=corrections,
            )
            logs = run_writers(plan, tmp_path)
            statuses = check_statuses(logs)
            preds, final = expected(logs)
            # each writer goes through at least two of the four orders, so all four are used
            batches = [log["batches"] for log in logs]
            assert min(batches) >= 2, f"too little traffic to mean anything: {batches}"
            print(
                f"\n{kind}: {len(preds)} predictions, {len(final)} labelled, statuses "
                f"{dict(statuses)}, stranded labels right after: {stranded(store, mid)}"
            )
            # raw rows: every acknowledged prediction once, and nothing that was not
            stored = stored_pids(store, mid)
            assert set(stored) == set(preds)
            assert sum(log["accepted"] for log in logs) == len(stored)
            yield Run(store, service, token, mid, plan, logs, preds, final)
        finally:
            service.stop()


@pytest.mark.slow
@pytest.mark.parametrize("kind", STORES)
def test_eight_writers_with_the_jobs_running_lose_and_double_nothing(
    kind: str, tmp_path: Path
) -> None:
    with load(kind, tmp_path, jobs=True, seconds=SECONDS, corrections=0.3) as run:
        # the jobs join labels that raced their predictions and refresh what is dirty
        wait_for_a_full_refresh(run.service)
        assert run.store.scalar("SELECT count(*) FROM dirty_buckets") == 0
        run.stored_labels_match_the_logs()
        assert run.store.scalar("SELECT count(*) FROM pending_labels") == 0
        run.windows_match_the_logs()
        # a rebuild from raw rows gives the same windows as the incremental path
        belated(run.store, "rebuild", "--model", MODEL)
        run.windows_match_the_logs()


@pytest.mark.slow
@pytest.mark.parametrize("kind", STORES)
def test_without_jobs_a_read_counts_every_label_acknowledged_before_it(
    kind: str, tmp_path: Path
) -> None:
    # DESIGN: "A read that covers dirty buckets refreshes them first, so every answer
    # reflects all data acknowledged before the request" -- including labels that raced
    # their predictions, with no job to sweep them (serve --no-jobs, no worker).
    with load(kind, tmp_path, jobs=False, seconds=SECONDS / 2, corrections=0.0) as run:
        run.windows_match_the_logs()
        run.stored_labels_match_the_logs()
        belated(run.store, "rebuild", "--model", MODEL)
        run.windows_match_the_logs()
