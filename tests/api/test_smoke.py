"""A first round trip on both stores: create a model, send predictions and labels."""

from tests.conftest import Tenant


def test_round_trip_counts(tenant: Tenant) -> None:
    c = tenant.client
    assert c.post("/v1/models", json={"name": "returns-v2"}).status_code == 201
    r = c.post(
        "/v1/models/returns-v2/predictions",
        json={
            "predictions": [
                {"id": "a", "ts": "2026-11-01T10:00:00Z", "score": 0.8},
                {"id": "b", "ts": "2026-11-01T11:00:00Z", "score": 0.1},
            ]
        },
    )
    assert r.json() == {"accepted": 2, "duplicates": 0}
    r = c.post(
        "/v1/models/returns-v2/labels",
        json={"labels": [{"id": "a", "actual": 1}, {"id": "zz", "actual": 0}]},
    )
    assert r.json() == {"matched": 1, "pending": 1, "corrected": 0, "unchanged": 0, "expired": 0}
    got = c.get("/v1/models/returns-v2").json()
    assert got["counts"] == {"predictions": 2, "labelled": 1, "pending_labels": 1}
