"""Hospital pressure: admission rates, ICU occupancy share, ICU projection and capacity crossing.

Daily series are shaped ``(regions, days)``; the projection works on today's values per region,
shaped ``(regions,)``, and returns arrays shaped ``(regions, horizon + 1)`` for days 0..horizon.
The growth rate ``r`` and its interval are inputs (they come from the growth-rate indicator).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike
from scipy import optimize, stats

from server.indicators._arrays import FloatArray, as_nonnegative_counts, check_window
from server.indicators.poisson import IncidenceRate, incidence_rate

# Length-of-stay mass left beyond the last day kept by default (no renormalisation).
TAIL_MASS = 1e-12


@dataclass(frozen=True, eq=False)
class OccupancyShare:
    """ICU beds in use as a share of staffed beds (a census: no sampling interval)."""

    estimate: FloatArray
    occupied: FloatArray
    staffed: FloatArray


@dataclass(frozen=True, eq=False)
class LengthOfStay:
    """Discrete length of stay: ``pmf[k]`` = P(a patient occupies a bed on exactly k census days).

    ``pmf[0]`` is 0; a patient admitted on day s is in a bed on days s, ..., s + k - 1.
    """

    pmf: FloatArray

    def __post_init__(self) -> None:
        pmf = np.asarray(self.pmf, dtype=np.float64)
        if pmf.ndim != 1 or pmf.size < 2:
            raise ValueError(f"pmf: expected a 1-D array of at least 2 values, got {pmf.shape}")
        if not np.all(np.isfinite(pmf)) or np.any(pmf < 0) or pmf[0] != 0:
            raise ValueError("pmf: values must be finite, non-negative, with pmf[0] == 0")
        if not np.isclose(pmf.sum(), 1.0, atol=1e-9):
            raise ValueError(f"pmf: must sum to 1, got {pmf.sum()!r}")
        object.__setattr__(self, "pmf", pmf)

    @property
    def survival(self) -> FloatArray:
        """``survival[k]`` = P(still in a bed k days after admission) = P(L > k), k = 0..K."""
        return np.clip(1.0 - np.cumsum(self.pmf), 0.0, 1.0)

    @property
    def mean(self) -> float:
        """Mean number of census days in a bed, E[L] = sum of the survival function."""
        return float(np.sum(np.arange(self.pmf.size) * self.pmf))


@dataclass(frozen=True, eq=False)
class IcuProjection:
    """Projected ICU occupancy for days 0..horizon (day 0 = today's occupancy).

    ``estimate``/``lower``/``upper`` use the central/lower/upper growth rate; ``admissions`` the
    central projected daily admissions; ``share*`` the same over staffed beds held at today's value.
    """

    estimate: FloatArray
    lower: FloatArray
    upper: FloatArray
    admissions: FloatArray
    share_estimate: FloatArray
    share_lower: FloatArray
    share_upper: FloatArray
    current_patients: str


@dataclass(frozen=True, eq=False)
class CapacityCrossing:
    """First projected day on which occupancy reaches ``threshold`` x staffed beds.

    ``estimate`` from the central projection, ``lower`` (earliest) from the upper projection,
    ``upper`` (latest) from the lower projection. 0 = already reached today; ``inf`` = not
    within the horizon; NaN = inputs missing.
    """

    estimate: FloatArray
    lower: FloatArray
    upper: FloatArray
    threshold: float
    horizon: int


def admission_rate(
    admissions: ArrayLike,
    population: ArrayLike,
    *,
    window: int = 7,
    per: int = 100_000,
    level: float = 0.95,
) -> IncidenceRate:
    """Admissions per 100 000 over the trailing 7 days, with an exact Poisson interval.

    Parameters
    ----------
    admissions : array_like, shape (regions, days)
        Daily new admissions (integers), NaN on missing days; a window with a missing day is NaN.
    population : array_like, shape (regions,)
    window : int
        Days summed, ending on (and including) each day.
    per : int
        Rate denominator.
    level : float
        Confidence level.

    Returns
    -------
    IncidenceRate
        From :func:`server.indicators.poisson.incidence_rate` (``count`` is the window sum).

    Notes
    -----
    :math:`x_t = \\sum_{s=t-w+1}^{t} a_s`, rate :math:`= x_t \\cdot \\text{per} / N`, bounds
    :math:`\\chi^2_{\\alpha/2}(2x)/2` and :math:`\\chi^2_{1-\\alpha/2}(2x+2)/2` scaled the same.

    References
    ----------
    Garwood F (1936). Fiducial limits for the Poisson distribution. Biometrika 28:437-442.
    """
    return incidence_rate(admissions, population, window, per=per, level=level, max_missing=0)


def occupancy_share(occupied: ArrayLike, staffed: ArrayLike) -> OccupancyShare:
    """ICU beds in use over staffed ICU beds.

    Notes
    -----
    :math:`s_t = o_t / b_t`; NaN where either is missing or :math:`b_t = 0`.
    """
    o = as_nonnegative_counts("occupied", occupied)
    b = as_nonnegative_counts("staffed", staffed)
    if o.shape != b.shape:
        raise ValueError(f"staffed: shape {b.shape} differs from occupied {o.shape}")
    est = np.divide(o, b, out=np.full_like(o, np.nan), where=b > 0)
    return OccupancyShare(estimate=est, occupied=o, staffed=b)


def length_of_stay(
    *,
    distribution: Literal["lognormal", "gamma"] = "lognormal",
    median: float = 8.0,
    quartiles: tuple[float, float] = (5.0, 13.0),
    max_days: int | None = None,
) -> LengthOfStay:
    """Discretised length-of-stay distribution fitted to a published median and quartiles.

    Parameters
    ----------
    distribution : {"lognormal", "gamma"}
    median : float
        Median stay in days (default 8, Rees et al. 2020, China).
    quartiles : (float, float)
        Lower and upper quartile in days (default 5 and 13, same source); only their ratio is used
        to fix the shape, the median fixes the scale.
    max_days : int, optional
        Longest stay kept; the tail beyond is then dropped and the pmf renormalised (this
        shortens the mean stay: 10.750 instead of 10.781 days at 90 days for the default
        lognormal). By default every day is kept up to the first K with
        ``P(X > K) < TAIL_MASS`` (1e-12), and that remaining mass is put on day K (nothing is
        rescaled): the projection equals a convolution with the untruncated length of stay to
        about 1e-10 relative.

    Returns
    -------
    LengthOfStay

    Notes
    -----
    Lognormal: :math:`\\mu = \\ln m`, :math:`\\sigma = \\ln(q_3/q_1)/(2 z_{0.75})`. Gamma: the
    shape solves :math:`Q(0.75)/Q(0.25) = q_3/q_1`, the scale makes the median :math:`m`.
    With continuous stay :math:`X` the census days are :math:`L = \\lceil X \\rceil`, so
    :math:`p_k = F(k) - F(k-1)`, :math:`k \\ge 1`, and :math:`E[L] \\approx E[X] + 1/2`.

    References
    ----------
    Rees EM et al. (2020). COVID-19 length of hospital stay: a systematic review and data
    synthesis. BMC Med 18:270 (ICU median 8 days, IQR 5-13, in China; 7, IQR 4-11, elsewhere).
    """
    if max_days is not None:
        max_days = check_window("max_days", max_days, minimum=2)
    q1, q3 = (float(q) for q in quartiles)
    if not 0 < q1 < median < q3:
        raise ValueError(f"quartiles: need 0 < q1 < median < q3, got {quartiles!r}, {median!r}")
    ratio = q3 / q1
    if distribution == "lognormal":
        sigma = np.log(ratio) / (2 * stats.norm.ppf(0.75))
        dist = stats.lognorm(s=sigma, scale=median)
    elif distribution == "gamma":

        def gap(shape: float) -> float:
            g = stats.gamma(shape)
            return float(g.ppf(0.75) / g.ppf(0.25) - ratio)

        shape = optimize.brentq(gap, 0.05, 1e4)
        dist = stats.gamma(shape, scale=median / stats.gamma(shape).ppf(0.5))
    else:
        raise ValueError(f"distribution: expected 'lognormal' or 'gamma', got {distribution!r}")
    if max_days is not None:
        cdf = dist.cdf(np.arange(max_days + 1, dtype=np.float64))
        pmf = np.diff(cdf, prepend=0.0)
        pmf[0] = 0.0
        return LengthOfStay(pmf=pmf / pmf.sum())
    last = max(int(np.ceil(dist.isf(TAIL_MASS))), 2)
    sf = dist.sf(np.arange(last + 1, dtype=np.float64))  # P(X > k), accurate in the tail
    pmf = np.concatenate([[0.0], sf[:-1] - sf[1:]])  # p_k = S(k-1) - S(k), k >= 1
    pmf[-1] += sf[-1]  # the < 1e-12 beyond the last day ends on it: survival reaches 0 there
    return LengthOfStay(pmf=pmf)


def project_icu(
    admissions_today: ArrayLike,
    occupied_today: ArrayLike,
    staffed_today: ArrayLike,
    growth_rate: ArrayLike,
    growth_lower: ArrayLike,
    growth_upper: ArrayLike,
    *,
    los: LengthOfStay,
    horizon: int = 21,
    current_patients: Literal["residual", "survival"] = "residual",
) -> IcuProjection:
    """Project ICU occupancy from grown admissions convolved with the length of stay.

    Parameters
    ----------
    admissions_today : array_like, shape (regions,)
        Today's level of daily ICU admissions (e.g. a 7-day mean brought forward to today).
    occupied_today, staffed_today : array_like, shape (regions,)
        ICU beds in use and staffed today.
    growth_rate, growth_lower, growth_upper : array_like, shape (regions,)
        Daily exponential growth rate r of admissions and its interval bounds.
    los : LengthOfStay
    horizon : int
        Days projected after today (14-21 is sensible).
    current_patients : {"residual", "survival"}
        How today's patients leave. ``"residual"``: their remaining stay follows the equilibrium
        residual-life distribution (exact when admissions were steady); ``"survival"``: as if
        all were admitted today (ignores time already spent; usually too slow when admissions
        were rising, too fast when falling).

    Returns
    -------
    IcuProjection

    Notes
    -----
    Admissions :math:`A_h = A_0 e^{r h}`, :math:`h = 1..H`. With :math:`S(k) = P(L > k)`:

    .. math:: O_h = O_0 R(h) + \\sum_{s=1}^{h} A_s S(h - s)

    where :math:`R(h) = \\sum_{j \\ge h} S(j) / \\sum_{j \\ge 0} S(j)` ("residual") or
    :math:`R(h) = S(h)` ("survival"). With constant admissions :math:`A` and
    :math:`O_0 = A\\,E[L]` the "residual" projection stays at :math:`A\\,E[L]` (Little's law).
    Only the growth-rate interval is propagated; the uncertainty of :math:`A_0` and of the
    length of stay is not.

    References
    ----------
    Little JDC (1961). A proof for the queuing formula L = lambda W. Oper Res 9:383-387.
    Rees EM et al. (2020). BMC Med 18:270.
    """
    horizon = check_window("horizon", horizon)
    a0 = _vector("admissions_today", admissions_today)
    regions = a0.size
    o0 = _vector("occupied_today", occupied_today, regions)
    b0 = _vector("staffed_today", staffed_today, regions)
    rates = [_vector(n, v, regions, signed=True) for n, v in (
        ("growth_rate", growth_rate), ("growth_lower", growth_lower), ("growth_upper", growth_upper)
    )]
    if current_patients not in ("residual", "survival"):
        raise ValueError(f"current_patients: expected 'residual' or 'survival', got "
                         f"{current_patients!r}")
    surv = np.concatenate([los.survival, np.zeros(horizon + 1)])[: max(los.pmf.size, horizon + 1)]
    if current_patients == "residual":
        tail = np.cumsum(surv[::-1])[::-1]
        remain = tail[: horizon + 1] / tail[0]
    else:
        remain = surv[: horizon + 1]
    h = np.arange(horizon + 1)
    lag = h[:, np.newaxis] - h[np.newaxis, :]
    kernel = np.where((lag >= 0) & (h[np.newaxis, :] >= 1), surv[np.clip(lag, 0, None)], 0.0)
    projections = []
    admissions = np.empty((regions, horizon + 1))
    for i, r in enumerate(rates):
        with np.errstate(over="ignore", invalid="ignore"):  # huge r: unbounded (inf) projection
            adm = a0[:, np.newaxis] * np.exp(r[:, np.newaxis] * h[np.newaxis, :])
            occupancy = o0[:, np.newaxis] * remain[np.newaxis, :] + adm @ kernel.T
        if i == 0:
            admissions = adm
        projections.append(occupancy)
    est, lo, hi = projections
    lo, hi = np.minimum(lo, hi), np.maximum(lo, hi)

    def share(x: FloatArray) -> FloatArray:
        return np.divide(x, b0[:, None], out=np.full_like(x, np.nan), where=b0[:, None] > 0)

    return IcuProjection(
        estimate=est,
        lower=lo,
        upper=hi,
        admissions=admissions,
        share_estimate=share(est),
        share_lower=share(lo),
        share_upper=share(hi),
        current_patients=current_patients,
    )


def capacity_crossing(projection: IcuProjection, *, threshold: float = 0.8) -> CapacityCrossing:
    """First day the projected share of staffed beds reaches ``threshold``.

    Notes
    -----
    :math:`d = \\min\\{h : O_h / B_0 \\ge \\theta\\}`; the earliest day comes from the upper
    projection and the latest from the lower one.
    """
    if not threshold > 0 or not np.isfinite(threshold):
        raise ValueError(f"threshold: must be a positive share of staffed beds, got {threshold!r}")
    horizon = projection.estimate.shape[1] - 1

    def first(share: FloatArray) -> FloatArray:
        with np.errstate(invalid="ignore"):
            hit = share >= threshold
        day = np.where(hit.any(axis=1), np.argmax(hit, axis=1), np.inf).astype(np.float64)
        return np.where(np.isnan(share).any(axis=1), np.nan, day)

    return CapacityCrossing(
        estimate=first(projection.share_estimate),
        lower=first(projection.share_upper),
        upper=first(projection.share_lower),
        threshold=float(threshold),
        horizon=horizon,
    )


def _vector(
    name: str, values: ArrayLike, size: int | None = None, *, signed: bool = False
) -> FloatArray:
    arr = np.atleast_1d(np.asarray(values, dtype=np.float64))
    if arr.ndim != 1:
        raise ValueError(f"{name}: expected shape (regions,), got {arr.shape}")
    if size is not None and arr.size != size:
        raise ValueError(f"{name}: {arr.size} values for {size} regions")
    if np.isinf(arr).any():
        raise ValueError(f"{name}: contains infinite values")
    if not signed and (arr < 0).any():
        raise ValueError(f"{name}: negative value {arr[arr < 0][0]!r}")
    return arr
