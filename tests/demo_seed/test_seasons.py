"""The demo's influenza and RSV seasons (demo_seed.seasons) as the seeded database holds them.

Invented data throughout. The checks are the demo's contract: at least four past seasons of
pathogen-specific GP consultations (so the moving epidemic method's thresholds exist, Vega et al.
2013: its baseline pools past seasons; tierwise asks for 3 at least), delivered through the demo
feeds, and the influenza and RSV policies of rules/policies evaluate on them.
"""

from __future__ import annotations

from collections.abc import Iterator
from datetime import date, timedelta
from pathlib import Path

import numpy as np
import pytest
from sqlalchemy import func, select

from demo_seed.feeds import FEED_OF_MEASURE, LATE_DAYS
from demo_seed.seasons import PATHOGENS, history_start, simulate_seasons
from demo_seed.seed import seed_demo
from rules import parse_ruleset
from server.config import Settings
from server.services.backtest import data_span
from server.services.database import Database
from server.services.district_data import load_district_data, store_measures
from server.services.district_indicators import district_indicators
from server.services.indicator_kinds import measure_needs
from server.services.ruleset_activation import activate_ruleset, store_ruleset
from server.services.rulesets import policies_dir
from server.store.models import Measure, Observation, Vintage

END = date(2026, 12, 3)   # a Thursday in the current season (2026/27)
POLICIES = {"influenza": "influenza.yaml", "rsv": "rsv.yaml"}


@pytest.fixture(scope="module")
def seeded(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Database]:
    path: Path = tmp_path_factory.mktemp("seasons") / "demo.db"
    db = Database.from_settings(Settings(database_url=f"sqlite:///{path}", demo_mode=True))
    seed_demo(db, seed=11, days=150, end=END, policies=())
    yield db
    db.dispose()


def test_history_start_leaves_five_past_seasons() -> None:
    assert history_start(date(2026, 12, 3)) == date(2021, 7, 26)    # ISO 2021-W30-1
    assert history_start(date(2027, 3, 1)) == date(2021, 7, 26)     # still season 2026/27
    assert history_start(date(2027, 8, 2)) == date(2022, 7, 25)     # season 2027/28 began


def test_seasons_peak_in_winter_rsv_before_influenza() -> None:
    """Each season's county-wide peak falls in winter; RSV's, on average, before influenza's
    (the invented timing of PATHOGENS)."""
    pop = np.full(6, 100_000.0)
    peaks = {}
    for pathogen in PATHOGENS:
        run = simulate_seasons(pathogen=pathogen, start=date(2015, 7, 1), end=date(2025, 6, 30),
                               population=pop, rng=np.random.default_rng(3))
        total = run.gp.sum(axis=0)
        days = []
        for year in range(2015, 2025):
            inside = ((run.dates >= np.datetime64(f"{year}-07-01"))
                      & (run.dates < np.datetime64(f"{year + 1}-07-01")))
            peak = run.dates[inside][np.argmax(total[inside])]
            days.append(int((peak - np.datetime64(f"{year}-07-01")).astype(int)))
        peaks[pathogen] = np.array(days)
    # peaks between October and March (day 92 .. 273 after 1 July)
    assert all(((92 <= d) & (d <= 273)).all() for d in peaks.values())
    assert peaks["rsv"].mean() + 21 < peaks["influenza"].mean()


@pytest.mark.slow
@pytest.mark.parametrize("pathogen", sorted(POLICIES))
def test_demo_holds_four_past_seasons_and_a_known_intensity(seeded: Database,
                                                            pathogen: str) -> None:
    measure = f"gp_ari.{pathogen}"
    with seeded.transaction() as s:
        first, last = data_span(session=s, measures=[measure])
        feeds = set(s.scalars(
            select(Vintage.feed).join(Observation, Observation.vintage_id == Vintage.id)
            .join(Measure, Measure.id == Observation.measure_id)
            .where(Measure.name == measure).distinct()))
        pathogen_of = s.scalar(select(Measure.pathogen).where(Measure.name == measure))
        seasons_before = s.scalar(
            select(func.count(func.distinct(Observation.ref_date)))
            .join(Measure, Measure.id == Observation.measure_id)
            .where(Measure.name == measure, Observation.ref_date < date(2026, 7, 1)))
    assert feeds == {FEED_OF_MEASURE[measure]} and pathogen_of == pathogen
    # four past seasons at least: the first day is before ISO week 40 of 2022 (2022/23, 23/24,
    # 24/25, 25/26 complete before the current 2026/27); the demo itself spans 150 days only
    assert first <= date.fromisocalendar(2022, 40, 1)
    assert last == END - timedelta(days=LATE_DAYS + 1)
    assert seasons_before == (date(2026, 7, 1) - first).days   # no day missing

    rs = parse_ruleset((policies_dir(None) / POLICIES[pathogen]).read_text())
    with seeded.transaction() as s:
        needs = measure_needs(rs, store_measures(session=s))
        data = load_district_data(session=s, start=first, end=END, needs=needs)
    name = next(n for n in rs.used_indicators() if rs.indicator(n).kind == "seasonal_intensity")
    series = district_indicators(data, rs)[name]
    assert not series.no_baseline[:, -1].any()       # a baseline on the demo's last day
    # the late GP feed's newest week is incomplete on the last day; the newest week it
    # delivered in full is known in every district
    delivered = np.flatnonzero(np.isfinite(series.estimate).all(axis=0))[-1]
    assert (END - data.dates[delivered].astype(date)).days <= LATE_DAYS + 7
    assert np.isin(series.estimate[:, delivered], [0, 1, 2, 3, 4]).all()


@pytest.mark.slow
def test_rsv_policy_activated_alone_evaluates_over_the_pathogen_history(
        seeded: Database) -> None:
    with seeded.transaction() as s:
        row = store_ruleset(session=s, path=policies_dir(None) / "rsv.yaml", author="test")
        run = activate_ruleset(session=s, row=row, actor="test")
    assert run is not None and run.evaluation is not None
    assert run.start == date(2021, 7, 26) and run.end == END
    tier = run.evaluation.tier
    assert (tier[:, -30:] >= 0).all()                    # known tiers in the current season
    assert {0, 1, 2} <= set(np.unique(tier))
