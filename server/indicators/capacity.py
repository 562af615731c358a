"""Hospital and ICU pressure forecasts under named scenarios, against staffed capacity.

Admissions are projected from the current growth rate along a *scenario*: a path of daily growth
rates that starts from the estimated rate (``trend``: it continues; ``growth_to``: it moves
linearly to a given rate within some days; ``change``: admissions reach a given multiple of
today's level within some days, then hold). Occupancy follows from the admissions through the
length of stay (:class:`server.indicators.hospital.LengthOfStay`). Everything is computed for all
regions at once on arrays shaped ``(regions, sims, horizon + 1)``.

Uncertainty. :func:`capacity_forecasts` draws the growth rate from its sampling distribution
and the current admission level from its Poisson (Jeffreys) posterior (parameter uncertainty),
then each day's admissions and bed census given them (count noise): predictive quantiles come
from the simulated values, one :class:`QuantileForecast` per target and scenario. The day a
scenario reaches a share of staffed beds is read from simulated census paths (parameters and
count noise, one deviate per path). The ICU admission level behind today's census is itself
drawn from its posterior given the census (:func:`capacity_forecasts`, Notes).
:func:`projected_share` is the deterministic counterpart used for the daily indicator series of
the rules engine: the expected path at the growth rate's median and at its 5 % and 95 %
quantiles (the path is monotone in r).

Occupancy model. ICU admissions are not reported separately; the admission level behind today's
census is inferred from it: with admissions that grew at rate r over the last
:data:`HISTORY_DAYS` days, today's census is :math:`O_0 = a_0 \\sum_{j<K} e^{-rj} S(j)`.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from datetime import date
from typing import Literal, cast

import numpy as np
from numpy.typing import ArrayLike, NDArray

from server.indicators._arrays import FloatArray, as_regions_days, check_window
from server.indicators.growth import growth_rate
from server.indicators.hospital import LengthOfStay, length_of_stay
from server.indicators.quantile_forecast import DEFAULT_LEVELS, QuantileForecast

#: Days of exponential admission history assumed behind today's census (common practice, no
#: source: an epidemic phase rarely keeps one growth rate for longer than about two months).
HISTORY_DAYS = 60
#: Regions simulated together (bounds the temporaries: block x sims x horizon floats).
BLOCK = 256
#: Expected counts are capped here (an absurd growth rate must not overflow the draws).
MAX_MEAN = 1e7
#: Below this expected count a day's count is drawn exactly; above, by the Cornish-Fisher
#: normal approximation (:func:`count_draws`).
EXACT_BELOW = 2.0
#: Two-sided normal quantile of the 90 % interval of the growth rate in :func:`projected_share`.
Z90 = 1.6448536269514722

ScenarioKind = Literal["trend", "growth_to", "change"]
AnyFloat = NDArray[np.floating]  # the simulation runs in single precision
TARGETS = ("hosp_admissions", "icu_occupied", "icu_share")
#: Kinds of bed a census can be forecast for: the targets are ``<beds>_occupied`` and
#: ``<beds>_share`` (intensive care; general, "ward", beds).
BEDS = ("icu", "ward")
#: Prior standard deviation of the daily growth rate (normal, centred on 0): the fitted rate is
#: combined with it by the normal-normal rule, r = r_hat tau^2 / (tau^2 + se^2), se^2 = tau^2
#: se_hat^2 / (tau^2 + se_hat^2). 0.1 a day is a doubling or halving in about a week at one
#: standard deviation: weakly informative (common practice, no source). It leaves well estimated
#: rates nearly unchanged and stops a rate fitted on a handful of admissions from being
#: extrapolated 21 days ahead (without it, district forecasts on the demo scored thousands of
#: times the naive error). Chosen on the demo, so not an independent check: 0.05 also tamed
#: them but cut the capacity signal's lead before the demo's one real crossing from 20 days to 4.
GROWTH_PRIOR_SD = 0.1


@dataclass(frozen=True, kw_only=True)
class Scenario:
    """A named path of daily growth rates starting from the current rate r.

    ``trend``: :math:`r_h = r`. ``growth_to``: :math:`r_h = r + (v - r)\\min(h/D, 1)` (``value``
    = v per day, ``within_days`` = D). ``change``: admissions reach ``value`` times today's
    level by day D and then hold, :math:`r_h = \\ln(v)/D` for :math:`h \\le D`, then 0.
    """

    name: str
    kind: ScenarioKind = "trend"
    value: float = 0.0
    within_days: int = 1
    label: str = ""

    def __post_init__(self) -> None:
        if self.kind not in ("trend", "growth_to", "change"):
            raise ValueError(f"kind: expected trend, growth_to or change, got {self.kind!r}")
        check_window("within_days", self.within_days)
        if not np.isfinite(self.value) or (self.kind == "change" and self.value <= 0):
            raise ValueError(f"value: expected a finite number (> 0 for change), got "
                             f"{self.value!r}")

    def growth_path(self, r: ArrayLike, horizon: int) -> FloatArray:
        """Daily growth rates for days 1..horizon, shaped ``r.shape + (horizon,)``."""
        r = np.asarray(r, dtype=np.float64)[..., np.newaxis]
        h = np.arange(1, horizon + 1, dtype=np.float64)
        ramp = np.minimum(h / self.within_days, 1.0)
        if self.kind == "trend":
            return np.broadcast_to(r, r.shape[:-1] + (horizon,)).copy()
        if self.kind == "growth_to":
            return r + (self.value - r) * ramp
        step = np.where(h <= self.within_days, np.log(self.value) / self.within_days, 0.0)
        return np.broadcast_to(step, r.shape[:-1] + (horizon,)).copy()

    def log_multiplier(self, r: ArrayLike, horizon: int) -> FloatArray:
        """:math:`\\sum_{i \\le h} r_i` for h = 1..horizon (closed form of the cumulative sum of
        :meth:`growth_path`), shaped ``r.shape + (horizon,)``."""
        arr = np.asarray(r)
        dt = np.float32 if arr.dtype == np.float32 else np.float64  # single stays single
        rate = cast(AnyFloat, np.asarray(arr, dtype=dt)[..., np.newaxis])
        h: AnyFloat = np.arange(1, horizon + 1, dtype=dt)
        if self.kind == "trend":
            return rate * h
        if self.kind == "growth_to":
            ramp: AnyFloat = np.cumsum(np.minimum(h / self.within_days, 1.0)).astype(dt)
            return rate * h + (self.value - rate) * ramp
        log_v = np.log(self.value) * np.minimum(h, self.within_days) / self.within_days
        return np.broadcast_to(log_v.astype(dt), rate.shape[:-1] + (horizon,)).copy()


@dataclass(frozen=True, eq=False)
class OccupancyPath:
    """Expected census for days 0..horizon: today's patients still in a bed plus new ones."""

    current: FloatArray   # O_0 R_r(h)
    new: FloatArray       # sum_{s=1..h} a_s S(h - s)
    admissions: FloatArray  # a_h, h = 0..horizon (a_0: today's inferred admission level)

    @property
    def total(self) -> FloatArray:
        return self.current + self.new


