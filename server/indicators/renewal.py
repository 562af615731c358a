"""Instantaneous reproduction number Rt by the renewal equation (Cori et al. 2013).

Incidence I is shaped (regions, days). The total infectiousness
``Lambda_t = sum_{k>=1} w_k I_{t-k}`` is a convolution along the day axis, computed for all regions
at once with :func:`scipy.signal.fftconvolve` along axis 1; exact zeros and missing history are
found with cumulative sums. The serial interval ``w`` comes from
:mod:`server.indicators.serial_interval`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike
from scipy import signal, special

from server.indicators._arrays import (
    FloatArray,
    as_nonnegative_counts,
    check_level,
    check_positive,
    check_window,
    freeze_arrays,
    row_chunks,
    trailing_sum,
)
from server.indicators.serial_interval import SerialInterval

__all__ = ["Reproduction", "infectiousness", "reproduction_number"]


@dataclass(frozen=True, eq=False)
class Reproduction:
    """Posterior of Rt over sliding windows, attached to each window's last day.

    Attributes
    ----------
    estimate, lower, upper : ndarray, shape (regions, days)
        Posterior mean and the ``(1 -/+ level)/2`` quantiles; NaN where not estimable.
    cv : ndarray, shape (regions, days)
        Posterior coefficient of variation ``1 / sqrt(shape)``.
    shape, rate : ndarray, shape (regions, days)
        Gamma posterior parameters.
    incidence, infectiousness : ndarray, shape (regions, days)
        Window sums of I and of Lambda.
    window : int
        Window length in days.
    prior_shape, prior_scale, level : float
        Gamma prior and credible level.
    """

    estimate: FloatArray
    lower: FloatArray
    upper: FloatArray
    cv: FloatArray
    shape: FloatArray
    rate: FloatArray
    incidence: FloatArray
    infectiousness: FloatArray
    window: int
    prior_shape: float
    prior_scale: float
    level: float

    def __post_init__(self) -> None:
        freeze_arrays(self)


def infectiousness(incidence: ArrayLike, serial_interval: SerialInterval) -> FloatArray:
    """Total infectiousness :math:`\\Lambda_t = \\sum_{k=1}^{K} w_k I_{t-k}` for every day.

    Parameters
    ----------
    incidence : array_like, shape (regions, days) or (days,)
        Daily incidence; NaN marks a missing day.
    serial_interval : SerialInterval
        Discrete distribution ``w``.

    Returns
    -------
    ndarray, shape (regions, days)
        NaN where any of the K previous days is missing, and on the first K days (not enough
        history); exactly 0 where those K days are all 0.

    Notes
    -----
    The renewal equation :math:`E[I_t] = R_t \\Lambda_t` of Cori et al. (2013), eq. 1.

    References
    ----------
    .. [1] Cori, A. et al. (2013). Am J Epidemiol 178:1505–1512.
    """
    arr = as_nonnegative_counts("incidence", incidence)
    return _infectiousness(arr, serial_interval.pmf)


def _lagged(values: FloatArray) -> FloatArray:
    """``values`` shifted one day later along axis 1 (day 0 becomes 0)."""
    out = np.zeros_like(values)
    out[:, 1:] = values[:, :-1]
    return out


def _infectiousness(arr: FloatArray, w: FloatArray) -> FloatArray:
    regions, days = arr.shape
    lags = w.size - 1
    missing = np.isnan(arr)
    filled = np.where(missing, 0.0, arr)
    lam = signal.fftconvolve(filled, w[np.newaxis, :], axes=1)[:, :days]
    # History sums over days t-K .. t-1 restore exact zeros (FFT round-off leaves ~1e-13) and
    # find missing days in the history, both by cumulative sums along the day axis.
    hist_sum = trailing_sum(_lagged(filled), lags)
    hist_missing = trailing_sum(_lagged(missing.astype(np.float64)), lags)
    lam = np.where(hist_sum > 0, np.maximum(lam, 0.0), 0.0)
    lam[hist_missing > 0] = np.nan
    lam[:, : min(lags, days)] = np.nan  # not enough history
    return lam


def _integer_tables(
    shape: FloatArray, probs: tuple[float, ...]
) -> tuple[float, list[FloatArray]] | None:
    """Quantile tables over the range of ``shape`` (NaN ignored) when every shape is an integer.

    The same tables :func:`_gamma_quantiles` builds for integer shapes: ``(low, [table per
    probability])`` with entry i for shape ``low + i``; None when a shape is not an integer,
    there is none, or the range is too wide for a table.
    """
    ok = np.isfinite(shape)
    count = int(np.count_nonzero(ok))
    if count == 0:
        return None
    low, high = float(np.nanmin(shape)), float(np.nanmax(shape))
    with np.errstate(invalid="ignore"):
        integral = bool(np.all(np.where(ok, shape == np.round(shape), True)))
    if not integral or high - low >= 4 * count:
        return None
    table = np.arange(low, high + 1.0)
    return low, [special.gammaincinv(table, q) for q in probs]


def _gamma_quantiles(shape: FloatArray, probs: tuple[float, ...]) -> list[FloatArray]:
    """Unit-rate gamma quantiles of a 1-D array of shapes, one array per probability.

    Integer shapes (integer counts with an integer prior shape) are looked up in a table built
    for their range; other shapes are inverted once per distinct value.
    """
    if shape.size == 0:
        return [shape.copy() for _ in probs]
    low, high = float(shape.min()), float(shape.max())
    if np.all(shape == np.round(shape)) and high - low < 4 * shape.size:
        index = (shape - low).astype(np.int64)
        table = np.arange(low, high + 1.0)
        return [special.gammaincinv(table, q)[index] for q in probs]
    unique, inverse = np.unique(shape, return_inverse=True)
    return [special.gammaincinv(unique, q)[inverse] for q in probs]


def reproduction_number(
    incidence: ArrayLike,
    serial_interval: SerialInterval,
    window: int = 7,
    *,
    prior_mean: float = 5.0,
    prior_sd: float = 5.0,
    level: float = 0.95,
) -> Reproduction:
    """Rt over sliding windows by the method of Cori et al. (2013).

    Parameters
    ----------
    incidence : array_like, shape (regions, days) or (days,)
        Daily incidence (counts by onset or report date); NaN marks a missing day.
    serial_interval : SerialInterval
        From :func:`gamma_serial_interval` or :func:`discrete_serial_interval`.
    window : int, default 7
        Days per window; the estimate is attached to the window's last day.
    prior_mean, prior_sd : float, default 5, 5
        Gamma prior on Rt (shape ``(m/s)^2``, scale ``s^2/m``: 1 and 5 by default).
    level : float, default 0.95
        Credible level of the equal-tailed interval.

    Returns
    -------
    Reproduction

    Notes
    -----
    For the window :math:`[t - \\tau + 1, t]` and a gamma(a, scale b) prior, the posterior is
    gamma with

    .. math:: \\text{shape} = a + \\sum_{s=t-\\tau+1}^{t} I_s, \\qquad
              \\text{rate} = \\frac1b + \\sum_{s=t-\\tau+1}^{t} \\Lambda_s,

    mean shape/rate, coefficient of variation :math:`1/\\sqrt{\\text{shape}}`, and quantiles
    ``gammaincinv(shape, q) / rate``. NaN where a day of the window or of the K days before it
    is missing, where those days precede the series, or where the summed infectiousness is 0.

    References
    ----------
    .. [1] Cori, A., Ferguson, N. M., Fraser, C., Cauchemez, S. (2013). A new framework and
       software to estimate time-varying reproduction numbers during epidemics. Am J Epidemiol
       178:1505–1512, eq. 2 and Web Appendix 1.
    """
    arr = as_nonnegative_counts("incidence", incidence)
    if not isinstance(serial_interval, SerialInterval):
        raise ValueError(
            f"serial_interval: expected a SerialInterval, got {type(serial_interval).__name__}"
        )
    window = check_window("window", window)
    prior_mean = check_positive("prior_mean", prior_mean)
    prior_sd = check_positive("prior_sd", prior_sd)
    level = check_level("level", level)
    prior_shape = (prior_mean / prior_sd) ** 2
    prior_scale = prior_sd**2 / prior_mean

    names = ("estimate", "cv", "shape", "rate", "incidence", "infectiousness")
    out = {name: np.empty(arr.shape) for name in names}
    chunks = list(row_chunks(arr.shape[0], arr.shape[1] + serial_interval.pmf.size))
    for rows in chunks:
        part = _posterior(arr[rows], serial_interval.pmf, window, prior_shape, prior_scale)
        for name, values in zip(names, part, strict=True):
            out[name][rows] = values
    shape, rate = out["shape"], out["rate"]
    probs = ((1.0 - level) / 2.0, (1.0 + level) / 2.0)
    lower = np.empty(arr.shape)
    upper = np.empty(arr.shape)
    tables = _integer_tables(shape, probs)
    if tables is not None:  # integer shapes: one table for all, looked up block by block
        low, (table_lo, table_hi) = tables
        for rows in chunks:
            ok = np.isfinite(shape[rows])
            index = np.where(ok, shape[rows] - low, 0.0).astype(np.int64)
            lower[rows] = np.where(ok, table_lo[index] / rate[rows], np.nan)
            upper[rows] = np.where(ok, table_hi[index] / rate[rows], np.nan)
    else:
        ok = np.isfinite(shape)
        lower.fill(np.nan)
        upper.fill(np.nan)
        q_lo, q_hi = _gamma_quantiles(shape[ok], probs)
        lower[ok] = q_lo / rate[ok]
        upper[ok] = q_hi / rate[ok]
    return Reproduction(
        lower=lower,
        upper=upper,
        **out,
        window=window,
        prior_shape=prior_shape,
        prior_scale=prior_scale,
        level=level,
    )


def _posterior(
    arr: FloatArray, w: FloatArray, window: int, prior_shape: float, prior_scale: float
) -> tuple[FloatArray, ...]:
    """Posterior mean, cv, shape, rate and window sums for a block of regions (NaN if none)."""
    lam = _infectiousness(arr, w)
    lam_missing = np.isnan(lam)  # also covers missing incidence in the history
    inc_sum = trailing_sum(np.where(np.isnan(arr), 0.0, arr), window)
    lam_sum = trailing_sum(np.where(lam_missing, 0.0, lam), window)
    bad = trailing_sum((lam_missing | np.isnan(arr)).astype(np.float64), window)
    ok = (bad == 0) & (lam_sum > 0)
    ok[:, : window - 1] = False
    shape = np.where(ok, prior_shape + inc_sum, np.nan)
    rate = np.where(ok, 1.0 / prior_scale + lam_sum, np.nan)
    return (
        shape / rate,
        1.0 / np.sqrt(shape),
        shape,
        rate,
        np.where(ok, inc_sum, np.nan),
        np.where(ok, lam_sum, np.nan),
    )
