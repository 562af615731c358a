"""Change points in transmission: piecewise log-linear Poisson models of daily counts.

For each region the daily counts are modelled as

    log E[y_t] = a_j + r_j (t - c_j) + g_{t mod 7},    t in segment j = [tau_j, tau_{j+1}),

with one level ``a_j`` and growth rate ``r_j`` per segment (``c_j`` the segment's middle day),
weekday effects ``g`` (``g_0 = 0``) shared by all segments, and quasi-Poisson variance
``Var y = phi mu``. A break ``tau`` is a day on which the growth rate and the level may change
(a change in transmission changes incidence at once by the ratio of the reproduction numbers
and its growth from then on, so both move). Finding the breaks runs in two stages:

1. *Screening*, vectorised over regions: weekday-adjusted log counts ``log(y/f + 0.5)`` with
   weights from the centred 7-day mean (the delta-method inverse variance of a log Poisson
   count); binary segmentation with straight lines, whose weighted residual sums of squares for
   every candidate split come from prefix sums in O(regions x days) per break. The number of
   breaks minimises a quasi-likelihood BIC on these fits.
2. *Exact fit*: the Poisson model above with the chosen breaks, by Newton's method on the full
   parameter vector (its information matrix assembled from per-segment and per-weekday sums,
   so a step costs O(regions x days)); each break date is then moved to the maximum of its
   profile likelihood and the model is fitted again.

No database, web or clock here.
"""

from __future__ import annotations

from dataclasses import dataclass, fields
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import special, stats

from server.indicators._arrays import (
    FloatArray,
    IntArray,
    as_nonnegative_counts,
    check_level,
    check_positive,
    freeze_arrays,
)
from server.indicators._segmentation import (
    WEEK,
    KinkScanner,
    Screening,
    binary_segmentation,
    check_int,
    kink_allowed,
    prefix_sums,
    screen_breaks,
    screen_kinks,
)
from server.indicators.kinkfit import (
    _CHUNK_ROWS,
    _MAX_NEWTON,
    _NEWTON_TOL,
    KinkFit,
    _chunks,
    _extra_columns,
    _fit_kinks,
    _kink_fit_rows,
    _kink_replace,
    _moved_start,
    _normalise_days,
    block_dispersion,
    date_aware_covariance,
    fit_kinks,
    hac_covariance,
    kink_design,
    smooth_ramp,
)
from server.indicators.local_change import LocalFit, fit_local
from server.indicators.serial_interval import growth_to_reproduction

BoolArray = NDArray[np.bool_]
Dispersion = Literal["quasipoisson", "poisson"]

__all__ = [
    "ChangePoints",
    "KinkFit",
    "block_dispersion",
    "date_aware_covariance",
    "hac_covariance",
    "fit_kinks",
    "kink_design",
    "screen_kinks",
    "PiecewiseFit",
    "Screening",
    "binary_segmentation",
    "detect_changepoints",
    "fit_piecewise",
    "screen_breaks",
]

_LN2 = float(np.log(2.0))
_WEEK = WEEK
_HUGE_MEAN = 1e100  # a fitted mean past this is a diverging fit's (see _kink_scanner)
_PROFILE_PASSES = 3  # profile, move, refit; stops early once no break moves


# ---------------------------------------------------------------- results


@dataclass(frozen=True, eq=False)
class PiecewiseFit:
    """Maximum-likelihood fit of the piecewise model for given breaks.

    Segments are padded to the same count ``S`` across regions; a padded segment has length 0
    and NaN parameters.

    Attributes
    ----------
    bounds : ndarray of int, shape (regions, S + 1)
        Segment j is days ``bounds[:, j] <= t < bounds[:, j + 1]``.
    level, growth : ndarray, shape (regions, S)
        ``a_j`` (log mean at the segment's centre, Monday-of-the-series weekday class) and
        ``r_j`` per day.
    centre : ndarray, shape (regions, S)
        ``c_j``, the middle of segment j: ``(start + end - 1) / 2``.
    weekday : ndarray, shape (regions, 7)
        ``g_k`` for days with ``t mod 7 = k`` (``g_0 = 0``).
    covariance : ndarray, shape (regions, 2 S + 6, 2 S + 6)
        Inverse Fisher information of ``(a_0..a_{S-1}, r_0..r_{S-1}, g_1..g_6)`` at unit
        dispersion (multiply by ``dispersion``).
    dispersion : ndarray, shape (regions,)
        Pearson chi-square over residual degrees of freedom (counting one per break date), at
        least 1 for quasi-Poisson; 1 for Poisson.
    loglik : ndarray, shape (regions,)
        Poisson log-likelihood (without the ``log y!`` term).
    mu : ndarray, shape (regions, days)
        Fitted means (NaN on missing days).
    converged : ndarray of bool, shape (regions,)
        False where Newton's method did not converge or a segment has no counts.
    """

    bounds: IntArray
    level: FloatArray
    growth: FloatArray
    centre: FloatArray
    weekday: FloatArray
    covariance: FloatArray
    dispersion: FloatArray
    loglik: FloatArray
    mu: FloatArray
    converged: BoolArray

    def __post_init__(self) -> None:
        freeze_arrays(self)


@dataclass(frozen=True, eq=False)
class ChangePoints:
    """Breaks in transmission and the growth of each segment between them.

    Arrays over breaks have shape (regions, max_breaks) and over segments (regions,
    max_breaks + 1); they are filled from the left, -1 (integers) or NaN (floats) after the
    region's last break or segment.

    Attributes
    ----------
    n_breaks : ndarray of int, shape (regions,)
    breaks, break_lower, break_upper : ndarray of int
        Day index of each break (first day of the new segment) and its profile-likelihood
        interval.
    growth_change, growth_change_lower, growth_change_upper : ndarray
        Change of the growth rate at break k with its Wald interval: ``r_{k+1} - r_k`` for the
        step model and for the kink model with ``local_window=None``; with a
        ``local_window`` (the default) the slope difference of the pieces next to the kink
        (:mod:`server.indicators.local_change`), which differs from that of the whole
        segments' growth rates where those drift.
    level_change, level_change_lower, level_change_upper : ndarray
        Jump of the log mean at break k: the new segment's line minus the old one's, both at
        the break day.
    segment_start, segment_end : ndarray of int
        First day and one past the last day of each segment.
    growth, growth_lower, growth_upper : ndarray
        ``r_j`` per day with its Wald interval.
    doubling_time, doubling_lower, doubling_upper : ndarray
        ``ln 2 / |r_j|`` (a halving time when ``r_j < 0``) and its interval (upper bound inf
        when the interval of r contains 0).
    reproduction, reproduction_lower, reproduction_upper : ndarray
        R of each segment from its growth rate (Wallinga & Lipsitch 2007, gamma generation
        interval).
    fit : PiecewiseFit or KinkFit
        The final fit (:class:`KinkFit` for ``shape='kink'``).
    screening : Screening
        The screening stage.
    level : float
        Interval level.
    transmission_day, transmission_lower, transmission_upper : ndarray, shape (regions, max_breaks)
        Estimated day of the change in transmission behind each kink, in infection time, with
        the break date's interval shifted alike: ``break - infection_delay + E[T^2] / (2 E[T])``
        (see :func:`detect_changepoints`), the interval from half a day before
        ``break_lower`` to half a day after ``break_upper`` (whole break days stand for
        continuous time); NaN without ``infection_delay`` or for ``shape='step'``.
    """

    n_breaks: IntArray
    breaks: IntArray
    break_lower: IntArray
    break_upper: IntArray
    growth_change: FloatArray
    growth_change_lower: FloatArray
    growth_change_upper: FloatArray
    level_change: FloatArray
    level_change_lower: FloatArray
    level_change_upper: FloatArray
    segment_start: IntArray
    segment_end: IntArray
    growth: FloatArray
    growth_lower: FloatArray
    growth_upper: FloatArray
    doubling_time: FloatArray
    doubling_lower: FloatArray
    doubling_upper: FloatArray
    reproduction: FloatArray
    reproduction_lower: FloatArray
    reproduction_upper: FloatArray
    fit: PiecewiseFit | KinkFit
    screening: Screening
    level: float
    transmission_day: FloatArray
    transmission_lower: FloatArray
    transmission_upper: FloatArray

    def __post_init__(self) -> None:
        freeze_arrays(self)


