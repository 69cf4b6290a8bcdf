"""Revision 0010 (early alerts) on stored rows, both stores: existing alerts and evaluated
windows come through as not early, and a downgrade drops the new columns in place, keeping
every model, rule, alert and evaluated window (a batch copy of a parent table on SQLite
would have fired the ON DELETE CASCADE of its children)."""

from __future__ import annotations

from collections.abc import Iterator
from datetime import UTC, datetime, timedelta
from pathlib import Path

import pytest
import sqlalchemy as sa
from sqlalchemy import inspect, select
from sqlalchemy.orm import Session

from belated.alerts.tables import Alert, AlertSequence, Rule, RuleWindow
from belated.store.db import make_engine
from belated.store.migrate import downgrade, upgrade
from belated.store.tables import ModelRow, Project
from tests.conftest import STORES, create_pg_database, drop_pg_database, pg_url

T0 = datetime(2026, 11, 20, tzinfo=UTC)
BEFORE = "0010_dirty_marks"
TABLES = ("projects", "models", "rules", "alerts", "rule_windows", "alert_sequences")


@pytest.fixture(params=STORES)
def fresh_url(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str]:
    """An empty store of each kind, dropped afterwards."""
    if request.param == "sqlite":
        yield f"sqlite:///{tmp_path / 'early.db'}"
        return
    name = create_pg_database("belated_early")
    try:
        yield pg_url(name)
    finally:
        drop_pg_database(name)


def _seed(session: Session) -> None:
    """A model with a rule, its alert and three evaluated days, at the head schema."""
    session.add(Project(id=1, name="shop-north", created_at=T0))
    session.flush()
    session.add(
        ModelRow(
            id=1,
            project_id=1,
            name="returns-v2",
            kind="binary",
            classes=["0", "1"],
            positive="1",
            threshold=0.5,
            label_delay_days=7.0,
            min_coverage=0.9,
            created_at=T0,
            updated_at=T0,
        )
    )
    session.flush()
    session.add(
        Rule(
            id="rul_1",
            model_id=1,
            kind="drop",
            measure="recall",
            granularity="day",
            settings={"early": True},
            created_at=T0,
            updated_at=T0,
        )
    )
    session.add(AlertSequence(project_id=1, last_seq=1))
    session.flush()
    session.add(
        Alert(
            id="alr_1",
            seq=1,
            project_id=1,
            model_id=1,
            rule_id="rul_1",
            segment="",
            state="raised",
            raised_at=T0,
            started_at=T0 - timedelta(days=3),
            early=True,
        )
    )
    for d in range(3):
        start = T0 - timedelta(days=3 - d)
        session.add(
            RuleWindow(
                rule_id="rul_1",
                segment="",
                window_start=start,
                window_end=start + timedelta(days=1),
                breached=d == 0,
                early=d == 0,
                alert_id="alr_1" if d == 0 else None,
                evaluated_at=T0,
            )
        )


def _counts(url: str) -> dict[str, int]:
    engine = make_engine(url)
    try:
        with engine.connect() as conn:
            return {
                t: int(conn.execute(sa.text(f"SELECT count(*) FROM {t}")).scalar()) for t in TABLES
            }
    finally:
        engine.dispose()


def _columns(url: str, table: str) -> set[str]:
    engine = make_engine(url)
    try:
        return {c["name"] for c in inspect(engine).get_columns(table)}
    finally:
        engine.dispose()


def test_downgrade_keeps_every_row_and_upgrade_brings_them_back_not_early(
    fresh_url: str,
) -> None:
    upgrade(fresh_url)
    engine = make_engine(fresh_url)
    try:
        with Session(engine) as session, session.begin():
            _seed(session)
        kept = _counts(fresh_url)
        assert kept == {t: n for t, n in zip(TABLES, (1, 1, 1, 1, 3, 1), strict=True)}
        downgrade(fresh_url, BEFORE)
        assert _counts(fresh_url) == kept
        assert "early" not in _columns(fresh_url, "rule_windows")
        assert not {"early", "confirmed_at", "cleared_reason"} & _columns(fresh_url, "alerts")
        upgrade(fresh_url)
        assert _counts(fresh_url) == kept
        with Session(engine) as session:
            alert = session.get(Alert, "alr_1")
            assert alert is not None and alert.early is False and alert.state == "raised"
            assert alert.confirmed_at is None and alert.cleared_reason is None
            assert set(session.scalars(select(RuleWindow.early))) == {False}
            assert session.scalar(select(RuleWindow.alert_id).where(RuleWindow.breached)) == (
                "alr_1"
            )
    finally:
        engine.dispose()
