"""The pure validation of prediction and label batches (ingest/validate.py), without a store.

The contract is DESIGN.md: a batch is checked whole before anything is written; every refusal
is a 422 problem listing each bad item by index and field; class values are strings and
integers are accepted as their decimal string (`1` and `"1"` are one class); a `scores` map
must sum to 1 within 1e-4 and is renormalised; a prediction time more than a day ahead of the
service's clock is refused; a label without `ts` takes the time it was received.
"""

from __future__ import annotations

import math
from datetime import UTC, datetime, timedelta
from typing import Any

import pytest

from belated.errors import Invalid, Problem
from belated.ingest.validate import (
    MAX_ERRORS,
    MAX_ID,
    MAX_TAG_LEN,
    MAX_TAGS,
    ModelSpec,
    validate_labels,
    validate_predictions,
)

NOW = datetime(2026, 11, 15, 12, 0, tzinfo=UTC)
BINARY = ModelSpec(kind="binary", classes=("0", "1"), positive="1", threshold=0.5)
THREE = ("chair", "sofa", "table")  # what a furniture shop's order is mostly about
MULTI = ModelSpec(kind="multiclass", classes=THREE, positive=None, threshold=0.5)
AHEAD = "2026-11-16T12:00:01Z"  # NOW + a day + a second
BAD_AT = 2  # the index of the one bad item in a batch of good ones
Item = dict[str, Any]


def good_prediction(n: int) -> Item:
    return {"id": f"order-{n}", "ts": "2026-11-15T10:00:00Z", "score": 0.25}


def good_multiclass(n: int) -> Item:
    return {"id": f"order-{n}", "ts": "2026-11-15T10:00:00Z", "scores": three(0.2, 0.5, 0.3)}


def three(chair: float, sofa: float, table: float) -> dict[str, float]:
    return {"chair": chair, "sofa": sofa, "table": table}


def predictions(items: list[Any], spec: ModelSpec = BINARY, max_batch: int = 10_000) -> Any:
    return validate_predictions({"predictions": items}, spec, now=NOW, max_batch=max_batch)


def labels(items: list[Any], spec: ModelSpec = BINARY, max_batch: int = 10_000) -> Any:
    return validate_labels({"labels": items}, spec, now=NOW, max_batch=max_batch)


def refusal(call: Any, items: list[Any], spec: ModelSpec) -> Invalid:
    with pytest.raises(Invalid) as raised:
        call(items, spec)
    return raised.value


def batch_with(bad: Any, make: Any = good_prediction) -> list[Any]:
    """Four good items with `bad` at index BAD_AT."""
    items: list[Any] = [make(n) for n in range(4)]
    items[BAD_AT] = bad
    return items


def changed(base: Item, **fields: Any) -> Item:
    """`base` with fields replaced; a field given as ... is removed."""
    out = {**base, **fields}
    return {k: v for k, v in out.items() if v is not ...}


P = good_prediction(BAD_AT)
M = good_multiclass(BAD_AT)

