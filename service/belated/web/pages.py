"""Page assembly: call the service functions the API uses and shape what the templates show."""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

from sqlalchemy.orm import Session

from belated.alerts import rules as alert_rules
from belated.errors import Problem
from belated.metrics import delays as metric_delays
from belated.metrics import params
from belated.metrics import thresholds as metric_thresholds
from belated.metrics.windows import MeasureOptions, windows_of_range
from belated.store import markers, model_registry
from belated.store.keys import Principal
from belated.store.tables import ModelRow
from belated.web import alert_pages, charts, drift, panels, segtable, views
from belated.web.alert_pages import alerts_view, all_alerts, baseline_text, describe_rule
from belated.web.names import NAMES, labelled_text, name_of, num3, plural

__all__ = [
    "NAMES",
    "View",
    "alerts_view",
    "all_alerts",
    "baseline_text",
    "describe_rule",
    "labelled_text",
    "model_view",
    "name_of",
    "overview",
    "plural",
]

CHARTED = {
    "binary": ("precision", "recall", "fbeta", "positive_rate"),
    "multiclass": ("accuracy", "precision_macro", "recall_macro", "fbeta_macro"),
}
HEADLINE = {
    "binary": ("precision", "recall", "fbeta"),
    "multiclass": ("precision_macro", "recall_macro", "fbeta_macro"),
}
IMPLIED = ("precision", "recall")
AXIS = {"hour": "%d %b %H:00", "day": "%d %b", "week": "wk %d %b"}
PAGE = 500
ACTIVE = alert_pages.ACTIVE


@dataclass(frozen=True)
class View:
    """What the reader asked to see: the range and segment of the model page."""

    granularity: str = "day"
    start: str | None = None
    end: str | None = None
    tags: tuple[tuple[str, str], ...] = field(default_factory=tuple)  # tag.<key>=<value>
    beta: float = 1.0
    segkey: str | None = None  # the tag key of the segment table
    sort: str = "value"
    descending: bool = False

    def query(self, **change: Any) -> dict[str, Any]:
        """This view's query parameters (with `change` applied), for links that keep it."""
        out: dict[str, Any] = {
            "granularity": self.granularity,
            "start": self.start,
            "end": self.end,
            "beta": f"{self.beta:g}" if self.beta != 1.0 else None,
            "segments": self.segkey,
            "sort": self.sort if self.sort != "value" else None,
            "order": "desc" if self.descending else None,
        }
        out.update({f"{params.TAG_PREFIX}{k}": v for k, v in self.tags})
        out.update(change)
        return {k: v for k, v in out.items() if v not in (None, "", [])}


def _label(iso_start: str, granularity: str) -> str:
    """An axis label in the window's own offset (a zoned model's windows carry theirs)."""
    return datetime.fromisoformat(iso_start).strftime(AXIS[granularity])


def _all_models(session: Session, project_id: int) -> list[ModelRow]:
    out: list[ModelRow] = []
    after: str | None = None
    while True:
        rows, after = model_registry.list_(
            session=session, project_id=project_id, after=after, limit=PAGE
        )
        out += rows
        if after is None:
            return out


def _windows(
    session: Session,
    row: ModelRow,
    rng: params.Range,
    now: datetime,
    max_values: int,
    filters: tuple[tuple[str, str], ...] = (),
    beta: float = 1.0,
) -> list[dict[str, Any]]:
    wanted = frozenset(CHARTED["binary"]) if row.kind == "binary" else None
    return windows_of_range(
        session, row, rng, MeasureOptions(beta=beta, measures=wanted), filters, now, max_values
    )


def overview(*, session: Session, who: Principal, now: datetime, max_values: int) -> dict[str, Any]:
    """The project's models, each with its latest settled day and its active alerts (raised
    and noted: a noted alert stays in sight until it clears)."""
    active: dict[str, dict[str, int]] = {}
    for alert in alert_pages.list_all(session, who, state=ACTIVE, model=None):
        counts = active.setdefault(alert["model"], {"raised": 0, "noted": 0})
        counts[alert["state"]] += 1
    rng = params.parse_range("day", None, None, now)
    cards = []
    for row in _all_models(session, who.project_id):
        windows = _windows(session, row, rng, now, max_values)
        settled = [w for w in windows if w["settled"] and w["predictions"]]
        latest = settled[-1] if settled else None
        newest = next((w for w in reversed(windows) if w["predictions"]), None)
        cards.append(
            {
                "name": row.name,
                "kind": row.kind,
                "time_zone": row.time_zone or "UTC",
                "alerts": active.get(row.name, {"raised": 0, "noted": 0}),
                "stored": model_registry.counts(session=session, model=row),
                "window": latest,
                "newest": newest,
                "headline": [
                    (name_of(m), (latest or {}).get("measures", {}).get(m))
                    for m in HEADLINE[row.kind]
                ],
            }
        )
    return {"cards": cards, "days": params.DEFAULT_WINDOWS}


