"""The demo scenario: an invented county, its true epidemic and every feed's vintaged rows.

All names, places and numbers are invented for the demo.

:func:`build_scenario` is deterministic for a ``seed`` and ``end`` date. The scenario runs
``days`` days up to ``end`` (``yesterday`` by default) with one vintage a day: the data of
``end`` is known on ``end``. When each measure becomes known:

- ``cases`` by test date: first reported on the test date, revised upward over up to 10
  days (fewer reports at weekends, catch-up on Mondays);
- ``tests``, ``positives``, ``hosp_admissions``, ``gp_ari``: final on first report, the day
  after the reference date (``positives`` equal the final ``cases``, so they run ahead of
  the case feed's late revisions);
- ``icu_occupied``, ``icu_staffed`` per region: the census of a day, known that day;
- ``ww_concentration``, ``ww_flow``, ``ww_marker`` per plant: on sample days only, known 2
  days after sampling.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from datetime import date, datetime, timedelta
from typing import Any

import numpy as np
import pandas as pd

from demo_seed.errors import ScenarioArgumentError
from demo_seed.geography import Catchment, Geography, build_geography
from demo_seed.observation import (
    AscertainmentChange,
    case_reports,
    gp_consultations,
    hospital_admissions,
    icu_census,
    lab_tests,
    ward_census,
)
from demo_seed.observation import testing_change as testing_change_at
from demo_seed.seasons import PATHOGENS, history_start, simulate_seasons
from demo_seed.storyline import Truth, build_calendar, simulate_truth
from demo_seed.vintages import delayed_report_rows, first_report_rows, rows_to_frame
from demo_seed.wastewater import wastewater

__all__ = [
    "MEASURES",
    "PATHOGEN_MEASURES",
    "Catchment",
    "RegionSpec",
    "Scenario",
    "Truth",
    "build_scenario",
]

MIN_DAYS, MAX_DAYS = 150, 3650

MEASURES: dict[str, dict[str, str]] = {
    "cases": {"unit": "cases", "kind": "count", "aggregation": "sum",
              "description": "Confirmed cases by test date; provisional, revised upward for "
                             "up to 10 days as reports arrive."},
    "tests": {"unit": "tests", "kind": "count", "aggregation": "sum",
              "description": "Tests performed by test date; final when first reported, "
                             "the next day."},
    "positives": {"unit": "tests", "kind": "count", "aggregation": "sum",
                  "description": "Positive tests by test date; final when first reported, "
                                 "the next day."},
    "hosp_admissions": {"unit": "admissions", "kind": "count", "aggregation": "sum",
                        "description": "Hospital admissions with the infection by "
                                       "admission date, reported the next day."},
    "icu_occupied": {"unit": "patients", "kind": "level", "aggregation": "sum",
                     "description": "Patients with the infection in intensive care at the "
                                    "daily census (per region)."},
    "icu_staffed": {"unit": "beds", "kind": "level", "aggregation": "sum",
                    "description": "Staffed adult intensive-care beds at the daily census "
                                   "(per region)."},
    "ward_occupied": {"unit": "patients", "kind": "level", "aggregation": "sum",
                      "description": "Patients with the infection in general (non-intensive-"
                                     "care) beds at the daily census (per region)."},
    "ward_staffed": {"unit": "beds", "kind": "level", "aggregation": "sum",
                     "description": "Staffed adult general beds at the daily census "
                                    "(per region)."},
    "ww_concentration": {"unit": "gene copies/L", "kind": "concentration",
                         "aggregation": "none",
                         "description": "Viral RNA in 24-hour composite influent samples "
                                        "(per plant), known 2 days after sampling."},
    "ww_flow": {"unit": "m3/day", "kind": "level", "aggregation": "none",
                "description": "Influent flow over the 24 hours of the composite sample "
                               "(per plant)."},
    "ww_marker": {"unit": "copies/L", "kind": "concentration", "aggregation": "none",
                  "description": "Faecal marker virus in the same sample, to normalise for "
                                 "dilution (per plant)."},
    "gp_ari": {"unit": "consultations", "kind": "count", "aggregation": "sum",
               "description": "GP consultations for acute respiratory illness, reported "
                              "the next day."},
}

#: The pathogen-specific measures of the influenza and RSV seasons (:mod:`demo_seed.seasons`),
#: delivered for :data:`~demo_seed.seasons.PAST_SEASONS` past seasons before the scenario too.
PATHOGEN_MEASURES: dict[str, dict[str, str]] = {
    f"{base}.{pathogen}": {
        "unit": unit, "kind": "count", "aggregation": "sum", "pathogen": pathogen,
        "description": f"{text} ({label}), reported the next day.",
    }
    for pathogen, label in (("influenza", "influenza"), ("rsv", "RSV"))
    for base, unit, text in (
        ("gp_ari", "consultations", "GP consultations for acute respiratory illness with "
                                    "a positive sentinel swab"),
        ("cases", "cases", "Laboratory-confirmed cases by test date"),
    )
}


@dataclass(frozen=True)
class RegionSpec:
    """A region row for the store: county, region, district or plant."""

    code: str
    name: str
    level: str
    parent: str | None
    population: int
    geometry: dict[str, Any] | None
    attributes: dict[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class Scenario:
    """Everything the demo loader needs; see the module docstring for reporting lags."""

    seed: int
    start: date
    end: date
    regions: tuple[RegionSpec, ...]
    catchments: tuple[Catchment, ...]
    observations: pd.DataFrame
    truth: Truth
    policy_dates: tuple[tuple[date, str], ...]
    testing_change: date
    testing_change_truth: AscertainmentChange | None = None
    #: rows of :data:`PATHOGEN_MEASURES`, same columns as ``observations``; the days before
    #: ``start`` arrive as one backfill delivery on ``start`` (the sentinel network's archive)
    pathogen_observations: pd.DataFrame | None = None


def _validate(seed: object, end: object, days: object) -> None:
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise ScenarioArgumentError("seed", seed, "must be a non-negative int")
    if end is not None and (isinstance(end, datetime) or not isinstance(end, date)):
        raise ScenarioArgumentError("end", end, "must be a datetime.date or None")
    if isinstance(days, bool) or not isinstance(days, int) or not MIN_DAYS <= days <= MAX_DAYS:
        raise ScenarioArgumentError("days", days, f"must be an int in [{MIN_DAYS}, {MAX_DAYS}]")


def region_specs(geography: Geography) -> tuple[RegionSpec, ...]:
    """County first, then regions, then districts, then plants."""
    specs = [RegionSpec(code=geography.county_code, name=geography.county_name,
                        level="county", parent=None, population=geography.population,
                        geometry=geography.county_geometry(), attributes={})]
    specs += [RegionSpec(code=r.code, name=r.name, level="region",
                         parent=geography.county_code, population=r.population,
                         geometry=geography.region_geometry(r.code),
                         attributes={"icu_beds_base": r.icu_beds})
              for r in geography.regions]
    specs += [RegionSpec(code=d.code, name=d.name, level="district", parent=d.region,
                         population=d.population, geometry=geography.district_geometry(d.code),
                         attributes={"neighbours": list(d.neighbours)})
              for d in geography.districts]
    region_of = {d.code: d.region for d in geography.districts}
    specs += [RegionSpec(code=p.code, name=p.name, level="plant",
                         parent=region_of[p.district], population=round(p.served_population),
                         geometry=None,
                         attributes={"kind": "wastewater_plant", "district": p.district,
                                     "lon": p.location[0], "lat": p.location[1]})
              for p in geography.plants]
    return tuple(specs)


def build_scenario(*, seed: int = 7, end: date | None = None, days: int = 548) -> Scenario:
    """Simulate the invented county for ``days`` days ending on ``end``.

    Parameters
    ----------
    seed : int
        Seed of all random streams (one independent stream per model).
    end : datetime.date, optional
        Last day and last vintage; ``None`` means yesterday.
    days : int
        Length of the scenario in days.

    Returns
    -------
    Scenario

    Raises
    ------
    ScenarioArgumentError
        If an argument is of the wrong type or out of range.
    """
    _validate(seed, end, days)
    last = date.today() - timedelta(days=1) if end is None else end
    start = last - timedelta(days=days - 1)
    geography = build_geography()
    calendar = build_calendar(start, days)
    truth = simulate_truth(geography, calendar, seed)
    dates = calendar.dates
    change = (calendar.testing_change - start).days

    def stream(k: int) -> np.random.Generator:
        return np.random.default_rng([seed, k])

    districts = geography.district_codes
    pop = geography.district_populations()
    cases = case_reports(truth.infections, dates, change, stream(21))
    tests = lab_tests(cases.final, pop, dates, change, stream(22))
    hosp = hospital_admissions(truth.infections, stream(23))
    beds = np.array([r.icu_beds for r in geography.regions], dtype=float)
    icu = icu_census(hosp.admissions, geography.region_index(), beds, stream(24))
    ward = ward_census(hosp.admissions, geography.region_index(), beds, stream(27))
    served = np.array([p.served_population for p in geography.plants])
    ww = wastewater(truth.infections, geography.catchment_matrix(), served, dates, stream(25))
    gp = gp_consultations(truth.infections, pop, dates, stream(26))
    regions = tuple(r.code for r in geography.regions)
    plants = tuple(p.code for p in geography.plants)
    blocks = [
        delayed_report_rows(cases.by_delay, districts, "cases"),
        first_report_rows(tests.tests, districts, "tests", lag=1),
        first_report_rows(tests.positives, districts, "positives", lag=1),
        first_report_rows(hosp.admissions, districts, "hosp_admissions", lag=1),
        first_report_rows(icu.occupied, regions, "icu_occupied", lag=0),
        first_report_rows(icu.staffed, regions, "icu_staffed", lag=0),
        first_report_rows(ward.occupied, regions, "ward_occupied", lag=0),
        first_report_rows(ward.staffed, regions, "ward_staffed", lag=0),
        first_report_rows(ww.concentration, plants, "ww_concentration", lag=2),
        first_report_rows(ww.flow, plants, "ww_flow", lag=2),
        first_report_rows(ww.marker, plants, "ww_marker", lag=2),
        first_report_rows(gp.consultations, districts, "gp_ari", lag=1),
    ]
    return Scenario(seed=seed, start=start, end=last, regions=region_specs(geography),
                    catchments=geography.catchments, observations=rows_to_frame(blocks, dates),
                    truth=truth, policy_dates=truth.policy_dates,
                    testing_change=calendar.testing_change,
                    testing_change_truth=testing_change_at(change),
                    pathogen_observations=pathogen_rows(seed, start, last, districts, pop))


def pathogen_rows(seed: int, start: date, end: date, districts: tuple[str, ...],
                  population: np.ndarray) -> pd.DataFrame:
    """Rows of :data:`PATHOGEN_MEASURES` from :func:`demo_seed.seasons.simulate_seasons`, from
    :func:`~demo_seed.seasons.history_start` (or ``start`` if earlier) to ``end``: each day's
    value known the next day, the days before ``start`` all known on ``start``."""
    first = min(start, history_start(end))
    blocks = []
    dates = np.datetime64(first) + np.arange((end - first).days + 1).astype("timedelta64[D]")
    begin = (start - first).days
    for k, pathogen in enumerate(PATHOGENS):
        run = simulate_seasons(pathogen=pathogen, start=first, end=end, population=population,
                               rng=np.random.default_rng([seed, 40 + k]))
        for base, values in (("gp_ari", run.gp), ("cases", run.cases)):
            block = first_report_rows(values, districts, f"{base}.{pathogen}", lag=1)
            blocks.append(replace(block, known_day=np.maximum(block.known_day, begin)))
    return rows_to_frame(blocks, dates)