# (case, spec, bad item, the field named): every one is refused at index BAD_AT, alone
PREDICTION_REFUSALS: list[tuple[str, ModelSpec, Any, str]] = [
    ("not an object", BINARY, ["order-2", 0.3], ""),
    ("no id", BINARY, changed(P, id=...), "id"),
    ("empty id", BINARY, changed(P, id=""), "id"),
    ("id of 129 characters", BINARY, changed(P, id="x" * (MAX_ID + 1)), "id"),
    ("id with NUL", BINARY, changed(P, id="order\x002"), "id"),
    ("id true", BINARY, changed(P, id=True), "id"),
    ("id a list", BINARY, changed(P, id=["order-2"]), "id"),
    ("no ts", BINARY, changed(P, ts=...), "ts"),
    ("ts not a time", BINARY, changed(P, ts="yesterday"), "ts"),
    ("ts an object", BINARY, changed(P, ts={"at": 1}), "ts"),
    ("ts a day and a second ahead", BINARY, changed(P, ts=AHEAD), "ts"),
    ("no score", BINARY, changed(P, score=...), "score"),
    ("score null", BINARY, changed(P, score=None), "score"),
    ("score above 1", BINARY, changed(P, score=1.0001), "score"),
    ("score below 0", BINARY, changed(P, score=-0.0001), "score"),
    ("score NaN", BINARY, changed(P, score=float("nan")), "score"),
    ("score infinite", BINARY, changed(P, score=float("inf")), "score"),
    ("score a string", BINARY, changed(P, score="0.3"), "score"),
    ("score true", BINARY, changed(P, score=True), "score"),
    ("score an integer past a double", BINARY, changed(P, score=10**400), "score"),
    ("scores empty", BINARY, changed(P, score=..., scores={}), "scores"),
    ("scores a list", BINARY, changed(P, score=..., scores=[0.7, 0.3]), "scores"),
    ("scores missing a class", BINARY, changed(P, scores={"1": 1.0}), "scores"),
    ("scores with another class", BINARY, changed(P, scores={"0": 0.5, "1": 0.4, "2": 0.1}),
     "scores"),
    ("scores summing to 0.9998", BINARY, changed(P, scores={"0": 0.2998, "1": 0.7}), "scores"),
    ("scores summing to 1.0002", BINARY, changed(P, scores={"0": 0.3002, "1": 0.7}), "scores"),
    ("a scores value above 1", BINARY, changed(P, scores={"0": -0.5, "1": 1.5}), "scores.0"),
    ("a scores value NaN", BINARY, changed(P, scores={"0": float("nan"), "1": 1.0}), "scores.0"),
    ("predicted not a class", BINARY, changed(P, predicted="2"), "predicted"),
    ("predicted true", BINARY, changed(P, predicted=True), "predicted"),
    ("predicted 1.0", BINARY, changed(P, predicted=1.0), "predicted"),
    ("multiclass with a score", MULTI, changed(M, scores=..., score=0.5), "score"),
    ("multiclass without scores", MULTI, changed(M, scores=...), "scores"),
    ("multiclass scores missing a class", MULTI, changed(M, scores={"chair": 0.5, "sofa": 0.5}),
     "scores"),
    ("multiclass predicted not a class", MULTI, changed(M, predicted="lamp"), "predicted"),
    ("tags a list", BINARY, changed(P, tags=["north"]), "tags"),
    ("tags a string", BINARY, changed(P, tags="region=north"), "tags"),
    ("17 tags", BINARY, changed(P, tags={f"k{i}": "v" for i in range(MAX_TAGS + 1)}), "tags"),
    ("tag key with a colon", BINARY, changed(P, tags={"re:gion": "north"}), "tags.re:gion"),
    ("empty tag key", BINARY, changed(P, tags={"": "north"}), "tags."),
    ("tag key of 65 characters", BINARY, changed(P, tags={"k" * 65: "v"}), "tags." + "k" * 64),
    ("tag key with NUL", BINARY, changed(P, tags={"reg\x00ion": "north"}), "tags.reg\x00ion"),
    ("tag value of 65 characters", BINARY, changed(P, tags={"region": "n" * (MAX_TAG_LEN + 1)}),
     "tags.region"),
    ("tag value with NUL", BINARY, changed(P, tags={"region": "no\x00rth"}), "tags.region"),
    ("tag value an object", BINARY, changed(P, tags={"region": {"name": "north"}}), "tags.region"),
    ("tag value true", BINARY, changed(P, tags={"gift": True}), "tags.gift"),
    ("tag value NaN", BINARY, changed(P, tags={"basket": float("nan")}), "tags.basket"),
]  # fmt: skip


@pytest.mark.parametrize(
    ("spec", "bad", "field"),
    [case[1:] for case in PREDICTION_REFUSALS],
    ids=[case[0] for case in PREDICTION_REFUSALS],
)
def test_a_bad_prediction_is_refused_by_index_and_field(
    spec: ModelSpec, bad: Any, field: str
) -> None:
    make = good_multiclass if spec is MULTI else good_prediction
    problem = refusal(predictions, batch_with(bad, make), spec)
    assert problem.status == 422
    assert [(e["index"], e["field"]) for e in problem.errors] == [(BAD_AT, field)]
    assert problem.errors[0]["reason"]
    assert f"item {BAD_AT}, field '{field}'" in str(problem)
    assert "Nothing was stored" in str(problem)


