"""Review and publish on a seeded demo database (150 invented days)."""

from __future__ import annotations

from datetime import UTC, date, datetime, timedelta
from pathlib import Path

import pandas as pd
import pytest
from sqlalchemy import select, update
from sqlalchemy.orm import Session

from server.services.assessments import assessments_as_of, newest_run
from server.services.evaluation import evaluate_districts
from server.services.review import (
    RecommendationChangedError,
    ReviewError,
    current_run,
    decide,
    decision_history,
    has_something_to_publish,
    official_tiers,
    pending_changes,
    publish,
)
from server.services.ruleset_activation import store_ruleset
from server.services.rulesets import active_ruleset
from server.store.models import Assessment, AuditEntry, Region
from server.store.models import Decision as DecisionRow
from server.store.vintages import append_vintage
from tests.server.conftest import seen

pytestmark = pytest.mark.slow
APPROVER, ANALYST = "otto.approver", "ada.analyst"  # invented demo accounts (demo_seed.seed)
COUNTY = Path(__file__).resolve().parents[3] / "rules" / "policies" / "county.yaml"


def test_pending_changes_lists_every_undecided_district(demo_session: Session) -> None:
    pending = pending_changes(session=demo_session)
    assert len(pending) == 14  # the demo has 14 districts, none decided yet
    assert all(p.official_tier is None for p in pending)


def test_decide_requires_a_reason(demo_session: Session) -> None:
    first = pending_changes(session=demo_session)[0]
    with pytest.raises(ReviewError, match="reason: a decision needs a reason"):
        decide(session=demo_session, assessment_id=first.assessment_id, user=APPROVER, accept=True,
               tier=None, reason="  ", **seen(demo_session, first.assessment_id))


def test_decide_refuses_an_analyst(demo_session: Session) -> None:
    first = pending_changes(session=demo_session)[0]
    with pytest.raises(ReviewError, match="only approvers and admins decide"):
        decide(session=demo_session, assessment_id=first.assessment_id, user=ANALYST, accept=True,
               tier=None, reason="ok", **seen(demo_session, first.assessment_id))


def test_decide_override_out_of_range_tier(demo_session: Session) -> None:
    first = pending_changes(session=demo_session)[0]
    with pytest.raises(ReviewError, match=r"tier: 7 is not a tier \(0..3\)"):
        decide(session=demo_session, assessment_id=first.assessment_id, user=APPROVER, accept=False,
               tier=7, reason="no", **seen(demo_session, first.assessment_id))


def test_decision_removes_the_pending_change(demo_session: Session) -> None:
    first = pending_changes(session=demo_session)[0]
    decide(session=demo_session, assessment_id=first.assessment_id, user=APPROVER, accept=True,
           tier=None, reason="agreed at the morning meeting",
           **seen(demo_session, first.assessment_id))
    assert first.region not in {p.region for p in pending_changes(session=demo_session)}


def test_override_keeps_its_tier_and_is_not_asked_again(demo_session: Session) -> None:
    first = pending_changes(session=demo_session)[0]
    other = (first.recommended_tier + 1) % 4
    d = decide(session=demo_session, assessment_id=first.assessment_id, user=APPROVER, accept=False,
               tier=other, reason="local outbreak contained",
               **seen(demo_session, first.assessment_id))
    assert (d.kind, d.tier) == ("overridden", other)
    assert first.region not in {p.region for p in pending_changes(session=demo_session)}


def test_unpublished_decision_is_not_public(demo_session: Session) -> None:
    first = pending_changes(session=demo_session)[0]
    decide(session=demo_session, assessment_id=first.assessment_id, user=APPROVER, accept=True,
           tier=None, reason="agreed", **seen(demo_session, first.assessment_id))
    assert official_tiers(session=demo_session) == {}
    assert first.region in official_tiers(session=demo_session, published_only=False)


