"""F-beta in both spellings (belated/stats/fbeta.py)."""

from __future__ import annotations

import math

import pytest
from hypothesis import given
from hypothesis import strategies as st
from sklearn import metrics

from belated.stats.fbeta import (
    beta_from_precision_weight,
    fbeta,
    fbeta_from_counts,
    fbeta_from_pr,
    precision_weight_from_beta,
    resolve_beta,
)
from belated.stats.measures import precision, recall

# scikit-learn user guide, "Precision, recall and F-measures" (binary example):
# y_true = [0, 1, 0, 1], y_pred = [0, 1, 0, 0].
GUIDE_TRUE = [0, 1, 0, 1]
GUIDE_PRED = [0, 1, 0, 0]


def _guide_counts() -> tuple[int, int, int]:
    pairs = list(zip(GUIDE_TRUE, GUIDE_PRED, strict=True))
    return pairs.count((1, 1)), pairs.count((0, 1)), pairs.count((1, 0))


def test_user_guide_example_in_the_beta_form() -> None:
    # scikit-learn user guide: P = 1.0, R = 0.5, F1 = 0.667, F0.5 = 0.833, F2 = 0.556.
    tp, fp, fn = _guide_counts()
    assert precision(tp, fp).value == 1.0
    assert recall(tp, fn).value == 0.5
    expected = {1.0: 0.667, 0.5: 0.833, 2.0: 0.556}
    for beta, value in expected.items():
        assert fbeta(tp, fp, fn, beta=beta).value == pytest.approx(value, abs=5e-4)
        # scikit-learn itself as the reference library, to full precision.
        reference = metrics.fbeta_score(GUIDE_TRUE, GUIDE_PRED, beta=beta)
        assert fbeta(tp, fp, fn, beta=beta).value == pytest.approx(reference, rel=1e-12)


def test_user_guide_example_in_the_alpha_form() -> None:
    # van Rijsbergen (1979), Information Retrieval, 2nd ed., ch. 7: F = 1/(a/P + (1-a)/R) with
    # a = 1/(1+beta^2) gives the same three numbers as the user guide's beta form.
    tp, fp, fn = _guide_counts()
    p, r = precision(tp, fp).value, recall(tp, fn).value
    assert p is not None and r is not None
    for beta, value in {1.0: 0.667, 0.5: 0.833, 2.0: 0.556}.items():
        alpha = 1.0 / (1.0 + beta**2)
        assert fbeta_from_pr(p, r, precision_weight=alpha) == pytest.approx(value, abs=5e-4)
        assert fbeta(tp, fp, fn, precision_weight=alpha).value == pytest.approx(
            fbeta(tp, fp, fn, beta=beta).value, rel=1e-12
        )


def test_documented_mapping_between_beta_and_alpha() -> None:
    # van Rijsbergen (1979), ch. 7: alpha = 1/(1 + beta^2).
    assert precision_weight_from_beta(2.0) == pytest.approx(0.2)
    assert precision_weight_from_beta(1.0) == pytest.approx(0.5)
    assert precision_weight_from_beta(0.5) == pytest.approx(0.8)
    assert beta_from_precision_weight(0.2) == pytest.approx(2.0)
    assert resolve_beta(precision_weight=0.8) == pytest.approx(0.5)


def test_alpha_of_one_half_is_not_beta_of_one_half() -> None:
    # The mix-up the API guards against: the two spellings of 0.5 weigh differently.
    assert resolve_beta(precision_weight=0.5) == pytest.approx(1.0)
    assert resolve_beta(beta=0.5) == 0.5


@pytest.mark.parametrize(
    ("beta", "alpha", "message"),
    [
        (1.0, 0.5, "not both"),
        (0.0, None, "positive finite"),
        (-1.0, None, "positive finite"),
        (math.inf, None, "positive finite"),
        (math.nan, None, "positive finite"),
        (None, 0.0, "open interval"),
        (None, 1.0, "open interval"),
        (None, 1.5, "open interval"),
        (None, math.nan, "open interval"),
    ],
)
def test_resolve_beta_refuses_bad_input(beta, alpha, message: str) -> None:
    with pytest.raises(ValueError, match=message):
        resolve_beta(beta, alpha)


def test_resolve_beta_defaults_to_one() -> None:
    assert resolve_beta() == 1.0


@given(
    st.integers(0, 10_000),
    st.integers(0, 10_000),
    st.integers(0, 10_000),
    st.floats(0.05, 20.0),
)
def test_fbeta_lies_between_precision_and_recall(tp: int, fp: int, fn: int, beta: float) -> None:
    p, r = precision(tp, fp).value, recall(tp, fn).value
    f = fbeta_from_counts(tp, fp, fn, beta)
    if p is not None and r is not None:
        assert f is not None
        assert min(p, r) - 1e-12 <= f <= max(p, r) + 1e-12
        # Both forms agree wherever both are defined.
        assert fbeta_from_pr(p, r, beta=beta) == pytest.approx(f, rel=1e-9, abs=1e-12)
