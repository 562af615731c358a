"""Page data: the area capacity page and the district page's forecast panel.

Both read the same inputs as the engine's projected-capacity indicators
(:mod:`server.services.capacity_indicators`): admissions of the area's districts (the nowcast
on the days still being reported), the area's ICU census and staffed beds, as known at the
newest evaluation run's cutoff, and the active ruleset's scenarios. The forecasts themselves
come from :func:`server.indicators.capacity.capacity_forecasts` (simulated, 50 % and 90 %
predictive bands). The pages show the forecast record beside them
(:func:`server.services.forecast_record.record_lines`, made by
:mod:`server.services.capacity_forecaster`).
"""

from __future__ import annotations

import math
import zlib
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import date, timedelta

import numpy as np
from sqlalchemy import func, select
from sqlalchemy.orm import Session, aliased

from rules import Ruleset
from server.indicators.capacity import BEDS, CapacityForecasts, capacity_forecasts
from server.indicators.hospital import LengthOfStay, length_of_stay
from server.services.assessments import newest_run_of
from server.services.capacity_indicators import (
    admissions_with_nowcast,
    as_path,
    forecast_scenarios,
)
from server.services.district_data import DISTRICT_MEASURES, MeasureNeeds
from server.services.district_indicators import load_district_data
from server.services.errors import ServiceError
from server.services.ruleset_cache import parsed
from server.services.rulesets import active_ruleset
from server.store.models import Measure, Observation, Region, Vintage

__all__ = ["AreaCapacity", "DistrictForecast", "Fan", "NoCapacityError", "area_capacity",
           "district_forecast"]

#: Days of history loaded (growth window, the days shown before the forecast, nowcasts).
HISTORY = 70
#: Days of census shown before the forecast.
SHOWN = 42
HORIZON = 21
#: Simulations per forecast on the pages (a few regions: more than the bench's).
SIMS = 2000
DEFAULT_SHARE = 85.0
#: Length of stay in general (ward) beds assumed by the general-bed forecast: log-normal,
#: median 6 days, quartiles 4 and 9 (common practice, no source; the ICU forecast uses
#: :func:`~server.indicators.hospital.length_of_stay`'s published default).
WARD_LOS_MEDIAN, WARD_LOS_QUARTILES = 6.0, (4.0, 9.0)


def bed_length_of_stay(beds: str) -> LengthOfStay:
    """The length of stay the page's forecast of ``beds`` (``icu`` or ``ward``) assumes."""
    if beds == "ward":
        return length_of_stay(median=WARD_LOS_MEDIAN, quartiles=WARD_LOS_QUARTILES)
    return length_of_stay()


class NoCapacityError(ServiceError, LookupError):
    def __init__(self, code: str) -> None:
        super().__init__(f"area {code!r}: no such area with districts, or no data yet")


@dataclass(frozen=True, kw_only=True)
class Fan:
    """One scenario's forecast of one target: median and 50 %/90 % bands, days 1..horizon."""

    scenario: str
    label: str
    dates: tuple[date, ...]
    median: tuple[float | None, ...]
    lower50: tuple[float | None, ...]
    upper50: tuple[float | None, ...]
    lower90: tuple[float | None, ...]
    upper90: tuple[float | None, ...]


@dataclass(frozen=True, kw_only=True)
class DaysToShareRow:
    """Days until the scenario's expected ICU share reaches the share (None: not within the
    horizon) with the 90 % interval; ``reached`` when it is reached already."""

    scenario: str
    label: str
    estimate: float | None
    lower: float | None
    upper: float | None
    reached: bool


@dataclass(frozen=True, kw_only=True)
class AreaCapacity:
    code: str
    name: str
    districts: tuple[tuple[str, str], ...]
    origin: date
    horizon: int
    share: float
    dates: tuple[date, ...]
    occupied: tuple[float | None, ...]
    staffed: tuple[float | None, ...]
    growth: float | None
    growth_se: float | None
    fans: tuple[Fan, ...]          # beds in use per scenario
    days: tuple[DaysToShareRow, ...]
    beds: str = "icu"              # which beds: "icu" or "ward" (general beds)
    other_beds: bool = False       # the area reports the other kind of beds too

    @property
    def staffed_now(self) -> float | None:
        return self.staffed[-1] if self.staffed else None

    @property
    def occupied_now(self) -> float | None:
        return self.occupied[-1] if self.occupied else None