def test_first_publication_starts_every_district_from_its_recommendation(
    demo_session: Session,
) -> None:
    pending = {p.region: p.recommended_tier for p in pending_changes(session=demo_session)}
    result = publish(session=demo_session, user=APPROVER)
    tiers = {code: t.tier for code, t in official_tiers(session=demo_session).items()}
    assert tiers == pending
    assert set(result.initial) == set(pending)


def test_publish_writes_the_audit_log(demo_session: Session) -> None:
    first = pending_changes(session=demo_session)[0]
    decide(session=demo_session, assessment_id=first.assessment_id, user=APPROVER, accept=False,
           tier=0, reason="hospital figures corrected by phone",
           **seen(demo_session, first.assessment_id))
    publish(session=demo_session, user=APPROVER)
    actions = list(demo_session.scalars(select(AuditEntry.action).where(
        AuditEntry.action.like("decision.%"))))
    assert actions == ["decision.overridden", "decision.publish"]


def test_decision_history_names_user_and_recommendation(demo_session: Session) -> None:
    first = pending_changes(session=demo_session)[0]
    decide(session=demo_session, assessment_id=first.assessment_id, user=APPROVER, accept=False,
           tier=0, reason="figures corrected", **seen(demo_session, first.assessment_id))
    (record,) = decision_history(session=demo_session, region=first.region)
    assert (record.user, record.recommended_tier, record.tier, record.reason) == (
        APPROVER, first.recommended_tier, 0, "figures corrected"
    )


def _make_insufficient(session: Session, region: str) -> int:
    """Turn ``region``'s newest assessment into an insufficient-data recommendation (-1)."""
    latest = current_run(session=session)
    assert latest is not None
    aid = next(i.assessment.id for i in latest.items if i.code == region)
    session.execute(update(Assessment).where(Assessment.id == aid).values(recommended_tier=-1))
    session.expire_all()
    return aid


def test_confirming_insufficient_data_keeps_the_official_tier(demo_session: Session) -> None:
    publish(session=demo_session, user=APPROVER)
    region, official = next(iter(official_tiers(session=demo_session).items()))
    # the published decision answered yesterday's assessment; today's says insufficient data
    latest = current_run(session=demo_session)
    assert latest is not None
    item = next(i for i in latest.items if i.code == region)
    yesterday = demo_session.scalar(select(Assessment.id).where(
        Assessment.region_id == item.region_id, Assessment.data_cutoff == latest.data_cutoff,
        Assessment.ruleset_id == latest.ruleset_row.id,
        Assessment.ref_date == latest.last_day - timedelta(days=1)))
    demo_session.execute(update(DecisionRow).where(DecisionRow.region_id == item.region_id)
                    .values(assessment_id=yesterday))
    aid = _make_insufficient(demo_session, region)
    assert region in {p.region for p in pending_changes(session=demo_session)}
    d = decide(session=demo_session, assessment_id=aid, user=APPROVER, accept=True, tier=None,
               reason="testing site closed for a week; keep the tier", **seen(demo_session, aid))
    assert (d.kind, d.tier, d.reason) == (
        "confirmed", official.tier, "testing site closed for a week; keep the tier"
    )
    assert region not in {p.region for p in pending_changes(session=demo_session)}
    assert official_tiers(session=demo_session, published_only=False)[region].tier == official.tier


def test_confirming_insufficient_data_without_an_official_tier_needs_an_override(
    demo_session: Session,
) -> None:
    region = pending_changes(session=demo_session)[0].region
    aid = _make_insufficient(demo_session, region)
    with pytest.raises(ReviewError, match="accept: insufficient data and no official tier"):
        decide(session=demo_session, assessment_id=aid, user=APPROVER, accept=True, tier=None,
               reason="agreed", **seen(demo_session, aid))


# --- only the current item can be decided; the official tier is the one taking effect last ---


def _item(session: Session, region: str) -> tuple[int, int, date]:
    """(region id, current assessment id, last day) of ``region`` in the newest stored run."""
    latest = current_run(session=session)
    assert latest is not None
    item = next(i for i in latest.items if i.code == region)
    return item.region_id, item.assessment.id, latest.last_day


