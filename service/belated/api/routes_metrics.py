"""History routes: windows of measures, the threshold sweep, label delays."""

from __future__ import annotations

from typing import Any

import orjson
from fastapi import APIRouter, Query, Request, Response

from belated.api.deps import ModelDep, NowDep, Read, SessionDep, SettingsDep
from belated.metrics import delays, params, thresholds
from belated.metrics.drift import parse_baseline
from belated.metrics.windows import MeasureOptions, windows_of_range

router = APIRouter(prefix="/v1/models/{model}", tags=["history"])


@router.get("/metrics")
def get_metrics(
    request: Request,
    _caller: Read,
    model: ModelDep,
    session: SessionDep,
    settings: SettingsDep,
    now: NowDep,
    granularity: str = "day",
    start: str | None = None,
    end: str | None = None,
    rolling: int = Query(1, ge=1, le=1000),
    beta: float | None = None,
    precision_weight: float | None = None,
    interval: str = "wilson",
    confidence: float = 0.95,
    resamples: int = 200,
    measures: str | None = None,
    baseline: str | None = Query(
        None,
        description=(
            "Compare each window's score distribution and positive rate with this range in"
            " place of the model's reference: `<start>/<end>` (ISO 8601 interval notation),"
            " two RFC 3339 times (without an offset: wall time in the model's `time_zone`),"
            " aligned down to whole hours, for example"
            " `2026-03-01T00:00:00Z/2026-03-31T00:00:00Z`."
        ),
    ),
) -> Response:
    """Windows with counts, coverage, settled, measures with intervals, estimates, bounds,
    drift.

    Filters are `tag.<key>=<value>` query parameters (one per key, ANDed); an unknown key,
    or a value no prediction carries, is a 422 naming the closest known ones. Day and week
    windows start at midnight in the model's `time_zone` (weeks on Monday; a local day lasts
    23 or 25 hours at a daylight-saving change) and their `start` and `end` carry the zone's
    offset; `start`/`end` with an offset are instants, without one wall time in that zone.
    A rolling window's `start` is its first part's start. `drift` holds `score_psi`,
    `score_js` (Jensen-Shannon distance, natural log) and `positive_rate_change` against the
    model's reference or `baseline`, each null with the `reason` when there is no reference
    or either side has fewer than 100 predictions."""
    params.refuse_segment(request.query_params.keys())
    rng = params.parse_range(granularity, start, end, now, time_zone=model.time_zone)
    b = params.parse_beta(beta, precision_weight)
    params.check_interval(interval, confidence, resamples)
    filters = params.parse_tag_filters(request.query_params.multi_items())
    params.check_known_tags(session, model, filters)
    wanted = params.parse_measures(measures, model.kind)
    span = parse_baseline(baseline, model.time_zone)
    opts = MeasureOptions(
        baseline=span,
        beta=b,
        interval=interval,
        confidence=confidence,
        resamples=resamples,
        measures=wanted,
        rolling=rolling,
    )
    windows = windows_of_range(session, model, rng, opts, filters, now, settings.max_segment_values)
    # serialised directly: FastAPI's generic encoder costs more than the measures for a year
    body = {
        "model": model.name,
        "granularity": granularity,
        "rolling": rolling,
        "beta": b,
        "tags": dict(filters),
        "time_zone": model.time_zone or "UTC",
        "windows": windows,
    }
    return Response(
        orjson.dumps(body, option=orjson.OPT_SERIALIZE_NUMPY), media_type="application/json"
    )


@router.get("/thresholds")
def get_thresholds(
    request: Request,
    _caller: Read,
    model: ModelDep,
    session: SessionDep,
    settings: SettingsDep,
    now: NowDep,
    start: str | None = None,
    end: str | None = None,
    beta: float | None = None,
    precision_weight: float | None = None,
    precision_target: float | None = Query(None, ge=0, le=1),
    recall_target: float | None = Query(None, ge=0, le=1),
) -> dict[str, Any]:
    """Measures at every threshold and the recommended thresholds over a time range.

    Without `start` and `end`: the settled days of the last 30 days. Filters are
    `tag.<key>=<value>` query parameters (one per key, ANDed)."""
    params.refuse_segment(request.query_params.keys())
    settled_only = not start and not end
    if settled_only:
        rng = params.parse_range("day", None, None, now, default_windows=thresholds.DEFAULT_DAYS)
    else:
        rng = params.parse_range("hour", start, end, now, default_windows=30 * 24)
    b = params.parse_beta(beta, precision_weight)
    filters = params.parse_tag_filters(request.query_params.multi_items())
    params.check_known_tags(session, model, filters)
    answer = thresholds.over_range(
        session,
        model,
        start=rng.start,
        end=rng.end,
        settled_only=settled_only,
        beta=b,
        precision_target=precision_target,
        recall_target=recall_target,
        now=now,
        max_values=settings.max_segment_values,
        filters=filters,
    )
    return {"model": model.name, "beta": b, "tags": dict(filters), **answer}


@router.get("/delays")
def get_delays(
    _caller: Read,
    model: ModelDep,
    session: SessionDep,
    settings: SettingsDep,
    now: NowDep,
    start: str | None = None,
    end: str | None = None,
) -> dict[str, Any]:
    """Label delay quantiles (Kaplan-Meier) and coverage by window age."""
    rng = params.parse_range("hour", start, end, now, default_windows=90 * 24)
    answer = delays.over_range(
        session,
        model,
        start=rng.start,
        end=rng.end,
        now=now,
        max_values=settings.max_segment_values,
    )
    return {"model": model.name, **answer}
