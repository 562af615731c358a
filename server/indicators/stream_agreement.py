"""Agreement of breaks between data streams (cases, hospital admissions, wastewater).

A change in transmission on infection day ``d`` shows in each stream after that stream's
delay from infection: in wastewater after the shedding delay, in cases by test date after
incubation and the wait for a test, in admissions after the longer wait for admission. Each
stream's break days are shifted by its *alignment* (mean delay of the stream less that of
cases: negative for a stream that leads cases) before they are compared with the case breaks.

Default alignments (days, stream minus cases by test date):

- admissions ``+3``: infection to admission about 10-12 days against infection to test about
  7-9 days (incubation median 5.1 days, Lauer et al. 2020, Ann Intern Med 172:577; onset to
  admission about a week, from memory of published COVID-19 series; common practice, no
  single source);
- wastewater ``-4``: RNA shedding in stool is highest in the first week of illness (Wölfel et
  al. 2020, Nature 581:465), so the signal leads cases by test date by several days (4 is a
  rounded value, common practice, no source).

No database, web or clock here.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike

from server.indicators._arrays import FloatArray, IntArray, freeze_arrays

__all__ = ["ALIGNMENT", "DEFAULT_TOLERANCE", "StreamAgreement", "stream_agreement"]

#: Days from a break in cases to the same change in each stream (stream minus cases).
ALIGNMENT = {"cases": 0, "admissions": 3, "wastewater": -4}
#: Days either side of a case break within which an aligned break of another stream agrees
#: (about the width of a break date's interval; common practice, no source).
DEFAULT_TOLERANCE = 7


@dataclass(frozen=True, eq=False)
class StreamAgreement:
    """For each case break, the nearest aligned break of the other stream (of the same
    direction when the changes are given).

    Attributes
    ----------
    agrees : ndarray of bool, shape (regions, k)
        A break of the other stream lies within ``tolerance`` days after alignment.
    offset : ndarray, shape (regions, k)
        Aligned other break minus the case break, days, of the nearest one (NaN when the
        other stream has no break or the case break is -1).
    nearest : ndarray of int, shape (regions, k)
        Day (in the other stream's own time) of that nearest break, -1 where none.
    """

    agrees: np.ndarray
    offset: FloatArray
    nearest: IntArray

    def __post_init__(self) -> None:
        freeze_arrays(self)


def stream_agreement(case_breaks: ArrayLike, other_breaks: ArrayLike, *, alignment: float,
                     tolerance: float = DEFAULT_TOLERANCE, case_change: ArrayLike | None = None,
                     other_change: ArrayLike | None = None) -> StreamAgreement:
    """Whether each case break has a break of another stream within ``tolerance`` days.

    Parameters
    ----------
    case_breaks : array_like of int, shape (regions, k)
        Break days of cases, -1 for none.
    other_breaks : array_like of int, shape (regions, m)
        Break days of the other stream on the same day axis, -1 for none.
    alignment : float
        Days the other stream's breaks come after those of cases (negative: before).
    tolerance : float
        Largest ``|other - alignment - case|`` that agrees (days, >= 0).
    case_change, other_change : array_like, shapes of the breaks, optional
        Change of the growth rate at each break. When both are given only a break of the
        other stream whose change has the same sign counts (growth turning down in cases and
        up in wastewater is no agreement).

    Returns
    -------
    StreamAgreement
    """
    c = np.atleast_2d(np.asarray(case_breaks, dtype=np.int64))
    o = np.atleast_2d(np.asarray(other_breaks, dtype=np.int64))
    if c.shape[0] != o.shape[0]:
        raise ValueError(f"other_breaks: {o.shape[0]} regions, case_breaks has {c.shape[0]}")
    tolerance = float(tolerance)
    if not np.isfinite(tolerance) or tolerance < 0:
        raise ValueError(f"tolerance: must be a finite number >= 0, got {tolerance!r}")
    if not np.isfinite(float(alignment)):
        raise ValueError(f"alignment: must be a finite number, got {alignment!r}")
    rows, k = c.shape
    if o.shape[1] == 0:
        none = np.zeros((rows, k), dtype=bool)
        return StreamAgreement(none, np.full((rows, k), np.nan), np.full((rows, k), -1))
    diff = (o[:, None, :] - float(alignment)) - c[:, :, None]  # (rows, k, m)
    valid = (c[:, :, None] >= 0) & (o[:, None, :] >= 0)
    if case_change is not None and other_change is not None:
        cc = np.broadcast_to(np.asarray(case_change, dtype=np.float64), c.shape)
        oc = np.broadcast_to(np.asarray(other_change, dtype=np.float64), o.shape)
        valid &= np.sign(cc)[:, :, None] == np.sign(oc)[:, None, :]
    dist = np.where(valid, np.abs(diff), np.inf)
    at = np.argmin(dist, axis=2)
    best = np.take_along_axis(dist, at[..., None], axis=2)[..., 0]
    found = np.isfinite(best)
    offset = np.where(found, np.take_along_axis(diff, at[..., None], axis=2)[..., 0], np.nan)
    nearest = np.where(found, np.take_along_axis(
        np.broadcast_to(o[:, None, :], diff.shape), at[..., None], axis=2)[..., 0], -1)
    return StreamAgreement(found & (best <= tolerance), offset, nearest)
