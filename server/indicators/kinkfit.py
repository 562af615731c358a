"""The continuous piecewise log-linear Poisson model of :mod:`server.indicators.changepoints`:
its fit for given kinks (and level shifts), and the covariances of its coefficients.

``log mu_t = a + b s_t + sum_k d_k h_k(t) + sum_m c_m 1(t >= L_m) + g_{t mod 7}`` (see
:class:`KinkFit`). The fit is Newton's method on all regions at once; the covariances are the
model-based one (:attr:`KinkFit.covariance`), Muggeo's with the kink dates free
(:func:`date_aware_covariance`), the long-run (block) dispersion that scales them
(:func:`block_dispersion`) and a Newey-West sandwich (:func:`hac_covariance`). No database, web
or clock here.
"""

from __future__ import annotations

from dataclasses import dataclass, fields
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import special, stats

from server.indicators._arrays import FloatArray, IntArray, as_nonnegative_counts, freeze_arrays
from server.indicators._segmentation import (
    WEEK,
    check_int,
    line_design,
    prefix_sums,
    sort_kinks,
    step_columns,
)
from server.indicators.sandwich import hac_sandwich

BoolArray = NDArray[np.bool_]
Dispersion = Literal["quasipoisson", "poisson"]

__all__ = [
    "KinkFit",
    "block_dispersion",
    "date_aware_covariance",
    "fit_kinks",
    "hac_covariance",
    "kink_design",
    "smooth_ramp",
]

_WEEK = WEEK
_MAX_NEWTON = 60
_NEWTON_TOL = 1e-10
_CHUNK_ROWS = 64
_check_int = check_int



@dataclass(frozen=True, eq=False)
class KinkFit:
    """Maximum-likelihood fit of the continuous piecewise log-linear model for given kinks.

    ``log mu_t = a + b s_t + sum_k d_k h_k(t) + sum_m c_m 1(t >= L_m) + g_{t mod 7}`` with
    ``s_t = (t - (n - 1)/2) / n``, hinges ``h_k(t) = (t - tau_k)_+ / n`` and level shifts
    ``L_m`` (testing changes), ``g_0 = 0``.

    Attributes
    ----------
    kinks : ndarray of int, shape (regions, K)
        Sorted kink days tau_k, -1 after the last (its column is all zero, coefficient 0).
    level_shifts : ndarray of int, shape (regions, M)
        Level-shift days, -1 for none.
    coef : ndarray, shape (regions, p)
        ``(a, b, d_1..d_K, c_1..c_M, g_1..g_6)`` (no ``g`` without weekday effects).
    covariance : ndarray, shape (regions, p, p)
        Inverse Fisher information at unit dispersion (multiply by ``dispersion``).
    dispersion : ndarray, shape (regions,)
        Pearson chi-square over ``n - p - K`` (a date per kink counted), at least 1 for
        quasi-Poisson; 1 for Poisson.
    loglik : ndarray, shape (regions,)
        Poisson log-likelihood without the ``log y!`` term.
    mu : ndarray, shape (regions, days)
        Fitted means (NaN on missing days).
    converged : ndarray of bool, shape (regions,)
    """

    kinks: IntArray
    level_shifts: IntArray
    coef: FloatArray
    covariance: FloatArray
    dispersion: FloatArray
    loglik: FloatArray
    mu: FloatArray
    converged: BoolArray

    def __post_init__(self) -> None:
        freeze_arrays(self)


def _weekday_columns(n: int) -> FloatArray:
    cls = np.arange(n) % _WEEK
    return np.asarray((cls[:, None] == np.arange(1, _WEEK)[None, :]), dtype=np.float64)


def kink_design(n: int, kinks: IntArray, level_shifts: IntArray | None = None,
                day_of_week: bool = True, ramp: FloatArray | None = None) -> FloatArray:
    """Design of :class:`KinkFit`: shape (regions, n, p), zero columns for -1 entries; with
    ``ramp`` (:func:`smooth_ramp`, its first row) the hinges are smoothed."""
    return line_design(n, kinks, _extra_columns(n, kinks.shape[0], level_shifts, day_of_week),
                       None if ramp is None else ramp[0])


