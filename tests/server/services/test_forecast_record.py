"""The forecast record on a small simulated store: storing, replacing, scoring, the as-known
replay, and the page sentences (forecast_store.py, forecast_record.py and forecast_known.py
together, on one simulated store)."""

from __future__ import annotations

from datetime import UTC, date, datetime, time, timedelta
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose
from sqlalchemy import delete, func, select
from sqlalchemy.orm import Session

import server.services.forecast_record as forecast_record_module
from server.feeds.definition import load_feeds
from server.feeds.sources import Payload
from server.indicators.forecast_scores import last_week_mean, poisson_persistence, score_forecasts
from server.indicators.quantile_forecast import DEFAULT_LEVELS, QuantileForecast
from server.services.backtest import as_known_cutoff
from server.services.database import Database
from server.services.evaluation import evaluate_if_behind, store_forecasts_after_tiers
from server.services.feeds import ingest_recorded
from server.services.forecast_known import ForecastRecordError, KnownData, read_known
from server.services.forecast_record import (
    SETTLE_DAYS,
    forecast_record,
    forecast_record_as_known,
    record_lines,
)
from server.services.forecast_store import (
    store_forecasts,
    store_forecasts_as_known,
    store_morning_forecasts,
)
from server.services.forecasters import PoissonPersistence
from server.store.catalogue import MeasureRecord, RegionRecord, upsert_measures, upsert_regions
from server.store.errors import UnknownCodeError
from server.store.models import ForecastQuantiles, ForecastRun
from server.store.vintages import append_vintage
from tests.server.conftest import cases_csv, seed_small_office

FIRST = date(2026, 3, 2)
DAYS = 70
DISTRICTS = [f"D{i}" for i in range(6)]
AREAS = ["A0", "A1"]
RATES = np.array([3.0, 8.0, 15.0, 25.0, 40.0, 60.0])
FORECASTER = PoissonPersistence(horizons=(1, 7, 14))
Sim = tuple[np.ndarray, np.ndarray]


def _received(day: int) -> datetime:
    return datetime.combine(FIRST + timedelta(days=day + 1), time(5, 0), tzinfo=UTC)


@pytest.fixture
def store(session: Session) -> tuple[np.ndarray, np.ndarray]:
    """Stationary Poisson admissions (districts) and ICU beds (areas), each day received the
    next morning; day 40 of D0 revised to 99 three weeks later (received the morning of day
    62). Returns the admissions as first reported and as final."""
    upsert_regions(session=session, records=[
        *(RegionRecord(code=a, name=f"Area {a}", level="region", parent=None,
                       population=300_000) for a in AREAS),
        *(RegionRecord(code=d, name=f"District {d}", level="district", parent=AREAS[i % 2],
                       population=100_000) for i, d in enumerate(DISTRICTS)),
    ])
    upsert_measures(session=session, records=[
        MeasureRecord(name=m, unit="count", kind=k, aggregation="sum")
        for m, k in (("hosp_admissions", "count"), ("icu_occupied", "level"),
                     ("icu_staffed", "level"))
    ])
    rng = np.random.default_rng(42)
    adm = rng.poisson(RATES[:, None], (len(DISTRICTS), DAYS)).astype(float)
    icu = rng.poisson(20.0, (len(AREAS), DAYS)).astype(float)
    for day in range(DAYS):
        ref = FIRST + timedelta(days=day)
        rows = [(d, "hosp_admissions", ref, adm[i, day]) for i, d in enumerate(DISTRICTS)]
        rows += [(a, "icu_occupied", ref, icu[i, day]) for i, a in enumerate(AREAS)]
        rows += [(a, "icu_staffed", ref, 40.0) for a in AREAS]
        if day == 61:
            rows.append(("D0", "hosp_admissions", FIRST + timedelta(days=40), 99.0))
        append_vintage(session=session, feed="sim", received_at=_received(day),
                       rows=pd.DataFrame(rows, columns=["region", "measure", "ref_date", "value"]),
                       checksum=f"{day:064d}")
    final = adm.copy()
    final[0, 40] = 99.0
    return adm, final


