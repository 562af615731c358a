"""Change points in a continuous signal: piecewise log-linear kinks on log values, Gaussian errors.

Wastewater concentrations are not counts: a sample's log concentration scatters around the
log of the shed load with a roughly constant variance (measurement, dilution and handling
noise act multiplicatively), and samples come on two or three days a week. The model for
each plant (or region) is

    log c_t = a + b s_t + sum_k d_k h_k(t) + e_t,    e_t ~ N(0, sigma^2) independent,

on the sampled days only, with ``s_t = (t - (n - 1)/2) / n`` and hinges
``h_k(t) = (t - tau_k)_+ / n``: the same continuous piecewise log-linear shape as the kink
model of :mod:`server.indicators.changepoints` (growth changes at a kink, the level does not
jump), fitted by ordinary least squares instead of a Poisson likelihood and without weekday
effects (a plant samples on fixed weekdays, so a weekday effect would be confounded with its
schedule). Growth ``b + sum_{k <= j} d_k`` per ``n`` days is the growth rate of the load,
hence of infections, once the shedding delay has passed.

Breaks: forward selection of hinges (every candidate day scored at once through the
partitioned regression of :class:`server.indicators._segmentation.KinkScanner`), the number
chosen by the Gaussian BIC ``n log(RSS_k / n) + penalty * (2 k + 3) log n`` (a slope change and
a date per kink; level, slope and variance), each kink then moved to its best day with the
others fixed, kinks whose change of R is below ``min_change`` dropped (the smallest first).
The interval of a kink date is the set of days whose profile likelihood-ratio statistic
``n log(RSS(tau) / RSS(tau_hat))`` is within the chi-square(1) quantile (connected run).

No database, web or clock here.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike
from scipy import stats

from server.indicators._arrays import (
    FloatArray,
    IntArray,
    check_level,
    check_positive,
    freeze_arrays,
)
from server.indicators._segmentation import (
    KinkScanner,
    check_int,
    forward_kinks,
    kink_allowed,
    line_design,
    refine_kinks,
    sort_kinks,
)
from server.indicators.kinkfit import _normalise_days
from server.indicators.serial_interval import growth_to_reproduction

__all__ = ["LevelBreaks", "LevelKinkFit", "detect_level_breaks", "fit_level_kinks"]


@dataclass(frozen=True, eq=False)
class LevelKinkFit:
    """Least-squares fit of the kink model on log values for given kinks.

    Attributes
    ----------
    kinks : ndarray of int, shape (regions, K)
        Sorted kink days, -1 after the last (zero column, coefficient 0).
    coef : ndarray, shape (regions, 2 + K)
        ``(a, b, d_1..d_K)`` of :func:`server.indicators._segmentation.line_design`.
    covariance : ndarray, shape (regions, 2 + K, 2 + K)
        ``sigma2 (X' X)^{-1}`` over the observed days (zero rows and columns for -1 kinks).
    sigma2 : ndarray, shape (regions,)
        ``RSS / (n_obs - p)``, p the live columns.
    rss : ndarray, shape (regions,)
    n_obs : ndarray of int, shape (regions,)
    df : ndarray of int, shape (regions,)
        Residual degrees of freedom ``n_obs - p``.
    """

    kinks: IntArray
    coef: FloatArray
    covariance: FloatArray
    sigma2: FloatArray
    rss: FloatArray
    n_obs: IntArray
    df: IntArray

    def __post_init__(self) -> None:
        freeze_arrays(self)


@dataclass(frozen=True, eq=False)
class LevelBreaks:
    """Kinks of a log-level signal and the growth of each segment between them.

    Arrays over breaks have shape (regions, max_breaks), over segments (regions,
    max_breaks + 1), filled from the left (-1 or NaN after the last), as in
    :class:`server.indicators.changepoints.ChangePoints`.
    """

    n_breaks: IntArray
    breaks: IntArray
    break_lower: IntArray
    break_upper: IntArray
    growth_change: FloatArray
    growth_change_lower: FloatArray
    growth_change_upper: FloatArray
    growth: FloatArray
    growth_lower: FloatArray
    growth_upper: FloatArray
    reproduction: FloatArray
    reproduction_lower: FloatArray
    reproduction_upper: FloatArray
    fit: LevelKinkFit
    level: float

    def __post_init__(self) -> None:
        freeze_arrays(self)


def _log_values(values: ArrayLike) -> tuple[FloatArray, FloatArray]:
    """Log of positive values (NaN and non-positive: missing) and the 0/1 weights."""
    v = np.asarray(values, dtype=np.float64)
    if v.ndim == 1:
        v = v[None, :]
    if v.ndim != 2:
        raise ValueError(f"values: expected shape (regions, days), got {v.shape}")
    if np.any(np.isinf(v)):
        raise ValueError("values: infinite value")
    with np.errstate(divide="ignore", invalid="ignore"):
        obs = np.isfinite(v) & (v > 0)
        z = np.where(obs, np.log(np.where(obs, v, 1.0)), 0.0)
    return z, obs.astype(np.float64)


def _days(kinks: ArrayLike, rows: int, n: int) -> IntArray:
    k = _normalise_days("kinks", kinks, rows, n)
    k = sort_kinks(k)
    if k.shape[1] > 1 and np.any((np.diff(k, axis=1) == 0) & (k[:, 1:] >= 0)):
        raise ValueError("kinks: a day appears twice in one region")
    return k


def _ols(z: FloatArray, w: FloatArray, kinks: IntArray) -> LevelKinkFit:
    rows, n = z.shape
    x = line_design(n, kinks)
    xw = x * w[..., None]
    a = np.matmul(xw.transpose(0, 2, 1), x)
    live = np.einsum("rpp->rp", a) > 0
    rr, cc = np.nonzero(~live)
    a[rr, cc, cc] = 1.0
    n_obs = w.sum(axis=1).astype(np.int64)
    df = n_obs - live.sum(axis=1)
    ok = df > 0
    try:
        ainv = np.linalg.inv(a)
    except np.linalg.LinAlgError:
        ainv = np.linalg.pinv(a, hermitian=True)
    ainv = np.where(live[:, :, None] & live[:, None, :], ainv, 0.0)
    beta = np.einsum("rpq,rq->rp", ainv, np.einsum("rnp,rn->rp", xw, z))
    e = z - np.einsum("rnp,rp->rn", x, beta)
    rss = (w * e * e).sum(axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        sigma2 = np.where(ok, rss / np.maximum(df, 1), np.nan)
    beta = np.where(ok[:, None], beta, np.nan)
    return LevelKinkFit(kinks=kinks, coef=beta, covariance=ainv * sigma2[:, None, None],
                        sigma2=sigma2, rss=rss, n_obs=n_obs, df=df)


def fit_level_kinks(values: ArrayLike, kinks: ArrayLike) -> LevelKinkFit:
    """Fit ``log values`` on a line with kinks by ordinary least squares (all regions at once).

    Parameters
    ----------
    values : array_like, shape (regions, days)
        Positive values (concentrations); NaN, 0 or negative: no sample that day.
    kinks : array_like of int, shape (regions, k) or (k,)
        Kink days (1 .. days - 1), -1 for none; any order.

    Returns
    -------
    LevelKinkFit

    Notes
    -----
    :math:`\\hat\\beta = (X'X)^{-1} X'z` over the sampled days, :math:`\\hat\\sigma^2 =
    RSS/(n - p)`, covariance :math:`\\hat\\sigma^2 (X'X)^{-1}` (the textbook linear model,
    e.g. Seber & Lee 2003, ch. 3), with :math:`X` the design of
    :func:`server.indicators._segmentation.line_design`.
    """
    z, w = _log_values(values)
    rows, n = z.shape
    return _ols(z, w, _days(kinks, rows, n))


def _segment_growth(fit: LevelKinkFit, n: int) -> tuple[FloatArray, FloatArray]:
    """Growth per day of every segment and its standard error: shape (regions, K + 1)."""
    rows, kmax = fit.kinks.shape
    segs = kmax + 1
    grad = np.zeros((rows, segs, 2 + kmax))
    grad[:, :, 1] = 1.0 / n
    for j in range(1, segs):
        grad[:, j, 2 : 2 + j] = 1.0 / n
    coef = np.nan_to_num(fit.coef)
    growth = np.einsum("rsp,rp->rs", grad, coef)
    with np.errstate(invalid="ignore"):
        se = np.sqrt(np.einsum("rsp,rpq,rsq->rs", grad, fit.covariance, grad))
    return growth, se


def _drop_small(z: FloatArray, w: FloatArray, fit: LevelKinkFit, small_log: float,
                si_mean: float, si_sd: float) -> LevelKinkFit:
    """Backward elimination by size of the change of R, as the counts' kink model does."""
    if small_log <= 0:
        return fit
    n = z.shape[1]
    for _ in range(fit.kinks.shape[1]):
        growth, _ = _segment_growth(fit, n)
        with np.errstate(divide="ignore", invalid="ignore"):
            log_r = np.log(growth_to_reproduction(growth, si_mean, si_sd))
            step = np.abs(np.diff(log_r, axis=1))
        step = np.where(np.isfinite(step), step, np.inf)
        effect = np.where(fit.kinks >= 0, step, np.inf)
        least = np.argmin(effect, axis=1)
        rows = np.flatnonzero(effect[np.arange(effect.shape[0]), least] < small_log)
        if rows.size == 0:
            break
        kinks = np.array(fit.kinks, copy=True)
        kinks[rows, least[rows]] = -1
        fit = _ols(z, w, sort_kinks(kinks))
    return fit


def detect_level_breaks(
    values: ArrayLike,
    *,
    min_segment: int = 14,
    max_breaks: int | None = None,
    penalty: float = 1.0,
    level: float = 0.95,
    si_mean: float = 4.7,
    si_sd: float = 2.9,
    min_change: float = 0.1,
) -> LevelBreaks:
    """Find kinks in the growth of a positive continuous signal (wastewater concentration).

    Parameters
    ----------
    values : array_like, shape (regions, days)
        Positive values on sampled days; NaN (or <= 0) on days without a sample.
    min_segment : int
        Fewest days between kinks and from either end (at least 7).
    max_breaks : int, optional
        Most kinks searched (default ``min(10, days // min_segment - 1)``).
    penalty : float
        Multiplier of the BIC penalty (1: plain BIC).
    level : float
        Level of every interval.
    si_mean, si_sd : float
        Gamma generation interval for R (Wallinga & Lipsitch 2007), as for cases.
    min_change : float
        Smallest relative change of R reported (default 0.1, the counts' kink model's).

    Returns
    -------
    LevelBreaks

    Notes
    -----
    See the module docstring for the model. Intervals of growth rates and their changes are
    :math:`\\pm t_{n-p} \\, se` conditional on the kink dates. Values below a detection
    limit reported as a substitute (half the limit) enter as they are.

    References
    ----------
    .. [1] Friedman JH (1991). Multivariate adaptive regression splines. Ann Stat 19:1-67.
    .. [2] Schwarz G (1978). Estimating the dimension of a model. Ann Stat 6:461-464.
    .. [3] Wallinga J, Lipsitch M (2007). How generation intervals shape the relationship
       between growth rates and reproductive numbers. Proc R Soc B 274:599-604.
    """
    z, w = _log_values(values)
    rows, n = z.shape
    min_segment = check_int("min_segment", min_segment, 7)
    level = check_level("level", level)
    check_positive("penalty", penalty)
    check_positive("si_mean", si_mean)
    check_positive("si_sd", si_sd)
    min_change = float(min_change)
    if not np.isfinite(min_change) or min_change < 0:
        raise ValueError(f"min_change: must be a finite number >= 0, got {min_change!r}")
    if max_breaks is None:
        max_breaks = max(0, min(10, n // min_segment - 1))
    max_breaks = check_int("max_breaks", max_breaks, 0)
    every = np.arange(rows)
    scanner = KinkScanner(z, w)
    _, rss, path = forward_kinks(scanner, rows, n, min_segment, max_breaks)
    n_obs = w.sum(axis=1)
    ks = np.arange(max_breaks + 1)
    with np.errstate(divide="ignore", invalid="ignore"):
        crit = (n_obs[:, None] * np.log(np.maximum(rss, 1e-300) / n_obs[:, None])
                + penalty * (2 * ks + 3)[None, :] * np.log(np.maximum(n_obs, 2))[:, None])
    crit = np.where(np.isfinite(rss) & (n_obs[:, None] > 2 * ks[None, :] + 3), crit, np.inf)
    chosen_k = np.argmin(crit, axis=1)
    chosen = refine_kinks(scanner, sort_kinks(path[every, chosen_k]), min_segment)
    fit = _drop_small(z, w, _ols(z, w, chosen), float(np.log1p(min_change)), si_mean, si_sd)
    has = fit.kinks >= 0
    # profile intervals of each date
    crit1 = float(stats.chi2.ppf(level, 1))
    lower = np.where(has, fit.kinks, -1)
    upper = lower.copy()
    day = np.arange(n)[None, :]
    for j in range(max_breaks):
        rr = np.flatnonzero(has[:, j])
        if rr.size == 0:
            continue
        others = np.array(fit.kinks[rr], copy=True)
        others[:, j] = -1
        base, gain = scanner.scan(others, rr)
        here = fit.kinks[rr, j]
        allowed = kink_allowed(others, n, min_segment)
        best_rss = np.maximum(base - gain[np.arange(rr.size), here], 1e-300)
        with np.errstate(divide="ignore", invalid="ignore"):
            stat = n_obs[rr, None] * np.log(np.maximum(base[:, None] - gain, 1e-300)
                                            / best_rss[:, None])
        inset = allowed & (stat <= crit1)
        inset[np.arange(rr.size), here] = True
        left = np.where(~inset & (day < here[:, None]), day, -1).max(axis=1)
        right = np.where(~inset & (day > here[:, None]), day, n).min(axis=1)
        lower[rr, j] = left + 1
        upper[rr, j] = right - 1
    growth, se = _segment_growth(fit, n)
    n_breaks = has.sum(axis=1).astype(np.int64)
    seg_ok = (np.arange(max_breaks + 1)[None, :] <= n_breaks[:, None]) & np.isfinite(
        fit.sigma2)[:, None]
    with np.errstate(invalid="ignore"):
        q = stats.t.ppf(0.5 + level / 2.0, np.maximum(fit.df, 1))
    q = np.where(fit.df > 0, q, np.nan)
    growth = np.where(seg_ok, growth, np.nan)
    g_lo, g_hi = growth - q[:, None] * se, growth + q[:, None] * se
    idx = np.arange(max_breaks)
    d = np.where(has, np.nan_to_num(fit.coef[:, 2:]) / n, np.nan)
    with np.errstate(invalid="ignore"):
        se_d = np.sqrt(fit.covariance[:, 2 + idx, 2 + idx]) / n
    return LevelBreaks(
        n_breaks=n_breaks, breaks=np.where(has, fit.kinks, -1), break_lower=lower,
        break_upper=upper, growth_change=d, growth_change_lower=d - q[:, None] * se_d,
        growth_change_upper=d + q[:, None] * se_d, growth=growth, growth_lower=g_lo,
        growth_upper=g_hi, reproduction=growth_to_reproduction(growth, si_mean, si_sd),
        reproduction_lower=growth_to_reproduction(g_lo, si_mean, si_sd),
        reproduction_upper=growth_to_reproduction(g_hi, si_mean, si_sd),
        fit=fit, level=level)