def _series(
    windows: list[dict[str, Any]], measure: str, granularity: str, section: str = "measures"
) -> list[charts.Point]:
    out = []
    for w in windows:
        m = (w.get(section) or {}).get(measure) or {}
        reason = m.get("reason")
        if reason and section == "measures" and not w["labelled"] and w["predictions"]:
            reason = "nothing labelled yet"  # the cause, not the arithmetic's symptom
        note = reason or labelled_text(w)
        proj = (w.get("projected") or {}).get(measure) if section == "measures" else None
        bounds = (w.get("bounds") or {}).get(measure) or {} if section == "measures" else {}
        if proj and proj.get("value") is not None:
            # the honest number first: what the window will read once its labels are in,
            # with the labelled-only value and the coverage bounds beside it
            beside = f"labelled only {num3(m.get('value'))} ({note})"
            if bounds.get("low") is not None:
                beside += f"; coverage bounds [{num3(bounds['low'])}, {num3(bounds['high'])}]"
            m, note = proj, f"projected; {beside}"
        out.append(
            charts.Point(
                key=w["start"],
                label=_label(w["start"], granularity),
                value=m.get("value"),
                low=m.get("low"),
                high=m.get("high"),
                settled=w["settled"],
                note=note,
                projected=m is proj,
                bounds_low=None if w["settled"] else bounds.get("low"),
                bounds_high=None if w["settled"] else bounds.get("high"),
            )
        )
    return out


# measures that share one y-axis across the panels (all proportions read side by side)
SHARED_AXIS = {"precision", "recall", "fbeta", "accuracy", "precision_macro", "recall_macro"}


def model_view(
    *, session: Session, who: Principal, name: str, view: View, now: datetime, max_values: int
) -> dict[str, Any]:
    """Everything the model page shows, for the asked range and segment."""
    filters = view.tags
    row = model_registry.get(session=session, project_id=who.project_id, name=name)
    params.check_known_tags(session, row, filters)  # a typo is a 422 page, not empty charts
    rules = [
        alert_rules.rule_read(r, row.name)
        for r in alert_rules.list_rules(session=session, model=row)
    ]
    if view.start or view.end:
        rng = params.parse_range(
            view.granularity, view.start or None, view.end or None, now, time_zone=row.time_zone
        )
    else:
        rng = views.default_range(session, row, view.granularity, rules, now)
    windows = _windows(session, row, rng, now, max_values, filters, view.beta)
    g = view.granularity
    alerts = alert_pages.with_rules(
        session, row, alert_pages.list_all(session, who, state=ACTIVE, model=row.name)
    )
    tz = row.time_zone or "UTC"
    marks = views.alert_marks(alerts, g, tz) + views.marker_marks(
        markers.list_(session=session, model=row, start=rng.start, end=rng.end), g, tz
    )
    series = {m: _series(windows, m, g) for m in CHARTED[row.kind]}
    shared = [
        v
        for m, pts in series.items()
        if m in SHARED_AXIS
        for p in pts
        for v in (p.value, p.low, p.high)
        if v is not None
    ]
    measure_charts = [
        {
            "measure": m,
            "title": name_of(m, view.beta),
            "latest": next(
                (
                    w["measures"].get(m)
                    for w in reversed(windows)
                    if w["settled"] and (w["measures"].get(m) or {}).get("value") is not None
                ),
                None,
            ),
            "svg": charts.line_chart(
                series[m],
                title=f"{name_of(m, view.beta)} by {g}",
                chart_id=f"m-{m}",
                css=f"m-{m}",
                marks=marks,
                domain=shared if m in SHARED_AXIS else None,
            ),
        }
        for m in CHARTED[row.kind]
    ]
    coverage = [
        charts.Point(
            key=w["start"],
            label=_label(w["start"], g),
            value=w["coverage"],
            settled=w["settled"],
            note=labelled_text(w),
        )
        for w in windows
    ]
    tag_keys = segtable.tag_keys(session, row)
    segkey = segtable.pick_key(tag_keys, view.segkey, alerts)
    seg_columns = segtable.columns(row.kind, lambda m: name_of(m, view.beta))
    if view.sort not in {c.key for c in seg_columns}:
        known = ", ".join(c.key for c in seg_columns)
        raise Problem(422, f"'sort': no column {view.sort!r} in the segment table; one of {known}")
    seg_rows = (
        segtable.rows(
            session, row, rng, segkey, tag_keys[segkey], alerts, view.beta, now, max_values
        )
        if segkey
        else []
    )
    page: dict[str, Any] = {
        "model": row,
        "stored": model_registry.counts(session=session, model=row),
        "view": view,
        "range": rng,
        "windows": windows,
        "charts": measure_charts,
        "marks": marks,
        "provisional": sum(1 for w in windows if not w["settled"]),
        "coverage_svg": panels.bar_chart(
            coverage,
            title=f"Label coverage by {g}",
            chart_id="coverage",
            reference=row.min_coverage,
            reference_label=f"settles at {row.min_coverage:.0%}",
            marks=marks,
        ),
        "alerts": alerts,
        "rules": rules,
        "tag_keys": tag_keys,
        "segkey": segkey,
        "seg_columns": seg_columns,
        "seg_rows": segtable.sort_rows(seg_rows, view.sort, view.descending),
        "implied_svg": None,
        "sweep": None,
        "drift": [],
    }
    if row.kind == "binary":
        page["drift"] = drift.drift_panels(
            windows,
            rules,
            granularity=g,
            label=lambda s: _label(s, g),
            marks=marks,
            time_zone=tz,
        )
        page.update(_binary_extras(session, row, rng, windows, now, max_values))
        page.update(_advice(session, row, view, rng, filters, now, max_values))
    return page