def smooth_ramp(n: int, si_mean: float, si_sd: float, delay_mean: float,
                delay_sd: float, step: float = 0.02) -> FloatArray:
    """The hinge smoothed by the generation interval and the infection-to-report delay, and
    its slope: shape (2, 2 n + 1), row 0 ``K(u)`` and row 1 ``K'(u)`` at ``u = -n .. n``
    (days after the kink ``tau``).

    A step of ``log R`` by ``delta`` at day ``s`` perturbs log incidence of the renewal
    equation ``i_t = R_t sum_a w_a i_{t-a}`` (linearised about constant incidence) by
    ``delta U(t - s)``, ``U`` the renewal function of the generation interval ``T``
    (``U(x) = sum_{m >= 0} P(T_1 + .. + T_m <= x)``, the m = 0 term the step itself); cases
    by report date add a delay ``D``, so log expected cases move by
    ``delta E_D U(t - s - D)``. For large x, ``U(x) = x / mu + E[T^2] / (2 mu^2) + o(1)``
    (the renewal theorem's second-order term, Cox 1962, Renewal Theory, 4.5; Feller 1971,
    XI.3), so ``K(u) = mu E_D U(u + lag - D)`` with ``lag = E[D] - E[T^2] / (2 mu)`` tends
    to ``u``: the smoothed column has the plain hinge's asymptote and its coefficient is the
    same change of growth rate (``delta / mu``, the linear term of Wallinga & Lipsitch 2007,
    eq. 2.9, at r = 0), and the kink day ``tau = s + lag`` is the one the plain kink is
    read with. ``T`` and ``D`` are gamma (mean, SD given); both are evaluated on a grid of
    ``step`` days, ``K`` from ``u = -n`` to the day where it is within 1e-9 of ``u`` and
    equal to ``max(u, 0)`` outside. Linearised at zero growth: the tilt of ``w`` by the
    current growth rate (Wallinga & Lipsitch 2007) is ignored.
    """
    for name, v in (("si_mean", si_mean), ("si_sd", si_sd)):
        if not (np.isfinite(v) and v > 0):
            raise ValueError(f"{name}: must be a finite number > 0, got {v!r}")
    for name, v in (("delay_mean", delay_mean), ("delay_sd", delay_sd)):
        if not (np.isfinite(v) and v >= 0):
            raise ValueError(f"{name}: must be a finite number >= 0, got {v!r}")
    mu = float(si_mean)
    lag = delay_mean - (si_sd**2 + mu**2) / (2.0 * mu)
    shape, scale = (mu / si_sd) ** 2, si_sd**2 / mu
    if delay_sd > 0 and delay_mean > 0:
        d_hi = float(stats.gamma.ppf(1 - 1e-9, (delay_mean / delay_sd) ** 2,
                                     scale=delay_sd**2 / delay_mean))
    else:
        d_hi = delay_mean
    reach = d_hi + 25.0 * mu + 10.0 * si_sd  # the renewal function is at its asymptote
    x = np.arange(0.0, reach + abs(lag) + 2.0, step)
    terms = np.arange(1, int(3 * x[-1] / mu) + 40)
    u_x = 1.0 + special.gammainc(shape * terms[:, None], x[None, :] / scale).sum(axis=0)
    if delay_sd > 0 and delay_mean > 0:
        ds = np.diff(stats.gamma.cdf(np.arange(0.0, d_hi + 2 * step, step) - step / 2,
                                     (delay_mean / delay_sd) ** 2,
                                     scale=delay_sd**2 / delay_mean).clip(0.0))
        ds = ds / ds.sum()
        shift = 0.0
    else:
        ds = np.ones(1)
        shift = delay_mean
    # E_D U(x - D) on the grid (U = 0 left of 0)
    conv = np.convolve(u_x, ds)[: x.size]
    u = np.arange(-n, n + 1, dtype=np.float64)
    arg = u + lag - shift
    k = mu * np.interp(arg, x, conv, left=0.0, right=np.nan)
    slope_grid = np.gradient(conv, step)
    ks = mu * np.interp(arg, x, slope_grid, left=0.0, right=np.nan)
    far = ~np.isfinite(k)
    k[far] = u[far]
    ks[far] = 1.0
    done = np.flatnonzero((np.abs(k - u) < 1e-9) & (u > 0))
    if done.size:
        k[done[0]:] = u[done[0]:]
        ks[done[0]:] = 1.0
    return np.stack([k, ks])


