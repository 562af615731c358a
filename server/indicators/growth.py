"""Exponential growth rate r from a log-linear Poisson regression, with doubling or halving time.

The model for the last ``window`` days (default 14) of each region is

    log E[y_t] = b0 + r t + sum_{d=1}^{6} g_d [t mod 7 = d]

fitted by iteratively reweighted least squares (IRLS), batched across regions (and, for the rolling
version, across end days): the normal equations of every fit are stacked and solved with
:func:`numpy.linalg.solve` on an array of (p x p) matrices. Day-of-week indicators are taken
relative to the window's first day; that is a relabelling of the weekdays, so r, its standard error
and the fitted values are those of a fit with calendar weekdays.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view
from numpy.typing import ArrayLike, NDArray
from scipy import special

from server.indicators._arrays import (
    FloatArray,
    as_nonnegative_counts,
    check_level,
    check_max_missing,
    check_window,
    freeze_arrays,
)
from server.indicators._levelfit import Levels, fit_levels

BoolArray = NDArray[np.bool_]
Dispersion = Literal["quasipoisson", "poisson"]

__all__ = ["GrowthRate", "design_matrix", "growth_rate", "rolling_growth_rate"]

_LN2 = float(np.log(2.0))
_CHUNK_ROWS = 4096
_MAX_ITER = 100
_TOL = 1e-10


@dataclass(frozen=True, eq=False)
class GrowthRate:
    """Daily exponential growth rate and the doubling (or halving) time it implies.

    Arrays are shaped (regions,) for :func:`growth_rate` and (regions, days) for
    :func:`rolling_growth_rate`; NaN where the fit is refused or did not converge.

    Attributes
    ----------
    estimate, lower, upper : ndarray
        r per day and its Wald bounds, ``r +- z * se``.
    std_error : ndarray
        Standard error of r, including the dispersion.
    dispersion : ndarray
        Scale used for the standard errors (1 for Poisson; Pearson chi2 / (n - p) for
        quasi-Poisson, clamped at >= 1 when ``clamp_dispersion``).
    pearson_dispersion : ndarray
        Unclamped Pearson chi2 / (n - p).
    doubling_time, doubling_lower, doubling_upper : ndarray
        ``ln 2 / |r|`` in days: a doubling time where r > 0, a halving time where r < 0 (the sign
        of ``estimate`` says which). The upper bound is ``inf`` when the r interval contains 0.
    converged : ndarray of bool
        Whether IRLS converged (False also where the fit was refused).
    window : int
        Window length in days.
    day_of_week : bool
        Whether day-of-week effects were fitted.
    level : float
        Confidence level.
    """

    estimate: FloatArray
    lower: FloatArray
    upper: FloatArray
    std_error: FloatArray
    dispersion: FloatArray
    pearson_dispersion: FloatArray
    doubling_time: FloatArray
    doubling_lower: FloatArray
    doubling_upper: FloatArray
    converged: BoolArray
    window: int
    day_of_week: bool
    level: float

    def __post_init__(self) -> None:
        freeze_arrays(self)


def design_matrix(window: int, *, day_of_week: bool = True) -> FloatArray:
    """Columns: intercept, centred day index ``t - (w-1)/2`` (the r column), day-of-week dummies.

    Parameters
    ----------
    window : int
        Number of days.
    day_of_week : bool, default True
        Add six indicators for ``t mod 7 = 1..6`` (day 0 of the window is the reference).

    Returns
    -------
    ndarray, shape (window, 2) or (window, 8)
    """
    window = check_window("window", window)
    t = np.arange(window, dtype=np.float64)
    cols = [np.ones(window), t - (window - 1) / 2.0]
    if day_of_week:
        cols += [(t % 7 == d).astype(np.float64) for d in range(1, 7)]
    return np.column_stack(cols)


def _fit_batch(
    y: FloatArray, design: FloatArray, day_of_week: bool, max_missing: int
) -> tuple[FloatArray, FloatArray, FloatArray, BoolArray]:
    """Fit every row of ``y`` (rows, n); return r, var(r) at scale 1, Pearson dispersion, ok.

    The weekday dummies and the intercept span the same space as one intercept per weekday
    level, so the fit is carried out in that parametrisation: the normal equations then have an
    arrow shape (a diagonal block for the levels and one row for r) and are solved in closed form
    through the Schur complement of the diagonal block, elementwise for all rows at once. The
    estimate of r, its variance and the fitted values are those of the design ``design``.
    """
    rows, n = y.shape
    p = design.shape[1]
    tc = design[:, 1]
    mask = ~np.isnan(y)
    yy = np.where(mask, y, 0.0)
    m = mask.astype(np.float64)
    n_obs = m.sum(axis=1)
    ok = (n_obs >= n - max_missing) & (n_obs - p >= 1)
    # Every weekday level (or, without weekdays, the window) needs a positive count, otherwise
    # the maximum-likelihood estimate does not exist.
    levels = np.arange(n) % 7 if day_of_week else np.zeros(n, dtype=np.int64)
    onehot = (levels[:, None] == np.arange(levels.max() + 1)[None, :]).astype(np.float64)
    ok &= np.all(yy @ onehot > 0, axis=1)

    r = np.full(rows, np.nan)
    var_r = np.full(rows, np.nan)
    phi = np.full(rows, np.nan)
    converged = np.zeros(rows, dtype=bool)

    fast = np.flatnonzero(ok)
    lag = 7 if day_of_week else max(n // 2, 1)
    with np.errstate(divide="ignore", invalid="ignore"):
        pairs = m[fast, lag:] * m[fast, :-lag]  # days observed at both ends of a lag
        start = np.log((yy[fast, lag:] * pairs).sum(axis=1) / (yy[fast, :-lag] * pairs).sum(axis=1))
    levels = Levels(n=n, period=7) if day_of_week else Levels(n=n, sizes=(n,))
    fit = fit_levels(yy[fast], m[fast], levels, tc, start=start / lag)
    done_fast = fast[fit.exists]
    mu_f = fit.mu[fit.exists]
    pearson_f = (m[done_fast] * (yy[done_fast] - mu_f) ** 2 / mu_f).sum(axis=1)
    r[done_fast] = fit.slope[fit.exists]
    var_r[done_fast] = fit.slope_var[fit.exists]
    phi[done_fast] = pearson_f / (n_obs[done_fast] - p)
    converged[done_fast] = True
    # rows without a finite maximum-likelihood estimate: plain IRLS, as before
    idx = fast[~fit.exists]  # rows still iterating
    ya, ma = yy[idx], m[idx]
    mu = np.where(ma > 0, (ya + ya.sum(axis=1, keepdims=True) / n_obs[idx, None]) / 2.0, 1.0)
    eta = np.log(mu)
    with np.errstate(divide="ignore", invalid="ignore"):
        ylogy = np.where(ya > 0, ya * np.log(ya), 0.0)
    dev = np.full(idx.size, np.inf)
    for _ in range(_MAX_ITER):
        if idx.size == 0:
            break
        w = ma * mu
        z = eta + (ya - mu) / mu
        slope, _, intercepts = _weighted_fit(w, z, tc, onehot)
        with np.errstate(over="ignore", invalid="ignore"):
            eta = np.clip(intercepts @ onehot.T + slope[:, None] * tc, -700.0, 700.0)
            mu = np.exp(eta)
            new_dev = _deviance_from_eta(ylogy, ya, eta, mu, ma)
        done = np.abs(new_dev - dev) <= _TOL * (np.abs(new_dev) + 0.1)
        if done.any():
            final = idx[done]
            wd = ma[done] * mu[done]
            _, inv_schur, _ = _weighted_fit(wd, eta[done], tc, onehot)
            pearson = (ma[done] * (ya[done] - mu[done]) ** 2 / mu[done]).sum(axis=1)
            converged[final] = True
            r[final] = slope[done]
            var_r[final] = inv_schur
            phi[final] = pearson / (n_obs[final] - p)
        keep = ~done & np.isfinite(new_dev)
        idx, ya, ma, ylogy = idx[keep], ya[keep], ma[keep], ylogy[keep]
        mu, eta, dev = mu[keep], eta[keep], new_dev[keep]
    return r, var_r, phi, converged


def _weighted_fit(
    w: FloatArray, z: FloatArray, tc: FloatArray, onehot: FloatArray
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Weighted least squares of z on one intercept per level and the slope of ``tc``.

    Returns the slope, the inverse Schur complement (the slope's unscaled variance) and the
    level intercepts. With level sums :math:`W_k, C_k, Z_k` of :math:`w, w t, w z`:
    :math:`r = (B - \\sum_k C_k Z_k / W_k) / (S - \\sum_k C_k^2 / W_k)` where
    :math:`S = \\sum w t^2`, :math:`B = \\sum w t z`, and :math:`a_k = (Z_k - C_k r) / W_k`.
    """
    wt = w * tc
    big_w = w @ onehot
    big_c = wt @ onehot
    big_z = (w * z) @ onehot
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = big_c / big_w
        schur = (wt * tc).sum(axis=1) - (ratio * big_c).sum(axis=1)
        slope = ((wt * z).sum(axis=1) - (ratio * big_z).sum(axis=1)) / schur
        intercepts = (big_z - big_c * slope[:, None]) / big_w
        inv_schur = 1.0 / schur
    return slope, inv_schur, intercepts


