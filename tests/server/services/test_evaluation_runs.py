"""Evaluation runs store only what changed; every reader sees each run as a full evaluation.

The oracle throughout is a *full* evaluation: the same policy text stored as a second ruleset row
that has no earlier assessments, so its run writes every region and day at the cutoff (what every
run did before runs stored only changes). The assessments in force at a run (for each region and
day, the row with the greatest cutoff not after the run's) must equal that full evaluation, and a
run must write exactly the region-days where the full evaluation differs from what the previous
run left in force.
"""

from __future__ import annotations

from dataclasses import replace
from datetime import UTC, date, datetime, time, timedelta
from typing import Any

import numpy as np
import pandas as pd
import pytest
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from server.readmodels.dossier import district_dossier, explanation_page
from server.readmodels.morning import morning_overview
from server.readmodels.pages import public_district_page, public_map
from server.readmodels.queue import review_queue
from server.services.assessments import assessments_as_of, current_assessment_id
from server.services.evaluation import evaluate_districts, newest_cutoff
from server.services.observations import MeasureRecord, define_measures
from server.services.regions import RegionRecord, store_regions
from server.services.review import current_run, decide, decision_history, pending_changes
from server.services.ruleset_activation import store_ruleset
from server.services.rulesets import active_ruleset, default_ruleset_path
from server.services.users import add_user
from server.store import revision_history
from server.store.models import Assessment, AuditEntry, EvaluationRun, Region
from server.store.models import Ruleset as RulesetRow
from server.store.vintages import append_vintage
from tests.server.conftest import seen

A = Assessment
CONTENT = (A.region_id, A.ref_date, A.recommended_tier, A.previous_tier, A.criteria,
           A.prepare_signals, A.explanation)
NOW = datetime(2026, 12, 1, 8, 0, tzinfo=UTC)
APPROVER = "otto.approver"  # invented demo account (demo_seed.seed)


def _in_force(session: Session, ruleset_id: int, cutoff: datetime) -> dict[tuple[int, date], Any]:
    """Region-day -> content of the assessments in force at ``cutoff`` (the readers' query)."""
    rows = session.execute(assessments_as_of(select(*CONTENT), ruleset_id=ruleset_id,
                                             cutoff=cutoff))
    return {(r[0], r[1]): tuple(r[2:]) for r in rows}


def _written(session: Session, ruleset_id: int, cutoff: datetime) -> dict[tuple[int, date], Any]:
    """Region-day -> content of the rows stored under exactly ``cutoff``."""
    rows = session.execute(select(*CONTENT).where(A.ruleset_id == ruleset_id,
                                                  A.data_cutoff == cutoff))
    return {(r[0], r[1]): tuple(r[2:]) for r in rows}


def _full(session: Session, row: RulesetRow, cutoff: datetime) -> dict[tuple[int, date], Any]:
    """The oracle: a full evaluation at ``cutoff`` of the same policy text under a fresh row."""
    twin = RulesetRow(name=f"{row.name}-full", version=f"{row.version}-{cutoff.timestamp():.0f}",
                      yaml_text=row.yaml_text, sha256=row.sha256, author="test",
                      created_at=NOW, status="draft")
    session.add(twin)
    session.flush()
    run = evaluate_districts(session=session, ruleset_row=twin, cutoff=cutoff)
    assert run is not None and not run.reused
    full = _written(session, twin.id, cutoff)
    assert run.written == len(full)
    return full


def _changed(new: dict[Any, Any], old: dict[Any, Any]) -> set[Any]:
    return {key for key, content in new.items() if old.get(key) != content}


def _assert_rows_add_up(session: Session) -> None:
    """Every run's ``rows_written`` is the number of rows stored under its cutoff."""
    runs = session.execute(select(EvaluationRun.ruleset_id, EvaluationRun.data_cutoff,
                                  EvaluationRun.rows_written)).all()
    for ruleset_id, cutoff, written in runs:
        assert written == session.scalar(select(func.count()).select_from(A).where(
            A.ruleset_id == ruleset_id, A.data_cutoff == cutoff))


