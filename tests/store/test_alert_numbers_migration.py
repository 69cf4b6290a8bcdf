"""The alert-number migration on stored alerts: numbers that repeated (the old count(*) + 1)
become 1..n per project in their old order, and new alerts go on past them."""

from __future__ import annotations

from collections.abc import Iterator
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest
import sqlalchemy as sa
from sqlalchemy import select
from sqlalchemy.orm import Session

from belated.alerts import numbers
from belated.alerts.tables import Alert, AlertSequence, Rule
from belated.store.db import make_engine
from belated.store.migrate import downgrade, upgrade
from belated.store.tables import ModelRow, Project
from tests.conftest import STORES, create_pg_database, drop_pg_database, pg_url

T0 = datetime(2026, 11, 20, tzinfo=UTC)


@pytest.fixture(params=STORES)
def fresh_url(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str]:
    """An empty store of each kind, dropped afterwards."""
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'numbers.db'}"
        return
    name = create_pg_database("belated_num")
    try:
        yield pg_url(name)
    finally:
        drop_pg_database(name)


# the rules and alerts tables as they were at revision 0003 (the code's tables moved on)
OLD_RULES = sa.table(
    "rules",
    *(sa.column(c) for c in ("id", "model_id", "kind", "measure", "granularity")),
    sa.column("settings", sa.JSON()),
    sa.column("created_at", sa.DateTime(timezone=True)),
    sa.column("updated_at", sa.DateTime(timezone=True)),
)
OLD_ALERTS = sa.table(
    "alerts",
    *(sa.column(c) for c in ("id", "seq", "project_id", "model_id", "rule_id", "segment")),
    sa.column("state"),
    sa.column("opened_at", sa.DateTime(timezone=True)),
)


def _alert(
    alert_id: str, seq: int, project: int, model: int, rule: str, hours: int
) -> dict[str, object]:
    return {
        "id": alert_id,
        "seq": seq,
        "project_id": project,
        "model_id": model,
        "rule_id": rule,
        "segment": "",
        "state": "open",
        "opened_at": T0 + timedelta(hours=hours),
    }


def _seed(session: Session) -> None:
    """Two projects; the first has numbers [1, 3, 3] as the old numbering could leave them
    (4 alerts, one deleted with its rule: the next took 3 again), the second has [2]."""
    pairs = ((1, "shop-north"), (2, "shop-south"))
    # no relationships between the tables: flush parents before children
    session.add_all([Project(id=pid, name=name, created_at=T0) for pid, name in pairs])
    session.flush()
    for pid, _ in pairs:
        session.add(
            ModelRow(
                id=pid,
                project_id=pid,
                name="returns-v2",
                kind="binary",
                classes=["0", "1"],
                positive="1",
                threshold=0.5,
                label_delay_days=2.0,
                min_coverage=0.9,
                created_at=T0,
                updated_at=T0,
            )
        )
    session.flush()
    for pid, _ in pairs:
        session.execute(
            OLD_RULES.insert().values(
                id=f"rul_{pid}",
                model_id=pid,
                kind="volume",
                measure=None,
                granularity="day",
                settings={"low": 500},
                created_at=T0,
                updated_at=T0,
            )
        )
    session.execute(
        OLD_ALERTS.insert(),
        [
            _alert("alr_a", 1, 1, 1, "rul_1", 0),
            _alert("alr_b", 3, 1, 1, "rul_1", 1),
            _alert("alr_c", 3, 1, 1, "rul_1", 2),
            _alert("alr_d", 2, 2, 2, "rul_2", 0),
        ],
    )


def test_repeated_numbers_become_unique_and_new_ones_go_on(fresh_url: str) -> None:
    upgrade(fresh_url, "0003_label_changes")
    engine = make_engine(fresh_url)
    try:
        with Session(engine) as session, session.begin():
            _seed(session)
        upgrade(fresh_url)
        with Session(engine) as session, session.begin():
            got = {a: n for a, n in session.execute(select(Alert.id, Alert.seq))}
            assert got == {"alr_a": 1, "alr_b": 2, "alr_c": 3, "alr_d": 1}
            rows = session.execute(select(AlertSequence.project_id, AlertSequence.last_seq))
            counters = {p: n for p, n in rows}
            assert counters == {1: 3, 2: 1}
            assert numbers.next_seq(session=session, project_id=1) == 4
            assert numbers.next_seq(session=session, project_id=2) == 2
            # revision 0007 renamed the states and the rule kind
            assert set(session.scalars(select(Alert.state))) == {"raised"}
            assert set(session.scalars(select(Rule.kind))) == {"traffic"}
        downgrade(fresh_url, "0003_label_changes")
        with Session(engine) as session:
            assert session.scalar(select(Alert.seq).where(Alert.id == "alr_c")) == 3
        upgrade(fresh_url)
    finally:
        engine.dispose()