def _deviance_from_eta(ylogy: FloatArray, y: FloatArray, eta: FloatArray, mu: FloatArray,
                       m: FloatArray) -> FloatArray:
    """:func:`_deviance` with ``log mu = eta`` and ``y log y`` (0 where y = 0) precomputed."""
    return 2.0 * (m * (ylogy - y * eta - (y - mu))).sum(axis=1)


def _doubling(r: FloatArray, lo: FloatArray, hi: FloatArray) -> tuple[FloatArray, ...]:
    with np.errstate(divide="ignore", invalid="ignore"):
        est = _LN2 / np.abs(r)
        near = np.where(r >= 0, hi, -lo)  # bound farthest from 0 on the estimate's side
        far = np.where(r >= 0, lo, -hi)  # bound nearest to 0 on that side
        lower = _LN2 / np.abs(near)
        upper = np.where(far > 0, _LN2 / far, np.inf)
    upper = np.where(r == 0, np.inf, upper)
    lower = np.where(r == 0, _LN2 / np.maximum(np.abs(lo), np.abs(hi)), lower)
    nan = np.isnan(r)
    return (np.where(nan, np.nan, est), np.where(nan, np.nan, lower), np.where(nan, np.nan, upper))


def _validate(
    counts: ArrayLike, window: int, day_of_week: bool, level: float, max_missing: int, disp: str
) -> tuple[FloatArray, int, float, int]:
    arr = as_nonnegative_counts("counts", counts)
    p = 8 if day_of_week else 2
    window = check_window("window", window, minimum=p + 1)
    level = check_level("level", level)
    max_missing = check_max_missing(max_missing, window)
    if window - max_missing < p + 1:
        raise ValueError(
            f"max_missing: {max_missing} leaves fewer than {p + 1} observed days in a window of "
            f"{window} for {p} coefficients"
        )
    if disp not in ("quasipoisson", "poisson"):
        raise ValueError(f"dispersion: must be 'quasipoisson' or 'poisson', got {disp!r}")
    return arr, window, level, max_missing