def _extra_columns(n: int, rows: int, level_shifts: IntArray | None,
                   day_of_week: bool) -> FloatArray | None:
    """The level-shift and weekday columns of :func:`kink_design`, shape (rows, n, m)."""
    steps = step_columns(n, level_shifts, rows)
    extra = [] if steps is None else [steps]
    if day_of_week:
        extra.append(np.broadcast_to(_weekday_columns(n), (rows, n, _WEEK - 1)))
    return np.concatenate(extra, axis=2) if extra else None


def _normalise_days(name: str, days: ArrayLike | None, rows: int, n: int) -> IntArray:
    """``days`` as (rows, k) day indices in 1..n-1 (-1: none), refused naming ``name``."""
    if days is None:
        return np.zeros((rows, 0), dtype=np.int64)
    d = np.asarray(days)
    if d.ndim == 1:
        d = np.broadcast_to(d, (rows, d.shape[0]))
    if d.ndim != 2 or d.shape[0] != rows:
        raise ValueError(f"{name}: expected shape (regions, k) with {rows} regions, got "
                         f"{d.shape}")
    if d.size and not np.issubdtype(d.dtype, np.integer):
        raise ValueError(f"{name}: day indices must be integers (-1 for none)")
    d = np.asarray(d, dtype=np.int64)
    if np.any((d != -1) & ((d < 1) | (d >= n))):
        raise ValueError(f"{name}: day indices must lie in 1..{n - 1} (-1 for none)")
    return d


def fit_kinks(
    counts: ArrayLike,
    kinks: ArrayLike,
    *,
    level_shifts: ArrayLike | None = None,
    dispersion: Dispersion = "quasipoisson",
    day_of_week: bool = True,
    ramp: FloatArray | None = None,
) -> KinkFit:
    """Fit the continuous piecewise log-linear Poisson model with given kinks.

    Parameters
    ----------
    counts : array_like, shape (regions, days)
        Daily counts; NaN for a missing day.
    kinks : array_like of int, shape (regions, k) or (k,)
        Days at which the growth rate changes (1 .. days - 1), -1 for none; any order.
    level_shifts : array_like of int, shape (regions, m) or (m,), optional
        Days from which the level may jump (testing changes), -1 for none.
    dispersion : {'quasipoisson', 'poisson'}
    day_of_week : bool
        Include the six weekday effects.
    ramp : ndarray, optional
        :func:`smooth_ramp`: smoothed hinge columns ``K(t - tau) / n`` instead of
        ``(t - tau)_+ / n`` (the model is still a GLM for fixed kink days).

    Returns
    -------
    KinkFit

    Notes
    -----
    A Poisson GLM with log link on the design of :class:`KinkFit`, fitted by Newton's method
    (Fisher scoring, the same for the canonical link) with step halving, all regions at once:
    :math:`X^T W X` by batched matrix products. Converged when every step is below 1e-10.
    The design is the same as a GLM library's given the same columns, so the estimates agree
    with ``statsmodels.GLM`` to its convergence tolerance (McCullagh & Nelder 1989, ch. 2 and
    6). Hinge columns are continuous in t: the growth rate changes at a kink and the level
    does not jump, the shape a step in transmission takes once the infection-to-report delay
    has smeared it (see :func:`detect_changepoints`).
    """
    y = as_nonnegative_counts("counts", counts)
    rows, n = y.shape
    if dispersion not in ("quasipoisson", "poisson"):
        raise ValueError(f"dispersion: must be 'quasipoisson' or 'poisson', got {dispersion!r}")
    k = _normalise_days("kinks", kinks, rows, n)
    k = sort_kinks(k)
    if k.shape[1] > 1 and np.any((np.diff(k, axis=1) == 0) & (k[:, 1:] >= 0)):
        raise ValueError("kinks: a day appears twice in one region")
    shifts = _normalise_days("level_shifts", level_shifts, rows, n)
    return _fit_kinks(y, k, shifts, dispersion, day_of_week, ramp=ramp)


