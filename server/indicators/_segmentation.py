"""Screening for breaks: binary segmentation of weighted lines (or constants), batched.

Shared by :mod:`server.indicators.changepoints` (transmission) and
:mod:`server.indicators.testing` (testing). Weighted residual sums of squares of a straight line on
any range of days come from prefix sums, so every candidate split of every region is scored in
O(regions x days). No database, web or clock here.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from server.indicators._arrays import (
    FloatArray,
    IntArray,
    as_nonnegative_counts,
    check_positive,
    freeze_arrays,
)

BoolArray = NDArray[np.bool_]

__all__ = ["Screening", "binary_segmentation", "screen_breaks"]

WEEK = 7
_SCREEN_ROWS = 64  # screening works on blocks of rows that stay in cache
_REFINE_REACH = 28  # days a screened break may move per refinement step


def check_int(name: str, value: int, minimum: int) -> int:
    """Check an integer of at least ``minimum``."""
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < minimum:
        raise ValueError(f"{name}: must be an integer >= {minimum}, got {value!r}")
    return int(value)


@dataclass(frozen=True, eq=False)
class Screening:
    """Candidate breaks of the screening stage.

    Attributes
    ----------
    breaks : ndarray of int, shape (regions, max_breaks)
        Break days of the chosen model, sorted (-1 after the last).
    rss : ndarray, shape (regions, max_breaks + 1)
        Weighted residual sum of squares of the models with 0, 1, ... breaks (inf where not
        fitted).
    criterion : ndarray, shape (regions, max_breaks + 1)
        Quasi-likelihood BIC of the models with 0, 1, ... breaks (inf where not fitted).
    n_breaks : ndarray of int, shape (regions,)
        Number of breaks at the criterion's minimum.
    dispersion : ndarray, shape (regions,)
        Residual variance of the largest model, the ``phi`` of the criterion.
    """

    breaks: IntArray
    rss: FloatArray
    criterion: FloatArray
    n_breaks: IntArray
    dispersion: FloatArray

    def __post_init__(self) -> None:
        freeze_arrays(self)




def centred_mean(y: FloatArray, observed: BoolArray, half: int) -> FloatArray:
    """Mean of the observed values within ``half`` days either side (NaN where none)."""
    rows, n = y.shape
    total = np.zeros((rows, n + 1))
    count = np.zeros((rows, n + 1))
    np.cumsum(np.where(observed, y, 0.0), axis=1, out=total[:, 1:])
    np.cumsum(observed, axis=1, out=count[:, 1:])
    lo = np.clip(np.arange(n) - half, 0, n)
    hi = np.clip(np.arange(n) + half + 1, 0, n)
    with np.errstate(invalid="ignore", divide="ignore"):
        return (total[:, hi] - total[:, lo]) / (count[:, hi] - count[:, lo])


def weekday_factors(y: FloatArray, observed: BoolArray, smooth: FloatArray) -> FloatArray:
    """Ratio of counts to the centred weekly mean per weekday class, geometric mean 1."""
    rows, n = y.shape
    cls = np.arange(n) % WEEK
    use = observed & np.isfinite(smooth)
    num = np.zeros((rows, WEEK))
    den = np.zeros((rows, WEEK))
    for k in range(WEEK):
        sel = use[:, cls == k]
        num[:, k] = np.where(sel, y[:, cls == k], 0.0).sum(axis=1)
        den[:, k] = np.where(sel, smooth[:, cls == k], 0.0).sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        f = (num + 0.5) / (den + 0.5)
    logf = np.log(f)
    return np.asarray(np.exp(logf - logf.mean(axis=1, keepdims=True)))


def prefix_sums(values: FloatArray) -> FloatArray:
    out = np.zeros((values.shape[0], values.shape[1] + 1))
    np.cumsum(values, axis=1, out=out[:, 1:])
    return out


class _LineCosts:
    """Weighted residual sum of squares of a straight-line fit on any day range, in O(1)."""

    def __init__(self, z: FloatArray, w: FloatArray, *, slope: bool = True) -> None:
        n = z.shape[1]
        self.slope = slope
        t = np.arange(n, dtype=np.float64) - 0.5 * (n - 1)
        self.s = [prefix_sums(w), prefix_sums(w * t), prefix_sums(w * t * t), prefix_sums(w * z),
                  prefix_sums(w * t * z), prefix_sums(w * z * z)]
        self.count = prefix_sums((w > 0).astype(np.float64))

    def at(self, index: IntArray, rows: IntArray | None = None) -> list[FloatArray]:
        """The prefix sums at ``index`` (shape (rows, m), or (rows, 1) to broadcast)."""
        if rows is None:
            return [np.take_along_axis(p, index, axis=1) for p in self.s]
        return [p[rows[:, None], index] for p in self.s]

    def full(self, rows: IntArray | None = None) -> list[FloatArray]:
        """The prefix sums at every day 0..n (no gather)."""
        return self.s if rows is None else [p[rows] for p in self.s]

    def cost(self, lo: IntArray, hi: IntArray) -> FloatArray:
        """RSS of the weighted line on days ``lo <= t < hi`` (arrays shaped like ``lo``)."""
        return self.rss(self.at(lo), self.at(hi))

    def rss(self, lo: list[FloatArray], hi: list[FloatArray]) -> FloatArray:
        """RSS from the prefix sums at the two ends (broadcasting)."""
        s0, s1, s2, sz, stz, szz = (b - a for a, b in zip(lo, hi, strict=True))
        if not self.slope:
            with np.errstate(invalid="ignore", divide="ignore"):
                mean_only = np.where(s0 > 0, sz * sz / np.where(s0 > 0, s0, 1.0), 0.0)
            return np.asarray(np.maximum(szz - mean_only, 0.0))
        det = s0 * s2 - s1 * s1
        with np.errstate(invalid="ignore", divide="ignore"):
            explained = (s2 * sz * sz - 2.0 * s1 * sz * stz + s0 * stz * stz) / det
            mean_only = np.where(s0 > 0, sz * sz / s0, 0.0)
        explained = np.where(det > 1e-9 * np.maximum(s0 * s2, 1e-300), explained, mean_only)
        return np.asarray(np.maximum(szz - explained, 0.0))


def _screen_inputs(
    counts: ArrayLike, min_segment: int, max_breaks: int | None, penalty: float
) -> tuple[FloatArray, FloatArray, int, int, float]:
    """Checked screening settings and the weighted log counts both screens search: log of the
    weekday-adjusted counts + 0.5, weighted by the 3-day centred mean + 0.5 (0 where missing)."""
    y = as_nonnegative_counts("counts", counts)
    n = y.shape[1]
    min_segment = check_int("min_segment", min_segment, 7)
    if n < 2 * min_segment:
        raise ValueError(f"counts: {n} days is fewer than 2 * min_segment = {2 * min_segment}")
    limit = n // min_segment - 1
    if max_breaks is None:
        max_breaks = min(10, limit)
    max_breaks = min(check_int("max_breaks", max_breaks, 0), limit)
    penalty = check_positive("penalty", penalty)
    observed = np.isfinite(y)
    smooth = centred_mean(y, observed, 3)
    f = weekday_factors(y, observed, smooth)
    adjusted = y / f[:, np.arange(n) % WEEK]
    z = np.where(observed, np.log(np.where(observed, adjusted, 0.0) + 0.5), 0.0)
    w = np.where(observed, np.nan_to_num(smooth, nan=0.0) + 0.5, 0.0)
    return z, w, min_segment, max_breaks, penalty


def screen_breaks(
    counts: ArrayLike,
    *,
    min_segment: int = 14,
    max_breaks: int | None = None,
    penalty: float = 1.0,
) -> Screening:
    """Screen for breaks by binary segmentation of weighted lines on weekday-adjusted log counts.

    Parameters
    ----------
    counts : array_like, shape (regions, days)
        Daily counts; NaN for a missing day.
    min_segment : int
        Fewest days between breaks and from either end (at least 7).
    max_breaks : int, optional
        Most breaks searched (default ``min(10, days // min_segment - 1)``).
    penalty : float
        Multiplier of the BIC penalty ``log n`` per parameter (1 is the plain BIC).

    Returns
    -------
    Screening

    Notes
    -----
    Weekday factors ``f_k`` are the ratios of counts to their centred 7-day mean, per weekday
    class, scaled to geometric mean 1. With ``m_t`` the centred 7-day mean, the screening fits
    ``z_t = log(y_t / f_{t mod 7} + 0.5)`` with weights ``w_t = m_t + 0.5`` (``Var log Y`` is
    about ``1/mu`` for a Poisson count, the delta method), a straight line per segment. The
    weighted residual sum of squares of a line on days ``[i, j)`` is
    ``S_zz - (S_tt S_z^2 - 2 S_t S_z S_tz + S_0 S_tz^2) / (S_0 S_tt - S_t^2)`` with ``S`` the
    weighted sums, differences of prefix sums. Binary segmentation adds, at each step and for
    every region at once, the split with the largest drop of that sum. Model k (the first k
    breaks found) has ``p_k = 3 k + 8`` parameters (a level and a slope per segment, a date per
    break, six weekday effects) and quasi-likelihood BIC
    ``RSS_k / phi + penalty * p_k * log n`` with ``phi = RSS_K / (n - p_K)`` from the largest
    model K; the RSS of weighted log counts stands in for the Pearson chi-square of the
    Poisson model.

    References
    ----------
    .. [1] Scott AJ, Knott M (1974). A cluster analysis method for grouping means in the
       analysis of variance. Biometrics 30:507-512 (binary segmentation).
    .. [2] Schwarz G (1978). Estimating the dimension of a model. Ann Stat 6:461-464.
    .. [3] Lebreton JD, Burnham KP, Clobert J, Anderson DR (1992). Modeling survival and
       testing biological hypotheses using marked animals. Ecol Monogr 62:67-118
       (quasi-likelihood information criteria, dividing by the dispersion).
    """
    z, w, min_segment, max_breaks, penalty = _screen_inputs(counts, min_segment, max_breaks,
                                                            penalty)
    rows, n = z.shape
    parts = [
        binary_segmentation(z[c], w[c], min_segment=min_segment, max_breaks=max_breaks,
                            penalty=penalty, slope=True, extra_params=WEEK - 1)
        for c in (slice(i, i + _SCREEN_ROWS) for i in range(0, max(rows, 1), _SCREEN_ROWS))
    ]
    return Screening(*(np.concatenate([getattr(p, f) for p in parts], axis=0)
                       for f in ("breaks", "rss", "criterion", "n_breaks", "dispersion")))


def binary_segmentation(
    z: FloatArray,
    w: FloatArray,
    *,
    min_segment: int,
    max_breaks: int,
    penalty: float = 1.0,
    slope: bool = True,
    extra_params: int = 0,
) -> Screening:
    """Binary segmentation of weighted series into straight lines (or constants), batched.

    Parameters
    ----------
    z, w : ndarray, shape (regions, days)
        Values and weights (weight 0 for a missing day; ``z`` finite everywhere).
    min_segment, max_breaks : int
        Fewest days per segment; most breaks searched.
    penalty : float
        Multiplier of the BIC penalty.
    slope : bool
        Fit a line per segment (True) or a constant (False).
    extra_params : int
        Parameters shared by all segments (weekday effects), counted in the criterion.

    Returns
    -------
    Screening

    Notes
    -----
    Each step adds to every region the split with the largest drop of the weighted residual
    sum of squares, evaluated for all days at once from prefix sums. The breaks are then moved,
    one at a time, to their best day between their neighbours within 28 days (two sweeps),
    and removed again
    one by one, the one whose removal raises the sum least first, its neighbours moved again
    after each removal (backward elimination), which gives the models with ``max_breaks``,
    ..., 1, 0 breaks. Model k has
    ``p_k = (q + 1) k + q + extra_params`` parameters (``q`` per segment, a date per break) and
    criterion ``RSS_k / phi + penalty * p_k * log n`` with ``phi = RSS_K / (n - p_K)`` from
    the largest model (Scott & Knott 1974; Schwarz 1978; Lebreton et al. 1992).
    """
    rows, n = z.shape
    costs = _LineCosts(z, w, slope=slope)
    every = np.arange(rows)
    days = np.arange(n + 1)
    tau = np.broadcast_to(days, (rows, n + 1))
    # 1. binary segmentation up to max_breaks
    is_bound = np.zeros((rows, n + 1), dtype=bool)
    is_bound[:, 0] = is_bound[:, n] = True
    for _ in range(max_breaks):
        lo = np.maximum.accumulate(np.where(is_bound, days, 0), axis=1)
        hi = np.minimum.accumulate(np.where(is_bound, days, n)[:, ::-1], axis=1)[:, ::-1]
        hi_next = np.concatenate([hi[:, 1:], np.full((rows, 1), n)], axis=1)
        lo_c = np.where(is_bound, np.concatenate([np.zeros((rows, 1), np.int64), lo[:, :-1]],
                                                 axis=1), lo)
        ok = (~is_bound) & (tau - lo_c >= min_segment) & (hi_next - tau >= min_segment)
        at_lo = costs.at(np.where(ok, lo_c, 0))
        at_hi = costs.at(np.where(ok, hi_next, n))
        at_t = costs.full()
        g = costs.rss(at_lo, at_hi) - costs.rss(at_lo, at_t) - costs.rss(at_t, at_hi)
        g = np.where(ok, g, -np.inf)
        best = np.argmax(g, axis=1)
        found = np.isfinite(g[every, best])
        is_bound[np.flatnonzero(found), best[found]] = True
    # bounds: 0, breaks..., then n repeated
    bounds = np.sort(np.where(is_bound, days, n), axis=1)[:, : max_breaks + 2]
    bounds[:, 0] = 0

    def rss_of(b: IntArray) -> FloatArray:
        return np.asarray(costs.cost(b[:, :-1], b[:, 1:]).sum(axis=1))


    # 2. refine every break, then 3. eliminate backwards, refining the neighbours
    for _sweep in range(2):
        for k in range(1, max_breaks + 1):
            _refine_rows(bounds, np.full(rows, k), costs, every, min_segment, n)
    models = np.full((rows, max_breaks + 1, max_breaks), -1, dtype=np.int64)
    rss = np.full((rows, max_breaks + 1), np.inf)
    real = (bounds[:, 1:-1] < n).sum(axis=1)
    for k in range(max_breaks, -1, -1):
        at = real == k
        rss[at, k] = rss_of(bounds)[at]
        models[at, k, :] = np.where(bounds[at, 1:-1] < n, bounds[at, 1:-1], -1)
        if k == 0:
            break
        # regions holding k breaks drop the one whose removal costs least
        inner = bounds[:, 1:-1]
        inc = (costs.cost(bounds[:, :-2], bounds[:, 2:]) - costs.cost(bounds[:, :-2], inner)
               - costs.cost(inner, bounds[:, 2:]))
        inc = np.where(inner < n, inc, np.inf)
        drop = np.argmin(inc, axis=1) + 1
        rr = np.flatnonzero(at)
        bounds[rr, drop[rr]] = n
        bounds[rr] = np.sort(bounds[rr], axis=1)
        real[rr] -= 1
        for offset in (-1, 0):
            part = bounds[rr]
            _refine_rows(part, drop[rr] + offset, costs, rr, min_segment, n)
            bounds[rr] = part

    n_obs = (w > 0).sum(axis=1).astype(np.float64)
    k_all = np.arange(max_breaks + 1)
    valid = np.isfinite(rss)
    q = 2 if slope else 1
    params = (q + 1) * k_all + q + extra_params
    largest = np.where(valid, k_all[None, :], -1).max(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        phi = rss[every, largest] / (n_obs - params[largest])
        phi = np.where(phi > 0, phi, 1.0)
        crit = rss / phi[:, None] + penalty * params[None, :] * np.log(n_obs)[:, None]
    crit = np.where(valid, crit, np.inf)
    n_breaks = np.argmin(crit, axis=1).astype(np.int64)
    chosen = np.sort(np.where(models[every, n_breaks] >= 0, models[every, n_breaks], n + 1),
                     axis=1)
    chosen = np.where(chosen > n, -1, chosen)
    return Screening(chosen, rss, crit, n_breaks, phi)


def _refine_rows(b: IntArray, k: IntArray, costs: _LineCosts, rows_idx: IntArray,
                 min_segment: int, n: int) -> None:
    """Move inner bound ``k[i]`` of row i to its best day between its neighbours, within
    ``_REFINE_REACH`` days of where it is (in place).

    ``b`` holds the bounds of the rows ``rows_idx`` of ``costs``; ``k`` one index per row.
    """
    if b.shape[0] == 0:
        return
    r = np.arange(b.shape[0])
    k = np.clip(k, 1, b.shape[1] - 2)
    lo, cur, hi = b[r, k - 1][:, None], b[r, k], b[r, k + 1][:, None]
    cand = cur[:, None] + np.arange(-_REFINE_REACH, _REFINE_REACH + 1)[None, :]
    ok = (cand > lo + min_segment - 1) & (cand < hi - min_segment + 1) & (cur < n)[:, None]
    cand = np.clip(cand, 0, n)
    at_lo = costs.at(lo, rows_idx)
    at_hi = costs.at(hi, rows_idx)
    at_t = costs.at(cand, rows_idx)
    total = np.where(ok, costs.rss(at_lo, at_t) + costs.rss(at_t, at_hi), np.inf)
    best = np.argmin(total, axis=1)
    move = np.isfinite(total[r, best])
    b[r[move], k[move]] = cand[r, best][move]


# ---------------------------------------------------------------- kinks (continuous lines)


def suffix_sums(values: FloatArray) -> FloatArray:
    """``S[..., tau] = sum of values[..., t] over t > tau`` for tau = 0 .. n - 1."""
    c = np.cumsum(values, axis=-1)
    return np.asarray(c[..., -1:] - c)


def _hinge_sums_last(v: FloatArray) -> FloatArray:
    """``sum_{t > tau} v_t (t - tau)`` for every tau along the last axis:
    ``S(v t) - tau S(v)`` from two forward cumulative sums (contiguous, no flips)."""
    n = v.shape[-1]
    t = np.arange(n, dtype=np.float64)
    return np.asarray(suffix_sums(v * t) - t * suffix_sums(v))


def hinge(n: int, tau: IntArray) -> FloatArray:
    """Hinge columns ``(t - tau)_+ / n``: shape ``tau.shape + (n,)``; tau >= n gives zeros."""
    t = np.arange(n, dtype=np.float64)
    return np.asarray(np.maximum(t - np.asarray(tau, dtype=np.float64)[..., None], 0.0) / n)


def hinge_scan(z: FloatArray, w: FloatArray, x: FloatArray) -> tuple[FloatArray, FloatArray]:
    """Weighted least squares of ``z`` on ``x`` and the drop of the residual sum of squares
    from adding one more hinge column ``(t - tau)_+`` for every tau at once.

    Parameters
    ----------
    z, w : ndarray, shape (regions, days)
        Response and weights (0 for a missing day).
    x : ndarray, shape (regions, days, p)
        Design; an all-zero column is allowed (its coefficient is fixed at 0).

    Returns
    -------
    rss : ndarray, shape (regions,)
        Weighted residual sum of squares of the fit on ``x``.
    gain : ndarray, shape (regions, days)
        ``rss`` minus the sum with the hinge at tau added:
        ``(h' W e)^2 / (h' W h - h' W X (X' W X)^{-1} X' W h)`` (the partitioned regression
        of Frisch and Waugh 1933; Lovell 1963), 0 where the hinge is collinear with ``x``.

    Notes
    -----
    Every inner product with a hinge is a difference of suffix sums:
    ``sum_{t > tau} v_t (t - tau) = S(v t) - tau S(v)``, so all days cost O(days x p^2).
    The work runs on (regions, p, days) arrays so that every cumulative sum and product is
    along contiguous memory.
    """
    xt = np.ascontiguousarray(x.transpose(0, 2, 1))  # (rows, p, n)
    return _scan_t(z, w, xt)


def _hinge_square_sums(w: FloatArray) -> FloatArray:
    """``sum_{t > tau} w_t (t - tau)^2`` for every tau."""
    t = np.arange(w.shape[-1], dtype=np.float64)
    return np.asarray(suffix_sums(w * t * t) - 2.0 * t * suffix_sums(w * t)
                      + t * t * suffix_sums(w))


def _scan_t(z: FloatArray, w: FloatArray, xt: FloatArray, c_fixed: FloatArray | None = None,
            hh: FloatArray | None = None) -> tuple[FloatArray, FloatArray]:
    """:func:`hinge_scan` on the design ``xt`` laid out (rows, p, days); ``c_fixed`` holds the
    hinge sums of the first columns of ``xt * w`` and ``hh`` those of the hinge itself, when
    already known."""
    rows, p, n = xt.shape
    xwt = xt * w[:, None, :]
    a = np.matmul(xwt, xt.transpose(0, 2, 1))
    zero = np.einsum("rpp->rp", a) <= 0
    a[:, np.arange(p), np.arange(p)] += zero
    try:
        ainv = np.linalg.inv(a)
    except np.linalg.LinAlgError:  # columns with next to no weight (counts near 0 at an end)
        ainv = np.linalg.pinv(a, hermitian=True)
    beta = np.einsum("rpq,rq->rp", ainv, np.matmul(xwt, z[..., None])[..., 0])
    e = z - np.matmul(beta[:, None, :], xt)[:, 0, :]
    rss = (w * e * e).sum(axis=1)
    num = _hinge_sums_last(w * e)
    if c_fixed is None:
        c = _hinge_sums_last(xwt)  # (rows, p, n)
    else:
        f = c_fixed.shape[1]
        c = np.concatenate([c_fixed, _hinge_sums_last(xwt[:, f:])], axis=1) if f < p else c_fixed
    if hh is None:
        hh = _hinge_square_sums(w)
    quad = (np.matmul(ainv, c) * c).sum(axis=1)
    den = hh - quad
    with np.errstate(invalid="ignore", divide="ignore"):
        gain = np.where(den > 1e-9 * np.maximum(hh, 1e-300), num * num / den, 0.0)
    return rss, np.asarray(np.clip(gain, 0.0, rss[:, None]))


def _safe_inverse(a: FloatArray) -> FloatArray:
    """Inverse of a batch of symmetric matrices; a zero diagonal entry (a column with no
    weight) is set to 1 first, and a singular batch falls back to the pseudo-inverse."""
    a = np.array(a, copy=True)
    p = a.shape[-1]
    zero = np.einsum("rpp->rp", a) <= 0
    a[:, np.arange(p), np.arange(p)] += zero
    try:
        return np.asarray(np.linalg.inv(a))
    except np.linalg.LinAlgError:  # columns with next to no weight (counts near 0 at an end)
        return np.asarray(np.linalg.pinv(a, hermitian=True))


class KinkScanner:
    """:func:`hinge_scan` of ``z`` on a line with kinks plus ``extra`` columns, for many kink
    sets on the same ``z`` and ``w``.

    The fixed columns ``F`` (level, slope, ``extra``) are the same in every scan, so their
    part of the least-squares algebra is done once: ``F' W F`` and its inverse, ``F' W z``,
    the hinge sums ``c_F(tau)`` of ``W F`` and ``c_F' (F' W F)^{-1} c_F`` for every day. A scan
    with kink columns ``K`` then needs only the partitioned inverse (Schur complement
    ``S = K' W K - K' W F (F' W F)^{-1} F' W K``): ``c' A^{-1} c = c_F' (F'WF)^{-1} c_F +
    r' S^{-1} r`` with ``r = c_K - K' W F (F' W F)^{-1} c_F``, and the residual's hinge sums
    ``h' W e = h' W z - c_F' b_F - c_K' b_K`` (Frisch & Waugh 1933; the block inverse,
    e.g. Seber & Lee 2003, A.9). Rows are grouped by their number of kinks so that no
    all-zero hinge column is carried. The results equal :func:`hinge_scan` on
    :func:`line_design` to rounding.
    """

    def __init__(self, z: FloatArray, w: FloatArray, extra: FloatArray | None = None) -> None:
        rows, n = z.shape
        self.z, self.w, self.n = z, w, n
        t = np.arange(n, dtype=np.float64)
        base = np.broadcast_to(np.stack([np.ones(n), (t - 0.5 * (n - 1)) / n]), (rows, 2, n))
        cols = [base] if extra is None else [base, extra.transpose(0, 2, 1)]
        self.fixed = np.ascontiguousarray(np.concatenate(cols, axis=1))
        fw = self.fixed * w[:, None, :]
        self.c_fixed = _hinge_sums_last(fw)  # (rows, f, n)
        self.hh = _hinge_square_sums(w)
        self.finv = _safe_inverse(np.matmul(fw, self.fixed.transpose(0, 2, 1)))  # (rows, f, f)
        self.bf = np.matmul(fw, z[..., None])[..., 0]  # (rows, f)
        pc = np.matmul(self.finv, self.c_fixed)  # (F'WF)^{-1} c_F, (rows, f, n)
        self.quad_f = (pc * self.c_fixed).sum(axis=1)  # c_F' (F'WF)^{-1} c_F, (rows, n)
        beta_f = np.einsum("rpq,rq->rp", self.finv, self.bf)
        self.rss0 = (w * z * z).sum(axis=1) - (beta_f * self.bf).sum(axis=1)
        self.hz = _hinge_sums_last(w * z)  # h' W z for every tau
        self.num0 = self.hz - np.einsum("rp,rpn->rn", beta_f, self.c_fixed)  # h' W e_F
        u = t - 0.5 * (n - 1)  # centred days: smaller sums, less cancellation below
        self.u = u
        self.su = [suffix_sums(w), suffix_sums(w * u), suffix_sums(w * u * u)]
        # sum_{t > tau} w_t (u_t - u_tau) / n and sum_{t > tau} w_t u_t (u_t - u_tau) / n: the
        # hinge sums of a kink column c_K(tau) in two terms (see _scan_group_raw)
        self.h1 = (self.su[1] - u * self.su[0]) / n
        self.h2 = (self.su[2] - u * self.su[1]) / n

    def _cross(self, r: IntArray, a: FloatArray, b: FloatArray, at: IntArray) -> FloatArray:
        """``sum_{t > at} w_t (u_t - a)(u_t - b)`` for rows ``r`` (``at`` shaped (rows, i, j),
        ``a`` and ``b`` broadcasting to it, in centred days ``u``), from the suffix sums of
        ``w``, ``w u`` and ``w u^2``."""
        s0, s1, s2 = (np.take_along_axis(self._take(p, r)[:, None, :], at, axis=2)
                      for p in self.su)
        return np.asarray(s2 - (a + b) * s1 + a * b * s0)

    def scan(self, kinks: IntArray, rows: IntArray | None = None
             ) -> tuple[FloatArray, FloatArray]:
        """``(rss, gain)`` of :func:`hinge_scan` for ``kinks`` (shape (len(rows), k), -1 for
        none) on the rows ``rows`` (all by default)."""
        if rows is None:
            rows = np.arange(self.z.shape[0])
        k = sort_kinks(kinks)
        count = (k >= 0).sum(axis=1)
        rss = np.empty(rows.size)
        gain = np.empty((rows.size, self.n))
        for m in np.unique(count):
            i = np.flatnonzero(count == m)
            rss[i], gain[i] = self._scan_group(rows[i], k[i, :m])
        return rss, gain

    def scan_drop_one(self, kinks: IntArray, rows: IntArray | None = None) -> FloatArray:
        """The gains of :meth:`scan` with each kink left out in turn, the others fixed:
        ``gain[:, j]`` equals ``scan(kinks without column j)[1]`` (shape (len(rows), k, n);
        zero for a -1 entry). ``kinks`` must be sorted (-1 last).

        All from one pass with every kink in: leaving kink j out of the quadratic form
        ``r' S^{-1} r`` and the fit ``r' S^{-1} b`` of the Schur-complement algebra is the
        rank-one downdate ``- (e_j' S^{-1} r)(e_j' S^{-1} b) / (S^{-1})_jj`` (the inverse of a
        partitioned matrix, Seber & Lee 2003, A.9), so the k leave-one-out scans cost about
        one scan.
        """
        if rows is None:
            rows = np.arange(self.z.shape[0])
        count = (kinks >= 0).sum(axis=1)
        k = kinks.shape[1]
        out = np.zeros((rows.size, k, self.n))
        for m in np.unique(count):
            if m == 0:
                continue
            i = np.flatnonzero(count == m)
            with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
                g = self._drop_group_raw(rows[i], kinks[i, :m])
            out[i, :m] = np.where(np.isfinite(g), g, 0.0)
        return out

    def _drop_group_raw(self, r: IntArray, kinks: IntArray) -> FloatArray:
        sinv, res, beta_k, rss = self._kink_terms(r, kinks)
        quad = self._take(self.quad_f, r)[:, None, :]
        num = self._take(self.num0, r)[:, None, :]
        ps = np.matmul(sinv, res)  # (rows, k, n): e_j' S^{-1} r for every j
        quad = quad + (ps * res).sum(axis=1, keepdims=True)
        num = num - np.einsum("rk,rkn->rn", beta_k, res)[:, None, :]
        d = np.einsum("rkk->rk", sinv)[:, :, None]
        quad_j = quad - ps * ps / d
        num_j = num + ps * (beta_k[:, :, None] / d)
        rss_j = np.maximum(rss[:, None] + beta_k * beta_k / d[..., 0], 0.0)
        hh = self._take(self.hh, r)[:, None, :]
        den = hh - quad_j
        gain = np.where(den > 1e-9 * np.maximum(hh, 1e-300), num_j * num_j / den, 0.0)
        return np.asarray(np.clip(gain, 0.0, rss_j[:, :, None]))

    def rss(self, kinks: IntArray, rows: IntArray | None = None) -> FloatArray:
        """The ``rss`` of :meth:`scan` alone (no pass over the days)."""
        if rows is None:
            rows = np.arange(self.z.shape[0])
        k = sort_kinks(kinks)
        count = (k >= 0).sum(axis=1)
        out = np.empty(rows.size)
        for m in np.unique(count):
            i = np.flatnonzero(count == m)
            if m == 0:
                out[i] = self.rss0[rows[i]]
                continue
            with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
                out[i] = self._kink_small(rows[i], k[i, :m])[-1]
        return np.maximum(out, 0.0)

    def drop_costs(self, kinks: IntArray, rows: IntArray) -> FloatArray:
        """Rise of the weighted RSS from dropping each of the kinks ``kinks`` (every entry a
        kink, shape (len(rows), k)): ``b_j^2 / [(X' W X)^{-1}]_jj``, the partial F numerator,
        with ``S^{-1}`` the kinks' block of ``(X' W X)^{-1}`` (partitioned inverse), so no
        pass over the days."""
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            _, sinv, beta_k, _ = self._kink_small(rows, kinks)
            return np.asarray(beta_k * beta_k / np.einsum("rkk->rk", sinv))

    def _kink_small(self, r: IntArray, kinks: IntArray
                    ) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
        """``(F'WF)^{-1} F'WK``, ``S^{-1}``, ``b_K`` and the residual sum of squares with the
        kinks ``kinks`` (k >= 1): the k x k algebra, gathered from the stored sums."""
        n = self.n
        finv, bf = self.finv[r], self.bf[r]
        f = finv.shape[1]
        g = self.c_fixed[r[:, None, None], np.arange(f)[None, :, None],
                         kinks[:, None, :]] / n  # F' W K, (rows, f, k)
        bk = self.hz[r[:, None], kinks] / n  # K' W z
        ku = kinks - 0.5 * (n - 1)
        at = np.maximum(kinks[:, :, None], kinks[:, None, :])
        hh_k = self._cross(r, ku[:, :, None], ku[:, None, :], at) / (n * n)  # K' W K
        fg = np.matmul(finv, g)  # (F'WF)^{-1} F' W K
        sinv = _safe_inverse(hh_k - np.matmul(g.transpose(0, 2, 1), fg))
        beta_f0 = np.einsum("rpq,rq->rp", finv, bf)
        bres = bk - np.einsum("rpk,rp->rk", g, beta_f0)
        beta_k = np.einsum("rkl,rl->rk", sinv, bres)
        # residual sum of squares less the fixed columns' fit, by the block inverse:
        # e = z - F b_F - K b_K with b_F = b_F0 - (F'WF)^{-1} G b_K
        rss = self.rss0[r] - (beta_k * bres).sum(axis=1)
        return fg, sinv, beta_k, rss

    def _kink_terms(self, r: IntArray, kinks: IntArray
                    ) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
        """``S^{-1}``, the residualised hinge sums ``r`` (rows, k, n), the kink coefficients
        ``b_K`` and the residual sum of squares with the kinks ``kinks`` (k >= 1)."""
        n = self.n
        fg, sinv, beta_k, rss = self._kink_small(r, kinks)
        kap = kinks[:, :, None]  # (rows, k, 1)
        ku = kinks - 0.5 * (n - 1)
        # c_K(tau) = sum_{t > max(tau, kappa)} w (u - kappa)(u - tau) / n
        # = H2(tau) - kappa H1(tau) right of the kink and H2(kappa) - tau H1(kappa) left of
        # it, with H1(x) = sum_{t > x} w (u - x) / n and H2(x) = sum_{t > x} w u (u - x) / n
        # (centred days u); H1 and H2 are stored, so each kink costs a few passes
        right = np.arange(n)[None, None, :] >= kap
        h1, h2 = self._take(self.h1, r)[:, None, :], self._take(self.h2, r)[:, None, :]
        h1k = self.h1[r[:, None], kinks][:, :, None]
        h2k = self.h2[r[:, None], kinks][:, :, None]
        ck = np.where(right, h2 - ku[:, :, None] * h1,
                      h2k - self.u[None, None, :] * h1k)  # (rows, k, n)
        # r = c_K - G' (F'WF)^{-1} c_F, the hinge sums of K after regressing it on F
        res = ck - np.matmul(fg.transpose(0, 2, 1), self._take(self.c_fixed, r))
        return sinv, res, beta_k, rss

    def _take(self, a: FloatArray, r: IntArray) -> FloatArray:
        """``a[r]``, a view when ``r`` is every row in order (no copy of a large array)."""
        if r.size == a.shape[0] and (r.size == 0 or (r[0] == 0 and np.all(np.diff(r) == 1))):
            return a
        return a[r]

    def _scan_group(self, r: IntArray, kinks: IntArray) -> tuple[FloatArray, FloatArray]:
        # a kink column with next to no weight (a fit whose means fell to ~0 after a day)
        # makes the Schur complement ~0 and its inverse huge: no warning, no gain there
        with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
            rss, gain = self._scan_group_raw(r, kinks)
        return rss, np.where(np.isfinite(gain), gain, 0.0)

    def _scan_group_raw(self, r: IntArray, kinks: IntArray) -> tuple[FloatArray, FloatArray]:
        quad, num0 = self._take(self.quad_f, r), self._take(self.num0, r)
        rss0 = self.rss0[r]
        if kinks.shape[1] == 0:
            rss, quad, num = rss0, quad, num0
        else:
            # every product with a hinge column (t - kappa)_+ / n is a sum over t > kappa:
            # gathered from the scanner's hinge and suffix sums, no pass over the days
            sinv, res, beta_k, rss = self._kink_terms(r, kinks)
            quad = quad + (np.matmul(sinv, res) * res).sum(axis=1)
            num = num0 - np.einsum("rk,rkn->rn", beta_k, res)
        rss = np.maximum(rss, 0.0)
        hh = self._take(self.hh, r)
        den = hh - quad
        with np.errstate(invalid="ignore", divide="ignore"):
            gain = np.where(den > 1e-9 * np.maximum(hh, 1e-300), num * num / den, 0.0)
        return rss, np.asarray(np.clip(gain, 0.0, rss[:, None]))


def scan_kinks(z: FloatArray, w: FloatArray, kinks: IntArray,
               extra: FloatArray | None = None) -> tuple[FloatArray, FloatArray]:
    """:func:`hinge_scan` on ``line_design(n, kinks, extra)`` by :class:`KinkScanner`."""
    return KinkScanner(z, w, extra).scan(kinks)


def kink_allowed(kinks: IntArray, n: int, min_segment: int) -> BoolArray:
    """Days where a new kink keeps ``min_segment`` days from both ends and every kink in
    ``kinks`` (shape (regions, k), -1 for none): shape (regions, n)."""
    t = np.arange(n)
    ok = (t >= min_segment) & (t <= n - min_segment)
    rows = kinks.shape[0]
    rr, jj = np.nonzero(kinks >= 0)
    if rr.size == 0:
        return np.broadcast_to(ok, (rows, n)).copy()
    # days closer than min_segment to a kink: +1 where such a run starts, -1 one past its
    # end, a cumulative sum counts the runs covering each day
    k = kinks[rr, jj]
    edges = np.zeros((rows, n + 1), dtype=np.int32)
    np.add.at(edges, (rr, np.maximum(k - min_segment + 1, 0)), 1)
    np.add.at(edges, (rr, np.minimum(k + min_segment, n)), -1)
    return np.asarray(ok[None, :] & (np.cumsum(edges[:, :n], axis=1) == 0))


def screen_kinks(
    counts: ArrayLike,
    *,
    min_segment: int = 14,
    max_breaks: int | None = None,
    penalty: float = 1.0,
    level_shifts: IntArray | None = None,
) -> Screening:
    """Screen for changes of growth rate: forward selection of hinges on weekday-adjusted log
    counts, the number chosen by a quasi-likelihood BIC.

    Parameters
    ----------
    counts : array_like, shape (regions, days)
        Daily counts; NaN for a missing day.
    min_segment : int
        Fewest days between kinks and from either end (at least 7).
    max_breaks : int, optional
        Most kinks searched (default ``min(10, days // min_segment - 1)``).
    penalty : float
        Multiplier of the BIC penalty ``log n`` per parameter (1 is the plain BIC).
    level_shifts : ndarray of int, shape (regions, m), optional
        Days from which the counts' level may jump for a reason other than transmission (a
        testing change; -1 for none): a step column ``1(t >= day)`` each, in every model.

    Returns
    -------
    Screening

    Notes
    -----
    ``z_t = log(y_t / f_{t mod 7} + 0.5)`` with weights ``m_t + 0.5`` as in
    :func:`screen_breaks`, but one continuous line with kinks: ``z = a + b t + sum_k d_k
    (t - tau_k)_+``. Each step adds, for every region at once, the kink with the largest drop
    of the weighted residual sum of squares (:func:`hinge_scan`; forward stepwise selection of
    hinges as in MARS, Friedman 1991); then, from the largest model, the kink whose removal
    raises the sum least is dropped and its two neighbours are moved to their best days (one
    sweep), down to none (backward elimination); each k keeps the better of the two paths.
    Model k has
    ``p_k = 2 k + 8`` parameters (a slope change and a date per kink, level and slope, six
    weekday effects) and criterion
    ``RSS_k / phi + penalty * p_k * log n`` with ``phi = RSS_K / (n - p_K)`` from the largest
    model, at least 1 (Schwarz 1978; Lebreton et al. 1992). The chosen kinks are then moved, one
    at a time, to the best day between their neighbours (two sweeps).

    References
    ----------
    .. [1] Friedman JH (1991). Multivariate adaptive regression splines. Ann Stat 19:1-67.
    .. [2] Schwarz G (1978). Estimating the dimension of a model. Ann Stat 6:461-464.
    """
    z, w, min_segment, max_breaks, penalty = _screen_inputs(counts, min_segment, max_breaks,
                                                            penalty)
    rows, n = z.shape
    steps = step_columns(n, level_shifts, rows)
    parts = [
        _kink_block(z[c], w[c], min_segment, max_breaks, penalty,
                    None if steps is None else steps[c])
        for c in (slice(i, i + _SCREEN_ROWS) for i in range(0, max(rows, 1), _SCREEN_ROWS))
    ]
    return Screening(*(np.concatenate([getattr(p, f) for p in parts], axis=0)
                       for f in ("breaks", "rss", "criterion", "n_breaks", "dispersion")))


def line_design(n: int, kinks: IntArray, extra: FloatArray | None = None,
                ramp: FloatArray | None = None) -> FloatArray:
    """``[1, (t - (n-1)/2) / n, hinges of kinks (zero column where -1), extra...]``:
    shape (regions, n, 2 + k + extra). With ``ramp`` (length ``2 n + 1``, ``ramp[n + u]``
    the smoothed hinge ``K(u)`` at ``u = t - tau``) each hinge column is ``K(t - tau) / n``
    instead of ``(t - tau)_+ / n``."""
    rows, k = kinks.shape
    t = np.arange(n, dtype=np.float64)
    base = np.stack([np.ones(n), (t - 0.5 * (n - 1)) / n], axis=1)
    cols = [np.broadcast_to(base, (rows, n, 2))]
    if k and ramp is not None:
        if ramp.shape != (2 * n + 1,):
            raise ValueError(f"ramp: expected shape ({2 * n + 1},), got {ramp.shape}")
        idx = n + np.arange(n)[None, :, None] - np.where(kinks >= 0, kinks, 0)[:, None, :]
        cols.append(np.where(kinks[:, None, :] >= 0, ramp[idx] / n, 0.0))
    elif k:
        h = hinge(n, np.where(kinks >= 0, kinks, n))  # (rows, k, n)
        cols.append(h.transpose(0, 2, 1))
    if extra is not None:
        cols.append(np.broadcast_to(extra, (rows, n, extra.shape[-1])))
    return np.concatenate(cols, axis=2)


def refine_kinks(scanner: KinkScanner, kinks: IntArray, min_segment: int, sweeps: int = 2,
                 which: BoolArray | None = None, rows: IntArray | None = None) -> IntArray:
    """Move each kink, one at a time, to the day of least weighted RSS with the others fixed.

    ``kinks`` belong to ``rows`` of the scanner (all by default); ``which`` (shape of
    ``kinks``) limits the moves to the marked kinks. Only rows holding a kink to move are
    scanned, and a further sweep only rows where a kink moved.
    """
    n = scanner.n
    if rows is None:
        rows = np.arange(kinks.shape[0])
    kinks = kinks.copy()
    mask = kinks >= 0 if which is None else (kinks >= 0) & which
    active = np.ones(kinks.shape[0], dtype=bool)
    for _ in range(sweeps):
        moved = np.zeros(kinks.shape[0], dtype=bool)
        for j in range(kinks.shape[1]):
            r = np.flatnonzero(mask[:, j] & active)
            if r.size == 0:
                continue
            others = kinks[r].copy()
            others[:, j] = -1
            _, gain = scanner.scan(others, rows[r])
            ok = kink_allowed(others, n, min_segment)
            best = np.argmax(np.where(ok, gain, -1.0), axis=1)
            new = np.where(ok[np.arange(r.size), best], best, kinks[r, j])
            moved[r] |= new != kinks[r, j]
            kinks[r, j] = new
        active = moved
        if not active.any():
            break
    return sort_kinks(kinks)


def sort_kinks(kinks: IntArray) -> IntArray:
    """Sorted ascending with -1 entries last."""
    big = np.iinfo(np.int64).max
    s = np.sort(np.where(kinks >= 0, kinks, big), axis=1)
    return np.asarray(np.where(s == big, -1, s), dtype=np.int64)


def step_columns(n: int, days: IntArray | None, rows: int) -> FloatArray | None:
    """Step columns ``1(t >= day)`` shaped (regions, n, m) (zero where day is -1)."""
    if days is None:
        return None
    d = np.asarray(days)
    if d.ndim == 1:
        d = d[:, None] if d.shape[0] == rows else np.broadcast_to(d, (rows, d.shape[0]))
    if d.ndim != 2 or d.shape[0] != rows:
        raise ValueError(f"level_shifts: expected shape (regions, m) with {rows} regions, "
                         f"got {d.shape}")
    if d.size and not np.issubdtype(d.dtype, np.integer):
        raise ValueError("level_shifts: day indices must be integers (-1 for none)")
    if np.any((d != -1) & ((d < 1) | (d >= n))):
        raise ValueError(f"level_shifts: day indices must lie in 1..{n - 1} (-1 for none)")
    t = np.arange(n)
    cols = (t[None, :, None] >= d[:, None, :]) & (d[:, None, :] >= 0)
    return np.asarray(cols, dtype=np.float64)


def forward_kinks(scanner: KinkScanner, rows: int, n: int, min_segment: int, max_breaks: int
                  ) -> tuple[IntArray, FloatArray, IntArray]:
    """Forward selection of up to ``max_breaks`` kinks per row, each the day that lowers the
    residual sum most while keeping segments of ``min_segment`` days: the kinks in the order
    found (-1: none), the residual sum with the first k of them (inf where fewer were found)
    and the kinks of each size (rows, max_breaks + 1, max_breaks)."""
    every = np.arange(rows)
    kinks = np.full((rows, max_breaks), -1, dtype=np.int64)
    rss = np.full((rows, max_breaks + 1), np.inf)
    path = np.full((rows, max_breaks + 1, max_breaks), -1, dtype=np.int64)
    for k in range(max_breaks + 1):
        r0, gain = scanner.scan(kinks[:, :k])
        rss[:, k] = np.where(np.all(kinks[:, :k] >= 0, axis=1), r0, np.inf)
        path[:, k] = kinks
        if k == max_breaks:
            break
        ok = kink_allowed(kinks[:, :k], n, min_segment)
        best = np.argmax(np.where(ok, gain, -1.0), axis=1)
        found = ok[every, best] & np.all(kinks[:, :k] >= 0, axis=1)
        kinks[found, k] = best[found]
    return kinks, rss, path


def _kink_block(z: FloatArray, w: FloatArray, min_segment: int, max_breaks: int,
                penalty: float, steps: FloatArray | None = None) -> Screening:
    rows, n = z.shape
    every = np.arange(rows)
    scanner = KinkScanner(z, w, steps)
    kinks, rss, path = forward_kinks(scanner, rows, n, min_segment, max_breaks)
    # backward elimination from the largest model: drop the kink whose removal costs least,
    # move the rest to their best days; keep whichever of the two paths fits better at each k
    cur = sort_kinks(kinks)
    for k in range(max_breaks, 0, -1):
        r = np.flatnonzero((cur >= 0).sum(axis=1) == k)
        if r.size == 0:
            continue
        cost = scanner.drop_costs(cur[r, :k], r)
        j = np.argmin(np.where(cur[r, :k] >= 0, cost, np.inf), axis=1)
        part = cur[r].copy()
        part[np.arange(r.size), j] = -1
        # the kinks on either side of the dropped one (sorted positions j - 1 and j) move
        pos = np.arange(cur.shape[1])[None, :]
        near = (pos == j[:, None] - 1) | (pos == j[:, None])
        part = refine_kinks(scanner, sort_kinks(part), min_segment, sweeps=1, which=near,
                            rows=r)
        cur[r] = part
        back = scanner.rss(part[:, : k - 1], r)  # the sum alone: no gains needed
        better = back < rss[r, k - 1]
        rss[r[better], k - 1] = back[better]
        path[r[better], k - 1] = part[better]
    n_obs = (w > 0).sum(axis=1).astype(np.float64)
    k_all = np.arange(max_breaks + 1)
    valid = np.isfinite(rss)
    n_steps = 0 if steps is None else steps.any(axis=1).sum(axis=1)
    params = 2 * k_all + 2 + (WEEK - 1)
    largest = np.where(valid, k_all[None, :], -1).max(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        phi = rss[every, largest] / (n_obs - params[largest] - n_steps)
        phi = np.where(phi > 1.0, phi, 1.0)  # quasi-Poisson: never below Poisson variance
        crit = rss / phi[:, None] + penalty * params[None, :] * np.log(n_obs)[:, None]
    crit = np.where(valid, crit, np.inf)
    n_breaks = np.argmin(crit, axis=1).astype(np.int64)
    chosen = path[every, n_breaks]
    chosen = refine_kinks(scanner, sort_kinks(chosen), min_segment)
    return Screening(chosen, rss, crit, n_breaks, phi)
