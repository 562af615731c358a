"""Seeding the demo database: daily vintages, as-of reads, idempotent refresh, safety."""

from __future__ import annotations

import sqlite3
from collections.abc import Iterator
from contextlib import closing
from datetime import UTC, date, datetime, timedelta
from pathlib import Path

import numpy as np
import pytest
from sqlalchemy import func, select

from demo_seed.feeds import LATE_DAYS
from demo_seed.seed import DEMO_USERS, SeedSummary, received_at, seed_demo
from server.config import Settings
from server.services.database import Database
from server.services.errors import NotADemoDatabaseError
from server.services.feed_push import token_matches
from server.services.regions import RegionRecord, store_regions
from server.services.rulesets import active_ruleset, active_rulesets
from server.store import read_dense, revision_history
from server.store.models import Assessment, Observation, Region, User, Vintage
from server.store.models import Ruleset as RulesetRow

END = date(2026, 3, 31)
DAYS = 150


@pytest.fixture(scope="module")
def seeded_file(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, SeedSummary]:
    """The demo (seed 3) seeded once for this module, its file closed (everything written to
    it) and its summary; read it through ``seeded``, or copy it first."""
    path: Path = tmp_path_factory.mktemp("seed") / "demo.db"
    db = Database.from_settings(Settings(database_url=f"sqlite:///{path}", demo_mode=True))
    try:
        summary = seed_demo(db, seed=3, days=DAYS, end=END)
    finally:
        db.dispose()
    return path, summary


@pytest.fixture(scope="module")
def seeded_with_summary(
    seeded_file: tuple[Path, SeedSummary],
) -> Iterator[tuple[Database, SeedSummary]]:
    path, summary = seeded_file
    db = Database.from_settings(Settings(database_url=f"sqlite:///{path}", demo_mode=True))
    yield db, summary
    db.dispose()


@pytest.fixture(scope="module")
def seeded(seeded_with_summary: tuple[Database, SeedSummary]) -> Database:
    return seeded_with_summary[0]


def test_seed_demo_issues_push_tokens_that_verify(
    seeded_with_summary: tuple[Database, SeedSummary],
) -> None:
    db, summary = seeded_with_summary
    assert set(summary.push_tokens) == {"long-csv", "gp-sentinel"}
    with db.sessions() as s:
        assert token_matches(session=s, feed="long-csv", token=summary.push_tokens["long-csv"])
        assert not token_matches(session=s, feed="long-csv", token="wrong-token")


def test_seed_demo_writes_one_vintage_per_feed_and_day(seeded: Database) -> None:
    with seeded.sessions() as s:
        per_feed = dict(s.execute(select(Vintage.feed, func.count()).group_by(Vintage.feed)).all())
        newest = dict(s.execute(
            select(Vintage.feed, func.max(Vintage.received_at)).group_by(Vintage.feed)).all())
    # the configured demo feeds, nothing under another name (demo_seed/feeds.yaml)
    assert set(per_feed) == {"long-csv", "lab-drop", "wastewater-http", "gp-sentinel"}
    assert per_feed["long-csv"] == DAYS  # cases and the ICU census are known every day
    assert per_feed["lab-drop"] == DAYS - 1  # tests arrive the day after
    assert per_feed["wastewater-http"] < DAYS  # samples 2-3 times a week
    assert newest["long-csv"].date() == date(2026, 4, 1)
    # the late feed: its last delivery came LATE_DAYS mornings before the newest
    assert newest["gp-sentinel"].date() == date(2026, 4, 1) - timedelta(days=LATE_DAYS)


def test_seed_demo_creates_districts_areas_and_plants(seeded: Database) -> None:
    with seeded.sessions() as s:
        levels = dict(s.execute(select(Region.level, func.count()).group_by(Region.level)).all())
    assert levels["county"] == 1
    assert 12 <= levels["district"] <= 16
    assert levels["region"] in (2, 3)
    assert levels["plant"] >= 1


def test_seed_demo_as_of_read_sees_cases_before_revision(seeded: Database) -> None:
    # Cases are revised upward as late reports arrive: a day known the next morning holds fewer
    # cases than the final count (summed over districts to avoid zero-count days).
    day = date(2026, 3, 1)
    with seeded.sessions() as s:
        early = read_dense(
            session=s, measures=["cases"], start=day, end=day, as_of=received_at(day)
        )["cases"]
        final = read_dense(session=s, measures=["cases"], start=day, end=day)["cases"]
    assert np.nansum(early) < np.nansum(final)