def _revise(session: Session, region: str, first: date, days: int, value: float,
            at: datetime) -> None:
    """A correction file: new ``cases`` values of ``region`` for ``days`` days from ``first``."""
    append_vintage(
        session=session, feed="correction", received_at=at, checksum=f"fix-{region}-{at}",
        rows=pd.DataFrame({"region": [region] * days, "measure": ["cases"] * days,
                           "ref_date": [first + timedelta(days=k) for k in range(days)],
                           "value": [value] * days}),
    )


def _region_id(session: Session, code: str) -> int:
    rid = session.scalar(select(Region.id).where(Region.code == code))
    assert rid is not None
    return rid


def _pooled_with(session: Session, code: str) -> set[int]:
    """Ids of ``code`` and the other districts of its parent area: small districts nowcast on
    reporting delays pooled over their area (:func:`server.services.district_indicators.
    nowcast_inputs`), so a revision of one district may move its area's pooled nowcasts."""
    region = session.scalar(select(Region).where(Region.code == code))
    assert region is not None and region.parent_id is not None
    return set(session.scalars(select(Region.id).where(Region.parent_id == region.parent_id,
                                                       Region.level == "district")))


def _assert_moved_by_the_pool(written: dict[tuple[int, date], Any], revised: int,
                              pool: set[int], area: str) -> None:
    """Every row written for a district other than the revised one rests on a nowcast pooled
    over the revised district's area (the only way the revision reaches it)."""
    others = {(rid, day): content for (rid, day), content in written.items() if rid != revised}
    assert {rid for rid, _day in written} <= pool
    for content in others.values():
        bases = {c.get("nowcast_basis") for c in content[-1]["data"]["criteria"]}
        assert f"reporting delays pooled over {area}" in bases


def _area_name(session: Session, code: str) -> str:
    region = session.scalar(select(Region).where(Region.code == code))
    assert region is not None and region.parent is not None
    return region.parent.name


# --- on the seeded demo (SQLite) --------------------------------------------------------------


def _current_items(session: Session) -> list[tuple[Any, ...]]:
    """Each district's current review item, by what the pages show of it."""
    run = current_run(session=session)
    assert run is not None
    return [
        (i.code, i.assessment.id, i.assessment.ref_date, i.assessment.recommended_tier,
         i.assessment.previous_tier, i.assessment.prepare_signals,
         i.assessment.explanation.get("sentence", ""), i.since)
        for i in run.items
    ]


def _pages(session: Session) -> dict[str, Any]:
    """What every reader shows (the overview without its run cutoff, compared apart)."""
    overview = morning_overview(session=session, now=NOW)
    explained = explanation_page(session=session, code="D03")
    return {
        "overview": replace(overview, data_cutoff=None),
        "dossier": district_dossier(session=session, code="D03"),
        "explanation": replace(explained, run_cutoff=None),
        "explanation_day": replace(
            explanation_page(session=session, code="D05", day=date(2026, 10, 16)),
            run_cutoff=None),
        "latest": _current_items(session),
        "pending": pending_changes(session=session),
        "queue": review_queue(session=session),
        "public_map": public_map(session=session),
        "public_page": public_district_page(session=session, code="D03", threshold=10),
    }


@pytest.mark.slow
def test_a_run_on_unchanged_data_writes_nothing_and_every_page_reads_the_same(
    demo_session: Session,
) -> None:
    row = active_ruleset(session=demo_session)
    cutoff = newest_cutoff(session=demo_session)
    assert row is not None and cutoff is not None
    before = _pages(demo_session)
    later = cutoff + timedelta(hours=3)  # a scheduled run with no new file
    run = evaluate_districts(session=demo_session, ruleset_row=row, cutoff=later)
    assert run is not None and not run.reused and run.written == 0
    recorded = demo_session.scalar(select(EvaluationRun).where(EvaluationRun.data_cutoff == later))
    assert recorded is not None and recorded.rows_written == 0
    assert (recorded.first_day, recorded.last_day) == (run.start, run.end)
    after = _pages(demo_session)
    for name, page in before.items():
        assert after[name] == page, name
    # shown under the new run, computed at the old cutoff
    assert morning_overview(session=demo_session, now=NOW).data_cutoff == later
    explained = explanation_page(session=demo_session, code="D03")
    assert (explained.data_cutoff, explained.run_cutoff) == (cutoff, later)
    assert _in_force(demo_session, row.id, later) == _in_force(demo_session, row.id, cutoff)
    _assert_rows_add_up(demo_session)


