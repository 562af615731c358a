"""Instantaneous reproduction number Rt by the renewal equation (Cori et al. 2013), and the
Wallinga & Lipsitch (2007) relation between the growth rate r and R.

Incidence I is shaped (regions, days). The total infectiousness
``Lambda_t = sum_{k>=1} w_k I_{t-k}`` is a convolution along the day axis, computed for all regions
at once with :func:`scipy.signal.fftconvolve` along axis 1; exact zeros and missing history are
found with cumulative sums.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike
from scipy import signal, special, stats

from server.indicators._arrays import FloatArray, as_nonnegative_counts, check_level, check_window
from server.indicators.windows import freeze_arrays

__all__ = [
    "Reproduction",
    "SerialInterval",
    "discrete_serial_interval",
    "gamma_serial_interval",
    "growth_to_reproduction",
    "growth_to_reproduction_discrete",
    "infectiousness",
    "reproduction_number",
    "reproduction_to_growth",
]


@dataclass(frozen=True, eq=False)
class SerialInterval:
    """A discrete serial-interval distribution ``pmf[k] = w_k`` for k = 0, 1, ...

    Attributes
    ----------
    pmf : ndarray, shape (lags + 1,)
        Probabilities, ``pmf[0] == 0`` and summing to 1.
    mean, sd : float
        Mean and standard deviation of the discrete distribution.
    """

    pmf: FloatArray
    mean: float
    sd: float

    def __post_init__(self) -> None:
        pmf = np.asarray(self.pmf, dtype=np.float64)
        if pmf.ndim != 1 or pmf.size < 2:
            raise ValueError(f"pmf: expected a 1-D array with at least 2 values, got {pmf.shape}")
        if not np.all(np.isfinite(pmf)) or np.any(pmf < 0):
            raise ValueError("pmf: probabilities must be finite and non-negative")
        if pmf[0] != 0:
            raise ValueError(f"pmf: w_0 must be 0 (no same-day transmission), got {pmf[0]}")
        if abs(pmf.sum() - 1.0) > 1e-6:
            raise ValueError(f"pmf: probabilities must sum to 1, got {pmf.sum()}")
        freeze_arrays(self)

    @property
    def lags(self) -> int:
        """Largest lag k with a stored probability."""
        return int(self.pmf.size - 1)


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


def _positive(name: str, value: float) -> float:
    if not np.isfinite(value) or value <= 0:
        raise ValueError(f"{name}: must be positive and finite, got {value!r}")
    return float(value)


def _from_pmf(pmf: FloatArray) -> SerialInterval:
    k = np.arange(pmf.size)
    mean = float((k * pmf).sum())
    return SerialInterval(pmf, mean, float(np.sqrt((k * k * pmf).sum() - mean**2)))


def gamma_serial_interval(mean: float, sd: float, *, lags: int | None = None) -> SerialInterval:
    """Discretise a gamma serial interval offset by one day (Cori et al. 2013, Web Appendix 11).

    Parameters
    ----------
    mean, sd : float
        Mean (> 1 day) and standard deviation of the serial interval in days.
    lags : int, optional
        Largest lag kept. By default the smallest k whose cumulative mass reaches 0.9999. The
        kept probabilities are renormalised to sum to 1.

    Returns
    -------
    SerialInterval

    Notes
    -----
    With :math:`a = ((\\mu - 1)/\\sigma)^2`, :math:`b = \\sigma^2/(\\mu - 1)` and
    :math:`F_{a}` the gamma CDF of shape a and scale b (0 for arguments <= 0),

    .. math:: w_k = k F_a(k) + (k-2) F_a(k-2) - 2(k-1) F_a(k-1)
              + a b \\,[2 F_{a+1}(k-1) - F_{a+1}(k-2) - F_{a+1}(k)],

    for k >= 0, clipped at 0 (w_0 = 0). This is the formula of Web Appendix 11; before
    truncation the w_k sum to 1 and have mean :math:`\\mu`.

    References
    ----------
    .. [1] Cori, A., Ferguson, N. M., Fraser, C., Cauchemez, S. (2013). A new framework and
       software to estimate time-varying reproduction numbers during epidemics. Am J Epidemiol
       178:1505–1512, Web Appendix 11.
    """
    mean = _positive("mean", mean)
    sd = _positive("sd", sd)
    if mean <= 1.0:
        raise ValueError(f"mean: the offset gamma needs a mean above 1 day, got {mean!r}")
    if lags is not None:
        lags = check_window("lags", lags)
    a = ((mean - 1.0) / sd) ** 2
    b = sd * sd / (mean - 1.0)
    n = lags if lags is not None else int(np.ceil(mean + 40.0 * sd)) + 2
    k = np.arange(n + 1, dtype=np.float64)

    def cdf(x: FloatArray, shape: float) -> FloatArray:
        return stats.gamma.cdf(np.maximum(x, 0.0), shape, scale=b)

    w = (
        k * cdf(k, a)
        + (k - 2) * cdf(k - 2, a)
        - 2 * (k - 1) * cdf(k - 1, a)
        + a * b * (2 * cdf(k - 1, a + 1) - cdf(k - 2, a + 1) - cdf(k, a + 1))
    )
    w = np.maximum(w, 0.0)
    w[0] = 0.0
    if lags is None:
        n = int(np.searchsorted(np.cumsum(w), 0.9999)) + 1
        w = w[: max(n, 2)]
    return _from_pmf(w / w.sum())


def discrete_serial_interval(pmf: ArrayLike) -> SerialInterval:
    """Wrap a user-given discrete serial interval ``pmf[k]``, k = 0, 1, ... (``pmf[0]`` = 0).

    Parameters
    ----------
    pmf : array_like, shape (lags + 1,)
        Non-negative probabilities summing to 1 (within 1e-6), starting at lag 0.

    Returns
    -------
    SerialInterval
    """
    return _from_pmf(np.asarray(pmf, dtype=np.float64).copy())


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


def _trailing_sum(filled: FloatArray, window: int) -> FloatArray:
    """Sum over days t - window + 1 .. t of a NaN-free array (one cumulative sum)."""
    total = np.cumsum(filled, axis=1)
    if window < filled.shape[1]:
        total[:, window:] -= total[:, :-window].copy()
    return total


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
    hist_sum = _trailing_sum(_lagged(filled), lags)
    hist_missing = _trailing_sum(_lagged(missing.astype(np.float64)), lags)
    lam = np.where(hist_sum > 0, np.maximum(lam, 0.0), 0.0)
    lam[hist_missing > 0] = np.nan
    lam[:, : min(lags, days)] = np.nan  # not enough history
    return lam


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
    prior_mean = _positive("prior_mean", prior_mean)
    prior_sd = _positive("prior_sd", prior_sd)
    level = check_level("level", level)
    prior_shape = (prior_mean / prior_sd) ** 2
    prior_scale = prior_sd**2 / prior_mean

    lam = _infectiousness(arr, serial_interval.pmf)
    lam_missing = np.isnan(lam)  # also covers missing incidence in the history
    inc_sum = _trailing_sum(np.where(np.isnan(arr), 0.0, arr), window)
    lam_sum = _trailing_sum(np.where(lam_missing, 0.0, lam), window)
    bad = _trailing_sum((lam_missing | np.isnan(arr)).astype(np.float64), window)
    ok = (bad == 0) & (lam_sum > 0)
    ok[:, : window - 1] = False
    shape = np.where(ok, prior_shape + inc_sum, np.nan)
    rate = np.where(ok, 1.0 / prior_scale + lam_sum, np.nan)
    lower = np.full(arr.shape, np.nan)
    upper = np.full(arr.shape, np.nan)
    q_lo, q_hi = _gamma_quantiles(shape[ok], ((1.0 - level) / 2.0, (1.0 + level) / 2.0))
    lower[ok] = q_lo / rate[ok]
    upper[ok] = q_hi / rate[ok]
    return Reproduction(
        estimate=shape / rate,
        lower=lower,
        upper=upper,
        cv=1.0 / np.sqrt(shape),
        shape=shape,
        rate=rate,
        incidence=np.where(ok, inc_sum, np.nan),
        infectiousness=np.where(ok, lam_sum, np.nan),
        window=window,
        prior_shape=prior_shape,
        prior_scale=prior_scale,
        level=level,
    )


def _gamma_parameters(mean: float, sd: float) -> tuple[float, float]:
    mean = _positive("mean", mean)
    sd = _positive("sd", sd)
    return (mean / sd) ** 2, sd * sd / mean


def growth_to_reproduction(r: ArrayLike, mean: float, sd: float) -> FloatArray:
    """R from the growth rate r for a gamma generation interval (Wallinga & Lipsitch 2007).

    Parameters
    ----------
    r : array_like
        Growth rate per day.
    mean, sd : float
        Mean and standard deviation of the gamma generation interval in days.

    Returns
    -------
    ndarray
        R, same shape as r; 0 where ``r <= -1/scale`` (the moment generating function diverges).

    Notes
    -----
    :math:`R = 1 / M(-r)` with M the moment generating function of the generation interval
    (eq. 2.7); for a gamma of shape :math:`k = \\mu^2/\\sigma^2` and scale
    :math:`\\theta = \\sigma^2/\\mu`, :math:`R = (1 + r\\theta)^{k}`.

    References
    ----------
    .. [1] Wallinga, J., Lipsitch, M. (2007). How generation intervals shape the relationship
       between growth rates and reproductive numbers. Proc R Soc B 274:599–604.
    """
    shape, scale = _gamma_parameters(mean, sd)
    base = 1.0 + np.asarray(r, dtype=np.float64) * scale
    positive = np.maximum(np.nan_to_num(base, nan=1.0), 0.0) ** shape
    return np.where(np.isnan(base), np.nan, np.where(base > 0, positive, 0.0))


def reproduction_to_growth(reproduction: ArrayLike, mean: float, sd: float) -> FloatArray:
    """Growth rate r from R for a gamma generation interval, the inverse of
    :func:`growth_to_reproduction`: :math:`r = (R^{1/k} - 1)/\\theta`.

    Parameters
    ----------
    reproduction : array_like
        Reproduction numbers (>= 0; NaN propagates).
    mean, sd : float
        Mean and standard deviation of the gamma generation interval in days.

    Returns
    -------
    ndarray
        r per day.

    References
    ----------
    .. [1] Wallinga, J., Lipsitch, M. (2007). Proc R Soc B 274:599–604, eq. 2.7 and 3.2.
    """
    shape, scale = _gamma_parameters(mean, sd)
    big_r = np.asarray(reproduction, dtype=np.float64)
    if np.any(np.nan_to_num(big_r, nan=0.0) < 0) or np.any(np.isinf(big_r)):
        raise ValueError("reproduction: values must be non-negative and finite")
    return (big_r ** (1.0 / shape) - 1.0) / scale


def growth_to_reproduction_discrete(
    r: ArrayLike, serial_interval: SerialInterval
) -> FloatArray:
    """R from r for a discrete interval: :math:`R = 1 / \\sum_k w_k e^{-r k}`.

    The discrete analogue of Wallinga & Lipsitch (2007) eq. 2.7; on an exactly exponential series
    the renewal-equation estimate of :func:`reproduction_number` tends to this value.

    Parameters
    ----------
    r : array_like
        Growth rate per day.
    serial_interval : SerialInterval
        Discrete distribution w.

    Returns
    -------
    ndarray
        R, same shape as r.

    References
    ----------
    .. [1] Wallinga, J., Lipsitch, M. (2007). Proc R Soc B 274:599–604.
    """
    rr = np.asarray(r, dtype=np.float64)
    k = np.arange(serial_interval.pmf.size, dtype=np.float64)
    with np.errstate(over="ignore"):
        mgf = np.exp(-np.multiply.outer(rr, k)) @ serial_interval.pmf
    return 1.0 / mgf
