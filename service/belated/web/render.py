"""Rendering the dashboard's pages: the templates, their filters, the security headers."""

from __future__ import annotations

from datetime import UTC, datetime, time, timedelta
from typing import Any
from urllib.parse import urlencode

from fastapi.responses import HTMLResponse, Response
from jinja2 import Environment, PackageLoader

from belated import zones
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


UTC_SUFFIX = " UTC"


def _when(
    value: str | datetime | None, fmt: str = "%d %b %Y %H:%M UTC", zone: str | None = None
) -> str:
    """A time as the page shows it: in UTC as `fmt` says, or, for a model with another
    `zone`, its wall time there with the offset ("29 Mar 2026 03:00 +02:00")."""
    if value is None:
        return "—"
    if zones.is_utc(zone):
        return parse_ts(value).strftime(fmt)
    assert zone is not None
    return zones.wall_text(parse_ts(value), zones.zone(zone), fmt.removesuffix(UTC_SUFFIX))


def _span(start: str, end: str, zone: str | None = None) -> str:
    """A window as a reader says it: a day, a week, or an hour, in the model's zone (a
    local day may last 23 or 25 hours; its midnights are then given with their offsets)."""
    tz = zones.zone(zone) if not zones.is_utc(zone) else UTC
    a, b = parse_ts(start).astimezone(tz), parse_ts(end).astimezone(tz)
    midnights = a.time() == b.time() == time(0)
    if midnights and b.date() - a.date() == timedelta(days=1):
        text = a.strftime("%a %d %b %Y")
    elif midnights and b.date() - a.date() == timedelta(days=7) and a.weekday() == 0:
        text = a.strftime("week of %d %b %Y")
    elif tz is UTC:
        return f"{a:%d %b %Y %H:%M}–{b:%H:%M}"
    else:
        before, after = zones.offset_text(a, tz), zones.offset_text(b, tz)
        if before == after:
            return f"{a:%d %b %Y %H:%M}–{b:%H:%M} {after}"
        return f"{a:%d %b %Y %H:%M} {before}–{b:%H:%M} {after}"
    if tz is UTC or zones.offset_text(a, tz) == zones.offset_text(b, tz):
        return text
    # between UTC instants: two times of one zone subtract as wall times (always 24 h)
    hours = (b.astimezone(UTC) - a.astimezone(UTC)) / timedelta(hours=1)
    return f"{text} ({hours:g} h: {zones.offset_text(a, tz)} to {zones.offset_text(b, tz)})"


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
