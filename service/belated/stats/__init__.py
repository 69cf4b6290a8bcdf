"""Pure statistics of belated: counts and histograms in, values and intervals out.

No I/O, no database, no web framework, no global state. The API, jobs, dashboard and CLI
all call these functions, so every surface shows the same numbers.
"""

from belated.stats.delays import DELAY_EDGES_HOURS, delay_bin, km_quantiles
from belated.stats.fbeta import resolve_beta
from belated.stats.intervals import proportion_interval
from belated.stats.ranking import score_bin
from belated.stats.summary import summarise, summarise_multiclass
from belated.stats.values import Value
from belated.stats.window import WindowStats

__all__ = [
    "DELAY_EDGES_HOURS",
    "Value",
    "WindowStats",
    "delay_bin",
    "km_quantiles",
    "proportion_interval",
    "resolve_beta",
    "score_bin",
    "summarise",
    "summarise_multiclass",
]
