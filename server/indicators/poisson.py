"""Incidence per 100 000 with exact (Garwood) Poisson intervals, and the window-over-window ratio.

The exact interval for a Poisson count x is read from chi-square (equivalently gamma) quantiles;
the ratio of two windows uses the exact conditional binomial (Clopper–Pearson) interval on
``x1 / (x1 + x2)``, transformed to the rate ratio. Missing days follow the rule of
:mod:`server.indicators.windows`: refused past ``max_missing``, otherwise the estimate is scaled up
and the interval of the *observed* count is scaled by the same factor.
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
    windowed_total,
)

__all__ = [
    "IncidenceRate",
    "PoissonInterval",
    "RateRatio",
    "incidence_rate",
    "poisson_interval",
    "rate_ratio",
]


@dataclass(frozen=True, eq=False)
class PoissonInterval:
    """Exact interval for the mean of a Poisson count.

    Attributes
    ----------
    estimate, lower, upper : ndarray
        The count itself and the exact bounds, same shape as the input counts.
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
class IncidenceRate:
    """Events per ``per`` inhabitants over a trailing window, attached to its last day.

    Attributes
    ----------
    estimate, lower, upper : ndarray, shape (regions, days)
        Rate and exact bounds; NaN where the window is refused.
    count : ndarray, shape (regions, days)
        Observed events in the window (unscaled).
    observed : ndarray of int, shape (regions, days)
        Observed days in the window.
    population : ndarray, shape (regions, 1)
        Denominators.
    window, per : int
        Window length in days and the rate multiplier (100 000 by default).
    level : float
        Confidence level.
    """

    estimate: FloatArray
    lower: FloatArray
    upper: FloatArray
    count: FloatArray
    observed: IntArray
    population: FloatArray
    window: int
    per: int
    level: float

    def __post_init__(self) -> None:
        freeze_arrays(self)


@dataclass(frozen=True, eq=False)
class RateRatio:
    """Ratio of the event rate in the current window to the window ``lag`` days earlier.

    Attributes
    ----------
    estimate, lower, upper : ndarray, shape (regions, days)
        Rate ratio and exact conditional bounds. NaN when both windows are empty or refused;
        ``inf`` for the estimate and upper bound when the earlier window has no events.
    current, previous : ndarray, shape (regions, days)
        Observed events in the current and earlier window.
    window, lag : int
        Window length and the distance in days between the two windows' last days.
    level : float
        Confidence level.
    """

    estimate: FloatArray
    lower: FloatArray
    upper: FloatArray
    current: FloatArray
    previous: FloatArray
    window: int
    lag: int
    level: float

    def __post_init__(self) -> None:
        freeze_arrays(self)


def _as_integer_counts(name: str, counts: ArrayLike) -> FloatArray:
    arr = np.asarray(counts, dtype=np.float64)
    finite = arr[~np.isnan(arr)]
    if np.any(np.isinf(finite)) or np.any(finite < 0) or np.any(finite != np.round(finite)):
        bad = finite[(finite < 0) | (finite != np.round(finite)) | np.isinf(finite)][0]
        raise ValueError(f"{name}: counts must be non-negative integers, got {bad}")
    return arr


def _garwood(counts: FloatArray, level: float) -> tuple[FloatArray, FloatArray]:
    """Garwood bounds for integer-valued float counts (NaN propagates).

    The quantile functions are evaluated once per distinct count (a table over the observed
    range of integers, or the unique values), then looked up: the same numbers, far fewer calls.
    """
    alpha = 1.0 - level
    lower = np.full(counts.shape, np.nan)
    upper = np.full(counts.shape, np.nan)
    finite = ~np.isnan(counts)
    x = counts[finite]
    if x.size == 0:
        return lower, upper
    low, high = float(x.min()), float(x.max())
    if np.all(x == np.round(x)) and high - low < 4 * x.size:
        table = np.arange(low, high + 1.0)
        index = (x - low).astype(np.int64)
    else:
        table, index = np.unique(x, return_inverse=True)
    positive = table > 0
    lo = np.where(positive, special.gammaincinv(np.where(positive, table, 1.0), alpha / 2.0), 0.0)
    lower[finite] = lo[index]
    upper[finite] = special.gammaincinv(table + 1.0, 1.0 - alpha / 2.0)[index]
    return lower, upper


