"""Testing changes as known on each day: a causal screen for the tier engine.

:func:`server.indicators.testing.detect_testing_changes` looks at a whole series, so a break it
finds on day 60 rests on days after 60 as well. The engine needs, for every region and day, what
could be known *that* day. Here a change that starts on day ``tau`` is judged on day ``t`` from
the ``m = t - tau + 1`` days ``[tau, t]`` (``min_days <= m <= compare``) against the same
weekdays one and two weeks before (``[tau - 7, tau - 7 + m)`` and ``[tau - 14, tau - 14 + m)``),
so weekday effects cancel and no later day is read.

A candidate is flagged when tests moved by at least ``min_ratio`` against each of the two
earlier weeks and, beyond doubt, against their mean (the quasi-Poisson interval's bound nearer 1
is past ``min_ratio``), and the odds of a positive test moved the other way. That is the
signature of :func:`detect_testing_changes`, which also asks the odds ratio's interval (Woolf
1955) to exclude 1: a small district has too few positives in three days for that, so here the
direction alone counts and the interval is reported.

On each day the flagged candidate with the largest standardised change is taken; it is a *new*
change when its first day is at least ``separation`` days after the change already known. Within
``compare`` days of a change's detection a start flagged with a larger standardised change than
the known start has that day replaces it (the first days may flag a start a day or two early);
after that the known change stands, its size re-estimated as its days grow, up to ``compare``.
Everything is numpy over regions; only the carrying of the known change walks the days (one
vector step a day). The rule is common practice with no single source;
``bench/testing_validation.py`` measures it on the simulator's known testing changes.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import special

from server.indicators._arrays import (
    FloatArray,
    IntArray,
    as_nonnegative_counts,
    check_level,
    check_positive,
    freeze_arrays,
)

__all__ = ["KnownTestingChanges", "testing_changes_as_known"]

WEEK = 7
#: Days of week-on-week comparisons the dispersion of tests is estimated from (trailing).
DISPERSION_DAYS = 56


@dataclass(frozen=True, eq=False)
class KnownTestingChanges:
    """The latest testing change known on each day; arrays shaped (regions, days).

    Attributes
    ----------
    change_day : ndarray of int
        First day of the latest change known that day (-1: none known).
    detected_day : ndarray of int
        The day that change was first flagged (-1: none).
    tests_ratio, tests_ratio_lower, tests_ratio_upper : ndarray
        Tests on the change's days known so far (up to ``compare``) over the same weekdays one
        and two weeks before, with its interval (NaN: none known).
    odds_ratio, odds_ratio_lower, odds_ratio_upper : ndarray
        Odds of a positive test after / before over the same days, with Woolf's interval.
    level : float
    """

    change_day: IntArray
    detected_day: IntArray
    tests_ratio: FloatArray
    tests_ratio_lower: FloatArray
    tests_ratio_upper: FloatArray
    odds_ratio: FloatArray
    odds_ratio_lower: FloatArray
    odds_ratio_upper: FloatArray
    level: float

    def __post_init__(self) -> None:
        freeze_arrays(self)

    @property
    def since(self) -> FloatArray:
        """Days since the first day of the known change (0 on that day; NaN: none known)."""
        days = np.arange(self.change_day.shape[1], dtype=np.float64)
        return np.where(self.change_day >= 0, days[None, :] - self.change_day, np.nan)


def _sums(values: FloatArray) -> FloatArray:
    p = np.zeros((values.shape[0], values.shape[1] + 1))
    np.cumsum(values, axis=1, out=p[:, 1:])
    return p


def _window(p: FloatArray, start: NDArray[np.int64], m: int) -> FloatArray:
    """Sums over ``[start, start + m)`` for every start (NaN where it leaves the series)."""
    n = p.shape[1] - 1
    ok = (start >= 0) & (start + m <= n)
    s = np.clip(start, 0, n - m)
    out = p[:, s + m] - p[:, s]
    return np.where(ok[None, :], out, np.nan)


def testing_changes_as_known(
    tests: ArrayLike,
    positives: ArrayLike,
    *,
    compare: int = 7,
    min_days: int = 3,
    min_ratio: float = 1.2,
    level: float = 0.95,
    separation: int = 28,
    dismissed: Iterable[tuple[int, int, int]] = (),
) -> KnownTestingChanges:
    """The latest testing change known on each day, from the days up to it only.

    Parameters
    ----------
    tests, positives : array_like, shape (regions, days)
        Daily tests and positive tests (NaN: missing; a window with a missing day is not used).
    compare : int
        Most days after a change its size is estimated from (default 7).
    min_days : int
        Days after a change before it can be flagged (default 3: flagged on its third day).
    min_ratio : float
        Smallest factor of tests flagged, either way (default 1.2).
    level : float
        Interval level of both tests (default 0.95).
    separation : int
        A flagged start within this many days after the known change is the same change.
    dismissed : iterable of (region, change_day, from_day)
        Changes an analyst dismissed: from ``from_day`` on, a known change of ``region`` whose
        first day is within 3 days of ``change_day`` is no longer known (days before keep it,
        as they knew it), and nothing within ``separation`` of it is flagged again.

    Returns
    -------
    KnownTestingChanges

    Notes
    -----
    With :math:`A` the tests over the days from the change and :math:`B_1, B_2` over the same
    weekdays one and two weeks before, :math:`\\log(2A/(B_1+B_2)) \\pm z\\sqrt{\\phi(1/A +
    1/(B_1+B_2))}` (quasi-Poisson); :math:`\\phi \\ge 1` is the mean of
    :math:`\\log^2(W_1/W_2) / (1/W_1 + 1/W_2)` over the trailing ``DISPERSION_DAYS`` days' whole
    weeks :math:`W_1, W_2` before the change (variance of a week-on-week log ratio under no
    change). Positivity: the log odds ratio of the four cells with Woolf's interval (Woolf
    1955), 0.5 added to each cell.
    """
    t = as_nonnegative_counts("tests", tests)
    pos = as_nonnegative_counts("positives", positives)
    if pos.shape != t.shape:
        raise ValueError(f"positives: shape {pos.shape} differs from tests {t.shape}")
    for name, value, low in (("compare", compare, 1), ("min_days", min_days, 1),
                             ("separation", separation, 1)):
        if isinstance(value, bool) or not isinstance(value, int) or value < low:
            raise ValueError(f"{name}: expected an integer >= {low}, got {value!r}")
    if min_days > compare or compare > WEEK:
        raise ValueError(f"compare: expected min_days <= compare <= {WEEK}, got {compare}")
    level = check_level("level", level)
    big = np.log(check_positive("min_ratio", min_ratio))
    rows, n = t.shape
    ok = np.isfinite(t) & np.isfinite(pos)
    pt, pp = _sums(np.where(ok, t, 0.0)), _sums(np.where(ok, pos, 0.0))
    pn = _sums(ok.astype(np.float64))
    zq = float(special.ndtri(0.5 + level / 2.0))
    starts = np.arange(n, dtype=np.int64)
    # dispersion of tests before each start: week-on-week log ratios of whole weeks
    w1, w2 = _window(pt, starts - WEEK, WEEK), _window(pt, starts - 2 * WEEK, WEEK)
    full = (_window(pn, starts - WEEK, WEEK) == WEEK) & (_window(pn, starts - 2 * WEEK, WEEK)
                                                         == WEEK)
    with np.errstate(divide="ignore", invalid="ignore"):
        x = np.log(w1 / w2) ** 2 / (1.0 / w1 + 1.0 / w2)
    good = full & (w1 > 0) & (w2 > 0) & np.isfinite(x)
    sx, sc = _sums(np.where(good, x, 0.0)), _sums(good.astype(np.float64))
    lo = np.clip(starts - DISPERSION_DAYS + 1, 0, n)
    hi = np.clip(starts + 1, 0, n)
    with np.errstate(divide="ignore", invalid="ignore"):
        phi = np.maximum((sx[:, hi] - sx[:, lo]) / (sc[:, hi] - sc[:, lo]), 1.0)
    phi = np.where(np.isfinite(phi), phi, np.inf)  # no whole weeks before: nothing flagged
    # per length m of the days after a start: estimates for every start (columns = starts)
    by_m = {}
    for m in range(min_days, compare + 1):
        a = _window(pt, starts, m)
        b1, b2 = _window(pt, starts - WEEK, m), _window(pt, starts - 2 * WEEK, m)
        pa = _window(pp, starts, m)
        pb = _window(pp, starts - WEEK, m) + _window(pp, starts - 2 * WEEK, m)
        seen = (_window(pn, starts, m) == m) & (_window(pn, starts - WEEK, m) == m) & (
            _window(pn, starts - 2 * WEEK, m) == m)
        with np.errstate(divide="ignore", invalid="ignore"):
            log_r = np.log(2.0 * a / (b1 + b2))
            se = np.sqrt(phi * (1.0 / a + 1.0 / (b1 + b2)))
            na, nb = a - pa, (b1 + b2) - pb
            log_or = (np.log(pa + 0.5) + np.log(nb + 0.5) - np.log(pb + 0.5)
                      - np.log(na + 0.5))
            se_or = np.sqrt(1 / (pa + 0.5) + 1 / (na + 0.5) + 1 / (pb + 0.5) + 1 / (nb + 0.5))
            each = np.minimum(np.log(a / b1), np.log(a / b2))
            each_down = np.maximum(np.log(a / b1), np.log(a / b2))
        seen &= (a > 0) & (b1 > 0) & (b2 > 0)
        wider = (each >= big) & (log_r - zq * se >= big) & (log_or < 0)
        narrower = (each_down <= -big) & (log_r + zq * se <= -big) & (log_or > 0)
        flagged = seen & (wider | narrower)
        with np.errstate(invalid="ignore"):
            score = np.where(flagged, np.abs(log_r) / se, -np.inf)
        by_m[m] = (log_r, se, log_or, se_or, score)
    # best flagged candidate ending on each day t: start t - m + 1 over m
    best = np.full((rows, n), -np.inf)
    best_start = np.full((rows, n), -1, dtype=np.int64)
    for m, (*_est, score) in by_m.items():
        end = starts + m - 1  # the day a start is judged on with m days
        keep = end < n
        s_on_day = np.full((rows, n), -np.inf)
        s_on_day[:, end[keep]] = score[:, keep]
        better = s_on_day > best
        best = np.where(better, s_on_day, best)
        best_start = np.where(better, (starts - m + 1)[None, :], best_start)
    gone: dict[int, list[tuple[int, int]]] = {}
    for r, day, frm in dismissed:
        gone.setdefault(int(r), []).append((int(day), int(frm)))
    change = np.full((rows, n), -1, dtype=np.int64)
    found = np.full((rows, n), -1, dtype=np.int64)
    cur = np.full(rows, -1, dtype=np.int64)
    cur_found = np.full(rows, -1, dtype=np.int64)
    blocked = np.full(rows, -(10**9), dtype=np.int64)  # start of a dismissed change
    has_any = np.isfinite(best).any(axis=0)
    scores = np.stack([by_m[m][-1] for m in range(min_days, compare + 1)])
    rix = np.arange(rows)
    dismiss_days = {frm for items in gone.values() for _d, frm in items}
    for d in range(n):
        if d in dismiss_days:
            for r, items in gone.items():
                for day, frm in items:
                    if frm == d and cur[r] >= 0 and abs(cur[r] - day) <= 3:
                        cur[r], cur_found[r] = -1, -1
                    if frm <= d:
                        blocked[r] = max(blocked[r], day)
        if has_any[d]:
            s = best_start[:, d]
            new = (s >= 0) & ((cur < 0) | (s >= cur + separation)) & (
                np.abs(s - blocked) >= separation)
            # while its first days come in, the known change takes the best start flagged
            m_cur = np.clip(d - cur + 1, min_days, compare) - min_days
            cur_score = scores[m_cur, rix, np.maximum(cur, 0)]
            refine = (s >= 0) & ~new & (cur >= 0) & (d - cur_found < compare) & (
                np.abs(s - cur) < separation) & (best[:, d] > cur_score)
            cur = np.where(new | refine, s, cur)
            cur_found = np.where(new, d, cur_found)
        change[:, d], found[:, d] = cur, cur_found
    # the size as known on each day: the change's days up to that day, at most `compare`
    known = change >= 0
    m_now = np.clip(np.arange(n)[None, :] - change + 1, min_days, compare)
    col = np.where(known, change, 0)
    log_r = np.full((rows, n), np.nan)
    se = np.full((rows, n), np.nan)
    log_or = np.full((rows, n), np.nan)
    se_or = np.full((rows, n), np.nan)
    ridx = np.arange(rows)[:, None]
    for m, (lr, sm, lor, sor, _score) in by_m.items():
        at = known & (m_now == m)
        log_r = np.where(at, lr[ridx, col], log_r)
        se = np.where(at, sm[ridx, col], se)
        log_or = np.where(at, lor[ridx, col], log_or)
        se_or = np.where(at, sor[ridx, col], se_or)
    return KnownTestingChanges(
        change_day=change, detected_day=found, tests_ratio=np.exp(log_r),
        tests_ratio_lower=np.exp(log_r - zq * se), tests_ratio_upper=np.exp(log_r + zq * se),
        odds_ratio=np.exp(log_or), odds_ratio_lower=np.exp(log_or - zq * se_or),
        odds_ratio_upper=np.exp(log_or + zq * se_or), level=level,
    )
