"""How many days ahead of an area's real ICU-share crossing a projected-capacity prepare signal
fired (``tierwise backtest --as-known``), on arrays and on a small constructed store."""

from __future__ import annotations

from datetime import UTC, date, datetime, time, timedelta
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from sqlalchemy.orm import Session

from rules import parse_ruleset
from server.services.backtest import run_backtest
from server.services.capacity_leads import capacity_leads, crossing_leads
from server.store.catalogue import MeasureRecord, RegionRecord, upsert_measures, upsert_regions
from server.store.vintages import append_vintage

FIRST = date(2031, 1, 6)
DAYS = 50
GROWTH = 0.05  # per day, in area A0 only
RULES = """\
name: leads
version: "1"
tiers:
  - {name: A, staff: s, public: p}
  - {name: B, staff: s, public: p}
indicators:
  icu_share: {label: ICU share, unit: "%"}
  icu_days_to_share: {label: days, unit: days, params: {share: 60, horizon: 21}}
criteria:
  - {id: icu, indicator: icu_share, enter: [70], exit: [50]}
prepare:
  - {id: soon, indicator: icu_days_to_share, at_most: 10}
"""


def test_crossing_leads_on_constructed_arrays() -> None:
    """Constructed by hand: row 0 crosses 60 on day 5 (fired on day 0, outside a 4-day
    lookback, and from day 2), dips and crosses again on day 9 (day 8 unknown) with no firing;
    row 1 starts above (no crossing), row 2 never reaches it although it fires."""
    share = np.array([
        [10, 20, 30, 40, 50, 60, 70, 50, np.nan, 65, 70],
        [70, 70, 70, 70, 70, 70, 70, 70, 70, 70, 70],
        [10, 10, 10, 10, 10, 10, 10, 10, 10, 10, 10],
    ], dtype=float)
    fired = np.zeros(share.shape, dtype=bool)
    fired[0, [0, 2, 3, 4, 5]] = True
    fired[2, :] = True
    assert crossing_leads(share, fired, 60.0, lookback=4) == [(0, 5, 2), (0, 9, -1)]
    # a longer lookback reaches the firing on day 0; firings before the share was last above
    # the threshold (day 6) never count for the second crossing
    fired[0, 6] = True
    assert crossing_leads(share, fired, 60.0, lookback=10) == [(0, 5, 0), (0, 9, -1)]


@pytest.fixture
def store(session: Session) -> int:
    """Area A0 (districts D0, D1): admissions and ICU beds in use grow by GROWTH a day from 20 of
    100 staffed beds (whole beds), so the share reaches 60 % on the first day with
    round(20 e^(g t)) >= 60; area A1
    (D2, D3) stays at 20 %. Each day is received the next morning. Returns the crossing day."""
    upsert_regions(session=session, records=[
        *(RegionRecord(code=a, name=f"Area {a}", level="region", parent=None,
                       population=200_000) for a in ("A0", "A1")),
        *(RegionRecord(code=f"D{i}", name=f"District D{i}", level="district",
                       parent="A0" if i < 2 else "A1", population=100_000) for i in range(4)),
    ])
    upsert_measures(session=session, records=[
        MeasureRecord(name=m, unit="count", kind=k, aggregation="sum")
        for m, k in (("hosp_admissions", "count"), ("icu_occupied", "level"),
                     ("icu_staffed", "level"), ("cases", "count"), ("tests", "count"),
                     ("positives", "count"), ("gp_ari", "count"), ("ww_concentration", "level"),
                     ("ww_flow", "level"))
    ])  # icu_share is a named builder reading every measure of earlier releases (none stored)
    t = np.arange(DAYS)
    adm = np.array([8.0 * np.exp(GROWTH * t)] * 2 + [8.0 * np.ones(DAYS)] * 2).round()
    occ = np.array([20.0 * np.exp(GROWTH * t), 20.0 * np.ones(DAYS)]).round()
    for day in range(DAYS):
        ref = FIRST + timedelta(days=day)
        rows = [(f"D{i}", "hosp_admissions", ref, adm[i, day]) for i in range(4)]
        rows += [(a, "icu_occupied", ref, occ[i, day]) for i, a in enumerate(("A0", "A1"))]
        rows += [(a, "icu_staffed", ref, 100.0) for a in ("A0", "A1")]
        append_vintage(
            session=session, feed="sim",
            received_at=datetime.combine(ref + timedelta(days=1), time(5), tzinfo=UTC),
            rows=pd.DataFrame(rows, columns=["region", "measure", "ref_date", "value"]),
            checksum=f"{day:064d}")
    return int(np.argmax(occ[0] >= 60.0))  # 20 e^(g t), rounded, >= 60: day 22


def test_capacity_leads_on_a_constructed_store(session: Session, store: int, tmp_path: Path
                                               ) -> None:
    rs = parse_ruleset(RULES)
    result = run_backtest(session=session, ruleset=rs, as_known=True)
    leads = capacity_leads(session=session, result=result)
    assert [(x.signal, x.area, x.share, x.crossed) for x in leads] == [
        ("soon", "A0", 60.0, FIRST + timedelta(days=store))]
    # the firing day is the first day the replay's signal was on in A0's districts in the
    # 21 days before the crossing (the indicator's horizon)
    on = result.evaluation.prepare[0, :2].any(axis=0)
    first_on = int(np.flatnonzero(on[store - 21: store + 1])[0]) + store - 21
    lead = leads[0]
    assert lead.fired == FIRST + timedelta(days=first_on)
    # under steady exponential growth g the share s reaches 60 % after ln(60 / s) / g days, so a
    # signal at "at most 10 days" fires about 10 days ahead (whole days and whole beds: +-1)
    assert lead.lead_days is not None and 9 <= lead.lead_days <= 11



def test_capacity_leads_of_a_policy_set_per_area(session: Session, store: int) -> None:
    # The same policy applied to the areas: their admissions are the districts' sums, so the
    # projection and its lead are the same as when each district carries its area's.
    rs = parse_ruleset(RULES.replace('version: "1"\n', 'version: "1"\nlevel: areas\n'))
    result = run_backtest(session=session, ruleset=rs, as_known=True)
    assert result.evaluation.regions == ("A0", "A1")
    leads = capacity_leads(session=session, result=result)
    assert [(x.signal, x.area, x.crossed) for x in leads] == [
        ("soon", "A0", FIRST + timedelta(days=store))]
    assert leads[0].lead_days is not None and 9 <= leads[0].lead_days <= 11
