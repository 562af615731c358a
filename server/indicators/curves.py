"""Growth curves: logistic (Verhulst) and generalised logistic (Richards) fits to case counts.

The cumulative curve is parametrised as

    C(t) = K / (1 + v exp(-a v (t - t0)))^(1/v),      K > 0, a > 0, v > 0,

which is Richards' curve ``K / (1 + Q exp(-a v (t - t0)))^(1/v)`` with ``Q = v``. With that choice
``t0`` is the inflection (turning-point) day for every ``v``, ``a`` is the early exponential growth
rate (for ``t << t0``, ``C(t) ~ K v^(-1/v) exp(a (t - t0))``) and ``v = 1`` is the logistic.

The daily count of day ``t`` is the increment of the curve: it is modelled as Poisson with mean
``C(t) - C(t - 1)`` and the fit maximises that likelihood. All regions, and all bootstrap draws,
are fitted at once by the batched Levenberg-Marquardt kernel the wave phase uses
(:mod:`server.indicators._richards`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from server.indicators._arrays import FloatArray, as_nonnegative_counts, check_level, check_window
from server.indicators._richards import (
    ITERATIONS,
    MU_FLOOR,
    SCREEN_ITERATIONS,
    fit_best,
    lm,
    mean_and_jac,
)

MODELS = ("logistic", "richards")
_LOGISTIC = np.array([True, True, True, False])
_RICHARDS = np.ones(4, dtype=bool)
#: Rows fitted together (bootstrap draws count as rows; memory stays bounded).
_CHUNK_ROWS = 2000
_LOG_A_BOUNDS = (np.log(1e-3), np.log(3.0))
_LOG_V_BOUNDS = (np.log(0.05), np.log(20.0))


@dataclass(frozen=True)
class CurveInterval:
    """A point estimate with the bounds of a bootstrap percentile interval (NaN when not fitted)."""

    estimate: FloatArray
    lower: FloatArray
    upper: FloatArray


@dataclass(frozen=True)
class CurveFit:
    """Result of :func:`fit_growth_curve`; arrays are shaped (regions,) unless said otherwise.

    ``turning_day`` counts days from the first column (0). ``projection`` is the cumulative count
    ``h`` days after the last column, shaped (regions, len(horizons)), with a prediction interval.
    ``share_reached`` is ``C(T) / K`` on the fitted curve at the last day ``T``: past 0.5 the
    logistic has turned. ``converged`` is False when the optimiser failed or K sits on its upper
    bound (still exponential: the final size is not identified).
    """

    model: str
    final_size: CurveInterval
    turning_day: CurveInterval
    rate: CurveInterval
    shape: CurveInterval
    peak_incidence: CurveInterval
    share_reached: CurveInterval
    horizons: tuple[int, ...]
    projection: CurveInterval
    last_cumulative: FloatArray
    dispersion: FloatArray
    deviance: FloatArray
    n_observed: NDArray[np.int64]
    converged: NDArray[np.bool_]
    level: float
    n_boot: int


def richards_cumulative(
    t: ArrayLike,
    final_size: ArrayLike,
    rate: ArrayLike,
    turning_day: ArrayLike,
    shape: ArrayLike = 1.0,
) -> FloatArray:
    """Cumulative Richards curve ``K / (1 + v exp(-a v (t - t0)))^(1/v)`` (broadcasting).

    Notes
    -----
    Computed in log space, ``log C = log K - log1p(v exp(-a v (t - t0))) / v`` with
    ``logaddexp`` so that neither tail overflows.

    References
    ----------
    Richards FJ (1959). A flexible growth function for empirical use. J Exp Bot 10:290-300.
    """
    t, k, a, t0, v = (
        np.asarray(x, dtype=np.float64) for x in (t, final_size, rate, turning_day, shape)
    )
    with np.errstate(invalid="ignore"):  # NaN parameters (unfitted regions) give NaN
        log1p_term = np.logaddexp(0.0, np.log(v) - a * v * (t - t0))
        return k * np.exp(-log1p_term / v)


def richards_inflection(final_size: ArrayLike, shape: ArrayLike) -> FloatArray:
    """Cumulative count at the turning point, ``K (1 + v)^(-1/v)`` (K/2 for the logistic).

    References
    ----------
    Richards FJ (1959). J Exp Bot 10:290-300.
    """
    k, v = np.asarray(final_size, dtype=np.float64), np.asarray(shape, dtype=np.float64)
    return k * (1.0 + v) ** (-1.0 / v)


def richards_peak_incidence(final_size: ArrayLike, rate: ArrayLike, shape: ArrayLike) -> FloatArray:
    """Peak of ``dC/dt = a C (1 - (C/K)^v)``: ``a K v (1 + v)^(-1 - 1/v)`` (``a K / 4`` if v = 1).

    References
    ----------
    Richards FJ (1959). J Exp Bot 10:290-300.
    """
    k, a, v = (np.asarray(x, dtype=np.float64) for x in (final_size, rate, shape))
    return a * k * v * (1.0 + v) ** (-1.0 - 1.0 / v)


def _deviance(y: FloatArray, w: FloatArray, mu: FloatArray) -> FloatArray:
    """Poisson deviance ``2 sum w [y log(y/mu) - (y - mu)]`` per row."""
    with np.errstate(divide="ignore", invalid="ignore"):
        term = np.where(y > 0, y * np.log(np.where(y > 0, y, 1.0) / mu), 0.0)
    return np.sum(w * np.maximum(2.0 * (term - (y - mu)), 0.0), axis=1)


def _bounds(days: int, total: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Per-row bounds of (log K, log a, t0, log v); ``total`` the count so far of each row."""
    n = len(total)
    lo = np.column_stack([np.log(np.maximum(0.5 * total, 1e-3)), np.full(n, _LOG_A_BOUNDS[0]),
                          np.full(n, -2.0 * days), np.full(n, _LOG_V_BOUNDS[0])])
    hi = np.column_stack([np.log(1e4 * total + 10.0), np.full(n, _LOG_A_BOUNDS[1]),
                          np.full(n, 5.0 * days), np.full(n, _LOG_V_BOUNDS[1])])
    return lo, hi


