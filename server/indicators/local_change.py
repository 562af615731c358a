"""The change of growth at each kink, measured on the days near it.

The kink model of :mod:`server.indicators.changepoints` gives each segment one growth rate, an
average over the whole segment. A segment can be long (the last one often runs for months) and
its growth drifts within it (depletion of susceptibles, seasons, slow changes of behaviour that
no single kink stands for). The slope change at a kink, read off the whole-segment fit, then
compares two long averages instead of the growth just before and just after the change, and its
interval (which assumes the growth constant over the segment) is too narrow exactly where the
segments are long and the counts many.

Here each kink's change is measured locally: fixed knots are added ``window`` days before and
after every kink where that day lies inside a segment reaching further (at least ``window``
days, and at least ``min_gap``, from every kink; at least ``min_gap`` from the ends of the series
and from a knot already kept), and the model is refitted with them. The knots are hinges like
the kinks (smoothed alike when the fit's hinges are) at known days, so the model is still a
GLM; the coefficient of kink k is then the difference between the slopes of the pieces adjacent
to it (a regression spline with fixed knots: Hastie, Tibshirani & Friedman 2009, The Elements of
Statistical Learning, 2nd ed., 5.2). A piece is cut at ``window`` days from the kink where its
segment reaches further; it is not cut between two kinks fewer than ``2 window`` days apart (up
to ``2 window - 1`` days), and a knot dropped for lying within ``min_gap`` of another leaves a
piece of up to ``window + min_gap - 1`` days. A knot's date is not estimated, so Muggeo's date
columns are kept for the kinks only. The detected kinks, their dates and the segments' growth
rates are not changed. Where the refit does not converge (a knot and a kink with no observed
day between them and a level shift in that gap make the design collinear),
:func:`server.indicators.changepoints.detect_changepoints` keeps that region's whole-segment
change.

No database, web or clock here.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

from server.indicators._arrays import FloatArray, IntArray, as_nonnegative_counts
from server.indicators._segmentation import sort_kinks
from server.indicators.kinkfit import (
    BoolArray,
    Dispersion,
    KinkFit,
    _fit_kinks,
    _pad_hinges,
)

__all__ = ["LocalFit", "fit_local", "local_knots"]


def local_knots(kinks: IntArray, n: int, window: int, min_gap: int) -> IntArray:
    """Fixed knots ``window`` days either side of each kink.

    Parameters
    ----------
    kinks : ndarray of int, shape (regions, k)
        Kink days, -1 for none, any order.
    n : int
        Days of the series.
    window : int
        Days from a kink to its knots.
    min_gap : int
        Fewest days between a knot and any kink, other knot or end of the series
        (``0 < t < n``: a knot on day ``min_gap`` at the earliest, ``n - min_gap`` at the
        latest).

    Returns
    -------
    ndarray of int, shape (regions, 2 k)
        The knots, -1 for none, in ascending order. A candidate ``tau +- window`` is kept when it
        lies at least ``window`` days from every kink (so that it falls in a segment longer than
        ``window`` on that side; and at least ``min_gap`` days from it) and at least ``min_gap``
        days from the ends and from the knots already kept (taken in ascending order).
    """
    rows, k = kinks.shape
    out = np.full((rows, 2 * k), -1, dtype=np.int64)
    if k == 0:
        return out
    has = kinks >= 0
    cand = np.concatenate([np.where(has, kinks - window, -1), np.where(has, kinks + window, -1)],
                          axis=1)
    far = np.ones(cand.shape, dtype=bool)
    for j in range(k):  # at least `window` days from every kink of the row
        tau = kinks[:, j : j + 1]
        far &= (tau < 0) | (np.abs(cand - tau) >= max(window, min_gap))
    inside = (cand >= min_gap) & (cand <= n - min_gap)
    cand = sort_kinks(np.where(far & inside & (cand >= 0), cand, -1))
    for r in np.flatnonzero((cand >= 0).any(axis=1)):
        kept: list[int] = []
        for c in cand[r][cand[r] >= 0]:
            if not kept or c - kept[-1] >= min_gap:
                kept.append(int(c))
        out[r, : len(kept)] = kept
    return out


class LocalFit:
    """The kink model refitted with the fixed knots of :func:`local_knots`.

    Attributes
    ----------
    fit : KinkFit
        The refit; its ``kinks`` hold the kinks and the knots, sorted.
    dated : ndarray of bool, shape of ``fit.kinks``
        True at the original kinks (their dates were estimated), False at the knots.
    position : ndarray of int, shape of the original kinks
        Column of ``fit.kinks`` (and hinge coefficient ``2 + position``) of each original kink;
        -1 where there is none.
    """

    __slots__ = ("dated", "fit", "position")

    def __init__(self, fit: KinkFit, dated: BoolArray, position: IntArray) -> None:
        self.fit = fit
        self.dated = dated
        self.position = position


def fit_local(counts: ArrayLike, fit: KinkFit, *, window: int, min_gap: int,
              dispersion: Dispersion, ramp: FloatArray | None = None) -> LocalFit:
    """``fit`` (kinks and level shifts as found) refitted with the knots of
    :func:`local_knots`, from ``fit``'s coefficients (the knots' slope changes 0).

    Rows without a knot are refitted too (their fit is unchanged up to Newton's tolerance),
    so that every row's figures come from one fit.
    """
    y = as_nonnegative_counts("counts", counts)
    if y.shape != fit.mu.shape:
        raise ValueError(f"counts: expected shape {fit.mu.shape}, got {y.shape}")
    rows, k = fit.kinks.shape
    n = y.shape[1]
    knots = local_knots(fit.kinks, n, window, min_gap)
    aug = np.concatenate([fit.kinks, knots], axis=1)
    big = np.iinfo(np.int64).max
    order = np.argsort(np.where(aug >= 0, aug, big), axis=1, kind="stable")
    back = np.argsort(order, axis=1, kind="stable")
    position = np.where(fit.kinks >= 0, back[:, :k], -1)
    # warm start: the fit's coefficients with a zero slope change at every knot, in the
    # sorted order of the augmented kinks
    start = _pad_hinges(fit.coef, k, aug.shape[1], 1)
    hinge = np.take_along_axis(start[:, 2 : 2 + aug.shape[1]], order, axis=1)
    start[:, 2 : 2 + aug.shape[1]] = hinge
    sorted_aug = sort_kinks(aug)
    refit = _fit_kinks(y, sorted_aug, fit.level_shifts, dispersion, True, start, ramp=ramp)
    dated = np.zeros(sorted_aug.shape, dtype=bool)
    rr, jj = np.nonzero(position >= 0)
    dated[rr, position[rr, jj]] = True
    return LocalFit(refit, dated, position)