@dataclass(frozen=True, eq=False)
class DaysToShare:
    """First day (1..horizon) a scenario's simulated census reaches ``share`` of staffed beds.

    ``estimate`` is the median over the simulations, ``lower``/``upper`` the 5 % and 95 %
    quantiles; 0 = already reached today, ``inf`` = not within ``horizon``, NaN = no data.
    Each simulated path carries its parameters and count noise with one normal deviate per
    simulation over the horizon (a census changes slowly: the same patients stay).
    """

    scenario: str
    share: float
    horizon: int
    estimate: FloatArray
    lower: FloatArray
    upper: FloatArray


@dataclass(frozen=True, eq=False)
class CapacityForecasts:
    """What :func:`capacity_forecasts` returns: the quantile forecasts and the crossing days."""

    forecasts: tuple[QuantileForecast, ...]
    days_to_share: tuple[DaysToShare, ...]
    growth: FloatArray
    growth_se: FloatArray

    def forecast(self, target: str, scenario: str) -> QuantileForecast:
        for f in self.forecasts:
            if f.target == target and f.scenario == scenario:
                return f
        raise KeyError((target, scenario))

    def crossing(self, scenario: str, share: float) -> DaysToShare:
        for c in self.days_to_share:
            if c.scenario == scenario and np.isclose(c.share, share):
                return c
        raise KeyError((scenario, share))


def _survival(los: LengthOfStay, size: int) -> FloatArray:
    s = los.survival
    return np.concatenate([s, np.zeros(max(size - s.size, 0))])[:size]