@dataclass(frozen=True, kw_only=True)
class DistrictForecast:
    code: str
    area: str | None
    area_name: str | None
    origin: date
    horizon: int
    share: float
    fans: tuple[Fan, ...]          # the district's hospital admissions per scenario
    days: tuple[DaysToShareRow, ...]  # the area's ICU days to the share, per scenario


def _num(x: float) -> float | None:
    return float(x) if math.isfinite(float(x)) else None


def _share_of(rs: Ruleset | None) -> float:
    if rs is not None and any(i.name == "icu_days_to_share" for i in rs.indicators):
        return float(rs.indicator("icu_days_to_share").params.get("share", DEFAULT_SHARE))
    return DEFAULT_SHARE


def _fans(fc: CapacityForecasts, target: str, row: int, labels: dict[str, str]) -> tuple[Fan, ...]:
    out = []
    for f in fc.forecasts:
        if f.target != target:
            continue
        lo90, hi90 = f.interval(0.9)
        lo50, hi50 = f.interval(0.5)

        def cells(a: np.ndarray) -> tuple[float | None, ...]:
            return tuple(_num(v) for v in a[row])

        out.append(Fan(scenario=f.scenario, label=labels[f.scenario], dates=f.target_dates(),
                       median=cells(f.median()), lower50=cells(lo50), upper50=cells(hi50),
                       lower90=cells(lo90), upper90=cells(hi90)))
    return tuple(out)


def _days(fc: CapacityForecasts, row: int, labels: dict[str, str]) -> tuple[DaysToShareRow, ...]:
    def cell(x: float) -> float | None:
        return None if not math.isfinite(float(x)) else float(x)

    return tuple(
        DaysToShareRow(scenario=c.scenario, label=labels[c.scenario],
                       estimate=cell(c.estimate[row]), lower=cell(c.lower[row]),
                       upper=cell(c.upper[row]), reached=bool(c.estimate[row] == 0))
        for c in fc.days_to_share
    )


@dataclass(frozen=True, kw_only=True)
class _Inputs:
    area: Region
    districts: tuple[tuple[str, str], ...]
    rows: list[int]
    dates: list[date]
    admissions: np.ndarray   # (districts of the area, days), nowcast where incomplete
    occupied: np.ndarray     # (days,)
    staffed: np.ndarray
    ruleset: Ruleset | None


def _inputs(session: Session, area_code: str, beds: str = "icu") -> _Inputs:
    area = session.scalar(select(Region).where(Region.code == area_code))
    if area is None:
        raise NoCapacityError(area_code)
    districts = session.execute(
        select(Region.code, Region.name).where(Region.parent_id == area.id,
                                               Region.level == "district")
        .order_by(Region.code)).all()
    if not districts:
        raise NoCapacityError(area_code)
    row = active_ruleset(session=session)
    run = newest_run_of(session=session, ruleset_id=row.id) if row is not None else None
    as_of = run.data_cutoff if run is not None else None
    end = session.scalar(  # the newest census of the area (as known at the cutoff)
        select(func.max(Observation.ref_date))
        .join(Measure, Measure.id == Observation.measure_id)
        .join(Vintage, Vintage.id == Observation.vintage_id)
        .where(Observation.region_id == area.id, Measure.name == f"{beds}_occupied",
               *([Vintage.received_at <= as_of] if as_of is not None else [])))
    if end is None:
        raise NoCapacityError(area_code)
    data = load_district_data(session=session, start=end - timedelta(days=HISTORY - 1), end=end,
                              as_of=as_of, needs=MeasureNeeds(
                                  district=DISTRICT_MEASURES,
                                  area=(f"{beds}_occupied", f"{beds}_staffed"), plant=()))
    index = [data.regions.index(c) for c, _n in districts if c in data.regions]
    if not index:
        raise NoCapacityError(area_code)
    adm = admissions_with_nowcast(data)
    occ = data.area_of_district[f"{beds}_occupied"][index[0]]
    staffed = data.area_of_district[f"{beds}_staffed"][index[0]]
    summed = adm[index].sum(axis=0)
    known = np.flatnonzero(np.isfinite(occ) & np.isfinite(staffed) & np.isfinite(summed))
    if known.size == 0:
        raise NoCapacityError(area_code)
    last = int(known[-1]) + 1
    dates = [d.astype("datetime64[D]").astype(date) for d in data.dates[:last]]
    return _Inputs(area=area, districts=tuple((c, n) for c, n in districts), rows=index,
                   dates=dates, admissions=adm[index, :last], occupied=occ[:last],
                   staffed=staffed[:last], ruleset=parsed(row) if row is not None else None)