def _earlier_row(session: Session, region_id: int, last_day: date, tier: int) -> int:
    """An earlier day's row of the current run standing for a form opened before new data,
    set to recommend ``tier`` (test-only edit of a stored row)."""
    earlier = session.scalar(select(Assessment.id).where(
        Assessment.region_id == region_id, Assessment.ref_date == last_day - timedelta(days=3)))
    assert earlier is not None
    session.execute(update(Assessment).where(Assessment.id == earlier)
                    .values(recommended_tier=tier))
    session.expire_all()
    return earlier


def test_decide_on_a_superseded_row_with_the_same_tier_decides_the_current_one(
    demo_session: Session,
) -> None:
    region_id, current, last_day = _item(demo_session, "D01")
    row = demo_session.get(Assessment, current)
    assert row is not None
    posted = _earlier_row(demo_session, region_id, last_day, row.recommended_tier)
    # decided the morning after the newest data: the demo policy's effective_delay_days 1
    # puts it in force the day after that (effective_from; was the data day + 1 before)
    morning = datetime.combine(last_day + timedelta(days=1), datetime.min.time(), UTC)
    d = decide(session=demo_session, assessment_id=posted, user=APPROVER, accept=True,
               tier=None, reason="typed before the feed landed", **seen(demo_session, posted),
               now=morning + timedelta(hours=9))
    assert (d.assessment_id, d.tier, d.effective_date) == (
        current, row.recommended_tier, last_day + timedelta(days=2))
    details = demo_session.scalars(select(AuditEntry.details).where(
        AuditEntry.action == "decision.confirmed")).one()
    assert (details["assessment_id"], details["posted_assessment_id"]) == (current, posted)
    assert "D01" not in {p.region for p in pending_changes(session=demo_session)}


def test_decide_on_a_superseded_row_with_another_tier_is_refused_naming_the_new_one(
    demo_session: Session,
) -> None:
    region_id, current, last_day = _item(demo_session, "D01")
    row = demo_session.get(Assessment, current)
    assert row is not None
    other = 0 if row.recommended_tier != 0 else 1
    posted = _earlier_row(demo_session, region_id, last_day, other)
    with pytest.raises(RecommendationChangedError) as caught:
        decide(session=demo_session, assessment_id=posted, user=APPROVER, accept=False, tier=0,
               reason="stale form", **seen(demo_session, posted))
    changed = caught.value
    assert (changed.region, changed.current_id, changed.tier) == (
        "D01", current, row.recommended_tier)
    assert f"assessment_id: {posted} is not the district's current recommendation" in str(changed)
    assert f"it now recommends {changed.tier_name} (assessment {current})" in str(changed)
    assert demo_session.scalars(select(DecisionRow)).all() == []


def test_decide_refuses_an_assessment_of_an_older_cutoff_with_another_tier(
    demo_session: Session,
) -> None:
    row = active_ruleset(session=demo_session)
    assert row is not None
    old = evaluate_districts(session=demo_session, ruleset_row=row,
                             cutoff=datetime(2026, 10, 1, 12, 0, tzinfo=UTC))
    assert old is not None
    region_id, current, _day = _item(demo_session, "D01")
    stale = demo_session.scalar(select(Assessment.id).where(
        Assessment.region_id == region_id, Assessment.data_cutoff == old.data_cutoff,
        Assessment.ref_date == old.end))
    now = demo_session.get(Assessment, current)
    assert stale is not None and now is not None
    demo_session.execute(update(Assessment).where(Assessment.id == stale)
                         .values(recommended_tier=(now.recommended_tier + 1) % 3))
    demo_session.expire_all()
    with pytest.raises(ReviewError, match=rf"assessment_id: {stale} is not the district's"):
        decide(session=demo_session, assessment_id=stale, user=APPROVER, accept=True, tier=None,
               reason="form opened before the new data", **seen(demo_session, stale))


