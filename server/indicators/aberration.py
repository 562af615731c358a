"""Aberration detection on count series: EARS C1/C2/C3 (daily) and improved Farrington (weekly).

EARS is vectorised across regions and days with sliding windows. The improved Farrington method
fits one quasi-Poisson GLM per target week; the loop runs over weeks and each fit is batched
across regions (the design matrix depends only on the week, so the IRLS solves stacked systems).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from server.indicators._arrays import (
    FloatArray,
    as_nonnegative_counts,
    check_level,
    check_window,
    row_chunks,
)
from server.indicators._levelfit import Levels, fit_levels

EARS_METHODS = ("C1", "C2", "C3")
EARS_DEFINITIONS = ("cdc", "surveillance")
# Thresholds on the statistic. "cdc": 3, 3 and 2 standard deviations, the CDC's EARS as described
# by Hutwagner et al. (2003) and Fricker et al. (2008) [memory, not checked against the papers].
# "surveillance": z_{1-alpha} with alpha 0.001 (C1, C2) and 0.025 (C3), the defaults of earsC in
# the R package surveillance (its code and help page): 3.0902 and 1.9600.
EARS_THRESHOLDS = {"C1": 3.0, "C2": 3.0, "C3": 2.0}
SURVEILLANCE_ALPHA = {"C1": 0.001, "C2": 0.001, "C3": 0.025}
# Floor on the baseline SD. "cdc": 0.2 (common practice, no source; a flat baseline would divide
# by zero); "surveillance": earsC's minSigma, 0 by default.
EARS_SD_FLOOR = {"cdc": 0.2, "surveillance": 0.0}
_EARS_BASELINE = 7
_EARS_LAG = {"C1": 1, "C2": 3, "C3": 3}
_FARRINGTON_ROWS = 16_384  # (region, week) fits per batch
_FARRINGTON_CELLS = 65_536  # (fit, baseline week) cells per block of fits


@dataclass(frozen=True)
class EarsResult:
    """EARS output, arrays shaped (regions, days); NaN/False where the baseline is too short.

    ``statistic`` is C1, C2 or C3 (for C3 under ``definition="surveillance"``: the excess of the
    two previous days, the quantity its alarm compares with the threshold); ``expected`` the
    baseline mean; ``upper`` the count above which the day alarms; ``sd`` the (floored) sample
    standard deviation of the baseline.
    """

    method: str
    statistic: FloatArray
    expected: FloatArray
    sd: FloatArray
    upper: FloatArray
    alarm: NDArray[np.bool_]
    threshold: float
    sd_floor: float
    definition: str = "cdc"


def _baseline_stats(
    y: FloatArray, lag: int, min_baseline: int
) -> tuple[FloatArray, FloatArray]:
    """Mean and sample sd (ddof = 1) of days t-lag-6 .. t-lag, NaN-aware and vectorised.

    Each of the 7 baseline days is a shifted view of the NaN-padded series; sums run over
    those views in blocks of regions (two passes: the mean, then squared deviations from it).
    """
    regions, days = y.shape
    mean = np.empty((regions, days))
    sd = np.empty((regions, days))
    for rows in row_chunks(regions, days + lag + _EARS_BASELINE):
        mean[rows], sd[rows] = _baseline_rows(y[rows], lag, min_baseline)
    return mean, sd


def _baseline_rows(y: FloatArray, lag: int, min_baseline: int) -> tuple[FloatArray, FloatArray]:
    regions, days = y.shape
    pad = np.full((regions, lag + _EARS_BASELINE - 1), np.nan)
    padded = np.concatenate([pad, y], axis=1)  # day i of the result: padded i .. i + 6
    present = np.isfinite(padded)
    filled = np.where(present, padded, 0.0)
    n = np.zeros((regions, days))
    total = np.zeros((regions, days))
    for i in range(_EARS_BASELINE):
        n += present[:, i : i + days]
        total += filled[:, i : i + days]
    enough = n >= max(min_baseline, 2)
    mean = np.divide(total, n, out=np.full((regions, days), np.nan), where=enough)
    centre = np.nan_to_num(mean)
    dev2 = np.zeros((regions, days))
    for i in range(_EARS_BASELINE):
        dev2 += np.where(present[:, i : i + days], (filled[:, i : i + days] - centre) ** 2, 0.0)
    var = np.divide(dev2, n - 1, out=np.full((regions, days), np.nan), where=enough)
    return mean, np.sqrt(var)


def ears(
    counts: ArrayLike,
    *,
    method: str = "C1",
    threshold: float | None = None,
    sd_floor: float | None = None,
    min_baseline: int = 7,
    definition: str = "cdc",
) -> EarsResult:
    """EARS C1, C2 or C3 aberration statistics for daily counts.

    Parameters
    ----------
    counts : array_like, shape (regions, days)
        Daily counts, NaN for missing days (left out of baselines; no alarm on a missing day).
    method : {"C1", "C2", "C3"}
    threshold : float, optional
        Alarm threshold on the statistic. Default for ``"cdc"``: 3, 3 and 2 (Hutwagner et al.
        2003; Fricker et al. 2008) [memory]; for ``"surveillance"``: ``z_{1-alpha}``, alpha
        0.001, 0.001 and 0.025 (3.0902, 3.0902, 1.9600), earsC's defaults.
    sd_floor : float, optional
        Lower bound on the baseline sd. Default for ``"cdc"``: 0.2, so a flat baseline (sd = 0)
        does not divide by zero (common practice, no source); for ``"surveillance"``: 0
        (earsC's ``minSigma``; a flat baseline then alarms on any count above its mean).
    min_baseline : int
        Baseline days (of 7) that must be present.
    definition : {"cdc", "surveillance"}
        ``"cdc"``: the CDC's EARS as published (below). ``"surveillance"``: what ``earsC`` of
        the R package surveillance computes; C1 and C2 differ only by the default threshold
        and floor, C3 differs in what alarms (below).

    Returns
    -------
    EarsResult

    Notes
    -----
    With baseline mean ``m_t`` and sample sd ``s_t = max(sd(ddof=1), sd_floor)``:

    - C1: baseline days ``t-7 .. t-1``; ``C1_t = (y_t - m_t) / s_t``.
    - C2: baseline days ``t-9 .. t-3`` (two guard days); ``C2_t = (y_t - m_t) / s_t``.
    - C3 (``"cdc"``): ``C3_t = sum_{j=0..2} max(0, C2_{t-j} - 1)`` (Fricker et al. 2008,
      which is also the statistic of earsC's help page).

    Alarm when the statistic exceeds the threshold (strictly, as earsC's ``observed >
    upperbound``). ``upper`` is the count at which it would: ``m + threshold s`` for C1 and C2;
    for C3, ``m + s (1 + max(0, threshold - P))`` where ``P`` is the C3 contribution of the two
    previous days (when ``P`` already exceeds the threshold the day alarms whatever its count).

    C3 under ``"surveillance"`` follows earsC's code, not its help page: the upper bound is
    ``max(0, y_t + s_t (threshold - P))``, so the day alarms when ``P > threshold`` and
    ``y_t > 0``, whatever the size of ``y_t``; the help page's bound ``m + s (threshold - P)``
    matches neither that code nor its own C3 statistic. The statistic reported is ``P``.

    References
    ----------
    Hutwagner L, Thompson W, Seeman GM, Treadwell T (2003). The bioterrorism preparedness and
    response Early Aberration Reporting System (EARS). J Urban Health 80(Suppl 1):i89-i96.
    Fricker RD, Hegler BL, Dunfee DA (2008). Comparing syndromic surveillance detection methods:
    EARS' versus a CUSUM-based methodology. Stat Med 27:3407-3429. [memory]
    Salmon M, Schumacher D, Höhle M (2016). Monitoring count time series in R: aberration
    detection in public health surveillance. J Stat Softw 70(10):1-35 (package surveillance,
    function earsC).
    """
    y = as_nonnegative_counts("counts", counts)
    if method not in EARS_METHODS:
        raise ValueError(f"method: expected one of {EARS_METHODS}, got {method!r}")
    if definition not in EARS_DEFINITIONS:
        raise ValueError(f"definition: expected one of {EARS_DEFINITIONS}, got {definition!r}")
    floor = EARS_SD_FLOOR[definition] if sd_floor is None else float(sd_floor)
    if not np.isfinite(floor) or floor < 0 or (floor == 0 and definition == "cdc"):
        raise ValueError(f"sd_floor: must be positive and finite, got {sd_floor!r}")
    check_window("min_baseline", min_baseline, minimum=2)
    if min_baseline > _EARS_BASELINE:
        raise ValueError(
            f"min_baseline: at most {_EARS_BASELINE} baseline days, got {min_baseline}"
        )
    if threshold is not None:
        thr = float(threshold)
    elif definition == "cdc":
        thr = EARS_THRESHOLDS[method]
    else:
        thr = float(stats.norm.ppf(1.0 - SURVEILLANCE_ALPHA[method]))
    if not np.isfinite(thr):
        raise ValueError(f"threshold: must be finite, got {threshold!r}")
    return _ears(y, method, thr, floor, min_baseline, definition)


def _ears(
    y: FloatArray, method: str, thr: float, sd_floor: float, min_baseline: int, definition: str
) -> EarsResult:
    mean, sd_raw = _baseline_stats(y, _EARS_LAG[method], min_baseline)
    sd = np.where(np.isnan(sd_raw), np.nan, np.fmax(sd_raw, sd_floor))
    with np.errstate(invalid="ignore", divide="ignore"):
        c = (y - mean) / sd
    if method == "C3":
        part = np.maximum(c - 1.0, 0.0)  # NaN stays NaN
        pad = np.full((y.shape[0], 2), np.nan)
        lagged = np.concatenate([pad, part], axis=1)
        previous = lagged[:, 1:-1] + lagged[:, :-2]  # days t-1 and t-2
        with np.errstate(invalid="ignore"):
            if definition == "cdc":
                statistic = part + previous
                upper = mean + sd * (1.0 + np.maximum(thr - previous, 0.0))
            else:  # earsC's code: max(0, y_t + s_t (z - P)), alarm when y_t exceeds it
                statistic = np.where(np.isnan(part), np.nan, previous)
                upper = np.maximum(y + sd * (thr - previous), 0.0)
    else:
        statistic = c
        upper = mean + thr * sd
    with np.errstate(invalid="ignore"):
        if definition == "surveillance":
            alarm = np.isfinite(upper) & np.isfinite(y) & (y > upper)
        else:
            alarm = np.isfinite(statistic) & (statistic > thr)
    return EarsResult(
        method=method, statistic=statistic, expected=mean, sd=sd, upper=upper, alarm=alarm,
        threshold=thr, sd_floor=sd_floor, definition=definition,
    )


@dataclass(frozen=True)
class FarringtonResult:
    """Improved Farrington output, arrays shaped (regions, weeks).

    Weeks with less than ``min_years`` of history are NaN (alarm False). ``exceedance`` is
    ``(y - expected) / (upper - expected)``: above 1 means over the threshold. ``trend`` says
    whether the linear trend was kept for that week's fit.
    """

    expected: FloatArray
    upper: FloatArray
    alarm: NDArray[np.bool_]
    exceedance: FloatArray
    dispersion: FloatArray
    trend: NDArray[np.bool_]
    quantile: float
    years_back: int
    window: int
    n_periods: int


@dataclass(frozen=True)
class _GlmFit:
    beta: FloatArray  # (regions, p)
    mu: FloatArray  # (regions, n)
    cov_unscaled: FloatArray  # (regions, p, p), inverse of X'WX
    dispersion: FloatArray  # (regions,), floored at 1


def _gram(x: FloatArray, ww: FloatArray) -> FloatArray:
    """Stacked ``X' diag(ww_r) X`` for every region r."""
    return (x.T[None, :, :] * ww[:, None, :]) @ x


def _solve(a: FloatArray, b: FloatArray) -> FloatArray:
    """Stacked solve of ``a_r beta_r = b_r``; the pseudo-inverse when a system is singular."""
    try:
        return np.asarray(np.linalg.solve(a, b[..., None])[..., 0], dtype=np.float64)
    except np.linalg.LinAlgError:
        return np.einsum("rpq,rq->rp", np.linalg.pinv(a, hermitian=True), b)


def _irls(x: FloatArray, y: FloatArray, w: FloatArray, iterations: int = 60) -> _GlmFit:
    """Poisson log-link IRLS batched over regions: X (n, p) shared, y and prior weights (R, n).

    A weight of 0 removes an observation (missing weeks). Dispersion is Pearson
    ``max(1, sum w (y - mu)^2 / mu / (n - p))`` with n the observations of positive weight.
    """
    present = w > 0
    mean_y = np.sum(w * y, axis=1, keepdims=True) / np.maximum(w.sum(axis=1, keepdims=True), 1e-12)
    mu = np.where(present, (y + mean_y) / 2.0, 1.0) + 1e-3
    eta = np.log(mu)
    beta = np.zeros((y.shape[0], x.shape[1]))
    for _ in range(iterations):
        z = eta + (y - mu) / mu
        ww = w * mu
        beta_new = _solve(_gram(x, ww), (ww * z) @ x)
        eta = np.clip(beta_new @ x.T, -30.0, 30.0)
        mu = np.exp(eta)
        done = np.max(np.abs(beta_new - beta)) < 1e-10
        beta = beta_new
        if done:
            break
    cov = np.asarray(np.linalg.pinv(_gram(x, w * mu), hermitian=True), dtype=np.float64)
    n = present.sum(axis=1)
    pearson = np.sum(np.where(present, w * (y - mu) ** 2 / mu, 0.0), axis=1)
    dof = np.maximum(n - x.shape[1], 1)
    return _GlmFit(beta=beta, mu=mu, cov_unscaled=cov, dispersion=np.maximum(pearson / dof, 1.0))


def _reweighted(x: FloatArray, y: FloatArray, present: NDArray[np.bool_], cut: float) -> _GlmFit:
    """Fit, down-weight observations with standardised Anscombe residual above ``cut``, refit."""
    w0 = present.astype(np.float64)
    first = _irls(x, y, w0)
    mu = first.mu
    hat = mu * np.sum((x[None, :, :] @ first.cov_unscaled) * x[None, :, :], axis=2)
    scale = np.sqrt(first.dispersion[:, None] * np.clip(1.0 - hat, 1e-8, None))
    anscombe = 1.5 * (np.cbrt(y) ** 2 - np.cbrt(mu) ** 2) / (mu ** (1.0 / 6.0) * scale)
    big = present & (anscombe > cut)
    omega = np.where(big, 1.0 / np.where(big, anscombe, 1.0) ** 2, 1.0) * w0
    gamma = present.sum(axis=1, keepdims=True) / np.maximum(omega.sum(axis=1, keepdims=True), 1e-12)
    return _irls(x, y, omega * gamma)


def _design(t0: int, years: int, window: int, n_periods: int, excluded: int, period: int) -> tuple:
    """Baseline weeks and design (intercept, trend, 10-level season) for target week ``t0``."""
    weeks = np.arange(t0 - period * years - window, t0 - excluded)
    offset = (weeks - t0) % period
    in_window = (offset <= window) | (offset >= period - window)
    outside = period - 2 * window - 1
    level = np.where(in_window, 0, 1 + ((offset - window - 1) * (n_periods - 1)) // outside)
    dummies = (level[:, None] == np.arange(1, n_periods)[None, :]).astype(np.float64)
    x = np.column_stack([np.ones(len(weeks)), (weeks - t0).astype(np.float64), dummies])
    return weeks, x


def farrington_flexible(
    counts: ArrayLike,
    *,
    years_back: int = 5,
    window: int = 3,
    n_periods: int = 10,
    weeks_per_year: int = 52,
    past_weeks_excluded: int = 26,
    quantile: float = 0.995,
    reweight_threshold: float = 2.58,
    trend_alpha: float = 0.05,
    min_years: int = 2,
    min_cases_4_weeks: int = 5,
) -> FarringtonResult:
    """Improved Farrington outbreak detection (Noufaily et al. 2013) on weekly counts.

    Parameters
    ----------
    counts : array_like, shape (regions, weeks)
        Weekly counts, NaN for missing weeks (left out of the baseline, never alarmed).
    years_back : int
        Years of history used (b); fewer are used while the series is shorter, down to
        ``min_years``.
    window : int
        Half-width w of the reference window around the same week of past years.
    n_periods : int
        Levels of the seasonal factor: the reference windows form one level, the rest of each
        year is cut into ``n_periods - 1`` equal periods.
    weeks_per_year : int
        Season length; 53-week years are not special-cased.
    past_weeks_excluded : int
        The most recent weeks left out of the baseline (26).
    quantile : float
        Level of the negative-binomial threshold (0.995 [memory: Noufaily's default]).
    reweight_threshold : float
        Standardised Anscombe residual above which a baseline week is down-weighted (2.58).
    trend_alpha : float
        Significance level for keeping the trend.
    min_years : int
        Minimum history in years before a week is assessed.
    min_cases_4_weeks : int
        No alarm unless the current and previous 3 weeks hold at least this many cases.

    Returns
    -------
    FarringtonResult

    Notes
    -----
    For target week t0 the baseline holds weeks ``t0 - 52 b - w .. t0 - 27``. The model is
    quasi-Poisson, ``log mu_s = alpha + beta (s - t0) + gamma_{f(s)}``, with ``f`` the 10-level
    factor (level 0 = weeks within w of t0 modulo the year). After a first fit the standardised
    Anscombe residuals ``s_i = 3/2 (y^(2/3) - mu^(2/3)) / (mu^(1/6) sqrt(phi (1 - h_ii)))`` give
    weights ``omega_i = gamma s_i^-2`` when ``s_i > 2.58`` and ``gamma`` otherwise, ``gamma``
    making them sum to n; the model is refitted with them and
    ``phi = max(1, sum omega (y - mu)^2 / mu / (n - p))``. The trend is fitted only with at least
    3 years of history and kept when its Wald test is significant at ``trend_alpha`` and the
    prediction does not exceed the largest baseline count (Farrington et al. 1996). The expected
    count is ``mu0 = exp(alpha + gamma_0)``; the threshold is the ``quantile`` of a negative
    binomial with mean mu0 and variance ``phi mu0`` (Poisson when phi = 1). Alarm when
    ``y_t0 > upper`` and the last four weeks hold at least 5 cases. Per week, the GLM is fitted
    for all regions at once (batched IRLS); the loop runs over weeks.

    References
    ----------
    Farrington CP, Andrews NJ, Beale AD, Catchpole MA (1996). A statistical algorithm for the
    early detection of outbreaks of infectious disease. J R Stat Soc A 159:547-563.
    Noufaily A, Enki DG, Farrington P, Garthwaite P, Andrews N, Charlett A (2013). An improved
    algorithm for outbreak detection in multiple surveillance systems. Stat Med 32:1206-1222.
    """
    y = as_nonnegative_counts("counts", counts)
    for name, value, minimum in (
        ("years_back", years_back, 1), ("window", window, 0), ("n_periods", n_periods, 2),
        ("weeks_per_year", weeks_per_year, 4), ("past_weeks_excluded", past_weeks_excluded, 0),
        ("min_years", min_years, 1), ("min_cases_4_weeks", min_cases_4_weeks, 0),
    ):
        check_window(name, value, minimum=minimum)
    quantile = check_level("quantile", quantile)
    check_level("trend_alpha", trend_alpha)
    if 2 * window + n_periods > weeks_per_year:
        raise ValueError(
            f"n_periods: {n_periods} periods do not fit a year of {weeks_per_year} weeks "
            f"with window {window}"
        )
    if past_weeks_excluded >= weeks_per_year - window:
        raise ValueError(
            f"past_weeks_excluded: {past_weeks_excluded} would exclude last year's window"
        )
    if min_years > years_back:
        raise ValueError(f"min_years: {min_years} exceeds years_back {years_back}")
    return _farrington(
        y, years_back, window, n_periods, weeks_per_year, past_weeks_excluded, quantile,
        float(reweight_threshold), float(trend_alpha), min_years, min_cases_4_weeks,
    )


def _assess(
    yb: FloatArray, x: FloatArray, years: int, cut: float, z_crit: float
) -> tuple[FloatArray, FloatArray, NDArray[np.bool_], NDArray[np.bool_]]:
    """Expected count, dispersion, trend kept and usability for each row of baseline counts."""
    rows = yb.shape[0]
    present = np.isfinite(yb)
    yb = np.where(present, yb, 0.0)
    usable = present.sum(axis=1) > x.shape[1]
    mu0, phi = np.full(rows, np.nan), np.full(rows, np.nan)
    keep = np.zeros(rows, dtype=bool)
    fit = np.flatnonzero(usable)  # unusable rows are reported as NaN, so they are not fitted
    if fit.size == 0:
        return mu0, phi, keep, usable
    # columns sorted by season level, so that each level is a contiguous block
    level = np.argmax(np.column_stack([1.0 - x[:, 2:].sum(axis=1), x[:, 2:]]), axis=1)
    order = np.argsort(level, kind="stable")
    levels = Levels(n=x.shape[0], sizes=tuple(int(c) for c in np.bincount(level)))
    x = x[order]
    yf, pf = yb[fit][:, order], present[fit][:, order]
    flat_x = x[:, [0, *range(2, x.shape[1])]]
    cy2 = np.cbrt(yf) ** 2
    a0, _, _, flat_phi = _reweighted_levels(
        yf, pf, cy2, levels, None, cut, flat_x, x.shape[1] - 1
    )
    mu0_f, phi_f = np.exp(a0), flat_phi
    if years >= 3:
        a0t, slope, var, full_phi = _reweighted_levels(
            yf, pf, cy2, levels, x[:, 1], cut, x, x.shape[1]
        )
        mu0_trend = np.exp(a0t)
        se = np.sqrt(full_phi * var)
        with np.errstate(divide="ignore", invalid="ignore"):
            significant = np.abs(slope) / se > z_crit
        kept = significant & (mu0_trend <= np.max(np.where(pf, yf, -1.0), axis=1))
        mu0_f = np.where(kept, mu0_trend, mu0_f)
        phi_f = np.where(kept, full_phi, phi_f)
        keep[fit] = kept
    zero = yf.sum(axis=1) == 0
    mu0[fit] = np.where(zero, 0.0, mu0_f)
    phi[fit] = phi_f
    return mu0, phi, keep, usable


def _reweighted_levels(
    y: FloatArray, present: NDArray[np.bool_], cy2: FloatArray, levels: Levels,
    t: FloatArray | None, cut: float, x: FloatArray, p: int,
) -> tuple[FloatArray, FloatArray, FloatArray, FloatArray]:
    """:func:`_reweighted` through the level parametrisation (closed form / profile Newton).

    ``y`` is zero where not ``present`` and ``cy2`` is ``cbrt(y) ** 2``. Returns ``log mu`` at
    the target week for level 0, the trend, its unscaled variance and the floored dispersion of
    the refit. Rows whose fit does not exist (a season level without cases, or no convergence)
    go through :func:`_reweighted` on the full design ``x``.
    """
    w0 = present.astype(np.float64)
    n = present.sum(axis=1)
    dof = np.maximum(n - p, 1)
    first = fit_levels(y, w0, levels, t)
    # rows whose fit does not exist give inf/NaN here; they are replaced at the end
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        if t is None:  # the fitted mean is constant within a level: powers per level
            m = np.where(first.exists[:, None], np.exp(first.intercepts), 1.0)
            mu = levels.expand(m)
            sixth, cbrt2 = levels.expand(m ** (1.0 / 6.0)), levels.expand(np.cbrt(m) ** 2)
        else:
            mu = np.where(first.exists[:, None], first.mu, 1.0)
            sixth, cbrt2 = mu ** (1.0 / 6.0), np.cbrt(mu) ** 2
        pearson = np.sum(np.where(present, (y - mu) ** 2 / mu, 0.0), axis=1)
        phi1 = np.maximum(pearson / dof, 1.0)
        scale = np.sqrt(phi1[:, None] * np.clip(1.0 - first.leverage, 1e-8, None))
        anscombe = 1.5 * (cy2 - cbrt2) / (sixth * scale)
    big = present & (anscombe > cut)
    omega = np.where(big, 1.0 / np.where(big, anscombe, 1.0) ** 2, 1.0) * w0
    gamma = n[:, None] / np.maximum(omega.sum(axis=1, keepdims=True), 1e-12)
    w = omega * gamma
    second = fit_levels(y, w, levels, t, start=first.slope)
    ok2 = w > 0
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        mu2 = np.where(second.exists[:, None], second.mu, 1.0)
        pearson2 = np.sum(np.where(ok2, w * (y - mu2) ** 2 / mu2, 0.0), axis=1)
    phi2 = np.maximum(pearson2 / np.maximum(ok2.sum(axis=1) - p, 1), 1.0)
    a0, slope, var = second.intercepts[:, 0], second.slope, second.slope_var
    bad = np.flatnonzero(~(first.exists & second.exists))
    if bad.size:
        old = _reweighted(x, y[bad], present[bad], cut)
        a0, slope, var, phi2 = a0.copy(), slope.copy(), var.copy(), phi2.copy()
        a0[bad] = old.beta[:, 0]
        phi2[bad] = old.dispersion
        if t is not None:
            slope[bad] = old.beta[:, 1]
            var[bad] = old.cov_unscaled[:, 1, 1]
    return a0, slope, var, phi2


def _nb_upper(mu0: FloatArray, phi: FloatArray, quantile: float) -> FloatArray:
    upper = np.zeros_like(mu0)
    pois = (phi <= 1.0 + 1e-12) & (mu0 > 1e-8)
    nb = (phi > 1.0 + 1e-12) & (mu0 > 1e-8)
    upper[pois] = stats.poisson.ppf(quantile, mu0[pois])
    upper[nb] = stats.nbinom.ppf(quantile, mu0[nb] / (phi[nb] - 1.0), 1.0 / phi[nb])
    return upper


def _farrington(
    y: FloatArray,
    years_back: int,
    window: int,
    n_periods: int,
    period: int,
    excluded: int,
    quantile: float,
    cut: float,
    trend_alpha: float,
    min_years: int,
    min_cases: int,
) -> FarringtonResult:
    regions, weeks = y.shape
    nan = np.full((regions, weeks), np.nan)
    expected, upper, dispersion = nan.copy(), nan.copy(), nan.copy()
    trend = np.zeros((regions, weeks), dtype=bool)
    assessed = np.zeros((regions, weeks), dtype=bool)
    z_crit = float(stats.norm.ppf(1.0 - trend_alpha / 2.0))
    targets = np.arange(period * min_years + window, weeks)
    years_of = np.minimum(years_back, (targets - window) // period)
    for years in np.unique(years_of):
        # the design relative to the target week depends only on the years of history, so all
        # (region, target week) pairs with the same years are fitted in one batch
        t0s = targets[years_of == years]
        rel, x = _design(0, int(years), window, n_periods, excluded, period)
        step = max(1, _FARRINGTON_ROWS // max(regions, 1))
        for first in range(0, t0s.size, step):
            block = t0s[first : first + step]
            yb = y[:, block[:, None] + rel[None, :]].reshape(-1, rel.size)
            parts = [  # rows are independent: fitted in blocks whose temporaries stay in cache
                _assess(yb[rows], x, int(years), cut, z_crit)
                for rows in row_chunks(yb.shape[0], yb.shape[1], _FARRINGTON_CELLS)
            ]
            mu0, phi, keep, usable = (np.concatenate(a) for a in zip(*parts, strict=True))
            shape = (regions, block.size)
            expected[:, block] = np.where(usable, mu0, np.nan).reshape(shape)
            dispersion[:, block] = np.where(usable, phi, np.nan).reshape(shape)
            trend[:, block] = (keep & usable).reshape(shape)
            assessed[:, block] = usable.reshape(shape)
    upper[assessed] = _nb_upper(expected[assessed], dispersion[assessed], quantile)

    recent = sliding_window_view(
        np.concatenate([np.zeros((regions, 3)), np.nan_to_num(y)], axis=1), 4, axis=1
    ).sum(axis=2)
    with np.errstate(invalid="ignore"):
        alarm = np.isfinite(y) & np.isfinite(upper) & (y > upper) & (recent >= min_cases)
        spread = upper - expected
        exceedance = np.divide(y - expected, spread, out=nan.copy(), where=spread > 0)
    return FarringtonResult(
        expected=expected, upper=upper, alarm=alarm, exceedance=exceedance,
        dispersion=dispersion, trend=trend, quantile=quantile, years_back=years_back,
        window=window, n_periods=n_periods,
    )