LABEL_REFUSALS: list[tuple[str, Any, str]] = [
    ("not an object", "order-2", ""),
    ("no id", {"actual": "1"}, "id"),
    ("id with NUL", {"id": "order\x002", "actual": "1"}, "id"),
    ("id of 129 characters", {"id": "x" * (MAX_ID + 1), "actual": "1"}, "id"),
    ("no actual", {"id": "order-2"}, "actual"),
    ("actual null", {"id": "order-2", "actual": None}, "actual"),
    ("actual not a class", {"id": "order-2", "actual": "2"}, "actual"),
    ("actual true", {"id": "order-2", "actual": True}, "actual"),
    ("actual 1.0", {"id": "order-2", "actual": 1.0}, "actual"),
    ("ts not a time", {"id": "order-2", "actual": "1", "ts": "soon"}, "ts"),
    ("ts a day and a second ahead", {"id": "order-2", "actual": "1", "ts": AHEAD}, "ts"),
]  # fmt: skip


@pytest.mark.parametrize(
    ("bad", "field"), [case[1:] for case in LABEL_REFUSALS], ids=[c[0] for c in LABEL_REFUSALS]
)
def test_a_bad_label_is_refused_by_index_and_field(bad: Any, field: str) -> None:
    items = batch_with(bad, lambda n: {"id": f"order-{n}", "actual": "0"})
    problem = refusal(labels, items, BINARY)
    assert problem.status == 422
    assert [(e["index"], e["field"]) for e in problem.errors] == [(BAD_AT, field)]
    assert f"item {BAD_AT}, field '{field}'" in str(problem)


def test_every_bad_field_of_every_item_is_listed_in_order() -> None:
    items = [
        good_prediction(0),
        {"id": "", "ts": "never", "score": 2},
        good_prediction(2),
        changed(good_prediction(3), tags={"a:b": "c"}),
    ]
    problem = refusal(predictions, items, BINARY)
    assert [(e["index"], e["field"]) for e in problem.errors] == [
        (1, "id"),
        (1, "ts"),
        (1, "score"),
        (3, "tags.a:b"),
    ]
    assert str(problem).startswith("4 invalid field(s); first: item 1, field 'id'")


def test_the_list_of_errors_stops_at_a_hundred() -> None:
    problem = refusal(predictions, [{"id": f"o-{n}"} for n in range(MAX_ERRORS + 50)], BINARY)
    assert len(problem.errors) == MAX_ERRORS == 100


@pytest.mark.parametrize("body", [None, [], {"predictions": {}}, {"items": []}, "predictions"])
def test_a_body_without_the_list_names_the_request_and_the_key(body: Any) -> None:
    with pytest.raises(Invalid) as raised:
        validate_predictions(body, BINARY, now=NOW, max_batch=10)
    assert raised.value.errors == [
        {"index": None, "field": "predictions", "reason": raised.value.errors[0]["reason"]}
    ]
    assert "the request, field 'predictions'" in str(raised.value)


def test_a_batch_over_the_limit_is_a_413_naming_the_setting() -> None:
    with pytest.raises(Problem) as raised:
        labels([{"id": f"o-{n}", "actual": "1"} for n in range(6)], max_batch=5)
    assert raised.value.status == 413 and not isinstance(raised.value, Invalid)
    assert "6 labels" in str(raised.value) and "BELATED_MAX_BATCH" in str(raised.value)
    assert len(labels([{"id": f"o-{n}", "actual": "1"} for n in range(5)], max_batch=5)) == 5


# --- accepted shapes ---------------------------------------------------------------------------


def test_a_binary_score_is_kept_and_the_threshold_decides_the_class() -> None:
    spec = ModelSpec(
        kind="binary", classes=("kept", "returned"), positive="returned", threshold=0.4
    )
    items = [
        {"id": "below", "ts": "2026-11-15T10:00:00Z", "score": 0.3999},
        {"id": "at", "ts": "2026-11-15T10:00:00Z", "score": 0.4},  # score >= threshold
        {"id": "above", "ts": "2026-11-15T10:00:00Z", "score": 1},
        {"id": "zero", "ts": "2026-11-15T10:00:00Z", "score": 0},
    ]
    out = predictions(items, spec)
    assert [(p.pid, p.score, p.predicted, p.scores) for p in out] == [
        ("below", 0.3999, "kept", None),
        ("at", 0.4, "returned", None),
        ("above", 1.0, "returned", None),
        ("zero", 0.0, "kept", None),
    ]
    assert all(isinstance(p.score, float) for p in out)


