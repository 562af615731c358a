"""The phase of each region's current wave from logistic and Richards fits, all regions at once.

For every row of a (regions, days) array of daily counts:

1. **Wave start** (:func:`wave_start`). The counts are smoothed by a centred 7-day mean. A
   trough separates two waves when the smoothed counts before it had reached 1.5 times it and
   those after it reach 2 times it, each by at least 3 cases a day; the current wave starts at
   the lowest day of the last such valley, or, without one, at the lowest day before the
   window's highest. (Common practice, no source; the factors are ours.)
2. **Fit** (:func:`fit_phase`). The cumulative Richards curve of :mod:`server.indicators.curves`,
   ``C(t) = K (1 + v exp(-a v (t - t0)))^(-1/v)`` (``v = 1``: logistic), is fitted to the counts
   since the wave start by Poisson maximum likelihood, the count of day ``t`` having mean
   ``C(t) - C(t - 1)``. All rows are fitted together by Levenberg-Marquardt steps on Fisher
   scoring (Marquardt 1963) with a common iteration count and per-row acceptance and convergence
   masks, from several starting values taken from the data; the best likelihood wins (the
   kernel, shared with the curve fit, is :mod:`server.indicators._richards`).
3. **Diagnostics at the last day T** of each row: the share of the fitted final size reached,
   ``C(T) / K``, against the share at the turning point ``(1 + v)^(-1/v)`` (Richards 1959; 1/2
   for the logistic); the turning day ``t0``; and, from the data, the growth rate of the last
   week's count over the week before and its change over the week before that (the second
   difference of log weekly counts). Intervals: delta method on the inverse Fisher information
   times a quasi-Poisson dispersion (daily counts) for the fitted quantities; delta method on
   Poisson weekly counts (variance of ``log N`` about ``1 / N``) times the dispersion of the
   weekly counts around the fitted curve's (no weekday pattern) for the weekly ones.
4. **Phase** (:data:`PHASES`): before the fitted turning point (``T < t0``) a wave is
   *slowing* when the upper bound of the change in the weekly growth rate is below 0, else
   *growing*; after it, *declining* when the upper bound of the last week's growth rate is below
   0, else *past its turning point*.

Before the turning point the final size is not identified from the data: such fits are known to
underestimate it (Chowell 2017; the held-out check in :mod:`server.indicators.accuracy`), so
``final_size_is_lower_bound`` is set and callers must say so.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy.stats import norm

from server.indicators._arrays import FloatArray, as_nonnegative_counts, check_level, check_window
from server.indicators._richards import MU_FLOOR as _MU_FLOOR
from server.indicators._richards import fit_best as _fit_model
from server.indicators._richards import log_cum_and_grad as _log_cum_and_grad
from server.indicators._richards import mean_and_jac as _mean_and_jac

#: Phase codes are indices into this tuple (a policy compares the code; higher = more growth).
PHASES = ("declining", "past_turning_point", "slowing", "growing")
PHASE_LABELS = ("declining", "past its turning point", "slowing", "growing")
DECLINING, PAST_TURNING_POINT, SLOWING, GROWING = range(4)
MODELS = ("logistic", "richards", "aic")
#: Warning shown with every final size fitted before the turning point.
LOWER_BOUND_WARNING = (
    "the wave has not reached its fitted turning point: the final size is a lower bound, and "
    "curve fits made before the turning point are known to underestimate it"
)

_LOG_A = (np.log(1e-3), np.log(3.0))
_LOG_V = (np.log(0.05), np.log(20.0))
_WEEK = 7
#: Rows fitted together (memory stays bounded; larger batches gain nothing).
_CHUNK_ROWS = 500


def _centred_mean(y: FloatArray, width: int = _WEEK) -> FloatArray:
    """Centred ``width``-day mean over the observed days (partial windows at the ends)."""
    half = width // 2
    obs = np.isfinite(y)
    filled = np.where(obs, y, 0.0)
    pad = ((0, 0), (half + 1, half))
    cs = np.cumsum(np.pad(filled, pad), axis=1)
    cn = np.cumsum(np.pad(obs.astype(np.float64), pad), axis=1)
    total = cs[:, width:] - cs[:, :-width]
    n = cn[:, width:] - cn[:, :-width]
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(n > 0, total / n, np.nan)


def _argext(values: FloatArray, lo: NDArray[np.int64], hi: NDArray[np.int64], *,
            find_max: bool, last: bool) -> NDArray[np.int64]:
    """Per row, the index of the min (or max) of ``values[r, lo[r]:hi[r] + 1]`` (NaN skipped);
    ``last``: the last index holding it. Rows whose range is empty or all NaN give ``lo``."""
    days = np.arange(values.shape[1])
    inside = (days >= lo[:, None]) & (days <= hi[:, None]) & np.isfinite(values)
    fill = -np.inf if find_max else np.inf
    v = np.where(inside, values, fill)
    if last:
        idx = values.shape[1] - 1 - (np.argmax(v[:, ::-1], axis=1) if find_max
                                     else np.argmin(v[:, ::-1], axis=1))
    else:
        idx = np.argmax(v, axis=1) if find_max else np.argmin(v, axis=1)
    return np.where(inside.any(axis=1), idx, lo).astype(np.int64)


def wave_start(
    counts: ArrayLike, *, rise: float = 2.0, dip: float = 1.5, min_rise: float = 3.0
) -> NDArray[np.int64]:
    """Index of the day the current wave of each row began (rule in the module docstring).

    Parameters
    ----------
    counts : array_like, shape (regions, days)
        Daily counts; NaN marks a missing day.
    rise : float
        A trough separates two waves when the smoothed counts after it reach ``rise`` times it...
    dip : float
        ... and those before it had reached ``dip`` times it...
    min_rise : float
        ... each by at least this many counts a day.

    Returns
    -------
    ndarray of int, shape (regions,)

    Notes
    -----
    Smoothed counts ``s`` (centred 7-day mean), ``A(d) = max s[..d]``, ``B(d) = max s[d..]``.
    Day ``d`` lies in a valley between waves when ``A(d) >= dip s[d]``, ``B(d) >= rise s[d]``
    and both exceed ``s[d]`` by ``min_rise``. The current wave starts at the last day of the
    lowest ``s`` in the last run of valley days; without one, at the last day of the lowest
    ``s`` before the highest. Common practice, no source (the factors are ours).
    """
    y = as_nonnegative_counts("counts", counts)
    s = _centred_mean(y)
    rows, days = s.shape
    zero = np.zeros(rows, dtype=np.int64)
    if days == 0:
        return zero
    filled = np.where(np.isfinite(s), s, -np.inf)
    before = np.maximum.accumulate(filled, axis=1)
    after = np.maximum.accumulate(filled[:, ::-1], axis=1)[:, ::-1]
    with np.errstate(invalid="ignore"):
        valley = (np.isfinite(s) & (before >= dip * s) & (after >= rise * s)
                  & (before >= s + min_rise) & (after >= s + min_rise))
    has = valley.any(axis=1)
    idx = np.arange(days)
    last = np.max(np.where(valley, idx, -1), axis=1)
    gap = np.max(np.where(~valley & (idx <= last[:, None]), idx, -1), axis=1)
    in_valley = _argext(s, np.maximum(gap + 1, 0), np.maximum(last, 0), find_max=False,
                        last=True)
    peak = _argext(s, zero, np.full(rows, days - 1, dtype=np.int64), find_max=True, last=False)
    first_wave = _argext(s, zero, peak, find_max=False, last=True)
    return np.where(has, in_valley, first_wave).astype(np.int64)


@dataclass(frozen=True)
class PhaseInterval:
    """A point estimate with the bounds of its interval (NaN where unknown)."""

    estimate: FloatArray
    lower: FloatArray
    upper: FloatArray


@dataclass(frozen=True)
class WavePhase:
    """Result of :func:`fit_phase`; arrays are shaped (regions,).

    Days are indices of the input's columns (0 = first). ``phase`` holds codes into
    :data:`PHASES` (NaN: no fit). ``model`` is 1 where the Richards curve was used, 0 where
    the logistic. ``final_size_is_lower_bound`` is True before the fitted turning point
    (:data:`LOWER_BOUND_WARNING`). ``converged`` is False where the fit stopped at the upper
    bound of the final size or the turning day (still exponential: the final size is not
    identified); such rows count as before the turning point. ``dispersion`` is that of the
    daily counts (the fitted quantities' intervals), ``weekly_dispersion`` that of the weekly
    counts (the weekly diagnostics' intervals).
    """

    start: NDArray[np.int64]
    last_day: NDArray[np.int64]
    n_days: NDArray[np.int64]
    cases_in_wave: FloatArray
    final_size: PhaseInterval
    turning_day: PhaseInterval
    rate: PhaseInterval
    shape: PhaseInterval
    share_reached: PhaseInterval
    share_at_turning_point: FloatArray
    growth_rate: PhaseInterval
    growth_change: PhaseInterval
    phase: FloatArray
    final_size_is_lower_bound: NDArray[np.bool_]
    model: NDArray[np.int64]
    loglik: FloatArray
    dispersion: FloatArray
    weekly_dispersion: FloatArray
    converged: NDArray[np.bool_]
    level: float


def _starts(y: FloatArray, w: FloatArray, t: FloatArray, start: NDArray[np.int64],
            last: NDArray[np.int64]) -> list[FloatArray]:
    """Logistic starting values from the data (see :func:`fit_phase`, Notes)."""
    rows = len(y)
    filled = np.where(w > 0, y, 0.0)
    s = _centred_mean(np.where(w > 0, y, np.nan))
    peak = _argext(s, start, last, find_max=True, last=False)
    s_peak = np.maximum(np.take_along_axis(s, peak[:, None], axis=1)[:, 0], 0.5)
    total = np.maximum(filled.sum(axis=1), 1.0)
    to_peak = np.where(t[None, :] <= peak[:, None], filled, 0.0).sum(axis=1)
    s_first = np.maximum(np.take_along_axis(s, start[:, None], axis=1)[:, 0], 0.5)
    span = np.maximum(peak - start, 3)
    a_early = np.clip(np.log(s_peak / s_first) / span, 0.03, 1.0)
    out = []
    k_peak = np.maximum(2.0 * to_peak, 1.05 * total)  # turned: symmetric about the peak
    a_peak = np.clip(4.0 * s_peak / k_peak, 0.02, 1.5)
    out.append(np.column_stack([np.log(k_peak), np.log(a_peak), peak.astype(np.float64),
                                np.zeros(rows)]))
    for mult in (2.5, 8.0):  # still rising: a final size a multiple of the count so far
        k = mult * total
        p = total / k
        t0 = last - np.log(p / (1.0 - p)) / a_early
        out.append(np.column_stack([np.log(k), np.log(a_early), t0, np.zeros(rows)]))
    return out


def _bounds(total: FloatArray, start: NDArray[np.int64], last: NDArray[np.int64]
            ) -> tuple[FloatArray, FloatArray]:
    n = (last - start + 1).astype(np.float64)
    lo = np.column_stack([np.log(np.maximum(0.5 * total, 1e-3)), np.full(len(total), _LOG_A[0]),
                          start - 2.0 * n, np.full(len(total), _LOG_V[0])])
    hi = np.column_stack([np.log(1e4 * total + 10.0), np.full(len(total), _LOG_A[1]),
                          last + 5.0 * n, np.full(len(total), _LOG_V[1])])
    return lo, hi


def _covariance(y: FloatArray, w: FloatArray, t: FloatArray, theta: FloatArray,
                free: NDArray[np.bool_], n_par: NDArray[np.int64]
                ) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Quasi-Poisson covariance ``phi I^-1`` of theta (fixed entries 0), phi, fitted means."""
    mu, jmat = _mean_and_jac(theta, t)
    assert jmat is not None
    info = np.matmul(np.swapaxes(jmat, 1, 2) * (w / mu)[:, None, :], jmat)
    keep = free.astype(np.float64)  # (rows, 4): 0 for a parameter held fixed
    info = info * keep[:, :, None] * keep[:, None, :] + np.eye(4) * (1.0 - keep)[:, :, None]
    with np.errstate(invalid="ignore"):
        cov = np.linalg.pinv(info) * keep[:, :, None] * keep[:, None, :]
    n = w.sum(axis=1)
    pearson = np.sum(w * (y - mu) ** 2 / mu, axis=1)
    phi = np.maximum(1.0, pearson / np.maximum(n - n_par, 1.0))
    return cov * phi[:, None, None], phi, mu


def _weekly_growth(y: FloatArray, w: FloatArray, last: NDArray[np.int64], phi: FloatArray,
                   z: float) -> tuple[PhaseInterval, PhaseInterval]:
    """Growth rate of the last week over the week before, and its change, per day.

    ``N0, N1, N2``: counts of the weeks ending at T, T - 7, T - 14. ``r = log(N0 / N1) / 7``;
    ``dr = log(N0 N2 / N1^2) / 7``; variances ``phi (1/N0 + 1/N1) / 49`` and
    ``phi (1/N0 + 4/N1 + 1/N2) / 49`` (delta method, independent Poisson weeks).
    """
    filled = np.where(w > 0, y, 0.0)
    days = np.arange(y.shape[1])
    weeks = []
    for k in range(3):
        hi = last - _WEEK * k
        sel = (days <= hi[:, None]) & (days > hi[:, None] - _WEEK)
        weeks.append(np.where(sel, filled, 0.0).sum(axis=1))
    n0, n1, n2 = weeks
    ok = (n0 > 0) & (n1 > 0) & (n2 > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        r = np.where(ok, np.log(n0 / n1) / _WEEK, np.nan)
        dr = np.where(ok, np.log(n0 * n2 / n1**2) / _WEEK, np.nan)
        se_r = np.sqrt(phi * (1 / n0 + 1 / n1)) / _WEEK
        se_dr = np.sqrt(phi * (1 / n0 + 4 / n1 + 1 / n2)) / _WEEK
    return (PhaseInterval(r, r - z * se_r, r + z * se_r),
            PhaseInterval(dr, dr - z * se_dr, dr + z * se_dr))


def _weekly_dispersion(y: FloatArray, w: FloatArray, mu: FloatArray, start: NDArray[np.int64],
                       last: NDArray[np.int64], n_par: NDArray[np.int64]) -> FloatArray:
    """Quasi-Poisson dispersion of the wave's weekly counts (weeks ending at T, T - 7, ...)
    around the fitted curve's, ``max(1, X^2 / (weeks - p))``; NaN with fewer than p + 3 weeks.

    Weekly sums carry no weekday pattern, so this is the dispersion the weekly diagnostics use.
    """
    cy = np.pad(np.cumsum(w * y, axis=1), ((0, 0), (1, 0)))
    cm = np.pad(np.cumsum(w * mu, axis=1), ((0, 0), (1, 0)))
    ends = last[:, None] - _WEEK * np.arange(y.shape[1] // _WEEK)[None, :]
    valid = ends - _WEEK + 1 >= start[:, None]
    e = np.clip(ends, _WEEK - 1, None)
    n_obs = np.take_along_axis(cy, e + 1, axis=1) - np.take_along_axis(cy, e + 1 - _WEEK, axis=1)
    n_fit = np.take_along_axis(cm, e + 1, axis=1) - np.take_along_axis(cm, e + 1 - _WEEK, axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        pearson = np.where(valid, (n_obs - n_fit) ** 2 / np.maximum(n_fit, _MU_FLOOR), 0.0)
        dof = valid.sum(axis=1) - n_par
        return np.where(dof >= 3, np.maximum(1.0, pearson.sum(axis=1) / dof), np.nan)


def classify(turned: ArrayLike, growth_upper: ArrayLike, change_upper: ArrayLike) -> FloatArray:
    """Phase codes from the fitted turning point and the weekly diagnostics' upper bounds.

    Not ``turned``: :data:`SLOWING` when ``change_upper < 0``, else :data:`GROWING`.
    ``turned``: :data:`DECLINING` when ``growth_upper < 0``, else :data:`PAST_TURNING_POINT`.
    NaN bounds count as "not below 0".
    """
    turned = np.asarray(turned, dtype=bool)
    with np.errstate(invalid="ignore"):
        falling = np.asarray(growth_upper, dtype=np.float64) < 0
        slowing = np.asarray(change_upper, dtype=np.float64) < 0
    return np.where(turned, np.where(falling, DECLINING, PAST_TURNING_POINT),
                    np.where(slowing, SLOWING, GROWING)).astype(np.float64)


def fit_phase(
    counts: ArrayLike,
    *,
    model: str = "aic",
    start: ArrayLike | None = None,
    level: float = 0.95,
    min_days: int = 14,
    min_cases: float = 30.0,
) -> WavePhase:
    """Fit the current wave of every row and say which phase it is in.

    Parameters
    ----------
    counts : array_like, shape (regions, days)
        Daily new counts; NaN marks a missing day (left out of the likelihood).
    model : {"aic", "logistic", "richards"}
        ``aic`` fits both and keeps the Richards curve where its Akaike criterion is lower
        (its deviance lower by more than 2).
    start : array_like of int, shape (regions,), optional
        Day index each wave began; default :func:`wave_start`.
    level : float
        Level of the intervals.
    min_days, min_cases : int, float
        Rows with fewer observed days or counts since the wave start are not fitted (NaN).

    Returns
    -------
    WavePhase

    Notes
    -----
    The mean of day t's count is ``mu_t = C(t) - C(t-1)`` with ``C`` the cumulative Richards curve
    (module docstring); the fit maximises ``sum(y log mu - mu)`` over the days since the start.
    Starting values: a logistic turned at the smoothed peak with final size twice the count to
    the peak and ``a = 4 peak / K`` (the logistic's peak incidence is ``a K / 4``); and two still
    rising, with final sizes 2.5 and 8 times the count so far, the rate from the rise of the
    smoothed counts and ``t0`` placing the count so far on that logistic. The Richards fit starts
    from the best logistic with ``v`` = 0.5, 1 and 2. The covariance is ``phi I(theta)^-1``,
    ``I`` the Fisher information of the Poisson model and ``phi = max(1, X^2 / (n - p))`` (Pearson
    statistic); intervals are Wald intervals on log K (final size), t0, log a, log v and
    logit(C(T)/K) (share reached), back-transformed.

    References
    ----------
    Richards FJ (1959). A flexible growth function for empirical use. J Exp Bot 10:290-300.
    Marquardt DW (1963). An algorithm for least-squares estimation of nonlinear parameters.
    J Soc Ind Appl Math 11:431-441.
    Chowell G (2017). Fitting dynamic models to epidemic outbreaks with quantified uncertainty:
    a primer for parameter uncertainty, identifiability, and forecasts. Infect Dis Model
    2:379-398.
    Akaike H (1974). A new look at the statistical model identification. IEEE Trans Autom
    Control 19:716-723.
    """
    y_raw = as_nonnegative_counts("counts", counts)
    if model not in MODELS:
        raise ValueError(f"model: expected one of {MODELS}, got {model!r}")
    level = check_level("level", level)
    check_window("min_days", min_days, minimum=5)
    rows, days = y_raw.shape
    begin = wave_start(y_raw) if start is None else np.asarray(start, dtype=np.int64)
    if begin.shape != (rows,) or np.any((begin < 0) | (begin >= max(days, 1))):
        raise ValueError(f"start: expected {rows} day indices in 0..{days - 1}")
    t = np.arange(days, dtype=np.float64)
    observed = np.isfinite(y_raw)
    w = (observed & (t[None, :] >= begin[:, None])).astype(np.float64)
    y = np.where(w > 0, y_raw, 0.0)
    last = np.where(observed.any(axis=1), days - 1 - np.argmax(observed[:, ::-1], axis=1), 0)
    n_days = w.sum(axis=1).astype(np.int64)
    total = y.sum(axis=1)
    fit_rows = np.flatnonzero((n_days >= min_days) & (total >= min_cases))
    z = float(norm.ppf(0.5 + level / 2.0))

    nan = np.full(rows, np.nan)
    theta = np.full((rows, 4), np.nan)
    ll = nan.copy()
    used = np.zeros(rows, dtype=np.int64)
    cov = np.full((rows, 4, 4), np.nan)
    phi = nan.copy()
    phi_week = np.ones(rows)
    converged = np.zeros(rows, dtype=bool)
    for part in range(0, fit_rows.size, _CHUNK_ROWS):  # bounded memory; each chunk batched
        r = fit_rows[part: part + _CHUNK_ROWS]
        yf, wf, sf, lf = y[r], w[r], begin[r], last[r]
        lo, hi = _bounds(total[r], sf, lf)
        logistic = np.array([True, True, True, False])
        th_l, ll_l = _fit_model(yf, wf, t, _starts(yf, wf, t, sf, lf), logistic, lo, hi)
        th, llf = th_l, ll_l
        if model != "logistic":
            starts = [np.column_stack([th_l[:, :3], np.full(len(th_l), lv)])
                      for lv in (np.log(0.5), 0.0, np.log(2.0))]
            th_r, ll_r = _fit_model(yf, wf, t, starts, np.ones(4, dtype=bool), lo, hi)
            pick = np.ones(len(th_r), dtype=bool) if model == "richards" else (
                2.0 * (ll_r - ll_l) > 2.0)
            th = np.where(pick[:, None], th_r, th_l)
            llf = np.where(pick, ll_r, ll_l)
            used[r] = pick
        theta[r], ll[r] = th, llf
        k_free = np.column_stack([np.ones((len(th), 3), dtype=bool), used[r] == 1])
        cov[r], phi[r], mu_f = _covariance(yf, wf, t, th, k_free, 3 + used[r])
        phi_week_f = _weekly_dispersion(yf, wf, mu_f, sf, lf, 3 + used[r])
        phi_week[r] = np.where(np.isfinite(phi_week_f), phi_week_f, phi[r])
        at_bound = (th[:, 0] > hi[:, 0] - np.log(2.0)) | (th[:, 2] > hi[:, 2] - 1.0)
        converged[r] = np.isfinite(llf) & ~at_bound

    def wald(i: int, log: bool) -> PhaseInterval:
        est = theta[:, i]
        se = np.sqrt(np.maximum(cov[:, i, i], 0.0))
        lo_, hi_ = est - z * se, est + z * se
        if log:
            with np.errstate(over="ignore"):
                return PhaseInterval(np.exp(est), np.exp(lo_), np.exp(hi_))
        return PhaseInterval(est, lo_, hi_)

    k_iv, a_iv, t0_iv, v_iv = wald(0, True), wald(1, True), wald(2, False), wald(3, True)
    lc, grad = _log_cum_and_grad(np.nan_to_num(theta), last.astype(np.float64)[:, None])
    assert grad is not None
    # log share = log C(T) - log K; its gradient drops the log K entry.
    log_share = lc[:, 0] - np.nan_to_num(theta[:, 0])
    g = grad[:, 0, :].copy()
    g[:, 0] = 0.0
    share = np.where(np.isfinite(theta[:, 0]), np.exp(log_share), np.nan)
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        g_logit = g / (1.0 - share)[:, None]  # d logit(s) = d log s / (1 - s)
        se_logit = np.sqrt(np.maximum(np.einsum("rk,rkl,rl->r", g_logit, cov, g_logit), 0.0))
        logit = np.log(share) - np.log1p(-share)
        share_iv = PhaseInterval(share, 1 / (1 + np.exp(-(logit - z * se_logit))),
                                 1 / (1 + np.exp(-(logit + z * se_logit))))
    v_hat = v_iv.estimate
    share_tp = (1.0 + v_hat) ** (-1.0 / v_hat)
    growth, change = _weekly_growth(y, w, last, phi_week, z)
    # A fit stopped at the bound of K or t0 is still exponential: not turned, final size unknown.
    turned = converged & (last > t0_iv.estimate)
    phase = np.where(np.isfinite(ll), classify(turned, growth.upper, change.upper), np.nan)
    return WavePhase(
        start=begin, last_day=last.astype(np.int64), n_days=n_days, cases_in_wave=total,
        final_size=k_iv, turning_day=t0_iv, rate=a_iv, shape=v_iv, share_reached=share_iv,
        share_at_turning_point=share_tp, growth_rate=growth, growth_change=change, phase=phase,
        final_size_is_lower_bound=np.isfinite(ll) & ~turned, model=used,
        loglik=ll, dispersion=phi, weekly_dispersion=phi_week, converged=converged, level=level,
    )