def test_decide_refuses_an_assessment_of_a_retired_ruleset(
    demo_session: Session, tmp_path: Path
) -> None:
    _region_id, before, _day = _item(demo_session, "D01")
    text = COUNTY.read_text().replace("name: county-demo", "name: county-calm", 1)
    (tmp_path / "calm.yaml").write_text(text.replace('version: "2031.2"', 'version: "2031.3"'))
    # another name takes over from the demo's policy (since several policies may be active,
    # only ``replaces`` retires a policy of another name)
    store_ruleset(session=demo_session, path=tmp_path / "calm.yaml", author="rev", activate=True,
                  replaces="county-demo")
    with pytest.raises(ReviewError, match=rf"assessment_id: {before} is not the district's"):
        decide(session=demo_session, assessment_id=before, user=APPROVER, accept=True, tier=None,
               reason="form from before the activation", **seen(demo_session, before))
    # the new ruleset's item is the one that can be decided
    _region_id, after, _day = _item(demo_session, "D01")
    d = decide(session=demo_session, assessment_id=after, user=APPROVER, accept=True, tier=None,
               reason="agreed", **seen(demo_session, after))
    assert d.assessment_id == after != before


def test_stale_form_post_never_becomes_the_public_tier(demo_session: Session) -> None:
    # regression of the review finding (a decision on D01's oldest assessment became public)
    region_id, current, _day = _item(demo_session, "D01")
    oldest = demo_session.scalar(select(Assessment.id).where(Assessment.region_id == region_id)
                                 .order_by(Assessment.ref_date, Assessment.id).limit(1))
    decide(session=demo_session, assessment_id=current, user=APPROVER, accept=False, tier=2,
           reason="x", **seen(demo_session, current))
    with pytest.raises(ReviewError, match="assessment_id"):
        decide(session=demo_session, assessment_id=oldest, user=APPROVER, accept=False, tier=0,
               reason="stale form", **seen(demo_session, oldest))
    publish(session=demo_session, user=APPROVER)
    assert official_tiers(session=demo_session)["D01"].tier == 2


def _decision(session: Session, region_id: int, effective: date, tier: int, at: datetime) -> None:
    session.add(DecisionRow(
        policy="county-demo", region_id=region_id, assessment_id=None, effective_date=effective,
        tier=tier, kind="overridden", reason="invented", decided_by=None, decided_at=at,
        published_at=at,
    ))
    session.flush()


def test_official_tier_is_the_decision_taking_effect_last(demo_session: Session) -> None:
    region_id, _current, last_day = _item(demo_session, "D02")
    morning = datetime(2026, 12, 1, 8, 0, tzinfo=UTC)
    # decided later, but about an earlier day (e.g. a decision recorded before this fix)
    _decision(demo_session, region_id, last_day + timedelta(days=1), 3, morning)
    _decision(demo_session, region_id, last_day - timedelta(days=30), 1,
              morning + timedelta(hours=2))
    official = official_tiers(session=demo_session)["D02"]
    assert (official.tier, official.since) == (3, last_day + timedelta(days=1))


def test_official_tier_same_effective_day_goes_to_the_later_decision(
    demo_session: Session,
) -> None:
    region_id, _current, last_day = _item(demo_session, "D02")
    morning = datetime(2026, 12, 1, 8, 0, tzinfo=UTC)
    _decision(demo_session, region_id, last_day + timedelta(days=1), 1,
              morning + timedelta(hours=1))
    _decision(demo_session, region_id, last_day + timedelta(days=1), 3, morning)
    assert official_tiers(session=demo_session)["D02"].tier == 1


# --- publishing with nothing to publish ---


def test_publish_with_nothing_to_publish_writes_nothing(demo_session: Session) -> None:
    publish(session=demo_session, user=APPROVER)
    assert not has_something_to_publish(session=demo_session)
    entries = len(demo_session.scalars(select(AuditEntry)).all())
    again = publish(session=demo_session, user=APPROVER)
    assert (again.decisions, again.regions, again.initial) == (0, (), ())
    assert len(demo_session.scalars(select(AuditEntry)).all()) == entries


