"""Events and their before/after estimates on a small invented county (two districts).

The estimates themselves are checked against statsmodels in
tests/server/indicators/test_before_after.py; here the service must hand the estimator the right
series (a district's stored counts, a county's summed from its districts), read tier changes
from published decisions only, and log recorded events in the audit.
"""

from __future__ import annotations

from datetime import UTC, date, datetime, timedelta

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from sqlalchemy import select
from sqlalchemy.orm import Session

from server.indicators.before_after import before_after
from server.services.event_effects import (
    EffectOptions,
    EventError,
    effects_page,
    record_event,
)
from server.store.catalogue import MeasureRecord, RegionRecord, upsert_measures, upsert_regions
from server.store.models import AuditEntry, Decision, Region, User
from server.store.vintages import append_vintage

START = date(2026, 3, 1)
DAYS = 100
NOW = datetime(2026, 6, 20, 8, tzinfo=UTC)


def _cases(seed: int, kink: int, rb: float, ra: float) -> np.ndarray:
    rng = np.random.default_rng(seed)
    t = np.arange(DAYS)
    mu = 80 * np.exp(np.where(t < kink, rb * (t - kink), ra * (t - kink)))
    return rng.poisson(mu).astype(float)


@pytest.fixture
def county(session: Session) -> dict[str, np.ndarray]:
    upsert_regions(session=session, records=[
        RegionRecord(code="Q0", name="Quillmoor County", level="county", parent=None,
                     population=300_000),
        RegionRecord(code="Q1", name="Ashbrook", level="district", parent="Q0",
                     population=120_000),
        RegionRecord(code="Q2", name="Fernholt", level="district", parent="Q0",
                     population=180_000),
    ])
    upsert_measures(session=session, records=[
        MeasureRecord(name="cases", unit="count", kind="count", aggregation="sum")])
    for name, role in (("ivy.analyst", "analyst"), ("vin.viewer", "viewer")):
        session.add(User(name=name, role=role, password_hash="x", active=True, created_at=NOW))
    series = {"Q1": _cases(1, 50, 0.04, -0.03), "Q2": _cases(2, 60, 0.0, 0.02)}
    dates = [START + timedelta(days=i) for i in range(DAYS)]
    rows = pd.DataFrame([{"region": code, "measure": "cases", "ref_date": d, "value": v}
                         for code, values in series.items() for d, v in zip(dates, values,
                                                                            strict=True)])
    append_vintage(session=session, feed="cases", received_at=NOW, rows=rows, checksum="c1")
    session.flush()
    return series


def _decision(session: Session, code: str, day: date, tier: int, published: bool) -> None:
    region = session.scalar(select(Region).where(Region.code == code))
    assert region is not None
    session.add(Decision(region_id=region.id, effective_date=day, tier=tier, kind="confirmed",
                         reason="invented", policy="invented", decided_at=NOW,
                         published_at=NOW if published else None))
    session.flush()


def test_effects_page_reads_published_tier_changes_only(
    session: Session, county: dict[str, np.ndarray]
) -> None:
    _decision(session, "Q1", date(2026, 3, 20), 1, True)   # first tier: no change
    _decision(session, "Q1", date(2026, 4, 10), 2, True)   # change 1 -> 2
    _decision(session, "Q1", date(2026, 4, 25), 2, True)   # same tier: no change
    _decision(session, "Q2", date(2026, 4, 1), 0, True)
    _decision(session, "Q2", date(2026, 5, 1), 1, False)  # not published: not an event
    page = effects_page(session=session, start=date(2026, 3, 1), end=date(2026, 6, 30))
    assert [(e.region, e.day, e.kind) for e in page.events] == [
        ("Q1", date(2026, 4, 10), "tier_change")]
    assert page.events[0].note.startswith("tier 1 -> 2")


