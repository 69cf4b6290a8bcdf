"""Dashboard routes: sign-in, the models overview, one model, the alerts (server-rendered)."""

from __future__ import annotations

from datetime import datetime
from typing import Annotated, Any
from urllib.parse import quote, urlencode, urlsplit

from fastapi import APIRouter, Form, Query, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response
from jinja2 import Environment, PackageLoader

from belated.api.deps import SessionDep, caller_of
from belated.api.problems import as_problem
from belated.clock import now
from belated.errors import DomainError, Problem
from belated.metrics import params
from belated.store import keys
from belated.store.keys import Principal
from belated.timeutil import parse_ts
from belated.web import export, pages

router = APIRouter(include_in_schema=False)
COOKIE = "belated_token"
COOKIE_SECONDS = 12 * 3600
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


def _error(problem: Problem | DomainError, signed_in: bool = True) -> HTMLResponse:
    if isinstance(problem, DomainError):
        problem = as_problem(problem)
    return render("error.html", status=problem.status, problem=problem, signed_in=signed_in)


def viewer(request: Request, session: SessionDep) -> Principal | Response:
    """The reader (a token with the read scope), or the answer to send instead: a redirect
    to the sign-in form without a live token, a 403 page without the read scope."""
    try:
        who = caller_of(request, session)
    except Problem:
        target = request.url.path + (f"?{request.url.query}" if request.url.query else "")
        return RedirectResponse(f"/signin?next={quote(target, safe='')}", status_code=303)
    if "read" not in who.scopes:
        return _error(
            Problem(
                403,
                "This token lacks the 'read' scope, which the dashboard "
                "needs. Sign in with a read token.",
                title="Forbidden",
            )
        )
    return who


def _safe_next(target: str | None) -> str:
    """Only a local path: never another site, never a scheme-relative '//host'."""
    if not target or not target.startswith("/") or target.startswith(("//", "/\\")):
        return "/"
    return target


@router.get("/signin", response_class=HTMLResponse)
def signin_form(next: str | None = None) -> HTMLResponse:
    """The sign-in form, which takes a read token."""
    return render("signin.html", next=_safe_next(next), error=None, signed_in=False)


@router.post("/signin", response_class=HTMLResponse)
def signin(
    request: Request,
    session: SessionDep,
    token: Annotated[str, Form()] = "",
    next: Annotated[str, Form()] = "/",
) -> Response:
    """Check a read token and keep it in an HTTP-only, same-site cookie."""
    origin = request.headers.get("origin")
    if origin and origin != "null" and urlsplit(origin).netloc != request.url.netloc:
        return _error(Problem(403, "Sign-in must come from this site's own form."), False)
    token = token.strip()
    found = keys.resolve(session=session, token=token) if 0 < len(token) <= 256 else None
    error, status = None, 200
    if found is None:
        error, status = "That token is not one this service knows (or it was revoked).", 401
    elif "read" not in found.scopes:
        error, status = "That token lacks the 'read' scope; the dashboard needs a read token.", 403
    if error:
        # a 401 must name a scheme (RFC 9110); Bearer never opens a browser's password box
        challenge = {"WWW-Authenticate": "Bearer"} if status == 401 else None
        return render(
            "signin.html",
            status=status,
            headers=challenge,
            next=_safe_next(next),
            error=error,
            signed_in=False,
        )
    answer = RedirectResponse(_safe_next(next), status_code=303)
    answer.set_cookie(
        COOKIE,
        token,
        max_age=COOKIE_SECONDS,
        path="/",
        httponly=True,
        samesite="strict",
        secure=request.url.scheme == "https",
    )
    return answer


@router.api_route("/signout", methods=["GET", "POST"])
def signout(request: Request) -> Response:
    """Forget the sign-in cookie."""
    answer = RedirectResponse("/signin", status_code=303)
    answer.delete_cookie(
        COOKIE, path="/", httponly=True, samesite="strict", secure=request.url.scheme == "https"
    )
    return answer


@router.get("/", response_class=HTMLResponse)
def overview(request: Request, session: SessionDep) -> Response:
    """The project's models with their latest settled measures and raised or noted alerts."""
    who = viewer(request, session)
    if isinstance(who, Response):
        return who
    page = pages.overview(
        session=session,
        who=who,
        now=now(),
        max_values=request.app.state.settings.max_segment_values,
    )
    return render("index.html", signed_in=True, section="models", **page)


