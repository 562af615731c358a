"""Serial and generation intervals: the discrete distribution ``w_k`` used by the renewal
equation, built from a gamma (Cori et al. 2013) or given directly, and the Wallinga & Lipsitch
(2007) relation between the growth rate r and the reproduction number R through that interval.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike
from scipy import stats

from server.indicators._arrays import FloatArray, check_positive, check_window, freeze_arrays

__all__ = [
    "SerialInterval",
    "discrete_serial_interval",
    "gamma_serial_interval",
    "growth_to_reproduction",
    "growth_to_reproduction_discrete",
    "reproduction_to_growth",
]


# Mass of the discretised gamma left out beyond the last kept lag: below this the cut changes no
# estimate by more than about 1e-12 relative, so the result equals the untruncated distribution
# that EpiEstim uses (discr_si over every lag up to the series length).
TAIL_MASS = 1e-12


@dataclass(frozen=True, eq=False)
class SerialInterval:
    """A discrete serial-interval distribution ``pmf[k] = w_k`` for k = 0, 1, ...

    Attributes
    ----------
    pmf : ndarray, shape (lags + 1,)
        Probabilities, ``pmf[0] == 0`` and summing to 1 (within 1e-6).
    mean, sd : float
        Mean and standard deviation of the discrete distribution.
    parametric : bool
        True when built from a parametric (gamma) serial interval by
        :func:`gamma_serial_interval` without ``lags``: the distribution then stands for the
        untruncated one, and :func:`~server.indicators.renewal.reproduction_number` uses, like
        EpiEstim's ``parametric_si``, its mean over the lags the series can hold to decide
        where estimates begin.
    """

    pmf: FloatArray
    mean: float
    sd: float
    parametric: bool = False

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

    def mean_within(self, lags: int) -> float:
        """``sum_{k <= lags} k w_k``: the mean over the first ``lags`` lags, not renormalised."""
        k = np.arange(min(self.pmf.size, max(lags, 0) + 1))
        return float((k * self.pmf[: k.size]).sum())


def _from_pmf(pmf: FloatArray, *, parametric: bool = False) -> SerialInterval:
    k = np.arange(pmf.size)
    mean = float((k * pmf).sum())
    sd = float(np.sqrt(max((k * k * pmf).sum() - mean**2, 0.0)))
    return SerialInterval(pmf, mean, sd, parametric)


def _offset_gamma_weights(k: FloatArray, a: float, b: float) -> FloatArray:
    """Web Appendix 11 weights written with survival functions ``S = 1 - F`` (S(x) = 1, x <= 0).

    Substituting ``F = 1 - S`` in the appendix formula cancels the constant terms and leaves
    ``w_k = 2(k-1) S_a(k-1) - k S_a(k) - (k-2) S_a(k-2) + ab [S_{a+1}(k) + S_{a+1}(k-2) -
    2 S_{a+1}(k-1)]``: the same numbers, without the cancellation of CDFs near 1 in the tail.
    """

    def sf(x: FloatArray, shape: float) -> FloatArray:
        return np.where(x > 0, stats.gamma.sf(np.maximum(x, 0.0), shape, scale=b), 1.0)

    w = (
        2 * (k - 1) * sf(k - 1, a)
        - k * sf(k, a)
        - (k - 2) * sf(k - 2, a)
        + a * b * (sf(k, a + 1) + sf(k - 2, a + 1) - 2 * sf(k - 1, a + 1))
    )
    w = np.maximum(w, 0.0)
    w[k == 0] = 0.0
    return w


def gamma_serial_interval(mean: float, sd: float, *, lags: int | None = None) -> SerialInterval:
    """Discretise a gamma serial interval offset by one day (Cori et al. 2013, Web Appendix 11).

    Parameters
    ----------
    mean, sd : float
        Mean (> 1 day) and standard deviation of the serial interval in days.
    lags : int, optional
        Largest lag kept; the kept probabilities are then renormalised to sum to 1. By default
        every lag is kept up to the first K with less than ``TAIL_MASS`` (1e-12) beyond it, and
        nothing is renormalised: ``pmf[k]`` equals EpiEstim's ``discr_si(k, mean, sd)`` for
        every k <= K, and the dropped tail changes no Rt by more than about 1e-12 relative.

    Returns
    -------
    SerialInterval

    Notes
    -----
    With :math:`a = ((\\mu - 1)/\\sigma)^2`, :math:`b = \\sigma^2/(\\mu - 1)` and
    :math:`F_{a}` the gamma CDF of shape a and scale b (0 for arguments <= 0),

    .. math:: w_k = k F_a(k) + (k-2) F_a(k-2) - 2(k-1) F_a(k-1)
              + a b \\,[2 F_{a+1}(k-1) - F_{a+1}(k-2) - F_{a+1}(k)],

    for k >= 0, clipped at 0 (w_0 = 0). This is the formula of Web Appendix 11 (EpiEstim's
    ``discr_si``); it is evaluated in the equivalent survival-function form, which keeps the
    tail accurate. Untruncated, the w_k sum to 1 and have mean :math:`\\mu`.

    References
    ----------
    .. [1] Cori, A., Ferguson, N. M., Fraser, C., Cauchemez, S. (2013). A new framework and
       software to estimate time-varying reproduction numbers during epidemics. Am J Epidemiol
       178:1505–1512, Web Appendix 11.
    """
    mean = check_positive("mean", mean)
    sd = check_positive("sd", sd)
    if mean <= 1.0:
        raise ValueError(f"mean: the offset gamma needs a mean above 1 day, got {mean!r}")
    a = ((mean - 1.0) / sd) ** 2
    b = sd * sd / (mean - 1.0)
    if lags is not None:
        lags = check_window("lags", lags)
        w = _offset_gamma_weights(np.arange(lags + 1, dtype=np.float64), a, b)
        return _from_pmf(w / w.sum())
    # a grid whose end leaves far less than TAIL_MASS of the continuous law beyond it
    n = int(np.ceil(1.0 + float(stats.gamma.isf(TAIL_MASS * 1e-3, a, scale=b)))) + 3
    w = _offset_gamma_weights(np.arange(n + 1, dtype=np.float64), a, b)
    beyond = np.append(np.cumsum(w[::-1])[::-1][1:], 0.0)  # beyond[k] = sum_{j > k} w_j
    last = max(int(np.argmax(beyond < TAIL_MASS)), 1)
    return _from_pmf(w[: last + 1], parametric=True)


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


def _gamma_parameters(mean: float, sd: float) -> tuple[float, float]:
    mean = check_positive("mean", mean)
    sd = check_positive("sd", sd)
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