def test_store_forecasts_rerun_replaces(session: Session, store: Sim) -> None:
    cutoff = as_known_cutoff(FIRST + timedelta(days=30))
    n = store_morning_forecasts(session=session, cutoff=cutoff, forecaster=FORECASTER)
    # admissions per district and per area (summed over its districts), ICU beds per area
    assert n == len(DISTRICTS) + 2 * len(AREAS)
    again = store_morning_forecasts(session=session, cutoff=cutoff, forecaster=FORECASTER)
    assert again == n
    assert session.scalar(select(func.count()).select_from(ForecastRun)) == 2
    assert session.scalar(select(func.count()).select_from(ForecastQuantiles)) == n
    run = session.scalars(select(ForecastRun).where(ForecastRun.target == "hosp_admissions")).one()
    assert run.origin == FIRST + timedelta(days=30) and run.horizons == [1, 7, 14]


def test_store_forecasts_refuses_unknown_region_and_target(
    session: Session, store: Sim
) -> None:
    cutoff = as_known_cutoff(FIRST + timedelta(days=30))
    known = read_known(session=session, cutoff=cutoff, measures=["hosp_admissions"])
    assert known is not None
    fc = QuantileForecast(target="hosp_admissions", scenario="x", regions=("NOPE",),
                          origin=FIRST, horizons=np.array([1]),
                          levels=np.array(DEFAULT_LEVELS), values=np.zeros((1, 1, 5)))
    with pytest.raises(UnknownCodeError, match="NOPE"):
        store_forecasts(session=session, forecasts=[fc], cutoff=cutoff, known=known)
    bad = QuantileForecast(target="deaths", scenario="x", regions=("D0",), origin=FIRST,
                           horizons=np.array([1]), levels=np.array(DEFAULT_LEVELS),
                           values=np.zeros((1, 1, 5)))
    with pytest.raises(ForecastRecordError, match="target: 'deaths'"):
        store_forecasts(session=session, forecasts=[bad], cutoff=cutoff, known=known)
    crossing = QuantileForecast(
        target="hosp_admissions", scenario="x", regions=("D0", "D1"), origin=FIRST,
        horizons=np.array([1, 7]), levels=np.array(DEFAULT_LEVELS),
        values=np.array([[[1, 2, 3, 4, 5]] * 2, [[1, 2, 3, 4, 5], [1, 2, 4, 3, 5]]], float))
    with pytest.raises(ForecastRecordError, match="region 'D1', horizon 7"):
        store_forecasts(session=session, forecasts=[crossing], cutoff=cutoff, known=known)
    assert session.scalar(select(func.count()).select_from(ForecastRun)) == 0


def test_stored_record_equals_scoring_by_hand(session: Session, store: Sim) -> None:
    # Mornings 20..50: each forecast from the data received by its cutoff (day 40 of D0 as first
    # reported), scored against the final values (the revision applied).
    mornings = range(20, 51)
    for t in mornings:
        store_morning_forecasts(session=session, cutoff=as_known_cutoff(FIRST + timedelta(t)),
                                forecaster=FORECASTER)
    cells = forecast_record(session=session, target="hosp_admissions", last=None)
    reported, final = store
    h = np.array(FORECASTER.horizons)
    for i, code in enumerate(DISTRICTS):
        values, observed, baseline = [], [], []
        for t in mornings:
            # morning t (cutoff: end of day t + 1) knows the revision from t = 61 on
            hist = (final if t >= 61 else reported)[i: i + 1, : t + 1]
            values.append(poisson_persistence(hist, horizons=h, levels=DEFAULT_LEVELS)[0])
            baseline.append(last_week_mean(hist)[0])
            # outcomes: final values, the last SETTLE_DAYS stored days not yet scored
            settled = t + h <= DAYS - 1 - SETTLE_DAYS
            observed.append(np.where(settled, final[i, np.minimum(t + h, DAYS - 1)], np.nan))
        s = score_forecasts(np.array(values), DEFAULT_LEVELS, np.array(observed),
                            np.array(baseline))
        for j, hz in enumerate(h):
            cell = next(c for c in cells if c.region == code and c.horizon == hz)
            assert cell.forecasts == int(s.scored[:, j].sum())
            assert cell.inside_90 == int(s.inside_90[:, j].sum())
            assert_allclose(cell.mean_wis, np.nanmean(s.wis[:, j]), rtol=1e-12)
            assert_allclose(cell.naive_error, np.nanmean(s.naive_error[:, j]), rtol=1e-12)


