"""Heteroskedasticity and autocorrelation consistent (HAC) covariance of Poisson GLM fits.

For a log-linear Poisson (or quasi-Poisson) fit with design ``X`` (regions, days, p), counts
``y`` and fitted means ``mu``, the per-day scores are ``s_t = x_t (y_t - mu_t)`` and the
Newey-West sandwich is

    V = A^{-1} B A^{-1},   A = X' diag(mu) X,
    B = sum_{|l| <= L} (1 - |l| / (L + 1)) sum_t s_t s_{t+l}',

the Bartlett kernel with ``L`` lags (Newey & West 1987). It stays consistent when the residuals
are correlated over days, which the model-based ``phi A^{-1}`` does not allow for. ``B`` is
computed as ``sum_j S_j S_j' / (L + 1)`` over the sums ``S_j`` of the scores in every window of
``L + 1`` consecutive days, the windows running off both ends with zeros there: expanding the
products gives each lag ``l`` the weight ``L + 1 - |l|`` exactly, so this is the Bartlett sum
itself, in O(days x p^2) per region. No database, web or clock here.

References
----------
.. [1] Newey WK, West KD (1987). A simple, positive semi-definite, heteroskedasticity and
   autocorrelation consistent covariance matrix. Econometrica 55:703-708.
.. [2] Zeileis A (2004). Econometric computing with HC and HAC covariance matrix estimators.
   J Stat Softw 11(10) (the sandwich for GLMs: bread from the information, meat from the
   working scores).
"""

from __future__ import annotations

import numpy as np

from server.indicators._arrays import FloatArray

__all__ = ["bartlett_meat", "hac_sandwich"]


def bartlett_meat(scores: FloatArray, lags: int) -> FloatArray:
    """``sum_{|l| <= lags} (1 - |l| / (lags + 1)) sum_t s_t s_{t+l}'`` for scores shaped
    (regions, days, p): shape (regions, p, p). NaN scores count as 0."""
    if isinstance(lags, bool) or not isinstance(lags, (int, np.integer)) or lags < 0:
        raise ValueError(f"lags: must be an integer >= 0, got {lags!r}")
    s = np.nan_to_num(np.asarray(scores, dtype=np.float64))
    rows, n, p = s.shape
    width = int(lags) + 1
    padded = np.zeros((rows, n + 2 * width - 1, p))
    padded[:, width - 1 : width - 1 + n] = s
    c = np.zeros((rows, padded.shape[1] + 1, p))
    np.cumsum(padded, axis=1, out=c[:, 1:])
    windows = c[:, width:] - c[:, :-width]  # (rows, n + width - 1, p): every window touching
    return np.asarray(np.matmul(windows.transpose(0, 2, 1), windows) / width)


def hac_sandwich(x: FloatArray, y: FloatArray, mu: FloatArray, lags: int,
                 bread: FloatArray | None = None) -> FloatArray:
    """Newey-West covariance of the coefficients of a log-link Poisson GLM.

    Parameters
    ----------
    x : ndarray, shape (regions, days, p)
        Design (the columns whose coefficients the covariance is for).
    y, mu : ndarray, shape (regions, days)
        Counts and fitted means; a day where either is NaN contributes nothing.
    lags : int
        Bartlett lags ``L``.
    bread : ndarray, shape (regions, p, p), optional
        ``A^{-1}`` when already known (default: the inverse of ``X' diag(mu) X``).

    Returns
    -------
    ndarray, shape (regions, p, p)
        ``A^{-1} B A^{-1}`` without any small-sample factor (statsmodels' ``cov_type='HAC'``
        with ``use_correction=False``).
    """
    x = np.asarray(x, dtype=np.float64)
    ok = np.isfinite(y) & np.isfinite(mu)
    res = np.where(ok, np.nan_to_num(y) - np.nan_to_num(mu), 0.0)
    if bread is None:
        w = np.where(ok, np.nan_to_num(mu), 0.0)
        bread = np.linalg.inv(np.matmul((x * w[..., None]).transpose(0, 2, 1), x))
    meat = bartlett_meat(x * res[..., None], lags)
    return np.asarray(np.matmul(np.matmul(bread, meat), bread))