@pytest.mark.slow
def test_a_revision_of_one_district_rewrites_only_the_days_it_changed(
    demo_session: Session,
) -> None:
    row = active_ruleset(session=demo_session)
    cutoff = newest_cutoff(session=demo_session)
    assert row is not None and cutoff is not None
    d01 = _region_id(demo_session, "D01")
    before = _in_force(demo_session, row.id, cutoff)
    first = date(2026, 10, 20)  # ten days of D01 cases corrected upwards (invented)
    at = cutoff + timedelta(hours=2)
    _revise(demo_session, "D01", first, 10, 3000.0, at)
    run = evaluate_districts(session=demo_session, ruleset_row=row, cutoff=at)
    assert run is not None and run.written > 0
    written = _written(demo_session, row.id, at)
    # D01 and, through the delays pooled over its area, only its area's pooled districts
    assert d01 in {rid for rid, _day in written}
    _assert_moved_by_the_pool(written, d01, _pooled_with(demo_session, "D01"),
                              _area_name(demo_session, "D01"))
    assert min(day for _rid, day in written) == first  # nothing before the first corrected day
    full = _full(demo_session, row, at)
    assert _in_force(demo_session, row.id, at) == full
    assert set(written) == _changed(full, before)
    # hysteresis carries the earlier tier change forward: days long after the corrected week
    # (and after any 7-day window holding it) differ, and are rewritten
    tiers_before = [before[(d01, first + timedelta(days=k))][0] for k in range(20)]
    tiers_after = [full[(d01, first + timedelta(days=k))][0] for k in range(20)]
    assert tiers_before != tiers_after
    assert max(day for rid, day in written if rid == d01) > first + timedelta(days=9 + 7)
    assert run.written == len(written)
    _assert_rows_add_up(demo_session)


@pytest.mark.slow
def test_decisions_keep_resolving_across_runs(demo_session: Session) -> None:
    row = active_ruleset(session=demo_session)
    cutoff = newest_cutoff(session=demo_session)
    assert row is not None and cutoff is not None
    # D01 is revised; the other district is one outside D01's area, whose nowcasts do not pool
    # D01's delays (the first such district of the demo)
    pool = _pooled_with(demo_session, "D01")
    other = demo_session.scalar(select(Region.code).where(
        Region.level == "district", Region.id.not_in(pool)).order_by(Region.code))
    assert other is not None
    d01, d02 = _region_id(demo_session, "D01"), _region_id(demo_session, other)
    old_d01 = current_assessment_id(session=demo_session, region_id=d01)
    old_d02 = current_assessment_id(session=demo_session, region_id=d02)
    assert old_d01 is not None and old_d02 is not None
    decide(session=demo_session, assessment_id=old_d01, user=APPROVER, accept=True, tier=None,
           reason="agreed at the morning meeting", **seen(demo_session, old_d01))
    decide(session=demo_session, assessment_id=old_d02, user=APPROVER, accept=False, tier=0,
           reason="local cluster contained", **seen(demo_session, old_d02))
    at = cutoff + timedelta(hours=2)
    # D01's last week only, each day one case more than known (a small correction that keeps
    # its recommendation, so the late form below still matches)
    week = [date(2026, 11, 24) + timedelta(days=k) for k in range(7)]
    known = [revision_history(session=demo_session, region="D01", measure="cases",
                              ref_date=day)[-1].value for day in week]
    append_vintage(
        session=demo_session, feed="correction", received_at=at, checksum="fix-D01-week",
        rows=pd.DataFrame({"region": "D01", "measure": "cases", "ref_date": week,
                           "value": [v + 1.0 for v in known]}),
    )
    run = evaluate_districts(session=demo_session, ruleset_row=row, cutoff=at)
    assert run is not None and run.written > 0
    # the other district unchanged: its decided row is still the current item and still settled
    assert current_assessment_id(session=demo_session, region_id=d02) == old_d02
    assert other not in {p.region for p in pending_changes(session=demo_session)}
    # D01 changed on its last day: a newer row is current; the decided row stays readable
    new_d01 = current_assessment_id(session=demo_session, region_id=d01)
    assert new_d01 is not None and new_d01 != old_d01
    old_row = demo_session.get(Assessment, old_d01)
    assert old_row is not None and old_row.data_cutoff == cutoff
    history = {h.region: h for h in decision_history(session=demo_session)}
    assert history["D01"].recommended_tier == old_row.recommended_tier
    assert history[other].tier == 0
    # a form opened before the correction: D01 still recommends the same tier, so the decision
    # goes through against the current row and the audit names the row the form was posted for
    new_row = demo_session.get(Assessment, new_d01)
    assert new_row is not None and new_row.recommended_tier == old_row.recommended_tier
    late = decide(session=demo_session, assessment_id=old_d01, user=APPROVER, accept=True,
                  tier=None, reason="form opened before the correction",
                  **seen(demo_session, old_d01))
    assert late.assessment_id == new_d01
    entry = demo_session.scalars(
        select(AuditEntry).where(AuditEntry.action == "decision.confirmed")
        .order_by(AuditEntry.id.desc())
    ).first()
    assert entry is not None and entry.details["posted_assessment_id"] == old_d01


