"""Several policies active at once: activation per name, evaluation of every policy, and review,
decisions and publication per policy.

The database is the invented demo county with its three policies (``several_policies_file`` in
tests/conftest.py); each test works on its own copy. The checks are the design's own contract
(issue 14, item 4), not published values.
"""

from __future__ import annotations

import shutil
from collections.abc import Iterator
from datetime import UTC, date, datetime, timedelta
from pathlib import Path

import pandas as pd
import pytest
from sqlalchemy import select

from server.config import Settings
from server.readmodels import policy_columns as policy_columns_module
from server.readmodels.policy_columns import assessed_regions, policy_columns
from server.services.assessments import newest_run_of
from server.services.database import Database
from server.services.evaluation import (
    EvaluationRun,
    evaluate_if_behind,
    newest_cutoff,
    policies_behind,
)
from server.services.notify import Event
from server.services.review import decide, official_tiers, pending_changes, publish
from server.services.review_official import policy_owners
from server.services.review_publication import has_something_to_publish
from server.services.ruleset_activation import retire_ruleset, store_ruleset
from server.services.rulesets import InactivePolicyError, active_ruleset, active_rulesets
from server.store.models import Assessment, Decision, Region
from server.store.vintages import append_vintage

pytestmark = pytest.mark.slow
APPROVER = "otto.approver"  # invented demo account (demo_seed.seed)
POLICIES = ["county-demo", "county-influenza", "county-rsv"]
COUNTY = Path(__file__).resolve().parents[3] / "rules" / "policies" / "county.yaml"


@pytest.fixture
def db(several_policies_file: Path, tmp_path: Path) -> Iterator[Database]:
    path = tmp_path / "demo.db"
    shutil.copyfile(several_policies_file, path)
    database = Database.from_settings(Settings(database_url=f"sqlite:///{path}",
                                               demo_mode=True))
    try:
        yield database
    finally:
        database.dispose()


def test_the_demo_runs_three_policies_the_first_stored_leading(db: Database) -> None:
    with db.sessions() as s:
        assert [r.name for r in active_rulesets(session=s)] == POLICIES
        lead = active_ruleset(session=s)
        assert lead is not None and lead.name == "county-demo"
        assert active_ruleset(session=s, policy="county-rsv") is not None
        assert active_ruleset(session=s, policy="no-such-policy") is None


def test_a_new_version_replaces_only_its_own_name_and_keeps_its_place(
    db: Database, tmp_path: Path
) -> None:
    text = COUNTY.read_text().replace('version: "2031.2"', 'version: "2031.9"', 1)
    path = tmp_path / "county-next.yaml"
    path.write_text(text)
    with db.transaction() as s:
        row = store_ruleset(session=s, path=path, author="test", activate=True)
        rows = active_rulesets(session=s)
        # the new version of the lead policy is still first: order by the name's first storing
        assert [(r.name, r.id == row.id) for r in rows] == [
            ("county-demo", True), ("county-influenza", False), ("county-rsv", False)]


def _new_vintage(db: Database) -> None:
    with db.transaction() as s:
        newest = newest_cutoff(session=s)
        assert newest is not None
        append_vintage(
            session=s, feed="late-file", received_at=newest + timedelta(hours=2),
            checksum="late-file-1",
            rows=pd.DataFrame({"region": ["D01"], "measure": ["cases"],
                               "ref_date": [date(2026, 10, 1)], "value": [3.0]}),
        )


def test_new_data_evaluate_every_active_policy(db: Database) -> None:
    with db.sessions() as s:
        rows, _cutoff = policies_behind(session=s)
        assert rows == []  # the seed evaluated every policy
    _new_vintage(db)
    with db.sessions() as s:
        behind, cutoff = policies_behind(session=s)
        assert [r.name for r in behind] == POLICIES
    runs: list[EvaluationRun] = []
    first = evaluate_if_behind(db, runs=runs)
    assert first is not None and first.ruleset_name == "county-demo"
    assert [r.ruleset_name for r in runs] == POLICIES
    assert {r.data_cutoff for r in runs} == {cutoff}
    with db.sessions() as s:
        assert policies_behind(session=s)[0] == []
        for row in active_rulesets(session=s):
            run = newest_run_of(session=s, ruleset_id=row.id)
            assert run is not None and run.data_cutoff == cutoff
    assert evaluate_if_behind(db) is None  # nothing new


