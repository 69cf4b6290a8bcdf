"""Property-based fuzzing of every operation of the app's own OpenAPI document (schemathesis).

Each operation gets a small, derandomised set of generated requests, valid and invalid by the
schema, sent with an all-scopes token; half of them address the tenant's real model, rule,
alert and webhook so that the handlers run past the lookup. The answers are checked with
schemathesis' own checks: no 5xx anywhere; a 2xx answer matches its documented schema and
media type; an error answer whose status the document lists matches what it documents.
"""

from __future__ import annotations

import socket
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any

import pytest
import schemathesis
from hypothesis import HealthCheck, Phase, given, settings
from hypothesis import strategies as st
from schemathesis.core.failures import FailureGroup
from schemathesis.core.result import Ok
from schemathesis.specs.openapi.checks import (
    content_type_conformance,
    response_schema_conformance,
)
from sqlalchemy import Engine

from belated.alerts import evaluate
from belated.alerts.tables import Rule
from belated.app import create_app
from belated.clock import now
from belated.config import Settings
from belated.store.db import make_sessionmaker, transaction
from belated.store.tables import ModelRow
from tests.conftest import make_tenant
from tests.support import label, predictions

EXAMPLES = 8  # per operation and generation mode: the run stops on a count, not a clock
CHECKS = [response_schema_conformance, content_type_conformance]


@dataclass
class Findings:
    """What the fuzzing run saw."""

    calls: int = 0
    statuses: dict[str, set[int]] = field(default_factory=dict)
    server_errors: list[str] = field(default_factory=list)
    success_mismatches: list[str] = field(default_factory=list)
    error_mismatches: list[str] = field(default_factory=list)
    kinds: dict[str, int] = field(default_factory=dict)

    def summary(self) -> str:
        """Each kind of mismatch once, with how often it was seen."""
        return "\n".join(f"{n:4d} x {kind}" for kind, n in sorted(self.kinds.items()))


def _numeric_only(real: Any) -> Any:
    """getaddrinfo that resolves IP literals and localhost and nothing else (no DNS traffic)."""

    def resolve(host: Any, *args: Any, **kwargs: Any) -> Any:
        name = host.decode() if isinstance(host, bytes) else host
        if name == "localhost":
            return real("127.0.0.1", *args, **kwargs)
        try:
            return real(name, *args, flags=socket.AI_NUMERICHOST)
        except (socket.gaierror, UnicodeError, TypeError, ValueError):
            raise socket.gaierror(socket.EAI_NONAME, "fuzzing resolves no names") from None

    return resolve


def _world(app: Any, engine: Engine) -> tuple[str, dict[str, str]]:
    """A tenant with a model holding data, a rule with an open alert and a webhook."""
    from fastapi.testclient import TestClient

    sessions = make_sessionmaker(engine)
    with TestClient(app, base_url="http://testserver") as c:
        tenant = make_tenant(sessions, c)
        assert (
            c.post(
                "/v1/models", json={"name": "returns-v2", "segment_keys": ["region"]}
            ).status_code
            == 201
        )
        items = predictions(40, tags={"region": "north"})
        assert (
            c.post("/v1/models/returns-v2/predictions", json={"predictions": items}).status_code
            == 200
        )
        assert (
            c.post(
                "/v1/models/returns-v2/labels",
                json={"labels": [label(p["id"], str(n % 2)) for n, p in enumerate(items[:30])]},
            ).status_code
            == 200
        )
        rule = c.post(
            "/v1/models/returns-v2/rules", json={"kind": "traffic", "granularity": "hour", "low": 1}
        ).json()
        hook = c.post("/v1/webhooks", json={"url": "http://127.0.0.1:9/hooks/belated"}).json()
    with transaction(sessions) as session:
        row = session.get(Rule, rule["id"])
        assert row is not None
        model = session.get(ModelRow, row.model_id)
        assert model is not None
        evaluate.evaluate_rule(session, row, model, now(), 100)
    with TestClient(app, base_url="http://testserver") as c:
        c.headers["Authorization"] = f"Bearer {tenant.tokens['admin,ingest,read']}"
        alerts = c.get("/v1/alerts").json()["items"]
    assert alerts, "the volume rule should have opened an alert"
    real = {
        "model": "returns-v2",
        "rule_id": rule["id"],
        "hook_id": hook["id"],
        "alert_id": alerts[0]["id"],
    }
    return tenant.tokens["admin,ingest,read"], real


def _describe(case: Any, status: int, text: str) -> str:
    return (
        f"{case.operation.label} -> {status}: path={case.path_parameters} "
        f"query={case.query} body={str(case.body)[:120]!r}: {text[:300]}"
    )