def history_weights(r: ArrayLike, los: LengthOfStay, horizon: int) -> tuple[FloatArray, FloatArray]:
    """Share of today's patients still in a bed on days 0..horizon, and admissions per patient.

    Returns ``(remain, per_patient)`` shaped ``r.shape + (horizon + 1,)`` and ``r.shape``.

    Notes
    -----
    With admissions :math:`a_{-j} = a_0 e^{-rj}`, :math:`j = 0..K-1`,

    .. math:: R_r(h) = \\frac{\\sum_j e^{-rj} S(j + h)}{\\sum_j e^{-rj} S(j)}, \\qquad
              a_0 = \\frac{O_0}{\\sum_j e^{-rj} S(j)}.

    At r = 0 and K beyond the longest stay, :math:`R_0` is the equilibrium residual-stay
    survival and :math:`a_0 = O_0 / E[L]` (Little 1961). Single-precision ``r`` gives
    single-precision results (the simulation's); anything else is computed in double.
    """
    r = np.asarray(r)
    r = r if r.dtype == np.float32 else r.astype(np.float64)
    surv = _survival(los, HISTORY_DAYS + horizon + 1)
    j = np.arange(HISTORY_DAYS)
    shifted = surv[j[:, None] + np.arange(horizon + 1)[None, :]].astype(r.dtype)  # S(j + h)
    with np.errstate(over="ignore", invalid="ignore"):
        w = np.exp(-r[..., None] * j.astype(r.dtype))
        tail = w @ shifted
        base = tail[..., 0]
        return tail / base[..., None], 1.0 / base  # absurd rates overflow: NaN, not a value


def expected_occupancy(
    occupied: ArrayLike, r: ArrayLike, scenario: Scenario, los: LengthOfStay, horizon: int,
    *, history: tuple[FloatArray, FloatArray] | None = None,
) -> OccupancyPath:
    """Expected census on days 0..horizon under ``scenario`` from today's census and rate r.

    Notes
    -----
    :math:`a_h = a_0 \\exp(\\sum_{i \\le h} r_i)` and
    :math:`O_h = O_0 R_r(h) + \\sum_{s=1}^{h} a_s S(h - s)`. Under ``trend`` this is
    :math:`O_0 e^{rh}` up to the cut history (every census of a steady exponential phase grows at
    r; Wallinga & Lipsitch 2007). ``history`` is :func:`history_weights` of ``r``, when known.

    References
    ----------
    Little JDC (1961). A proof for the queuing formula L = lambda W. Oper Res 9:383-387.
    """
    r = np.asarray(r)
    r = r if r.dtype == np.float32 else r.astype(np.float64)
    o0 = np.asarray(occupied, dtype=r.dtype)
    o0, r = np.broadcast_arrays(o0, r)
    remain, per_patient = history if history is not None else history_weights(r, los, horizon)
    log_mult = scenario.log_multiplier(r, horizon)
    with np.errstate(over="ignore", invalid="ignore"):
        adm = np.empty(r.shape + (horizon + 1,), dtype=r.dtype)
        adm[..., 0] = o0 * per_patient
        adm[..., 1:] = adm[..., :1] * np.exp(log_mult)
        surv = _survival(los, horizon + 1)
        lag = np.arange(horizon + 1)[None, :] - np.arange(1, horizon + 1)[:, None]  # h - s
        kernel = np.where(lag >= 0, surv[np.clip(lag, 0, None)], 0.0).astype(r.dtype)
        new = adm[..., 1:] @ kernel
    return OccupancyPath(current=o0[..., None] * remain, new=new, admissions=adm)


def _first_day(share: FloatArray, threshold: float) -> FloatArray:
    with np.errstate(invalid="ignore"):
        hit = share >= threshold
    day = np.where(hit.any(axis=-1), np.argmax(hit, axis=-1), np.inf).astype(np.float64)
    return np.where(np.isnan(share).any(axis=-1), np.nan, day)


@dataclass(frozen=True, eq=False)
class ProjectedShare:
    """Deterministic projection for the engine: (regions, days) arrays, shares in percent.

    ``share_*``: expected share of staffed beds ``horizon`` days ahead at the growth rate's
    median / 5 % / 95 % quantiles; ``days_*``: first day it reaches ``threshold`` (``inf``
    when not within ``horizon``). Lower bounds pair with the lower rate for the share and the
    higher rate for the day.
    """

    share_estimate: FloatArray
    share_lower: FloatArray
    share_upper: FloatArray
    days_estimate: FloatArray
    days_lower: FloatArray
    days_upper: FloatArray