def test_pending_changes_belong_to_their_policy(db: Database) -> None:
    with db.sessions() as s:
        every = pending_changes(session=s)
        by_policy = {name: pending_changes(session=s, policy=name) for name in POLICIES}
    assert sum(1 for found in by_policy.values() if found) >= 2
    assert every == [p for name in POLICIES for p in by_policy[name]]
    assert all(p.policy == name for name, found in by_policy.items() for p in found)


def _policy_with_pending(db: Database, other_than: str) -> str:
    with db.sessions() as s:
        return next(p.policy for p in pending_changes(session=s) if p.policy != other_than)


def test_deciding_one_policy_leaves_the_others_as_they_were(db: Database) -> None:
    policy = _policy_with_pending(db, other_than="county-demo")
    with db.transaction() as s:
        before = {name: pending_changes(session=s, policy=name) for name in POLICIES}
        official_before = {name: official_tiers(session=s, published_only=False, policy=name)
                           for name in POLICIES}
        change = before[policy][0]
        made = decide(session=s, assessment_id=change.assessment_id, user=APPROVER,
                      accept=True, tier=None, reason="invented: per-policy decision",
                      official_tier=change.official_tier,
                      official_decision_id=change.official_decision_id)
        assert made.policy == policy
        stored = s.get(Decision, made.id)
        assert stored is not None and stored.policy == policy
        after = {name: pending_changes(session=s, policy=name) for name in POLICIES}
        official_after = {name: official_tiers(session=s, published_only=False, policy=name)
                          for name in POLICIES}
    assert after[policy] == before[policy][1:]
    assert official_after[policy][change.region].tier == change.recommended_tier
    for name in POLICIES:
        if name != policy:
            assert after[name] == before[name]
            assert official_after[name] == official_before[name]


def test_a_policy_is_published_alone_or_with_the_others(db: Database) -> None:
    with db.transaction() as s:
        decided = []
        for name in POLICIES:  # one decision per policy that has a pending change
            found = pending_changes(session=s, policy=name)
            if not found:
                continue
            change = found[0]
            decide(session=s, assessment_id=change.assessment_id, user=APPROVER, accept=True,
                   tier=None, reason="invented", official_tier=change.official_tier,
                   official_decision_id=change.official_decision_id)
            decided.append(name)
        assert len(decided) >= 2
        one = decided[1]
        assert has_something_to_publish(session=s, policy=one)
        result = publish(session=s, user=APPROVER, policy=one)
        assert result.policies == (one,) and result.decisions == 1
        assert not has_something_to_publish(session=s, policy=one)
        waiting = set(s.scalars(select(Decision.policy).where(Decision.published_at.is_(None))))
        assert waiting == set(decided) - {one}
        rest = publish(session=s, user=APPROVER)
        assert set(rest.policies) == set(decided) - {one}
        assert not has_something_to_publish(session=s)


def test_an_unknown_policy_is_refused_with_its_name(db: Database) -> None:
    with db.transaction() as s, pytest.raises(InactivePolicyError,
                                              match="'no-such-policy' is not an active policy"):
        publish(session=s, user=APPROVER, policy="no-such-policy")


def test_decisions_of_a_policy_no_longer_active_count_for_the_lead(db: Database) -> None:
    """A single-policy database keeps every decision: one recorded under a name no longer
    active (a replaced policy) is the lead's official tier, never another policy's."""
    with db.transaction() as s:
        region = s.scalar(select(Region).where(Region.code == "D01"))
        assert region is not None
        at = datetime(2026, 12, 1, 9, 0, tzinfo=UTC)
        old = Decision(policy="an-old-policy", region_id=region.id, assessment_id=None,
                       effective_date=date(2026, 12, 2), tier=2, kind="recorded",
                       reason="invented", decided_by=None, decided_at=at, published_at=at)
        s.add(old)
        s.flush()
        lead = official_tiers(session=s, policy="county-demo")["D01"]
        flu = official_tiers(session=s, policy="county-influenza")["D01"]
    assert (lead.decision_id, lead.policy, lead.tier) == (old.id, "an-old-policy", 2)
    assert flu.policy == "county-influenza" and flu.decision_id != old.id


