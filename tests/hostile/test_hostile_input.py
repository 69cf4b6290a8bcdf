"""Hostile input: endless bodies, deep or huge JSON, unusual unicode, SQL metacharacters and
ids that differ only by case or whitespace. Each is refused with a clear 4xx (and nothing is
stored) or stored exactly as sent (read back with SQL and compared byte for byte)."""

from __future__ import annotations

import json
import select
import socket
import time
from collections.abc import Iterator
from typing import Any

import httpx
import pytest
from fastapi.testclient import TestClient
from sqlalchemy import Engine

from belated.app import create_app
from belated.config import Settings
from tests.conftest import LiveServer, Tenant, make_tenant
from tests.support import (
    Model,
    counts,
    create_model,
    label,
    prediction,
    prediction_row,
    predictions,
    rows,
)

LIMIT = 4096
PIECE = 1000  # bytes of body per chunk the endless client sends


class CountingReceive:
    """ASGI wrapper outside the app: records the size of every body message the app pulls."""

    def __init__(self, app: Any) -> None:
        self.app = app
        self.pulled: list[int] = []

    async def __call__(self, scope: Any, receive: Any, send: Any) -> None:
        async def counted() -> Any:
            message = await receive()
            if message["type"] == "http.request":
                self.pulled.append(len(message.get("body", b"")))
            return message

        await self.app(scope, counted, send)


@pytest.fixture()
def small_live(
    store_url: str, engine: Engine, sessions: Any
) -> Iterator[tuple[LiveServer, CountingReceive, Tenant, Model]]:
    """uvicorn on loopback serving an app whose body limit is 4096 bytes, with a model."""
    settings = Settings(database_url=store_url, jobs=False, max_body_bytes=LIMIT)
    counting = CountingReceive(create_app(settings, engine=engine, jobs=False))
    with LiveServer(counting) as server, httpx.Client(base_url=server.url, timeout=30) as http:
        tenant = make_tenant(sessions, http)
        model = create_model(tenant, engine)
        counting.pulled.clear()
        yield server, counting, tenant, model


def _chunk(data: bytes) -> bytes:
    return f"{len(data):x}\r\n".encode() + data + b"\r\n"


def _read_response(sock: socket.socket, timeout: float = 10.0) -> tuple[int, dict[str, str], bytes]:
    """Read one HTTP/1.1 response (headers and a Content-Length body) from a raw socket."""
    sock.settimeout(timeout)
    data = b""
    while b"\r\n\r\n" not in data:
        part = sock.recv(65536)
        if not part:
            break
        data += part
    head, _, body = data.partition(b"\r\n\r\n")
    lines = head.decode("latin-1").split("\r\n")
    status = int(lines[0].split()[1])
    headers = {
        k.strip().lower(): v.strip()
        for k, v in (line.split(":", 1) for line in lines[1:] if ":" in line)
    }
    want = int(headers.get("content-length", "0"))
    while len(body) < want:
        part = sock.recv(65536)
        if not part:
            break
        body += part
    return status, headers, body