# ---------------------------------------------------------------- screening


# ---------------------------------------------------------------- exact fit


_check_int = check_int


def _segment_index(bounds: IntArray, n: int) -> IntArray:
    """Segment number of every day, shape (regions, days)."""
    days = np.arange(n)
    inner = bounds[:, 1:-1]
    return np.asarray((days[None, :, None] >= inner[:, None, :]).sum(axis=2), dtype=np.int64)


def _segment_sums(values: FloatArray, bounds: IntArray) -> FloatArray:
    """Sum of ``values`` over each segment: shape (regions, S)."""
    p = prefix_sums(values)
    at = np.take_along_axis(p, bounds, axis=1)
    return np.asarray(np.diff(at, axis=1))


def _normalise_breaks(breaks: ArrayLike, rows: int, n: int) -> IntArray:
    return _normalise_days("breaks", breaks, rows, n)


def _bounds(breaks: IntArray, n: int) -> IntArray:
    """Sorted segment bounds ``[0, b_1, ..., b_k, n, n, ...]``; -1 entries pad at the end."""
    rows, k = breaks.shape
    b = np.where(breaks < 0, n, breaks)
    b = np.sort(b, axis=1)
    if k > 1 and np.any((np.diff(b, axis=1) == 0) & (b[:, 1:] < n)):
        raise ValueError("breaks: a day appears twice in one region")
    return np.concatenate([np.zeros((rows, 1), np.int64), b, np.full((rows, 1), n)], axis=1)


def fit_piecewise(
    counts: ArrayLike,
    breaks: ArrayLike,
    *,
    dispersion: Dispersion = "quasipoisson",
    day_of_week: bool = True,
) -> PiecewiseFit:
    """Fit the piecewise log-linear Poisson model with given breaks by maximum likelihood.

    Parameters
    ----------
    counts : array_like, shape (regions, days)
        Daily counts; NaN for a missing day.
    breaks : array_like of int, shape (regions, k) or (k,)
        First day of each new segment (1 .. days - 1), -1 for none; any order.
    dispersion : {'quasipoisson', 'poisson'}
        Quasi-Poisson scales the covariance by the Pearson dispersion (at least 1).
    day_of_week : bool
        Include the six weekday effects.

    Returns
    -------
    PiecewiseFit

    Notes
    -----
    :math:`\\log \\mu_t = a_{j(t)} + r_{j(t)} (t - c_{j(t)}) + g_{t \\bmod 7}` with
    :math:`g_0 = 0`. Newton's method with step halving on the Poisson log-likelihood
    :math:`\\ell = \\sum_t (y_t \\eta_t - \\mu_t)`: the information matrix :math:`X^T W X`
    (``W = diag(mu)``) has a 2 x 2 block per segment, a diagonal weekday block and
    segment-by-weekday entries, all sums of :math:`\\mu`, :math:`\\mu u`, :math:`\\mu u^2`
    (``u = t - c_j``) over a segment or a segment's days of one weekday, taken from prefix
    sums. Converged when every step is below 1e-10. The dispersion is
    :math:`\\phi = \\sum (y - \\mu)^2/\\mu / (n - p - k)` with ``k`` break dates counted as
    parameters. The MLE does not exist when a segment has no counts; such regions are flagged.

    References
    ----------
    .. [1] McCullagh P, Nelder JA (1989). Generalized Linear Models, 2nd ed., ch. 6 and 9
       (log-linear models, quasi-likelihood).
    .. [2] Muggeo VMR (2003). Estimating regression models with unknown break-points. Stat Med
       22:3055-3071.
    """
    y = as_nonnegative_counts("counts", counts)
    rows, n = y.shape
    if dispersion not in ("quasipoisson", "poisson"):
        raise ValueError(f"dispersion: must be 'quasipoisson' or 'poisson', got {dispersion!r}")
    bounds = _bounds(_normalise_breaks(breaks, rows, n), n)
    parts = [
        _fit_rows(y[s], bounds[s], dispersion, day_of_week)
        for s in (slice(i, min(i + _CHUNK_ROWS, rows)) for i in range(0, rows, _CHUNK_ROWS))
    ]
    if not parts:
        parts = [_fit_rows(y, bounds, dispersion, day_of_week)]
    fields = [np.concatenate([p[i] for p in parts], axis=0) for i in range(len(parts[0]))]
    return PiecewiseFit(bounds, *fields)