def _starts(t_last: float, total: FloatArray) -> list[FloatArray]:
    """Starting values: final size a multiple of the count so far, t0 from the logistic at T."""
    starts = []
    for mult in (1.3, 2.5, 6.0):
        for a in (0.08, 0.25):
            k = mult * total
            p = total / k
            t0 = t_last - np.log(p / (1.0 - p)) / a
            starts.append(np.column_stack([np.log(k), np.full(len(total), np.log(a)), t0,
                                           np.zeros(len(total))]))
    return starts


def _nb_draw(rng: np.random.Generator, mu: FloatArray, phi: FloatArray) -> FloatArray:
    """Counts with mean ``mu`` and variance ``phi mu`` (gamma-Poisson; Poisson where phi = 1);
    ``phi`` broadcasts against ``mu``."""
    phi = np.broadcast_to(phi, mu.shape)
    extra = phi > 1.0 + 1e-9
    lam = mu.copy()
    if extra.any():
        lam[extra] = rng.gamma(shape=mu[extra] / (phi[extra] - 1.0), scale=phi[extra] - 1.0)
    return rng.poisson(lam).astype(np.float64)


def _validate(model: str, horizons: tuple[int, ...], n_boot: int, min_days: int) -> None:
    if model not in MODELS:
        raise ValueError(f"model: expected one of {MODELS}, got {model!r}")
    if len(horizons) == 0:
        raise ValueError("horizons: at least one horizon is needed, got ()")
    for h in horizons:
        check_window("horizons", h)
    if isinstance(n_boot, bool) or not isinstance(n_boot, (int, np.integer)) or n_boot < 0:
        raise ValueError(f"n_boot: expected an integer >= 0, got {n_boot!r}")
    check_window("min_days", min_days, minimum=5)


