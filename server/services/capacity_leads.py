"""How many days ahead a capacity prepare signal fired before the real crossing of the ICU share.

Scores a backtest (:class:`server.services.backtest.BacktestResult`): for each prepare signal on
a projected-capacity indicator (:data:`CAPACITY_KINDS`), per area and day its ICU share
(occupied / staffed beds, as known at the end) crossed the indicator's ``share``, the days
between the signal's first firing and the crossing (:func:`capacity_leads`).
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, timedelta

import numpy as np
from numpy.typing import NDArray
from sqlalchemy.orm import Session

from server.services.backtest import BacktestResult
from server.services.capacity_forecaster import district_parents
from server.store.reads import read_dense

__all__ = ["CAPACITY_KINDS", "CapacityLead", "capacity_leads", "crossing_leads"]


#: Indicator kinds that project the ICU share towards a configured ``share`` (percent).
CAPACITY_KINDS = ("icu_days_to_share", "icu_share_projected")


@dataclass(frozen=True, kw_only=True)
class CapacityLead:
    """One real crossing of an area's ICU share and how long before it a prepare signal fired.

    ``crossed`` is a day the area's ICU share (occupied / staffed beds, as known at the end)
    reached ``share`` percent after being below it the day before; ``fired`` the signal's first
    firing day within the ``lookback`` days before (and since the share was last at or above
    ``share``), None when it did not fire; ``lead_days`` = ``crossed - fired``.
    """

    signal: str
    area: str
    share: float
    crossed: date
    fired: date | None

    @property
    def lead_days(self) -> int | None:
        return None if self.fired is None else (self.crossed - self.fired).days


def crossing_leads(
    share: NDArray[np.float64], fired: NDArray[np.bool_], threshold: float, lookback: int
) -> list[tuple[int, int, int]]:
    """(row, crossing day, first firing day or -1) for every upward crossing of ``threshold``.

    ``share`` and ``fired`` are (rows, days). A crossing is a day with ``share >= threshold``
    whose previous known day was below it (the first known day does not count); the firing day
    is the first ``fired`` day in ``max(c - lookback, day after the last day at or above the
    threshold) .. c``.
    """
    out = []
    for r in range(share.shape[0]):
        known = np.flatnonzero(np.isfinite(share[r]))
        above = share[r, known] >= threshold
        ups = known[1:][above[1:] & ~above[:-1]]
        for c in ups:
            before = known[(known < c) & (share[r, known] >= threshold)]
            lo = max(int(c) - lookback, int(before[-1]) + 1 if before.size else 0)
            hits = np.flatnonzero(fired[r, lo: int(c) + 1])
            out.append((r, int(c), lo + int(hits[0]) if hits.size else -1))
    return out


def capacity_leads(
    *, session: Session, result: BacktestResult, lookback: int | None = None
) -> list[CapacityLead]:
    """For each prepare signal on a projected-capacity indicator (:data:`CAPACITY_KINDS`), per
    area and real crossing of the indicator's ``share`` (default 85 %) within the result's
    period, how many days ahead the signal fired (:func:`crossing_leads`; ``lookback`` defaults
    to the indicator's ``horizon``, else 21 days). An area fires when any of its districts
    does (they share the area's projection)."""
    rs, ev = result.ruleset, result.evaluation
    specs = []
    for k, sig in enumerate(rs.prepare):
        spec = rs.indicator(sig.indicator)
        if (spec.kind or spec.name) in CAPACITY_KINDS:
            specs.append((k, sig, float(spec.params.get("share", 85.0)),
                          int(lookback or spec.params.get("horizon", 21))))
    if not specs:
        return []
    parent = {c: a for c, a in district_parents(session).items() if c in set(ev.regions)}
    if rs.level == "areas":  # a policy set per area: its regions are the areas themselves
        parent = {a: a for a in ev.regions}
    areas = sorted(set(parent.values()))
    if not areas:
        return []
    first = ev.dates[0].astype(date)
    last = ev.dates[-1].astype(date)
    dense = read_dense(session=session, measures=["icu_occupied", "icu_staffed"], start=first,
                       end=last, regions=areas)
    row = {c: i for i, c in enumerate(dense.regions)}
    occ, staffed = dense.values["icu_occupied"], dense.values["icu_staffed"]
    with np.errstate(invalid="ignore", divide="ignore"):
        share = np.where(staffed > 0, 100.0 * occ / staffed, np.nan)
    share = np.stack([share[row[a]] if a in row else np.full(ev.dates.size, np.nan)
                      for a in areas])
    member = np.array([[parent.get(c) == a for c in ev.regions] for a in areas])
    cols = result.period
    out = []
    for k, sig, threshold, days in specs:
        fired = (member.astype(np.int64) @ ev.prepare[k].astype(np.int64)) > 0
        for r, c, f in crossing_leads(share, fired, threshold, days):
            if not cols.start <= c < cols.stop:
                continue
            out.append(CapacityLead(
                signal=sig.id, area=areas[r], share=threshold,
                crossed=first + timedelta(days=c),
                fired=None if f < 0 else first + timedelta(days=f)))
    return out