def _view(
    granularity: str,
    start: str | None,
    end: str | None,
    segment: list[str] | None,
    beta: str | None,
    segments: str | None,
    sort: str,
    order: str | None,
) -> pages.View:
    """The reader's view from the query; a bad β or order is a 422."""
    b = 1.0
    if beta:
        try:
            b = params.parse_beta(float(beta), None)
        except ValueError:
            raise Problem(422, "'beta': must be a positive number, such as 0.5, 1 or 2") from None
    if order not in (None, "", "asc", "desc"):
        raise Problem(422, "'order': must be asc or desc")
    return pages.View(
        granularity,
        start,
        end,
        tuple(s for s in segment or [] if s.strip()),
        beta=b,
        segkey=segments or None,
        sort=sort or "value",
        descending=order == "desc",
    )


@router.get("/models/{name}", response_class=HTMLResponse)
def model_page(
    name: str,
    request: Request,
    session: SessionDep,
    granularity: str = "day",
    start: str | None = None,
    end: str | None = None,
    segment: Annotated[list[str] | None, Query()] = None,
    beta: str | None = None,
    segments: str | None = None,
    sort: str = "value",
    order: str | None = None,
) -> Response:
    """One model: measures over windows, coverage, estimates, thresholds, delays, alerts."""
    who = viewer(request, session)
    if isinstance(who, Response):
        return who
    try:
        view = _view(granularity, start, end, segment, beta, segments, sort, order)
        page = pages.model_view(
            session=session,
            who=who,
            name=name,
            view=view,
            now=now(),
            max_values=request.app.state.settings.max_segment_values,
        )
    except (Problem, DomainError) as problem:
        return _error(problem)
    return render("model.html", signed_in=True, section="models", **page)


def _csv(text: str, filename: str) -> Response:
    return Response(
        text,
        media_type="text/csv; charset=utf-8",
        headers={**HEADERS, "Content-Disposition": f'attachment; filename="{filename}"'},
    )


@router.get("/models/{name}/{table}.csv")
def model_csv(
    name: str,
    table: str,
    request: Request,
    session: SessionDep,
    granularity: str = "day",
    start: str | None = None,
    end: str | None = None,
    segment: Annotated[list[str] | None, Query()] = None,
    beta: str | None = None,
    segments: str | None = None,
    sort: str = "value",
    order: str | None = None,
) -> Response:
    """A table of the model page as CSV, for the same view."""
    who = viewer(request, session)
    if isinstance(who, Response):
        return who
    if table not in export.TABLES:
        return _error(Problem(404, f"No table {table!r}; one of {', '.join(export.TABLES)}."))
    try:
        view = _view(granularity, start, end, segment, beta, segments, sort, order)
        page = pages.model_view(
            session=session,
            who=who,
            name=name,
            view=view,
            now=now(),
            max_values=request.app.state.settings.max_segment_values,
        )
    except (Problem, DomainError) as problem:
        return _error(problem)
    return _csv(export.model_table(page, table), f"{name}-{table}.csv")


@router.get("/alerts", response_class=HTMLResponse)
def alerts_page(
    request: Request,
    session: SessionDep,
    state: str | None = None,
    model: str | None = None,
    after: str | None = None,
) -> Response:
    """The project's alerts, newest first, with their breaches."""
    who = viewer(request, session)
    if isinstance(who, Response):
        return who
    if after is not None and not after.isdigit():
        return _error(Problem(422, "'after' must be a position this page gave out."))
    try:
        page = pages.alerts_view(
            session=session, who=who, state=state, model=model, after=int(after) if after else None
        )
    except (Problem, DomainError) as problem:
        return _error(problem)
    return render("alerts.html", signed_in=True, section="alerts", **page)


@router.get("/alerts.csv")
def alerts_csv(
    request: Request,
    session: SessionDep,
    state: str | None = None,
    model: str | None = None,
    table: str = "alerts",
) -> Response:
    """The project's alerts (or their breaches) as CSV, every page of them."""
    who = viewer(request, session)
    if isinstance(who, Response):
        return who
    if table not in ("alerts", "breaches"):
        return _error(Problem(422, "'table': must be alerts or breaches"))
    try:
        items = pages.all_alerts(session=session, who=who, state=state, model=model)
    except (Problem, DomainError) as problem:
        return _error(problem)
    return _csv(export.alerts_table(items, table), f"alerts-{table}.csv")