@pytest.mark.slow
def test_replaying_an_older_cutoff_leaves_later_runs_reading_the_same(
    demo_session: Session,
) -> None:
    row = active_ruleset(session=demo_session)
    cutoff = newest_cutoff(session=demo_session)
    assert row is not None and cutoff is not None
    original = _in_force(demo_session, row.id, cutoff)
    wrong, right = cutoff + timedelta(hours=1), cutoff + timedelta(hours=2)
    _revise(demo_session, "D04", date(2026, 11, 1), 10, 2500.0, wrong)  # a wrong file ...
    d04 = _region_id(demo_session, "D04")
    sent = []  # ... withdrawn by re-sending the values known before it (the store's own read)
    for k in range(10):
        day = date(2026, 11, 1) + timedelta(days=k)
        known = [r.value for r in revision_history(session=demo_session, region="D04",
                                                    measure="cases", ref_date=day)
                 if r.received_at <= cutoff]
        sent.append(known[-1])
    append_vintage(
        session=demo_session, feed="correction", received_at=right, checksum="withdraw-D04",
        rows=pd.DataFrame({"region": ["D04"] * 10, "measure": ["cases"] * 10,
                           "ref_date": [date(2026, 11, 1) + timedelta(days=k) for k in range(10)],
                           "value": sent}),
    )
    later = evaluate_districts(session=demo_session, ruleset_row=row, cutoff=right)
    assert later is not None and later.written == 0  # the data are back to the original
    assert _in_force(demo_session, row.id, right) == original
    replay = evaluate_districts(session=demo_session, ruleset_row=row, cutoff=wrong)
    assert replay is not None and replay.written > 0
    # the later run still reads the original assessments (copied to its cutoff where needed)
    assert _in_force(demo_session, row.id, right) == original
    copies = _written(demo_session, row.id, right)
    assert copies and d04 in {rid for rid, _day in copies}
    # beside D04, only districts whose wrong-file rows rest on delays pooled over D04's area
    _assert_moved_by_the_pool(_written(demo_session, row.id, wrong), d04,
                              _pooled_with(demo_session, "D04"), _area_name(demo_session, "D04"))
    assert {rid for rid, _day in copies} <= {rid for rid, _day in _written(demo_session, row.id,
                                                                              wrong)}
    assert _in_force(demo_session, row.id, wrong) == _full(demo_session, row, wrong)
    _assert_rows_add_up(demo_session)


# --- a small invented scenario on both back ends --------------------------------------------

MEASURES = ("cases", "tests", "positives", "hosp_admissions", "gp_ari")
END = date(2030, 6, 30)
DAYS = 70


def _arrival(day: date) -> datetime:
    return datetime.combine(day + timedelta(days=1), time(5), UTC)