def _modes(op: Any) -> list[schemathesis.GenerationMode]:
    """Valid requests always; invalid ones where there is something the schema constrains.

    A string path parameter cannot be made invalid, so an operation with nothing else has no
    negative case (and asking for one only spends seconds proving so).
    """
    raw = op.definition.raw
    constrained = "requestBody" in raw or any(
        p.get("in") == "query" for p in raw.get("parameters", [])
    )
    modes = [schemathesis.GenerationMode.POSITIVE]
    return modes + [schemathesis.GenerationMode.NEGATIVE] if constrained else modes


def _fuzz_operation(
    op: Any,
    mode: schemathesis.GenerationMode,
    found: Findings,
    auth: dict[str, str],
    real: dict[str, str],
) -> None:
    """Send one operation's generated requests and file what the checks say."""
    documented = {str(k) for k in (op.definition.raw.get("responses") or {})}

    @settings(
        max_examples=EXAMPLES,
        deadline=None,
        database=None,
        derandomize=True,
        phases=[Phase.generate],
        suppress_health_check=list(HealthCheck),
    )
    @given(case=op.as_strategy(generation_mode=mode), use_real=st.booleans())
    def run(case: Any, use_real: bool) -> None:
        if use_real:
            for name in list(case.path_parameters or {}):
                if name in real:
                    case.path_parameters[name] = real[name]
        response = case.call(headers=auth)
        found.calls += 1
        status = response.status_code
        found.statuses.setdefault(op.label, set()).add(status)
        if status >= 500:
            found.server_errors.append(_describe(case, status, response.text))
            return
        if not (200 <= status < 300 or str(status) in documented):
            return  # an undocumented status is a gap in the document, not a contradiction
        try:
            case.validate_response(response, checks=CHECKS, headers=auth)
        except FailureGroup as group:
            text = "; ".join(
                f"{f.title}: {' '.join(f.message.split())[:160]}" for f in group.exceptions
            )
            target = found.success_mismatches if status < 300 else found.error_mismatches
            target.append(_describe(case, status, text))
            kind = f"{op.label} -> {status}: {text}"
            found.kinds[kind] = found.kinds.get(kind, 0) + 1

    run()


def _fuzz(app: Any, token: str, real: dict[str, str]) -> Findings:
    schema = schemathesis.openapi.from_asgi("/openapi.json", app)
    found = Findings()
    auth = {"Authorization": f"Bearer {token}"}
    loaded = list(schema.get_all_operations())
    assert all(isinstance(r, Ok) for r in loaded), [r for r in loaded if not isinstance(r, Ok)]
    operations = [r.ok() for r in loaded if isinstance(r, Ok)]
    # deletions last and deepest first, so that the real objects serve every other operation
    operations.sort(
        key=lambda op: (op.method.upper() == "DELETE", -op.path.count("/"), op.path, op.method)
    )
    for op in operations:
        for mode in _modes(op):
            _fuzz_operation(op, mode, found, auth, real)
    return found


@pytest.fixture(scope="module")
def findings(store_url: str, engine: Engine) -> Iterator[Findings]:
    """One fuzzing run per store, shared by the assertions below."""
    app = create_app(Settings(database_url=store_url, jobs=False), engine=engine, jobs=False)
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(socket, "getaddrinfo", _numeric_only(socket.getaddrinfo))
        token, real = _world(app, engine)
        yield _fuzz(app, token, real)


def test_fuzzing_reached_every_operation(findings: Findings) -> None:
    """The run is a real one: every documented operation was called, and most of them
    succeeded at least once (so the handlers ran, not just the refusals).

    The two ingest operations cannot succeed here: the document gives them no request body,
    so generated requests carry none (a gap reported beside this test).
    """
    assert len(findings.statuses) >= 26, sorted(findings.statuses)
    reached = [op for op, codes in findings.statuses.items() if any(c < 300 for c in codes)]
    assert len(reached) >= 20, {op: sorted(c) for op, c in findings.statuses.items()}
    assert findings.calls >= 26 * 4


def test_fuzzing_finds_no_server_error(findings: Findings) -> None:
    assert findings.server_errors == [], "\n".join(findings.server_errors[:20])


def test_successful_answers_match_the_documented_schema(findings: Findings) -> None:
    assert findings.success_mismatches == [], findings.summary()


def test_error_answers_match_what_the_document_says(findings: Findings) -> None:
    """The document lists a 422 for most operations; what is served must be that shape."""
    assert findings.error_mismatches == [], (
        findings.summary() + "\nfor example:\n" + "\n".join(findings.error_mismatches[:3])
    )
