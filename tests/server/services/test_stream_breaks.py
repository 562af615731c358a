"""Breaks of cases, admissions and wastewater on a small invented county (two districts, two
plants): the service must hand each kernel the right series (a district's stored counts, the
county's summed; the wastewater of the plant serving most people, over its marker) and line the
streams up by their delays. The kernels themselves are checked against statsmodels in
tests/server/indicators/."""

from __future__ import annotations

from datetime import UTC, date, datetime, timedelta

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_array_equal
from sqlalchemy.orm import Session

from server.indicators.changepoints import detect_changepoints
from server.indicators.level_breaks import detect_level_breaks
from server.services.stream_breaks import StreamOptionError, StreamOptions, stream_breaks
from server.store.catalogue import (
    MeasureRecord,
    RegionRecord,
    replace_catchments,
    upsert_measures,
    upsert_regions,
)
from server.store.vintages import append_vintage

START = date(2026, 3, 2)  # a Monday
DAYS = 160
NOW = datetime(2026, 9, 1, 8, tzinfo=UTC)
T = np.arange(DAYS)


def _counts(seed: int, base: float, kink: int) -> np.ndarray:
    """Growth +0.03 per day turning to -0.03 at ``kink`` (R about 1.15 -> 0.87)."""
    rng = np.random.default_rng(seed)
    return rng.poisson(base * np.exp(0.03 * T - 0.06 * np.maximum(T - kink, 0))).astype(float)


def _plant(seed: int, kink: int) -> tuple[np.ndarray, np.ndarray]:
    """Concentration and marker sampled on Mondays, Wednesdays and Fridays."""
    rng = np.random.default_rng(seed)
    handling = rng.normal(0, 0.2, DAYS)
    conc = np.exp(np.log(3e4) + 0.03 * T - 0.06 * np.maximum(T - kink, 0)
                  + rng.normal(0, 0.15, DAYS) + handling)
    marker = np.exp(np.log(2e7) + rng.normal(0, 0.1, DAYS) + handling)
    sampled = T % 7 % 2 == 0
    sampled &= T % 7 < 5
    return np.where(sampled, conc, np.nan), np.where(sampled, marker, np.nan)


@pytest.fixture
def county(session: Session) -> dict[str, np.ndarray]:
    upsert_regions(session=session, records=[
        RegionRecord(code="Q0", name="Quillmoor County", level="county", parent=None,
                     population=300_000),
        RegionRecord(code="Q1", name="Ashbrook", level="district", parent="Q0",
                     population=120_000),
        RegionRecord(code="Q2", name="Fernholt", level="district", parent="Q0",
                     population=180_000),
        RegionRecord(code="P1", name="Ashbrook works", level="plant", parent=None,
                     population=110_000),
        RegionRecord(code="P2", name="Fern works", level="plant", parent=None,
                     population=160_000),
    ])
    upsert_measures(session=session, records=[
        MeasureRecord(name=m, unit="u", kind=k, aggregation=a) for m, k, a in (
            ("cases", "count", "sum"), ("hosp_admissions", "count", "sum"),
            ("ww_concentration", "concentration", "none"),
            ("ww_marker", "concentration", "none"))])
    # P1 serves 80 % of Ashbrook and 10 % of Fernholt (96 000 + 18 000 people), P2 90 % of
    # Fernholt (162 000): Ashbrook's plant is P1, Fernholt's and the county's P2
    replace_catchments(session=session, shares=[("P1", "Q1", 0.8), ("P1", "Q2", 0.1),
                                                ("P2", "Q2", 0.9)])
    conc1, marker1 = _plant(11, 56)
    conc2, marker2 = _plant(12, 90)
    series = {("Q1", "cases"): _counts(1, 60, 60), ("Q2", "cases"): _counts(2, 90, 95),
              ("Q1", "hosp_admissions"): _counts(3, 20, 63),
              ("Q2", "hosp_admissions"): _counts(4, 30, 98),
              ("P1", "ww_concentration"): conc1, ("P1", "ww_marker"): marker1,
              ("P2", "ww_concentration"): conc2, ("P2", "ww_marker"): marker2}
    dates = [START + timedelta(days=i) for i in range(DAYS)]
    rows = pd.DataFrame([{"region": code, "measure": m, "ref_date": d, "value": v}
                         for (code, m), values in series.items()
                         for d, v in zip(dates, values, strict=True) if np.isfinite(v)])
    append_vintage(session=session, feed="all", received_at=NOW, rows=rows, checksum="c1")
    session.flush()
    return {f"{c}/{m}": v for (c, m), v in series.items()}


