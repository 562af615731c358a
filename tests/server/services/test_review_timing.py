"""When decisions take effect, what the history says was recommended, and overrides among the
day's changes (issue 16, item 2).

The day a decision takes effect follows the policy's own definition (``docs/rules.md``,
"Semantics", point 4: a decision on day d is in force from d + ``effective_delay_days``; the
shipped ``persistence-500.yaml`` spells it out: two days over the threshold, "take effect on the
next day (the 3rd)"). No outside reference applies to this bookkeeping.
"""

from __future__ import annotations

from datetime import UTC, date, datetime, time, timedelta

import pytest
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from rules import parse_ruleset
from server.readmodels.morning import morning_overview
from server.services.review import (
    decide,
    decision_history,
    effective_from,
    pending_changes,
    publish,
)
from server.store.models import Assessment, Region
from server.store.models import Decision as DecisionRow
from tests.server.conftest import STALE_RULES, seen

APPROVER = "otto.approver"  # invented demo account (demo_seed.seed)


def _rules(delay: int):  # type: ignore[no-untyped-def]
    text = STALE_RULES.replace("effective_delay_days: 0", f"effective_delay_days: {delay}")
    return parse_ruleset(text, source="test")


@pytest.mark.parametrize(
    ("data_day", "taken", "zone", "delay", "expected"),
    [
        # taken the morning after the data: delay 1 -> the next day, delay 0 -> the same day
        (date(2026, 11, 30), datetime(2026, 12, 1, 9, tzinfo=UTC), "UTC", 1, date(2026, 12, 2)),
        (date(2026, 11, 30), datetime(2026, 12, 1, 9, tzinfo=UTC), "UTC", 0, date(2026, 12, 1)),
        (date(2026, 11, 30), datetime(2026, 12, 1, 9, tzinfo=UTC), "UTC", 3, date(2026, 12, 4)),
        # taken on the data day itself (a same-day feed): never before the day after the data
        (date(2026, 11, 30), datetime(2026, 11, 30, 20, tzinfo=UTC), "UTC", 0,
         date(2026, 12, 1)),
        # 23:30 UTC is already the next calendar day in the office's zone (UTC+1 in winter)
        (date(2026, 11, 30), datetime(2026, 12, 1, 23, 30, tzinfo=UTC), "Europe/Berlin", 1,
         date(2026, 12, 3)),
    ],
    ids=["delay-1", "delay-0", "delay-3", "floor-day-after-data", "office-zone"],
)
def test_effective_from_counts_the_delay_from_the_day_taken(
    data_day: date, taken: datetime, zone: str, delay: int, expected: date,
) -> None:
    assert effective_from(data_day, taken, _rules(delay), zone) == expected


@pytest.mark.slow
def test_decision_takes_effect_a_day_after_it_is_taken_under_the_demo_policy(
    demo_session: Session,
) -> None:
    # the demo policy (rules/policies/county.yaml) has effective_delay_days: 1
    first = pending_changes(session=demo_session)[0]
    taken = datetime(2026, 12, 4, 10, tzinfo=UTC)
    made = decide(session=demo_session, assessment_id=first.assessment_id, user=APPROVER,
                  accept=True, tier=None, reason="agreed", now=taken,
                  **seen(demo_session, first.assessment_id))
    assert made.effective_date == date(2026, 12, 5)


@pytest.mark.slow
def test_history_shows_what_was_recommended_for_an_imported_decision(
    demo_session: Session,
) -> None:
    region_id = demo_session.scalar(select(Region.id).where(Region.code == "D03"))
    day = date(2026, 10, 1)
    row = demo_session.scalars(
        select(Assessment).where(Assessment.region_id == region_id, Assessment.ref_date == day)
        .order_by(Assessment.data_cutoff)
    ).first()
    assert row is not None
    # recorded after the day was assessed: the recommendation as known then
    known_at = row.data_cutoff + timedelta(hours=1)
    demo_session.add(DecisionRow(
        policy="county-demo", region_id=region_id, assessment_id=None,
        effective_date=day + timedelta(days=1),
        tier=0, kind="recorded", reason="weekly meeting", decided_by=None, decided_at=known_at,
        published_at=known_at))
    demo_session.flush()
    h = decision_history(session=demo_session, region="D03")[0]
    assert (h.recommended_tier, h.assessment_day, h.recommended_later) == (
        row.recommended_tier, day, False)
    assert h.recommended_name


@pytest.mark.slow
def test_history_marks_a_recommendation_assessed_after_the_decision(
    demo_session: Session,
) -> None:
    region_id = demo_session.scalar(select(Region.id).where(Region.code == "D04"))
    day = date(2026, 9, 1)
    first_cutoff = demo_session.scalar(
        select(func.min(Assessment.data_cutoff))
        .where(Assessment.region_id == region_id, Assessment.ref_date == day))
    assert first_cutoff is not None
    # decided at noon of the day, before its data arrived (the demo lands a day's data the
    # morning after): the recommendation shown is the day's first assessment, marked as later
    before = datetime.combine(day, time(12), UTC)
    assert first_cutoff > before
    demo_session.add(DecisionRow(
        policy="county-demo", region_id=region_id, assessment_id=None,
        effective_date=day + timedelta(days=1),
        tier=1, kind="recorded", reason="from the paper files", decided_by=None,
        decided_at=before, published_at=before))
    demo_session.flush()
    h = decision_history(session=demo_session, region="D04")[0]
    assert h.recommended_tier is not None and h.recommended_later


@pytest.mark.slow
def test_an_override_is_among_the_days_changes_before_and_after_publication(
    demo_session: Session,
) -> None:
    first = pending_changes(session=demo_session)[0]
    other = (first.recommended_tier + 1) % 4
    decide(session=demo_session, assessment_id=first.assessment_id, user=APPROVER,
           accept=False, tier=other, reason="outbreak in one care home, contained",
           **seen(demo_session, first.assessment_id))
    lines = [c.what for c in morning_overview(session=demo_session).changes
             if c.code == first.region]
    assert any(w.startswith("overridden to ") and "not yet published" in w
               and "outbreak in one care home" in w for w in lines), lines
    publish(session=demo_session, user=APPROVER)
    lines = [c.what for c in morning_overview(session=demo_session).changes
             if c.code == first.region]
    assert any(w.startswith("overridden to ") and w.endswith(
        "published: outbreak in one care home, contained") for w in lines), lines
