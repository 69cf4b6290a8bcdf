"""One window's JSON-ready summary (belated/stats/summary.py)."""

from __future__ import annotations

import json
from typing import Any

import numpy as np
import pytest

from belated.stats import measures
from belated.stats.calibration import brier, ece, log_loss
from belated.stats.intervals import proportion_interval, proportion_interval_arrays, z_value
from belated.stats.ranking import average_precision, roc_auc
from belated.stats.summary import BINARY_MEASURES, summarise, summarise_many
from belated.stats.window import WindowStats

from .builders import breast_cancer_scores, random_rows, window_from

DESIGN_TABLE = ["precision", "recall", "fbeta", "accuracy", "specificity", "npv",
                "balanced_accuracy", "mcc", "positive_rate", "prevalence", "roc_auc",
                "average_precision", "brier", "log_loss", "ece"]  # fmt: skip


def _plain(obj: Any) -> None:
    """Fail on anything json would not write as is (numpy scalars, arrays, NaN)."""
    if isinstance(obj, dict):
        for key, value in obj.items():
            assert type(key) is str
            _plain(value)
    elif isinstance(obj, list):
        for value in obj:
            _plain(value)
    else:
        assert obj is None or type(obj) in (float, int, str, bool), type(obj)
        if type(obj) is float:
            assert obj == obj and abs(obj) != float("inf")


def _window(seed: int = 1, n: int = 3000) -> WindowStats:
    return WindowStats.from_rows(**random_rows(np.random.default_rng(seed), n))


def test_every_measure_of_the_design_table_is_present_and_json_ready() -> None:
    out = summarise(_window(), baseline_prior=0.2)
    assert list(out["measures"]) == DESIGN_TABLE == list(BINARY_MEASURES)
    _plain(out)
    json.dumps(out, allow_nan=False)
    assert set(out) == {"confusion", "measures", "implied", "bounds"}
    assert set(out["implied"]) == {"precision", "recall", "fbeta", "prevalence", "prior_em"}
    assert set(out["bounds"]) == {"precision", "recall", "fbeta"}
    for name, value in out["measures"].items():
        assert value["value"] is not None, name
        if value["low"] is not None:
            assert value["low"] <= value["high"]


def test_an_empty_window_is_all_undefined_with_reasons() -> None:
    out = summarise(WindowStats.empty())
    _plain(out)
    for name, value in out["measures"].items():
        assert value["value"] is None and value["low"] is None and value["high"] is None, name
        assert isinstance(value["reason"], str) and value["reason"]
    assert out["measures"]["precision"]["reason"] == "no predicted positives"
    assert out["measures"]["positive_rate"]["reason"] == "no predictions"
    assert out["bounds"] is None
    assert out["implied"]["precision"] == {"value": None, "reason": "no predictions"}


def test_values_agree_with_the_measure_functions() -> None:
    y, p = breast_cancer_scores()
    stats = window_from(y, p)
    out = summarise(stats, beta=2.0, interval="clopper-pearson", confidence=0.9)["measures"]
    points = measures.binary_measures(stats.tp, stats.fp, stats.fn, stats.tn, beta=2.0)
    for name, value in points.items():
        assert out[name]["value"] == pytest.approx(value.value, rel=1e-15), name
    assert (out["precision"]["low"], out["precision"]["high"]) == proportion_interval(
        stats.tp, stats.tp + stats.fp, method="clopper-pearson", confidence=0.9
    )
    assert out["roc_auc"]["value"] == roc_auc(stats.hist_pos, stats.hist_neg).value
    assert (
        out["average_precision"]["value"] == average_precision(stats.hist_pos, stats.hist_neg).value
    )
    assert out["brier"]["value"] == brier(stats.brier_sum, stats.n_labelled).value
    assert out["log_loss"]["value"] == log_loss(stats.logloss_sum, stats.n_labelled).value
    assert out["ece"]["value"] == ece(stats.hist_pos, stats.ssum_pos, stats.hist_neg,
                                      stats.ssum_neg).value  # fmt: skip