def fit_growth_curve(
    counts: ArrayLike,
    *,
    model: str = "logistic",
    horizons: tuple[int, ...] = (7, 14),
    n_boot: int = 200,
    level: float = 0.95,
    seed: int = 0,
    min_days: int = 10,
) -> CurveFit:
    """Fit a logistic or Richards curve to daily counts by Poisson maximum likelihood.

    Parameters
    ----------
    counts : array_like, shape (regions, days)
        Daily new counts; NaN marks a missing day (left out of the likelihood).
    model : {"logistic", "richards"}
        ``logistic`` fixes ``v = 1``; ``richards`` also fits ``v``.
    horizons : tuple of int
        Days after the last column at which the cumulative count is projected.
    n_boot : int
        Parametric bootstrap draws for the intervals (0: point estimates only, bounds NaN).
    level : float
        Level of the percentile intervals.
    seed : int
        Seed of the bootstrap generator (results are reproducible).
    min_days : int
        Fewer observed days (or no case at all) leave the region unfitted (NaN).

    Returns
    -------
    CurveFit

    Notes
    -----
    Mean of the count of day t: ``mu_t = C(t) - C(t-1)``, ``C`` as in :func:`richards_cumulative`.
    The fit maximises the Poisson likelihood (minimises the deviance
    ``2 sum[y log(y/mu) - (y - mu)]``) for all regions at once
    (:mod:`server.indicators._richards`, the kernel of the wave phase), from six logistic starts
    per region (final size 1.3, 2.5 and 6 times the count so far, rate 0.08 and 0.25 a day);
    the Richards fit starts from the best logistic with ``v`` = 0.5, 1 and 2. Overdispersion is
    estimated quasi-Poisson style, ``phi = max(1, sum((y - mu)^2 / mu) / (n - p))``; the
    parametric bootstrap draws counts with mean ``mu`` and variance ``phi mu`` (gamma-Poisson),
    which inflates the intervals by roughly ``sqrt(phi)``. Each draw is refitted from the fit
    (all draws of all regions in one batch); intervals are percentiles of the refitted
    parameters. Projections add future counts drawn around each draw's curve to the observed
    cumulative count, so the prediction interval holds parameter and count noise. Before the
    turning point the final size is known to be underestimated and weakly identified (see
    :mod:`server.indicators.accuracy`).

    References
    ----------
    Richards FJ (1959). A flexible growth function for empirical use. J Exp Bot 10:290-300.
    Chowell G (2017). Fitting dynamic models to epidemic outbreaks with quantified uncertainty.
    Infect Dis Model 2:379-398. [memory]
    """
    y_all = as_nonnegative_counts("counts", counts)
    horizons = tuple(horizons)
    _validate(model, horizons, n_boot, min_days)
    level = check_level("level", level)
    return _fit_all(y_all, model, horizons, n_boot, level, seed, min_days)


def _fit_rows(y: FloatArray, w: FloatArray, t: FloatArray, total: FloatArray,
              free_shape: bool) -> tuple[FloatArray, FloatArray]:
    """Point fits of rows (chunked): the logistic from :func:`_starts`, then (Richards) from
    the best logistic with three shapes. Returns theta (rows, 4) and the upper bounds."""
    days = y.shape[1]
    theta = np.empty((len(y), 4))
    hi_all = np.empty((len(y), 4))
    for part in range(0, len(y), _CHUNK_ROWS):
        sl = slice(part, part + _CHUNK_ROWS)
        lo, hi = _bounds(days, total[sl])
        th, _ = fit_best(y[sl], w[sl], t, _starts(float(days - 1), total[sl]), _LOGISTIC, lo, hi)
        if free_shape:
            starts = [np.column_stack([th[:, :3], np.full(len(th), lv)])
                      for lv in (np.log(0.5), 0.0, np.log(2.0))]
            th, _ = fit_best(y[sl], w[sl], t, starts, _RICHARDS, lo, hi)
        theta[sl], hi_all[sl] = th, hi
    return theta, hi_all


