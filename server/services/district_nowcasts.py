"""Nowcasts of count measures from their reporting triangles (the district indicators' inputs
and the district page's chart).

Count measures arrive late (a case tested on Monday may be reported on Thursday), so the last
days read low. :func:`nowcast_inputs` builds each count measure's reporting triangle from the
stored vintages of the last :data:`NOWCAST_WINDOW` days (one store read) and estimates the
reporting delays at the cutoff (chain ladder, pooled over the parent area or all districts for
districts with few reports); :class:`~server.services.district_data.DistrictData` carries them
and :func:`server.services.district_indicators.on_nowcast` computes an indicator on them.
:func:`district_nowcast` is one district's reported counts beside their nowcast.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, date, datetime, timedelta, tzinfo

import numpy as np
import pandas as pd
from numpy.typing import NDArray
from sqlalchemy.orm import Session

from server.indicators.nowcast import (
    POOL_ALL,
    POOL_GROUP,
    DelayModel,
    delay_model,
    nowcast_window,
    triangle_from_rows,
)
from server.services.stored_values import usable
from server.store import read_dense
from server.store.reads import district_areas, read_vintage_rows

#: Count measures nowcast from their reporting triangles: those the nowcast indicators use
#: (positives and GP consultations would add triangle rows that no indicator reads).
NOWCAST_MEASURES = ("cases", "tests", "hosp_admissions")


def nowcast_measures(measures: Iterable[str]) -> tuple[str, ...]:
    """Those of ``measures`` nowcast: :data:`NOWCAST_MEASURES` and their pathogen-specific
    measures (``cases.influenza``)."""
    return tuple(m for m in measures if m.split(".", 1)[0] in NOWCAST_MEASURES)
#: Delays 0 .. NOWCAST_DELAYS - 1 in the triangle; reference days whose reports estimate them.
NOWCAST_DELAYS = 60
NOWCAST_WINDOW = 60
#: Strata of the delay estimate by reference day modulo this (7: by weekday). Measured on the
#: demo (cases, every morning against the count known 28 days later): by weekday, median error
#: 8.8 % but the 95 % interval covered 99 % (too wide); pooled over weekdays, 10.7 % and 96 %.
NOWCAST_PERIOD = 1


@dataclass(frozen=True, kw_only=True, eq=False)
class NowcastInput:
    """One count measure's delay model at the cutoff and the delay each day is known at.

    ``model`` is shaped (districts, 1, delays); ``known_delay`` (districts, days) or (days,);
    ``basis`` says per district whose reports the delays rest on.
    """

    model: DelayModel
    known_delay: NDArray[np.int64]
    basis: tuple[str, ...]


def pool_basis(pool: NDArray[np.int8], group_names: Sequence[str | None]) -> tuple[str, ...]:
    """Per district, whose reports its delay distribution rests on (for explanations)."""
    return tuple(
        "reporting delays pooled over all districts" if p == POOL_ALL
        else f"reporting delays pooled over {name}" if p == POOL_GROUP and name
        else "the district's own reporting delays"
        for p, name in zip(pool.tolist(), group_names, strict=True)
    )


def nowcast_inputs(
    *, session: Session, regions: Sequence[str], groups: Sequence[str | None],
    dates: NDArray[np.datetime64], as_of: datetime | None,
    group_names: Mapping[str, str] | None = None, time_zone: tzinfo = UTC,
    measures: Sequence[str] = NOWCAST_MEASURES,
) -> dict[str, NowcastInput]:
    """Delay models of every count measure at the cutoff, from one read of stored vintages.

    The triangle covers the last :data:`NOWCAST_WINDOW` reference days up to ``dates[-1]``;
    a row's delay is its day of receipt (the office's local day in ``time_zone``, as the
    as-known backtest counts) minus its reference day; the cutoff is the local day of ``as_of``
    (or of the newest row received). ``groups`` are the districts' parent areas,
    which small districts pool their delays over (:func:`server.indicators.nowcast.delay_model`).
    """
    if not regions or dates.size == 0 or not measures:
        return {}
    end = dates[-1].astype("datetime64[D]")
    first = end - np.timedelta64(NOWCAST_WINDOW - 1, "D")
    rows = read_vintage_rows(
        session=session, measures=measures, regions=regions,
        start=first.astype(date), end=end.astype(date), as_of=as_of,
    )
    if len(rows) == 0:
        return {}
    local = pd.DatetimeIndex(rows.received_at).tz_localize(UTC).tz_convert(time_zone)
    local_days = local.tz_localize(None).to_numpy().astype("datetime64[D]")
    receipt = (local_days - first).astype(np.int64)
    cutoff = int(receipt.max()) if as_of is None else int(
        (np.datetime64(as_of.astimezone(time_zone).date(), "D") - first).astype(np.int64))
    names = sorted({g for g in groups if g is not None})
    group_index = np.array([names.index(g) if g is not None else -1 for g in groups])
    label = group_names or {}
    basis_names = [label.get(g, g) if g is not None else None for g in groups]
    known_delay = (np.datetime64(first, "D") + cutoff - dates.astype("datetime64[D]")).astype(
        np.int64)
    out = {}
    # A stored value the indicators cannot take (:func:`usable`) is left out of the triangle, as
    # it is read as missing everywhere else; counts within the tolerance are rounded.
    values, unusable, _why = usable(rows.value, count=True)
    for k, measure in enumerate(measures):
        pick = (rows.measure == k) & ~unusable
        if not pick.any():
            continue
        tri = triangle_from_rows(
            rows.region[pick], rows.ref_day[pick], receipt[pick], values[pick],
            regions=len(regions), days=NOWCAST_WINDOW, delays=NOWCAST_DELAYS, last_receipt=cutoff,
        )
        model = delay_model(tri, cutoffs=[cutoff], groups=group_index, window=NOWCAST_WINDOW,
                            period=NOWCAST_PERIOD)
        out[measure] = NowcastInput(model=model, known_delay=known_delay,
                                    basis=pool_basis(model.pool[:, 0], basis_names))
    return out


@dataclass(frozen=True, kw_only=True)
class NowcastSeries:
    """One district's daily counts as reported beside their nowcast, for the district page.

    ``nowcast``/``lower``/``upper`` (95 % predictive interval of the final count) are None on
    complete days, except the last complete one, where they equal the report so the dashed
    line joins the reported one.
    """

    measure: str
    dates: tuple[date, ...]
    reported: tuple[float | None, ...]
    nowcast: tuple[float | None, ...]
    lower: tuple[float | None, ...]
    upper: tuple[float | None, ...]
    basis: str


def district_nowcast(
    *, session: Session, code: str, end: date, as_of: datetime | None = None,
    measure: str = "cases", days: int = 42, time_zone: tzinfo = UTC,
) -> NowcastSeries | None:
    """The last ``days`` days to ``end`` of ``measure`` in district ``code``, reported and
    nowcast as known at ``as_of`` (None: nothing stored)."""
    rows = district_areas(session=session)
    codes = tuple(r.code for r in rows)
    if code not in codes:
        return None
    start = end - timedelta(days=days - 1)
    dense = read_dense(session=session, measures=(measure,), start=start, end=end,
                       regions=codes, as_of=as_of)
    inputs = nowcast_inputs(
        session=session, regions=codes, groups=[r.area for r in rows], dates=dense.dates,
        as_of=as_of, group_names={r.area: r.area_name for r in rows if r.area is not None},
        time_zone=time_zone,
    )
    if measure not in inputs:
        return None
    inp = inputs[measure]
    i = codes.index(code)
    nc = nowcast_window(dense[measure], inp.known_delay, inp.model, window=1)
    open_ = nc.incomplete[i] & np.isfinite(nc.estimate[i])
    show = open_.copy()
    before = np.flatnonzero(~open_ & np.isfinite(dense[measure][i]))
    if open_.any() and before.size:
        joined = before[before < np.flatnonzero(open_)[0]]
        if joined.size:
            show[joined[-1]] = True

    def cells(values: NDArray[np.float64]) -> tuple[float | None, ...]:
        return tuple(float(v) if s and np.isfinite(v) else None
                     for v, s in zip(values, show, strict=True))

    reported = dense[measure][i]
    return NowcastSeries(
        measure=measure, dates=tuple(d.astype(date) for d in dense.dates),
        reported=tuple(float(v) if np.isfinite(v) else None for v in reported),
        nowcast=cells(nc.estimate[i]), lower=cells(nc.lower[i]), upper=cells(nc.upper[i]),
        basis=inp.basis[i],
    )