def _fit_rows(
    y: FloatArray, bounds: IntArray, dispersion: str, day_of_week: bool
) -> tuple[FloatArray, ...]:
    rows, n = y.shape
    segs = bounds.shape[1] - 1
    nw = _WEEK - 1 if day_of_week else 0
    p = 2 * segs + nw
    observed = np.isfinite(y)
    yy = np.where(observed, y, 0.0)
    wobs = observed.astype(np.float64)
    seg = _segment_index(bounds, n)
    start, end = bounds[:, :-1], bounds[:, 1:]
    centre = 0.5 * (start + end - 1).astype(np.float64)
    length = end - start
    u = np.arange(n)[None, :] - np.take_along_axis(centre, seg, axis=1)
    cls = np.arange(n) % _WEEK
    cls_masks = [(cls == k).astype(np.float64) for k in range(1, _WEEK)] if day_of_week else []

    # start: per-segment log mean, no slope, no weekday effects
    ysum = _segment_sums(yy, bounds)
    nobs = _segment_sums(wobs, bounds)
    empty = (length == 0) | (nobs == 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        a0 = np.log(np.where(empty, 1.0, (ysum + 0.5) / np.maximum(nobs, 1.0)))
    beta = np.concatenate([a0, np.zeros((rows, segs)), np.zeros((rows, nw))], axis=1)
    exists = ~np.any(~empty & (ysum == 0), axis=1)

    def eta_of(b: FloatArray, idx: IntArray) -> FloatArray:
        a = np.take_along_axis(b[:, :segs], seg[idx], axis=1)
        r = np.take_along_axis(b[:, segs : 2 * segs], seg[idx], axis=1)
        e = a + r * u[idx]
        if nw:
            g = np.concatenate([np.zeros((b.shape[0], 1)), b[:, 2 * segs :]], axis=1)
            e = e + g[:, cls]
        return e

    def loglik(b: FloatArray, idx: IntArray) -> FloatArray:
        e = eta_of(b, idx)
        with np.errstate(over="ignore", invalid="ignore"):
            return np.asarray(np.where(observed[idx], yy[idx] * e - np.exp(e), 0.0).sum(axis=1))

    def info_score(b: FloatArray, idx: IntArray) -> tuple[FloatArray, FloatArray]:
        rows = b.shape[0]
        bounds_i, empty_i, length_i, nobs_i = bounds[idx], empty[idx], length[idx], nobs[idx]
        e = eta_of(b, idx)
        with np.errstate(over="ignore"):
            mu = np.where(observed[idx], np.exp(e), 0.0)
        res = yy[idx] - mu
        u_i = u[idx]
        info = np.zeros((rows, p, p))
        score = np.zeros((rows, p))
        s_mu = _segment_sums(mu, bounds_i)
        s_mu_u = _segment_sums(mu * u_i, bounds_i)
        s_mu_uu = _segment_sums(mu * u_i * u_i, bounds_i)
        ia = np.arange(segs)
        info[:, ia, ia] = s_mu
        info[:, ia, ia + segs] = info[:, ia + segs, ia] = s_mu_u
        info[:, ia + segs, ia + segs] = s_mu_uu
        score[:, :segs] = _segment_sums(res, bounds_i)
        score[:, segs : 2 * segs] = _segment_sums(res * u_i, bounds_i)
        for k, mask in enumerate(cls_masks):
            col = 2 * segs + k
            m_k = mu * mask
            info[:, col, col] = m_k.sum(axis=1)
            ska = _segment_sums(m_k, bounds_i)
            skr = _segment_sums(m_k * u_i, bounds_i)
            info[:, ia, col] = info[:, col, ia] = ska
            info[:, ia + segs, col] = info[:, col, ia + segs] = skr
            score[:, col] = (res * mask).sum(axis=1)
        # padded or empty segments: fix their parameters
        pad = np.concatenate([empty_i, empty_i, np.zeros((rows, nw), bool)], axis=1)
        rr, cc = np.nonzero(pad)
        info[rr, cc, :] = 0.0
        info[rr, :, cc] = 0.0
        info[rr, cc, cc] = 1.0
        score[rr, cc] = 0.0
        single = (length_i == 1) | (nobs_i == 1)  # one observed day: slope not identified
        rr, cc = np.nonzero(single & ~empty_i)
        cc = cc + segs
        info[rr, cc, :] = 0.0
        info[rr, :, cc] = 0.0
        info[rr, cc, cc] = 1.0
        score[rr, cc] = 0.0
        return info, score

    active = np.flatnonzero(exists)
    converged = np.zeros(rows, dtype=bool)
    everyone = np.arange(rows)
    ll = loglik(beta, everyone)
    for _ in range(_MAX_NEWTON):
        if active.size == 0:
            break
        info, score = info_score(beta[active], active)
        finite = np.all(np.isfinite(info), axis=(1, 2)) & np.all(np.isfinite(score), axis=1)
        if not finite.all():  # a diverging row (means overflowed): stop it, not converged
            active, info, score = active[finite], info[finite], score[finite]
            if active.size == 0:
                break
        try:
            step = np.linalg.solve(info, score[..., None])[..., 0]
        except np.linalg.LinAlgError:
            step = np.stack([np.linalg.lstsq(m, s, rcond=None)[0] for m, s in zip(info, score,
                                                                                  strict=True)])
        scale = np.ones(active.size)
        old = ll[active]
        for _half in range(30):
            trial = beta[active] + scale[:, None] * step
            new = loglik(trial, active)
            worse = ~(new >= old - 1e-12 * np.abs(old))
            if not worse.any():
                break
            scale = np.where(worse, scale / 2.0, scale)
        beta[active] = beta[active] + scale[:, None] * step
        ll[active] = loglik(beta[active], active)
        done = np.max(np.abs(scale[:, None] * step), axis=1) < _NEWTON_TOL
        converged[active[done]] = True
        active = active[~done]

    info, _ = info_score(beta, everyone)
    cov = np.full((rows, p, p), np.nan)
    ok = converged & exists
    if ok.any():
        cov[ok] = np.linalg.inv(info[ok])
    e = eta_of(beta, everyone)
    with np.errstate(over="ignore"):
        mu = np.where(observed, np.exp(e), np.nan)
    n_obs = observed.sum(axis=1)
    used = (~empty).sum(axis=1)
    n_params = 2 * used - (((length == 1) | (nobs == 1)) & ~empty).sum(axis=1) + nw + (used - 1)
    with np.errstate(divide="ignore", invalid="ignore"):
        pearson = np.where(observed, (yy - np.nan_to_num(mu)) ** 2 / np.nan_to_num(mu), 0.0)
        phi = pearson.sum(axis=1) / (n_obs - n_params)
    if dispersion == "poisson":
        phi = np.ones(rows)
    else:
        phi = np.where(n_obs > n_params, np.maximum(phi, 1.0), np.nan)
    level = np.where(empty, np.nan, beta[:, :segs])
    growth = np.where(empty, np.nan, beta[:, segs : 2 * segs])
    weekday = np.concatenate([np.zeros((rows, 1)), beta[:, 2 * segs :]], axis=1)
    if not nw:
        weekday = np.zeros((rows, _WEEK))
    bad = ~ok
    level[bad] = growth[bad] = np.nan
    weekday[bad] = np.nan
    phi = np.where(bad, np.nan, phi)
    ll = np.where(bad, np.nan, loglik(beta, everyone))
    return (level, growth, np.where(empty, np.nan, centre), weekday, cov, phi, ll, mu, ok)



# ---------------------------------------------------------------- profile over break dates


@dataclass(frozen=True, eq=False)
class _Profile:
    best: IntArray  # (regions, k) day of the profile maximum, -1 where no break
    lower: IntArray
    upper: IntArray


def _line_profile(
    y: FloatArray, off: FloatArray, w: FloatArray, u: FloatArray, b0: FloatArray, iters: int
) -> FloatArray:
    """Maximised Poisson log-likelihood of ``log mu = off + a + b u`` (weights w), batched.

    ``a`` is profiled out in closed form, ``e^a = Y / sum w e^{off + b u}``; ``b`` takes
    ``iters`` Newton steps from ``b0`` on the concave profile (McCullagh & Nelder 1989, 6.3).
    """
    wy = w * y
    big_y = wy.sum(axis=-1)
    ywu = (wy * u).sum(axis=-1)
    b = np.where(np.isfinite(b0), b0, 0.0)
    span = max(float(np.abs(u).max()), 1.0)
    for _ in range(iters):
        with np.errstate(over="ignore", invalid="ignore"):
            e = w * np.exp(off + b[..., None] * u)
            a0 = e.sum(axis=-1)
            a1 = (e * u).sum(axis=-1)
            a2 = (e * u * u).sum(axis=-1)
            m1 = a1 / a0
            grad = ywu - big_y * m1
            curv = big_y * np.maximum(a2 / a0 - m1 * m1, 1e-300)
            step = np.clip(grad / curv, -1.0 / span, 1.0 / span)
        b = b + np.where(np.isfinite(step) & (big_y > 0), step, 0.0)
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        e = w * np.exp(off + b[..., None] * u)
        big_a = e.sum(axis=-1)
        value = (wy * (off + b[..., None] * u)).sum(axis=-1) + big_y * np.log(big_y / big_a) - big_y
    return np.where(big_y > 0, value, 0.0)


def _profile_breaks(
    y: FloatArray,
    fit: PiecewiseFit,
    *,
    min_segment: int,
    search: int,
    window: int,
    level: float,
) -> _Profile:
    rows, n = y.shape
    bounds = fit.bounds
    k = bounds.shape[1] - 2
    real = bounds[:, 1:-1] < n  # (rows, k)
    best = np.full((rows, k), -1, dtype=np.int64)
    lower = best.copy()
    upper = best.copy()
    pr, pk = np.nonzero(real & fit.converged[:, None])
    if pr.size == 0:
        return _Profile(best, lower, upper)
    lo, tau0, hi = bounds[pr, pk], bounds[pr, pk + 1], bounds[pr, pk + 2]
    cand_off = np.arange(-search, search + 1)
    tau = tau0[:, None] + cand_off[None, :]  # (P, C)
    allowed = (tau >= lo[:, None] + min_segment) & (tau <= hi[:, None] - min_segment)
    allowed |= cand_off[None, :] == 0
    wlo = np.maximum(lo, tau0 - window)
    whi = np.minimum(hi, tau0 + window)
    span = 2 * window
    pos = wlo[:, None] + np.arange(span)[None, :]  # (P, L)
    inside = pos < whi[:, None]
    posc = np.minimum(pos, n - 1)
    yl = y[pr[:, None], posc]
    obs = inside & np.isfinite(yl)
    yl = np.where(obs, yl, 0.0)
    g = np.nan_to_num(fit.weekday[pr][:, None, :].repeat(span, axis=1), nan=0.0)
    off = np.take_along_axis(g, (posc % _WEEK)[..., None], axis=2)[..., 0]
    value = np.full(tau.shape, -np.inf)
    for part in (slice(i, min(i + 2048, pr.size)) for i in range(0, pr.size, 2048)):
        left = obs[part, None, :] & (pos[part, None, :] < tau[part, :, None])
        right = obs[part, None, :] & (pos[part, None, :] >= tau[part, :, None])
        u = (pos[part, None, :] - tau[part, :, None]).astype(np.float64)
        ys = np.broadcast_to(yl[part, None, :], left.shape)
        os = np.broadcast_to(off[part, None, :], left.shape)
        rl = np.broadcast_to(fit.growth[pr[part], pk[part]][:, None], tau[part].shape)
        rr = np.broadcast_to(fit.growth[pr[part], pk[part] + 1][:, None], tau[part].shape)
        v = (_line_profile(ys, os, left.astype(np.float64), u, rl, 6)
             + _line_profile(ys, os, right.astype(np.float64), u, rr, 6))
        value[part] = np.where(allowed[part], v, -np.inf)
    top = np.argmax(value, axis=1)
    peak = value[np.arange(pr.size), top]
    phi = fit.dispersion[pr]
    with np.errstate(invalid="ignore"):
        stat = 2.0 * (peak[:, None] - value) / phi[:, None]
    crit = float(stats.chi2.ppf(level, 1))
    inset = (stat <= crit) & allowed
    first = np.argmax(inset, axis=1)
    last = inset.shape[1] - 1 - np.argmax(inset[:, ::-1], axis=1)
    # the pairs were made in the order of the sorted bounds; write back by rank
    best[pr, pk] = tau[np.arange(pr.size), top]
    lower[pr, pk] = tau[np.arange(pr.size), first]
    upper[pr, pk] = tau[np.arange(pr.size), last]
    return _Profile(best, lower, upper)


# ---------------------------------------------------------------- the whole procedure


def _doubling(r: FloatArray, lo: FloatArray, hi: FloatArray) -> tuple[FloatArray, ...]:
    with np.errstate(divide="ignore", invalid="ignore"):
        est = _LN2 / np.abs(r)
        near = np.where(r >= 0, hi, -lo)
        far = np.where(r >= 0, lo, -hi)
        lower = _LN2 / np.abs(near)
        upper = np.where(far > 0, _LN2 / far, np.inf)
    nan = np.isnan(r)
    return (np.where(nan, np.nan, est), np.where(nan, np.nan, lower),
            np.where(nan, np.nan, upper))


def detect_changepoints(
    counts: ArrayLike,
    *,
    min_segment: int = 14,
    max_breaks: int | None = None,
    penalty: float = 1.0,
    dispersion: Dispersion = "quasipoisson",
    level: float = 0.95,
    search: int = 7,
    profile_window: int = 28,
    si_mean: float = 4.7,
    si_sd: float = 2.9,
    shape: Literal["kink", "step"] = "kink",
    level_shifts: ArrayLike | None = None,
    infection_delay: float | None = None,
    dependence_block: int | None = 42,
    min_change: float = 0.1,
    date_uncertainty: bool = True,
    smoothing: bool | None = None,
    delay_sd: float | None = None,
    local_window: int | None = 42,
) -> ChangePoints:
    """Find breaks in the growth of daily counts and estimate each segment's growth and R.

    Parameters
    ----------
    counts : array_like, shape (regions, days)
        Daily counts (cases by test or report date); NaN for a missing day.
    min_segment : int
        Fewest days of a segment (default 14).
    max_breaks : int, optional
        Most breaks per region (default ``min(10, days // min_segment - 1)``).
    penalty : float
        Multiplier of the BIC penalty (1: plain BIC; larger gives fewer breaks).
    dispersion : {'quasipoisson', 'poisson'}
        Variance model of the counts.
    level : float
        Level of every interval (default 0.95).
    search : int
        Days either side of a screened break over which its profile likelihood is evaluated.
    profile_window : int
        Days either side of a break used by its profile (within the neighbouring segments).
    si_mean, si_sd : float
        Mean and SD of the gamma generation interval for R (default 4.7 and 2.9 days).
    dependence_block : int or None
        Kink model only: window (days) of the long-run dispersion of :func:`block_dispersion`;
        the intervals of the growth rates and their changes use the larger of it and the
        daily dispersion, with a t quantile when it is the larger (default 42, chosen on
        validation seeds 100-129; ``None``: the daily dispersion and a normal quantile).
        The same dispersion scales the exact stage's test for dropping a weak kink and the
        profile intervals of the kink dates (with an F(1, df) cut-off where it is the
        larger: their coverage of the true day 57.4 -> 95.1 % on validation seeds 300-349,
        with the half-day ends of ``transmission_lower``/``upper``; docs/estimate.md).
    min_change : float
        Kink model only: smallest relative change of R reported as a break (default 0.1:
        R after / R before at least 1.1 or at most 1/1.1, R of each segment from its growth
        rate as below). A kink whose change is smaller is dropped and the model refitted,
        the smallest first (chosen on validation seeds 100-149; 0 keeps every kink the BIC
        keeps).
    date_uncertainty : bool
        Kink model only: the intervals of the growth rates and their changes allow for the
        uncertainty of the break dates (:func:`date_aware_covariance`, Muggeo 2003); False
        conditions on the dates.
    smoothing : bool, optional
        Kink model only (needs ``infection_delay``): once the kinks and their dates are found,
        each hinge is replaced by the hinge smoothed by the generation interval and the
        infection-to-report delay (:func:`server.indicators.kinkfit.smooth_ramp`) and the
        model refitted at the same dates; the growth rates, their changes and intervals
        (Muggeo's date columns become ``-d_k K'(t - tau_k) / n``) come from that fit. The
        break dates, their intervals and the number of breaks do not change. Default
        (None): on for ``shape='kink'`` with an ``infection_delay`` (coverage of the growth
        change 87.2 -> 88.7 % on validation seeds 300-349, see docs/estimate.md), off
        otherwise.
    delay_sd : float, optional
        SD of the gamma infection-to-report delay for ``smoothing`` (default
        ``0.4 * infection_delay``, an assumed coefficient of variation: common practice, no
        source).
    local_window : int or None
        Kink model only: the change of growth at each kink (``growth_change`` and its
        interval) is measured near it: the model is refitted with fixed knots
        ``local_window`` days either side of every kink where its segment reaches further
        (:mod:`server.indicators.local_change`, which says how long the pieces can be); its
        dispersion is the whole-segment fit's; a region whose refit does not converge keeps
        the whole-segment change. Default 42 (six weeks, the ``dependence_block``; not tuned: 42
        was the only value measured, on validation seeds 100-149). ``None``: the slope change
        of the whole-segment fit. The dates, segments and segment growth rates are the
        whole-segment fit's either way.

    Returns
    -------
    ChangePoints

    Notes
    -----
    The breaks and their number come from :func:`screen_breaks` (quasi-likelihood BIC). The
    model with those breaks is fitted by :func:`fit_piecewise`. The date of each break then
    maximises its profile log-likelihood :math:`\\ell_p(\\tau)` over
    :math:`\\hat\\tau \\pm` ``search`` days (keeping ``min_segment``), computed on the days
    within ``profile_window`` of the break with the two adjacent lines re-fitted for every
    candidate and the weekday effects held at their estimates; the model is fitted again at
    the new dates. The interval of a break date is
    :math:`\\{\\tau : 2(\\ell_p(\\hat\\tau) - \\ell_p(\\tau))/\\hat\\phi \\le \\chi^2_{1,level}\\}`
    within the searched days (the usual likelihood-ratio calibration, approximate for a
    change point, which is not a regular parameter [2]_); for the kink model with a
    ``dependence_block``, :math:`\\hat\\phi` is the long-run dispersion where that is the
    larger, and the cut-off :math:`F_{1,df}` on its degrees of freedom. Intervals of the
    growth rates
    :math:`r_j \\pm z \\sqrt{\\hat\\phi V_{jj}}` (and of their differences and level jumps)
    condition on the break dates (step model; for the kink model see ``date_uncertainty`` and
    ``local_window``). Doubling time :math:`\\ln 2/|r|`; reproduction number
    :math:`R = (1 + r\\theta)^k` for a gamma generation interval of shape
    :math:`k = \\mu^2/\\sigma^2` and scale :math:`\\theta = \\sigma^2/\\mu` [3]_, its interval
    mapped from that of r. A change in transmission shows in counts by test date after the
    delay from infection to test (about 1-2 weeks); the break dates are in the counts' time.

    References
    ----------
    .. [1] Muggeo VMR (2003). Estimating regression models with unknown break-points. Stat Med
       22:3055-3071.
    .. [2] Dehning J, Zierenberg J, Spitzner FP, et al. (2020). Inferring change points in the
       spread of COVID-19 reveals the effectiveness of interventions. Science 369:eabb9789.
    .. [3] Wallinga J, Lipsitch M (2007). How generation intervals shape the relationship
       between growth rates and reproductive numbers. Proc R Soc B 274:599-604.
    """
    y = as_nonnegative_counts("counts", counts)
    rows, n = y.shape
    level = check_level("level", level)
    search = _check_int("search", search, 0)
    profile_window = _check_int("profile_window", profile_window, 1)
    if profile_window < search + 7:
        raise ValueError(f"profile_window: must be at least search + 7 = {search + 7}, got "
                         f"{profile_window}")
    check_positive("si_mean", si_mean)
    check_positive("si_sd", si_sd)
    if shape not in ("kink", "step"):
        raise ValueError(f"shape: must be 'kink' or 'step', got {shape!r}")
    if infection_delay is not None:
        infection_delay = float(infection_delay)
        if not np.isfinite(infection_delay) or infection_delay < 0:
            raise ValueError(f"infection_delay: must be a finite number >= 0, got "
                             f"{infection_delay!r}")
    if dependence_block is not None:
        dependence_block = _check_int("dependence_block", dependence_block, 1)
    if local_window is not None:
        local_window = _check_int("local_window", local_window, 1)
    min_change = float(min_change)
    if not np.isfinite(min_change) or min_change < 0:
        raise ValueError(f"min_change: must be a finite number >= 0, got {min_change!r}")
    ramp = None
    if smoothing is None:
        smoothing = shape == "kink" and infection_delay is not None
    if smoothing:
        if shape != "kink" or infection_delay is None:
            raise ValueError("smoothing: needs shape='kink' and an infection_delay")
        sd = 0.4 * infection_delay if delay_sd is None else float(delay_sd)
        if not np.isfinite(sd) or sd < 0:
            raise ValueError(f"delay_sd: must be a finite number >= 0, got {delay_sd!r}")
        ramp = smooth_ramp(n, si_mean, si_sd, infection_delay, sd)
    if shape == "kink":
        kfit, kscreen, kprof = _detect_kinks(
            y, min_segment=min_segment, max_breaks=max_breaks, penalty=penalty,
            dispersion=dispersion, level=level, level_shifts=level_shifts,
            block=dependence_block, min_change=min_change, si_mean=si_mean, si_sd=si_sd)
        if ramp is not None:
            kfit = _smooth_kinks(y, kfit, ramp, dispersion)
        local = None if local_window is None else fit_local(
            y, kfit, window=local_window, min_gap=min_segment, dispersion=dispersion, ramp=ramp)
        lag = None if infection_delay is None else (
            infection_delay - (si_sd**2 + si_mean**2) / (2.0 * si_mean))
        return _assemble_kinks(kfit, kscreen, kprof, level, si_mean, si_sd, lag,
                               y=y, block=dependence_block,
                               date_free=bool(date_uncertainty), ramp=ramp, local=local)
    screening = screen_breaks(y, min_segment=min_segment, max_breaks=max_breaks,
                              penalty=penalty)
    kmax = screening.breaks.shape[1]
    breaks = screening.breaks
    fit = fit_piecewise(y, breaks, dispersion=dispersion)
    prof = _Profile(*(np.full((rows, kmax), -1, dtype=np.int64) for _ in range(3)))
    todo = np.arange(rows)
    for _ in range(_PROFILE_PASSES):
        if kmax == 0 or todo.size == 0:
            break
        part = _profile_breaks(y[todo], _fit_rows_of(fit, todo), min_segment=min_segment,
                               search=search, window=profile_window, level=level)
        for full, sub in zip((prof.best, prof.lower, prof.upper),
                             (part.best, part.lower, part.upper), strict=True):
            full[todo] = sub
        current = np.where(fit.bounds[todo, 1:-1] < n, fit.bounds[todo, 1:-1], -1)
        moved = np.any((part.best != current) & (part.best >= 0), axis=1)
        todo = todo[moved]
        if todo.size == 0:
            break
        new = np.where(prof.best[todo] >= 0, prof.best[todo], current[moved])
        fit = _replace_rows(fit, todo, fit_piecewise(y[todo], new, dispersion=dispersion))
    return _assemble(fit, screening, prof, level, si_mean, si_sd)


def _fit_rows_of(fit: PiecewiseFit, rows: IntArray) -> PiecewiseFit:
    """The fit of some rows only."""
    return PiecewiseFit(*(getattr(fit, f.name)[rows] for f in fields(PiecewiseFit)))


def _replace_rows(fit: PiecewiseFit, rows: IntArray, sub: PiecewiseFit) -> PiecewiseFit:
    """``fit`` with ``rows`` taken from ``sub`` (the segment axis padded to the wider one)."""
    out = []
    for f in fields(PiecewiseFit):
        a, b = getattr(fit, f.name), getattr(sub, f.name)
        a = np.array(a, copy=True)
        if a.shape[1:] != b.shape[1:]:
            raise ValueError(f"{f.name}: shapes {a.shape} and {b.shape} differ")
        a[rows] = b
        out.append(a)
    return PiecewiseFit(*out)


def _assemble(fit: PiecewiseFit, screening: Screening, prof: _Profile, level: float,
              si_mean: float, si_sd: float) -> ChangePoints:
    rows = fit.bounds.shape[0]
    n = int(fit.bounds[0, -1])
    segs = fit.level.shape[1]
    kmax = segs - 1
    z = float(special.ndtri(0.5 + level / 2.0))
    cov = fit.covariance * fit.dispersion[:, None, None]
    seg_ok = fit.bounds[:, 1:] > fit.bounds[:, :-1]
    n_breaks = (seg_ok.sum(axis=1) - 1).astype(np.int64)
    idx = np.arange(segs)
    var_r = cov[:, idx + segs, idx + segs]
    se_r = np.sqrt(var_r)
    growth = np.where(seg_ok, fit.growth, np.nan)
    g_lo, g_hi = growth - z * se_r, growth + z * se_r
    breaks = np.where(fit.bounds[:, 1:-1] < n, fit.bounds[:, 1:-1], -1)
    has = breaks >= 0
    # growth change and level jump at each break: linear combinations of the parameters
    p = cov.shape[1]
    kk = np.arange(kmax)
    grad_r = np.zeros((rows, kmax, p))
    grad_r[:, kk, segs + kk + 1] = 1.0
    grad_r[:, kk, segs + kk] = -1.0
    tau = np.where(has, breaks, 0).astype(np.float64)
    grad_a = np.zeros((rows, kmax, p))
    grad_a[:, kk, kk + 1] = 1.0
    grad_a[:, kk, kk] = -1.0
    c = np.nan_to_num(fit.centre)
    grad_a[:, kk, segs + kk + 1] = tau - c[:, 1:]
    grad_a[:, kk, segs + kk] = -(tau - c[:, :-1])
    params = np.concatenate([np.nan_to_num(fit.level), np.nan_to_num(fit.growth),
                             np.zeros((rows, p - 2 * segs))], axis=1)
    d_r = np.einsum("rkp,rp->rk", grad_r, params)
    d_a = np.einsum("rkp,rp->rk", grad_a, params)
    with np.errstate(invalid="ignore"):
        se_dr = np.sqrt(np.einsum("rkp,rpq,rkq->rk", grad_r, cov, grad_r))
        se_da = np.sqrt(np.einsum("rkp,rpq,rkq->rk", grad_a, cov, grad_a))
    nan = np.where(has, 0.0, np.nan)
    dt, dt_lo, dt_hi = _doubling(growth, g_lo, g_hi)
    rep = growth_to_reproduction(growth, si_mean, si_sd)
    rep_lo = growth_to_reproduction(g_lo, si_mean, si_sd)
    rep_hi = growth_to_reproduction(g_hi, si_mean, si_sd)
    start = np.where(seg_ok, fit.bounds[:, :-1], -1)
    end = np.where(seg_ok, fit.bounds[:, 1:], -1)
    lower = np.where(has & (prof.lower >= 0), prof.lower, np.where(has, breaks, -1))
    upper = np.where(has & (prof.upper >= 0), prof.upper, np.where(has, breaks, -1))
    return ChangePoints(
        n_breaks=n_breaks, breaks=breaks, break_lower=lower, break_upper=upper,
        growth_change=d_r + nan, growth_change_lower=d_r - z * se_dr + nan,
        growth_change_upper=d_r + z * se_dr + nan,
        level_change=d_a + nan, level_change_lower=d_a - z * se_da + nan,
        level_change_upper=d_a + z * se_da + nan,
        segment_start=start, segment_end=end, growth=growth, growth_lower=g_lo,
        growth_upper=g_hi, doubling_time=dt, doubling_lower=dt_lo, doubling_upper=dt_hi,
        reproduction=rep, reproduction_lower=rep_lo, reproduction_upper=rep_hi,
        fit=fit, screening=screening, level=level,
        transmission_day=np.full((rows, kmax), np.nan),
        transmission_lower=np.full((rows, kmax), np.nan),
        transmission_upper=np.full((rows, kmax), np.nan),
    )


def _kink_scanner(y: FloatArray, fit: KinkFit, day_of_week: bool) -> KinkScanner:
    """Working-response profiles of the kinks at ``fit``: the scanner's ``scan(others)`` gives
    the weighted RSS of the working response ``eta + (y - mu) / mu`` (weights ``mu``) with the
    kinks ``others`` and the drop from adding one more kink at each day."""
    rows, n = y.shape
    # a diverged row's overflowed means, or means past 1e100 (a diverging fit; no count
    # series comes near): no weight, so that no sum of products over them overflows
    mu = np.where(np.isfinite(fit.mu) & (fit.mu < _HUGE_MEAN), fit.mu, 0.0)
    observed = np.isfinite(y) & (mu > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        z = np.where(observed, np.log(np.where(observed, mu, 1.0))
                     + (np.nan_to_num(y) - mu) / np.where(observed, mu, 1.0), 0.0)
    w = np.where(observed, mu, 0.0)
    more = _extra_columns(n, rows, fit.level_shifts if fit.level_shifts.shape[1] else None,
                          day_of_week)
    return KinkScanner(z, w, more)


def _kink_effects(fit: KinkFit, si_mean: float, si_sd: float) -> FloatArray:
    """``|log R_{k+1} - log R_k|`` at every kink of ``fit`` (R of the segments on either side
    from their growth rates, Wallinga & Lipsitch 2007); inf where a segment's R is 0 or NaN
    (never taken for a small change), NaN where there is no kink."""
    kmax = fit.kinks.shape[1]
    n = fit.mu.shape[1]
    coef = np.nan_to_num(fit.coef)
    slopes = np.cumsum(coef[:, 1 : 2 + kmax], axis=1) / n  # growth of segments 0..kmax
    with np.errstate(divide="ignore", invalid="ignore"):
        log_r = np.log(growth_to_reproduction(slopes, si_mean, si_sd))
        step = np.abs(np.diff(log_r, axis=1))
    step = np.where(np.isfinite(step), step, np.inf)
    return np.where(fit.kinks >= 0, step, np.nan)


def _drop_small_kinks(y: FloatArray, fit: KinkFit, shifts: IntArray, dispersion: Dispersion,
                      small_log: float, si_mean: float, si_sd: float) -> KinkFit:
    """Backward elimination by size: while a row's smallest ``|log R_{k+1} - log R_k|`` is
    below ``small_log``, that kink is removed and the row refitted, the others kept at their
    dates (which the profile stage chose with every kink in the model: small kinks there
    stand for gradual changes of growth, and removing them first would pull the large
    kinks' dates towards that curvature)."""
    if small_log <= 0:
        return fit
    for _ in range(fit.kinks.shape[1]):
        effect = _kink_effects(fit, si_mean, si_sd)
        least = np.argmin(np.where(np.isnan(effect), np.inf, effect), axis=1)
        small = effect[np.arange(effect.shape[0]), least] < small_log
        rows = np.flatnonzero(small)
        if rows.size == 0:
            break
        new = fit.kinks[rows].copy()
        new[np.arange(rows.size), least[rows]] = -1
        new, start = _moved_start(fit.coef[rows], new)
        fit = _kink_replace(fit, rows, _fit_kinks(y[rows], new, shifts[rows], dispersion,
                                                   True, start))
    return fit


def _detect_kinks(y: FloatArray, *, min_segment: int, max_breaks: int | None, penalty: float,
                  dispersion: Dispersion, level: float, level_shifts: IntArray | None,
                  block: int | None = None, min_change: float = 0.0, si_mean: float = 4.7,
                  si_sd: float = 2.9) -> tuple[KinkFit, Screening, _Profile]:
    rows, n = y.shape
    shifts = _normalise_days("level_shifts", level_shifts, rows, n)
    screening = screen_kinks(y, min_segment=min_segment, max_breaks=max_breaks,
                             penalty=penalty, level_shifts=shifts if shifts.shape[1] else None)
    kinks = screening.breaks.copy()
    kmax = kinks.shape[1]
    fit = fit_kinks(y, kinks, level_shifts=shifts, dispersion=dispersion)
    crit = float(stats.chi2.ppf(level, 1))
    log_n = np.log(np.maximum(np.isfinite(y).sum(axis=1), 2))
    # 1. each kink to its profile maximum (others fixed); 2. a kink whose removal costs less
    #    than its BIC penalty (2 log n: a slope change and a date), in units of the larger of
    #    the daily and the long-run dispersion, is dropped; refit; repeat
    todo = np.arange(rows)
    for _ in range(_PROFILE_PASSES + kmax):
        if todo.size == 0 or kmax == 0:
            break
        new = fit.kinks[todo].copy()
        weakest = np.full(todo.size, np.inf)
        weakest_at = np.full(todo.size, -1)
        for part in _chunks(np.arange(todo.size)):
            sub = _kink_fit_rows(fit, todo[part])
            scanner = _kink_scanner(y[todo[part]], sub, True)
            scale, _, _ = _long_run(y[todo[part]], sub, block)
            drop_one = scanner.scan_drop_one(sub.kinks)  # (rows, kmax, n)
            for j in range(kmax):
                has = sub.kinks[:, j] >= 0
                if not has.any():
                    continue
                r = np.flatnonzero(has)  # the rows holding a kink j
                gain = drop_one[r, j]
                others = new[part[r]].copy()
                others[:, j] = -1
                ok = kink_allowed(others, n, min_segment)
                best = np.argmax(np.where(ok, gain, -1.0), axis=1)
                at = np.arange(r.size)
                move = ok[at, best]
                pr = part[r]
                new[pr, j] = np.where(move, best, new[pr, j])
                worth = np.where(move, gain[at, np.where(move, best, 0)] / scale[r], np.inf)
                lower = worth < weakest[pr]
                weakest[pr] = np.where(lower, worth, weakest[pr])
                weakest_at[pr] = np.where(lower, j, weakest_at[pr])
        drop = weakest < penalty * 2.0 * log_n[todo]
        r = np.flatnonzero(drop)
        new[r, weakest_at[r]] = -1
        new, start = _moved_start(fit.coef[todo], new)
        changed = np.any(new != fit.kinks[todo], axis=1)
        todo = todo[changed]
        if todo.size == 0:
            break
        fit = _kink_replace(fit, todo, _fit_kinks(y[todo], new[changed], shifts[todo],
                                                   dispersion, True, start[changed]))
    fit = _drop_small_kinks(y, fit, shifts, dispersion, float(np.log1p(min_change)),
                            si_mean, si_sd)
    # intervals of each kink date from its profile at the final fit
    best = np.where(fit.kinks >= 0, fit.kinks, -1)
    lower = best.copy()
    upper = best.copy()
    # the long-run dispersion where it is the larger, as for the slopes, with an F(1, df) =
    # t(df)^2 cut-off there (its df are few)
    scale, df_b, wider = _long_run(y, fit, block)
    crit_rows = np.where(wider, stats.f.ppf(level, 1, np.where(wider, df_b, 1.0)), crit)
    scale = scale * crit_rows / crit
    for idx in _chunks(np.flatnonzero(fit.converged & (fit.kinks >= 0).any(axis=1))):
        _kink_intervals(y, _kink_fit_rows(fit, idx), idx, n, min_segment, crit, lower, upper,
                        scale[idx])
    return fit, screening, _Profile(best, lower, upper)


def _smooth_kinks(y: FloatArray, fit: KinkFit, ramp: FloatArray,
                  dispersion: Dispersion) -> KinkFit:
    """``fit`` refitted at the same kink days with smoothed hinges (``ramp``).

    The dates (and their intervals) stay those of the plain kinks' profile. Moving each date
    to the maximum of the smoothed model's profile (within ``search`` days) was tried and
    measured worse on validation seeds 100-149: steps >= 20 % dated within +-3 days 80.0 %
    against 85.5 %, false breaks 11.0 % against 9.0 % (the smoothed profile is flatter in
    the date)."""
    rows = y.shape[0]
    return _kink_replace(fit, np.arange(rows), _fit_kinks(
        y, fit.kinks, fit.level_shifts, dispersion, True, fit.coef, ramp=ramp))


def _kink_intervals(y: FloatArray, sub: KinkFit, idx: IntArray, n: int, min_segment: int,
                    crit: float, lower: IntArray, upper: IntArray,
                    scale: FloatArray | None = None) -> None:
    """Profile intervals of the kink dates of rows ``idx`` (written into ``lower``/``upper``):
    the connected run of days around each estimate whose profile statistic is within
    ``crit``."""
    scanner = _kink_scanner(y[idx], sub, True)
    drop_one = scanner.scan_drop_one(sub.kinks)
    for j in range(sub.kinks.shape[1]):
        rr = np.flatnonzero(sub.kinks[:, j] >= 0)
        if rr.size == 0:
            continue
        others = sub.kinks[rr].copy()
        others[:, j] = -1
        gain = drop_one[rr, j]
        ok = kink_allowed(others, n, min_segment)
        here = sub.kinks[rr, j]
        top = gain[np.arange(rr.size), here]
        phi = sub.dispersion if scale is None else scale
        stat = (top[:, None] - gain) / phi[rr, None]
        inset = ok & (stat <= crit)
        inset[np.arange(rr.size), here] = True
        day = np.arange(n)[None, :]
        gap_left = np.where(~inset & (day < here[:, None]), day, -1).max(axis=1)
        gap_right = np.where(~inset & (day > here[:, None]), day, n).min(axis=1)
        lower[idx[rr], j] = gap_left + 1
        upper[idx[rr], j] = gap_right - 1


def _long_run(y: FloatArray | None, fit: KinkFit, block: int | None
              ) -> tuple[FloatArray, FloatArray, BoolArray]:
    """The larger of ``fit``'s daily and long-run (:func:`block_dispersion`) dispersion, the
    long-run one's degrees of freedom and where it is the larger (nowhere without ``block``)."""
    phi = fit.dispersion
    if y is None or block is None:
        return phi, np.full(phi.shape, np.nan), np.zeros(phi.shape, dtype=bool)
    q = 2 + (fit.kinks >= 0).sum(axis=1) + (fit.level_shifts >= 0).sum(axis=1)
    phi_b, df = block_dispersion(y, fit.mu, block, q)
    wider = np.isfinite(phi_b) & (phi_b > phi)
    return np.where(wider, phi_b, phi), df, wider


def _unit_covariance(fit: KinkFit, date_free: bool, ramp: FloatArray | None,
                     dated: BoolArray | None = None) -> FloatArray:
    """Covariance of ``fit``'s coefficients at unit dispersion, the kink dates free or not."""
    return (date_aware_covariance(fit, ramp=ramp, dated=dated) if date_free
            else fit.covariance)


def _assemble_kinks(fit: KinkFit, screening: Screening, prof: _Profile, level: float,
                    si_mean: float, si_sd: float, lag: float | None, *,
                    y: FloatArray | None = None, block: int | None = None,
                    date_free: bool = True, ramp: FloatArray | None = None,
                    local: LocalFit | None = None) -> ChangePoints:
    rows, kmax = fit.kinks.shape
    n = fit.mu.shape[1]
    segs = kmax + 1
    has = fit.kinks >= 0
    # the dispersion (the larger of the daily and the long-run one) and the quantile of the
    # intervals: t on the long-run one's df where it is the larger
    phi, df, wider = _long_run(y, fit, block)
    z = float(special.ndtri(0.5 + level / 2.0))
    zq = np.where(wider, stats.t.ppf(0.5 + level / 2.0, np.where(wider, df, 1.0)), z)
    cov = _unit_covariance(fit, date_free, ramp) * phi[:, None, None]
    n_breaks = has.sum(axis=1).astype(np.int64)
    seg_ok = np.arange(segs)[None, :] <= n_breaks[:, None]
    p = fit.coef.shape[1]
    grad = np.zeros((rows, segs, p))
    grad[:, :, 1] = 1.0 / n
    for j in range(1, segs):
        grad[:, j, 2 : 2 + j] = 1.0 / n
    coef = np.nan_to_num(fit.coef)
    growth = np.einsum("rsp,rp->rs", grad, coef)
    with np.errstate(invalid="ignore"):
        se_r = np.sqrt(np.einsum("rsp,rpq,rsq->rs", grad, cov, grad))
    bad = ~seg_ok | ~fit.converged[:, None]
    growth = np.where(bad, np.nan, growth)
    g_lo, g_hi = growth - zq[:, None] * se_r, growth + zq[:, None] * se_r
    # slope change at each kink: the whole-segment fit's ...
    d_r = np.where(has & fit.converged[:, None], coef[:, 2 : 2 + kmax] / n, np.nan)
    idx = np.arange(kmax)
    with np.errstate(invalid="ignore"):
        se_d = np.sqrt(cov[:, 2 + idx, 2 + idx]) / n
    zd = np.broadcast_to(zq[:, None], (rows, kmax))
    if local is not None:  # ... or, where its refit converged, that with fixed knots
        lcov = _unit_covariance(local.fit, date_free, ramp, local.dated) * phi[:, None, None]
        col = 2 + np.where(has, local.position, 0)
        at = np.arange(rows)[:, None]
        with np.errstate(invalid="ignore"):
            d_l = np.take_along_axis(np.nan_to_num(local.fit.coef), col, axis=1) / n
            se_l = np.sqrt(lcov[at, col, col]) / n
        use = has & fit.converged[:, None] & local.fit.converged[:, None]
        d_r = np.where(use, d_l, d_r)
        se_d = np.where(use, se_l, se_d)
    breaks = np.where(has, fit.kinks, -1)
    bounds = np.concatenate([np.zeros((rows, 1), np.int64), np.where(has, fit.kinks, n),
                             np.full((rows, 1), n)], axis=1)
    start = np.where(seg_ok, bounds[:, :-1], -1)
    end = np.where(seg_ok, np.minimum(bounds[:, 1:], n), -1)
    end = np.where(seg_ok & (np.arange(segs)[None, :] == n_breaks[:, None]), n, end)
    dt, dt_lo, dt_hi = _doubling(growth, g_lo, g_hi)
    nan = np.full((rows, kmax), np.nan)
    if lag is None:
        tr = tr_lo = tr_hi = nan
    else:
        # a profile on whole days: the interval of days [lower, upper] is the continuous
        # time from lower - 1/2 to upper + 1/2 (a kink on day d stands for one anywhere in it)
        tr = np.where(has, breaks - lag, np.nan)
        tr_lo = np.where(has, prof.lower - 0.5 - lag, np.nan)
        tr_hi = np.where(has, prof.upper + 0.5 - lag, np.nan)
    return ChangePoints(
        n_breaks=n_breaks, breaks=breaks, break_lower=np.where(has, prof.lower, -1),
        break_upper=np.where(has, prof.upper, -1),
        growth_change=d_r, growth_change_lower=d_r - zd * se_d,
        growth_change_upper=d_r + zd * se_d,
        level_change=nan, level_change_lower=nan, level_change_upper=nan,
        segment_start=start, segment_end=end, growth=growth, growth_lower=g_lo,
        growth_upper=g_hi, doubling_time=dt, doubling_lower=dt_lo, doubling_upper=dt_hi,
        reproduction=growth_to_reproduction(growth, si_mean, si_sd),
        reproduction_lower=growth_to_reproduction(g_lo, si_mean, si_sd),
        reproduction_upper=growth_to_reproduction(g_hi, si_mean, si_sd),
        fit=fit, screening=screening, level=level,
        transmission_day=tr, transmission_lower=tr_lo, transmission_upper=tr_hi,
    )