@pytest.mark.parametrize("interval", ["wilson", "clopper-pearson", "jeffreys"])
def test_proportions_carry_the_chosen_interval(interval: str) -> None:
    stats = _window(2)
    out = summarise(stats, interval=interval, confidence=0.8)["measures"]
    expected = proportion_interval(stats.n_pred_pos, stats.n_pred, method=interval, confidence=0.8)
    assert (out["positive_rate"]["low"], out["positive_rate"]["high"]) == expected


def test_posterior_intervals_are_reproducible_and_seeded() -> None:
    stats = _window(3)
    first = summarise(stats)["measures"]
    assert summarise(stats)["measures"] == first
    other = summarise(stats, seed=1)["measures"]
    assert other["fbeta"]["low"] != first["fbeta"]["low"]
    assert other["precision"] == first["precision"]
    wider = summarise(stats, confidence=0.99, resamples=2000)["measures"]["mcc"]
    assert wider["high"] - wider["low"] > first["mcc"]["high"] - first["mcc"]["low"]


def test_measure_filter_and_bad_arguments() -> None:
    stats = _window(4)
    out = summarise(stats, measures={"recall", "mcc"})
    assert list(out["measures"]) == ["recall", "mcc"]
    for kwargs in ({"measures": {"recall", "f1"}}, {"interval": "wald"}, {"confidence": 0.0},
                   {"resamples": 10_001}, {"beta": -1.0}, {"seed": -1}):  # fmt: skip
        with pytest.raises(ValueError):
            summarise(stats, **kwargs)


def test_bounds_are_present_only_with_unlabelled_predictions() -> None:
    y, p = breast_cancer_scores()
    assert summarise(window_from(y, p))["bounds"] is None
    unlabelled = np.arange(y.size) % 5 == 0
    out = summarise(window_from(y, p, unlabelled=unlabelled))
    precision = out["measures"]["precision"]["value"]
    assert out["bounds"]["precision"]["low"] <= precision <= out["bounds"]["precision"]["high"]


def test_numpy_scalars_from_a_store_do_not_leak_into_the_answer() -> None:
    stats = _window(5)
    for name in ("n_pred", "n_labelled", "n_pred_pos", "tp", "fp", "fn", "tn"):
        setattr(stats, name, np.int64(getattr(stats, name)))
    for name in ("brier_sum", "logloss_sum", "exp_tp", "exp_fp", "exp_fn", "exp_tn"):
        setattr(stats, name, np.float64(getattr(stats, name)))
    out = summarise(stats, baseline_prior=0.3)
    _plain(out)
    assert out == summarise(_window(5), baseline_prior=0.3)


def test_summarise_many_gives_each_window_its_own_answer() -> None:
    # Batching shares arithmetic only: a window's answer does not depend on its neighbours.
    windows = [_window(seed, n) for seed, n in [(10, 50), (11, 400), (12, 3000)]]
    windows.append(WindowStats.empty())
    options: list[dict[str, Any]] = [{}, {"interval": "jeffreys", "beta": 2.0, "seed": 9}]
    for kwargs in options:
        together = summarise_many(windows, **kwargs)
        assert together == [summarise(w, **kwargs) for w in windows]
        assert summarise_many(windows[::-1], **kwargs) == together[::-1]
    assert summarise_many([]) == []


@pytest.mark.parametrize("interval", ["wilson", "clopper-pearson", "jeffreys"])
def test_vectorised_proportion_intervals_equal_the_scalar_ones(interval: str) -> None:
    x = np.array([0, 1, 5, 29, 30, 81, 0])
    n = np.array([30, 30, 30, 30, 30, 263, 0])
    low, high = proportion_interval_arrays(x, n, method=interval, confidence=0.9, z=z_value(0.9))
    for i in range(len(x) - 1):
        expected = proportion_interval(int(x[i]), int(n[i]), method=interval, confidence=0.9)
        assert (low[i], high[i]) == pytest.approx(expected, rel=1e-14, abs=1e-16)
    assert np.isnan(low[-1]) and np.isnan(high[-1])