@pytest.fixture
def small(session: Session) -> Session:
    """Three invented districts with 70 days of daily counts, the county policy active."""
    records = [RegionRecord(code="C", name="Testcounty", level="county", parent=None,
                            population=300_000)]
    records += [RegionRecord(code=f"T{i}", name=f"Testdistrict {i}", level="district",
                             parent="C", population=100_000) for i in range(3)]
    define_measures(session=session, measures=[
        MeasureRecord(name=m, unit="count", kind="count", aggregation="sum")
        for m in (*MEASURES, "icu_occupied", "icu_staffed", "ww_concentration", "ww_flow")])
    store_regions(session=session, records=records, actor="test", source="test")
    add_user(session=session, name=APPROVER, role="approver", password="test-pass-1")
    rng = np.random.default_rng(11)
    codes = [r.code for r in records[1:]]
    for j in range(DAYS):
        day = END - timedelta(days=DAYS - 1 - j)
        frames = [pd.DataFrame({"region": codes, "measure": m, "ref_date": day,
                                "value": rng.poisson(lam * (1 + 2 * j / DAYS), 3).astype(float)})
                  for m, lam in zip(MEASURES, (40, 800, 60, 3, 50), strict=True)]
        append_vintage(session=session, feed="daily", received_at=_arrival(day),
                       checksum=f"daily-{day}", rows=pd.concat(frames))
    store_ruleset(session=session, path=default_ruleset_path(None), author="test",
                  activate=True)
    return session


def test_runs_store_changes_only_on_both_back_ends(small: Session) -> None:
    row = active_ruleset(session=small)
    assert row is not None
    first = _arrival(END)
    full_run = small.scalar(select(EvaluationRun).where(EvaluationRun.ruleset_id == row.id))
    assert full_run is not None and full_run.data_cutoff == first
    assert full_run.rows_written == 3 * DAYS
    assert (full_run.first_day, full_run.last_day) == (END - timedelta(days=DAYS - 1), END)
    # same data, later cutoff: nothing written, readers unchanged
    latest = current_run(session=small)
    assert latest is not None
    quiet = evaluate_districts(session=small, ruleset_row=row, cutoff=first + timedelta(hours=4))
    assert quiet is not None and quiet.written == 0 and not quiet.reused
    again = current_run(session=small)
    assert again is not None and again.data_cutoff == first + timedelta(hours=4)
    assert [(i.code, i.assessment.id, i.since) for i in again.items] == [
        (i.code, i.assessment.id, i.since) for i in latest.items]
    # the same cutoff again is reused from the run record
    reused = evaluate_districts(session=small, ruleset_row=row, cutoff=first + timedelta(hours=4))
    assert reused is not None and reused.reused
    # a correction of T1 only
    t1 = _region_id(small, "T1")
    before = _in_force(small, row.id, first + timedelta(hours=4))
    at = first + timedelta(hours=6)
    _revise(small, "T1", END - timedelta(days=20), 5, 900.0, at)
    fixed = evaluate_districts(session=small, ruleset_row=row, cutoff=at)
    assert fixed is not None and fixed.written > 0
    written = _written(small, row.id, at)
    assert {rid for rid, _day in written} == {t1}
    full = _full(small, row, at)
    assert _in_force(small, row.id, at) == full
    assert set(written) == _changed(full, before)
    # the page readers follow the run
    dossier = district_dossier(session=small, code="T1")
    assert dossier.last_day == END and len(dossier.dates) == len(dossier.recommended)
    assert dossier.recommended[-1] == full[(t1, END)][0]
    explained = explanation_page(session=small, code="T1")
    assert explained.run_cutoff == at and explained.day == END
    # the assessment made for the day, from the data as they were then; the newest reading
    # with ``as_of`` (issue 11: a past day is not explained with later data)
    assert explained.data_cutoff == first and explained.first
    newest = explanation_page(session=small, code="T1", as_of=at)
    assert newest.data_cutoff == (at if (t1, END) in written else first)
    assert (explained.revised is None) == ((t1, END) not in written)
    _assert_rows_add_up(small)


def test_a_decision_on_a_row_of_an_earlier_run_stays_current_while_unchanged(
    small: Session,
) -> None:
    row = active_ruleset(session=small)
    assert row is not None
    t0 = _region_id(small, "T0")
    current = current_assessment_id(session=small, region_id=t0)
    assert current is not None
    decide(session=small, assessment_id=current, user=APPROVER, accept=False, tier=1,
           reason="invented test decision", **seen(small, current))
    at = _arrival(END) + timedelta(hours=6)
    _revise(small, "T2", END - timedelta(days=10), 3, 700.0, at)
    run = evaluate_districts(session=small, ruleset_row=row, cutoff=at)
    assert run is not None and run.written > 0
    assert current_assessment_id(session=small, region_id=t0) == current
    assert "T0" not in {p.region for p in pending_changes(session=small)}
    (record,) = decision_history(session=small, region="T0")
    assert record.tier == 1 and record.recommended_tier is not None
