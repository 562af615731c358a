"""Forecast accuracy: retrospective growth-curve projections and the weighted interval score.

For each origin day the curve is fitted on the data up to that day only, the cumulative count is
projected ``horizon`` days ahead and compared with what was observed later. The final-size
estimate of each origin is compared with the final size known at the end of the history, split by
whether the origin came before or after the (later known) turning point, so that the usual
underestimation of the final size before the turning point shows in the report.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from server.indicators._arrays import FloatArray, as_nonnegative_counts, check_window
from server.indicators.curves import MODELS, fit_growth_curve


@dataclass(frozen=True)
class AccuracyReport:
    """Result of :func:`projection_accuracy`.

    Arrays shaped (regions, origins) unless said otherwise; ``origins`` holds the day index (0 =
    first column) of each origin. ``share_within`` is shaped (regions, len(tolerances)): the share
    of projections whose absolute relative error is at most each tolerance (NaN where no
    projection could be made). ``pooled_share_within`` pools all regions. ``final_size_error`` is
    ``(K_origin - K_final) / K_final``; its means are split by ``before_turning`` and leave out
    origins whose fit did not converge (``converged`` False: K on its bound, not identified).
    """

    model: str
    horizon: int
    origins: NDArray[np.int64]
    projected: FloatArray
    observed: FloatArray
    relative_error: FloatArray
    tolerances: tuple[float, ...]
    share_within: FloatArray
    pooled_share_within: FloatArray
    final_size: FloatArray
    turning_day: FloatArray
    final_size_estimate: FloatArray
    final_size_error: FloatArray
    before_turning: NDArray[np.bool_]
    converged: NDArray[np.bool_]
    mean_error_before_turning: FloatArray
    mean_error_after_turning: FloatArray


def _masked_mean(values: FloatArray, mask: NDArray[np.bool_], axis: int | None) -> FloatArray:
    use = mask & np.isfinite(values)
    total = np.where(use, values, 0.0).sum(axis=axis)
    n = use.sum(axis=axis)
    return np.divide(total, n, out=np.full(np.shape(total), np.nan), where=n > 0)


def projection_accuracy(
    counts: ArrayLike,
    *,
    model: str = "logistic",
    horizon: int = 7,
    first_origin: int = 14,
    step: int = 1,
    tolerances: tuple[float, ...] = (0.05, 0.10),
    final_size: ArrayLike | None = None,
    turning_day: ArrayLike | None = None,
) -> AccuracyReport:
    """Replay growth-curve projections from each origin day and score them against later data.

    Parameters
    ----------
    counts : array_like, shape (regions, days)
        The stored history of daily counts (NaN for missing days).
    model : {"logistic", "richards"}
    horizon : int
        Projection horizon in days (7).
    first_origin : int
        First origin day (index); origins run every ``step`` days up to ``days - 1 - horizon``.
    step : int
        Days between origins.
    tolerances : tuple of float
        Relative errors to count projections within (5 % and 10 %).
    final_size, turning_day : array_like, shape (regions,), optional
        The later known final size and turning day. By default both come from a fit on the
        whole history.

    Returns
    -------
    AccuracyReport

    Notes
    -----
    With ``Y(T)`` the observed cumulative count to day T and ``P_o(T)`` the projection of ``Y(T)``
    from origin ``o = T - h``: ``e_o = (P_o(T) - Y(T)) / Y(T)``; a projection is within
    tolerance ``tau`` when ``|e_o| <= tau``. The signed final-size error is
    ``(K_o - K) / K``; origins with ``o < t0`` count as before the turning point. Fits at each
    origin use no bootstrap (point estimates only); one fit per region and origin.

    References
    ----------
    Chowell G, Tariq A, Hyman JM (2019). A novel sub-epidemic modeling framework for short-term
    forecasting the early trajectory of an epidemic. BMC Med 17:164. [memory]
    """
    y = as_nonnegative_counts("counts", counts)
    regions, days = y.shape
    if model not in MODELS:
        raise ValueError(f"model: expected one of {MODELS}, got {model!r}")
    horizon = check_window("horizon", horizon)
    step = check_window("step", step)
    first_origin = check_window("first_origin", first_origin, minimum=5)
    if first_origin > days - 1 - horizon:
        raise ValueError(
            f"first_origin: {first_origin} leaves no origin with {horizon} later days "
            f"in a history of {days} days"
        )
    tolerances = tuple(float(t) for t in tolerances)
    if not tolerances or any(not np.isfinite(t) or t <= 0 for t in tolerances):
        raise ValueError(f"tolerances: expected positive numbers, got {tolerances!r}")
    known_k = _per_region("final_size", final_size, regions)
    known_t0 = _per_region("turning_day", turning_day, regions)
    return _replay(y, model, horizon, first_origin, step, tolerances, known_k, known_t0)


def _per_region(name: str, values: ArrayLike | None, regions: int) -> FloatArray | None:
    if values is None:
        return None
    arr = np.asarray(values, dtype=np.float64).reshape(-1)
    if arr.size != regions:
        raise ValueError(f"{name}: {arr.size} values for {regions} regions")
    return arr


def _replay(
    y: FloatArray,
    model: str,
    horizon: int,
    first_origin: int,
    step: int,
    tolerances: tuple[float, ...],
    known_k: FloatArray | None,
    known_t0: FloatArray | None,
) -> AccuracyReport:
    regions, days = y.shape
    if known_k is None or known_t0 is None:
        whole = fit_growth_curve(y, model=model, horizons=(1,), n_boot=0)
        known_k = whole.final_size.estimate if known_k is None else known_k
        known_t0 = whole.turning_day.estimate if known_t0 is None else known_t0

    origins = np.arange(first_origin, days - horizon, step, dtype=np.int64)
    cumulative = np.cumsum(np.where(np.isfinite(y), y, 0.0), axis=1)
    projected = np.full((regions, origins.size), np.nan)
    k_origin = np.full((regions, origins.size), np.nan)
    converged = np.zeros((regions, origins.size), dtype=bool)
    for j, origin in enumerate(origins):  # one batch of per-region fits per origin day
        fit = fit_growth_curve(
            y[:, : origin + 1], model=model, horizons=(horizon,), n_boot=0
        )
        projected[:, j] = fit.projection.estimate[:, 0]
        k_origin[:, j] = fit.final_size.estimate
        converged[:, j] = fit.converged

    observed = cumulative[:, origins + horizon]
    with np.errstate(invalid="ignore"):
        relative = np.divide(
            projected - observed, observed, out=np.full_like(projected, np.nan), where=observed > 0
        )
        k_error = (k_origin - known_k[:, None]) / known_k[:, None]
    finite = np.isfinite(relative)
    tol = np.asarray(tolerances)
    within = (np.abs(np.where(finite, relative, np.inf))[..., None] <= tol) & finite[..., None]
    n_per = finite.sum(axis=1)[:, None]
    share = np.divide(within.sum(axis=1), n_per, out=np.full((regions, tol.size), np.nan),
                      where=n_per > 0)
    n_all = finite.sum()
    pooled = within.sum(axis=(0, 1)) / n_all if n_all > 0 else np.full(tol.size, np.nan)
    before = origins[None, :] < known_t0[:, None]
    return AccuracyReport(
        model=model,
        horizon=horizon,
        origins=origins,
        projected=projected,
        observed=observed,
        relative_error=relative,
        tolerances=tolerances,
        share_within=share,
        pooled_share_within=np.asarray(pooled, dtype=np.float64),
        final_size=known_k,
        turning_day=known_t0,
        final_size_estimate=k_origin,
        final_size_error=k_error,
        before_turning=before,
        converged=converged,
        mean_error_before_turning=_masked_mean(k_error, before & converged, axis=1),
        mean_error_after_turning=_masked_mean(k_error, ~before & converged, axis=1),
    )


@dataclass(frozen=True)
class IntervalScore:
    """Weighted interval score of quantile forecasts and its decomposition (Bracher et al. 2021).

    Arrays have the shape of the observations; ``wis = dispersion + underprediction +
    overprediction``. NaN where an input is missing.
    """

    wis: FloatArray
    dispersion: FloatArray
    underprediction: FloatArray
    overprediction: FloatArray
    alphas: tuple[float, ...]


def weighted_interval_score(
    observed: ArrayLike,
    median: ArrayLike,
    lower: ArrayLike,
    upper: ArrayLike,
    alphas: ArrayLike,
) -> IntervalScore:
    """Weighted interval score of a median and K central prediction intervals.

    Parameters
    ----------
    observed, median : array_like, shape (...)
        What happened and the forecast median.
    lower, upper : array_like, shape (..., K)
        Bounds of the central ``(1 - alpha_k)`` prediction intervals.
    alphas : array_like, shape (K,)
        Levels ``alpha_k`` in (0, 1) (0.05 for a 95 % interval).

    Returns
    -------
    IntervalScore

    Notes
    -----
    The interval score of the central (1 - alpha) interval [l, u] is (Gneiting & Raftery 2007,
    eq. 43)

    .. math:: IS_\\alpha(l, u; y) = (u - l) + \\frac{2}{\\alpha}(l - y)\\,1(y < l)
              + \\frac{2}{\\alpha}(y - u)\\,1(y > u),

    and the weighted interval score (Bracher et al. 2021, eq. 2, weights
    :math:`w_0 = 1/2`, :math:`w_k = \\alpha_k/2`)

    .. math:: WIS = \\frac{1}{K + 1/2}\\Big(\\tfrac12 |y - m| + \\sum_{k=1}^K
              \\frac{\\alpha_k}{2} IS_{\\alpha_k}(l_k, u_k; y)\\Big).

    Dispersion is :math:`\\sum_k \\frac{\\alpha_k}{2}(u_k - l_k) / (K + 1/2)`;
    underprediction (the observation above the forecast) collects :math:`(y - u_k)_+` and
    :math:`\\tfrac12 (y - m)_+`, overprediction :math:`(l_k - y)_+` and
    :math:`\\tfrac12 (m - y)_+`, each divided by :math:`K + 1/2`.

    References
    ----------
    Bracher J, Ray EL, Gneiting T, Reich NG (2021). Evaluating epidemic forecasts in an interval
    format. PLoS Comput Biol 17:e1008618.
    Gneiting T, Raftery AE (2007). Strictly proper scoring rules, prediction, and estimation.
    J Am Stat Assoc 102:359-378.
    """
    a = np.asarray(alphas, dtype=np.float64).reshape(-1)
    if a.size == 0 or not np.all((a > 0) & (a < 1)):
        raise ValueError(f"alphas: expected levels in (0, 1), got {a.tolist()!r}")
    y = np.asarray(observed, dtype=np.float64)
    m = np.asarray(median, dtype=np.float64)
    lo = np.asarray(lower, dtype=np.float64)
    hi = np.asarray(upper, dtype=np.float64)
    if m.shape != y.shape:
        raise ValueError(f"median: shape {m.shape} differs from observed {y.shape}")
    for name, arr in (("lower", lo), ("upper", hi)):
        if arr.shape != (*y.shape, a.size):
            raise ValueError(f"{name}: expected shape {(*y.shape, a.size)}, got {arr.shape}")
    with np.errstate(invalid="ignore"):
        crossed = hi < lo
    if crossed.any():
        first = tuple(int(i) for i in np.argwhere(crossed)[0])
        raise ValueError(f"upper: below lower at index {first}")
    yk = y[..., np.newaxis]
    half = a / 2.0
    norm = a.size + 0.5
    dispersion = np.sum(half * (hi - lo), axis=-1) / norm
    under = (np.sum(np.maximum(yk - hi, 0.0), axis=-1) + 0.5 * np.maximum(y - m, 0.0)) / norm
    over = (np.sum(np.maximum(lo - yk, 0.0), axis=-1) + 0.5 * np.maximum(m - y, 0.0)) / norm
    return IntervalScore(
        wis=dispersion + under + over,
        dispersion=dispersion,
        underprediction=under,
        overprediction=over,
        alphas=tuple(float(x) for x in a),
    )
