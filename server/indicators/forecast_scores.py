"""The record of quantile forecasts once their outcomes are known, and a naive forecaster.

Each forecast is one region's predictive quantiles for ``H`` horizons made at one origin (a
:class:`~server.indicators.quantile_forecast.QuantileForecast` holds many regions at once).
:func:`score_forecasts` scores N such forecasts against what happened: whether each horizon's
outcome fell inside the central 50 % and 90 % intervals, its weighted interval score (Bracher et
al. 2021, eq. 2, :func:`server.indicators.accuracy.weighted_interval_score`) and the absolute
error of the naive baseline. :func:`forecast_record` summarises the scores per group (a region
and target) and horizon, over the most recent forecasts of each.

The naive baseline is *persistence of the last week*: the point forecast, for every horizon, is
the mean of the target over the 7 days ending at the forecast's origin, as known at the forecast's
data cutoff (missing days left out). Its error is ``|y - baseline|``, which is also the WIS of a
point forecast (the WIS with no interval, Bracher et al. 2021, eq. 2 with K = 0). The relative WIS
is ``mean WIS / mean |y - baseline|`` over the same forecasts: below 1 the forecast beat
persistence.

:func:`poisson_persistence` is that baseline made probabilistic: Poisson quantiles around the
last week's mean. It is the default forecaster of the stored record until a better one is wired,
and on stationary Poisson counts its intervals cover about the nominal share (a check of the
scoring plumbing, ``tests/reference/test_forecast_scores_reference.py``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from server.indicators._arrays import FloatArray, IntArray, as_nonnegative_counts, check_window
from server.indicators.accuracy import weighted_interval_score

__all__ = [
    "BASELINE_DAYS",
    "ForecastRecord",
    "ForecastScores",
    "forecast_record",
    "last_week_mean",
    "poisson_persistence",
    "score_forecasts",
]

#: Days averaged by the naive baseline (persistence of the last week).
BASELINE_DAYS = 7


@dataclass(frozen=True)
class ForecastScores:
    """Scores of N forecasts, arrays shaped (N, H).

    ``scored`` is False where the outcome (or the baseline) is not known; every other array is
    NaN (or False) there. ``inside_50``/``inside_90`` are False where the forecast has no such
    interval (``has_50``/``has_90`` False).
    """

    scored: NDArray[np.bool_]
    wis: FloatArray
    naive_error: FloatArray
    inside_50: NDArray[np.bool_]
    inside_90: NDArray[np.bool_]
    has_50: bool
    has_90: bool


@dataclass(frozen=True)
class ForecastRecord:
    """How a group's forecasts did, arrays shaped (groups, H).

    ``forecasts`` counts the scored forecasts summarised (at most ``last`` per cell);
    ``inside_50``/``inside_90`` how many of them held the outcome; ``coverage_*`` the shares (NaN
    with no forecast or no such interval); ``mean_wis`` and ``naive_error`` the mean WIS and the
    mean absolute error of the naive baseline over the same forecasts; ``relative_wis`` their
    ratio (NaN when the baseline's error is 0).
    """

    horizons: IntArray
    forecasts: IntArray
    inside_50: IntArray
    inside_90: IntArray
    coverage_50: FloatArray
    coverage_90: FloatArray
    mean_wis: FloatArray
    naive_error: FloatArray
    relative_wis: FloatArray


def _central(levels: FloatArray, coverage: float) -> tuple[int, int] | None:
    alpha = (1.0 - coverage) / 2.0
    lo = np.flatnonzero(np.isclose(levels, alpha))
    hi = np.flatnonzero(np.isclose(levels, 1.0 - alpha))
    return (int(lo[0]), int(hi[0])) if lo.size and hi.size else None


def score_forecasts(
    values: ArrayLike, levels: ArrayLike, observed: ArrayLike, baseline: ArrayLike
) -> ForecastScores:
    """Score N quantile forecasts of H horizons against their outcomes.

    Parameters
    ----------
    values : array_like, shape (N, H, L)
        Predictive quantiles at ``levels`` (increasing along the last axis).
    levels : array_like, shape (L,)
        Quantile levels, symmetric around 0.5 and including it.
    observed : array_like, shape (N, H)
        The outcomes as known now; NaN where not yet known.
    baseline : array_like, shape (N,) or (N, H)
        The naive point forecast of each forecast (module docstring), NaN where unknown.

    Returns
    -------
    ForecastScores

    Notes
    -----
    A central interval ``[q_a, q_{1-a}]`` holds ``y`` when ``q_a <= y <= q_{1-a}`` (bounds
    included, as for counts with integer quantiles). The WIS uses the median and every central
    interval the levels make, ``alpha_k = 2 a_k`` for each level ``a_k < 0.5``.

    References
    ----------
    Bracher J, Ray EL, Gneiting T, Reich NG (2021). Evaluating epidemic forecasts in an interval
    format. PLoS Comput Biol 17:e1008618.
    """
    q = np.asarray(values, dtype=np.float64)
    lv = np.asarray(levels, dtype=np.float64).reshape(-1)
    y = np.asarray(observed, dtype=np.float64)
    if q.ndim != 3 or q.shape[2] != lv.size:
        raise ValueError(f"values: expected shape (N, H, {lv.size}), got {q.shape}")
    if y.shape != q.shape[:2]:
        raise ValueError(f"observed: expected shape {q.shape[:2]}, got {y.shape}")
    base = np.asarray(baseline, dtype=np.float64)
    if base.shape == (q.shape[0],):
        base = np.broadcast_to(base[:, None], y.shape)
    if base.shape != y.shape:
        raise ValueError(f"baseline: expected shape ({q.shape[0]},) or {y.shape}, got {base.shape}")
    mid = np.flatnonzero(np.isclose(lv, 0.5))
    if mid.size == 0 or not np.allclose(lv, 1.0 - lv[::-1]) or np.any(np.diff(lv) <= 0):
        raise ValueError(f"levels: expected increasing, symmetric levels with 0.5, got {lv}")
    low = np.flatnonzero(lv < 0.5)
    res = weighted_interval_score(
        y, q[..., mid[0]], q[..., low], q[..., lv.size - 1 - low], 2.0 * lv[low]
    )
    scored = np.isfinite(y) & np.isfinite(base) & np.isfinite(res.wis)
    wis = np.where(scored, res.wis, np.nan)
    naive = np.where(scored, np.abs(y - base), np.nan)
    inside = {}
    for cov in (0.5, 0.9):
        pair = _central(lv, cov)
        if pair is None:
            inside[cov] = np.zeros(y.shape, dtype=bool)
            continue
        with np.errstate(invalid="ignore"):
            inside[cov] = scored & (q[..., pair[0]] <= y) & (y <= q[..., pair[1]])
    return ForecastScores(
        scored=scored, wis=wis, naive_error=naive, inside_50=inside[0.5], inside_90=inside[0.9],
        has_50=_central(lv, 0.5) is not None, has_90=_central(lv, 0.9) is not None,
    )


def forecast_record(
    scores: ForecastScores, *, groups: ArrayLike, n_groups: int, order: ArrayLike,
    horizons: ArrayLike, last: int | None = None,
) -> ForecastRecord:
    """Summarise scored forecasts per group and horizon, over each cell's ``last`` newest.

    Parameters
    ----------
    scores : ForecastScores
        Of N forecasts, (N, H).
    groups : array_like of int, shape (N,)
        The group (region and target) of each forecast, ``0 <= g < n_groups``.
    n_groups : int
    order : array_like, shape (N,)
        Sorts forecasts in time (their origin or cutoff as a number); with ``last``, the
        ``last`` greatest scored ones of each (group, horizon) are summarised.
    horizons : array_like of int, shape (H,)
    last : int, optional
        How many of the newest scored forecasts count (all by default).

    Returns
    -------
    ForecastRecord
    """
    g = np.asarray(groups, dtype=np.int64).reshape(-1)
    t = np.asarray(order, dtype=np.float64).reshape(-1)
    h = np.asarray(horizons, dtype=np.int64).reshape(-1)
    n, n_h = scores.scored.shape
    if g.size != n or t.size != n:
        raise ValueError(f"groups and order: expected {n} values, got {g.size} and {t.size}")
    if h.size != n_h:
        raise ValueError(f"horizons: expected {n_h} values, got {h.size}")
    if n and (g.min() < 0 or g.max() >= n_groups):
        raise ValueError(f"groups: expected 0 <= group < {n_groups}")
    use = scores.scored.copy()
    if last is not None:
        last = check_window("last", last)
        # rank of each scored forecast within its (group, horizon) cell, newest first
        by = np.lexsort((-t, g))
        for j in range(n_h):
            s = use[by, j]
            cum = np.cumsum(s)
            gs = g[by]
            start = np.r_[True, gs[1:] != gs[:-1]]
            before = np.maximum.accumulate(np.where(start, cum - s, 0))
            rank = cum - before  # 1 for the newest scored forecast of the group
            keep = np.zeros(n, dtype=bool)
            keep[by] = s & (rank <= last)
            use[:, j] = keep
    cell = (g[:, None] * n_h + np.arange(n_h)[None, :])[use]
    size = n_groups * n_h

    def total(a: NDArray[np.generic]) -> FloatArray:
        sums = np.bincount(cell, weights=a[use].astype(np.float64), minlength=size)
        return sums.astype(np.float64).reshape(n_groups, n_h)

    count = np.bincount(cell, minlength=size).reshape(n_groups, n_h)
    in50 = total(scores.inside_50).astype(np.int64)
    in90 = total(scores.inside_90).astype(np.int64)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_wis = np.where(count > 0, total(scores.wis) / count, np.nan)
        naive = np.where(count > 0, total(scores.naive_error) / count, np.nan)
        relative = np.where(naive > 0, mean_wis / naive, np.nan)
        cov50 = np.where((count > 0) & scores.has_50, in50 / count, np.nan)
        cov90 = np.where((count > 0) & scores.has_90, in90 / count, np.nan)
    return ForecastRecord(
        horizons=h, forecasts=count.astype(np.int64), inside_50=in50, inside_90=in90,
        coverage_50=cov50, coverage_90=cov90, mean_wis=mean_wis, naive_error=naive,
        relative_wis=relative,
    )


def last_week_mean(
    history: ArrayLike, *, days: int = BASELINE_DAYS, min_days: int = 4
) -> FloatArray:
    """The naive baseline: per region, the mean of the last ``days`` columns of ``history``.

    ``history`` is (regions, days) ending at the origin, as known at the cutoff; missing days are
    left out, and a region with fewer than ``min_days`` known days gets NaN.
    """
    y = np.asarray(history, dtype=np.float64)
    if y.ndim == 1:
        y = y[None, :]
    days = check_window("days", days)
    tail = y[:, -days:]
    known = np.isfinite(tail)
    n = known.sum(axis=1)
    total = np.where(known, tail, 0.0).sum(axis=1)
    return np.where(n >= min_days, total / np.maximum(n, 1), np.nan)


def poisson_persistence(
    history: ArrayLike, *, horizons: ArrayLike, levels: ArrayLike,
    days: int = BASELINE_DAYS, min_days: int = 4,
) -> FloatArray:
    """Poisson quantiles around the last week's mean, the same for every horizon.

    Parameters
    ----------
    history : array_like, shape (regions, days)
        Daily counts ending at the origin, as known at the cutoff (NaN = missing).
    horizons : array_like of int, shape (H,)
    levels : array_like, shape (L,)
    days, min_days : int
        As in :func:`last_week_mean`.

    Returns
    -------
    ndarray, shape (regions, H, L)
        ``F^{-1}(level)`` of Poisson(``lambda``) with ``lambda`` the last week's mean
        (:func:`scipy.stats.poisson.ppf`: the smallest integer k with ``P(Y <= k) >= level``);
        NaN for a region without a mean.

    Notes
    -----
    A plug-in forecast: the error of ``lambda`` (estimated from 7 days) is ignored, so for small
    counts the intervals are a little narrow; integer quantiles with both bounds included make
    them a little wide. A persistence forecast, no trend: it is the baseline, not a model.
    """
    y = as_nonnegative_counts("history", history)
    h = np.asarray(horizons, dtype=np.int64).reshape(-1)
    lv = np.asarray(levels, dtype=np.float64).reshape(-1)
    rate = last_week_mean(y, days=days, min_days=min_days)
    ok = np.isfinite(rate)
    q = np.full((rate.size, lv.size), np.nan)
    q[ok] = stats.poisson.ppf(lv[None, :], rate[ok, None])
    return np.repeat(q[:, None, :], h.size, axis=1)
