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
from numpy.typing import ArrayLike
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


def _window(p: FloatArray, offset: int, m: int) -> FloatArray:
    """Column ``j``: the sum over days ``[j + offset, j + offset + m)`` (NaN where that leaves
    the series); ``p`` are prefix sums (slices, no gathers)."""
    n = p.shape[1] - 1
    out = np.full((p.shape[0], n), np.nan)
    lo, hi = max(0, -offset), min(n, n - m - offset + 1)
    if hi > lo:
        np.subtract(p[:, lo + offset + m : hi + offset + m], p[:, lo + offset : hi + offset],
                    out=out[:, lo:hi])
    return out


class _Cells:
    """Estimates at chosen (region, start, days after) cells, from prefix sums."""

    def __init__(self, pt: FloatArray, pp: FloatArray, pn: FloatArray, sx: FloatArray,
                 sc: FloatArray, zq: float) -> None:
        self.pt, self.pp, self.pn, self.sx, self.sc, self.zq = pt, pp, pn, sx, sc, zq

    def _sum(self, p: FloatArray, r: IntArray, lo: IntArray, m: IntArray) -> FloatArray:
        return np.asarray(p[r, lo + m] - p[r, lo])

    def at(self, r: IntArray, c: IntArray, m: IntArray) -> tuple[FloatArray, ...]:
        """log tests ratio, its SE, log odds ratio, its SE and whether every day was seen."""
        a, pa = self._sum(self.pt, r, c, m), self._sum(self.pp, r, c, m)
        b1, b2 = self._sum(self.pt, r, c - WEEK, m), self._sum(self.pt, r, c - 2 * WEEK, m)
        pb = self._sum(self.pp, r, c - WEEK, m) + self._sum(self.pp, r, c - 2 * WEEK, m)
        seen = ((self._sum(self.pn, r, c, m) == m) & (self._sum(self.pn, r, c - WEEK, m) == m)
                & (self._sum(self.pn, r, c - 2 * WEEK, m) == m))
        lo = np.maximum(c - DISPERSION_DAYS + 1, 0)
        with np.errstate(divide="ignore", invalid="ignore"):
            phi = (self.sx[r, c + 1] - self.sx[r, lo]) / (self.sc[r, c + 1] - self.sc[r, lo])
            phi = np.where(np.isfinite(phi), np.maximum(phi, 1.0), np.inf)  # none: no flag
            log_r = np.log(2.0 * a / (b1 + b2))
            se = np.sqrt(phi * (1.0 / a + 1.0 / (b1 + b2)))
            na, nb = a - pa, (b1 + b2) - pb
            log_or = (np.log(pa + 0.5) + np.log(nb + 0.5) - np.log(pb + 0.5)
                      - np.log(na + 0.5))
            se_or = np.sqrt(1 / (pa + 0.5) + 1 / (na + 0.5) + 1 / (pb + 0.5) + 1 / (nb + 0.5))
        return log_r, se, log_or, se_or, seen


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
    for name, given, least in (("compare", compare, 1), ("min_days", min_days, 1),
                               ("separation", separation, 1)):
        if isinstance(given, bool) or not isinstance(given, int) or given < least:
            raise ValueError(f"{name}: expected an integer >= {least}, got {given!r}")
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
    w1, w2 = _window(pt, -WEEK, WEEK), _window(pt, -2 * WEEK, WEEK)
    full = (_window(pn, -WEEK, WEEK) == WEEK) & (_window(pn, -2 * WEEK, WEEK) == WEEK)
    with np.errstate(divide="ignore", invalid="ignore"):
        x = np.log(w1 / w2) ** 2 / (1.0 / w1 + 1.0 / w2)
    good = full & (w1 > 0) & (w2 > 0) & np.isfinite(x)
    sx, sc = _sums(np.where(good, x, 0.0)), _sums(good.astype(np.float64))
    cells = _Cells(pt, pp, pn, sx, sc, zq)
    # per length m of the days after a start, the score of every start (columns = starts):
    # a cheap screen on the factors first, the estimates only where it passes
    up, down = float(np.exp(big)), float(np.exp(-big))
    scores = np.full((compare - min_days + 1, rows, n), -np.inf)
    for j, m in enumerate(range(min_days, compare + 1)):
        if n - m + 1 <= 2 * WEEK:
            continue
        sums = pt[:, m:] - pt[:, : n + 1 - m]  # column s: the m days from s
        a, b1, b2 = sums[:, 2 * WEEK :], sums[:, WEEK:-WEEK], sums[:, : -2 * WEEK]  # s >= 14
        high = np.maximum(b1, b2)
        high *= up
        screen = a >= high
        low = np.minimum(b1, b2)
        seen_before = low > 0
        low *= down
        screen |= a <= low
        screen &= seen_before
        screen &= a > 0
        r_i, c_i = np.nonzero(screen)
        c_i = c_i + 2 * WEEK
        if not r_i.size:
            continue
        log_r, se, log_or, _se_or, seen = cells.at(r_i, c_i, np.full(r_i.size, m))
        wider = (log_r - zq * se >= big) & (log_or < 0)
        narrower = (log_r + zq * se <= -big) & (log_or > 0)
        keep = seen & (wider | narrower)
        scores[j, r_i[keep], c_i[keep]] = np.abs(log_r[keep]) / se[keep]
    # best flagged candidate judged on each day t: start t - m + 1 over m
    best = np.full((rows, n), -np.inf)
    best_start = np.full((rows, n), -1, dtype=np.int64)
    for j, m in enumerate(range(min_days, compare + 1)):
        if m > n:  # no start has m days yet
            continue
        on_day = scores[j, :, : n - m + 1]  # start s judged on day s + m - 1
        best_view, start_view = best[:, m - 1 :], best_start[:, m - 1 :]
        better = on_day > best_view
        np.copyto(best_view, on_day, where=better)
        np.copyto(start_view, np.broadcast_to(starts[: n - m + 1], on_day.shape), where=better)
    gone: dict[int, list[tuple[int, int]]] = {}
    for r, day, frm in dismissed:
        gone.setdefault(int(r), []).append((int(day), int(frm)))
    change = np.full((rows, n), -1, dtype=np.int64)
    found = np.full((rows, n), -1, dtype=np.int64)
    cur = np.full(rows, -1, dtype=np.int64)
    cur_found = np.full(rows, -1, dtype=np.int64)
    blocked = np.full(rows, -(10**9), dtype=np.int64)  # start of a dismissed change
    has_any = np.isfinite(best).any(axis=0)
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
    log_r, se, log_or, se_or = (np.full((rows, n), np.nan) for _ in range(4))
    r_i, d_i = np.nonzero(change >= 0)
    if r_i.size:
        c_i = change[r_i, d_i]
        m_i = np.clip(d_i - c_i + 1, min_days, compare)
        est = cells.at(r_i, c_i, m_i)
        for out, value in zip((log_r, se, log_or, se_or), est[:4], strict=True):
            out[r_i, d_i] = value
    return KnownTestingChanges(
        change_day=change, detected_day=found, tests_ratio=np.exp(log_r),
        tests_ratio_lower=np.exp(log_r - zq * se), tests_ratio_upper=np.exp(log_r + zq * se),
        odds_ratio=np.exp(log_or), odds_ratio_lower=np.exp(log_or - zq * se_or),
        odds_ratio_upper=np.exp(log_or + zq * se_or), level=level,
    )