def test_area_admissions_are_scored_against_their_districts_sums(
    session: Session, store: Sim
) -> None:
    # The areas report no admissions: their history, baseline and outcome are the strict sums
    # of their districts' (A0: D0, D2, D4; A1: D1, D3, D5), first reported and final alike.
    mornings = range(20, 51)
    for t in mornings:
        store_morning_forecasts(session=session, cutoff=as_known_cutoff(FIRST + timedelta(t)),
                                forecaster=FORECASTER)
    cells = forecast_record(session=session, target="hosp_admissions", last=None)
    reported, final = store
    h = np.array(FORECASTER.horizons)
    for k, code in enumerate(AREAS):
        rows = [i for i in range(len(DISTRICTS)) if i % 2 == k]
        rep, fin = reported[rows].sum(axis=0)[None, :], final[rows].sum(axis=0)[None, :]
        values, observed, baseline = [], [], []
        for t in mornings:
            hist = (fin if t >= 61 else rep)[:, : t + 1]
            values.append(poisson_persistence(hist, horizons=h, levels=DEFAULT_LEVELS)[0])
            baseline.append(last_week_mean(hist)[0])
            settled = t + h <= DAYS - 1 - SETTLE_DAYS
            observed.append(np.where(settled, fin[0, np.minimum(t + h, DAYS - 1)], np.nan))
        s = score_forecasts(np.array(values), DEFAULT_LEVELS, np.array(observed),
                            np.array(baseline))
        for j, hz in enumerate(h):
            cell = next(c for c in cells if c.region == code and c.horizon == hz)
            assert cell.forecasts == int(s.scored[:, j].sum()) > 0
            assert cell.inside_90 == int(s.inside_90[:, j].sum())
            assert_allclose(cell.mean_wis, np.nanmean(s.wis[:, j]), rtol=1e-12)
            assert_allclose(cell.naive_error, np.nanmean(s.naive_error[:, j]), rtol=1e-12)


def test_stored_as_known_mornings_equal_the_morning_step(session: Session, store: Sim) -> None:
    # store_forecasts_as_known (the demo's seeded record) keeps what the morning step would have
    # stored at each as-known cutoff: same runs, same quantiles, same baselines
    start, end = FIRST + timedelta(days=20), FIRST + timedelta(days=30)
    n = store_forecasts_as_known(session=session, forecaster=FORECASTER, start=start, end=end)
    assert n == 11 * (len(DISTRICTS) + 2 * len(AREAS))
    seeded = {(r.target, r.data_cutoff.replace(tzinfo=None), r.origin): r.id
              for r in session.scalars(select(ForecastRun))}
    assert {k[1] for k in seeded} == {
        as_known_cutoff(start + timedelta(days=d)).replace(tzinfo=None) for d in range(11)}
    seeded_rows = {(k, q.region_id): (q.baseline, q.quantiles)
                   for k, run_id in seeded.items()
                   for q in session.scalars(select(ForecastQuantiles)
                                            .where(ForecastQuantiles.run_id == run_id))}
    session.execute(delete(ForecastQuantiles))
    session.execute(delete(ForecastRun))
    for d in range(11):
        store_morning_forecasts(session=session, cutoff=as_known_cutoff(start + timedelta(days=d)),
                                forecaster=FORECASTER)
    again = {(r.target, r.data_cutoff.replace(tzinfo=None), r.origin): r.id
             for r in session.scalars(select(ForecastRun))}
    assert set(again) == set(seeded)
    again_rows = {(k, q.region_id): (q.baseline, q.quantiles)
                  for k, run_id in again.items()
                  for q in session.scalars(select(ForecastQuantiles)
                                           .where(ForecastQuantiles.run_id == run_id))}
    assert again_rows == seeded_rows


