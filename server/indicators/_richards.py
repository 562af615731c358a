"""Batched Poisson maximum-likelihood fits of the cumulative Richards curve (shared kernel).

``C(t) = K (1 + v exp(-a v (t - t0)))^(-1/v)`` in the parameters ``theta = (log K, log a, t0,
log v)`` (``log v = 0``: the logistic); the count of day ``t`` is Poisson with mean
``C(t) - C(t - 1)``. Every row of a (rows, days) array is fitted at once by Levenberg-Marquardt
steps on Fisher scoring (Marquardt 1963), with per-row acceptance and convergence masks; days
with weight 0 are left out of the likelihood. Used by :mod:`server.indicators.phase` (the wave
phase of every region) and :mod:`server.indicators.curves` (the analyst's curve fit and its
parametric bootstrap).

References
----------
Richards FJ (1959). A flexible growth function for empirical use. J Exp Bot 10:290-300.
Marquardt DW (1963). An algorithm for least-squares estimation of nonlinear parameters.
J Soc Ind Appl Math 11:431-441.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from server.indicators._arrays import FloatArray

MU_FLOOR = 1e-10
#: Steps every starting value gets before the best one per row is kept; steps after that.
SCREEN_ITERATIONS, ITERATIONS = 15, 80

def log_cum_and_grad(theta: FloatArray, t: FloatArray, grad: bool = True
                     ) -> tuple[FloatArray, FloatArray | None]:
    """``log C(t)`` (rows, days) and its gradient in (log K, log a, t0, log v), (rows, days, 4).

    With ``u = log v - a v (t - t0)``, ``L = log(1 + e^u)`` and ``s = e^u / (1 + e^u)``:
    ``log C = log K - L / v``; d/dlog a = ``s a (t - t0)``; d/dt0 = ``-s a``;
    d/dlog v = ``L / v - s (1 - a v (t - t0)) / v``.
    """
    log_k, log_a, t0, log_v = (theta[:, i, None] for i in range(4))
    a, v = np.exp(log_a), np.exp(log_v)
    dt = t - t0
    u = log_v - a * v * dt
    big_l = np.logaddexp(0.0, u)
    log_c = log_k - big_l / v
    if not grad:
        return log_c, None
    s = np.exp(u - big_l)
    out = np.empty(log_c.shape + (4,))
    out[..., 0] = 1.0
    sa = s * a
    out[..., 1] = sa * dt
    out[..., 2] = -sa
    out[..., 3] = (big_l - s * (1.0 - a * v * dt)) / v
    return log_c, out


def mean_and_jac(theta: FloatArray, t: FloatArray, jac: bool = True
                 ) -> tuple[FloatArray, FloatArray | None]:
    """Expected counts ``C(t) - C(t - 1)`` and, with ``jac``, their gradient (rows, days, 4).

    ``t`` must be consecutive days: ``C`` is computed once on ``t[0] - 1, ..., t[-1]``.
    """
    grid = np.concatenate([t[:1] - 1.0, t])
    lc, g = log_cum_and_grad(theta, grid, jac)
    lc1, lc0 = lc[:, 1:], lc[:, :-1]
    c1 = np.exp(lc1)
    mu = np.maximum(-c1 * np.expm1(lc0 - lc1), MU_FLOOR)
    if g is None:
        return mu, None
    cg = np.exp(lc)[..., None] * g
    return mu, cg[:, 1:] - cg[:, :-1]


def loglik(y: FloatArray, w: FloatArray, mu: FloatArray) -> FloatArray:
    """Poisson log-likelihood without the ``log y!`` term, per row (weights 0 drop days)."""
    return np.sum(w * (y * np.log(mu) - mu), axis=1)


def lm(y: FloatArray, w: FloatArray, t: FloatArray, theta: FloatArray, free: NDArray[np.bool_],
       lo: FloatArray, hi: FloatArray, iterations: int = 120) -> tuple[FloatArray, FloatArray]:
    """Levenberg-Marquardt on Fisher scoring, all rows at once; returns (theta, loglik)."""
    theta = np.clip(theta, lo, hi)
    mu, _ = mean_and_jac(theta, t, jac=False)
    ll = loglik(y, w, mu)
    lam = np.full(len(y), 1e-2)
    active = np.ones(len(y), dtype=bool)
    fixed = ~free
    eye = np.eye(4)
    for _ in range(iterations):
        idx = np.flatnonzero(active)
        if idx.size == 0:
            break
        th = theta[idx]
        mu_i, jmat = mean_and_jac(th, t)
        assert jmat is not None
        wi = w[idx]
        jt = np.swapaxes(jmat, 1, 2)  # (rows, 4, days)
        score = np.matmul(jt, (wi * (y[idx] / mu_i - 1.0))[..., None])[..., 0]
        info = np.matmul(jt * (wi / mu_i)[:, None, :], jmat)
        info[:, fixed, :] = 0.0
        info[:, :, fixed] = 0.0
        score[:, fixed] = 0.0
        diag = np.einsum("rkk->rk", info)
        damp = lam[idx, None] * np.maximum(diag, 1e-12) + fixed * 1.0
        step = np.linalg.solve(info + damp[..., None] * eye, score[..., None])[..., 0]
        trial = np.clip(th + step, lo[idx], hi[idx])
        mu_t, _ = mean_and_jac(trial, t, jac=False)
        ll_t = loglik(y[idx], wi, mu_t)
        predicted = 0.5 * np.sum(step * score, axis=1)  # gain of the step on a quadratic
        better = np.isfinite(ll_t) & (ll_t > ll[idx])
        gain = np.where(better, ll_t - ll[idx], 0.0)
        theta[idx] = np.where(better[:, None], trial, th)
        ll[idx] = np.where(better, ll_t, ll[idx])
        lam[idx] = np.where(better, np.maximum(lam[idx] / 3.0, 1e-9), lam[idx] * 4.0)
        done = (better & (gain < 1e-7)) | (predicted < 1e-8) | (lam[idx] > 1e10)
        active[idx[done]] = False
    return theta, ll


def fit_best(y: FloatArray, w: FloatArray, t: FloatArray, starts: list[FloatArray],
               free: NDArray[np.bool_], lo: FloatArray, hi: FloatArray
             ) -> tuple[FloatArray, FloatArray]:
    """Best of several starts: every start of every row in one batch for
    :data:`SCREEN_ITERATIONS` steps, then the best start of each row to convergence."""
    k = len(starts)
    theta, ll = lm(np.tile(y, (k, 1)), np.tile(w, (k, 1)), t, np.concatenate(starts),
                   free, np.tile(lo, (k, 1)), np.tile(hi, (k, 1)), SCREEN_ITERATIONS)
    ll = np.where(np.isfinite(ll), ll, -np.inf).reshape(k, -1)
    best = np.argmax(ll, axis=0)
    rows = np.arange(y.shape[0])
    return lm(y, w, t, theta.reshape(k, -1, 4)[best, rows], free, lo, hi, ITERATIONS)
