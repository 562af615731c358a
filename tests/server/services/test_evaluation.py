"""Daily evaluation service: stored assessments carry ruleset and cutoff and are reproducible."""

from __future__ import annotations

from datetime import UTC, date, datetime

import pytest
from sqlalchemy import delete, select
from sqlalchemy.orm import Session

from server.services.evaluation import evaluate_districts
from server.services.review import current_run
from server.services.rulesets import active_ruleset
from server.store.models import Assessment, EvaluationRun

pytestmark = pytest.mark.slow
CUTOFF = datetime(2026, 10, 1, 12, 0, tzinfo=UTC)  # the vintage of 30 Sep arrived 1 Oct 05:30


def _rows(session: Session, cutoff: datetime) -> list[tuple]:  # type: ignore[type-arg]
    query = (
        select(Assessment.region_id, Assessment.ref_date, Assessment.recommended_tier,
               Assessment.previous_tier, Assessment.criteria, Assessment.prepare_signals,
               Assessment.explanation)
        .where(Assessment.data_cutoff == cutoff)
        .order_by(Assessment.region_id, Assessment.ref_date)
    )
    return [tuple(r) for r in session.execute(query)]


def test_evaluate_at_cutoff_stops_at_the_data_known_then(demo_session: Session) -> None:
    row = active_ruleset(session=demo_session)
    assert row is not None
    run = evaluate_districts(session=demo_session, ruleset_row=row, cutoff=CUTOFF)
    assert run is not None and run.end == date(2026, 9, 30)


def test_assessments_store_ruleset_hash_and_cutoff(demo_session: Session) -> None:
    row = active_ruleset(session=demo_session)
    assert row is not None
    evaluate_districts(session=demo_session, ruleset_row=row, cutoff=CUTOFF)
    stored = demo_session.scalar(
        select(Assessment).where(Assessment.data_cutoff == CUTOFF).limit(1)
    )
    assert stored is not None and stored.ruleset_id == row.id
    assert stored.explanation["data"]["ruleset"]["sha256"] == row.sha256


def test_rerunning_a_past_day_with_the_same_cutoff_reproduces_it(demo_session: Session) -> None:
    row = active_ruleset(session=demo_session)
    assert row is not None
    evaluate_districts(session=demo_session, ruleset_row=row, cutoff=CUTOFF)
    first = _rows(demo_session, CUTOFF)
    assert first  # nothing was stored before this cutoff, so the run wrote every row
    # later data exist (the demo runs to 30 Nov); wipe the stored rows and run, evaluate again
    demo_session.execute(delete(Assessment).where(Assessment.data_cutoff == CUTOFF))
    demo_session.execute(delete(EvaluationRun).where(EvaluationRun.data_cutoff == CUTOFF))
    again = evaluate_districts(session=demo_session, ruleset_row=row, cutoff=CUTOFF)
    assert again is not None and not again.reused
    assert _rows(demo_session, CUTOFF) == first


def test_second_run_with_same_cutoff_reuses_the_stored_rows(demo_session: Session) -> None:
    row = active_ruleset(session=demo_session)
    assert row is not None
    evaluate_districts(session=demo_session, ruleset_row=row, cutoff=CUTOFF)
    again = evaluate_districts(session=demo_session, ruleset_row=row, cutoff=CUTOFF)
    assert again is not None and again.reused and again.written == 0


def test_every_evaluation_records_its_run(demo_session: Session) -> None:
    row = active_ruleset(session=demo_session)
    assert row is not None
    run = evaluate_districts(session=demo_session, ruleset_row=row, cutoff=CUTOFF)
    assert run is not None
    (recorded,) = demo_session.scalars(
        select(EvaluationRun).where(EvaluationRun.data_cutoff == CUTOFF))
    assert (recorded.ruleset_id, recorded.first_day, recorded.last_day) == (
        row.id, run.start, run.end)
    assert recorded.rows_written == run.written == len(_rows(demo_session, CUTOFF))


def test_latest_rows_give_the_start_of_the_current_recommendation(demo_session: Session) -> None:
    latest = current_run(session=demo_session)
    assert latest is not None and len(latest.items) == 14
    item = latest.items[0]
    days = demo_session.execute(
        select(Assessment.ref_date, Assessment.recommended_tier)
        .where(Assessment.region_id == item.region_id,
               Assessment.ruleset_id == latest.ruleset_row.id,
               Assessment.data_cutoff == latest.data_cutoff)
        .order_by(Assessment.ref_date)
    ).all()
    run = [d for d, t in days if d >= item.since]
    assert all(t == item.assessment.recommended_tier for d, t in days if d >= item.since)
    before = [t for d, t in days if d < item.since]
    assert not before or before[-1] != item.assessment.recommended_tier
    assert run[-1] == latest.last_day
