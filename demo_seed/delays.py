"""Discrete delay distributions and their convolution with daily series.

All names, places and numbers are invented for the demo.

A delay pmf is a 1-D array ``pmf[k]`` = probability of a delay of ``k`` days (index 0 = same
day) unless a function says otherwise. Series are shaped ``(units, days)``; convolution runs
along the last axis and is vectorised across units (the loop is over lags only).
"""

from __future__ import annotations

import numpy as np
from scipy import stats

from demo_seed.errors import ScenarioArgumentError

__all__ = [
    "convolve_days",
    "discretised_gamma",
    "discretised_lognormal",
    "mean_of_pmf",
]


def _check_moments(mean: float, sd: float, max_lag: int) -> None:
    if not mean > 0:
        raise ScenarioArgumentError("mean", mean, "must be positive")
    if not sd > 0:
        raise ScenarioArgumentError("sd", sd, "must be positive")
    if max_lag < 1:
        raise ScenarioArgumentError("max_lag", max_lag, "must be at least 1")


def _from_cdf(cdf: np.ndarray) -> np.ndarray:
    pmf = np.diff(np.concatenate([[0.0], cdf]))
    return pmf / pmf.sum()


def discretised_gamma(mean: float, sd: float, max_lag: int) -> np.ndarray:
    """Gamma delay discretised to whole days ``0..max_lag``.

    Parameters
    ----------
    mean, sd : float
        Mean and standard deviation of the continuous gamma, in days.
    max_lag : int
        Largest delay kept; the tail beyond it is folded in by renormalising.

    Returns
    -------
    numpy.ndarray
        ``pmf[k]`` for ``k = 0..max_lag``, summing to 1.

    Notes
    -----
    :math:`p_k = F(k + 1/2) - F(k - 1/2)` (with :math:`F(-1/2) := 0`), shape
    :math:`(\\mu/\\sigma)^2`, scale :math:`\\sigma^2/\\mu`: rounding a continuous delay to the
    nearest day.

    References
    ----------
    .. [1] Lauer, S. A. et al. (2020). The incubation period of coronavirus disease 2019.
       Annals of Internal Medicine 172(9), 577-582.
    """
    _check_moments(mean, sd, max_lag)
    shape = (mean / sd) ** 2
    scale = sd**2 / mean
    edges = np.arange(max_lag + 1) + 0.5
    return _from_cdf(stats.gamma.cdf(edges, a=shape, scale=scale))


def discretised_lognormal(median: float, sigma: float, max_lag: int) -> np.ndarray:
    """Log-normal duration discretised to whole days ``0..max_lag``.

    Notes
    -----
    :math:`p_k = F(k + 1/2) - F(k - 1/2)` with :math:`\\log X \\sim N(\\log m, \\sigma^2)`.
    With median 8 and :math:`\\sigma = 0.71` the quartiles are about 5 and 13 days, matching
    the ICU length of stay reported by Rees et al. (2020) [1]_.

    References
    ----------
    .. [1] Rees, E. M. et al. (2020). COVID-19 length of hospital stay: a systematic review
       and data synthesis. BMC Medicine 18, 270.
    """
    _check_moments(median, sigma, max_lag)
    edges = np.arange(max_lag + 1) + 0.5
    return _from_cdf(stats.lognorm.cdf(edges, s=sigma, scale=median))


def mean_of_pmf(pmf: np.ndarray, offset: int = 0) -> float:
    """Mean delay of ``pmf`` whose index 0 stands for ``offset`` days."""
    lags = np.arange(len(pmf)) + offset
    return float(np.sum(lags * pmf) / np.sum(pmf))


def convolve_days(series: np.ndarray, pmf: np.ndarray, offset: int = 0) -> np.ndarray:
    """Expected counts after a delay: ``out[:, t] = sum_k pmf[k] * series[:, t - k - offset]``.

    Parameters
    ----------
    series : numpy.ndarray
        Counts, shape ``(units, days)`` (a 1-D array is treated as one unit).
    pmf : numpy.ndarray
        Delay pmf; index ``k`` stands for a delay of ``k + offset`` days.
    offset : int
        Delay of index 0 (0 for delays that may be same-day, 1 for generation intervals).

    Returns
    -------
    numpy.ndarray
        Same shape as ``series``. Events delayed past the last day are dropped.
    """
    x = np.atleast_2d(np.asarray(series, dtype=float))
    out = np.zeros_like(x)
    days = x.shape[1]
    for k, p in enumerate(pmf):
        lag = k + offset
        if lag >= days:
            break
        if p == 0.0:
            continue
        out[:, lag:] += p * x[:, : days - lag]
    return out.reshape(np.shape(series)) if np.ndim(series) == 1 else out