def test_seed_demo_keeps_every_revision(seeded: Database) -> None:
    with seeded.sessions() as s:
        history = revision_history(
            session=s, region="D01", measure="cases", ref_date=date(2026, 3, 1)
        )
    values = [r.value for r in history]
    assert len(values) >= 2 and values == sorted(values)


def test_seed_demo_evaluates_the_policy(seeded: Database) -> None:
    # the lead policy over the demo's days (the demo runs three policies: counted apart below)
    with seeded.sessions() as s:
        lead = active_ruleset(session=s)
        assert lead is not None
        districts = s.scalar(select(func.count()).where(Region.level == "district"))
        assessments = s.scalar(select(func.count()).select_from(Assessment)
                               .where(Assessment.ruleset_id == lead.id))
    assert assessments == districts * DAYS


def test_seed_demo_runs_four_policies_each_with_assessments(
    seeded_with_summary: tuple[Database, SeedSummary],
) -> None:
    db, summary = seeded_with_summary
    with db.sessions() as s:
        rows = active_rulesets(session=s)
        counts = {r.name: s.scalar(select(func.count()).select_from(Assessment)
                                   .where(Assessment.ruleset_id == r.id)) for r in rows}
    assert [r.name for r in rows] == ["county-demo", "county-influenza", "county-rsv",
                                      "hospital-demo"]
    assert all(n > 0 for n in counts.values())
    with db.sessions() as s:  # the hospital policy assesses the areas, the others the districts
        levels = dict(s.execute(
            select(RulesetRow.name, func.min(Region.level)).join(
                Assessment, Assessment.ruleset_id == RulesetRow.id).join(
                Region, Region.id == Assessment.region_id).group_by(RulesetRow.name)).all())
    assert levels == {"county-demo": "district", "county-influenza": "district",
                      "county-rsv": "district", "hospital-demo": "region"}
    assert dict(summary.policies) == counts  # a first evaluation writes every row


def test_seed_demo_creates_demo_users(seeded: Database) -> None:
    with seeded.sessions() as s:
        names = set(s.scalars(select(User.name)))
    assert names == {u[0] for u in DEMO_USERS}


def test_seed_demo_second_run_is_idempotent(
    seeded_file: tuple[Path, SeedSummary], tmp_path: Path,
) -> None:
    # the second run goes over a copy of the module's seeded demo (the first run)
    path, first = seeded_file
    with closing(sqlite3.connect(path)) as source, closing(
            sqlite3.connect(tmp_path / "d.db")) as target:
        source.backup(target)
    db = Database.from_settings(
        Settings(database_url=f"sqlite:///{tmp_path / 'd.db'}", demo_mode=True)
    )

    def snapshot() -> tuple[int, float, int]:
        with db.sessions() as s:
            return (
                s.scalar(select(func.count()).select_from(Observation)),
                s.scalar(select(func.sum(Observation.value))),
                s.scalar(select(func.count()).select_from(Vintage)),
            )

    before = snapshot()
    second = seed_demo(db, seed=3, days=DAYS, end=END)
    assert snapshot() == before
    assert (first.observations, first.vintages) == (second.observations, second.vintages)
    db.dispose()


def test_seed_demo_refuses_a_database_it_did_not_create(tmp_path: Path) -> None:
    db = Database.from_settings(
        Settings(database_url=f"sqlite:///{tmp_path / 'p.db'}", demo_mode=True)
    )
    db.upgrade()
    with db.transaction() as s:
        store_regions(
            session=s,
            actor="t",
            source="t",
            records=[
                RegionRecord(
                    code="Z1", name="Real data", level="district", parent=None, population=1000
                ),
            ],
        )
    with pytest.raises(NotADemoDatabaseError, match="refusing to overwrite"):
        seed_demo(db, seed=5, days=150, end=END)
    with db.sessions() as s:
        assert s.scalar(select(Region.code)) == "Z1"
    db.dispose()


def test_received_at_is_next_morning_utc() -> None:
    assert received_at(date(2026, 3, 1)) == datetime(2026, 3, 2, 5, 30, tzinfo=UTC)
    assert received_at(date(2026, 3, 1), "lab-drop") == datetime(2026, 3, 2, 5, 15, tzinfo=UTC)
