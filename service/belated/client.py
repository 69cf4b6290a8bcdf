"""A Python client for the belated HTTP API: batched, retried ingest and windows as DataFrames.

    from belated.client import Client
    with Client("http://127.0.0.1:8000", token) as c:
        c.send_predictions("returns-v2", frame)   # rows: list of dicts or a DataFrame
        windows = c.metrics("returns-v2", granularity="day")

A refused request raises `BelatedError` carrying the problem details (RFC 9457).
"""

from __future__ import annotations

import email.utils
import random
import time
from collections.abc import Callable, Iterator
from datetime import UTC, date, datetime
from typing import Any, cast

import httpx
import numpy as np
import orjson
import pandas as pd

DEFAULT_BATCH = 10_000
ANSWER_KEYS = {
    "predictions": ("accepted", "duplicates"),
    "labels": ("matched", "pending", "corrected", "unchanged"),
}
# Request errors raised before the request reached the service: safe to retry for any call.
NOT_SENT = (httpx.ConnectError, httpx.ConnectTimeout, httpx.PoolTimeout)
# Errors after the request may have reached it: retried only where a repeat is harmless.
MAYBE_SENT = (
    httpx.ReadError,
    httpx.WriteError,
    httpx.ReadTimeout,
    httpx.WriteTimeout,
    httpx.RemoteProtocolError,
)

Progress = Callable[[int, dict[str, int]], None]


class BelatedError(Exception):
    """A refused request, with its problem details: status, title, detail and errors."""

    def __init__(
        self,
        status: int | None,
        title: str,
        detail: str,
        errors: list[dict[str, Any]] | None = None,
        problem: dict[str, Any] | None = None,
    ) -> None:
        super().__init__(f"{status or 'no answer'} {title}: {detail}")
        self.status = status
        self.title = title
        self.detail = detail
        self.errors = errors or []
        self.problem = problem or {}
        # Set by the batched senders: where the refused batch starts among the rows given,
        # and what the batches before it stored.
        self.offset = 0
        self.sent: dict[str, int] = {}

    @classmethod
    def from_response(cls, response: httpx.Response) -> BelatedError:
        """Read the problem details of a refused response (or its text, if not JSON)."""
        try:
            body = response.json()
        except ValueError:
            body = None
        if not isinstance(body, dict):
            return cls(response.status_code, response.reason_phrase or "Error", response.text[:500])
        return cls(
            int(body.get("status") or response.status_code),
            str(body.get("title") or response.reason_phrase),
            str(body.get("detail") or ""),
            body.get("errors"),
            body,
        )


class Unreachable(BelatedError):
    """The service did not answer, after every retry."""


def rfc3339(value: datetime | date | pd.Timestamp) -> str:
    """RFC 3339 in UTC with a Z suffix; naive times are taken as UTC."""
    if not isinstance(value, datetime):
        value = datetime(value.year, value.month, value.day)
    if value.tzinfo is None:
        value = value.replace(tzinfo=UTC)
    return value.astimezone(UTC).isoformat().replace("+00:00", "Z")


def plain(value: Any) -> Any:
    """A JSON-ready copy: numpy scalars via .item(), times as RFC 3339, NaN and NaT as None."""
    if value is None or value is pd.NaT or value is pd.NA:
        return None
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, pd.Timestamp):  # RFC 3339 stops at microseconds
        value = value.floor("us").to_pydatetime()
    if isinstance(value, datetime | date):
        return rfc3339(value)
    if isinstance(value, float) and value != value:
        return None
    if isinstance(value, dict):
        return {str(k): plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple | np.ndarray):
        return [plain(v) for v in value]
    return value


