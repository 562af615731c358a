"""Backtests on a seeded demo database: latest-data replay and the as-known (vintage) replay."""

from __future__ import annotations

import shutil
from collections.abc import Iterator
from datetime import date
from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose, assert_array_equal
from sqlalchemy import select
from sqlalchemy.orm import Session

from demo_seed.seed import seed_demo
from rules import load_ruleset
from server.config import Settings
from server.services.backtest import (
    BacktestError,
    as_known_cutoff,
    run_backtest,
    write_timelines,
)
from server.services.database import Database
from server.services.district_indicators import district_indicators, load_district_data
from server.services.evaluation import latest_assessment_rows
from server.store.models import Assessment, Region

pytestmark = pytest.mark.slow
COUNTY = Path(__file__).resolve().parents[3] / "rules" / "policies" / "county.yaml"


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
def session(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Session]:
    path = seeded_copy(tmp_path_factory, "backtest")
    db = Database.from_settings(Settings(database_url=f"sqlite:///{path}", demo_mode=True))
    with db.sessions() as s:
        yield s
    db.dispose()


def test_backtest_on_latest_data_matches_the_stored_evaluation(session: Session) -> None:
    result = run_backtest(session=session, ruleset=load_ruleset(COUNTY))
    latest = latest_assessment_rows(session=session)
    assert latest is not None
    stored = dict(session.execute(
        select(Region.code, Assessment.recommended_tier)
        .join(Region, Region.id == Assessment.region_id)
        .where(Assessment.data_cutoff == latest.data_cutoff,
               Assessment.ref_date == latest.last_day)
    ).all())
    expected = [stored[c] for c in result.evaluation.regions]
    assert_array_equal(result.evaluation.tier[:, -1], expected)


@pytest.mark.parametrize("day", [date(2026, 9, 15), date(2026, 11, 29)], ids=["mid", "end"])
def test_as_known_values_equal_an_as_of_read_of_that_morning(
    session: Session, day: date
) -> None:
    # the reference: the store's own as-of read at the replay cutoff, indicators on the last day
    rs = load_ruleset(COUNTY)
    result = run_backtest(session=session, ruleset=rs, as_known=True)
    first = result.evaluation.dates[0].astype(date)
    data = load_district_data(session=session, start=first, end=day, as_of=as_known_cutoff(day))
    ref = district_indicators(data, rs)
    j = (day - first).days
    for name in ("incidence_7d", "positivity_7d", "admissions_7d", "icu_share", "rt"):
        got = result.evaluation.indicators[name].estimate[:, j]
        assert_allclose(got, ref[name].estimate[:, -1], rtol=1e-9, err_msg=name)


def test_as_known_replay_differs_from_latest_only_through_revisions(session: Session) -> None:
    rs = load_ruleset(COUNTY)
    latest = run_backtest(session=session, ruleset=rs)
    known = run_backtest(session=session, ruleset=rs, as_known=True)
    same = np.mean(latest.evaluation.tier == known.evaluation.tier)
    assert 0.5 < same < 1.0  # invented reporting delays revise recent days, not the whole record


def test_backtest_summary_period_and_csv(session: Session, tmp_path: Path) -> None:
    result = run_backtest(session=session, ruleset=load_ruleset(COUNTY),
                          start=date(2026, 10, 1), end=date(2026, 10, 31))
    assert result.summary.days == 31
    path = write_timelines(result, tmp_path)
    lines = path.read_text().splitlines()
    assert len(lines) == 1 + 31 * 14
    assert lines[1].startswith("2026-10-01,")


def test_backtest_rejects_a_period_outside_the_data(session: Session) -> None:
    with pytest.raises(BacktestError, match="stored data cover"):
        run_backtest(session=session, ruleset=load_ruleset(COUNTY), start=date(2020, 1, 1))