def _days(breaks: tuple) -> list[int]:  # type: ignore[type-arg]
    return [(b.day - START).days for b in breaks]


def test_each_stream_gets_the_kernels_breaks_of_its_own_series(
        session: Session, county: dict[str, np.ndarray]) -> None:
    last = START + timedelta(days=DAYS - 1)
    q1, q2, q0 = stream_breaks(session=session, codes=["Q1", "Q2", "Q0"], first=START,
                               last=last)
    assert (q1.plant, q2.plant, q0.plant) == ("P1", "P2", "P2")
    adm = detect_changepoints(np.stack([
        county["Q1/hosp_admissions"], county["Q1/hosp_admissions"]
        + county["Q2/hosp_admissions"]]))
    assert _days(q1.breaks["admissions"]) == list(adm.breaks[0, : adm.n_breaks[0]])
    assert _days(q0.breaks["admissions"]) == list(adm.breaks[1, : adm.n_breaks[1]])
    ww = detect_level_breaks(county["P2/ww_concentration"] / county["P2/ww_marker"])
    assert _days(q2.breaks["wastewater"]) == list(ww.breaks[0, : ww.n_breaks[0]])
    assert _days(q0.breaks["wastewater"]) == _days(q2.breaks["wastewater"])
    assert all(q1.searched.values())


def test_case_breaks_agree_with_the_streams_after_their_delays(
        session: Session, county: dict[str, np.ndarray]) -> None:
    # Ashbrook: cases turn at 60, admissions at 63 (+3), wastewater at 56 (-4)
    (q1,) = stream_breaks(session=session, codes=["Q1"], first=START,
                          last=START + timedelta(days=DAYS - 1))
    k = int(np.argmin([abs(d - 60) for d in _days(q1.breaks["cases"])]))
    assert abs(_days(q1.breaks["cases"])[k] - 60) <= 3
    found = {a.stream: a for a in q1.agreement[k]}
    assert found["admissions"].agrees and found["wastewater"].agrees
    # shifted by 30 days the wastewater leads by too much: no agreement within 7 days
    (late,) = stream_breaks(session=session, codes=["Q1"], first=START,
                            last=START + timedelta(days=DAYS - 1),
                            options=StreamOptions(wastewater_delay=26))
    assert not {a.stream: a for a in late.agreement[k]}["wastewater"].agrees


def test_cases_from_limits_only_the_case_search(
        session: Session, county: dict[str, np.ndarray]) -> None:
    last = START + timedelta(days=DAYS - 1)
    (full,) = stream_breaks(session=session, codes=["Q1"], first=START, last=last)
    (part,) = stream_breaks(session=session, codes=["Q1"], first=START, last=last,
                            cases_from=START + timedelta(days=40))
    cases = county["Q1/cases"][40:]
    ref = detect_changepoints(cases)
    assert_array_equal(_days(part.breaks["cases"]),
                       [40 + int(b) for b in ref.breaks[0, : ref.n_breaks[0]]])
    assert _days(part.breaks["admissions"]) == _days(full.breaks["admissions"])


@pytest.mark.parametrize(("kwargs", "field"), [
    ({"admissions_delay": 40}, "admissions_delay"), ({"tolerance": -1}, "tolerance"),
    ({"min_change": -0.5}, "min_change")], ids=["delay", "tolerance", "min-change"])
def test_stream_options_refuse_values_out_of_range(kwargs: dict, field: str) -> None:  # type: ignore[type-arg]
    with pytest.raises(StreamOptionError, match=field):
        StreamOptions(**kwargs)
