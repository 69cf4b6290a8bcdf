"""Shared test helpers; test modules import from here, never from each other.

- builders: times, predictions, labels, tags, scores maps (the furniture shop's returns model)
- models: models created over the API and their row ids
- store: rows of the store read with plain SQL
- sending: predictions and labels posted in batches, every answer checked
- polling: `wait_until` and `time_until`, the bounded poll on state
- live: uvicorn serving the app on a loopback port the kernel picks

The heavier scenario modules are imported by name, not from here: `datasets` (the breast
cancer data scored and spread in time, with the scikit-learn reference for windows),
`alert_days` (days of a returns model for the alert tests), `shop` (the dashboard's
two weeks of orders) and `retention` (100 days of a returns model, for the raw-row
retention tests).
"""

from tests.support.builders import (
    base_time,
    epoch_hour,
    label,
    outcome_of,
    prediction,
    predictions,
    score_of,
    stamp,
    tags,
    three_class_scores,
    unique_name,
    utcnow,
)
from tests.support.models import Model, create_model, model_body, model_id, post_model
from tests.support.polling import time_until, wait_until
from tests.support.sending import send, send_both
from tests.support.store import (
    MODEL_TABLES,
    count,
    counts,
    prediction_row,
    rows,
    stored_rollups,
)

__all__ = [
    "MODEL_TABLES",
    "Model",
    "base_time",
    "count",
    "counts",
    "create_model",
    "epoch_hour",
    "label",
    "model_body",
    "model_id",
    "outcome_of",
    "post_model",
    "prediction",
    "prediction_row",
    "predictions",
    "rows",
    "score_of",
    "send",
    "send_both",
    "stamp",
    "stored_rollups",
    "tags",
    "three_class_scores",
    "time_until",
    "unique_name",
    "utcnow",
    "wait_until",
]