def _binary_extras(
    session: Session,
    row: ModelRow,
    rng: params.Range,
    windows: list[dict[str, Any]],
    now: datetime,
    max_values: int,
) -> dict[str, Any]:
    """Implied measures and the label delays of a binary model."""
    g = rng.granularity
    strips = [(f"implied {name_of(m).lower()}", _series(windows, m, g, "implied")) for m in IMPLIED]
    latest_cal = next(
        (
            w["implied"].get("calibration_error")
            for w in reversed(windows)
            if w["implied"].get("calibration_error") is not None
        ),
        None,
    )
    delays = metric_delays.over_range(
        session, row, start=rng.start, end=rng.end, now=now, max_values=max_values
    )
    ages = [
        charts.Point(
            key=str(a["age_days"]),
            label=f"{a['age_days']} d",
            value=a["coverage"],
            note=f"{a['predictions']} predictions",
        )
        for a in delays["coverage_by_age"]
    ]
    return {
        "implied_svg": panels.strip_chart(
            strips, title="Measures implied by the scores alone", chart_id="implied"
        ),
        "calibration_error": latest_cal,
        "delays": delays,
        "delays_svg": panels.bar_chart(
            ages,
            title="Label coverage by age of the predictions",
            chart_id="delays",
            reference=row.min_coverage,
            reference_label=f"{row.min_coverage:.0%}",
        ),
    }


def _advice(
    session: Session,
    row: ModelRow,
    view: View,
    rng: params.Range,
    filters: tuple[tuple[str, str], ...],
    now: datetime,
    max_values: int,
) -> dict[str, Any]:
    """The threshold sweep of a binary model, as GET /thresholds answers it: over the settled
    days of the last 30 days unless the reader chose a range (then over that range, with the
    labelled predictions of unsettled days counted), for the page's segment."""
    chosen = bool(view.start or view.end)
    if chosen:
        start, end = rng.start, rng.end
    else:
        days = params.parse_range(
            "day",
            None,
            None,
            now,
            default_windows=metric_thresholds.DEFAULT_DAYS,
            time_zone=row.time_zone or "UTC",
        )
        start, end = days.start, days.end
    sweep = metric_thresholds.over_range(
        session,
        row,
        start=start,
        end=end,
        settled_only=not chosen,
        beta=view.beta,
        precision_target=None,
        recall_target=None,
        now=now,
        max_values=max_values,
        filters=filters,
    )
    best = sweep.get("best_fbeta")
    best_label = (
        f"best {name_of('fbeta', view.beta)} at {best['threshold']:.2f}" if best else "no advice"
    )
    return {
        "sweep": sweep,
        "best": best,
        "advice_range": (start, end),
        "sweep_svg": panels.sweep_chart(
            sweep["sweep"],
            title="Precision and recall against the threshold",
            chart_id="sweep",
            best=best["threshold"] if best else None,
            best_label=best_label,
            current=row.threshold,
        ),
    }
