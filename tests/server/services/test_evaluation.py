"""Daily evaluation service: stored assessments carry ruleset and cutoff and are reproducible."""

from __future__ import annotations

from datetime import UTC, date, datetime
from pathlib import Path

import pytest
from sqlalchemy import delete, select
from sqlalchemy.orm import Session

from server.services.evaluation import (
    active_ruleset,
    active_rulesets,
    evaluate_districts,
    store_ruleset,
)
from server.services.policies import activate_version
from server.services.review import current_run
from server.store.models import Assessment, AuditEntry, EvaluationRun

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


# --- one way to activate: the other versions of the policy retired, audited, evaluated ---
# (since several policies may be active at once, activating another name no longer retires
# the demo's policy; ``replaces`` does)

COUNTY = Path(__file__).resolve().parents[3] / "rules" / "policies" / "county.yaml"


def _variant(folder: Path, name: str, version: str) -> Path:
    """The demo county's policy under another (invented) name and version."""
    text = COUNTY.read_text().replace("name: county-demo", f"name: {name}", 1)
    path = folder / f"{name}-{version}.yaml"
    path.write_text(text.replace('version: "2031.2"', f'version: "{version}"', 1))
    return path


def _active_names(session: Session) -> list[str]:
    return [r.name for r in active_rulesets(session=session)]


def _active_versions(session: Session) -> list[tuple[str, str]]:
    return sorted((r.name, r.version) for r in active_rulesets(session=session))


def test_store_ruleset_activation_keeps_other_policies_and_replaces_on_request(
    demo_session: Session, tmp_path: Path
) -> None:
    store_ruleset(session=demo_session, path=_variant(tmp_path, "calm", "1"), activate=True)
    assert _active_names(demo_session) == ["county-demo", "calm"]  # the first stored leads
    store_ruleset(session=demo_session, path=_variant(tmp_path, "brisk", "1"), activate=True,
                  replaces="county-demo")
    assert _active_names(demo_session) == ["calm", "brisk"]


def test_activations_by_both_ways_leave_one_active_version_per_policy(
    demo_session: Session, tmp_path: Path
) -> None:
    seen = []
    for k, name in enumerate(["calm", "brisk", "calm", "brisk"]):
        if k % 2:
            row = store_ruleset(session=demo_session, path=_variant(tmp_path, name, str(k)))
            activate_version(session=demo_session, ruleset_id=row.id, actor="rev")
        else:
            store_ruleset(session=demo_session, path=_variant(tmp_path, name, str(k)),
                          author="rev", activate=True)
        seen.append(_active_versions(demo_session))
    assert seen == [
        [("calm", "0"), ("county-demo", "2031.2")],
        [("brisk", "1"), ("calm", "0"), ("county-demo", "2031.2")],
        [("brisk", "1"), ("calm", "2"), ("county-demo", "2031.2")],
        [("brisk", "3"), ("calm", "2"), ("county-demo", "2031.2")],
    ]


def test_activation_is_audited_and_evaluates_the_new_ruleset(
    demo_session: Session, tmp_path: Path
) -> None:
    row = store_ruleset(session=demo_session, path=_variant(tmp_path, "calm", "1"),
                        author="rev", activate=True)
    latest = current_run(session=demo_session, policy="calm")
    assert latest is not None and latest.ruleset_row.id == row.id and len(latest.items) == 14
    actions = list(demo_session.scalars(select(AuditEntry.subject).where(
        AuditEntry.action == "ruleset.activate", AuditEntry.actor == "rev")))
    assert actions == ["calm 1"]
