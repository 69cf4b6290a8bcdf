"""Python access to belated: `Client` for batches and reads, `Recorder` for a live system.

    from belated.client import Client, Recorder

`Client` sends DataFrames or lists of dicts in batches and reads windows as DataFrames; a
refused request raises `BelatedError` with the problem details. `Recorder` takes one
prediction or label at a time from a live system without ever blocking it, and sends them in
the background (see `belated.client.recorder`).
"""

from belated.client.errors import MAYBE_SENT, NOT_SENT, BelatedError, Unreachable
from belated.client.http import ANSWER_KEYS, DEFAULT_BATCH, Client, Progress
from belated.client.recorder import Recorder, RecorderStats
from belated.client.rows import dict_item, frame_items, plain, rfc3339
from belated.client.windows import BASE_COLUMNS, flatten_window

__all__ = [
    "ANSWER_KEYS",
    "BASE_COLUMNS",
    "DEFAULT_BATCH",
    "MAYBE_SENT",
    "NOT_SENT",
    "BelatedError",
    "Client",
    "Progress",
    "Recorder",
    "RecorderStats",
    "Unreachable",
    "dict_item",
    "flatten_window",
    "frame_items",
    "plain",
    "rfc3339",
]