def _column(series: pd.Series) -> list[Any]:
    """A column as plain Python values (times as RFC 3339, missing as None)."""
    if isinstance(series.dtype, pd.DatetimeTZDtype) or pd.api.types.is_datetime64_dtype(series):
        utc = series.dt.tz_convert("UTC") if series.dt.tz is not None else series
        stamps = utc.to_numpy(dtype="datetime64[us]")
        whole = bool((stamps.astype("int64") % 1_000_000 == 0).all())
        text = np.datetime_as_string(stamps, unit="s" if whole else "us")
        return [None if t == "NaT" else t + "Z" for t in text.tolist()]
    if pd.api.types.is_float_dtype(series):
        return [None if v != v else v for v in series.to_numpy(dtype=float).tolist()]
    if pd.api.types.is_integer_dtype(series) and not series.hasnans:
        return list(series.to_numpy(dtype=np.int64).tolist())
    if isinstance(series.dtype, pd.StringDtype):
        return [v if isinstance(v, str) else None for v in series.tolist()]
    return [plain(v) for v in series.tolist()]


def frame_items(frame: pd.DataFrame) -> list[dict[str, Any]]:
    """Rows of a DataFrame as API items.

    Columns keep their API names (`id`, `ts`, `score`, `scores`, `predicted`, `tags`,
    `actual`); `score.<class>` columns make the `scores` map and `tag.<key>` columns the
    `tags`. Missing values are left out.
    """
    cols = {str(c): _column(frame[c]) for c in frame.columns}
    scores = [c for c in cols if c.startswith("score.")]
    tags = [c for c in cols if c.startswith("tag.")]
    fields = [c for c in cols if c not in scores and c not in tags]
    for name in ("predicted", "actual"):
        # Class values are strings or integers; a float column (an integer column with
        # gaps) holds 1.0 where the class is 1.
        if name in cols and pd.api.types.is_float_dtype(frame[name]):
            cols[name] = [int(v) if v is not None and v.is_integer() else v for v in cols[name]]
    items: list[dict[str, Any]] = []
    for i in range(len(frame)):
        item = {f: v for f in fields if (v := cols[f][i]) is not None}
        if scores:
            item["scores"] = {c[6:]: cols[c][i] for c in scores}
        if tags:
            found = {c[4:]: v for c in tags if (v := cols[c][i]) is not None and v != ""}
            if found:
                item["tags"] = found
        items.append(item)
    return items


def _chunks(rows: pd.DataFrame | list[dict[str, Any]], size: int) -> Iterator[list[dict[str, Any]]]:
    for start in range(0, len(rows), size):
        if isinstance(rows, pd.DataFrame):
            yield frame_items(rows.iloc[start : start + size])
        else:
            yield [dict_item(item) for item in rows[start : start + size]]


def dict_item(row: dict[str, Any]) -> dict[str, Any]:
    """A dict row as an API item; `score.<class>` and `tag.<key>` keys fold as in frames."""
    item = plain(row)
    for prefix, key in (("score.", "scores"), ("tag.", "tags")):
        flat = [k for k in item if k.startswith(prefix)]
        if flat:
            found = {k[len(prefix) :]: item.pop(k) for k in flat}
            found = {k: v for k, v in found.items() if key == "scores" or v not in (None, "")}
            if found:
                item[key] = {**(item.get(key) or {}), **found}
    return cast(dict[str, Any], item)


def _retry_after(response: httpx.Response) -> float | None:
    """Seconds asked by Retry-After (delta seconds or an HTTP date), if any."""
    value = response.headers.get("retry-after")
    if not value:
        return None
    if value.strip().isdigit():
        return float(value)
    try:
        when = email.utils.parsedate_to_datetime(value)
    except (TypeError, ValueError):
        return None
    return max(0.0, (when - datetime.now(UTC)).total_seconds())