def poisson_interval(counts: ArrayLike, level: float = 0.95) -> PoissonInterval:
    """Exact (Garwood 1936) confidence interval for a Poisson mean.

    Parameters
    ----------
    counts : array_like of non-negative integers, any shape
        Observed counts; NaN propagates.
    level : float, default 0.95
        Confidence level.

    Returns
    -------
    PoissonInterval

    Notes
    -----
    With :math:`\\alpha = 1 - \\text{level}`,

    .. math:: L = \\tfrac12 \\chi^2_{\\alpha/2}(2x) = G^{-1}_{x}(\\alpha/2), \\qquad
              U = \\tfrac12 \\chi^2_{1-\\alpha/2}(2x+2) = G^{-1}_{x+1}(1-\\alpha/2),

    where :math:`G^{-1}_a` is the quantile of the unit-scale gamma distribution of shape a, and
    L = 0 when x = 0. Computed with :func:`scipy.special.gammaincinv`.

    References
    ----------
    .. [1] Garwood, F. (1936). Fiducial limits for the Poisson distribution. Biometrika 28:437–442.
    .. [2] Ulm, K. (1990). A simple method to calculate the confidence interval of a standardized
       mortality ratio. Am J Epidemiol 131:373–375.
    """
    arr = _as_integer_counts("counts", counts)
    level = check_level("level", level)
    lower, upper = _garwood(arr, level)
    return PoissonInterval(arr.copy(), lower, upper, level)


def _check_per(per: int) -> int:
    if isinstance(per, bool) or not isinstance(per, (int, np.integer)) or per <= 0:
        raise ValueError(f"per: must be a positive integer, got {per!r}")
    return int(per)


def incidence_rate(
    counts: ArrayLike,
    population: ArrayLike,
    window: int = 7,
    *,
    per: int = 100_000,
    level: float = 0.95,
    max_missing: int = 0,
) -> IncidenceRate:
    """Incidence per ``per`` inhabitants over a trailing window, with exact Poisson bounds.

    Parameters
    ----------
    counts : array_like, shape (regions, days) or (days,)
        Daily event counts (non-negative integers); NaN marks a missing day.
    population : array_like, shape (regions,) or scalar
        Population of each region.
    window : int, default 7
        Window length in days (7 and 14 are the usual choices).
    per : int, default 100 000
        Rate multiplier.
    level : float, default 0.95
        Confidence level.
    max_missing : int, default 0
        Windows with more missing days are NaN; with fewer, the rate is scaled by ``w / n_obs``.

    Returns
    -------
    IncidenceRate

    Notes
    -----
    With x the observed count over the window, :math:`n` observed days, f = w / n and N the
    population,

    .. math:: \\hat\\lambda = \\frac{f\\,x}{N}\\,\\text{per}, \\qquad
              [L, U] = \\frac{f\\,\\text{per}}{N}\\,[L_G(x), U_G(x)],

    with :math:`L_G, U_G` the Garwood bounds of :func:`poisson_interval`. Scaling the bounds keeps
    the width that the *observed* number of events supports.

    References
    ----------
    .. [1] Garwood, F. (1936). Fiducial limits for the Poisson distribution. Biometrika 28:437–442.
    """
    arr = as_nonnegative_counts("counts", counts)
    pop = as_population("population", population, arr.shape[0])
    window = check_window("window", window)
    per = _check_per(per)
    level = check_level("level", level)
    max_missing = check_max_missing(max_missing, window)
    _as_integer_counts("counts", arr)
    total, factor, observed = windowed_total(arr, window, max_missing)
    lower, upper = _garwood(total, level)
    scale = factor * per / pop
    return IncidenceRate(
        estimate=total * scale,
        lower=lower * scale,
        upper=upper * scale,
        count=total,
        observed=observed,
        population=pop,
        window=window,
        per=per,
        level=level,
    )


