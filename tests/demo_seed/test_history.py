"""The invented office's past decisions (demo_seed.history): invented data, internal checks only."""

from __future__ import annotations

from datetime import date, timedelta
from pathlib import Path

import numpy as np
import pytest

from demo_seed.history import (
    DEFER_WITHIN_DAYS,
    HOLD_DAYS,
    PENDING_DAYS,
    REVIEW_LAG_DAYS,
    defer_newest_change,
    official_history,
)
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


def _rec(region: str, day: int, tier: int):  # type: ignore[no-untyped-def]
    from datetime import UTC, datetime

    from server.services.official_history import OfficialRecord
    eff = START + timedelta(days=day)
    return OfficialRecord(line=0, region=region, effective_date=eff, tier=tier, reason="r",
                          decided_by="otto.approver",
                          decided_at=datetime(eff.year, eff.month, eff.day, tzinfo=UTC))


def _defer(records, final, newest_day=100):  # type: ignore[no-untyped-def]
    return defer_newest_change(records, final=np.asarray(final), regions=["X0", "X1", "X2"],
                               tier_name=NAMES.__getitem__,
                               newest=START + timedelta(days=newest_day))


def test_defer_keeps_the_tier_before_the_newest_step_each_way() -> None:
    records = [_rec("X0", 0, 2), _rec("X0", 80, 1), _rec("X1", 0, 2), _rec("X1", 90, 1),
               _rec("X2", 0, 0), _rec("X2", 95, 1)]
    out = _defer(records, final=[1, 1, 1])
    # X1 stepped down last (day 90): kept at Two; X2's step up (day 95): kept at Zero
    assert [(r.region, r.tier) for r in out] == [
        ("X0", 2), ("X0", 1), ("X1", 2), ("X1", 2), ("X2", 0), ("X2", 0)]
    assert "step down to One deferred" in out[3].reason
    assert "step up to One deferred" in out[5].reason
    assert out[3].effective_date == records[3].effective_date


def test_defer_leaves_the_history_when_changes_already_wait() -> None:
    records = [_rec("X0", 0, 2), _rec("X0", 80, 1), _rec("X1", 0, 0), _rec("X1", 90, 1)]
    # X0 is recommended Zero (a step down waits), X1 Two (a step up waits)
    assert _defer(records, final=[0, 2, 0]) == records


def test_defer_leaves_changes_older_than_five_weeks() -> None:
    records = [_rec("X0", 0, 2), _rec("X0", 50, 1)]
    assert _defer(records, final=[1, 0, 0], newest_day=50 + DEFER_WITHIN_DAYS + 1) == records