def test_a_given_predicted_class_wins_over_the_threshold() -> None:
    (p,) = predictions([changed(P, score=0.9, predicted="0")])
    assert (p.score, p.predicted) == (0.9, "0")


def test_integer_classes_and_ids_are_stored_as_their_decimal_strings() -> None:
    (p,) = predictions([{"id": 1042, "ts": "2026-11-15T10:00:00Z", "score": 0.2, "predicted": 1}])
    assert (p.pid, p.predicted) == ("1042", "1")
    (label,) = labels([{"id": 1042, "actual": 0}])
    assert (label.pid, label.actual) == ("1042", "0")
    spec = ModelSpec(kind="multiclass", classes=("1", "2", "3"), positive=None, threshold=0.5)
    (q,) = predictions(
        [{"id": "o", "ts": "2026-11-15T10:00:00Z", "scores": {"1": 0.2, "2": 0.5, "3": 0.3}}], spec
    )
    assert q.predicted == "2" and q.scores == {"1": 0.2, "2": 0.5, "3": 0.3}


def test_a_binary_scores_map_keeps_the_renormalised_positive_probability() -> None:
    # sums to 1 + 0.9e-4: inside the 1e-4 tolerance, so accepted and divided by its sum
    (p,) = predictions([changed(P, score=..., scores={"0": 0.30009, "1": 0.7})])
    assert p.scores is None
    assert p.score == pytest.approx(0.7 / 1.00009, rel=1e-15)
    assert p.predicted == "1"


def test_a_multiclass_scores_map_is_renormalised_and_its_largest_class_predicted() -> None:
    raw = three(0.2, 0.50005, 0.3)  # sums to 1.00005
    (p,) = predictions([changed(M, scores=raw)], MULTI)
    assert p.scores is not None and p.scores.keys() == set(THREE)
    assert math.fsum(p.scores.values()) == pytest.approx(1.0, abs=1e-15)
    for c in THREE:
        assert p.scores[c] == pytest.approx(raw[c] / 1.00005, rel=1e-15)
    assert p.predicted == "sofa" and p.score == max(p.scores.values())


def test_scores_just_inside_the_tolerance_are_accepted_and_just_outside_refused() -> None:
    for total, accepted in ((1 - 0.99e-4, True), (1 + 0.99e-4, True), (1 - 1.01e-4, False)):
        item = changed(M, scores=three(0.25, 0.25, total - 0.5))
        if accepted:
            (p,) = predictions([item], MULTI)
            assert p.scores is not None
            assert math.fsum(p.scores.values()) == pytest.approx(1.0, abs=1e-15)
        else:
            assert refusal(predictions, [item], MULTI).errors[0]["field"] == "scores"


def test_a_tie_between_classes_goes_to_the_class_listed_first() -> None:
    (p,) = predictions([changed(M, scores=three(0.1, 0.45, 0.45))], MULTI)
    assert p.predicted == "sofa"


def test_tags_numbers_become_strings_and_no_tags_is_none() -> None:
    out = predictions(
        [
            changed(good_prediction(0), tags={"region": "north", "items": 3, "basket": 120.5}),
            changed(good_prediction(1), tags={}),
            changed(good_prediction(2), tags=None),
            good_prediction(3),
        ]
    )
    assert out[0].tags == {"region": "north", "items": "3", "basket": "120.5"}
    assert [p.tags for p in out[1:]] == [None, None, None]
    longest = {"k" * MAX_TAG_LEN: "v" * MAX_TAG_LEN}
    assert predictions([changed(P, tags=longest)])[0].tags == longest