def projected_share(
    occupied: ArrayLike, staffed: ArrayLike, r: ArrayLike, r_se: ArrayLike, *,
    scenario: Scenario, los: LengthOfStay, horizon: int = 14, threshold: float = 85.0,
) -> ProjectedShare:
    """Projected share of staffed beds and days until ``threshold`` % for every region and day.

    Parameters
    ----------
    occupied, staffed : array_like, shape (regions, days)
        Census and staffed beds on each day (the origin of that day's projection).
    r, r_se : array_like, shape (regions, days)
        Growth rate of admissions on each day and its standard error.
    scenario : Scenario
    los : LengthOfStay
    horizon : int
        Days ahead for ``share_*`` and the longest wait for ``days_*``.
    threshold : float
        Share of staffed beds, in percent.

    Notes
    -----
    :func:`expected_occupancy` at :math:`r + z\\,\\mathrm{se}`, :math:`z \\in \\{-1.645, 0,
    1.645\\}`, divided by the staffed beds of the origin day (held constant).
    """
    horizon = check_window("horizon", horizon)
    o = as_regions_days("occupied", occupied)
    b = as_regions_days("staffed", staffed)
    r = as_regions_days("r", r)
    se = as_regions_days("r_se", r_se)
    out = []
    for z in (0.0, -Z90, Z90):
        rate = r + z * se
        ok = np.isfinite(rate) & np.isfinite(o) & (b > 0)
        path = expected_occupancy(np.where(ok, o, 0.0), np.where(ok, rate, 0.0), scenario, los,
                                  horizon).total
        share = 100.0 * path / np.where(ok, b, 1.0)[..., None]
        share = np.where(ok[..., None], share, np.nan)
        out.append((share[..., horizon], _first_day(share, threshold)))
    (s_mid, d_mid), (s_lo, d_late), (s_hi, d_early) = out
    return ProjectedShare(
        share_estimate=s_mid, share_lower=np.fmin(s_lo, s_hi), share_upper=np.fmax(s_lo, s_hi),
        days_estimate=d_mid, days_lower=np.fmin(d_early, d_late),
        days_upper=np.fmax(d_early, d_late),
    )


