"""Dashboard routes: sign-in, the models overview, one model, the alerts (server-rendered)."""

from __future__ import annotations

from typing import Annotated, Any
from urllib.parse import quote, urlsplit

from fastapi import APIRouter, Form, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response
from sqlalchemy.orm import Session

from belated.api.deps import SessionDep, caller_of
from belated.clock import now
from belated.errors import DomainError, Problem
from belated.metrics import params
from belated.store import keys
from belated.store.keys import Principal
from belated.web import export, pages
from belated.web.render import HEADERS, csv_download, error_page, render

__all__ = ["HEADERS", "render", "router"]

router = APIRouter(include_in_schema=False)
COOKIE = "belated_token"
COOKIE_SECONDS = 12 * 3600


def viewer(request: Request, session: SessionDep) -> Principal | Response:
    """The reader (a token with the read scope), or the answer to send instead: a redirect
    to the sign-in form without a live token, a 403 page without the read scope."""
    try:
        who = caller_of(request, session)
    except Problem:
        target = request.url.path + (f"?{request.url.query}" if request.url.query else "")
        return RedirectResponse(f"/signin?next={quote(target, safe='')}", status_code=303)
    if "read" not in who.scopes:
        return error_page(
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
        return error_page(Problem(403, "Sign-in must come from this site's own form."), False)
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
    request: Request,
    granularity: str,
    start: str | None,
    end: str | None,
    beta: str | None,
    segments: str | None,
    sort: str,
    order: str | None,
) -> pages.View:
    """The reader's view from the query; a bad β, order or tag filter is a 422. The picker
    sends `tag.<key>=` (empty) for a key left at "all": skipped."""
    params.refuse_segment(request.query_params.keys())
    tags = params.parse_tag_filters((k, v) for k, v in request.query_params.multi_items() if v)
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
        tags=tags,
        beta=b,
        segkey=segments or None,
        sort=sort or "value",
        descending=order == "desc",
    )


def _model_data(
    request: Request, session: Session, who: Principal, name: str, query: tuple[Any, ...]
) -> dict[str, Any] | Response:
    """What the model page shows for the view the query asks, or the error page."""
    try:
        return pages.model_view(
            session=session,
            who=who,
            name=name,
            view=_view(request, *query),
            now=now(),
            max_values=request.app.state.settings.max_segment_values,
        )
    except (Problem, DomainError) as problem:
        return error_page(problem)


@router.get("/models/{name}", response_class=HTMLResponse)
def model_page(
    name: str,
    request: Request,
    session: SessionDep,
    granularity: str = "day",
    start: str | None = None,
    end: str | None = None,
    beta: str | None = None,
    segments: str | None = None,
    sort: str = "value",
    order: str | None = None,
) -> Response:
    """One model: measures over windows, coverage, estimates, thresholds, delays, alerts."""
    who = viewer(request, session)
    if isinstance(who, Response):
        return who
    page = _model_data(
        request, session, who, name, (granularity, start, end, beta, segments, sort, order)
    )
    if isinstance(page, Response):
        return page
    return render("model.html", signed_in=True, section="models", **page)


@router.get("/models/{name}/{table}.csv")
def model_csv(
    name: str,
    table: str,
    request: Request,
    session: SessionDep,
    granularity: str = "day",
    start: str | None = None,
    end: str | None = None,
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
        return error_page(Problem(404, f"No table {table!r}; one of {', '.join(export.TABLES)}."))
    page = _model_data(
        request, session, who, name, (granularity, start, end, beta, segments, sort, order)
    )
    if isinstance(page, Response):
        return page
    return csv_download(export.model_table(page, table), f"{name}-{table}.csv")


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
        return error_page(Problem(422, "'after' must be a position this page gave out."))
    try:
        page = pages.alerts_view(
            session=session, who=who, state=state, model=model, after=int(after) if after else None
        )
    except (Problem, DomainError) as problem:
        return error_page(problem)
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
        return error_page(Problem(422, "'table': must be alerts or breaches"))
    try:
        items = pages.all_alerts(session=session, who=who, state=state, model=model)
    except (Problem, DomainError) as problem:
        return error_page(problem)
    return csv_download(export.alerts_table(items, table), f"alerts-{table}.csv")