def test_a_tag_set_seen_valid_is_not_taken_for_one_that_compares_equal(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """Valid string tag sets are remembered across batches; 1, 1.0 and True hash and compare
    alike in Python but are stored as "1", "1.0" and refused, so a remembered set must
    never answer for them, and a refused set is refused every time."""
    from belated.ingest import validate

    seen: dict[Any, Any] = {}
    monkeypatch.setattr(validate, "_TAGS_SEEN", seen)  # empty, whatever ran before
    for _ in range(2):  # the second batch is answered from what the first left
        out = predictions([changed(good_prediction(n), tags={"size": "1"}) for n in range(3)])
        assert [p.tags for p in out] == [{"size": "1"}] * 3
        assert seen == {(("size", "1"),): {"size": "1"}}  # remembered, and only it
    assert predictions([changed(P, tags={"size": 1})])[0].tags == {"size": "1"}
    assert predictions([changed(P, tags={"size": 1.0})])[0].tags == {"size": "1.0"}
    for _ in range(2):
        raised = refusal(predictions, [changed(P, tags={"size": True})], BINARY)
        assert raised.errors is not None and raised.errors[0]["field"] == "tags.size"
        raised = refusal(predictions, [changed(P, tags={"a:b": "x"})], BINARY)
        assert raised.errors is not None and raised.errors[0]["field"] == "tags.a:b"
        raised = refusal(predictions, [changed(P, tags={"size": ["1"]})], BINARY)
        assert raised.errors is not None and raised.errors[0]["field"] == "tags.size"


@pytest.mark.parametrize(
    ("ts", "expected"),
    [
        ("2026-11-15T10:00:00Z", datetime(2026, 11, 15, 10, tzinfo=UTC)),
        ("2026-11-15T10:00:00z", datetime(2026, 11, 15, 10, tzinfo=UTC)),
        ("2026-11-15T11:30:00+01:30", datetime(2026, 11, 15, 10, tzinfo=UTC)),
        ("2026-11-15T10:00:00", datetime(2026, 11, 15, 10, tzinfo=UTC)),  # no offset: UTC
        (1_763_200_800, datetime(2025, 11, 15, 10, tzinfo=UTC)),  # Unix seconds
        ("2026-11-16T12:00:00Z", NOW + timedelta(days=1)),  # exactly a day ahead: allowed
    ],
)
def test_prediction_times_are_read_as_utc(ts: Any, expected: datetime) -> None:
    (p,) = predictions([changed(P, ts=ts)])
    assert p.ts == expected and p.ts.utcoffset() == timedelta(0)


def test_an_id_of_128_characters_is_accepted() -> None:
    assert predictions([changed(P, id="x" * MAX_ID)])[0].pid == "x" * MAX_ID


def test_a_repeated_prediction_is_kept_once_and_a_conflicting_one_refused() -> None:
    same = [good_prediction(0), good_prediction(1), good_prediction(0)]
    assert [p.pid for p in predictions(same)] == ["order-0", "order-1"]
    conflict = [good_prediction(0), good_prediction(1), changed(good_prediction(0), score=0.9)]
    problem = refusal(predictions, conflict, BINARY)
    assert [(e["index"], e["field"]) for e in problem.errors] == [(2, "id")]
    assert "also at index 0" in problem.errors[0]["reason"]
    # the integer id 7 and the string "7" are one id
    both = [changed(good_prediction(0), id=7), changed(good_prediction(0), id="7", score=0.9)]
    assert refusal(predictions, both, BINARY).errors[0]["index"] == 1


def test_a_label_without_ts_takes_the_time_of_receipt() -> None:
    given = datetime(2026, 11, 14, 8, tzinfo=UTC)
    out = labels(
        [{"id": "a", "actual": "1"}, {"id": "b", "actual": "0", "ts": "2026-11-14T08:00Z"}]
    )
    assert [(x.pid, x.actual, x.ts) for x in out] == [("a", "1", NOW), ("b", "0", given)]


def test_a_repeated_label_is_kept_and_a_conflicting_one_refused() -> None:
    same = [{"id": "a", "actual": "1"}, {"id": "a", "actual": 1}]
    assert [(x.pid, x.actual) for x in labels(same)] == [("a", "1"), ("a", "1")]
    problem = refusal(labels, [{"id": "a", "actual": "1"}, {"id": "a", "actual": "0"}], BINARY)
    assert [(e["index"], e["field"]) for e in problem.errors] == [(1, "id")]
    assert "also at index 0" in problem.errors[0]["reason"]


def test_an_empty_batch_is_accepted_and_yields_nothing() -> None:
    assert predictions([]) == [] and labels([]) == []