def capacity_forecasts(
    admissions: ArrayLike,
    *,
    regions: Sequence[str],
    origin: date,
    scenarios: Sequence[Scenario],
    occupied: ArrayLike | None = None,
    staffed: ArrayLike | None = None,
    los: LengthOfStay | None = None,
    horizon: int = 21,
    window: int = 14,
    sims: int = 400,
    levels: Sequence[float] = DEFAULT_LEVELS,
    shares: Sequence[float] = (85.0,),
    seed: int = 0,
    beds: str = "icu",
) -> CapacityForecasts:
    """Simulated admissions, census and share of staffed beds, days 1..horizon, per scenario.

    Parameters
    ----------
    admissions : array_like, shape (regions, days)
        Daily admissions up to ``origin`` (the last column); the last ``window`` days fit the
        growth rate (Poisson log-linear, quasi-Poisson standard error, no weekday effects), the
        last 7 the current level.
    regions : sequence of str
    origin : date
        The last day with data.
    scenarios : sequence of Scenario
    occupied, staffed : array_like, shape (regions,), optional
        Census and staffed beds on ``origin``; NaN where a region reports no capacity. Without
        them only ``hosp_admissions`` is forecast.
    los : LengthOfStay, optional
        Default :func:`server.indicators.hospital.length_of_stay` (median 8, IQR 5-13 days).
    horizon, window, sims : int
    levels : sequence of float
        Quantile levels of the forecasts (symmetric, including 0.5).
    shares : sequence of float
        Shares of staffed beds (percent) whose crossing day is reported.
    seed : int
        Seed of the ``numpy.random.Generator`` (same seed, same forecasts).
    beds : {"icu", "ward"}
        The kind of bed ``occupied`` and ``staffed`` count; names the census targets
        (``icu_occupied``/``icu_share`` or ``ward_occupied``/``ward_share``). The model is the
        same; pass the kind's own ``los``.

    Returns
    -------
    CapacityForecasts
        ``forecasts``: per scenario, ``hosp_admissions`` and (with capacity) ``icu_occupied``
        and ``icu_share`` (percent); ``days_to_share`` per scenario and share.

    Notes
    -----
    Per simulation i: :math:`r_i \\sim N(\\hat r, \\mathrm{se}^2)`, the expected 7-day sum
    :math:`\\mu_i \\sim \\mathrm{Gamma}(x_7 + 1/2, 1)` (Jeffreys), today's level
    :math:`A_{0,i} = \\mu_i (1 - e^{-r_i}) / (1 - e^{-7 r_i})`, admissions
    :math:`N_h \\sim \\mathrm{Poisson}(A_{0,i} e^{\\sum_{k \\le h} r_{i,k}})`. Census:
    :math:`\\mathrm{Binomial}(O_0, R_{r_i}(h)) + \\mathrm{Poisson}(\\sum_s a_{s,i} S(h-s))`,
    exact marginally when admissions are Poisson and stays independent (Poisson thinning).
    Today's patients are known, the ICU admission level behind them is not: the census is
    :math:`\\mathrm{Poisson}(a_0 W_r)`, :math:`W_r = \\sum_j e^{-rj} S(j)`, so each simulation
    starts the new patients from :math:`a_{0,i} = \\lambda_i / W_{r_i}`,
    :math:`\\lambda_i \\sim \\mathrm{Gamma}(O_0 + 1/2, 1)` (Jeffreys). Without that draw the
    14-day 90 % band of ICU beds held the demo's outcome 82.5 % of the time, most misses above
    it (12 % above the 95 % quantile); with it 91.3 % (4.4 % below, 4.3 % above).

    References
    ----------
    Wallinga J, Lipsitch M (2007). Proc R Soc B 274:599-604 (growth rate and renewal).
    Rees EM et al. (2020). BMC Med 18:270 (ICU length of stay).
    """
    horizon = check_window("horizon", horizon)
    sims = check_window("sims", sims, minimum=20)
    counts = as_regions_days("admissions", admissions)
    n = counts.shape[0]
    if len(regions) != n:
        raise ValueError(f"regions: {len(regions)} names for {n} rows of admissions")
    if not scenarios:
        raise ValueError("scenarios: at least one scenario is needed")
    if beds not in BEDS:
        raise ValueError(f"beds: expected one of {BEDS}, got {beds!r}")
    targets = ("hosp_admissions", f"{beds}_occupied", f"{beds}_share")
    los = los or length_of_stay()
    lv = np.asarray(levels, dtype=np.float64)
    capacity = occupied is not None and staffed is not None
    o0 = np.full(n, np.nan) if occupied is None else np.asarray(occupied, np.float64).reshape(n)
    b0 = np.full(n, np.nan) if staffed is None else np.asarray(staffed, np.float64).reshape(n)
    fit = growth_rate(counts[:, -window:], window, day_of_week=False)
    r_hat, se = shrunk_growth(fit.estimate, fit.std_error)
    week = counts[:, -7:].sum(axis=1)  # NaN when a day is missing
    ok = np.isfinite(r_hat) & np.isfinite(se) & np.isfinite(week)
    rng = np.random.default_rng(seed)
    path_chol = census_correlation(los, horizon).T.astype(np.float32)
    out = {(t, s.name): np.full((n, horizon, lv.size), np.nan)
           for t in targets for s in scenarios}
    days = {(s.name, float(q)): np.full((3, n), np.nan) for s in scenarios for q in shares}
    for start in range(0, n, BLOCK):
        blk = slice(start, min(start + BLOCK, n))
        m = blk.stop - blk.start
        good = ok[blk]
        r = rng.standard_normal((m, sims)) * np.where(good, se[blk], 0.0)[:, None] + np.where(
            good, r_hat[blk], 0.0)[:, None]
        mu = rng.gamma(np.where(good, week[blk], 0.0)[:, None] + 0.5, size=(m, sims))
        a0 = mu * _level_factor(r)
        r32 = r.astype(np.float32)
        census = good & np.isfinite(o0[blk]) & (b0[blk] > 0)
        occ0 = np.where(census, np.rint(o0[blk]), 0.0)
        # One set of normal deviates per block, shared by the scenarios (common random numbers:
        # the fans differ by their paths, not by noise).
        # Counts are simulated in single precision (exact for whole numbers below 2**24;
        # the means are capped at MAX_MEAN): half the memory traffic of the largest arrays.
        z_adm = rng.standard_normal((m, sims, horizon), dtype=np.float32)
        z_occ = rng.standard_normal((m, sims, horizon), dtype=np.float32) if capacity else z_adm
        hist = history_weights(r32, los, horizon) if capacity and census.any() else None
        if hist is not None:
            # Jeffreys posterior of the census's expected value: a census of Poisson admissions
            # with independent stays is Poisson (thinning), O_0 ~ Poisson(a_0 W),
            # W = sum_j e^-rj S(j)
            level_occ = rng.gamma(occ0[:, None] + 0.5, size=(m, sims)).astype(np.float32)
            z_path = rng.standard_normal((m, sims, horizon), dtype=np.float32) @ path_chol
        for sc in scenarios:
            log_mult = sc.log_multiplier(r32, horizon)
            with np.errstate(over="ignore"):
                lam = np.exp(log_mult)
                lam *= a0[..., None].astype(np.float32)
                np.minimum(lam, MAX_MEAN, out=lam)
            draws = count_draws(rng, lam, lam, lam, z_adm)
            q = _quantiles(draws, lv)
            out[("hosp_admissions", sc.name)][blk] = np.where(good[:, None, None], q, np.nan)
            if hist is None:
                continue
            # today's patients are known (occ0); the admission level behind them is not: the
            # new patients' path starts from a draw of the census's expected value (level_occ)
            path = expected_occupancy(level_occ, r32, sc, los, horizon, history=hist)
            stay = hist[0][..., 1:]
            cur = occ0.astype(np.float32)[:, None, None] * stay
            new = np.minimum(path.new[..., 1:], MAX_MEAN)
            var = cur * (1.0 - stay) + new
            third = cur * (1.0 - stay) * (1.0 - 2.0 * stay) + new
            in_bed = count_draws(rng, cur + new, var, third, z_occ)
            qb = _quantiles(in_bed, lv)
            keep = census[:, None, None]
            out[(targets[1], sc.name)][blk] = np.where(keep, qb, np.nan)
            out[(targets[2], sc.name)][blk] = np.where(
                keep, 100.0 * qb / np.where(census, b0[blk], 1.0)[:, None, None], np.nan)
            # Crossing days from census paths whose count noise is correlated over the horizon
            # as a census is (census_correlation: the same patients stay).
            paths = np.concatenate([np.broadcast_to(occ0[:, None, None], (m, sims, 1)),
                                    count_draws(rng, cur + new, var, third, z_path)], axis=-1)
            share_path = 100.0 * paths / np.where(census, b0[blk], 1.0)[:, None, None]
            for q_share in shares:
                first = _first_day(share_path, float(q_share))
                qd = np.quantile(first, (0.5, 0.05, 0.95), axis=1, method="inverted_cdf")
                days[(sc.name, float(q_share))][:, blk] = np.where(census, qd, np.nan)
    forecasts = []
    horizons = np.arange(1, horizon + 1, dtype=np.int64)
    for sc in scenarios:
        for t in targets if capacity else targets[:1]:
            forecasts.append(QuantileForecast(
                target=t, scenario=sc.name, regions=tuple(regions), origin=origin,
                horizons=horizons, levels=lv, values=out[(t, sc.name)]))
    crossings = tuple(
        DaysToShare(scenario=sc.name, share=float(q), horizon=horizon,
                    estimate=days[(sc.name, float(q))][0], lower=days[(sc.name, float(q))][1],
                    upper=days[(sc.name, float(q))][2])
        for sc in scenarios for q in shares) if capacity else ()
    return CapacityForecasts(forecasts=tuple(forecasts), days_to_share=crossings,
                             growth=np.where(ok, r_hat, np.nan), growth_se=np.where(ok, se, np.nan))


