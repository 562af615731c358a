"""The invented office's past decisions (demo_seed.history): invented data, internal checks only."""

from __future__ import annotations

from datetime import date, timedelta
from pathlib import Path

import numpy as np
import pytest

from demo_seed.history import HOLD_DAYS, PENDING_DAYS, REVIEW_LAG_DAYS, official_history
from demo_seed.seed import seed_demo
from server.config import Settings
from server.services.database import Database
from server.services.review import (
    decision_history,
    has_something_to_publish,
    official_tiers,
    pending_changes,
)

NAMES = {0: "Zero", 1: "One", 2: "Two", 3: "Three"}
START = date(2026, 1, 1)


def _history(rows: list[list[int]], populations: list[int] | None = None):  # type: ignore[no-untyped-def]
    tier = np.asarray(rows)
    dates = np.arange(np.datetime64(START), np.datetime64(START) + tier.shape[1])
    return official_history(
        regions=[f"X{i}" for i in range(tier.shape[0])],
        populations=populations or [1000] * tier.shape[0], dates=dates, tier=tier,
        tier_name=NAMES.__getitem__,
    )


def test_changes_are_taken_up_after_the_review_lag_and_blips_are_not() -> None:
    row = [-1] * 3 + [0] * 20 + [1] * 1 + [0] * 10 + [2] * 20 + [0] * 30
    # a larger flat district takes the held step down (see the last test)
    records = [r for r in _history([row, [0] * len(row)], populations=[10, 1000])
               if r.region == "X0"]
    assert [(r.effective_date, r.tier) for r in records] == [
        (START + timedelta(days=3 + REVIEW_LAG_DAYS + 1), 0),   # first known tier
        (START + timedelta(days=34 + REVIEW_LAG_DAYS + 1), 2),  # the one-day blip to 1 is skipped
        (START + timedelta(days=54 + REVIEW_LAG_DAYS + 1), 0),
    ]
    assert all(r.decided_by == "otto.approver" for r in records)
    assert all(r.decided_at.date() == r.effective_date - timedelta(days=1) for r in records)


def test_the_newest_changes_are_left_pending() -> None:
    n = 60
    row = [1] * (n - PENDING_DAYS) + [2] * PENDING_DAYS
    assert [r.tier for r in _history([row])] == [1]


def test_the_largest_district_holds_its_first_step_down_from_the_top_tier() -> None:
    row = [1] * 10 + [3] * 20 + [2] * 30 + [1] * 30
    records = _history([row, row], populations=[500, 9000])
    small = [(r.tier, r.effective_date) for r in records if r.region == "X0"]
    large = [(r.tier, r.effective_date) for r in records if r.region == "X1"]
    step = START + timedelta(days=30 + REVIEW_LAG_DAYS + 1)
    assert (2, step) in small
    assert (3, step) in large and (2, step + timedelta(days=HOLD_DAYS)) in large
    held = next(r for r in records if r.region == "X1" and r.effective_date == step)
    assert "postponed" in held.reason


@pytest.mark.slow
def test_demo_with_history_publishes_the_past_and_leaves_recent_changes(tmp_path: Path) -> None:
    db = Database.from_settings(
        Settings(database_url=f"sqlite:///{tmp_path / 'demo.db'}", demo_mode=True)
    )
    try:
        summary = seed_demo(db, days=150, end=date(2026, 11, 30), history=True)
        assert summary.decisions > 14
        with db.transaction() as session:
            public = official_tiers(session=session)
            pending = pending_changes(session=session)
            history = decision_history(session=session)
            # every district decided and published: nothing for "Publish" to do
            publishable = has_something_to_publish(session=session)
        assert len(public) == 14  # every invented district has a published tier
        assert not publishable
        newest = max(d.effective_date for d in history)
        assert newest <= date(2026, 11, 30) - timedelta(days=PENDING_DAYS - REVIEW_LAG_DAYS - 1)
        for change in pending:  # what is pending changed after the history ends
            assert change.since > date(2026, 11, 30) - timedelta(days=PENDING_DAYS + 1)
    finally:
        db.dispose()
