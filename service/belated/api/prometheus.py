"""The Prometheus text exposition of /metrics, written by prometheus_client.

Anyone sees the service's own counters and health; a read token adds the figures the jobs
kept for its project (`belated.metrics.figures`). Label values are model names only, so
they stay bounded by the project's models. Every scrape collects on a private registry.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

from prometheus_client import CollectorRegistry
from prometheus_client.exposition import generate_latest
from prometheus_client.metrics_core import CounterMetricFamily, GaugeMetricFamily, Metric

# the classic text format, the one generate_latest writes
CONTENT_TYPE = "text/plain; version=0.0.4; charset=utf-8"
RATIOS = (
    "precision",
    "recall",
    "fbeta",
    "accuracy",
    "specificity",
    "npv",
    "balanced_accuracy",
    "positive_rate",
    "prevalence",
    "roc_auc",
    "average_precision",
)
OTHERS = {
    "mcc": "belated_model_mcc",
    "brier": "belated_model_brier_score",
    "log_loss": "belated_model_log_loss",
    "ece": "belated_model_calibration_error_ratio",
}
DRIFT = {
    "score_psi": (
        "belated_model_score_psi",
        "Score PSI of the latest closed daily window against the model's reference.",
    ),
    "score_js": (
        "belated_model_score_js_distance",
        "Score Jensen-Shannon distance (natural log) of the latest closed daily window"
        " against the model's reference.",
    ),
    "positive_rate_change": (
        "belated_model_positive_rate_change",
        "Predicted positive rate of the latest closed daily window minus the reference's.",
    ),
}
RAW_DROPPED = (
    (
        "raw_days_dropped",
        "belated_raw_days_dropped_total",
        "Days of raw rows dropped past their model's keep_raw_days (rollups kept).",
    ),
    (
        "raw_rows_dropped",
        "belated_raw_rows_dropped_total",
        "Raw predictions dropped past their model's keep_raw_days (rollups kept).",
    ),
)
HEALTH = (
    (
        "refresh_lag_seconds",
        "belated_refresh_lag_seconds",
        "Age of the oldest dirty bucket mark (0 when all rollups are fresh).",
    ),
    ("dirty_buckets", "belated_dirty_buckets", "Hour buckets waiting for a refresh."),
    (
        "outbox_backlog",
        "belated_webhook_deliveries_pending",
        "Webhook deliveries not yet delivered.",
    ),
    (
        "staleness_seconds",
        "belated_staleness_seconds",
        "Age of the answers: 0 on a read-write service; on a read-only replica, seconds since"
        " the start of the primary's last complete refresh.",
    ),
    (
        "replay_lag_seconds",
        "belated_replay_lag_seconds",
        "On a read-only standby, seconds since the last transaction it replayed.",
    ),
)


def _gauge(name: str, help_text: str, value: float) -> GaugeMetricFamily:
    return GaugeMetricFamily(name, help_text, value=value)


class ScrapeCollector:
    """The figures of one scrape: the service's, then the cached models' when given."""

    def __init__(
        self, *, counters: dict[str, int], health: dict[str, Any], cached: dict[str, Any] | None
    ) -> None:
        self.counters = counters
        self.health = health
        self.cached = cached

    def collect(self) -> Iterator[Metric]:
        """Every metric family of the scrape (prometheus_client's Collector protocol)."""
        yield from self._service()
        if self.cached is not None:
            yield from self._models(self.cached)

    def _service(self) -> Iterator[Metric]:
        counters, health = self.counters, self.health
        yield CounterMetricFamily(
            "belated_ingested_predictions_total",
            "Predictions accepted by this process.",
            value=counters.get("predictions", 0),
        )
        yield CounterMetricFamily(
            "belated_ingested_labels_total",
            "Labels received by this process.",
            value=counters.get("labels", 0),
        )
        if health.get("pending_labels_dropped") is not None:
            yield CounterMetricFamily(
                "belated_pending_labels_dropped_total",
                "Pending labels dropped by the jobs after waiting longer than their model's"
                " keep_raw_days for a prediction.",
                value=health["pending_labels_dropped"],
            )
        for key, name, help_text in RAW_DROPPED:
            if health.get(key) is not None:
                yield CounterMetricFamily(name, help_text, value=health[key])
        up = 1 if health.get("store") == "up" else 0
        yield _gauge("belated_store_up", "1 when the store answers.", up)
        leader = 1 if health.get("jobs", {}).get("leader") else 0
        yield _gauge("belated_jobs_leader", "1 when this process runs the scheduled jobs.", leader)
        read_only = 1 if health.get("read_only") else 0
        yield _gauge("belated_read_only", "1 when this process is a read-only replica.", read_only)
        for key, name, help_text in HEALTH:
            if health.get(key) is not None:
                yield _gauge(name, help_text, float(health[key]))

    def _models(self, cached: dict[str, Any]) -> Iterator[Metric]:
        families: dict[str, GaugeMetricFamily] = {}

        def add(name: str, help_text: str, model: str, value: float) -> None:
            if name not in families:
                families[name] = GaugeMetricFamily(name, help_text, labels=["model"])
            families[name].add_metric([model], value)

        for m in cached.get("models", []):
            model = m["name"]
            for measure, value in m.get("measures", {}).items():
                name = (
                    f"belated_model_{measure}_ratio" if measure in RATIOS else OTHERS.get(measure)
                )
                if value is not None and name is not None:
                    add(name, f"{measure} of the latest settled daily window.", model, value)
            if m.get("coverage") is not None:
                add(
                    "belated_model_label_coverage_ratio",
                    "Label coverage of the latest settled daily window.",
                    model,
                    m["coverage"],
                )
            if m.get("window_start") is not None:
                add(
                    "belated_model_window_start_timestamp_seconds",
                    "Start of the latest settled daily window.",
                    model,
                    m["window_start"],
                )
            for key, value in (m.get("drift") or {}).items():
                if value is not None and key in DRIFT:
                    add(*DRIFT[key], model, value)
            if m.get("drift_window_start") is not None:
                add(
                    "belated_model_drift_window_start_timestamp_seconds",
                    "Start of the latest closed daily window (the one drift is given for).",
                    model,
                    m["drift_window_start"],
                )
            add(
                "belated_model_open_alerts",
                "Raised or noted alerts.",
                model,
                m.get("open_alerts", 0),
            )
        yield from families.values()


def render(
    *, counters: dict[str, int], health: dict[str, Any], cached: dict[str, Any] | None
) -> bytes:
    """The exposition text of one scrape; `cached` None leaves the model figures out."""
    registry = CollectorRegistry(auto_describe=False)
    registry.register(ScrapeCollector(counters=counters, health=health, cached=cached))
    return generate_latest(registry)