def _refit(y: FloatArray, w: FloatArray, t: FloatArray, start: FloatArray,
           free_shape: bool) -> FloatArray:
    """Refit bootstrap rows from ``start`` (chunked), bounds from each draw's own total."""
    days = y.shape[1]
    theta = np.empty((len(y), 4))
    free = _RICHARDS if free_shape else _LOGISTIC
    for part in range(0, len(y), _CHUNK_ROWS):
        sl = slice(part, part + _CHUNK_ROWS)
        lo, hi = _bounds(days, np.maximum((w[sl] * y[sl]).sum(axis=1), 1.0))
        theta[sl], _ = lm(y[sl], w[sl], t, start[sl].copy(), free, lo, hi,
                          SCREEN_ITERATIONS + ITERATIONS)
    return theta


def _fit_all(
    y_all: FloatArray,
    model: str,
    horizons: tuple[int, ...],
    n_boot: int,
    level: float,
    seed: int,
    min_days: int,
) -> CurveFit:
    regions, days = y_all.shape
    free_shape = model == "richards"
    n_par = 4 if free_shape else 3
    rng = np.random.default_rng(seed)
    t_all = np.arange(days, dtype=np.float64)
    t_last = float(days - 1)
    h_max = max(horizons)
    t_future = t_last + np.arange(1, h_max + 1, dtype=np.float64)
    h_idx = np.asarray(horizons) - 1

    nan_r = np.full(regions, np.nan)
    theta_hat = np.full((regions, 4), np.nan)
    theta_boot = np.full((regions, n_boot, 4), np.nan)
    proj_boot = np.full((regions, n_boot, len(horizons)), np.nan)
    dispersion, deviance = nan_r.copy(), nan_r.copy()
    converged = np.zeros(regions, dtype=bool)
    observed = np.isfinite(y_all)
    n_obs = observed.sum(axis=1).astype(np.int64)
    last_cum = np.where(observed, y_all, 0.0).sum(axis=1)

    fit = np.flatnonzero((n_obs >= max(min_days, n_par + 2)) & (last_cum > 0))
    if fit.size:
        w = observed[fit].astype(np.float64)
        y = np.where(observed[fit], y_all[fit], 0.0)
        theta, hi = _fit_rows(y, w, t_all, last_cum[fit], free_shape)
        mu, _ = mean_and_jac(theta, t_all, jac=False)
        pearson = np.sum(w * (y - mu) ** 2 / mu, axis=1)
        phi = np.maximum(1.0, pearson / np.maximum(n_obs[fit] - n_par, 1))
        theta_hat[fit], dispersion[fit] = theta, phi
        deviance[fit] = _deviance(y, w, mu)
        converged[fit] = np.isfinite(theta).all(axis=1) & (theta[:, 0] <= hi[:, 0] - np.log(2.0))
        if n_boot:
            y_star = _nb_draw(rng, np.repeat(mu, n_boot, axis=0), np.repeat(phi, n_boot)[:, None])
            w_star = np.repeat(w, n_boot, axis=0)
            th_b = _refit(y_star * w_star, w_star, t_all, np.repeat(theta, n_boot, axis=0),
                          free_shape)
            theta_boot[fit] = th_b.reshape(fit.size, n_boot, 4)
            k, a, t0, v = (np.exp(th_b[:, 0]), np.exp(th_b[:, 1]), th_b[:, 2],
                           np.exp(th_b[:, 3]))
            grid = np.concatenate([[t_last], t_future])
            cum = richards_cumulative(grid[None, :], k[:, None], a[:, None], t0[:, None],
                                      v[:, None])
            future = _nb_draw(rng, np.maximum(np.diff(cum, axis=1), MU_FLOOR),
                              np.repeat(phi, n_boot)[:, None])
            proj = np.repeat(last_cum[fit], n_boot)[:, None] + np.cumsum(future, axis=1)[:, h_idx]
            proj_boot[fit] = proj.reshape(fit.size, n_boot, len(horizons))

    return _assemble(
        model, theta_hat, theta_boot, proj_boot, t_last, t_future, h_idx, last_cum,
        dispersion, deviance, n_obs, converged, level, n_boot, horizons,
    )