def census_correlation(los: LengthOfStay, horizon: int) -> FloatArray:
    """Cholesky factor of the correlation of a census's count noise over days 1..horizon.

    Notes
    -----
    In a steady state with Poisson arrivals and independent stays (the M/G/infinity queue) the
    census of days t and t + k correlates as the equilibrium residual-stay survival,
    :math:`\\rho(k) = \\sum_{j \\ge k} S(j) / \\sum_j S(j)` (:func:`history_weights` at r = 0):
    the patients still in a bed k days later. Census paths draw their noise with this
    correlation, so that the day a path first reaches a share is neither as smooth as one deviate
    per path nor as rough as one per day. [The M/G/infinity covariance from memory: Eick SG,
    Massey WA, Whitt W (1993). The physics of the M_t/G/infinity queue. Oper Res 41:731-742.]
    """
    remain, _ = history_weights(np.zeros(1), los, horizon)
    rho = remain[0]
    lag = np.abs(np.arange(1, horizon + 1)[:, None] - np.arange(1, horizon + 1)[None, :])
    return np.asarray(np.linalg.cholesky(rho[lag] + 1e-9 * np.eye(horizon)), dtype=np.float64)


def shrunk_growth(
    r_hat: FloatArray, se: FloatArray, prior_sd: float = GROWTH_PRIOR_SD
) -> tuple[FloatArray, FloatArray]:
    """The growth rate and its standard error combined with a normal prior N(0, prior_sd^2)
    (the conjugate normal-normal posterior; :data:`GROWTH_PRIOR_SD`)."""
    tau2, v = prior_sd**2, np.asarray(se, dtype=np.float64) ** 2
    with np.errstate(invalid="ignore", divide="ignore"):
        weight = tau2 / (tau2 + v)
        return np.asarray(r_hat) * weight, np.sqrt(tau2 * v / (tau2 + v))