def _result(
    fit: tuple[FloatArray, FloatArray, FloatArray, BoolArray],
    shape: tuple[int, ...],
    *,
    window: int,
    day_of_week: bool,
    level: float,
    dispersion: Dispersion,
    clamp_dispersion: bool,
) -> GrowthRate:
    r, var_r, phi = (np.asarray(a, dtype=np.float64).reshape(shape) for a in fit[:3])
    converged = np.asarray(fit[3], dtype=np.bool_).reshape(shape)
    if dispersion == "poisson":
        scale = np.where(np.isnan(phi), np.nan, 1.0)
    else:
        scale = np.maximum(phi, 1.0) if clamp_dispersion else phi
    se = np.sqrt(scale * var_r)
    z = float(special.ndtri(0.5 + level / 2.0))
    lo, hi = r - z * se, r + z * se
    dt, dt_lo, dt_hi = _doubling(r, lo, hi)
    return GrowthRate(
        r, lo, hi, se, scale, phi, dt, dt_lo, dt_hi, converged, window, day_of_week, level
    )


def growth_rate(
    counts: ArrayLike,
    window: int = 14,
    *,
    day_of_week: bool = True,
    dispersion: Dispersion = "quasipoisson",
    clamp_dispersion: bool = True,
    level: float = 0.95,
    max_missing: int = 0,
) -> GrowthRate:
    """Growth rate r over the last ``window`` days of each region.

    Parameters
    ----------
    counts : array_like, shape (regions, days) or (days,)
        Daily counts; NaN marks a missing day (left out of the fit).
    window : int, default 14
        Days in the fit; at least p + 1 (9 with day-of-week effects, 3 without).
    day_of_week : bool, default True
        Fit six day-of-week effects.
    dispersion : {"quasipoisson", "poisson"}, default "quasipoisson"
        Scale the covariance by the Pearson dispersion, or assume Poisson variance.
    clamp_dispersion : bool, default True
        Use ``max(phi, 1)`` so under-dispersion never narrows the interval (common practice, no
        source).
    level : float, default 0.95
        Confidence level of the Wald interval.
    max_missing : int, default 0
        Most missing days tolerated in the window.

    Returns
    -------
    GrowthRate
        Arrays shaped (regions,).

    Notes
    -----
    IRLS for the Poisson log link: with :math:`\\mu = e^{X\\beta}`,
    :math:`W = \\mathrm{diag}(\\mu)`,
    :math:`z = X\\beta + (y - \\mu)/\\mu`, iterate :math:`\\beta \\leftarrow (X^T W X)^{-1} X^T W z`
    until the deviance changes by less than 1e-10 relative. Then

    .. math:: \\widehat{\\mathrm{Var}}(\\hat\\beta) = \\hat\\phi (X^T W X)^{-1}, \\quad
              \\hat\\phi = \\frac{1}{n - p}\\sum_t \\frac{(y_t - \\hat\\mu_t)^2}{\\hat\\mu_t},

    the interval is :math:`\\hat r \\pm z_{1-\\alpha/2}\\,\\mathrm{se}(\\hat r)` and the doubling
    time :math:`T_d = \\ln 2 / |\\hat r|`, its bounds :math:`\\ln 2 / |r|` at the interval ends
    (unbounded when the interval contains 0). A fit is refused (NaN) when a weekday level has no
    positive count, because the likelihood then has no maximum.

    References
    ----------
    .. [1] McCullagh, P., Nelder, J. A. (1989). Generalized Linear Models, 2nd ed., sections 2.5
       (IRLS) and 4.5 (quasi-likelihood dispersion estimate).
    .. [2] Wallinga, J., Lipsitch, M. (2007). How generation intervals shape the relationship
       between growth rates and reproductive numbers. Proc R Soc B 274:599–604.
    """
    arr, window, level, max_missing = _validate(
        counts, window, day_of_week, level, max_missing, dispersion
    )
    regions, days = arr.shape
    if days < window:
        raise ValueError(f"counts: {days} days is shorter than the window of {window}")
    design = design_matrix(window, day_of_week=day_of_week)
    fit = _fit_batch(arr[:, days - window :], design, day_of_week, max_missing)
    return _result(
        fit,
        (regions,),
        window=window,
        day_of_week=day_of_week,
        level=level,
        dispersion=dispersion,
        clamp_dispersion=clamp_dispersion,
    )