def _interval(estimate: FloatArray, draws: FloatArray, level: float) -> CurveInterval:
    """Percentile interval over axis 1 of ``draws`` (NaN where there are no draws)."""
    if draws.shape[1] == 0 or np.all(np.isnan(draws)):
        nan = np.full(estimate.shape, np.nan)
        return CurveInterval(estimate=estimate, lower=nan, upper=nan.copy())
    tail = 100.0 * (1.0 - level) / 2.0
    fitted = ~np.all(np.isnan(draws), axis=1)
    lower = np.full(estimate.shape, np.nan)
    upper = np.full(estimate.shape, np.nan)
    lower[fitted] = np.nanpercentile(draws[fitted], tail, axis=1)
    upper[fitted] = np.nanpercentile(draws[fitted], 100.0 - tail, axis=1)
    return CurveInterval(estimate=estimate, lower=lower, upper=upper)


def _assemble(
    model: str,
    theta_hat: FloatArray,
    theta_boot: FloatArray,
    proj_boot: FloatArray,
    t_last: float,
    t_future: FloatArray,
    h_idx: NDArray[np.int64],
    last_cum: FloatArray,
    dispersion: FloatArray,
    deviance: FloatArray,
    n_obs: NDArray[np.int64],
    converged: NDArray[np.bool_],
    level: float,
    n_boot: int,
    horizons: tuple[int, ...],
) -> CurveFit:
    def natural(theta: FloatArray) -> tuple[FloatArray, ...]:
        return np.exp(theta[..., 0]), np.exp(theta[..., 1]), theta[..., 2], np.exp(theta[..., 3])

    k, a, t0, v = natural(theta_hat)
    kb, ab, t0b, vb = natural(theta_boot)
    share = richards_cumulative(t_last, k, a, t0, v) / k
    share_b = richards_cumulative(t_last, kb, ab, t0b, vb) / kb
    peak, peak_b = richards_peak_incidence(k, a, v), richards_peak_incidence(kb, ab, vb)
    c_now = richards_cumulative(t_last, k, a, t0, v)
    c_future = richards_cumulative(
        t_future[None, :], k[:, None], a[:, None], t0[:, None], v[:, None]
    )
    proj = last_cum[:, None] + (c_future - c_now[:, None])[:, h_idx]

    regions, n_h = proj.shape
    flat = np.moveaxis(proj_boot, 1, 2).reshape(regions * n_h, n_boot)
    proj_iv = _interval(proj.reshape(-1), flat, level)
    projection = CurveInterval(
        estimate=proj,
        lower=proj_iv.lower.reshape(regions, n_h),
        upper=proj_iv.upper.reshape(regions, n_h),
    )
    return CurveFit(
        model=model,
        final_size=_interval(k, kb, level),
        turning_day=_interval(t0, t0b, level),
        rate=_interval(a, ab, level),
        shape=_interval(v, vb, level),
        peak_incidence=_interval(peak, peak_b, level),
        share_reached=_interval(share, share_b, level),
        horizons=horizons,
        projection=projection,
        last_cumulative=last_cum,
        dispersion=dispersion,
        deviance=deviance,
        n_observed=n_obs,
        converged=converged,
        level=level,
        n_boot=n_boot,
    )
