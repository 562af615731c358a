"""How good were the nowcasts of the as-known replay: each morning's nowcast 7-day count against
the count known :data:`LATER_DAYS` days later (:func:`nowcast_accuracy_report`).

A morning ``t`` sees the rows received up to the end of local day ``t + 1``, as in the as-known
replay (:mod:`server.services.as_known_replay`), and nowcasts from the delay model estimated on
the reporting-triangle cells observable that morning.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC, timedelta, tzinfo

import numpy as np
from numpy.typing import NDArray
from sqlalchemy.orm import Session

from server.indicators.nowcast import (
    DelayModel,
    nowcast_accuracy,
    nowcast_window,
    triangle_from_rows,
)
from server.services.as_known_replay import area_parents, arrival_rows, rolling_model
from server.services.backtest import data_span
from server.services.district_data import load_district_data
from server.services.district_nowcasts import NOWCAST_DELAYS, NOWCAST_MEASURES, NOWCAST_WINDOW

__all__ = ["LATER_DAYS", "NowcastScore", "nowcast_accuracy_report"]

#: A nowcast is scored against the count known this many days after its morning.
LATER_DAYS = 28


@dataclass(frozen=True, kw_only=True)
class NowcastScore:
    """Accuracy of one measure's nowcast of the last 7 days, for a district or all (``region``
    None): median absolute relative error of the nowcast and of the unadjusted count reported
    that morning, and the share of mornings whose later count fell inside the 95 % interval."""

    measure: str
    region: str | None
    error: float
    unadjusted_error: float
    coverage: float
    mornings: int

    @property
    def line(self) -> str:
        """'nowcast of the last 7 days: median error X % (unadjusted Y %), 95 % interval
        covered Z % of N mornings'."""
        if self.mornings == 0:
            return "nowcast of the last 7 days: no morning needed one"
        return (
            f"nowcast of the last 7 days: median error {100 * self.error:.1f} % (unadjusted "
            f"{100 * self.unadjusted_error:.1f} %), 95 % interval covered "
            f"{100 * self.coverage:.0f} % of {self.mornings} mornings"
        )


def nowcast_accuracy_report(
    *, session: Session, measures: tuple[str, ...] = ("cases", "hosp_admissions"),
    regions: tuple[str, ...] | None = None, later_days: int = LATER_DAYS,
    time_zone: tzinfo = UTC, last_mornings: int | None = None,
) -> list[NowcastScore]:
    """Score the nowcast each past morning made of the last 7 days against the count known
    ``later_days`` days later, per measure and district (``regions``; default all) and for all
    districts together.

    Morning ``t`` is the as-known day of the backtest: receipts up to day ``t + 1``, the newest
    day ``t``. Its nowcast is the 7-day count of days ``t - 6 .. t`` from the delay model of
    that morning (:func:`server.indicators.nowcast.nowcast_window`); the later count is the
    same days' reports received by day ``t + later_days + 1``. Mornings whose window is complete
    (nothing to nowcast) or too recent to have a later count are not scored; with
    ``last_mornings`` only that many of the newest scorable mornings are (and only the rows
    they need are read).
    """
    first, last = data_span(session=session)
    base = load_district_data(session=session, start=first, end=first, nowcast=False)
    n_days = (last - first).days + 1
    area_parent = area_parents(session, base)
    areas = sorted(set(area_parent.values()))
    pick = np.array([areas.index(area_parent[c]) if c in area_parent else -1
                     for c in base.regions], dtype=np.int64)
    names = [m for m in measures if m in NOWCAST_MEASURES]
    codes = {"district": list(base.regions), "area": [], "plant": []}
    mornings = np.arange(6, n_days - later_days, dtype=np.int64)
    if last_mornings is not None:
        mornings = mornings[-last_mornings:] if last_mornings > 0 else mornings[:0]
    since = None
    if last_mornings is not None and mornings.size:
        since = first + timedelta(days=max(int(mornings[0]) - NOWCAST_WINDOW - 7, 0))
    rows = arrival_rows(session, names, codes, first, last, time_zone, since=since)
    wanted = [base.regions.index(c) for c in regions] if regions is not None else list(
        range(len(base.regions)))
    out: list[NowcastScore] = []
    for k, measure in enumerate(names):
        sel = np.flatnonzero(rows.measure == k)
        tri = triangle_from_rows(
            rows.row[sel], rows.col[sel], rows.known_day[sel] + 1, rows.value[sel],
            regions=len(base.regions), days=n_days, delays=NOWCAST_DELAYS, last_receipt=n_days,
        )
        if mornings.size == 0:
            scores = nowcast_accuracy(*(np.zeros((len(base.regions), 0)),) * 6)
        else:
            model = rolling_model(tri, mornings + 1, pick)
            days = mornings[:, None] - np.arange(6, -1, -1)[None, :]  # (mornings, 7)
            known_at = np.minimum(mornings[:, None] + 1 - days, NOWCAST_DELAYS - 1)
            later_at = np.minimum(mornings[:, None] + later_days + 1 - days, NOWCAST_DELAYS - 1)
            values = tri[:, days, known_at]  # (regions, mornings, 7)
            later = tri[:, days, later_at].sum(axis=2)
            n_r, n_m = values.shape[:2]
            stacked = DelayModel(
                model.reported.reshape(n_r * n_m, 1, -1), model.log_var.reshape(n_r * n_m, 1, -1),
                model.pool.reshape(-1, 1), model.reports.reshape(-1, 1),
            )
            nc = nowcast_window(values.reshape(n_r * n_m, 7), np.arange(7, 0, -1), stacked,
                                window=7)
            def col(a: NDArray, n_r: int = n_r, n_m: int = n_m) -> NDArray:  # type: ignore[type-arg]
                return a[:, -1].reshape(n_r, n_m)

            est, lo, hi, rep = col(nc.estimate), col(nc.lower), col(nc.upper), col(nc.known)
            scored = col(nc.nowcast)
            scores = nowcast_accuracy(est, lo, hi, rep, later, scored)
            total = nowcast_accuracy(*(a[wanted].reshape(1, -1)
                                       for a in (est, lo, hi, rep, later, scored)))
            out.append(NowcastScore(
                measure=measure, region=None, error=float(total.error[0]),
                unadjusted_error=float(total.unadjusted_error[0]),
                coverage=float(total.coverage[0]), mornings=int(total.mornings[0])))
        for r in wanted:
            out.append(NowcastScore(
                measure=measure, region=base.regions[r], error=float(scores.error[r]),
                unadjusted_error=float(scores.unadjusted_error[r]),
                coverage=float(scores.coverage[r]), mornings=int(scores.mornings[r])))
    return out