def test_effects_page_estimates_the_district_series_as_stored(
    session: Session, county: dict[str, np.ndarray]
) -> None:
    _decision(session, "Q1", date(2026, 3, 5), 0, True)
    _decision(session, "Q1", date(2026, 4, 13), 1, True)  # day 43: kink at day 50 = 43 + 7
    page = effects_page(session=session, start=date(2026, 4, 1), end=date(2026, 4, 30))
    (event,) = page.events
    ref = before_after(county["Q1"][:DAYS - 3], [0], [43])  # the newest 3 days still settle
    assert event.status == "ready"
    assert_allclose(event.r_change, (ref.r_change[0], ref.r_change_lower[0],
                                     ref.r_change_upper[0]), rtol=1e-12)
    assert_allclose(event.rt_ratio[0], ref.rt_ratio[0], rtol=1e-12)
    # Simulated truth: growth 0.04 before, -0.03 after (change -0.07) lies in the interval.
    assert event.r_change[1] <= -0.07 <= event.r_change[2]
    # Before: 14 days ending lead 3 days before event + delay 7 (Apr 20); after: from event + 14.
    assert event.before == (date(2026, 4, 3), date(2026, 4, 16))
    assert event.after == (date(2026, 4, 27), date(2026, 5, 10))


def test_recorded_county_event_uses_summed_districts_and_is_audited(
    session: Session, county: dict[str, np.ndarray]
) -> None:
    record_event(session=session, user="ivy.analyst", region="Q0", day=date(2026, 4, 20),
                 kind="school_holidays", note="Invented spring break", now=NOW)
    entry = session.scalar(select(AuditEntry).where(AuditEntry.action == "record_event"))
    assert entry is not None and entry.actor == "ivy.analyst" and entry.subject == "Q0"
    assert entry.details["kind"] == "school_holidays"
    page = effects_page(session=session, start=date(2026, 4, 1), end=date(2026, 4, 30))
    (event,) = page.events
    ref = before_after((county["Q1"] + county["Q2"])[:DAYS - 3], [0],
                       [(date(2026, 4, 20) - START).days])
    assert event.level == "county" and event.recorded_by == "ivy.analyst"
    assert_allclose(event.r_before[0], ref.r_before[0], rtol=1e-12)
    assert event.breaks_known


def test_event_near_the_data_end_is_too_early_with_the_day(
    session: Session, county: dict[str, np.ndarray]
) -> None:
    record_event(session=session, user="ivy.analyst", region="Q2", day=date(2026, 5, 25),
                 kind="measure_start", note="Invented masks rule", now=NOW)
    (event,) = effects_page(session=session, start=date(2026, 5, 1),
                            end=date(2026, 6, 1)).events
    assert event.status == "too_early"
    # After window: event + delay 7 + transition 7 .. + 14 days; told 3 settle days after its
    # last day.
    assert event.ready_on == date(2026, 5, 25) + timedelta(days=7 + 7 + 14 - 1 + 3)
    assert np.isnan(event.r_change[0])


def test_record_event_refuses_viewers_unknown_kinds_and_empty_notes(
    session: Session, county: dict[str, np.ndarray]
) -> None:
    with pytest.raises(EventError, match="user: 'vin.viewer' may not record events"):
        record_event(session=session, user="vin.viewer", region="Q1", day=date(2026, 4, 1),
                     kind="other", note="x")
    with pytest.raises(EventError, match="kind: 'lockdown' is not one of"):
        record_event(session=session, user="ivy.analyst", region="Q1", day=date(2026, 4, 1),
                     kind="lockdown", note="x")
    with pytest.raises(EventError, match="note: an event needs a note"):
        record_event(session=session, user="ivy.analyst", region="Q1", day=date(2026, 4, 1),
                     kind="other", note="  ")
    with pytest.raises(EventError, match="region: no district, area or county with code 'Z9'"):
        record_event(session=session, user="ivy.analyst", region="Z9", day=date(2026, 4, 1),
                     kind="other", note="x")


def test_effect_options_refuse_out_of_range_days() -> None:
    with pytest.raises(EventError, match="window: expected a whole number of days in 7..56"):
        EffectOptions(window=3)
