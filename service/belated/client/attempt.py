"""One POST of a batch, what it came to, and how long to wait before trying again."""

from __future__ import annotations

import random
from dataclasses import dataclass
from typing import Any

import httpx

from belated.client.errors import BelatedError, retry_after
from belated.client.spool import Batch

# 408, 429 and the gateway answers say "later"; other 4xx say "never as it is".
RETRY_STATUSES = frozenset({408, 429, 502, 503, 504})
# A batch answered 500 this many times in a row is set aside: the same error each time is
# more likely this batch than an outage (an unreachable store is answered 503).
SERVER_ERROR_LIMIT = 5
MAX_RETRY_AFTER = 600.0


@dataclass(frozen=True, slots=True)
class Outcome:
    """What one POST came to: "sent", "retry" or "reject", with the problem details of a
    refusal and the seconds a Retry-After asked for."""

    verdict: str
    status: int | None = None
    problem: dict[str, Any] | None = None
    wait: float | None = None
    error: str | None = None


def post(http: httpx.Client, batch: Batch, timeout: float) -> Outcome:
    """POST one batch and classify the answer (a 500 is "retry"; the caller counts them)."""
    try:
        response = http.post(batch.path, content=batch.body, timeout=timeout)
    except httpx.HTTPError as exc:
        return Outcome("retry", error=f"{batch.path}: {type(exc).__name__}: {exc}")
    status = response.status_code
    if 200 <= status < 300:
        return Outcome("sent", status)
    refusal = BelatedError.from_response(response)
    problem = refusal.problem or {
        "status": status,
        "title": refusal.title,
        "detail": refusal.detail,
    }
    error = f"{batch.path}: {status} {refusal.title}: {refusal.detail}"
    if status in RETRY_STATUSES or status >= 500:
        return Outcome("retry", status, problem, retry_after(response), error)
    return Outcome("reject", status, problem, None, error)


def delay(outcome: Outcome, failures: int, backoff: float, max_backoff: float) -> float:
    """Seconds before the next attempt: as long as Retry-After asks (a little more, so that
    many clients do not come back at once), else exponential from `backoff` up to
    `max_backoff` with jitter, after `failures` failures in a row."""
    if outcome.wait is not None:
        return min(MAX_RETRY_AFTER, outcome.wait) * (1.0 + random.random() / 10)
    return min(max_backoff, backoff * 2.0 ** (failures - 1)) * (0.5 + random.random() / 2)