def test_endless_chunked_body_is_refused_after_at_most_the_limit(
    small_live: tuple[LiveServer, CountingReceive, Tenant, Model], engine: Engine
) -> None:
    server, counting, tenant, model = small_live
    token = tenant.tokens["ingest"]
    item = json.dumps(prediction(0)).encode() + b","
    piece = (item * (PIECE // len(item) + 1))[:PIECE]
    willing = 64 * 1024 * 1024  # the client would go on to 64 MiB, or 20 s, never ending it
    with socket.create_connection(("127.0.0.1", server.port), timeout=10) as sock:
        sock.sendall(
            (
                f"POST /v1/models/{model.name}/predictions HTTP/1.1\r\n"
                f"Host: 127.0.0.1:{server.port}\r\nAuthorization: Bearer {token}\r\n"
                "Content-Type: application/json\r\nTransfer-Encoding: chunked\r\n\r\n"
            ).encode()
            + _chunk(b'{"predictions": [')
        )
        sent, started = 0, time.monotonic()
        answered = False
        while sent < willing and time.monotonic() - started < 20:
            if select.select([sock], [], [], 0.002)[0]:
                answered = True
                break
            try:
                sock.sendall(_chunk(piece))
            except (BrokenPipeError, ConnectionResetError):
                answered = True
                break
            sent += PIECE
        elapsed = time.monotonic() - started
        assert answered, f"no answer after sending {sent} bytes in {elapsed:.1f} s"
        status, headers, body = _read_response(sock)
    assert status == 413
    assert headers["content-type"].startswith("application/problem+json")
    problem = json.loads(body)
    assert problem["status"] == 413 and str(LIMIT) in problem["detail"]
    # the server answered long before the (never-ending) body could end
    assert sent < 1024 * 1024, sent
    # the limit stops reading at the message that crossed it: everything before it fits
    assert counting.pulled, "the app never read the body"
    assert sum(counting.pulled[:-1]) <= LIMIT < sum(counting.pulled), counting.pulled
    assert counts(engine, model.id)["predictions"] == 0


def test_declared_oversize_length_is_refused_before_any_body_byte(
    small_live: tuple[LiveServer, CountingReceive, Tenant, Model], engine: Engine
) -> None:
    server, counting, tenant, model = small_live
    with socket.create_connection(("127.0.0.1", server.port), timeout=10) as sock:
        sock.sendall(
            (
                f"POST /v1/models/{model.name}/predictions HTTP/1.1\r\n"
                f"Host: 127.0.0.1\r\nAuthorization: Bearer {tenant.tokens['ingest']}\r\n"
                "Content-Type: application/json\r\nContent-Length: 10485760\r\n\r\n"
            ).encode()
        )
        status, headers, body = _read_response(sock)  # no body byte was sent
    assert status == 413 and headers["content-type"].startswith("application/problem+json")
    assert counting.pulled == []
    assert counts(engine, model.id)["predictions"] == 0


@pytest.fixture()
def http(app: Any, sessions: Any) -> Iterator[Tenant]:
    """A tenant whose client shows a server error as a 500 answer, not a raised exception."""
    with TestClient(app, base_url="http://testserver", raise_server_exceptions=False) as c:
        yield make_tenant(sessions, c)


def _post_raw(tenant: Tenant, url: str, raw: bytes) -> httpx.Response:
    return tenant.client.post(url, content=raw, headers={"content-type": "application/json"})


def _item_json(**replace: str) -> str:
    """One prediction as JSON text with some values replaced by raw JSON fragments."""
    item = prediction(0, tags={"region": "north"})
    text = json.dumps(item)
    for key, fragment in replace.items():
        if key == "tags":
            text = text.replace('{"region": "north"}', fragment)
        else:
            text = text.replace(
                json.dumps(key) + ": " + json.dumps(item[key]), json.dumps(key) + ": " + fragment
            )
    return text


DEPTH = 100_000
HUGE = 15 * 1024 * 1024  # under the default 16 MiB body limit
# (case id, endpoint, raw body); every case must be a 4xx problem and store nothing
HOSTILE_BODIES: list[tuple[str, str, Any]] = [
    (
        "deep-arrays",
        "predictions",
        lambda: b'{"predictions": ' + b"[" * DEPTH + b"]" * DEPTH + b"}",
    ),
    (
        "deep-objects-in-tags",
        "predictions",
        lambda: (
            _item_json(tags='{"a": ' * DEPTH + "1" + "}" * DEPTH)
            .join(['{"predictions": [', "]}"])
            .encode()
        ),
    ),
    (
        "deep-arrays-in-labels",
        "labels",
        lambda: b'{"labels": [{"id": "order-0", "actual": ' + b"[" * DEPTH + b"]" * DEPTH + b"}]}",
    ),
    ("top-level-deep", "predictions", lambda: b"[" * DEPTH + b"]" * DEPTH),
    (
        "score-integer-of-400-digits",
        "predictions",
        lambda: ('{"predictions": [' + _item_json(score="1" + "0" * 400) + "]}").encode(),
    ),
    (
        "score-integer-of-5000-digits",
        "predictions",
        lambda: ('{"predictions": [' + _item_json(score="9" * 5000) + "]}").encode(),
    ),
    (
        "id-of-15-MiB",
        "predictions",
        lambda: ('{"predictions": [' + _item_json(id=json.dumps("r" * HUGE)) + "]}").encode(),
    ),
    (
        "tag-value-of-15-MiB",
        "predictions",
        lambda: (
            '{"predictions": [' + _item_json(tags=json.dumps({"region": "n" * HUGE})) + "]}"
        ).encode(),
    ),
    (
        "200000-tags",
        "predictions",
        lambda: (
            '{"predictions": ['
            + _item_json(tags=json.dumps({f"k{i}": "v" for i in range(200_000)}))
            + "]}"
        ).encode(),
    ),
    (
        "a-million-empty-items",
        "predictions",
        lambda: b'{"predictions": [' + b",".join([b"{}"] * 1_000_000) + b"]}",
    ),
    # 1e400 is JSON but no double: as a tag value it must not become the text "inf"
    (
        "tag-value-1e400",
        "predictions",
        lambda: ('{"predictions": [' + _item_json(tags='{"region": 1e400}') + "]}").encode(),
    ),
    (
        "lone-high-surrogate-in-id",
        "predictions",
        lambda: ('{"predictions": [' + _item_json(id='"\\ud800"') + "]}").encode(),
    ),
    (
        "lone-low-surrogate-in-tag-key",
        "predictions",
        lambda: ('{"predictions": [' + _item_json(tags='{"\\udfff": "north"}') + "]}").encode(),
    ),
    (
        "lone-surrogate-in-tag-value",
        "predictions",
        lambda: ('{"predictions": [' + _item_json(tags='{"region": "\\udbff"}') + "]}").encode(),
    ),
    (
        "lone-surrogate-in-label-id",
        "labels",
        lambda: b'{"labels": [{"id": "\\ud83d", "actual": 1}]}',
    ),
    (
        "raw-utf8-encoded-surrogate",
        "predictions",
        lambda: (
            ('{"predictions": [' + _item_json(id='"PLACE"') + "]}")
            .encode()
            .replace(b"PLACE", b"\xed\xa0\x80")
        ),
    ),
]


@pytest.mark.parametrize(
    "endpoint, make", [c[1:] for c in HOSTILE_BODIES], ids=[c[0] for c in HOSTILE_BODIES]
)
def test_deep_huge_or_unencodable_json_is_a_clear_4xx_and_stores_nothing(
    http: Tenant, engine: Engine, endpoint: str, make: Any
) -> None:
    model = create_model(http, engine)
    before = counts(engine, model.id)
    r = _post_raw(http, f"/v1/models/{model.name}/{endpoint}", make())
    assert 400 <= r.status_code < 500, (r.status_code, r.text[:300])
    assert r.headers["content-type"].startswith("application/problem+json"), r.text[:300]
    problem = r.json()
    assert problem["status"] == r.status_code and problem["detail"]
    assert counts(engine, model.id) == before
    # the service is still well after the hostile body
    ok = http.client.post(
        f"/v1/models/{model.name}/predictions", json={"predictions": predictions(1, prefix="after")}
    )
    assert ok.status_code == 200, ok.text


# Unusual but valid text: emoji (with skin tone and zero-width joiners), right-to-left scripts
# and the RTL override, combining marks (the decomposed é beside the precomposed one, which
# are different strings and must stay different), a byte-order mark and full-width letters.
UNICODE_IDS = [
    "🪑-order-1",
    "👩🏽‍🔧-🛋️",
    "طلب-٤٢",
    "הזמנה-7",
    "\u202eredro\u202c",
    "e\u0301",
    "\u00e9",
    "Z\u0324\u0354\u0367\u0311a\u0308\u0347",
    "\ufeffbom",
    "ｏｒｄｅｒ",
    "𝔬𝔯𝔡𝔢𝔯",
    "🪑" * 128,
    "a\u200db",
    "\u2028line-sep",
    "order\u00a0nbsp",
]
UNICODE_TAGS = {
    "région": "nörd 🧭",
    "منطقة": "شمال",
    "mark": "a\u0308",
    "\u202ekey": "v\u202c",
    "emoji🛋️": "🪑" * 64,
}


def _stored_bytes(engine: Engine, model: Model, column: str) -> list[bytes]:
    found = rows(engine, f"SELECT {column} FROM predictions WHERE model_id = :m", m=model.id)
    return sorted(r[0].encode("utf-8") for r in found)


def test_unicode_ids_and_tags_are_stored_byte_for_byte(http: Tenant, engine: Engine) -> None:
    model = create_model(http, engine)
    batch = [prediction(n, tags=UNICODE_TAGS) | {"id": pid} for n, pid in enumerate(UNICODE_IDS)]
    r = http.client.post(f"/v1/models/{model.name}/predictions", json={"predictions": batch})
    assert r.status_code == 200, r.text
    assert r.json() == {"accepted": len(UNICODE_IDS), "duplicates": 0}
    assert _stored_bytes(engine, model, "pid") == sorted(p.encode("utf-8") for p in UNICODE_IDS)
    for pid in UNICODE_IDS:
        stored = prediction_row(engine, model.id, pid)
        assert stored["pid"].encode("utf-8") == pid.encode("utf-8")
        assert {k.encode(): v.encode() for k, v in stored["tags"].items()} == {
            k.encode(): v.encode() for k, v in UNICODE_TAGS.items()
        }
    # the decomposed é is labelled, the precomposed one is not: no normalisation anywhere
    r = http.client.post(
        f"/v1/models/{model.name}/labels",
        json={"labels": [label("e\u0301", "1"), label("🪑" * 128, "0")]},
    )
    assert r.json() == {"matched": 2, "pending": 0, "corrected": 0, "unchanged": 0, "expired": 0}
    assert prediction_row(engine, model.id, "e\u0301")["actual"] == "1"
    assert prediction_row(engine, model.id, "\u00e9")["actual"] is None
    # a segment filter on a combining-mark value finds exactly these predictions (keys of
    # any text have a test of their own below)
    r = http.client.get(
        f"/v1/models/{model.name}/metrics",
        params={"tag.mark": "a\u0308", "granularity": "week"},
    )
    assert r.status_code == 200, r.text
    assert sum(w["predictions"] for w in r.json()["windows"]) == len(UNICODE_IDS)


@pytest.mark.parametrize(
    "key",
    ["région", 'say "hi"', "tab\tkey", "🛋️", "back\\slash", "a.b[0]"],
    ids=["accent", "quote", "tab", "emoji", "backslash", "path-syntax"],
)
def test_segment_filter_finds_tag_keys_of_any_text(http: Tenant, engine: Engine, key: str) -> None:
    """A stored tag key is a segment like any other, whatever characters it holds."""
    model = create_model(http, engine)
    batch = predictions(3, tags={key: "north"}) + predictions(2, start=3, tags={key: "south"})
    r = http.client.post(f"/v1/models/{model.name}/predictions", json={"predictions": batch})
    assert r.status_code == 200, r.text
    found = {}
    for value in ("north", "south"):
        r = http.client.get(
            f"/v1/models/{model.name}/metrics",
            params={f"tag.{key}": value, "granularity": "week"},
        )
        assert r.status_code == 200, r.text
        found[value] = sum(w["predictions"] for w in r.json()["windows"])
    assert found == {"north": 3, "south": 2}


def test_id_length_counts_characters_not_bytes(http: Tenant, engine: Engine) -> None:
    model = create_model(http, engine)
    r = http.client.post(
        f"/v1/models/{model.name}/predictions",
        json={"predictions": [prediction(0) | {"id": "🪑" * 129}]},
    )
    assert r.status_code == 422 and r.json()["errors"][0]["field"] == "id"
    assert counts(engine, model.id)["predictions"] == 0


SQL_TEXTS = [
    "'; DROP TABLE predictions; --",
    "Robert'); DELETE FROM models; --",
    "\"quoted\" 'single'",
    "back\\slash \\\\ \\'",
    "100% _any_ %%",
    "\\N",
    "tab\there\nnewline\rreturn",
    "$1 ? %s %(x)s",
    "' OR '1'='1",
    "*/ /* -- #",
]
SQL_KEYS = [t for t in SQL_TEXTS if ":" not in t]


def test_sql_metacharacters_in_every_string_field_are_stored_as_sent(
    http: Tenant, engine: Engine
) -> None:
    c = http.client
    classes = ["kept'; DROP TABLE labels; --", "returned \\ 100%"]
    model = create_model(
        http, engine, classes=classes, positive=classes[1], segment_keys=SQL_KEYS[:8]
    )
    tag_set = {k: v for k, v in zip(SQL_KEYS, reversed(SQL_TEXTS), strict=False)}
    batch = [
        prediction(n, tags=tag_set, predicted=classes[n % 2]) | {"id": pid}
        for n, pid in enumerate(SQL_TEXTS)
    ]
    r = c.post(f"/v1/models/{model.name}/predictions", json={"predictions": batch})
    assert r.status_code == 200, r.text
    r = c.post(
        f"/v1/models/{model.name}/labels",
        json={
            "labels": [label(pid, classes[1]) for pid in SQL_TEXTS[:5]]
            + [label("pending " + SQL_TEXTS[0], classes[0])]
        },
    )
    assert r.json() == {"matched": 5, "pending": 1, "corrected": 0, "unchanged": 0, "expired": 0}, (
        r.text
    )
    assert _stored_bytes(engine, model, "pid") == sorted(t.encode() for t in SQL_TEXTS)
    for n, pid in enumerate(SQL_TEXTS):
        stored = prediction_row(engine, model.id, pid)
        assert stored["predicted"] == classes[n % 2]
        assert stored["actual"] == (classes[1] if n < 5 else None)
        assert stored["tags"] == tag_set
    pending = rows(engine, "SELECT pid, actual FROM pending_labels WHERE model_id = :m", m=model.id)
    assert [tuple(p) for p in pending] == [("pending " + SQL_TEXTS[0], classes[0])]
    got = c.get(f"/v1/models/{model.name}").json()
    assert got["classes"] == classes and got["segment_keys"] == SQL_KEYS[:8]
    assert got["counts"] == {"predictions": len(SQL_TEXTS), "labelled": 5, "pending_labels": 1}
    # query parameters with metacharacters are values, not SQL
    key, value = SQL_KEYS[0], tag_set[SQL_KEYS[0]]
    r = c.get(
        f"/v1/models/{model.name}/metrics",
        params={f"tag.{key}": value, "granularity": "week"},
    )
    assert r.status_code == 200, r.text
    assert sum(w["predictions"] for w in r.json()["windows"]) == len(SQL_TEXTS)
    for params in ({"model": SQL_TEXTS[0]}, {"model": "' OR '1'='1"}):
        r = c.get("/v1/alerts", params=params)
        assert r.status_code == 200 and r.json()["items"] == []
    for params in ({"state": SQL_TEXTS[0]}, {"since": SQL_TEXTS[8]}, {"cursor": SQL_TEXTS[1]}):
        r = c.get("/v1/alerts", params=params)
        assert r.status_code == 422, (params, r.text)
    # names of keys, rule fields and webhook URLs
    key_name = SQL_TEXTS[1]
    r = c.post("/v1/keys", json={"scopes": ["read"], "name": key_name})
    assert r.status_code == 201, r.text
    assert rows(engine, "SELECT name FROM tokens WHERE id = :i", i=r.json()["id"])[0][0] == key_name
    rule = c.post(
        f"/v1/models/{model.name}/rules",
        json={"kind": "traffic", "low": 1, "segment_by": SQL_KEYS[2]},
    )
    assert rule.status_code == 201, rule.text
    assert rule.json()["segment_by"] == SQL_KEYS[2]
    bad = c.post(
        f"/v1/models/{model.name}/rules",
        json={"kind": "floor", "measure": SQL_TEXTS[0], "threshold": 0.5},
    )
    assert bad.status_code == 422
    hook_url = "http://127.0.0.1:9/hook?q=';DROP TABLE webhooks;--&p=100%25"
    hook = c.post("/v1/webhooks", json={"url": hook_url})
    assert hook.status_code == 201, hook.text
    assert (
        rows(engine, "SELECT url FROM webhooks WHERE id = :i", i=hook.json()["id"])[0][0]
        == hook_url
    )
    # the tables the payloads named are all still there
    for table in ("predictions", "labels", "models", "webhooks", "tokens"):
        assert rows(engine, f"SELECT count(*) FROM {table}")[0][0] >= 1


def test_model_names_outside_the_slug_pattern_are_refused(http: Tenant, engine: Engine) -> None:
    before = rows(engine, "SELECT count(*) FROM models WHERE project_id = :p", p=http.project_id)[
        0
    ][0]
    for name in (
        "Returns",
        " returns",
        "returns ",
        "x'; DROP TABLE models; --",
        "é",
        "🪑",
        "a" * 65,
        "",
    ):
        r = http.client.post("/v1/models", json={"name": name})
        assert r.status_code == 422, (name, r.text)
        assert r.json()["errors"][0]["field"] == "name"
    assert (
        rows(engine, "SELECT count(*) FROM models WHERE project_id = :p", p=http.project_id)[0][0]
        == before
    )


COLLIDING = ["A1", "a1", " a1", "a1 ", "a1\t", "\ta1", "A1\u00a0", "ａ1"]


def test_ids_that_differ_only_by_case_or_whitespace_stay_distinct(
    http: Tenant, engine: Engine
) -> None:
    model = create_model(http, engine)
    c = http.client
    batch = [
        prediction(n, tags={"Region": "North", "region": "north"}) | {"id": pid}
        for n, pid in enumerate(COLLIDING)
    ]
    r = c.post(f"/v1/models/{model.name}/predictions", json={"predictions": batch})
    assert r.json() == {"accepted": len(COLLIDING), "duplicates": 0}, r.text
    assert _stored_bytes(engine, model, "pid") == sorted(p.encode() for p in COLLIDING)
    assert prediction_row(engine, model.id, "A1")["tags"] == {"Region": "North", "region": "north"}
    # resending one id with other content conflicts on that id alone
    again = [batch[1] | {"score": 1 - batch[1]["score"]}, batch[0], batch[2]]
    r = c.post(f"/v1/models/{model.name}/predictions", json={"predictions": again})
    assert r.status_code == 409, r.text
    assert "'a1'" in r.json()["detail"] and "'A1'" not in r.json()["detail"]
    r = c.post(f"/v1/models/{model.name}/predictions", json={"predictions": batch[2:4]})
    assert r.json() == {"accepted": 0, "duplicates": 2}
    # a label for "a1" labels "a1" only; "A 1"-like ids never seen are pending
    r = c.post(
        f"/v1/models/{model.name}/labels", json={"labels": [label("a1", "1"), label("A1 ", "0")]}
    )
    assert r.json() == {"matched": 1, "pending": 1, "corrected": 0, "unchanged": 0, "expired": 0}
    labelled = rows(
        engine, "SELECT pid FROM predictions WHERE model_id = :m AND actual IS NOT NULL", m=model.id
    )
    assert [r[0] for r in labelled] == ["a1"]
    assert counts(engine, model.id)["pending_labels"] == 1