def rolling_growth_rate(
    counts: ArrayLike,
    window: int = 14,
    *,
    day_of_week: bool = True,
    dispersion: Dispersion = "quasipoisson",
    clamp_dispersion: bool = True,
    level: float = 0.95,
    max_missing: int = 0,
) -> GrowthRate:
    """Growth rate r for every end day, from the trailing ``window`` days.

    Parameters are those of :func:`growth_rate`. The result is shaped (regions, days); the first
    ``window - 1`` days are NaN. Fits are batched over regions and end days together (in chunks of
    about 65 000 fits to bound memory).

    Returns
    -------
    GrowthRate
        Arrays shaped (regions, days).

    Notes
    -----
    Each end day t uses the model of :func:`growth_rate` on days ``t - w + 1 .. t``.

    References
    ----------
    .. [1] McCullagh, P., Nelder, J. A. (1989). Generalized Linear Models, 2nd ed.
    """
    arr, window, level, max_missing = _validate(
        counts, window, day_of_week, level, max_missing, dispersion
    )
    regions, days = arr.shape
    design = design_matrix(window, day_of_week=day_of_week)
    n_end = max(days - window + 1, 0)
    parts = [np.full((regions, days), np.nan) for _ in range(3)]
    conv = np.zeros((regions, days), dtype=bool)
    if n_end:
        views = sliding_window_view(arr, window, axis=1)  # (regions, n_end, window)
        step = max(1, _CHUNK_ROWS // n_end)
        for first in range(0, regions, step):  # chunks of regions, each fitted in one batch
            block = views[first : first + step].reshape(-1, window)
            r, var_r, phi, ok = _fit_batch(block, design, day_of_week, max_missing)
            rows = slice(first, first + step)
            for target, values in zip(parts, (r, var_r, phi), strict=True):
                target[rows, window - 1 :] = values.reshape(-1, n_end)
            conv[rows, window - 1 :] = ok.reshape(-1, n_end)
    return _result(
        (parts[0], parts[1], parts[2], conv),
        (regions, days),
        window=window,
        day_of_week=day_of_week,
        level=level,
        dispersion=dispersion,
        clamp_dispersion=clamp_dispersion,
    )