def _fit_kinks(y: FloatArray, k: IntArray, shifts: IntArray, dispersion: str,
               day_of_week: bool = True, start: FloatArray | None = None,
               ramp: FloatArray | None = None) -> KinkFit:
    """:func:`fit_kinks` on checked arguments (``k`` sorted), Newton's method from ``start``
    (coefficients laid out as :attr:`KinkFit.coef`) where given and finite."""
    rows, kmax = k.shape
    # blocks of rows with similar numbers of kinks, each fitted with only as many hinge
    # columns as its rows use (an unused column is all zero and its coefficient 0 anyway)
    count = (k >= 0).sum(axis=1)
    order = np.argsort(count, kind="stable")
    parts = []
    for i in range(0, max(rows, 1), _CHUNK_ROWS):
        s = order[i : i + _CHUNK_ROWS]
        used = int(count[s].max()) if s.size else 0
        part = _kink_rows(y[s], k[s, :used], shifts[s], dispersion, day_of_week,
                          None if start is None else _drop_hinges(start[s], used, kmax),
                          ramp)
        parts.append((part[0] if used == kmax else _pad_hinges(part[0], used, kmax, 1),
                      part[1] if used == kmax else _pad_hinges(
                          _pad_hinges(part[1], used, kmax, 1), used, kmax, 2),
                      *part[2:]))
    out = [np.concatenate([p[i] for p in parts], axis=0) for i in range(len(parts[0]))]
    back = np.empty_like(order)
    back[order] = np.arange(order.size)
    coef, cov, *rest = (a[back] for a in out)
    bad = ~rest[-1]  # not converged: every coefficient and covariance NaN, padding included
    coef[bad] = np.nan
    cov[bad] = np.nan
    fit = KinkFit(k, shifts, coef, cov, *rest)
    if start is None:
        return fit
    again = np.flatnonzero(~fit.converged & np.all(np.isfinite(start), axis=1))
    if again.size == 0:  # a warm start that did not converge: once more from the flat one
        return fit
    return _kink_replace(fit, again, _fit_kinks(y[again], k[again], shifts[again], dispersion,
                                                 day_of_week, ramp=ramp))


def _drop_hinges(coef: FloatArray, used: int, kmax: int) -> FloatArray:
    """Coefficients laid out as :attr:`KinkFit.coef` without the hinge columns from
    ``used`` on."""
    return np.concatenate([coef[:, : 2 + used], coef[:, 2 + kmax :]], axis=1)


def _pad_hinges(a: FloatArray, used: int, kmax: int, axis: int) -> FloatArray:
    """Inverse of :func:`_drop_hinges` along ``axis`` (1 or 2): zeros for the unused hinge
    columns (their coefficient and covariance are 0)."""
    shape = list(a.shape)
    shape[axis] = kmax - used
    zeros = np.zeros(shape)
    head = np.take(a, np.arange(2 + used), axis=axis)
    tail = np.take(a, np.arange(2 + used, a.shape[axis]), axis=axis)
    return np.concatenate([head, zeros, tail], axis=axis)


def _moved_start(coef: FloatArray, moved: IntArray) -> tuple[IntArray, FloatArray]:
    """Sorted kinks of ``moved`` (each row's kinks of a fit with coefficients ``coef`` at new
    days, -1 where dropped, any order) and those coefficients carried over to them as a
    starting point (a dropped kink's slope change 0)."""
    kmax = moved.shape[1]
    big = np.iinfo(np.int64).max
    order = np.argsort(np.where(moved >= 0, moved, big), axis=1, kind="stable")
    d = np.where(moved >= 0, coef[:, 2 : 2 + kmax], 0.0)
    start = np.array(coef, copy=True)
    start[:, 2 : 2 + kmax] = np.take_along_axis(d, order, axis=1)
    return sort_kinks(moved), start