def _forecast(inp: _Inputs, admissions: np.ndarray, names: Sequence[str], *,
              capacity: bool, beds: str = "icu") -> CapacityForecasts:
    scenarios = forecast_scenarios(inp.ruleset)
    origin = inp.dates[-1]
    seed = zlib.crc32(f"{','.join(names)}|{origin}".encode())
    return capacity_forecasts(
        admissions, regions=tuple(names), origin=origin,
        scenarios=[as_path(s) for s in scenarios],
        occupied=np.full(len(names), inp.occupied[-1]) if capacity else None,
        staffed=np.full(len(names), inp.staffed[-1]) if capacity else None,
        horizon=HORIZON, sims=SIMS, shares=(_share_of(inp.ruleset),), seed=seed, beds=beds,
        los=bed_length_of_stay(beds),
    )


def area_capacity(*, session: Session, code: str, beds: str = "icu") -> AreaCapacity:
    """The area capacity page: census, staffed beds, each scenario's fan and days to the share,
    of ICU beds (``beds="icu"``) or general beds (``"ward"``; the same model with
    :data:`WARD_LOS_MEDIAN` days' stay and the share the policy configures for ICU beds)."""
    if beds not in BEDS:
        raise NoCapacityError(code)
    inp = _inputs(session, code, beds)
    other = next(b for b in BEDS if b != beds)
    has_other = session.scalar(
        select(Observation.ref_date).join(Measure, Measure.id == Observation.measure_id)
        .where(Observation.region_id == inp.area.id, Measure.name == f"{other}_occupied")
        .limit(1)) is not None
    labels = {s.name: s.label for s in forecast_scenarios(inp.ruleset)}
    fc = _forecast(inp, inp.admissions.sum(axis=0, keepdims=True), (code,), capacity=True,
                   beds=beds)
    shown = slice(max(len(inp.dates) - SHOWN, 0), len(inp.dates))
    return AreaCapacity(
        code=inp.area.code, name=inp.area.name, districts=inp.districts, origin=inp.dates[-1],
        horizon=HORIZON, share=_share_of(inp.ruleset), dates=tuple(inp.dates[shown]),
        occupied=tuple(_num(v) for v in inp.occupied[shown]),
        staffed=tuple(_num(v) for v in inp.staffed[shown]),
        growth=_num(fc.growth[0]), growth_se=_num(fc.growth_se[0]),
        fans=_fans(fc, f"{beds}_occupied", 0, labels), days=_days(fc, 0, labels),
        beds=beds, other_beds=has_other,
    )


def district_forecast(*, session: Session, code: str) -> DistrictForecast | None:
    """The district page's forecast panel (None: the district has no area or no data)."""
    parent = aliased(Region)
    found = session.execute(
        select(parent.code).join(Region, Region.parent_id == parent.id)
        .where(Region.code == code, Region.level == "district")).first()
    if found is None:
        return None
    try:
        inp = _inputs(session, found[0])
    except NoCapacityError:
        return None
    labels = {s.name: s.label for s in forecast_scenarios(inp.ruleset)}
    k = [c for c, _n in inp.districts].index(code)
    own = _forecast(inp, inp.admissions[k: k + 1], (code,), capacity=False)
    area = _forecast(inp, inp.admissions.sum(axis=0, keepdims=True), (found[0],), capacity=True)
    return DistrictForecast(
        code=code, area=inp.area.code, area_name=inp.area.name, origin=inp.dates[-1],
        horizon=HORIZON, share=_share_of(inp.ruleset),
        fans=_fans(own, "hosp_admissions", 0, labels), days=_days(area, 0, labels),
    )
