"""Errors that become RFC 9457 problem details at the HTTP edge."""

from __future__ import annotations

from typing import Any


class Problem(Exception):
    """A refusal a person can act on: HTTP status, a title, a detail and optional extras."""

    def __init__(
        self,
        status: int,
        detail: str,
        *,
        title: str | None = None,
        errors: list[dict[str, Any]] | None = None,
        headers: dict[str, str] | None = None,
        **extra: Any,
    ) -> None:
        super().__init__(detail)
        self.status = status
        self.detail = detail
        self.title = title
        self.errors = errors
        self.headers = headers
        self.extra = extra


class Invalid(Problem):
    """422: one or more items fail validation; `errors` lists index, field and reason."""

    def __init__(self, errors: list[dict[str, Any]], detail: str | None = None) -> None:
        first = errors[0]
        where = f"item {first['index']}" if first.get("index") is not None else "the request"
        detail = detail or (
            f"{len(errors)} invalid field(s); first: {where}, field '{first['field']}': "
            f"{first['reason']}. Nothing was stored."
        )
        super().__init__(422, detail, title="Invalid input", errors=errors)


def field_error(index: int | None, field: str, reason: str) -> dict[str, Any]:
    """One entry of a validation error list."""
    return {"index": index, "field": field, "reason": reason}


def invalid_field(field: str, reason: str) -> Invalid:
    """A 422 about one field of the request (no item index)."""
    return Invalid([field_error(None, field, reason)], detail=f"'{field}': {reason}")


class DomainError(Exception):
    """A refusal by the store or a service, independent of HTTP (the API maps it)."""

    def __init__(self, detail: str) -> None:
        super().__init__(detail)
        self.detail = detail


class NotFound(DomainError):
    """No `what` called `name` where the caller looked: "no rule 'x' on model 'y'"."""

    def __init__(self, what: str, name: str, *, where: str = "in this project") -> None:
        super().__init__(f"no {what} {name!r} {where}")
        self.what = what
        self.name = name


class Conflict(DomainError):
    """The request clashes with what is stored; `extra` adds fields to the answer."""

    def __init__(self, detail: str, *, title: str = "Conflict", **extra: Any) -> None:
        super().__init__(detail)
        self.title = title
        self.extra = extra
