"""Breaks in the other data streams (hospital admissions, wastewater) and their agreement with
the breaks in cases.

Each stream gets its own change points:

* *cases* and *admissions* (counts, per district; an area's or the county's summed from its
  districts, a day known only when every district reported): the kink model of
  :func:`server.indicators.changepoints.detect_changepoints` (quasi-Poisson, weekday effects);
* *wastewater* (a concentration per plant: continuous, log-normal scatter, two or three
  samples a week): :func:`server.indicators.level_breaks.detect_level_breaks` on the log of
  the concentration divided by the faecal marker of the same sample where there is one (which
  removes dilution and handling), else the concentration. A region's wastewater is that of
  the plant serving most of its people (catchment shares times district populations).

A case break agrees with a stream when that stream has a break of the same direction (growth
turning up or down in both) within ``tolerance`` days of it after shifting by the stream's
delay relative to cases
(:mod:`server.indicators.stream_agreement`, defaults and their sources there).
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field

import numpy as np
from sqlalchemy import func, select
from sqlalchemy.orm import Session, aliased

from server.indicators.changepoints import detect_changepoints
from server.indicators.level_breaks import detect_level_breaks
from server.indicators.stream_agreement import ALIGNMENT, DEFAULT_TOLERANCE, stream_agreement
from server.services.errors import FormFieldError
from server.services.hierarchy import membership, parents_of, sum_up
from server.store.models import Catchment, Measure, Observation, Region
from server.store.reads import read_dense

__all__ = [
    "SEARCH_LEAD_DAYS",
    "STREAMS",
    "StreamBreak",
    "StreamOptions",
    "StreamsOfRegion",
    "Agreement",
    "newest_cases_day",
    "search_span",
    "stream_breaks",
]

#: The streams other than cases, in the order pages show them.
STREAMS = ("admissions", "wastewater")
MEASURE = {"cases": "cases", "admissions": "hosp_admissions"}
#: Fewest days with data for a break search (two segments of the default 14 days).
MIN_DAYS = 28
#: Days before a page's period that the search of admissions and wastewater reads (cases keep
#: the page's own lead). These streams are sparse (a district's admissions) or noisy (two or
#: three samples a week): a longer series gives their dispersion and each kink more days. In
#: the demo (seed 7, the newest 120 days) 90 days before the period gave 4 admissions or
#: wastewater breaks in 3 of 14 districts, 365 days 9 in 6 (looked at once; no source).
SEARCH_LEAD_DAYS = 365
#: Days every stream is searched over, up to the search's last day: one span for every page
#: (the district page, an area's, the effects page, the briefing), so that a region's breaks
#: do not depend on the period a page shows (they did: a break found on the effects page was
#: missing from the area's page).
SEARCH_DAYS = 365
#: Days before a long period shown that the search still reads.
PERIOD_LEAD_DAYS = 90


def newest_cases_day(session: Session) -> dt.date | None:
    """The newest day with cases of any region (None: no cases stored)."""
    return session.scalar(select(func.max(Observation.ref_date)).join(
        Measure, Measure.id == Observation.measure_id).where(Measure.name == MEASURE["cases"]))


def search_span(session: Session, start: dt.date, end: dt.date | None,
                settle: int) -> tuple[dt.date, dt.date]:
    """First and last day of the break search for a page showing ``start..end`` (``end``
    None: up to the newest data): the newest day is the newest day with cases less ``settle``
    days (late reports still arrive; the effects page's setting) or ``end`` if earlier; the
    search reads the :data:`SEARCH_DAYS` days up to it, or from :data:`PERIOD_LEAD_DAYS`
    before ``start`` where that is earlier (a period of more than about nine months)."""
    newest = newest_cases_day(session)
    last = end if newest is None else newest - dt.timedelta(days=settle)
    if end is not None:
        last = min(last, end)
    if last is None:
        last = start
    first = min(last - dt.timedelta(days=SEARCH_DAYS - 1),
                start - dt.timedelta(days=PERIOD_LEAD_DAYS))
    return first, last


class StreamOptionError(FormFieldError):
    """A stream option out of range; names the field."""


@dataclass(frozen=True, kw_only=True)
class StreamOptions:
    """Delays of each stream relative to cases (days; negative: the stream leads) and the
    tolerance of agreement; defaults in :mod:`server.indicators.stream_agreement`."""

    admissions_delay: int = ALIGNMENT["admissions"]
    wastewater_delay: int = ALIGNMENT["wastewater"]
    tolerance: int = DEFAULT_TOLERANCE
    #: Smallest relative change of R reported as a break in every stream (the kernel's).
    min_change: float = 0.1

    def __post_init__(self) -> None:
        for name, low, high in (("admissions_delay", -28, 28), ("wastewater_delay", -28, 28),
                                ("tolerance", 0, 28)):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int) or not low <= value <= high:
                raise StreamOptionError(name, f"expected a whole number of days in "
                                              f"{low}..{high}, got {value!r}")
        if not (isinstance(self.min_change, (int, float)) and 0 <= self.min_change <= 5):
            raise StreamOptionError("min_change", f"expected a number in 0..5, got "
                                                  f"{self.min_change!r}")

    def delay(self, stream: str) -> int:
        return {"cases": 0, "admissions": self.admissions_delay,
                "wastewater": self.wastewater_delay}[stream]


@dataclass(frozen=True, kw_only=True)
class StreamBreak:
    """A break of one stream: its day with the interval, the change of growth rate per day."""

    stream: str
    day: dt.date
    lower: dt.date
    upper: dt.date
    growth_change: tuple[float, float, float]


@dataclass(frozen=True, kw_only=True)
class Agreement:
    """Whether ``stream`` has a break within the tolerance of a case break after alignment:
    ``day`` is its nearest aligned break (None when the stream has none), ``offset`` the
    aligned difference in days; ``searched`` False when the stream has too few data."""

    stream: str
    searched: bool
    agrees: bool
    day: dt.date | None
    offset: float


@dataclass(frozen=True, kw_only=True)
class StreamsOfRegion:
    """The breaks of every stream of one region, and for each case break its agreement."""

    code: str
    breaks: dict[str, tuple[StreamBreak, ...]]  # per stream (cases and STREAMS)
    searched: dict[str, bool]
    #: for cases' break i, one Agreement per stream of STREAMS
    agreement: tuple[tuple[Agreement, ...], ...]
    plant: str | None = None  # the plant whose wastewater stands for the region
    options: StreamOptions = field(default_factory=StreamOptions)


def _regions(session: Session) -> dict[int, Region]:
    return {r.id: r for r in session.scalars(select(Region))}


def daily_counts(session: Session, measure: str, codes: list[str], first: dt.date,
                 last: dt.date, regions: dict[int, Region]) -> np.ndarray | None:
    """Daily counts (codes, days): districts as stored, other levels summed from districts."""
    districts = sorted(r.code for r in regions.values() if r.level == "district")
    try:
        dense = read_dense(session=session, measures=[measure], start=first, end=last,
                           regions=districts)
    except LookupError:  # a measure the store does not hold
        return None
    parent_of = parents_of(regions)
    matrix = membership(districts, parent_of, codes)
    for i, code in enumerate(codes):
        if code in districts:
            matrix[i] = 0.0
            matrix[i, districts.index(code)] = 1.0
    return sum_up(dense[measure], matrix, codes).values


def main_plants(session: Session, codes: list[str], regions: dict[int, Region]
                ) -> list[str | None]:
    """For each region, the plant serving most of its people (None without a catchment)."""
    plant, district = aliased(Region), aliased(Region)
    rows = session.execute(select(plant.code, district.code, district.population,
                                  Catchment.share)
                           .join(plant, plant.id == Catchment.plant_id)
                           .join(district, district.id == Catchment.district_id)).all()
    code_of = {r.id: r.code for r in regions.values()}
    parent = {r.code: code_of.get(r.parent_id) for r in regions.values()}

    def ancestors(code: str) -> set[str]:
        out = {code}
        while parent.get(code):
            code = parent[code]  # type: ignore[assignment]
            out.add(code)
        return out

    served: dict[str, dict[str, float]] = {}
    for p, d, pop, share in rows:
        for a in ancestors(d):
            served.setdefault(a, {}).setdefault(p, 0.0)
            served[a][p] += float(share) * float(pop or 0)
    return [max(sorted(served[c]), key=lambda p: served[c][p]) if served.get(c) else None
            for c in codes]


def _wastewater(session: Session, plants: list[str | None], first: dt.date, last: dt.date
                ) -> np.ndarray | None:
    named = sorted({p for p in plants if p is not None})
    if not named:
        return None
    try:
        conc = read_dense(session=session, measures=["ww_concentration"], start=first,
                          end=last, regions=named)["ww_concentration"]
    except LookupError:
        return None
    try:
        marker = read_dense(session=session, measures=["ww_marker"], start=first, end=last,
                            regions=named)["ww_marker"]
    except LookupError:
        marker = np.full_like(conc, np.nan)
    with np.errstate(invalid="ignore", divide="ignore"):
        value = np.where(np.isfinite(marker) & (marker > 0), conc / marker, conc)
    days = conc.shape[1]
    return np.stack([value[named.index(p)] if p is not None else np.full(days, np.nan)
                     for p in plants])


def _usable(values: np.ndarray) -> np.ndarray:
    return np.isfinite(values).sum(axis=1) >= MIN_DAYS


@dataclass(frozen=True)
class _Found:
    """A kernel's breaks on ``rows`` (day indices from the first day read)."""

    rows: np.ndarray
    n_breaks: np.ndarray
    breaks: np.ndarray
    lower: np.ndarray
    upper: np.ndarray
    change: tuple[np.ndarray, np.ndarray, np.ndarray]


def _search(stream: str, values: np.ndarray, min_change: float) -> _Found | None:
    """Breaks of the rows with enough data, on the days from the first to the last with data
    in any of them (so a single region is searched on its own span)."""
    rows = np.flatnonzero(_usable(values))
    if rows.size == 0:
        return None
    seen = np.flatnonzero(np.isfinite(values[rows]).any(axis=0))
    a, b = int(seen[0]), int(seen[-1]) + 1
    part = values[rows, a:b]
    try:
        if stream == "wastewater":
            res = detect_level_breaks(part, min_change=min_change)
        else:
            res = detect_changepoints(part, min_change=min_change)
    except ValueError:
        return None

    def shift(x: np.ndarray) -> np.ndarray:
        return np.where(x >= 0, x + a, -1)

    return _Found(rows, res.n_breaks, shift(res.breaks), shift(res.break_lower),
                  shift(res.break_upper), (res.growth_change, res.growth_change_lower,
                                           res.growth_change_upper))


def stream_breaks(*, session: Session, codes: list[str], first: dt.date, last: dt.date,
                  options: StreamOptions | None = None, cases_from: dt.date | None = None
                  ) -> list[StreamsOfRegion]:
    """Breaks of cases, admissions and wastewater of each region in ``codes`` found on the
    days ``first..last`` (cases on ``cases_from..last`` when given), with the agreement of
    every case break."""
    o = options or StreamOptions()
    regions = _regions(session)
    plants = main_plants(session, codes, regions)
    cases = daily_counts(session, MEASURE["cases"], codes, first, last, regions)
    if cases is not None and cases_from is not None and cases_from > first:
        cases[:, : (cases_from - first).days] = np.nan
    data: dict[str, np.ndarray | None] = {
        "cases": cases,
        "admissions": daily_counts(session, MEASURE["admissions"], codes, first, last, regions),
        "wastewater": _wastewater(session, plants, first, last),
    }
    found: dict[str, np.ndarray] = {}  # (regions, k) break days, -1 none
    changes: dict[str, np.ndarray] = {}  # (regions, k) change of growth rate at each
    searched: dict[str, np.ndarray] = {}
    marks: dict[str, list[list[StreamBreak]]] = {}
    for stream in ("cases", *STREAMS):
        values = data[stream]
        res = None if values is None else _search(stream, values, o.min_change)
        marks[stream] = [[] for _ in codes]
        done = np.zeros(len(codes), dtype=bool)
        kmax = 0 if res is None else res.breaks.shape[1]
        days = np.full((len(codes), kmax), -1, dtype=np.int64)
        change = np.full((len(codes), kmax), np.nan)
        if res is not None:
            done[res.rows] = True
            days[res.rows] = res.breaks
            change[res.rows] = res.change[0]

            def day(j: int) -> dt.date:
                return first + dt.timedelta(days=int(j))

            for j, i in enumerate(res.rows):
                for k in range(int(res.n_breaks[j])):
                    marks[stream][i].append(StreamBreak(
                        stream=stream, day=day(res.breaks[j, k]), lower=day(res.lower[j, k]),
                        upper=day(res.upper[j, k]),
                        growth_change=(float(res.change[0][j, k]), float(res.change[1][j, k]),
                                       float(res.change[2][j, k]))))
        found[stream] = days
        changes[stream] = change
        searched[stream] = done
    agree = {s: stream_agreement(found["cases"], found[s], alignment=o.delay(s),
                                 tolerance=o.tolerance, case_change=changes["cases"],
                                 other_change=changes[s]) for s in STREAMS}
    out = []
    for i, code in enumerate(codes):
        rows_of = []
        for k in range(len(marks["cases"][i])):
            rows_of.append(tuple(Agreement(
                stream=s, searched=bool(searched[s][i]),
                agrees=bool(agree[s].agrees[i, k]),
                day=(first + dt.timedelta(days=int(agree[s].nearest[i, k]))
                     if agree[s].nearest[i, k] >= 0 else None),
                offset=float(agree[s].offset[i, k])) for s in STREAMS))
        out.append(StreamsOfRegion(
            code=code, breaks={s: tuple(marks[s][i]) for s in ("cases", *STREAMS)},
            searched={s: bool(searched[s][i]) for s in ("cases", *STREAMS)},
            agreement=tuple(rows_of), plant=plants[i], options=o))
    return out