def test_as_known_record_equals_record_of_stored_mornings(
    session: Session, store: Sim, monkeypatch: pytest.MonkeyPatch
) -> None:
    # the replay never stores; the same forecasts stored morning by morning score the same
    start, end = FIRST + timedelta(days=10), FIRST + timedelta(days=60)
    day = start
    while day <= end:
        store_morning_forecasts(session=session, cutoff=as_known_cutoff(day),
                                forecaster=FORECASTER)
        day += timedelta(days=1)
    stored = forecast_record(session=session, last=None, pooled=True)
    monkeypatch.setattr(forecast_record_module, "SCORE_CHUNK", 5)  # scored in many passes
    replay = forecast_record_as_known(session=session, forecaster=FORECASTER, start=start,
                                      end=end)
    key = lambda c: (c.target, c.scenario, c.region or "", c.horizon)  # noqa: E731
    assert sorted(map(key, stored)) == sorted(map(key, replay))
    by_key = {key(c): c for c in stored}
    for c in replay:
        s = by_key[key(c)]
        assert (c.forecasts, c.inside_50, c.inside_90) == (s.forecasts, s.inside_50, s.inside_90)
        assert_allclose([c.mean_wis, c.naive_error], [s.mean_wis, s.naive_error], rtol=1e-12)
    pooled = next(c for c in replay if c.region is None and c.target == "hosp_admissions"
                  and c.horizon == 7)
    # stationary Poisson counts: the 90 % band holds about 90 % (plumbing check; measured 0.91
    # over the districts, 0.908 with the areas' summed admissions); mornings 10..55 have a
    # settled 7-day outcome (day <= 69 - 7), for 6 districts and 2 areas
    assert pooled.forecasts == 8 * 46 and 0.84 < pooled.coverage_90 < 0.97


def test_record_lines_keep_the_newest_scored(session: Session, store: Sim) -> None:
    for t in range(30, 66):
        store_morning_forecasts(session=session, cutoff=as_known_cutoff(FIRST + timedelta(t)),
                                forecaster=FORECASTER)
    lines = record_lines(session=session, region="D3", horizons=(7, 14), last=20)
    # settled outcomes end at day 62: 7-day forecasts of mornings 30..55, 14-day of 30..48
    assert [(x.target, x.horizon, x.forecasts) for x in lines] == [
        ("hosp_admissions", 7, 20), ("hosp_admissions", 14, 19)]
    assert all(0 <= x.inside_90 <= 20 and x.relative_wis is not None for x in lines)
    assert record_lines(session=session, region="A0", horizons=(14,), last=60)[0].forecasts == 19
    # without waiting for the last days to settle: mornings 30..55
    assert record_lines(session=session, region="A0", horizons=(14,), last=60,
                        settle_days=0)[0].forecasts == 26


class _Broken:
    name = "broken"
    measures = ("hosp_admissions",)

    def __call__(self, known: KnownData) -> list[QuantileForecast]:
        raise RuntimeError("model blew up")


def test_morning_stores_forecasts_after_the_tiers(committed_db: Database, tmp_path: Path,
                                                  caplog: pytest.LogCaptureFixture) -> None:
    path = seed_small_office(committed_db, tmp_path)
    path.write_text(path.read_text().replace("positives]", "positives, hosp_admissions]"))
    feed = load_feeds(path)["long-csv"]
    cases = cases_csv(30)
    admissions = cases.split(b"\n", 1)[1].replace(b",cases,", b",hosp_admissions,")
    receipt = ingest_recorded(committed_db, feed=feed, evaluate=False,
                              payload=Payload.from_bytes("push", cases + admissions)).receipt
    assert receipt.rows_accepted == 180, receipt
    run = evaluate_if_behind(committed_db, forecaster=_Broken())
    assert run is not None and run.written > 0  # the tiers stand
    assert "storing the forecasts at cutoff" in caplog.text
    with committed_db.sessions() as session:
        assert session.scalar(select(func.count()).select_from(ForecastRun)) == 0
    # the next start stores them (default forecaster), once
    assert store_forecasts_after_tiers(committed_db, run.data_cutoff) == 3
    assert store_forecasts_after_tiers(committed_db, run.data_cutoff) == 0
    with committed_db.sessions() as session:
        stored = session.scalars(select(ForecastRun)).one()
        assert (stored.target, stored.data_cutoff, stored.origin) == (
            "hosp_admissions", run.data_cutoff, date(2026, 3, 31))