def test_has_something_to_publish_before_the_first_publication_and_after_a_decision(
    demo_session: Session,
) -> None:
    assert has_something_to_publish(session=demo_session)  # undecided districts start from it
    publish(session=demo_session, user=APPROVER)
    assert not has_something_to_publish(session=demo_session)
    _region_id, current, _day = _item(demo_session, "D01")
    decide(session=demo_session, assessment_id=current, user=APPROVER, accept=False, tier=0,
           reason="figures corrected", **seen(demo_session, current))
    assert has_something_to_publish(session=demo_session)


# --- the current run without reading the whole history ---


def _full_read(session: Session) -> tuple[tuple[int, datetime, date], list[tuple[str, int, date]]]:
    """The current items read from every day of the history, the slow and obvious way.

    As of the newest run's cutoff, each district's item is its row of the run's last day, and
    its ``since`` the first day of the trailing run of days with that day's recommended tier.
    """
    newest = newest_run(session=session)
    assert newest is not None
    row, run = newest
    history = session.execute(
        assessments_as_of(
            select(Region.code, Assessment.id, Assessment.ref_date, Assessment.recommended_tier)
            .join(Region, Region.id == Assessment.region_id),
            ruleset_id=row.id, cutoff=run.data_cutoff, end=run.last_day,
        ).order_by(Region.code, Assessment.ref_date.desc())
    ).all()
    by_code: dict[str, list[tuple[int, date, int]]] = {}
    for code, aid, day, tier in history:  # newest day first
        by_code.setdefault(code, []).append((aid, day, tier))
    found = []
    for code, rows in sorted(by_code.items()):
        aid, day, tier = rows[0]
        if day != run.last_day:
            continue  # not assessed on the run's last day: no item
        since = day
        for _aid, earlier, earlier_tier in rows[1:]:
            if earlier_tier != tier:
                break
            since = earlier
        found.append((code, aid, since))
    return (row.id, run.data_cutoff, run.last_day), found


def _same_as_the_full_read(session: Session) -> None:
    head, full = _full_read(session)
    fast = current_run(session=session)
    assert fast is not None
    assert (fast.ruleset_row.id, fast.data_cutoff, fast.last_day) == head
    assert [(i.code, i.assessment.id, i.since) for i in fast.items] == full


def test_current_run_matches_the_full_read_on_the_demo(demo_session: Session) -> None:
    _same_as_the_full_read(demo_session)


def test_current_run_matches_the_full_read_after_corrections_and_replays(
    demo_session: Session,
) -> None:
    row = active_ruleset(session=demo_session)
    assert row is not None
    latest = current_run(session=demo_session)
    assert latest is not None
    at = latest.data_cutoff
    for k, (region, first, value) in enumerate([
        ("D01", date(2026, 11, 20), 3000.0),  # a surge in the last days
        ("D03", date(2026, 10, 1), 0.0),  # weeks of zeros, long before the end
        ("D01", date(2026, 11, 20), 5.0),  # the surge corrected away again
    ]):
        at = at + timedelta(hours=1)
        append_vintage(
            session=demo_session, feed="correction", received_at=at,
            checksum=f"fix-{region}-{k}",
            rows=pd.DataFrame({"region": [region] * 10, "measure": ["cases"] * 10,
                               "ref_date": [first + timedelta(days=d) for d in range(10)],
                               "value": [value] * 10}),
        )
        evaluate_districts(session=demo_session, ruleset_row=row, cutoff=at)
        _same_as_the_full_read(demo_session)
    # a replay of an older cutoff is not the newest run; the newest stays as it was
    evaluate_districts(session=demo_session, ruleset_row=row,
                       cutoff=datetime(2026, 10, 1, 12, 0, tzinfo=UTC))
    _same_as_the_full_read(demo_session)
