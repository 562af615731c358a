"""The phase of each district's current wave: the ``wave_phase`` indicator and the page panel.

:func:`wave_phase_series` builds the indicator a policy may use (listed in
:mod:`server.services.builtin_kinds`). Its value on a day is the phase code of
:func:`server.indicators.phase.fit_phase` on the district's cases of the :data:`WINDOW_DAYS`
days to that day (``0`` declining, ``1`` past its turning point, ``2`` slowing, ``3`` growing;
:data:`server.indicators.phase.PHASES`). Fits are made on *cutoff days*: the last day and every
``stride_days`` (default 7) before it, back ``history_days`` (default 28); other days hold the
newest earlier cutoff's phase with its age growing (so ``max_age_days`` decides when it is
stale), and days before the first cutoff are unknown. All districts and cutoffs are fitted in one
batch. Days still being reported enter the fit as their nowcast (as ``incidence_7d`` does);
such a value carries ``nowcast``. A stored case count that cannot be used is left out of the fit;
values whose last three weeks (the weekly diagnostics) held one are ``invalid``.

:func:`district_phase` is the read model of the district page's panel: the newest day's fit of
one district with its diagnostics.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC, date, datetime, timedelta, tzinfo
from typing import TYPE_CHECKING

import numpy as np
from numpy.typing import NDArray
from sqlalchemy.orm import Session

from rules import IndicatorSeries, Ruleset
from server.indicators._arrays import trailing_sum
from server.indicators.nowcast import nowcast_window
from server.indicators.phase import PHASE_LABELS, PHASES, WavePhase, fit_phase
from server.store import read_dense
from server.store.reads import district_areas

if TYPE_CHECKING:
    from server.services.district_data import DistrictData

# district_indicators' helpers are imported where they are used (the kinds registry imports
# both modules; importing it at the top here was circular before the registry).

#: Days of cases each fit sees (the wave start is searched within them).
WINDOW_DAYS = 150
STRIDE_DAYS, HISTORY_DAYS = 7, 28
#: Days a bad input reaches forward: the weekly diagnostics read three weeks.
DIAGNOSTIC_REACH = 21
MODEL_NAMES = ("logistic", "Richards")


def _cutoffs(days: int, stride: int, history: int) -> NDArray[np.int64]:
    last = days - 1
    return np.arange(last, max(last - history, 0) - 1, -stride, dtype=np.int64)[::-1]


def _windows(counts: NDArray[np.float64], cutoffs: NDArray[np.int64], width: int
             ) -> NDArray[np.float64]:
    """(regions * cutoffs, width): each region's ``width`` days up to each cutoff (NaN before
    the first day), rows ordered region-major."""
    regions, days = counts.shape
    offsets = cutoffs[:, None] - width + 1 + np.arange(width)[None, :]  # (cutoffs, width)
    taken = counts[:, np.clip(offsets, 0, days - 1)]  # (regions, cutoffs, width)
    taken = np.where(offsets[None] >= 0, taken, np.nan)
    return taken.reshape(regions * len(cutoffs), width)


def wave_phase_series(d: DistrictData, ruleset: Ruleset) -> IndicatorSeries:
    """The ``wave_phase`` indicator for every district (module docstring)."""
    from server.services.district_indicators import data_age
    params = ruleset.indicator("wave_phase").params if "wave_phase" in (
        ruleset.used_indicators()) else {}
    stride = int(params.get("stride_days", STRIDE_DAYS))
    history = int(params.get("history_days", HISTORY_DAYS))
    cases = d.district["cases"]
    regions, days = cases.shape
    estimate = np.full((regions, days), np.nan)
    if regions == 0 or days == 0:
        return IndicatorSeries(estimate=estimate)
    counts, used = cases, np.zeros(cases.shape, dtype=bool)
    nc = d.nowcast_of("cases", window=1)
    if nc is not None:
        used = nc.incomplete & np.isfinite(nc.daily)
        counts = np.where(used, nc.daily, cases)
    cutoffs = _cutoffs(days, max(stride, 1), max(history, 0))
    fit = fit_phase(_windows(counts, cutoffs, min(WINDOW_DAYS, days)))
    estimate[:, cutoffs] = fit.phase.reshape(regions, len(cutoffs))
    if nc is None:
        return IndicatorSeries(estimate=estimate, age_days=data_age(cases),
                               stale=d.stale_of("cases"),
                               invalid=d.invalid_of("cases", reach=DIAGNOSTIC_REACH))
    # Nowcast days among those the weekly diagnostics of each cutoff read.
    nowcast_days = trailing_sum(used.astype(np.float64), DIAGNOSTIC_REACH)
    flag = (nowcast_days > 0) & np.isfinite(estimate)
    return IndicatorSeries(
        estimate=estimate, age_days=data_age(cases), stale=d.stale_of("cases"),
        invalid=d.invalid_of("cases", reach=DIAGNOSTIC_REACH), nowcast=flag,
        nowcast_days=np.where(flag, nowcast_days, 0.0), nowcast_basis=d.nowcasts["cases"].basis,
    )


@dataclass(frozen=True, kw_only=True)
class Estimate:
    """A value with the bounds of its interval (None where unknown)."""

    value: float | None
    lower: float | None
    upper: float | None


@dataclass(frozen=True, kw_only=True)
class PhasePanel:
    """The newest day's wave of one district, for the district page.

    ``phase`` is a key of :data:`~server.indicators.phase.PHASES` (None: no fit). Days are
    dates; rates are per day. ``final_size_is_lower_bound``: before the fitted turning point
    (:data:`~server.indicators.phase.LOWER_BOUND_WARNING`); when the fit is still exponential
    the final size, share and turning date are unknown (None).
    """

    last_day: date
    phase: str | None
    phase_label: str | None
    wave_start: date
    days_fitted: int
    cases_in_wave: float
    model: str
    final_size: Estimate
    final_size_is_lower_bound: bool
    share_reached: Estimate
    share_at_turning_point: float | None
    turning_date: date | None
    turning_date_lower: date | None
    turning_date_upper: date | None
    growth_rate: Estimate
    growth_change: Estimate
    level: float
    nowcast_days: int


def _num(x: float) -> float | None:
    return float(x) if np.isfinite(x) else None


def _estimate(iv: object, i: int = 0) -> Estimate:
    return Estimate(value=_num(iv.estimate[i]), lower=_num(iv.lower[i]),  # type: ignore[attr-defined]
                    upper=_num(iv.upper[i]))  # type: ignore[attr-defined]


@dataclass(frozen=True, kw_only=True)
class DistrictPhase:
    """The page panel: the district's wave and that of its area (the sum of the area's
    districts' cases; None for a district without an area)."""

    district: PhasePanel
    area: PhasePanel | None
    area_name: str | None


