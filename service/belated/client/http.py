"""A Python client for the belated HTTP API: batched, retried ingest and windows as DataFrames.

    from belated.client import Client
    with Client("http://127.0.0.1:8000", token) as c:
        c.send_predictions("returns-v2", frame)   # rows: list of dicts or a DataFrame
        windows = c.metrics("returns-v2", granularity="day")

A refused request raises `BelatedError` carrying the problem details (RFC 9457).
"""

from __future__ import annotations

import random
import time
from collections.abc import Callable
from datetime import date, datetime
from typing import Any, cast

import httpx
import orjson
import pandas as pd

from belated.client.admin import AdminCalls
from belated.client.errors import MAYBE_SENT, NOT_SENT, BelatedError, Unreachable, retry_after
from belated.client.rows import chunks, plain, rfc3339
from belated.client.windows import windows_frame

DEFAULT_BATCH = 10_000
ANSWER_KEYS = {
    "predictions": ("accepted", "duplicates"),
    "labels": ("matched", "pending", "corrected", "unchanged", "expired"),
}


Progress = Callable[[int, dict[str, int]], None]


class Client(AdminCalls):
    """The belated API over HTTP, with a bearer token and bounded retries."""

    def __init__(
        self,
        url: str,
        token: str,
        *,
        batch_size: int = DEFAULT_BATCH,
        retries: int = 8,
        backoff: float = 0.5,
        max_wait: float = 30.0,
        timeout: float = 120.0,
        transport: httpx.BaseTransport | None = None,
        sleep: Callable[[float], None] = time.sleep,
        refused_retries: int | None = None,
    ) -> None:
        """`refused_retries`: retries of a connection refused before the service has
        answered once (None: as many as `retries`; 0 fails at once when nothing listens)."""
        if batch_size < 1:
            raise ValueError("batch_size must be at least 1")
        self.batch_size = batch_size
        self.retries = retries
        self.refused_retries = retries if refused_retries is None else refused_retries
        self._answered = False
        self.backoff = backoff
        self.max_wait = max_wait
        self._sleep = sleep
        self.http = httpx.Client(
            base_url=url.rstrip("/"),
            timeout=timeout,
            transport=transport,
            headers={"Authorization": f"Bearer {token}", "User-Agent": "belated-client"},
        )

    def __enter__(self) -> Client:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        """Close the connection pool."""
        self.http.close()

    def _wait(self, attempt: int, asked: float | None) -> None:
        # Exponential backoff with jitter; a Retry-After the service sends wins, within bounds.
        delay = self.backoff * 2**attempt * (0.5 + random.random() / 2)
        self._sleep(min(self.max_wait, asked if asked is not None else delay))

    def request(
        self,
        method: str,
        path: str,
        *,
        body: Any = None,
        params: dict[str, Any] | None = None,
        repeatable: bool = True,
        raw: tuple[bytes, str] | None = None,
    ) -> Any:
        """Send one request, retrying connection errors and 503; answer the JSON body.
        `raw` is a body that is not JSON, with its media type."""
        content = None if body is None else orjson.dumps(body)
        headers = {"Content-Type": "application/json"} if content is not None else None
        if raw is not None:
            content, headers = raw[0], {"Content-Type": raw[1]}
        for attempt in range(self.retries + 1):
            last = attempt == self.retries
            try:
                response = self.http.request(
                    method, path, content=content, params=params, headers=headers
                )
            except NOT_SENT + MAYBE_SENT as exc:
                refused = isinstance(exc, httpx.ConnectError) and not self._answered
                never = refused and attempt >= self.refused_retries
                if last or never or (not repeatable and not isinstance(exc, NOT_SENT)):
                    raise Unreachable(
                        None, "Service unreachable", f"{self.http.base_url}: {_reason(exc)}"
                    ) from exc
                self._wait(attempt, None)
                continue
            self._answered = True
            if response.status_code == 503 and not last:
                self._wait(attempt, retry_after(response))
                continue
            if response.status_code >= 400:
                raise BelatedError.from_response(response)
            return None if response.status_code == 204 else response.json()
        raise AssertionError("unreachable")  # the loop returns or raises

    def send_batch(self, model: str, kind: str, items: list[dict[str, Any]]) -> dict[str, int]:
        """Post one batch of `kind` ("predictions" or "labels"), all or nothing."""
        # A repeat of an ingest request is harmless: stored rows come back as duplicates.
        return cast(
            dict[str, Any], self.request("POST", f"/v1/models/{model}/{kind}", body={kind: items})
        )

    def put_rollups(self, model: str, body: bytes, media_type: str) -> dict[str, int]:
        """Upload rollup rows of whole hours to a lake-fed model (belated.lake.schema);
        a repeat replaces the same hours with the same rows."""
        return cast(
            dict[str, int],
            self.request("PUT", f"/v1/models/{model}/rollups", raw=(body, media_type)),
        )

    def _send(
        self,
        model: str,
        kind: str,
        rows: pd.DataFrame | list[dict[str, Any]],
        batch_size: int | None,
        progress: Progress | None,
    ) -> dict[str, int]:
        total = dict.fromkeys(ANSWER_KEYS[kind], 0)
        offset = 0
        for items in chunks(rows, batch_size or self.batch_size):
            try:
                answer = self.send_batch(model, kind, items)
            except BelatedError as exc:
                exc.offset, exc.sent = offset, total
                raise
            for key in total:
                total[key] += int(answer.get(key, 0))
            offset += len(items)
            if progress is not None:
                progress(len(items), answer)
        return total

    def send_predictions(
        self,
        model: str,
        rows: pd.DataFrame | list[dict[str, Any]],
        *,
        batch_size: int | None = None,
        progress: Progress | None = None,
    ) -> dict[str, int]:
        """Send predictions in batches; answer the summed {"accepted", "duplicates"}."""
        return self._send(model, "predictions", rows, batch_size, progress)

    def send_labels(
        self,
        model: str,
        rows: pd.DataFrame | list[dict[str, Any]],
        *,
        batch_size: int | None = None,
        progress: Progress | None = None,
    ) -> dict[str, int]:
        """Send labels in batches; answer the summed matched, pending, corrected, unchanged
        and expired."""
        return self._send(model, "labels", rows, batch_size, progress)

    def model(self, name: str) -> dict[str, Any]:
        """One model with its settings and stored counts."""
        return cast(dict[str, Any], self.request("GET", f"/v1/models/{name}"))

    def create_model(self, **fields: Any) -> dict[str, Any]:
        """Create a model (`name`, `kind`, `classes`, ... as in POST /v1/models)."""
        return cast(
            dict[str, Any], self.request("POST", "/v1/models", body=plain(fields), repeatable=False)
        )

    def alerts(
        self, *, state: str | None = None, model: str | None = None, since: Any = None
    ) -> list[dict[str, Any]]:
        """Every alert that matches, newest first (all pages). `state`: raised, noted,
        cleared, or a comma list such as "raised,noted" for the active ones."""
        params: dict[str, Any] = {"limit": 500}
        for key, value in (("state", state), ("model", model), ("since", since)):
            if value is not None:
                params[key] = value if isinstance(value, str) or key != "since" else rfc3339(value)
        out: list[dict[str, Any]] = []
        while True:
            page = self.request("GET", "/v1/alerts", params=params)
            out += page["items"]
            if not page.get("next_cursor"):
                return out
            params["cursor"] = page["next_cursor"]

    def alert(self, alert_id: str) -> dict[str, Any]:
        """One alert: what fired and why, its baseline, latest value, notes and breaches."""
        return cast(dict[str, Any], self.request("GET", f"/v1/alerts/{alert_id}"))

    def note(self, alert_id: str, text: str) -> dict[str, Any]:
        """Say something about an alert (a raised one becomes noted); answers the alert."""
        return cast(
            dict[str, Any],
            self.request(
                "POST", f"/v1/alerts/{alert_id}/note", body={"text": text}, repeatable=False
            ),
        )

    def metrics_json(self, model: str, **params: Any) -> dict[str, Any]:
        """The metrics answer as the API gives it."""
        return cast(
            dict[str, Any],
            self.request("GET", f"/v1/models/{model}/metrics", params=_query(params)),
        )

    def metrics(self, model: str, **params: Any) -> pd.DataFrame:
        """One row per window: counts, coverage, settled, closed, and each measure flattened.

        A measure `m` gives columns `m`, `m_low`, `m_high`; measures implied by the scores
        alone give `implied_m`; an unsettled window's projected measures give
        `m_projected`, `m_projected_low`, `m_projected_high`, beside `expected_final_coverage`
        and `settles_by` (read the projected value first: the labelled-only `m` of a young
        window leans toward the class whose labels come first); coverage bounds `m_bound_low`,
        `m_bound_high`; multiclass per-class measures `<class>.m`. `start` and `end` are UTC
        timestamps; undefined values are NaN.
        """
        return windows_frame(self.metrics_json(model, **params))

    def thresholds(self, model: str, **params: Any) -> dict[str, Any]:
        """The threshold sweep and the recommended thresholds over a time range.

        Without `start`/`end` the range is the settled days of the last 30 days. Tag filters
        are keyword arguments named `tag.<key>`: `thresholds(m, **{"tag.channel": "web"})`.
        """
        return cast(
            dict[str, Any],
            self.request("GET", f"/v1/models/{model}/thresholds", params=_query(params)),
        )

    def markers(self, model: str, *, start: Any = None, end: Any = None) -> list[dict[str, Any]]:
        """The model's markers (dated notes on its timeline) in [start, end), oldest first."""
        params = _query({"start": start, "end": end})
        return cast(
            list[dict[str, Any]],
            self.request("GET", f"/v1/models/{model}/markers", params=params)["items"],
        )

    def add_marker(self, model: str, at: Any, text: str) -> dict[str, Any]:
        """Mark something that happened to the model at `at`; answers the marker."""
        body = {"at": at if isinstance(at, str) else rfc3339(at), "text": text}
        return cast(
            dict[str, Any],
            self.request("POST", f"/v1/models/{model}/markers", body=body, repeatable=False),
        )

    def delete_marker(self, model: str, marker_id: str) -> None:
        """Remove a marker."""
        self.request("DELETE", f"/v1/models/{model}/markers/{marker_id}")

    def delays(self, model: str, **params: Any) -> dict[str, Any]:
        """Label delay quantiles and coverage by window age."""
        return cast(
            dict[str, Any], self.request("GET", f"/v1/models/{model}/delays", params=_query(params))
        )


def _reason(exc: Exception) -> str:
    """A connection error in a few words ("connection refused", "timed out")."""
    text = str(exc) or type(exc).__name__
    if "refused" in text.lower():
        return "connection refused (is the service running at this address?)"
    return f"{type(exc).__name__}: {text}"


def _query(params: dict[str, Any]) -> dict[str, Any]:
    """Query parameters: times as RFC 3339, lists of measures as a comma list."""
    out: dict[str, Any] = {}
    for key, value in params.items():
        if value is None:
            continue
        if isinstance(value, datetime | date):
            value = rfc3339(value)
        elif key == "measures" and not isinstance(value, str):
            value = ",".join(value)
        elif isinstance(value, bool):
            value = str(value).lower()
        out[key] = plain(value)
    return out