@pytest.mark.slow
def test_district_dossier_carries_the_record_of_district_and_area(demo_session: Session) -> None:
    from server.readmodels.dossier import district_dossier
    from server.store.models import Region

    # The demo seeds the forecasts of its last 90 mornings as known then (demo_seed/seed.py,
    # store_forecasts_as_known): h-day forecasts of origins up to last - 7 - h have settled
    # outcomes (76 at 7 days, 69 at 14), of which the newest 60 are shown.
    code = demo_session.scalars(
        select(Region.code).where(Region.level == "district").order_by(Region.code)).first()
    assert code is not None
    lines = district_dossier(session=demo_session, code=code).forecast_record
    # the district's own admissions (stored with the areas' admissions in one run per morning)
    # and its area's ICU beds and share and admissions (summed over its districts: the store
    # holds admissions per district only)
    assert {(x.target, x.horizon, x.forecasts) for x in lines} == {
        ("hosp_admissions", 7, 60), ("hosp_admissions", 14, 60),
        ("icu_occupied", 7, 60), ("icu_occupied", 14, 60),
        ("icu_share", 7, 60), ("icu_share", 14, 60)}


def test_icu_share_is_scored_in_the_forecasts_percent(session: Session, store: Sim) -> None:
    # The capacity forecaster gives icu_share in percent of staffed beds (quantiles = 100 x
    # beds quantiles / staffed beds, server/indicators/capacity.py). With staffed beds constant
    # (40) the share's WIS is the beds' WIS times 100/40 and so is its naive error: coverage
    # and relative WIS must equal those of ICU beds (WIS is linear in scale, Bracher et al.
    # 2021, eq. 2). Scored as a fraction, the share's relative WIS was about 300.
    from server.services.capacity_forecaster import CapacityForecaster
    from server.services.capacity_indicators import DEFAULT_SCENARIO, as_path

    fc = CapacityForecaster(parents={d: AREAS[i % 2] for i, d in enumerate(DISTRICTS)},
                            scenario=as_path(DEFAULT_SCENARIO), sims=200)
    cells = forecast_record_as_known(session=session, forecaster=fc,
                                     start=FIRST + timedelta(days=20),
                                     end=FIRST + timedelta(days=50), step=3)
    pooled = {(c.target, c.horizon): c for c in cells if c.region is None}
    for h in (7, 14):
        beds, share = pooled[("icu_occupied", h)], pooled[("icu_share", h)]
        assert share.forecasts == beds.forecasts > 0
        assert (share.inside_50, share.inside_90) == (beds.inside_50, beds.inside_90)
        assert_allclose(share.mean_wis, beds.mean_wis * 100 / 40, rtol=1e-9)
        assert_allclose(share.relative_wis, beds.relative_wis, rtol=1e-9)


def test_forecasts_of_one_target_from_one_morning_are_stored_together(
    session: Session, store: Sim
) -> None:
    # The capacity forecaster returns admissions per district and per area as two forecasts;
    # both are kept (one run per target, scenario and cutoff), never the second alone.
    cutoff = as_known_cutoff(FIRST + timedelta(days=30))
    known = read_known(session=session, cutoff=cutoff, measures=["hosp_admissions"])
    assert known is not None
    levels = np.array(DEFAULT_LEVELS)
    parts = [QuantileForecast(target="hosp_admissions", scenario="x", regions=codes,
                              origin=FIRST + timedelta(days=30), horizons=np.array([1, 7]),
                              levels=levels, values=np.tile(levels * 10, (len(codes), 2, 1)))
             for codes in (("D0", "D1"), ("A0",))]
    assert store_forecasts(session=session, forecasts=parts, cutoff=cutoff, known=known) == 3
    assert session.scalar(select(func.count()).select_from(ForecastRun)) == 1
    assert session.scalar(select(func.count()).select_from(ForecastQuantiles)) == 3
    with pytest.raises(ForecastRecordError, match="forecast twice"):
        store_forecasts(session=session, forecasts=[parts[0], parts[0]], cutoff=cutoff,
                        known=known)
