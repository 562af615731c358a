"""Review and publish on a seeded demo database (150 invented days)."""

from __future__ import annotations

import shutil
from collections.abc import Iterator
from datetime import date, timedelta
from pathlib import Path

import pytest
from sqlalchemy import select, update
from sqlalchemy.orm import Session

from demo_seed.seed import seed_demo
from server.config import Settings
from server.services.database import Database
from server.services.evaluation import latest_assessment_rows
from server.services.review import (
    ReviewError,
    decide,
    decision_history,
    official_tiers,
    pending_changes,
    publish,
)
from server.store.models import Assessment, AuditEntry
from server.store.models import Decision as DecisionRow

pytestmark = pytest.mark.slow
APPROVER, ANALYST = "otto.approver", "ada.analyst"  # invented demo accounts (demo_seed.seed)


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
    path = seeded_copy(tmp_path_factory, "review")
    database = Database.from_settings(Settings(database_url=f"sqlite:///{path}", demo_mode=True))
    yield database
    database.dispose()


@pytest.fixture
def session(db: Database) -> Iterator[Session]:
    """A session whose work is rolled back after the test."""
    with db.sessions() as s:
        yield s
        s.rollback()


def test_pending_changes_lists_every_undecided_district(session: Session) -> None:
    pending = pending_changes(session=session)
    assert len(pending) == 14  # the demo has 14 districts, none decided yet
    assert all(p.official_tier is None for p in pending)


def test_decide_requires_a_reason(session: Session) -> None:
    first = pending_changes(session=session)[0]
    with pytest.raises(ReviewError, match="reason: a decision needs a reason"):
        decide(session=session, assessment_id=first.assessment_id, user=APPROVER, accept=True,
               tier=None, reason="  ")


def test_decide_refuses_an_analyst(session: Session) -> None:
    first = pending_changes(session=session)[0]
    with pytest.raises(ReviewError, match="only approvers and admins decide"):
        decide(session=session, assessment_id=first.assessment_id, user=ANALYST, accept=True,
               tier=None, reason="ok")


def test_decide_override_out_of_range_tier(session: Session) -> None:
    first = pending_changes(session=session)[0]
    with pytest.raises(ReviewError, match=r"tier: 7 is not a tier \(0..3\)"):
        decide(session=session, assessment_id=first.assessment_id, user=APPROVER, accept=False,
               tier=7, reason="no")


def test_decision_removes_the_pending_change(session: Session) -> None:
    first = pending_changes(session=session)[0]
    decide(session=session, assessment_id=first.assessment_id, user=APPROVER, accept=True,
           tier=None, reason="agreed at the morning meeting")
    assert first.region not in {p.region for p in pending_changes(session=session)}


def test_override_keeps_its_tier_and_is_not_asked_again(session: Session) -> None:
    first = pending_changes(session=session)[0]
    other = (first.recommended_tier + 1) % 4
    d = decide(session=session, assessment_id=first.assessment_id, user=APPROVER, accept=False,
               tier=other, reason="local outbreak contained")
    assert (d.kind, d.tier) == ("overridden", other)
    assert first.region not in {p.region for p in pending_changes(session=session)}


def test_unpublished_decision_is_not_public(session: Session) -> None:
    first = pending_changes(session=session)[0]
    decide(session=session, assessment_id=first.assessment_id, user=APPROVER, accept=True,
           tier=None, reason="agreed")
    assert official_tiers(session=session) == {}
    assert first.region in official_tiers(session=session, published_only=False)


def test_first_publication_starts_every_district_from_its_recommendation(
    session: Session,
) -> None:
    pending = {p.region: p.recommended_tier for p in pending_changes(session=session)}
    result = publish(session=session, user=APPROVER)
    tiers = {code: t.tier for code, t in official_tiers(session=session).items()}
    assert tiers == pending
    assert set(result.initial) == set(pending)


def test_publish_writes_the_audit_log(session: Session) -> None:
    first = pending_changes(session=session)[0]
    decide(session=session, assessment_id=first.assessment_id, user=APPROVER, accept=False,
           tier=0, reason="hospital figures corrected by phone")
    publish(session=session, user=APPROVER)
    actions = list(session.scalars(select(AuditEntry.action).where(
        AuditEntry.action.like("decision.%"))))
    assert actions == ["decision.overridden", "decision.publish"]


def test_decision_history_names_user_and_recommendation(session: Session) -> None:
    first = pending_changes(session=session)[0]
    decide(session=session, assessment_id=first.assessment_id, user=APPROVER, accept=False,
           tier=0, reason="figures corrected")
    (record,) = decision_history(session=session, region=first.region)
    assert (record.user, record.recommended_tier, record.tier, record.reason) == (
        APPROVER, first.recommended_tier, 0, "figures corrected"
    )


def _make_insufficient(session: Session, region: str) -> int:
    """Turn ``region``'s newest assessment into an insufficient-data recommendation (-1)."""
    latest = latest_assessment_rows(session=session)
    assert latest is not None
    aid = next(i.assessment.id for i in latest.items if i.code == region)
    session.execute(update(Assessment).where(Assessment.id == aid).values(recommended_tier=-1))
    session.expire_all()
    return aid


def test_confirming_insufficient_data_keeps_the_official_tier(session: Session) -> None:
    publish(session=session, user=APPROVER)
    region, official = next(iter(official_tiers(session=session).items()))
    # the published decision answered yesterday's assessment; today's says insufficient data
    latest = latest_assessment_rows(session=session)
    assert latest is not None
    item = next(i for i in latest.items if i.code == region)
    yesterday = session.scalar(select(Assessment.id).where(
        Assessment.region_id == item.region_id, Assessment.data_cutoff == latest.data_cutoff,
        Assessment.ruleset_id == latest.ruleset_row.id,
        Assessment.ref_date == latest.last_day - timedelta(days=1)))
    session.execute(update(DecisionRow).where(DecisionRow.region_id == item.region_id)
                    .values(assessment_id=yesterday))
    aid = _make_insufficient(session, region)
    assert region in {p.region for p in pending_changes(session=session)}
    d = decide(session=session, assessment_id=aid, user=APPROVER, accept=True, tier=None,
               reason="testing site closed for a week; keep the tier")
    assert (d.kind, d.tier, d.reason) == (
        "confirmed", official.tier, "testing site closed for a week; keep the tier"
    )
    assert region not in {p.region for p in pending_changes(session=session)}
    assert official_tiers(session=session, published_only=False)[region].tier == official.tier


def test_confirming_insufficient_data_without_an_official_tier_needs_an_override(
    session: Session,
) -> None:
    region = pending_changes(session=session)[0].region
    aid = _make_insufficient(session, region)
    with pytest.raises(ReviewError, match="accept: insufficient data and no official tier"):
        decide(session=session, assessment_id=aid, user=APPROVER, accept=True, tier=None,
               reason="agreed")