def _kink_rows(y: FloatArray, kinks: IntArray, shifts: IntArray, dispersion: str,
               day_of_week: bool, start: FloatArray | None = None,
               ramp: FloatArray | None = None) -> tuple[FloatArray, ...]:
    rows, n = y.shape
    # the columns other than the weekday indicators, laid out (rows, q, days) so that every
    # product over days is one batched matrix product; the weekday columns' products are
    # sums per weekday class (a product with the (days, 6) indicator matrix), so the
    # information costs q^2 + 7 q sums a day instead of p^2 (McCullagh & Nelder 1989, 2.5:
    # X' W X of the design of kink_design, the same numbers)
    xq = np.ascontiguousarray(line_design(
        n, kinks, step_columns(n, shifts if shifts.shape[1] else None, rows),
        None if ramp is None else ramp[0]).transpose(0, 2, 1))
    q = xq.shape[1]
    wk = _weekday_columns(n) if day_of_week else np.zeros((n, 0))
    nw = wk.shape[1]
    p = q + nw
    cls = np.arange(n) % _WEEK
    observed = np.isfinite(y)
    yy = np.where(observed, y, 0.0)
    wobs = observed.astype(np.float64)
    live = np.concatenate([np.matmul(xq * xq, wobs[..., None])[..., 0], wobs @ wk],
                          axis=1) > 0  # a column with no observed day is fixed
    total = yy.sum(axis=1)
    exists = total > 0
    beta = np.zeros((rows, p))
    beta[:, 0] = np.log(np.maximum(total, 0.5) / np.maximum(wobs.sum(axis=1), 1.0))

    def take(a: FloatArray, idx: IntArray) -> FloatArray:
        return a if idx.size == a.shape[0] and idx.size and idx[-1] == idx.size - 1 else a[idx]

    def eta_of(b: FloatArray, idx: IntArray) -> FloatArray:
        e = np.matmul(b[:, None, :q], take(xq, idx))[:, 0, :]
        if nw:
            e += np.concatenate([np.zeros((b.shape[0], 1)), b[:, q:]], axis=1)[:, cls]
        return e

    def loglik(e: FloatArray, idx: IntArray) -> FloatArray:
        with np.errstate(over="ignore", invalid="ignore"):
            return np.asarray((take(wobs, idx) * (take(yy, idx) * e - np.exp(e))).sum(axis=1))

    def info_score(e: FloatArray, idx: IntArray) -> tuple[FloatArray, FloatArray]:
        xi = take(xq, idx)
        m = idx.size
        info = np.empty((m, p, p))
        with np.errstate(over="ignore", invalid="ignore"):  # a diverging row: not converged
            mu = take(wobs, idx) * np.exp(e)
            xmu = xi * mu[:, None, :]
            info[:, :q, :q] = np.matmul(xmu, xi.transpose(0, 2, 1))
            res = take(wobs, idx) * take(yy, idx) - mu
            score = np.concatenate([np.matmul(xi, res[..., None])[..., 0], res @ wk], axis=1)
            if nw:
                cross = np.matmul(xmu, wk)  # batched: no threaded BLAS call
                info[:, :q, q:] = cross
                info[:, q:, :q] = cross.transpose(0, 2, 1)
                info[:, q:, q:] = 0.0
                iw = np.arange(q, p)
                info[:, iw, iw] = mu @ wk
        dead = ~live[idx]
        rr, cc = np.nonzero(dead)
        info[rr, cc, :] = 0.0
        info[rr, :, cc] = 0.0
        info[rr, cc, cc] = 1.0
        score[rr, cc] = 0.0
        return info, score

    every = np.arange(rows)
    converged = np.zeros(rows, dtype=bool)
    active = np.flatnonzero(exists)
    eta = eta_of(beta, every)
    ll = loglik(eta, every)
    if start is not None:  # a warm start where it is finite and does better than the flat one
        warm = np.where(live, np.nan_to_num(start, nan=0.0, posinf=0.0, neginf=0.0), 0.0)
        eta_warm = eta_of(warm, every)
        ll_warm = loglik(eta_warm, every)
        use = np.all(np.isfinite(start), axis=1) & np.isfinite(ll_warm) & (ll_warm > ll)
        beta = np.where(use[:, None], warm, beta)
        eta = np.where(use[:, None], eta_warm, eta)
        ll = np.where(use, ll_warm, ll)
    for _ in range(_MAX_NEWTON):
        if active.size == 0:
            break
        info, score = info_score(eta[active], active)
        finite = np.all(np.isfinite(info), axis=(1, 2)) & np.all(np.isfinite(score), axis=1)
        if not finite.all():  # a diverging row (means overflowed): stop it, not converged
            active, info, score = active[finite], info[finite], score[finite]
            if active.size == 0:
                break
        try:
            step = np.linalg.solve(info, score[..., None])[..., 0]
        except np.linalg.LinAlgError:
            step = np.stack([np.linalg.lstsq(a, s, rcond=None)[0] for a, s in
                             zip(info, score, strict=True)])
        t = np.ones(active.size)
        cur = ll[active]
        new_b = beta[active] + step
        new_e = eta_of(new_b, active)
        new_ll = loglik(new_e, active)
        for _halve in range(30):
            worse = ~(new_ll >= cur - 1e-9 * np.abs(cur)) | ~np.isfinite(new_ll)
            if not worse.any():
                break
            t = np.where(worse, t / 2.0, t)
            w = np.flatnonzero(worse)
            new_b[w] = beta[active[w]] + t[w, None] * step[w]
            new_e[w] = eta_of(new_b[w], active[w])
            new_ll[w] = loglik(new_e[w], active[w])
        beta[active] = new_b
        eta[active] = new_e
        ll[active] = new_ll
        done = np.max(np.abs(t[:, None] * step), axis=1) < _NEWTON_TOL
        converged[active[done]] = True
        active = active[~done]
    info, _ = info_score(eta, every)
    cov = np.full((rows, p, p), np.nan)
    ok = converged & exists
    if ok.any():
        cov[ok] = np.linalg.inv(info[ok])
        dead = ~live
        cov[ok] = np.where((dead[ok][:, :, None] | dead[ok][:, None, :]), 0.0, cov[ok])
    with np.errstate(over="ignore"):
        mu = np.where(observed, np.exp(eta), np.nan)
    n_obs = observed.sum(axis=1)
    n_params = live.sum(axis=1) + (kinks >= 0).sum(axis=1)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):  # over: diverged rows
        pearson = np.where(observed, (yy - np.nan_to_num(mu)) ** 2 / np.nan_to_num(mu), 0.0)
        phi = pearson.sum(axis=1) / (n_obs - n_params)
    if dispersion == "poisson":
        phi = np.ones(rows)
    else:
        phi = np.where(n_obs > n_params, np.maximum(phi, 1.0), np.nan)
    beta = np.where(ok[:, None], beta, np.nan)
    phi = np.where(ok, phi, np.nan)
    ll = np.where(ok, ll, np.nan)
    return beta, cov, phi, ll, mu, ok


