"""Errors of the client: a refused request with its problem details, and what is retried."""

from __future__ import annotations

import email.utils
from datetime import UTC, datetime
from typing import Any

import httpx

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


def retry_after(response: httpx.Response) -> float | None:
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