def test_notices_of_two_policies_are_two_notices() -> None:
    same = {"kind": "tier_change", "region": "D01", "date": date(2026, 11, 30), "tier": 1,
            "previous": 0, "signal": None, "sentence": "invented"}
    covid, flu = Event(**same, policy="county-demo"), Event(**same, policy="county-influenza")
    assert covid.key != flu.key
    assert covid.as_json()["policy"] == "county-demo"
    assert Event(**same).key == "tier_change|D01|2026-11-30|1"  # as before, without a policy


def test_assessed_regions_go_up_the_hierarchy(db: Database) -> None:
    with db.sessions() as s:
        regions = {r.id: r for r in s.scalars(select(Region))}
        districts = {r.code: r for r in regions.values() if r.level == "district"}
        own = assessed_regions(session=s, level="districts")
        areas = assessed_regions(session=s, level="areas")
        county = assessed_regions(session=s, level="county")
    assert {c: r.code for c, r in own.items()} == {c: c for c in districts}
    for code, district in districts.items():
        parent = regions[district.parent_id]  # type: ignore[index]
        assert areas[code].code == parent.code and parent.level == "region"  # the demo's areas
        top = regions[parent.parent_id]  # type: ignore[index]
        assert top.level == "county" and top.parent_id is None
        assert county[code].code == top.code


def test_an_area_policy_gives_each_district_its_area_tier(
    db: Database, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A policy that assesses areas (``level: areas``, read with getattr so that rulesets
    without the field are district policies): each district shows its area's assessment."""
    with db.transaction() as s:
        rsv = active_ruleset(session=s, policy="county-rsv")
        assert rsv is not None
        run = newest_run_of(session=s, ruleset_id=rsv.id)
        assert run is not None
        area_ids = list(s.scalars(select(Region.id).where(Region.level == "region")
                                  .order_by(Region.code)))  # the demo's areas
        for k, rid in enumerate(area_ids):  # invented area assessments on the run's last day
            s.add(Assessment(
                ruleset_id=rsv.id, region_id=rid, ref_date=run.last_day,
                data_cutoff=run.data_cutoff, recommended_tier=k % 3, previous_tier=k % 3,
                criteria={}, prepare_signals={}, explanation={"sentence": "invented"},
                content_sha256=None, created_at=run.data_cutoff))
        s.flush()
        monkeypatch.setattr(policy_columns_module, "policy_level",
                            lambda rs: "areas" if rs.name == "county-rsv" else "districts")
        policy_columns_module._CACHE.clear()
        column = next(c for c in policy_columns(session=s) if c.name == "county-rsv")
        areas = assessed_regions(session=s, level="areas")
        tier_of_area = {s.get(Region, rid).code: k % 3  # type: ignore[union-attr]
                        for k, rid in enumerate(area_ids)}
    policy_columns_module._CACHE.clear()
    assert column.level == "areas" and len(column.cells) == 14
    for code, cell in column.cells.items():
        assert cell.area == areas[code].name
        assert cell.recommended_tier == tier_of_area[areas[code].code]


def test_a_stopped_policy_counts_for_no_other(db: Database) -> None:
    with db.transaction() as s:
        lead = official_tiers(session=s, published_only=False)
        flu = active_ruleset(session=s, policy="county-influenza")
        assert flu is not None
        retire_ruleset(session=s, row=flu, actor="test")
        assert [r.name for r in active_rulesets(session=s)] == ["county-demo", "county-rsv"]
        assert policy_owners(s)["county-influenza"] is None
        after = official_tiers(session=s, published_only=False)
    assert after == lead  # the stopped influenza policy's decisions stay out of the lead's


def test_a_replaced_policy_hands_its_decisions_to_the_one_replacing_it(
    db: Database, tmp_path: Path
) -> None:
    text = (COUNTY.parent / "influenza.yaml").read_text().replace(
        "name: county-influenza", "name: invented-flu-next", 1)
    path = tmp_path / "flu-next.yaml"
    path.write_text(text)
    with db.transaction() as s:
        before = official_tiers(session=s, policy="county-influenza")
        lead = official_tiers(session=s)
        store_ruleset(session=s, path=path, author="test", activate=True,
                      replaces="county-influenza")
        assert [r.name for r in active_rulesets(session=s)] == [
            "county-demo", "county-rsv", "invented-flu-next"]
        assert policy_owners(s)["county-influenza"] == "invented-flu-next"
        taken_over = official_tiers(session=s, policy="invented-flu-next")
        assert official_tiers(session=s) == lead
    assert {c: o.tier for c, o in taken_over.items()} == {c: o.tier for c, o in before.items()}
