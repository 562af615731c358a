"""Poisson log-linear fits with one intercept per level and an optional common slope, batched.

Both the growth-rate model (weekday levels, slope = r) and the improved Farrington model (seasonal
levels, slope = trend) are Poisson GLMs whose design is "one intercept per level of a factor, plus
at most one numeric column". For that design the intercepts have closed forms given the slope, so
the fit reduces to a one-dimensional concave maximisation (the profile likelihood of the slope),
solved by safeguarded Newton steps for every row at once. Rows whose maximum-likelihood estimate
does not exist (a level without counts, or counts only at one end of every level) are reported so
the caller can treat them as before; no estimate is invented for them.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from server.indicators._arrays import FloatArray

BoolArray = NDArray[np.bool_]

MAX_NEWTON_ITER = 60
STEP_TOL = 1e-11  # convergence when |step| * (range of t) is below this


@dataclass(frozen=True, eq=False)
class Levels:
    """How the n observations of a row fall into factor levels.

    Either periodic (observation i is in level ``i % period``; the weekday factor of a window)
    or in contiguous blocks of the given sizes (columns sorted by level beforehand). Level sums
    and broadcasts use slices or ``ufunc.reduceat``, which are much faster than a product with
    an indicator matrix for these narrow shapes.
    """

    n: int
    period: int = 0
    sizes: tuple[int, ...] = ()

    @property
    def count(self) -> int:
        return self.period if self.period else len(self.sizes)

    def reduce(self, ufunc: np.ufunc, a: FloatArray) -> FloatArray:
        """``ufunc`` reduced over the observations of each level: shape (rows, levels)."""
        if self.period:
            out = a[:, : self.period].copy()
            for first in range(self.period, self.n, self.period):
                part = a[:, first : first + self.period]
                ufunc(out[:, : part.shape[1]], part, out=out[:, : part.shape[1]])
            return out
        starts = np.concatenate([[0], np.cumsum(self.sizes)[:-1]])
        return np.asarray(ufunc.reduceat(a, starts, axis=1), dtype=a.dtype)

    def sum(self, a: FloatArray) -> FloatArray:
        return self.reduce(np.add, a)

    def expand(self, v: FloatArray) -> FloatArray:
        """Level values broadcast back to the observations: shape (rows, n)."""
        if self.period:
            reps = -(-self.n // self.period)
            return np.tile(v, (1, reps))[:, : self.n]
        return np.repeat(v, self.sizes, axis=1)


@dataclass(frozen=True, eq=False)
class LevelFit:
    """Maximum-likelihood fit of ``log mu_i = a_{k(i)} + b t_i`` for every row.

    Attributes
    ----------
    mu : ndarray, shape (rows, n)
        Fitted means (1 where an observation has weight 0; meaningless where ``exists`` is False).
    slope : ndarray, shape (rows,)
        ``b`` (0 for a fit without slope).
    slope_var : ndarray, shape (rows,)
        Unscaled variance of ``b``, the (b, b) element of ``(X' W X)^{-1}`` with
        ``W = diag(w mu)`` (NaN without slope).
    intercepts : ndarray, shape (rows, levels)
        ``a_k`` for the uncentred ``t`` given by the caller.
    leverage : ndarray, shape (rows, n)
        Hat values ``w_i mu_i x_i' (X' W X)^{-1} x_i`` (0 where the weight is 0).
    exists : ndarray of bool, shape (rows,)
        False where the maximum-likelihood estimate does not exist or Newton did not converge.
    """

    mu: FloatArray
    slope: FloatArray
    slope_var: FloatArray
    intercepts: FloatArray
    leverage: FloatArray
    exists: BoolArray


def fit_levels(
    y: FloatArray,
    weights: FloatArray,
    levels: Levels,
    t: FloatArray | None,
    *,
    start: FloatArray | None = None,
) -> LevelFit:
    """Fit the Poisson model with level intercepts (and a common slope of ``t``) to every row.

    Parameters
    ----------
    y : ndarray, shape (rows, n)
        Counts; any value where the weight is 0 (it is ignored).
    weights : ndarray, shape (rows, n)
        Prior weights, 0 to leave an observation out.
    levels : Levels
        Which level each observation belongs to.
    t : ndarray, shape (n,), optional
        The slope's covariate; None for a model of level intercepts only.
    start : ndarray, shape (rows,), optional
        Starting slope (default 0).

    Returns
    -------
    LevelFit

    Notes
    -----
    With :math:`Y_k = \\sum_{i \\in k} w_i y_i`, the intercepts given the slope are
    :math:`e^{a_k} = Y_k / \\sum_{i \\in k} w_i e^{b t_i}`, and the profile log-likelihood

    .. math:: \\ell(b) = b \\sum_i w_i y_i t_i - \\sum_k Y_k \\log \\sum_{i \\in k} w_i e^{b t_i}

    is concave, with :math:`\\ell'(b) = \\sum_i w_i y_i t_i - \\sum_k Y_k \\bar t_k(b)` and
    :math:`-\\ell''(b) = \\sum_k Y_k \\mathrm{Var}_k(t)` (weighted by :math:`w e^{bt}` within
    level k). Newton steps are kept inside a bracket of the root of :math:`\\ell'` (bisection
    otherwise) and converge when :math:`|\\Delta b| \\cdot \\mathrm{range}(t) < 10^{-11}`. At the
    maximum :math:`-\\ell''(b)` is the Schur complement of the intercept block of
    :math:`X^T W X`, so :math:`\\mathrm{Var}(\\hat b) = 1 / (-\\ell''(\\hat b))` at unit scale and
    the hat values are :math:`h_i = w_i \\mu_i (1/Y_k + (t_i - \\bar t_k)^2 / (-\\ell''))`. The
    estimate exists iff every level has :math:`Y_k > 0` and, with a slope, the positive counts do
    not all sit at the largest (or all at the smallest) ``t`` of their level.

    References
    ----------
    McCullagh P, Nelder JA (1989). Generalized Linear Models, 2nd ed., sections 2.5 and 6.3
    (log-linear models; the sufficient statistics of the factor levels).
    """
    rows, n = y.shape
    present = weights > 0
    wy = np.where(present, weights * y, 0.0)
    big_y = levels.sum(wy)  # (rows, levels)
    w0 = np.where(present, weights, 0.0)
    big_w = levels.sum(w0)
    exists = np.all(big_y > 0, axis=1) & np.all(big_w > 0, axis=1)
    if t is None:
        with np.errstate(divide="ignore", invalid="ignore"):
            level_mean = big_y / big_w
            intercepts = np.log(level_mean)
            mu = np.where(present, levels.expand(level_mean), 1.0)
            lev = w0 / levels.expand(big_w)
        nan = np.full(rows, np.nan)
        return LevelFit(mu, np.zeros(rows), nan, intercepts, lev, exists)

    centre = 0.5 * (float(t.max()) + float(t.min()))
    tc = t - centre
    span = max(float(t.max() - t.min()), 1e-300)
    exists &= _slope_exists(wy, present, tc, levels)
    wyt = (wy * tc).sum(axis=1)
    b = np.zeros(rows) if start is None else np.where(np.isfinite(start), start, 0.0)
    lo = np.full(rows, -np.inf)
    hi = np.full(rows, np.inf)
    active = np.flatnonzero(exists)
    max_step = 5.0 / span  # a step never moves b t by more than 5 over the whole range
    for _ in range(MAX_NEWTON_ITER):
        if active.size == 0:
            break
        grad, curv, _, _ = _profile(b[active], w0[active], tc, levels, big_y[active], wyt[active])
        new, done = newton_step(b, lo, hi, active, grad, curv, STEP_TOL / span, max_step)
        b[active] = new
        active = active[~done]
    exists[active] = False  # did not converge
    _, curv, e, level_t = _profile(b, w0, tc, levels, big_y, wyt)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        scale = big_y / levels.sum(e)  # e^{a_k} for the centred t
        a_centred = np.log(scale)
        mu = np.where(present, levels.expand(scale) * e / np.where(present, w0, 1.0), 1.0)
        wmu = np.where(present, weights * mu, 0.0)
        dev = tc - levels.expand(level_t)
        schur = (wmu * dev * dev).sum(axis=1)
        slope_var = 1.0 / schur
        lev = wmu * (1.0 / levels.expand(big_y) + dev * dev / schur[:, None])
    intercepts = a_centred - b[:, None] * centre
    exists &= np.isfinite(slope_var) & (schur > 0)
    return LevelFit(mu, b, slope_var, intercepts, np.where(present, lev, 0.0), exists)


def newton_step(
    x: FloatArray,
    lo: FloatArray,
    hi: FloatArray,
    active: NDArray[np.intp],
    grad: FloatArray,
    curv: FloatArray,
    tol: float,
    max_step: float,
) -> tuple[FloatArray, BoolArray]:
    """One safeguarded Newton step towards the root of a decreasing score, for ``x[active]``.

    ``grad`` and ``curv`` (the score and minus its derivative) are evaluated at ``x[active]``.
    The bracket ``lo``/``hi`` of the root is narrowed in place; a step is clipped to
    ``max_step``, and a step leaving a finite bracket is replaced by bisection, unless it is
    already below ``tol`` (a score of exactly 0 included). Returns the new values and whether
    each moved by less than ``tol`` (converged).
    """
    xa = x[active]
    up = grad > 0
    lo[active] = np.where(up, xa, lo[active])
    hi[active] = np.where(up, hi[active], xa)
    with np.errstate(divide="ignore", invalid="ignore"):
        step = np.clip(grad / curv, -max_step, max_step)
    new = xa + step
    la, ha = lo[active], hi[active]
    outside = (np.abs(step) >= tol) & (~((new > la) & (new < ha)) | ~np.isfinite(new))
    both = np.isfinite(la) & np.isfinite(ha)
    new = np.where(outside & both, 0.5 * (la + ha), new)
    return new, np.abs(new - xa) < tol


def _profile(
    b: FloatArray, w: FloatArray, tc: FloatArray, levels: Levels, big_y: FloatArray,
    wyt: FloatArray,
) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
    """Gradient, curvature ``-l''`` of the profile log-likelihood, ``w e^{b t}``, level mean t."""
    with np.errstate(over="ignore"):
        e = w * np.exp(b[:, None] * tc)
    a = levels.sum(e)
    et = e * tc
    with np.errstate(divide="ignore", invalid="ignore"):
        mean_t = levels.sum(et) / a
        mean_t2 = levels.sum(et * tc) / a
        grad = wyt - (big_y * mean_t).sum(axis=1)
        curv = (big_y * np.maximum(mean_t2 - mean_t * mean_t, 0.0)).sum(axis=1)
    return grad, curv, e, mean_t


def _slope_exists(wy: FloatArray, present: BoolArray, tc: FloatArray, levels: Levels) -> BoolArray:
    """The MLE of the slope is finite unless all counts sit at one end of every level.

    As ``b -> +inf`` the profile likelihood behaves like ``b (sum w y t - sum_k Y_k max_k t)``,
    which tends to ``-inf`` only when some count lies below its level's largest observed ``t``;
    likewise for ``b -> -inf`` with the smallest.
    """
    tt = np.broadcast_to(tc, present.shape)
    t_max = levels.expand(levels.reduce(np.maximum, np.where(present, tt, -np.inf)))
    t_min = levels.expand(levels.reduce(np.minimum, np.where(present, tt, np.inf)))
    positive = wy > 0
    below_max = np.any(positive & (tt < t_max), axis=1)
    above_min = np.any(positive & (tt > t_min), axis=1)
    return below_max & above_min