def _level_factor(r: FloatArray) -> FloatArray:
    """Today's expected admissions per expected 7-day sum under growth r: (1-e^-r)/(1-e^-7r),
    written as e^(6r) (e^r-1)/(e^(7r)-1) for r < 0 so that steep declines do not overflow."""
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        pos = np.maximum(r, 0.0)
        neg = np.minimum(r, 0.0)
        f = np.where(r >= 0, np.expm1(-pos) / np.expm1(-7.0 * pos),
                     np.exp(6.0 * neg) * np.expm1(neg) / np.expm1(7.0 * neg))
    return np.where(np.abs(r) < 1e-9, 1.0 / 7.0, f)


def count_draws(
    rng: np.random.Generator, mean: AnyFloat, var: AnyFloat, third: AnyFloat, z: AnyFloat,
) -> AnyFloat:
    """Integer draws with the given mean, variance and third cumulant, from normal deviates z.

    Where ``mean >= EXACT_BELOW`` the Cornish-Fisher expansion to the skewness term is rounded:
    :math:`x = \\lfloor \\mu + s z + (z^2 - 1)\\kappa_3 / (6\\sigma^2) + 1/2 \\rfloor`,
    clipped at 0, with :math:`s^2 = \\sigma^2 - 1/12` (Sheppard's correction: rounding adds
    1/12 to the variance). For Poisson means of 2 and more the draws are within 0.006 of the
    Poisson distribution in total variation (measured; 0.0005 at 30). Below, the count is drawn
    from Poisson(mean) (numpy's exact sampler); for a census whose variance is below its mean
    (today's patients leave binomially) that overstates the spread of small counts, on the
    safe side.

    References
    ----------
    Cornish EA, Fisher RA (1937). Moments and cumulants in the specification of distributions.
    Rev Inst Int Stat 5:307-320.
    """
    safe = np.maximum(var, 1e-12)
    x = z * z
    x -= 1.0
    x *= third
    x /= 6.0 * safe
    safe -= 1.0 / 12.0
    np.maximum(safe, 0.0, out=safe)
    np.sqrt(safe, out=safe)
    safe *= z
    x += safe
    x += mean
    x += 0.5
    np.floor(x, out=x)
    np.maximum(x, 0.0, out=x)
    small = mean < EXACT_BELOW
    if small.any():
        x[small] = rng.poisson(mean[small])
    return x


def _quantiles(x: AnyFloat, levels: FloatArray) -> AnyFloat:
    """Quantiles over axis 1 of (regions, sims, horizon) -> (regions, horizon, levels), with
    numpy's default "linear" rule (position q (n - 1) in the sorted sample)."""
    s = np.sort(np.moveaxis(x, 1, -1), axis=-1)
    pos = levels * (s.shape[-1] - 1)
    lo = np.floor(pos).astype(np.int64)
    hi = np.minimum(lo + 1, s.shape[-1] - 1)
    frac = pos - lo
    return s[..., lo] * (1.0 - frac) + s[..., hi] * frac
