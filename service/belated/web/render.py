"""Rendering the dashboard's pages: the templates, their filters, the security headers."""

from __future__ import annotations

from datetime import datetime
from typing import Any
from urllib.parse import urlencode

from fastapi.responses import HTMLResponse, Response
from jinja2 import Environment, PackageLoader

from belated.api.problems import as_problem
from belated.errors import DomainError, Problem
from belated.timeutil import parse_ts
from belated.web import pages

HEADERS = {
    # no script at all, styles inline only, no framing, forms post only here
    "Content-Security-Policy": "default-src 'none'; style-src 'unsafe-inline'; img-src data:; "
    "form-action 'self'; frame-ancestors 'none'; base-uri 'none'",
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "same-origin",
    "Cache-Control": "no-store",
}


def _num(value: Any, digits: int = 3) -> str:
    return f"{value:.{digits}f}" if isinstance(value, int | float) else "—"


def _pct(value: Any, digits: int = 0) -> str:
    return f"{value:.{digits}%}" if isinstance(value, int | float) else "—"


def _when(value: str | datetime | None, fmt: str = "%d %b %Y %H:%M UTC") -> str:
    return "—" if value is None else parse_ts(value).strftime(fmt)


def _span(start: str, end: str) -> str:
    """A window as a reader says it: a day, a week, or an hour."""
    a, b = parse_ts(start), parse_ts(end)
    hours = (b - a).total_seconds() / 3600
    if hours == 24 and a.hour == 0:
        return a.strftime("%a %d %b %Y")
    if hours == 24 * 7:
        return a.strftime("week of %d %b %Y")
    return f"{a:%d %b %Y %H:%M}–{b:%H:%M}"


def _hours(value: float | None) -> str:
    if value is None:
        return "not reached yet"
    return f"{value:.0f} h" if value < 48 else f"{value / 24:.1f} days"


ENV = Environment(
    loader=PackageLoader("belated.web", "templates"),
    autoescape=True,
    trim_blocks=True,
    lstrip_blocks=True,
)


def _count(value: Any) -> str:
    return f"{value:,}" if isinstance(value, int) else "—"


ENV.filters.update(num=_num, pct=_pct, when=_when, hours=_hours, count=_count)


def _qs(view: pages.View, **change: Any) -> str:
    """A query string that keeps the reader's view, with `change` applied."""
    return urlencode(view.query(**change), doseq=True)


ENV.globals.update(span=_span, plural=pages.plural, qs=_qs)


def render(
    template: str, *, status: int = 200, headers: dict[str, str] | None = None, **context: Any
) -> HTMLResponse:
    """A page from its template, with the dashboard's security headers."""
    html = ENV.get_template(template).render(**context)
    return HTMLResponse(html, status_code=status, headers={**HEADERS, **(headers or {})})


def error_page(problem: Problem | DomainError, signed_in: bool = True) -> HTMLResponse:
    if isinstance(problem, DomainError):
        problem = as_problem(problem)
    return render("error.html", status=problem.status, problem=problem, signed_in=signed_in)


def csv_download(text: str, filename: str) -> Response:
    """CSV text as a download, with the dashboard's headers."""
    return Response(
        text,
        media_type="text/csv; charset=utf-8",
        headers={**HEADERS, "Content-Disposition": f'attachment; filename="{filename}"'},
    )