def rate_ratio(
    counts: ArrayLike,
    window: int = 7,
    *,
    lag: int | None = None,
    level: float = 0.95,
    max_missing: int = 0,
) -> RateRatio:
    """Window-over-window rate ratio (e.g. week over week) with the exact conditional interval.

    Parameters
    ----------
    counts : array_like, shape (regions, days) or (days,)
        Daily event counts (non-negative integers); NaN marks a missing day.
    window : int, default 7
        Window length in days.
    lag : int, optional
        Days between the last days of the two windows; defaults to ``window`` (adjacent windows).
    level : float, default 0.95
        Confidence level.
    max_missing : int, default 0
        Most missing days tolerated in each window; exposures are the observed days.

    Returns
    -------
    RateRatio

    Notes
    -----
    Given :math:`x_1 + x_2 = n`, :math:`x_1 \\sim \\text{Bin}(n, \\pi)` with
    :math:`\\pi = \\rho e_1 / (\\rho e_1 + e_2)`, where :math:`e_1, e_2` are the observed days and
    :math:`\\rho` the rate ratio. The Clopper–Pearson bounds on :math:`\\pi`,

    .. math:: \\pi_L = B^{-1}(\\alpha/2; x_1, x_2 + 1), \\qquad
              \\pi_U = B^{-1}(1 - \\alpha/2; x_1 + 1, x_2),

    map to :math:`\\rho = \\frac{\\pi}{1 - \\pi}\\,\\frac{e_2}{e_1}`; the estimate is
    :math:`(x_1/e_1)/(x_2/e_2)`.

    References
    ----------
    .. [1] Clopper, C. J., Pearson, E. S. (1934). The use of confidence or fiducial limits
       illustrated in the case of the binomial. Biometrika 26:404–413.
    .. [2] Breslow, N. E., Day, N. E. (1987). Statistical Methods in Cancer Research, Vol. II,
       IARC, section 2.2 (conditional inference on a ratio of Poisson rates).
    """
    arr = as_nonnegative_counts("counts", counts)
    window = check_window("window", window)
    lag = window if lag is None else check_window("lag", lag)
    level = check_level("level", level)
    max_missing = check_max_missing(max_missing, window)
    _as_integer_counts("counts", arr)
    total, _, observed = windowed_total(arr, window, max_missing)
    regions, days = arr.shape
    previous = np.full((regions, days), np.nan)
    prev_observed = np.zeros((regions, days), dtype=np.int64)
    if lag < days:
        previous[:, lag:] = total[:, :-lag]
        prev_observed[:, lag:] = observed[:, :-lag]
    return _ratio_from_totals(total, previous, observed, prev_observed, window, lag, level)


def _ratio_from_totals(
    x1: FloatArray,
    x2: FloatArray,
    e1: IntArray,
    e2: IntArray,
    window: int,
    lag: int,
    level: float,
) -> RateRatio:
    alpha = 1.0 - level
    n = x1 + x2
    valid = ~np.isnan(n) & (n > 0)
    a1 = np.where(valid, x1, 1.0)
    a2 = np.where(valid, x2, 1.0)
    p_lo = np.where(a1 > 0, special.betaincinv(np.maximum(a1, 1.0), a2 + 1.0, alpha / 2.0), 0.0)
    p_hi = np.where(a2 > 0, special.betaincinv(a1 + 1.0, np.maximum(a2, 1.0), 1 - alpha / 2), 1.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        exposure = np.where(valid, e2 / np.maximum(e1, 1), np.nan)
        odds_lo = np.where(p_lo < 1.0, p_lo / (1.0 - p_lo), np.inf)
        odds_hi = np.where(p_hi < 1.0, p_hi / (1.0 - p_hi), np.inf)
        odds = np.where(a2 > 0, a1 / np.maximum(a2, 1.0), np.inf)
    estimate = np.where(valid, odds * exposure, np.nan)
    lower = np.where(valid, odds_lo * exposure, np.nan)
    upper = np.where(valid, odds_hi * exposure, np.nan)
    return RateRatio(estimate, lower, upper, x1, x2, window, lag, level)
