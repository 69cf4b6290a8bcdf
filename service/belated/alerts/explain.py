"""Words for an alert: one sentence per rule kind, and the dashboard link at its window.

An alert explains itself (DESIGN.md, "Rules and alerts"): the sentence says what was
watched, against what, at which level and where, in the numbers the alert was raised on,
e.g. "Recall fell more than 0.05 under its baseline of 0.74 (1–7 Nov), at α = 0.01, in
region north." (with ": early warning from projected values" before the stop while the alert
rests on early looks alone).
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta, tzinfo
from typing import Any
from urllib.parse import quote, urlencode

from belated.alerts.schemas import RuleSettings
from belated.timeutil import iso, parse_ts, window_step
from belated.zones import DEFAULT_ZONE, zone

NAMES = {
    "precision": "Precision",
    "recall": "Recall",
    "fbeta": "F-beta",
    "accuracy": "Accuracy",
    "specificity": "Specificity",
    "npv": "Negative predictive value",
    "balanced_accuracy": "Balanced accuracy",
    "mcc": "MCC",
    "prevalence": "Prevalence",
    "roc_auc": "ROC AUC",
    "average_precision": "Average precision",
    "positive_rate": "The predicted positive rate",
    "estimated_precision": "Estimated precision",
    "estimated_recall": "Estimated recall",
    "estimated_fbeta": "Estimated F-beta",
}
LINK_WINDOWS = 14  # windows shown before the first breached one


def number(x: float | None) -> str:
    """A setting or value as people write it: 0.05, 0.74, 200."""
    if x is None:
        return "—"
    if float(x).is_integer():
        return str(int(x))
    return f"{x:.3f}".rstrip("0").rstrip(".")


def period(start: datetime, end: datetime, granularity: str) -> str:
    """A baseline's [start, end) as a reader says it: "1–7 Nov", "28 Oct–3 Nov"."""
    if granularity == "hour":
        last = end
        if start.date() == (end - timedelta(seconds=1)).date():
            return f"{start.day} {start:%b} {start:%H:%M}–{last:%H:%M}"
        return f"{start.day} {start:%b} {start:%H:%M}–{last.day} {last:%b} {last:%H:%M}"
    last = end - timedelta(days=1)
    if start.date() == last.date():
        return (
            f"{start.day} {start:%b %Y}" if start.year != last.year else f"{start.day} {start:%b}"
        )
    if start.year != last.year:
        return f"{start.day} {start:%b %Y}–{last.day} {last:%b %Y}"
    if start.month != last.month:
        return f"{start.day} {start:%b}–{last.day} {last:%b}"
    return f"{start.day}–{last.day} {last:%b}"


def where(segment: str | None) -> str:
    """ ", in region north" for the segment region:north; nothing for all traffic."""
    if not segment:
        return ""
    key, _, value = segment.partition(":")
    return f", in {key} {value}"


def _against(rule: RuleSettings, baseline: dict[str, Any] | None, tz: tzinfo = UTC) -> str:
    """ "its baseline of 0.74 (1–7 Nov)", from the stored baseline or the rule's own; the
    period in the local days of the model's zone `tz`."""
    g = rule.granularity
    value = (baseline or {}).get("value")
    said = "its baseline" + (f" of {number(value)}" if isinstance(value, int | float) else "")
    if baseline and baseline.get("start") and baseline.get("end"):
        start, end = parse_ts(baseline["start"]), parse_ts(baseline["end"])
        return f"{said} ({period(start.astimezone(tz), end.astimezone(tz), g)})"
    b = rule.baseline
    if b.start is not None and b.end is not None:
        return f"{said} ({period(b.start.astimezone(tz), b.end.astimezone(tz), g)})"
    return f"{said} (the {b.windows} {g}s before)"


EARLY = "early warning from projected values"


def sentence(
    rule: RuleSettings,
    baseline: dict[str, Any] | None,
    segment: str | None,
    *,
    early: bool = False,
    time_zone: str = DEFAULT_ZONE,
) -> str:
    """One sentence saying what fired, per rule kind; an alert raised on early looks (not
    yet confirmed by a settled window) says it is an early warning from projected values.
    Baseline periods are said in the local days of the model's `time_zone`."""
    tz = zone(time_zone)
    m = rule.measure or ""
    name = NAMES.get(m, m.replace("_", " ").capitalize())
    seg, alpha, g = where(segment), f"α = {number(rule.alpha)}", rule.granularity
    if rule.kind == "drop":
        by = f"more than {number(rule.tolerance)} " if rule.tolerance else ""
        text = f"{name} fell {by}under {_against(rule, baseline, tz)}, at {alpha}{seg}"
    elif rule.kind == "floor":
        text = f"{name} fell under {number(rule.threshold)}"
        if rule.mode == "confident":
            text += f", even at the upper end of its {1 - 2 * rule.alpha:.0%} interval"
        text += seg
    elif rule.kind == "shift" and m == "positive_rate":
        text = (
            f"The predicted positive rate moved by {number(rule.threshold)} or more from "
            f"{_against(rule, baseline, tz)}, at {alpha}{seg}"
        )
    elif rule.kind == "shift":
        what = (
            "The score distribution"
            if m == "score_psi"
            else f"The mix of {m.partition(':')[2]} values"
        )
        text = (
            f"{what} shifted from {_against(rule, baseline, tz)}: "
            f"PSI of {number(rule.threshold)} or more{seg}"
        )
    elif rule.kind == "traffic":
        low, high = rule.low, rule.high
        if low is not None and high is not None:
            text = f"Predictions per {g} fell outside {number(low)}–{number(high)}{seg}"
        elif low is not None:
            text = f"Fewer than {number(low)} predictions arrived in a {g}{seg}"
        else:
            text = f"More than {number(high)} predictions arrived in a {g}{seg}"
    elif rule.threshold is not None:  # stall on coverage
        text = (
            f"Label coverage of {g}s older than the label delay fell under "
            f"{number(rule.threshold)}{seg}"
        )
    else:  # stall on silence
        text = f"No label arrived for {number(rule.max_silence_hours)} hours{seg}"
    return f"{text}: {EARLY}." if early else text + "."


def link(
    model: str,
    granularity: str,
    segment: str | None,
    started: datetime | None,
    latest_end: datetime | None,
    public_url: str | None = None,
) -> str:
    """The model's dashboard page on the windows around the first breached one."""
    step = window_step(granularity)
    query: dict[str, str] = {"granularity": granularity}
    if started is not None:
        end = max(latest_end or started + step, started + step) + step
        query["start"] = iso(started - LINK_WINDOWS * step)
        query["end"] = iso(end)
    if segment:
        query["segment"] = segment
    path = f"/models/{quote(model, safe='')}?{urlencode(query)}"
    return (public_url.rstrip("/") + path) if public_url else path