def district_phase(
    *, session: Session, code: str, end: date, as_of: datetime | None = None,
    time_zone: tzinfo = UTC,
) -> DistrictPhase | None:
    """The phase of the current wave of district ``code`` and of its area on ``end``.

    Uses the cases of the :data:`WINDOW_DAYS` days to ``end`` as known at ``as_of``, with the
    days still being reported replaced by their nowcast, as the indicator does; the area's
    counts are the sums over its districts (nowcasts included). Both are fitted in one batch.
    None when the district is unknown or has no cases stored.
    """
    from server.services.district_nowcasts import nowcast_inputs
    from server.services.stored_values import usable

    rows = district_areas(session=session)
    codes = tuple(r.code for r in rows)
    if code not in codes:
        return None
    i = codes.index(code)
    area, area_name = rows[i].area, rows[i].area_name
    members = [j for j, r in enumerate(rows) if area is not None and r.area == area]
    start = end - timedelta(days=WINDOW_DAYS - 1)
    dense = read_dense(session=session, measures=("cases",), start=start, end=end,
                       regions=codes, as_of=as_of)
    counts, _bad, _why = usable(np.asarray(dense["cases"], dtype=np.float64), count=True)
    if counts.size == 0 or not np.isfinite(counts[i]).any():
        return None
    used = np.zeros(counts.shape, dtype=bool)
    inputs = nowcast_inputs(
        session=session, regions=codes, groups=[r.area for r in rows], dates=dense.dates,
        as_of=as_of, group_names={r.area: r.area_name for r in rows if r.area is not None},
        time_zone=time_zone,
    )
    if "cases" in inputs:
        inp = inputs["cases"]
        nc = nowcast_window(counts, inp.known_delay, inp.model, window=1)
        used = nc.incomplete & np.isfinite(nc.daily)
        counts = np.where(used, nc.daily, counts)
    series = [counts[i]]
    if members:
        part = counts[members]
        series.append(np.where(np.isfinite(part).any(axis=0), np.nansum(part, axis=0), np.nan))
    fit = fit_phase(np.vstack(series))
    return DistrictPhase(
        district=_panel(fit, 0, dense.dates, int(used[i].sum())),
        area=_panel(fit, 1, dense.dates, int(used[members].any(axis=0).sum()))
        if members else None,
        area_name=area_name if members else None,
    )


def _panel(fit: WavePhase, i: int, dates: NDArray[np.datetime64], nowcast_days: int
           ) -> PhasePanel:
    day0 = dates[0].astype("datetime64[D]").astype(date)
    identified = bool(fit.converged[i])
    none = Estimate(value=None, lower=None, upper=None)

    def on(offset: float | None) -> date | None:
        return None if offset is None else day0 + timedelta(days=round(offset))

    t0 = _estimate(fit.turning_day, i) if identified else none
    code = fit.phase[i]
    known = bool(np.isfinite(code))
    return PhasePanel(
        last_day=day0 + timedelta(days=int(fit.last_day[i])),
        phase=PHASES[int(code)] if known else None,
        phase_label=PHASE_LABELS[int(code)] if known else None,
        wave_start=day0 + timedelta(days=int(fit.start[i])),
        days_fitted=int(fit.n_days[i]), cases_in_wave=float(fit.cases_in_wave[i]),
        model=MODEL_NAMES[int(fit.model[i])],
        final_size=_estimate(fit.final_size, i) if identified else none,
        final_size_is_lower_bound=bool(fit.final_size_is_lower_bound[i]),
        share_reached=_estimate(fit.share_reached, i) if identified else none,
        share_at_turning_point=_num(fit.share_at_turning_point[i]) if identified else None,
        turning_date=on(t0.value), turning_date_lower=on(t0.lower),
        turning_date_upper=on(t0.upper),
        growth_rate=_estimate(fit.growth_rate, i), growth_change=_estimate(fit.growth_change, i),
        level=fit.level, nowcast_days=nowcast_days,
    )
