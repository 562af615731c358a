"""Daily evaluation service: stored assessments carry ruleset and cutoff and are reproducible."""

from __future__ import annotations

import shutil
from collections.abc import Iterator
from datetime import UTC, date, datetime
from pathlib import Path

import pytest
from sqlalchemy import delete, select
from sqlalchemy.orm import Session

from demo_seed.seed import seed_demo
from server.config import Settings
from server.services.database import Database
from server.services.evaluation import active_ruleset, evaluate_districts, latest_assessment_rows
from server.store.models import Assessment

pytestmark = pytest.mark.slow
CUTOFF = datetime(2026, 10, 1, 12, 0, tzinfo=UTC)  # the vintage of 30 Sep arrived 1 Oct 05:30


def seeded_copy(factory: pytest.TempPathFactory, name: str) -> Path:
    """A copy of a 150-day demo database, seeded once per test session."""
    source = factory.getbasetemp() / "rules-demo" / "demo.db"
    if not source.exists():
        source.parent.mkdir(parents=True, exist_ok=True)
        db = Database.from_settings(Settings(database_url=f"sqlite:///{source}", demo_mode=True))
        try:
            seed_demo(db, days=150, end=date(2026, 11, 30))
        finally:
            db.dispose()
    target = factory.mktemp(name) / "demo.db"
    shutil.copyfile(source, target)
    return target


@pytest.fixture(scope="module")
def db(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Database]:
    path = seeded_copy(tmp_path_factory, "evaluation")
    database = Database.from_settings(Settings(database_url=f"sqlite:///{path}", demo_mode=True))
    yield database
    database.dispose()


@pytest.fixture
def session(db: Database) -> Iterator[Session]:
    with db.sessions() as s:
        yield s
        s.rollback()


def _rows(session: Session, cutoff: datetime) -> list[tuple]:  # type: ignore[type-arg]
    query = (
        select(Assessment.region_id, Assessment.ref_date, Assessment.recommended_tier,
               Assessment.previous_tier, Assessment.criteria, Assessment.prepare_signals,
               Assessment.explanation)
        .where(Assessment.data_cutoff == cutoff)
        .order_by(Assessment.region_id, Assessment.ref_date)
    )
    return [tuple(r) for r in session.execute(query)]


def test_evaluate_at_cutoff_stops_at_the_data_known_then(session: Session) -> None:
    row = active_ruleset(session=session)
    assert row is not None
    run = evaluate_districts(session=session, ruleset_row=row, cutoff=CUTOFF)
    assert run is not None and run.end == date(2026, 9, 30)


def test_assessments_store_ruleset_hash_and_cutoff(session: Session) -> None:
    row = active_ruleset(session=session)
    assert row is not None
    evaluate_districts(session=session, ruleset_row=row, cutoff=CUTOFF)
    stored = session.scalar(select(Assessment).where(Assessment.data_cutoff == CUTOFF).limit(1))
    assert stored is not None and stored.ruleset_id == row.id
    assert stored.explanation["data"]["ruleset"]["sha256"] == row.sha256


def test_rerunning_a_past_day_with_the_same_cutoff_reproduces_it(session: Session) -> None:
    row = active_ruleset(session=session)
    assert row is not None
    evaluate_districts(session=session, ruleset_row=row, cutoff=CUTOFF)
    first = _rows(session, CUTOFF)
    # later data exist (the demo runs to 30 Nov); wipe the stored rows and evaluate again
    session.execute(delete(Assessment).where(Assessment.data_cutoff == CUTOFF))
    again = evaluate_districts(session=session, ruleset_row=row, cutoff=CUTOFF)
    assert again is not None and not again.reused
    assert _rows(session, CUTOFF) == first


def test_second_run_with_same_cutoff_reuses_the_stored_rows(session: Session) -> None:
    row = active_ruleset(session=session)
    assert row is not None
    evaluate_districts(session=session, ruleset_row=row, cutoff=CUTOFF)
    again = evaluate_districts(session=session, ruleset_row=row, cutoff=CUTOFF)
    assert again is not None and again.reused and again.written == 0


def test_latest_rows_give_the_start_of_the_current_recommendation(session: Session) -> None:
    latest = latest_assessment_rows(session=session)
    assert latest is not None and len(latest.items) == 14
    item = latest.items[0]
    days = session.execute(
        select(Assessment.ref_date, Assessment.recommended_tier)
        .where(Assessment.region_id == item.region_id,
               Assessment.data_cutoff == latest.data_cutoff)
        .order_by(Assessment.ref_date)
    ).all()
    run = [d for d, t in days if d >= item.since]
    assert all(t == item.assessment.recommended_tier for d, t in days if d >= item.since)
    before = [t for d, t in days if d < item.since]
    assert not before or before[-1] != item.assessment.recommended_tier
    assert run[-1] == latest.last_day
