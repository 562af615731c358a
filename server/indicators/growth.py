"""Exponential growth rate r from a log-linear Poisson regression, with doubling or halving time.

The model for the last ``window`` days (default 14) of each region is

    log E[y_t] = b0 + r t + sum_{d=1}^{6} g_d [t mod 7 = d]

fitted by maximum likelihood, batched across regions (and, for the rolling version, across end
days). The intercept and weekday dummies span one intercept per weekday level, whose estimates
have closed forms given r, so r maximises a one-dimensional concave profile likelihood. For a
window with every day observed the profile depends on the counts only through a few window sums
(level totals and position-weighted totals, sums of shifted views of the series), so each fit is
a short Newton iteration on scalars (:func:`_fit_complete`); windows with missing days go through
the general level fit of :mod:`server.indicators._levelfit`, and windows whose estimate does not
exist through plain IRLS (:func:`_fit_batch`). Day-of-week indicators are taken relative to the
window's first day; that is a relabelling of the weekdays, so r, its standard error and the
fitted values are those of a fit with calendar weekdays.
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
    flat_chunks,
    freeze_arrays,
)
from server.indicators._levelfit import (
    MAX_NEWTON_ITER,
    STEP_TOL,
    Levels,
    fit_levels,
    newton_step,
)

BoolArray = NDArray[np.bool_]
Dispersion = Literal["quasipoisson", "poisson"]

__all__ = ["GrowthRate", "design_matrix", "growth_rate", "rolling_growth_rate"]

_LN2 = float(np.log(2.0))
_CHUNK_ROWS = 4096
_CHUNK_WINDOWS = 32_768  # windows per block of the complete-window solver
_MAX_ITER = 100
_TOL = 1e-10
_BETA_CLIP = 50.0
_START_RANGE = 12.0
_START_POINTS = 4801


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
        Whether the fit converged (False also where the fit was refused).
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
    level_of = np.arange(n) % 7 if day_of_week else np.zeros(n, dtype=np.int64)
    onehot = (level_of[:, None] == np.arange(level_of.max() + 1)[None, :]).astype(np.float64)
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


def _fit_windows(
    seg: FloatArray,
    n_end: int,
    window: int,
    day_of_week: bool,
    max_missing: int,
    out: tuple[FloatArray, FloatArray, FloatArray, BoolArray] | None = None,
) -> tuple[FloatArray, FloatArray, FloatArray, BoolArray]:
    """Fit the windows ``seg[:, e : e + window]`` for ``e < n_end``; results shaped (rows, n_end).

    ``out`` (r, var(r) at scale 1, Pearson dispersion, converged), if given, must hold NaN and
    False; it is filled in place and returned.

    Windows without a missing day whose maximum-likelihood estimate exists (nearly all of them)
    are solved by :func:`_fit_complete` from a few window sums, in blocks of regions that stay
    in cache. The others that are not refused (windows with missing days allowed by
    ``max_missing``, windows without a finite estimate, Newton not converged) are fitted as
    single rows by :func:`_fit_batch`.
    """
    rows = seg.shape[0]
    if out is None:
        out = (
            np.full((rows, n_end), np.nan),
            np.full((rows, n_end), np.nan),
            np.full((rows, n_end), np.nan),
            np.zeros((rows, n_end), dtype=bool),
        )
    general = np.zeros((rows, n_end), dtype=bool)
    step = max(1, _CHUNK_WINDOWS // n_end)
    for first in range(0, rows, step):
        part = slice(first, first + step)
        views_out = (out[0][part], out[1][part], out[2][part], out[3][part])
        general[part] = _fit_complete(seg[part], n_end, window, day_of_week, max_missing, views_out)
    ri, ei = np.nonzero(general)
    if ri.size:
        views = sliding_window_view(seg, window, axis=1)  # (rows, n_end, window), no copy
        design = design_matrix(window, day_of_week=day_of_week)
        for first in range(0, ri.size, _CHUNK_ROWS):
            r_i, e_i = ri[first : first + _CHUNK_ROWS], ei[first : first + _CHUNK_ROWS]
            fit = _fit_batch(views[r_i, e_i], design, day_of_week, max_missing)
            for target, values in zip(out, fit, strict=True):
                target[r_i, e_i] = values
    return out


def _fit_complete(
    block: FloatArray,
    n_end: int,
    n: int,
    day_of_week: bool,
    max_missing: int,
    out: tuple[FloatArray, FloatArray, FloatArray, BoolArray],
) -> BoolArray:
    """Fit the complete windows of ``block`` in place in ``out``; return the windows left over.

    Window day i is in weekday level ``i mod P`` (P = 7, or 1 without weekdays) at position
    ``j = i // P`` in it; a level has m or m + 1 days (m = n // P, the first ``n mod P`` levels
    m + 1). With every day observed, the profile score of :func:`_levelfit.fit_levels` depends
    on the counts only through the level totals :math:`Y_k` and :math:`S = \\sum_i y_i x_i`,
    where :math:`x_i = j_i - (m_{k_i} - 1)/2` is the centred position within the level:

    .. math:: \\ell'(\\beta) / P = S - Y_a \\bar x_{m+1}(\\beta) - Y_b \\bar x_m(\\beta),
              \\quad \\beta = P r,

    with :math:`\\bar x_M(\\beta)` the mean of :math:`x` under weights :math:`e^{\\beta x}` over
    M positions and :math:`Y_a, Y_b` the totals of the levels of m + 1 and m days. Each window's
    Newton iteration is then a handful of operations on scalars, started from the exact
    solution for one level size (interpolated in a table otherwise, from :math:`S / Y`); the
    score itself is evaluated from the end of each level the weights favour (``top`` and
    ``bottom`` below), which avoids cancellation. The estimate is that of
    ``fit_levels`` (same bracketing, stopping rule and existence conditions), the variance
    :math:`1 / (P^2 (Y_a V_{m+1} + Y_b V_m))` its inverse profile curvature, the Pearson
    statistic summed over the window days with :math:`\\mu_i = Y_k e^{\\beta x_i} /
    \\sum_{x} e^{\\beta x}`.
    """
    period = 7 if day_of_week else 1
    p = 8 if day_of_week else 2
    m, extra = divmod(n, period)
    rows = block.shape[0]
    missing = np.isnan(block)
    y = np.where(missing, 0.0, block)
    cols = [y[:, i : i + n_end] for i in range(n)]
    seen = np.zeros((rows, n + n_end), dtype=np.int32)
    np.cumsum(missing, axis=1, out=seen[:, 1 : block.shape[1] + 1])
    n_missing = seen[:, n : n + n_end] - seen[:, :n_end]
    n_obs = n - n_missing
    level_sums = [_add(cols[k::period]) for k in range(period)]
    ok = (n_obs >= n - max_missing) & (n_obs - p >= 1)
    for total in level_sums:
        ok &= total > 0
    # a finite estimate needs a count off the last and one off the first day of its level
    below = _add(cols[: n - period]) > 0
    above = _add(cols[period:]) > 0
    fast = ok & (n_missing == 0) & below & above
    big_y = _add(level_sums)
    big_ya = _add(level_sums[:extra]) if extra else np.zeros_like(big_y)
    sizes = [m + 1 if i % period < extra else m for i in range(n)]
    pos = [i // period - (sizes[i] - 1) / 2.0 for i in range(n)]
    score0 = _add([c * x for c, x in zip(cols, pos, strict=True) if x != 0.0])
    bottom = _add([c * (i // period) for i, c in enumerate(cols) if i >= period])
    top = _add([c * (i // period + 1 - sizes[i]) for i, c in enumerate(cols) if i + period < n])

    idx = np.flatnonzero(fast)
    ya, yy, s0 = big_ya.ravel()[idx], big_y.ravel()[idx], score0.ravel()[idx]
    top_f, bottom_f = top.ravel()[idx], bottom.ravel()[idx]
    yb = yy - ya
    beta = _newton_start(s0 / yy, m, extra, period)
    span = float(n - 1)
    tol = STEP_TOL * period / span  # |step in r| * (n - 1) < STEP_TOL, as in fit_levels
    max_step = 5.0 * period / span
    lo = np.full(idx.size, -np.inf)
    hi = np.full(idx.size, np.inf)
    active = np.arange(idx.size)
    last_curv = np.full(idx.size, np.nan)
    for _ in range(MAX_NEWTON_ITER):
        if active.size == 0:
            break
        grad, curv = _score(
            beta[active], top_f[active], bottom_f[active], ya[active], yb[active], m, extra
        )
        last_curv[active] = curv
        new, done = newton_step(beta, lo, hi, active, grad, curv, tol, max_step)
        beta[active] = new
        active = active[~done]
    converged = np.ones(idx.size, dtype=bool)
    converged[active] = False
    with np.errstate(divide="ignore", invalid="ignore"):
        var_beta = 1.0 / last_curv  # at the last iterate, within the step tolerance of beta
    converged &= np.isfinite(var_beta) & (last_curv > 0)
    done_idx = idx[converged]
    fast.ravel()[idx[~converged]] = False

    beta_2d = np.zeros(big_y.shape)
    beta_2d.ravel()[done_idx] = beta[converged]
    weights = {}
    for size in set(sizes):
        w, total = _level_weights(beta_2d, size)
        weights[size] = [x / total for x in w]
    pearson = np.zeros(big_y.shape)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        for i, col in enumerate(cols):
            mu = level_sums[i % period] * weights[sizes[i]][i // period]
            pearson += (col - mu) ** 2 / mu
    r_out, var_out, phi_out, conv_out = out  # possibly strided views: boolean-mask writes
    r_out[fast] = beta[converged] / period
    var_out[fast] = var_beta[converged] / period**2
    phi_out[fast] = pearson[fast] / (n - p)
    conv_out[fast] = True
    return ok & ~fast


def _add(arrays: list[FloatArray]) -> FloatArray:
    """Elementwise sum of a non-empty list of equally shaped arrays."""
    total = arrays[0].copy()
    for a in arrays[1:]:
        total += a
    return total


def _level_weights(beta: FloatArray, size: int) -> tuple[list[FloatArray], FloatArray]:
    """Weights ``e^{beta (j - ref)}`` of the positions j < size of a level, and their sum.

    ``ref`` is the heaviest end (``size - 1`` where beta > 0, else 0), so every weight is at
    most 1 and the sum at least 1; the weights are built by repeated multiplication from two
    exponentials whatever ``size``.
    """
    b = np.clip(beta, -_BETA_CLIP, _BETA_CLIP)
    q = np.exp(b)
    w = np.exp(-np.maximum(b, 0.0) * (size - 1))
    weights = [w]
    for _ in range(size - 1):
        w = w * q
        weights.append(w)
    return weights, _add(weights)


def _moments(beta: FloatArray, size: int) -> tuple[FloatArray, FloatArray]:
    """Mean of ``j - ref`` and variance of j (j < size) under the weights ``e^{beta j}``.

    Measured from the heavy end ``ref`` (``size - 1`` where beta > 0, else 0) the weights are
    ``q^k`` with ``q = e^{-|beta|}`` and k the distance from that end, so the mean and
    variance keep full relative precision where the weights are concentrated and the score of
    :func:`_score` has no cancellation. The three power sums are evaluated by Horner's rule, in
    place.
    """
    q = np.exp(-np.minimum(np.abs(beta), _BETA_CLIP))
    total = np.ones_like(q)
    s1 = np.full_like(q, size - 1.0)
    s2 = np.full_like(q, (size - 1.0) ** 2)
    for k in range(size - 2, -1, -1):
        for acc, coef in ((total, 1.0), (s1, float(k)), (s2, float(k * k))):
            acc *= q
            if coef:
                acc += coef
    mean = s1 / total
    var = np.maximum(s2 / total - mean * mean, 0.0)
    return np.where(beta > 0, -mean, mean), var


def _score(
    beta: FloatArray, top: FloatArray, bottom: FloatArray, ya: FloatArray, yb: FloatArray,
    m: int, extra: int,
) -> tuple[FloatArray, FloatArray]:
    """Profile score and curvature in ``beta`` (both divided by the period).

    ``top`` and ``bottom`` are :math:`\\sum_i y_i (j_i - m_{k_i} + 1)` and
    :math:`\\sum_i y_i j_i`: the score measured from the end each level's weights favour.
    """
    mean_b, var_b = _moments(beta, m)
    grad = np.where(beta > 0, top, bottom) - yb * mean_b
    curv = yb * var_b
    if extra:
        mean_a, var_a = _moments(beta, m + 1)
        grad -= ya * mean_a
        curv += ya * var_a
    return grad, curv


def _newton_start(u: FloatArray, m: int, extra: int, period: int) -> FloatArray:
    """Start for beta: the root for levels of one size (exact for two days, else a table)."""
    if extra == 0 and m == 2:
        with np.errstate(divide="ignore", invalid="ignore"):
            start = np.log((0.5 + u) / (0.5 - u))
        return np.where(np.isfinite(start), start, 0.0)
    grid = np.linspace(-_START_RANGE, _START_RANGE, _START_POINTS)
    mean = np.zeros_like(grid)
    for size, share in ((m, period - extra), (m + 1, extra)):
        if share:  # mean of the centred position x = j - (size - 1) / 2
            offset = np.where(grid > 0, size - 1, 0.0) - (size - 1) / 2.0
            mean += share * (_moments(grid, size)[0] + offset)
    mean /= period
    return np.interp(u, mean, grid)


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
    z = float(special.ndtri(0.5 + level / 2.0))
    outputs = [np.empty(shape) for _ in range(7)]
    flat_in = [a.reshape(-1) for a in (r, var_r, phi)]
    flat_out = [a.reshape(-1) for a in outputs]
    for part in flat_chunks(r.size):  # elementwise, in pieces that stay in cache
        r_p, var_p, phi_p = (a[part] for a in flat_in)
        if dispersion == "poisson":
            scale = np.where(np.isnan(phi_p), np.nan, 1.0)
        else:
            scale = np.maximum(phi_p, 1.0) if clamp_dispersion else phi_p
        se = np.sqrt(scale * var_p)
        lo, hi = r_p - z * se, r_p + z * se
        values = (lo, hi, se, scale, *_doubling(r_p, lo, hi))
        for target, value in zip(flat_out, values, strict=True):
            target[part] = value
    lo, hi, se, scale, dt, dt_lo, dt_hi = outputs
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
    fit = _fit_windows(arr[:, days - window :], 1, window, day_of_week, max_missing)
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
    ``window - 1`` days are NaN. Fits are batched over regions and end days together, in blocks
    of about 32 000 windows whose temporaries stay in cache.

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
    n_end = max(days - window + 1, 0)
    parts = [np.full((regions, days), np.nan) for _ in range(3)]
    conv = np.zeros((regions, days), dtype=bool)
    if n_end:
        views = (parts[0][:, window - 1 :], parts[1][:, window - 1 :],
                 parts[2][:, window - 1 :], conv[:, window - 1 :])
        _fit_windows(arr, n_end, window, day_of_week, max_missing, out=views)
    return _result(
        (parts[0], parts[1], parts[2], conv),
        (regions, days),
        window=window,
        day_of_week=day_of_week,
        level=level,
        dispersion=dispersion,
        clamp_dispersion=clamp_dispersion,
    )
