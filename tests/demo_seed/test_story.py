"""The demo tells its story on its newest morning, for several seeds and end dates.

Invented data throughout; the checks are the demo's own contract (demo_seed.storyline's script,
demo_seed.history's office, demo_seed.feeds' late feed), not published values.
"""

from __future__ import annotations

from collections.abc import Iterator
from datetime import UTC, date, datetime, time, timedelta
from pathlib import Path

import pytest

from demo_seed.feeds import LATE_FEED
from demo_seed.seed import seed_demo
from demo_seed.story import DemoMorning, demo_morning, morning_lines
from server.config import Settings
from server.services.database import Database

pytestmark = pytest.mark.slow

DAYS = 150  # the shortest scenario: the story is anchored to the end date, not to the start
CASES = [(3, date(2026, 6, 10)), (7, date(2026, 6, 10)), (11, date(2026, 6, 10)),
         (3, date(2026, 12, 3)), (7, date(2026, 12, 3)), (11, date(2026, 12, 3))]


@pytest.fixture(scope="module", params=CASES, ids=[f"seed{s}-{e}" for s, e in CASES])
def morning(request: pytest.FixtureRequest,
            tmp_path_factory: pytest.TempPathFactory) -> Iterator[DemoMorning]:
    seed, end = request.param
    path: Path = tmp_path_factory.mktemp("story") / "demo.db"
    db = Database.from_settings(Settings(database_url=f"sqlite:///{path}", demo_mode=True))
    try:
        seed_demo(db, seed=seed, days=DAYS, end=end, history=True)
        # the office's morning after the newest data
        yield demo_morning(db, now=datetime.combine(end + timedelta(days=1), time(8), UTC))
    finally:
        db.dispose()


def test_story_county_is_mixed(morning: DemoMorning) -> None:
    assert len(morning.official_levels | morning.recommended_levels) >= 3


def test_story_changes_await_review_both_ways(morning: DemoMorning) -> None:
    assert 2 <= len(morning.pending) <= 4
    assert any(p.up for p in morning.pending)
    assert any(not p.up for p in morning.pending)


def test_story_runs_several_policies_each_assessing_every_region_of_its_level(
        morning: DemoMorning) -> None:
    assert [p.name for p in morning.policies] == ["county-demo", "county-influenza",
                                                  "county-rsv", "hospital-demo"]
    # 14 districts; the hospital-pressure policy assesses the county's 3 areas
    assert [p.assessed for p in morning.policies] == [14, 14, 14, 3]
    # the lead policy's story is the one the fields above tell
    assert len(morning.policies[0].pending) == len(morning.pending)


def test_story_changes_await_review_under_at_least_two_policies(morning: DemoMorning) -> None:
    assert sum(1 for p in morning.policies if p.pending) >= 2


def test_story_shows_a_prepare_signal(morning: DemoMorning) -> None:
    assert morning.signals


def test_story_one_feed_is_late_and_the_others_fresh(morning: DemoMorning) -> None:
    assert [f.name for f in morning.late_feeds] == [LATE_FEED]
    assert len(morning.feeds) == 4


def test_story_lines_say_what_the_database_holds(morning: DemoMorning) -> None:
    text = "\n".join(morning_lines(morning))
    assert f"{len(morning.pending)} changes await review" in text
    assert all(p.name in text for p in morning.pending)
    assert f"needing attention: {LATE_FEED}" in text
