"""Time stamps stored in UTC and read back aware (server/store/types.py), on every back end."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta, timezone

import pytest
from sqlalchemy import select
from sqlalchemy.exc import StatementError
from sqlalchemy.orm import Session

from server.store.models import Vintage

EAST = timezone(timedelta(hours=2), "UTC+2")  # an invented office two hours ahead of UTC


def _stored(session: Session, at: datetime) -> datetime:
    session.add(Vintage(feed="clock", received_at=at, checksum="c" * 64))
    session.flush()
    session.expire_all()
    value = session.scalar(select(Vintage.received_at).where(Vintage.feed == "clock"))
    assert value is not None
    return value


def test_utc_datetime_reads_back_the_same_instant_in_utc(session: Session) -> None:
    value = _stored(session, datetime(2031, 3, 1, 8, 30, tzinfo=EAST))
    assert value == datetime(2031, 3, 1, 6, 30, tzinfo=UTC)
    assert value.utcoffset() == timedelta(0)


def test_utc_datetime_refuses_a_naive_time_stamp(session: Session) -> None:
    with pytest.raises(StatementError, match="time stamp 2031-03-01T08:30:00 has no time zone"):
        _stored(session, datetime(2031, 3, 1, 8, 30))
