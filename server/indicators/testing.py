"""Changes in testing that move case counts on their own: level shifts in tests and positivity.

Wider testing raises reported cases while the share of positive tests falls; narrower testing
does the opposite. Per region, breaks in the daily number of tests are found by the same
screening as transmission breaks (binary segmentation of weighted lines on weekday-adjusted log
counts, quasi-likelihood BIC; :func:`server.indicators.changepoints.binary_segmentation`), and
at each break tests and positivity over the days just before are compared with the days just
after. A break is flagged as a testing change when tests move by at least a set factor, both
changes are significant, and positivity moves the other way. That signature is common practice
with no single source.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import special

from server.indicators._arrays import (
    FloatArray,
    IntArray,
    as_nonnegative_counts,
    as_population,
    check_level,
    check_positive,
    freeze_arrays,
)
from server.indicators._segmentation import (
    WEEK,
    binary_segmentation,
    centred_mean,
    check_int,
    weekday_factors,
)

BoolArray = NDArray[np.bool_]

__all__ = ["TestingChanges", "detect_testing_changes"]


@dataclass(frozen=True, eq=False)
class TestingChanges:
    """Breaks in testing per region; arrays shaped (regions, max_breaks), filled from the left
    (-1 or NaN after the region's last break).

    Attributes
    ----------
    n_breaks : ndarray of int, shape (regions,)
    day : ndarray of int
        First day of the new level.
    tests_before, tests_after : ndarray
        Tests per 100 000 per day over the ``compare`` days before and from the break.
    tests_ratio, tests_ratio_lower, tests_ratio_upper : ndarray
        After / before, with its interval (quasi-Poisson).
    positivity_before, positivity_after : ndarray
        Positives / tests over the same days.
    positivity_odds_ratio, positivity_odds_lower, positivity_odds_upper : ndarray
        Odds of a positive test after / before, with its interval (Woolf, quasi-binomial).
    flagged : ndarray of bool
        A testing change: tests moved by at least ``min_ratio`` (either way) with an interval
        excluding 1, and the odds of positivity moved significantly the other way.
    level : float
    """

    __test__ = False  # not a pytest class despite its name

    n_breaks: IntArray
    day: IntArray
    tests_before: FloatArray
    tests_after: FloatArray
    tests_ratio: FloatArray
    tests_ratio_lower: FloatArray
    tests_ratio_upper: FloatArray
    positivity_before: FloatArray
    positivity_after: FloatArray
    positivity_odds_ratio: FloatArray
    positivity_odds_lower: FloatArray
    positivity_odds_upper: FloatArray
    flagged: BoolArray
    level: float

    def __post_init__(self) -> None:
        freeze_arrays(self)

    def flagged_days(self, region: int) -> list[int]:
        """Days of the flagged testing changes of one region."""
        return [int(d) for d in self.day[region][self.flagged[region]]]


def _window_sum(values: FloatArray, ok: BoolArray, lo: IntArray, hi: IntArray) -> FloatArray:
    p = np.zeros((values.shape[0], values.shape[1] + 1))
    np.cumsum(np.where(ok, values, 0.0), axis=1, out=p[:, 1:])
    return np.asarray(np.take_along_axis(p, hi, axis=1) - np.take_along_axis(p, lo, axis=1))


def detect_testing_changes(
    tests: ArrayLike,
    positives: ArrayLike,
    *,
    population: ArrayLike,
    min_segment: int = 14,
    max_breaks: int | None = None,
    penalty: float = 1.0,
    compare: int = 7,
    min_ratio: float = 1.2,
    level: float = 0.95,
) -> TestingChanges:
    """Find level shifts in testing and flag those that look like a change of testing policy.

    Parameters
    ----------
    tests, positives : array_like, shape (regions, days)
        Daily tests and positive tests (NaN for a missing day); positives <= tests.
    population : array_like, shape (regions,)
        Population for tests per 100 000.
    min_segment, max_breaks, penalty
        As in :func:`server.indicators.changepoints.screen_breaks`, applied to tests.
    compare : int
        Days on each side of a break compared (default 7, a whole week: weekday effects
        cancel).
    min_ratio : float
        Smallest factor of tests (after/before, or before/after) flagged (default 1.2).
    level : float
        Interval level.

    Returns
    -------
    TestingChanges

    Notes
    -----
    With :math:`T_-, T_+` the tests and :math:`P_-, P_+` the positives over the ``compare``
    observed days before and from a break,
    :math:`\\log(T_+/T_-) \\pm z \\sqrt{\\phi_T (1/T_- + 1/T_+)}` (quasi-Poisson, with the
    dispersion of the tests about their screening lines) and the log odds ratio of positivity
    :math:`\\log \\frac{P_+ (T_- - P_-)}{P_- (T_+ - P_+)} \\pm z \\sqrt{\\phi_P \\sum 1/n}`
    (Woolf 1955; the four cells; :math:`\\phi_P = 1`). A testing change is flagged when
    :math:`T_+/T_- \\ge` ``min_ratio`` with lower bound above 1 and the odds ratio's upper
    bound below 1, or the mirror image (common practice, no single source).

    References
    ----------
    .. [1] Woolf B (1955). On estimating the relation between blood group and disease. Ann Hum
       Genet 19:251-253.
    .. [2] Council Recommendation (EU) 2021/119: testing rate per 100 000 as part of the
       combined indicator (why testing intensity is watched beside cases).
    """
    t = as_nonnegative_counts("tests", tests)
    pos = as_nonnegative_counts("positives", positives)
    if pos.shape != t.shape:
        raise ValueError(f"positives: shape {pos.shape} differs from tests {t.shape}")
    with np.errstate(invalid="ignore"):
        over = pos > t
    if over.any():
        first = tuple(int(i) for i in np.argwhere(over)[0])
        raise ValueError(f"positives: {pos[first]} exceeds tests {t[first]} at index {first}")
    rows, n = t.shape
    pop = as_population("population", population, rows)[:, 0]
    min_segment = check_int("min_segment", min_segment, 7)
    compare = check_int("compare", compare, 1)
    level = check_level("level", level)
    min_ratio = check_positive("min_ratio", min_ratio)
    if n < 2 * min_segment:
        raise ValueError(f"tests: {n} days is fewer than 2 * min_segment = {2 * min_segment}")
    limit = n // min_segment - 1
    kmax = min(10, limit) if max_breaks is None else min(check_int("max_breaks", max_breaks, 0),
                                                         limit)
    ok = np.isfinite(t) & np.isfinite(pos)
    smooth = centred_mean(t, ok, 3)
    f = weekday_factors(t, ok, smooth)
    adjusted = np.where(ok, t, 0.0) / f[:, np.arange(n) % WEEK]
    z = np.where(ok, np.log(adjusted + 0.5), 0.0)
    w = np.where(ok, np.nan_to_num(smooth, nan=0.0) + 0.5, 0.0)
    scr = binary_segmentation(z, w, min_segment=min_segment, max_breaks=kmax,
                              penalty=check_positive("penalty", penalty), slope=True,
                              extra_params=WEEK - 1)
    day = scr.breaks
    has = day >= 0
    tau = np.where(has, day, 0)
    lo = np.clip(tau - compare, 0, n)
    hi = np.clip(tau + compare, 0, n)
    t_minus = _window_sum(t, ok, lo, tau)
    t_plus = _window_sum(t, ok, tau, hi)
    p_minus = _window_sum(pos, ok, lo, tau)
    p_plus = _window_sum(pos, ok, tau, hi)
    d_minus = _window_sum(np.ones_like(t), ok, lo, tau)
    d_plus = _window_sum(np.ones_like(t), ok, tau, hi)
    zq = float(special.ndtri(0.5 + level / 2.0))
    phi_t = np.maximum(scr.dispersion, 1.0)[:, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        log_ratio = np.log(t_plus / d_plus) - np.log(t_minus / d_minus)
        se_ratio = np.sqrt(phi_t * (1.0 / t_minus + 1.0 / t_plus))
        n_minus, n_plus = t_minus - p_minus, t_plus - p_plus
        log_or = np.log(p_plus + 0.5) + np.log(n_minus + 0.5) - np.log(p_minus + 0.5) \
            - np.log(n_plus + 0.5)
        se_or = np.sqrt(1 / (p_plus + 0.5) + 1 / (n_minus + 0.5) + 1 / (p_minus + 0.5)
                        + 1 / (n_plus + 0.5))
        per = 1e5 / pop[:, None]
        before = t_minus / d_minus * per
        after = t_plus / d_plus * per
        pos_before = p_minus / t_minus
        pos_after = p_plus / t_plus
    r_lo, r_hi = log_ratio - zq * se_ratio, log_ratio + zq * se_ratio
    o_lo, o_hi = log_or - zq * se_or, log_or + zq * se_or
    big = np.log(min_ratio)
    wider = (log_ratio >= big) & (r_lo > 0) & (o_hi < 0)
    narrower = (log_ratio <= -big) & (r_hi < 0) & (o_lo > 0)
    valid = has & (d_minus > 0) & (d_plus > 0)
    nan = np.where(valid, 0.0, np.nan)
    return TestingChanges(
        n_breaks=has.sum(axis=1).astype(np.int64), day=np.where(has, day, -1),
        tests_before=before + nan, tests_after=after + nan,
        tests_ratio=np.exp(log_ratio) + nan, tests_ratio_lower=np.exp(r_lo) + nan,
        tests_ratio_upper=np.exp(r_hi) + nan,
        positivity_before=pos_before + nan, positivity_after=pos_after + nan,
        positivity_odds_ratio=np.exp(log_or) + nan, positivity_odds_lower=np.exp(o_lo) + nan,
        positivity_odds_upper=np.exp(o_hi) + nan,
        flagged=valid & (wider | narrower), level=level,
    )
