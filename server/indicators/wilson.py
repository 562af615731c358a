"""Test positivity with Wilson (1927) score intervals, and tests per 100 000.

Positivity over a trailing window is the observed positives over the observed tests; days on which
either series is missing are missing for both. The proportion is not scaled for missing days (the
scale would cancel) and the interval uses the tests actually observed.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike
from scipy import special

from server.indicators._arrays import (
    FloatArray,
    IntArray,
    as_nonnegative_counts,
    as_population,
    check_level,
    check_max_missing,
    check_window,
    freeze_arrays,
    row_chunks,
    windowed_total,
)

__all__ = [
    "Positivity",
    "ProportionInterval",
    "TestingRate",
    "positivity",
    "testing_rate",
    "wilson_interval",
]


@dataclass(frozen=True, eq=False)
class ProportionInterval:
    """Wilson score interval for a binomial proportion.

    Attributes
    ----------
    estimate, lower, upper : ndarray
        ``successes / trials`` and the score bounds; NaN where ``trials == 0``.
    level : float
        Confidence level.
    """

    estimate: FloatArray
    lower: FloatArray
    upper: FloatArray
    level: float

    def __post_init__(self) -> None:
        freeze_arrays(self)


@dataclass(frozen=True, eq=False)
class Positivity:
    """Share of tests that are positive over a trailing window, attached to its last day.

    Attributes
    ----------
    estimate, lower, upper : ndarray, shape (regions, days)
        Positivity (a fraction in [0, 1]) and Wilson bounds; NaN where refused or no tests.
    positives, tests : ndarray, shape (regions, days)
        Observed positives and tests in the window.
    observed : ndarray of int, shape (regions, days)
        Days on which both series are observed.
    window : int
        Window length in days.
    level : float
        Confidence level.
    """

    estimate: FloatArray
    lower: FloatArray
    upper: FloatArray
    positives: FloatArray
    tests: FloatArray
    observed: IntArray
    window: int
    level: float

    def __post_init__(self) -> None:
        freeze_arrays(self)


@dataclass(frozen=True, eq=False)
class TestingRate:
    """Tests per ``per`` inhabitants over a trailing window (a census count: no interval).

    Attributes
    ----------
    estimate : ndarray, shape (regions, days)
        Tests per ``per`` inhabitants, scaled for tolerated missing days; NaN where refused.
    tests : ndarray, shape (regions, days)
        Observed tests in the window (unscaled).
    observed : ndarray of int, shape (regions, days)
        Observed days in the window.
    population : ndarray, shape (regions, 1)
        Denominators.
    window, per : int
        Window length and rate multiplier.
    """

    __test__ = False  # not a pytest test class despite the name

    estimate: FloatArray
    tests: FloatArray
    observed: IntArray
    population: FloatArray
    window: int
    per: int

    def __post_init__(self) -> None:
        freeze_arrays(self)


def _check_pairs(successes: FloatArray, trials: FloatArray, names: tuple[str, str]) -> None:
    if successes.shape != trials.shape:
        raise ValueError(
            f"{names[0]}: shape {successes.shape} does not match {names[1]} shape {trials.shape}"
        )
    with np.errstate(invalid="ignore"):
        over = successes > trials
    if over.any():
        first = tuple(int(i) for i in np.argwhere(over)[0])
        raise ValueError(
            f"{names[0]}: {successes[first]} exceeds {names[1]} {trials[first]} at index {first}"
        )


def _wilson(x: FloatArray, n: FloatArray, level: float) -> tuple[FloatArray, ...]:
    z = float(special.ndtri(0.5 + level / 2.0))
    valid = ~np.isnan(x) & ~np.isnan(n) & (np.nan_to_num(n) > 0)
    nn = np.where(valid, n, 1.0)
    xx = np.where(valid, x, 0.0)
    p = xx / nn
    z2n = z * z / nn
    centre = (p + z2n / 2.0) / (1.0 + z2n)
    half = z / (1.0 + z2n) * np.sqrt(p * (1.0 - p) / nn + z2n / (4.0 * nn))
    lower = np.where(xx == 0, 0.0, np.clip(centre - half, 0.0, 1.0))
    upper = np.where(xx == nn, 1.0, np.clip(centre + half, 0.0, 1.0))
    nan = np.nan
    return np.where(valid, p, nan), np.where(valid, lower, nan), np.where(valid, upper, nan)


def wilson_interval(
    successes: ArrayLike, trials: ArrayLike, level: float = 0.95
) -> ProportionInterval:
    """Wilson (1927) score interval for a binomial proportion.

    Parameters
    ----------
    successes, trials : array_like, same shape
        Counts with ``0 <= successes <= trials``; NaN propagates and ``trials == 0`` gives NaN.
    level : float, default 0.95
        Confidence level.

    Returns
    -------
    ProportionInterval

    Notes
    -----
    With :math:`\\hat p = x/n` and :math:`z = \\Phi^{-1}(1 - \\alpha/2)`,

    .. math:: \\frac{\\hat p + z^2/(2n) \\pm z\\sqrt{\\hat p(1-\\hat p)/n + z^2/(4n^2)}}{1 + z^2/n}.

    The bounds are exactly 0 when x = 0 and exactly 1 when x = n.

    References
    ----------
    .. [1] Wilson, E. B. (1927). Probable inference, the law of succession, and statistical
       inference. J Am Stat Assoc 22:209–212.
    .. [2] Newcombe, R. G. (1998). Two-sided confidence intervals for the single proportion:
       comparison of seven methods. Stat Med 17:857–872 (method 3).
    """
    x = np.asarray(successes, dtype=np.float64)
    n = np.asarray(trials, dtype=np.float64)
    level = check_level("level", level)
    for name, arr in (("successes", x), ("trials", n)):
        if np.any(np.isinf(arr)) or np.any(np.nan_to_num(arr) < 0):
            raise ValueError(f"{name}: counts must be non-negative and finite")
    _check_pairs(x, n, ("successes", "trials"))
    estimate, lower, upper = _wilson(x, n, level)
    return ProportionInterval(estimate, lower, upper, level)


def positivity(
    positives: ArrayLike,
    tests: ArrayLike,
    window: int = 7,
    *,
    level: float = 0.95,
    max_missing: int = 0,
) -> Positivity:
    """Test positivity over a trailing window with Wilson score bounds.

    Parameters
    ----------
    positives, tests : array_like, shape (regions, days) or (days,)
        Daily positive tests and tests performed; NaN marks a missing day. A day missing in either
        series is missing in both.
    window : int, default 7
        Window length in days.
    level : float, default 0.95
        Confidence level.
    max_missing : int, default 0
        Windows with more missing days are NaN.

    Returns
    -------
    Positivity

    Notes
    -----
    :math:`\\hat p_t = \\sum_{s \\in O_t} x_s / \\sum_{s \\in O_t} n_s` over the observed days
    :math:`O_t` of the window ending on day t, with the Wilson interval of
    :func:`wilson_interval` on those sums.

    References
    ----------
    .. [1] Wilson, E. B. (1927). J Am Stat Assoc 22:209–212.
    """
    pos = as_nonnegative_counts("positives", positives)
    tst = as_nonnegative_counts("tests", tests)
    _check_pairs(pos, tst, ("positives", "tests"))
    window = check_window("window", window)
    level = check_level("level", level)
    max_missing = check_max_missing(max_missing, window)
    outputs = [np.empty(pos.shape) for _ in range(5)]
    observed = np.empty(pos.shape, dtype=np.int64)
    for rows in row_chunks(pos.shape[0], pos.shape[1]):  # blocks of regions stay in cache
        p_rows, t_rows = pos[rows], tst[rows]
        missing = np.isnan(p_rows) | np.isnan(t_rows)
        x, _, observed[rows] = windowed_total(
            np.where(missing, np.nan, p_rows), window, max_missing
        )
        n, _, _ = windowed_total(np.where(missing, np.nan, t_rows), window, max_missing)
        for target, values in zip(outputs, (*_wilson(x, n, level), x, n), strict=True):
            target[rows] = values
    estimate, lower, upper, x_all, n_all = outputs
    return Positivity(estimate, lower, upper, x_all, n_all, observed, window, level)


def testing_rate(
    tests: ArrayLike,
    population: ArrayLike,
    window: int = 7,
    *,
    per: int = 100_000,
    max_missing: int = 0,
) -> TestingRate:
    """Tests per ``per`` inhabitants over a trailing window.

    Parameters
    ----------
    tests : array_like, shape (regions, days) or (days,)
        Daily tests performed; NaN marks a missing day.
    population : array_like, shape (regions,) or scalar
        Population of each region.
    window : int, default 7
        Window length in days.
    per : int, default 100 000
        Rate multiplier.
    max_missing : int, default 0
        Windows with more missing days are NaN; with fewer, the sum is scaled by ``w / n_obs``.

    Returns
    -------
    TestingRate

    Notes
    -----
    :math:`T_t = \\frac{w}{n_t} \\sum_{s \\in O_t} n_s \\cdot \\text{per} / N`.

    References
    ----------
    .. [1] Council Recommendation (EU) 2020/1475 (13 Oct 2020): testing rate per 100 000 over
       the last week.
    """
    tst = as_nonnegative_counts("tests", tests)
    pop = as_population("population", population, tst.shape[0])
    window = check_window("window", window)
    max_missing = check_max_missing(max_missing, window)
    if isinstance(per, bool) or not isinstance(per, (int, np.integer)) or per <= 0:
        raise ValueError(f"per: must be a positive integer, got {per!r}")
    total, factor, observed = windowed_total(tst, window, max_missing)
    return TestingRate(total * factor * per / pop, total, observed, pop, window, int(per))