class Client:
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
    ) -> None:
        if batch_size < 1:
            raise ValueError("batch_size must be at least 1")
        self.batch_size = batch_size
        self.retries = retries
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
    ) -> Any:
        """Send one request, retrying connection errors and 503; answer the JSON body."""
        content = None if body is None else orjson.dumps(body)
        headers = {"Content-Type": "application/json"} if content is not None else None
        for attempt in range(self.retries + 1):
            last = attempt == self.retries
            try:
                response = self.http.request(
                    method, path, content=content, params=params, headers=headers
                )
            except NOT_SENT + MAYBE_SENT as exc:
                if last or (not repeatable and not isinstance(exc, NOT_SENT)):
                    raise Unreachable(
                        None, "Service unreachable", f"{self.http.base_url}: {exc!r}"
                    ) from exc
                self._wait(attempt, None)
                continue
            if response.status_code == 503 and not last:
                self._wait(attempt, _retry_after(response))
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
        for items in _chunks(rows, batch_size or self.batch_size):
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
        """Send labels in batches; answer the summed matched, pending, corrected, unchanged."""
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
        answer = self.metrics_json(model, **params)
        frame = pd.DataFrame(
            [flatten_window(w) for w in answer["windows"]],
            columns=None if answer["windows"] else list(BASE_COLUMNS),
        )
        for col in ("start", "end"):
            frame[col] = pd.to_datetime(frame[col], utc=True)
        frame.attrs.update({k: v for k, v in answer.items() if k != "windows"})
        return frame

    def thresholds(self, model: str, **params: Any) -> dict[str, Any]:
        """The threshold sweep and the recommended thresholds over a time range.

        Without `start`/`end` the range is the settled days of the last 30 days. Tag filters
        are keyword arguments named `tag.<key>`: `thresholds(m, **{"tag.channel": "web"})`.
        """
        return cast(
            dict[str, Any],
            self.request("GET", f"/v1/models/{model}/thresholds", params=_query(params)),
        )

    def delays(self, model: str, **params: Any) -> dict[str, Any]:
        """Label delay quantiles and coverage by window age."""
        return cast(
            dict[str, Any], self.request("GET", f"/v1/models/{model}/delays", params=_query(params))
        )


BASE_COLUMNS = (
    "start",
    "end",
    "closed",
    "settled",
    "predictions",
    "labelled",
    "implied_negatives",
    "coverage",
)


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


def _value(measure: dict[str, Any], key: str) -> float:
    v = measure.get(key)
    return np.nan if v is None else float(v)


def flatten_window(window: dict[str, Any]) -> dict[str, Any]:
    """One window of the metrics answer as a flat row."""
    row: dict[str, Any] = {k: window.get(k) for k in BASE_COLUMNS}
    row["coverage"] = np.nan if row["coverage"] is None else row["coverage"]
    confusion = window.get("confusion") or {}
    row.update({k: confusion[k] for k in ("tp", "fp", "fn", "tn") if k in confusion})
    for name, m in (window.get("measures") or {}).items():
        row[name], row[f"{name}_low"], row[f"{name}_high"] = (
            _value(m, "value"),
            _value(m, "low"),
            _value(m, "high"),
        )
    for name, m in (window.get("implied") or {}).items():
        if name in ("reference", "adjusted"):
            continue  # the reference period and the adjusted flag are not measures
        row[f"implied_{name}"] = (
            _value(m, "value") if isinstance(m, dict) else (np.nan if m is None else float(m))
        )
    for name, b in (window.get("bounds") or {}).items():
        row[f"{name}_bound_low"], row[f"{name}_bound_high"] = _value(b, "low"), _value(b, "high")
    # an unsettled window's projected measures (what it will read once its labels are in)
    for name, m in (window.get("projected") or {}).items():
        row[f"{name}_projected"], row[f"{name}_projected_low"], row[f"{name}_projected_high"] = (
            _value(m, "value"),
            _value(m, "low"),
            _value(m, "high"),
        )
    final = window.get("expected_final_coverage")
    row["expected_final_coverage"] = np.nan if final is None else float(final)
    row["settles_by"] = window.get("settles_by")
    for cls, measures in (window.get("per_class") or {}).items():
        for name, m in measures.items():
            row[f"{cls}.{name}"], row[f"{cls}.{name}_low"], row[f"{cls}.{name}_high"] = (
                _value(m, "value"),
                _value(m, "low"),
                _value(m, "high"),
            )
    return row
