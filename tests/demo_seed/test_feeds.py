"""The demo's feed clock: the demo ends on the newest day whose deliveries have all arrived."""

from __future__ import annotations

from datetime import UTC, date, datetime

import pytest

from demo_seed.feeds import ARRIVAL, last_complete_day
from demo_seed.seed import received_at


@pytest.mark.parametrize(("now", "expected"), [
    # after every feed's arrival hour (the latest is 06:45 UTC): yesterday is complete
    (datetime(2026, 12, 4, 7, 0, tzinfo=UTC), date(2026, 12, 3)),
    (datetime(2026, 12, 4, 23, 30, tzinfo=UTC), date(2026, 12, 3)),
    # before it, yesterday's files are still to come: the day before
    (datetime(2026, 12, 4, 0, 10, tzinfo=UTC), date(2026, 12, 2)),
    (datetime(2026, 12, 4, 6, 44, tzinfo=UTC), date(2026, 12, 2)),
])
def test_last_complete_day_never_stamps_a_delivery_after_the_clock(
    now: datetime, expected: date
) -> None:
    end = last_complete_day(now)
    assert end == expected
    assert all(received_at(end, feed) <= now for feed in ARRIVAL)
    later = date.fromordinal(end.toordinal() + 1)
    assert any(received_at(later, feed) > now for feed in ARRIVAL)