def _kink_fit_rows(fit: KinkFit, rows: IntArray) -> KinkFit:
    return KinkFit(*(getattr(fit, f.name)[rows] for f in fields(KinkFit)))


def _kink_replace(fit: KinkFit, rows: IntArray, sub: KinkFit) -> KinkFit:
    out = []
    for f in fields(KinkFit):
        a = np.array(getattr(fit, f.name), copy=True)
        a[rows] = getattr(sub, f.name)
        out.append(a)
    return KinkFit(*out)


def _chunks(rows: IntArray) -> list[IntArray]:
    return [rows[i : i + _CHUNK_ROWS] for i in range(0, rows.size, _CHUNK_ROWS)]


def block_dispersion(y: FloatArray, mu: FloatArray, block: int,
                     n_params: IntArray) -> tuple[FloatArray, FloatArray]:
    """Dispersion of moving block sums of the residuals (overlapping batch means) and its
    degrees of freedom.

    Over every window of ``block`` consecutive days ``j``, ``S_j = sum (y_t - mu_t)`` and
    ``M_j = sum mu_t``; ``phi_B = sum_j S_j^2 / sum_j M_j * m / (m - q)`` with
    ``m = n / block`` and ``q`` the regression parameters other than the weekday effects
    (which nearly cancel within a window). Residuals correlated over days (the epidemic's own
    noise, a transition that is not exactly a kink, growth drifting within a segment) leave
    the daily Pearson dispersion unchanged but raise ``phi_B``: it estimates the long-run
    variance that a slope's variance depends on (overlapping batch means, Meketon and
    Schmeiser 1984; the Newey-West long-run variance with a Bartlett kernel of width
    ``block`` is the same estimator up to end effects). Degrees of freedom
    ``1.5 m - q`` (overlapping batch means have about 2/3 the variance of ``m`` separate
    batches, Meketon and Schmeiser 1984). Where ``n // (q + 1)`` days is shorter than
    ``block`` (fewer than ``q + 1`` batches: many kinks in a short series) the block is
    shortened to it, so that ``m >= q + 1`` and the degrees of freedom are at least
    ``0.5 q + 1.5``: shorter batches catch less of a long-run correlation but some, where
    ``block`` would give none (``m <= q``) or next to no degrees of freedom. NaN where that is
    shorter than a week (the weekday effects no longer cancel within a window).
    """
    rows, n = y.shape
    obs = np.isfinite(y) & np.isfinite(mu)
    res = np.where(obs, np.nan_to_num(y) - np.nan_to_num(mu), 0.0)
    mm = np.where(obs, np.nan_to_num(mu), 0.0)
    q = np.asarray(n_params, dtype=np.float64)
    # a row with too many parameters for n / block batches: the block shortened to
    # n // (q + 1) days (so m >= q + 1), never below a week
    short = np.where(np.isfinite(q), n // np.maximum(q + 1.0, 1.0), 0).astype(np.int64)
    width = np.minimum(block, short)
    phi = np.full(rows, np.nan)
    df = np.full(rows, np.nan)
    s = prefix_sums(res)
    e = prefix_sums(mm)
    for b in np.unique(width):
        if b < _WEEK or b > n:
            continue
        r = np.flatnonzero(width == b)
        sb = s[r, b:] - s[r, :-b]
        eb = e[r, b:] - e[r, :-b]
        m = n / b
        with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
            phi[r] = (sb * sb).sum(axis=1) / eb.sum(axis=1) * m / (m - q[r])
        df[r] = 1.5 * m - q[r]
    ok = np.isfinite(df) & (df > 0)
    return np.where(ok, phi, np.nan), np.where(ok, df, np.nan)


def date_aware_covariance(fit: KinkFit, day_of_week: bool = True,
                          ramp: FloatArray | None = None,
                          dated: BoolArray | None = None) -> FloatArray:
    """Inverse information of :class:`KinkFit`'s coefficients with the kink dates free (unit
    dispersion): the block of ``(X, V)' W (X, V)`` inverted, ``W = diag(mu)``, where ``V`` has
    one column per kink, the derivative of the linear predictor with respect to its date,
    ``-(d_k / n) 1(t > tau_k)`` (Muggeo's ``V``).

    Treating each break date as a parameter of the likelihood (its derivative is defined
    except at the break itself) gives standard errors of the slopes that include the
    uncertainty of the date (Muggeo 2003, section 2; the covariance his segmented regression
    reports). The coefficients' block of the inverse is at least the conditional covariance
    :attr:`KinkFit.covariance` (a block of an inverse information exceeds the inverse of the
    block). Rows that did not converge are NaN; a kink whose date column is collinear with the
    rest keeps the conditional covariance. With ``ramp`` (:func:`smooth_ramp`, the fit's
    smoothed hinges) the date column is ``-(d_k / n) K'(t - tau_k)``. ``dated`` (shape of
    :attr:`KinkFit.kinks`) marks the kinks whose date was estimated; the others (fixed knots,
    see :mod:`server.indicators.local_change`) get no date column. Default: every kink.
    """
    return _kink_covariance(fit, day_of_week, None, None, ramp=ramp, dated=dated)


def hac_covariance(fit: KinkFit, counts: ArrayLike, lags: int, *, date_free: bool = True,
                   day_of_week: bool = True) -> FloatArray:
    """Newey-West (HAC) covariance of :class:`KinkFit`'s coefficients: the sandwich
    ``A^{-1} B A^{-1}`` of :func:`server.indicators.sandwich.hac_sandwich` on the design with
    Muggeo's date columns (``date_free``, as in :func:`date_aware_covariance`) or without,
    Bartlett kernel with ``lags`` lags, no dispersion factor (the meat carries the scale).

    Unlike a dispersion that scales the whole model-based covariance, the meat weighs each
    coefficient's own scores: the change of growth at a kink is estimated from the days after
    it, and its variance from their residuals' autocovariances (Newey & West 1987). Rows that
    did not converge are NaN; where the augmented information is singular the conditional
    covariance's design is used.
    """
    y = as_nonnegative_counts("counts", counts)
    if y.shape != fit.mu.shape:
        raise ValueError(f"counts: expected shape {fit.mu.shape}, got {y.shape}")
    lags = _check_int("lags", lags, 0)
    return _kink_covariance(fit, day_of_week, y, lags, date_free)


def _kink_covariance(fit: KinkFit, day_of_week: bool, y: FloatArray | None, lags: int | None,
                     date_free: bool = True, ramp: FloatArray | None = None,
                     dated: BoolArray | None = None) -> FloatArray:
    """:func:`date_aware_covariance` (``y`` None) or :func:`hac_covariance`."""
    rows, kmax = fit.kinks.shape
    n = fit.mu.shape[1]
    out = np.array(fit.covariance, copy=True)
    sandwich = y is not None
    if kmax == 0 and not sandwich:
        return out
    t = np.arange(n)
    todo = fit.converged & ((fit.kinks >= 0).any(axis=1) | sandwich)
    for idx in _chunks(np.flatnonzero(todo)):
        kinks = fit.kinks[idx]
        shifts = fit.level_shifts[idx]
        x = kink_design(n, kinks, shifts if shifts.shape[1] else None, day_of_week, ramp)
        p = x.shape[2]
        has = kinks >= 0
        if date_free and kmax:
            d = np.nan_to_num(fit.coef[idx, 2 : 2 + kmax]) / n
            if dated is not None:  # a fixed knot: no date column (an all-zero one is dropped)
                d = np.where(dated[idx], d, 0.0)
            if ramp is None:
                v = -(d[:, None, :] * ((t[None, :, None] > kinks[:, None, :])
                                       & has[:, None, :]))
            else:  # -(d_k / n) K'(t - tau_k)
                at = n + t[None, :, None] - np.where(has, kinks, 0)[:, None, :]
                v = -(d[:, None, :] * np.where(has[:, None, :], ramp[1][at], 0.0))
            xv = np.concatenate([x, v], axis=2)
        else:
            xv = x
        w = np.nan_to_num(fit.mu[idx], nan=0.0)
        info = np.matmul((xv * w[..., None]).transpose(0, 2, 1), xv)
        diag = np.einsum("rpp->rp", info)
        dead = diag <= 1e-12 * np.maximum(diag.max(axis=1, keepdims=True), 1e-300)
        rr, cc = np.nonzero(dead)
        info[rr, cc, :] = 0.0
        info[rr, :, cc] = 0.0
        info[rr, cc, cc] = 1.0
        with np.errstate(invalid="ignore", over="ignore"):
            try:
                inv = np.linalg.inv(info)
            except np.linalg.LinAlgError:
                inv = np.linalg.pinv(info, hermitian=True)
            if sandwich:
                xz = np.where(dead[:, None, :], 0.0, xv)
                inv = hac_sandwich(xz, y[idx], fit.mu[idx], int(lags or 0), bread=inv)
        block = inv[:, :p, :p]
        block = np.where(dead[:, :p, None] | dead[:, None, :p], 0.0, block)
        base = fit.covariance[idx]
        if sandwich:  # a numerically useless sandwich: the model-based covariance
            bad = ~np.all(np.isfinite(block), axis=(1, 2))
        else:
            # a date column collinear with the others (a level shift on the kink's day) or a
            # numerically useless inverse: keep the conditional covariance
            bad = ~np.all(np.isfinite(block), axis=(1, 2)) | np.any(
                np.einsum("rpp->rp", block) < np.einsum("rpp->rp", base) * (1 - 1e-6), axis=1)
        out[idx] = np.where(bad[:, None, None], base, block)
    return out
