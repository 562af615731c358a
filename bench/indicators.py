"""Benchmark: every indicator for many regions x days, against plain per-region loops.

Run ``.venv/bin/python bench/indicators.py`` (3 000 regions x 1 096 days) or with
``--regions 300 --days 400`` for a quick run. Data are invented and seeded (Poisson counts around a
random walk of log incidence). Each baseline is a plain loop over regions with pandas, scipy or
statsmodels, timed on a subsample in the same run and scaled to all regions. The wave-phase section
(``bench/phase.py``, ``--only-phase``) fits its own invented waves over 150 days and is part of the
daily set. Prints only; no test asserts timings.
"""

from __future__ import annotations

import argparse
import datetime as dt
import time
from collections.abc import Callable

import numpy as np
import pandas as pd
import statsmodels.api as sm
from curves import curve_section  # bench/curves.py, beside this script
from phase import PHASE_DAYS, phase_section  # bench/phase.py, beside this script
from scipy import stats
from statsmodels.nonparametric.smoothers_lowess import lowess
from statsmodels.stats.proportion import proportion_confint

from server.indicators import (
    GrowthRate,
    capacity_crossing,
    ears,
    estimate_delay,
    farrington_flexible,
    gamma_serial_interval,
    incidence_rate,
    length_of_stay,
    nowcast,
    positivity,
    project_icu,
    reproduction_number,
    rolling_growth_rate,
    smooth,
    trend,
    weekly_sum,
)
from server.indicators import level as ww_level
from server.indicators.forecast_scores import (
    ForecastScores,
    forecast_record,
    last_week_mean,
    poisson_persistence,
    score_forecasts,
)
from server.indicators.growth import design_matrix
from server.indicators.nowcast import (
    DelayModel,
    delay_model,
    nowcast_window,
    triangle_from_rows,
    triangle_from_vintages,
)
from server.indicators.testing import detect_testing_changes
from server.indicators.testing_known import testing_changes_as_known
from server.services.district_nowcasts import NOWCAST_PERIOD

RT_TARGET_S = 1.0
FULL_TARGET_S = 15.0


def synthetic(regions: int, days: int, seed: int = 2024) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    walk = np.cumsum(rng.normal(0.0, 0.03, (regions, days)), axis=1)
    lam = rng.gamma(2.0, 30.0, (regions, 1)) * np.exp(walk)
    cases = rng.poisson(lam).astype(float)
    tests = cases * 8 + rng.poisson(300, (regions, days))
    conc = np.where(np.arange(days) % 2 == 0, lam * np.exp(rng.normal(0, 0.2, lam.shape)), np.nan)
    return {
        "cases": cases, "tests": tests, "log_ww": np.log(conc * 1e3),
        "admissions": rng.poisson(lam / 40.0).astype(float),
    }


def timed(func: Callable[[], object]) -> float:
    start = time.perf_counter()
    func()
    return time.perf_counter() - start


def timed_cpu(func: Callable[[], object]) -> tuple[float, float]:
    """Wall-clock and CPU (process) time: on a shared machine the CPU time is the steadier."""
    wall, cpu = time.perf_counter(), time.process_time()
    func()
    return time.perf_counter() - wall, time.process_time() - cpu


def baseline_rt(cases: np.ndarray, w: np.ndarray) -> None:
    for row in cases:  # plain loop: one region at a time, scipy quantiles
        lam = np.convolve(row, w)[: row.size]
        inc = pd.Series(row).rolling(7).sum().to_numpy()
        tot = pd.Series(lam).rolling(7).sum().to_numpy()
        shape, rate = 1.0 + inc, 0.2 + tot
        stats.gamma.ppf([[0.025], [0.975]], shape, scale=1.0 / rate)


def baseline_incidence(cases: np.ndarray) -> None:
    for row in cases:
        x = pd.Series(row).rolling(7).sum().to_numpy()
        stats.chi2.ppf(0.025, 2 * x) / 2, stats.chi2.ppf(0.975, 2 * x + 2) / 2


def baseline_positivity(pos: np.ndarray, tests: np.ndarray) -> None:
    for p, n in zip(pos, tests, strict=True):
        x = pd.Series(p).rolling(7).sum().to_numpy()[6:]
        t = pd.Series(n).rolling(7).sum().to_numpy()[6:]
        proportion_confint(x, t, method="wilson")


def baseline_growth(cases: np.ndarray) -> None:
    x = design_matrix(14)
    for row in cases:
        for end in range(13, row.size):
            sm.GLM(row[end - 13 : end + 1], x, family=sm.families.Poisson()).fit(scale="X2")


def baseline_ears(cases: np.ndarray) -> None:
    for row in cases:
        s = pd.Series(row)
        mean, sd = s.rolling(7).mean().shift(1), s.rolling(7).std().shift(1)
        ((s - mean) / sd.clip(lower=0.2)).to_numpy()


def baseline_trend(log_ww: np.ndarray) -> None:
    for row in log_ww:
        for end in range(row.size):
            y = row[max(0, end - 14) : end + 1]
            ok = np.isfinite(y)
            if ok.sum() >= 3:
                stats.linregress(np.flatnonzero(ok), y[ok])


def baseline_farrington(weekly: np.ndarray, weeks: int = 4) -> None:
    """Plain loop: per region, the two statsmodels GLM fits of the last ``weeks`` target weeks."""
    for row in weekly:
        for t0 in range(row.size - weeks, row.size):
            years = min(5, (t0 - 3) // 52)
            rel = np.arange(-52 * years - 3, -26)
            offset = rel % 52
            level = np.where((offset <= 3) | (offset >= 49), 0, 1 + (offset - 4) // 5)
            x = np.column_stack([np.ones(rel.size)] + [(level == k) * 1.0 for k in range(1, 10)])
            yb = row[t0 + rel]
            keep = np.isfinite(yb)
            first = sm.GLM(yb[keep], x[keep], family=sm.families.Poisson()).fit()
            sm.GLM(yb[keep], x[keep], family=sm.families.Poisson(),
                   var_weights=np.ones(keep.sum())).fit(start_params=first.params)


def baseline_smooth(log_ww: np.ndarray) -> None:
    for row in log_ww:
        idx = np.flatnonzero(np.isfinite(row))
        lowess(row[idx], idx.astype(float), frac=5 / idx.size, it=0, delta=0.0,
               xvals=np.arange(idx[0], idx[-1] + 1, dtype=float))


def baseline_level(log_ww: np.ndarray) -> None:
    for row in log_ww:
        s = pd.Series(row)
        roll = s.rolling(365, min_periods=10)
        ((s - roll.quantile(0.1)) / roll.std()).to_numpy()


def baseline_icu(a0: np.ndarray, o0: np.ndarray, r: np.ndarray, surv: np.ndarray) -> None:
    h = np.arange(22)
    for i in range(a0.size):
        for rate in (r[i], r[i] * 0.5, r[i] * 1.5):
            adm = a0[i] * np.exp(rate * h)
            adm[0] = 0.0
            np.convolve(adm, surv)[:22] + o0[i] * surv[:22]


CHANGEPOINT_TARGET_S = 30.0
CAPACITY_TARGET_S = 3.0
CAPACITY_SIMS = 200


def baseline_capacity(adm: np.ndarray, occ: np.ndarray, staffed: np.ndarray,
                      scenarios: list[object], sims: int, horizon: int = 21) -> None:
    """A plain per-region loop: statsmodels quasi-Poisson fit of the last 14 days, then per
    scenario exact numpy Poisson/binomial draws and numpy quantiles (the same model)."""
    from server.indicators.capacity import history_weights

    rng = np.random.default_rng(1)
    x = sm.add_constant(np.arange(14.0))
    los = length_of_stay()
    surv = los.survival
    levels = [0.05, 0.25, 0.5, 0.75, 0.95]
    for i in range(adm.shape[0]):
        fit = sm.GLM(adm[i, -14:], x, family=sm.families.Poisson()).fit(scale="X2")
        r = rng.normal(fit.params[1], fit.bse[1], sims)
        mu = rng.gamma(adm[i, -7:].sum() + 0.5, size=sims)
        a0 = mu * np.expm1(-r) / np.expm1(-7 * r)
        remain, per = history_weights(r, los, horizon)
        for sc in scenarios:
            mult = np.exp(sc.log_multiplier(r, horizon))  # type: ignore[attr-defined]
            draws = rng.poisson(a0[:, None] * mult)
            np.quantile(draws, levels, axis=0)
            icu = occ[i] * per[:, None] * mult
            new = np.stack([np.convolve(row, surv)[1: horizon + 1] for row in
                            np.concatenate([np.zeros((sims, 1)), icu], axis=1)])
            beds = rng.binomial(int(occ[i]), remain[:, 1:]) + rng.poisson(new)
            np.quantile(beds, levels, axis=0)
            np.quantile(100 * (occ[i] * remain[:, 1:] + new) / staffed[i], levels, axis=0)


def bench_capacity(regions: int, sample: int) -> None:
    """Capacity forecasts: regions x 3 scenarios x 21 days with intervals, all targets."""
    from datetime import date

    from server.indicators.capacity import Scenario, capacity_forecasts

    rng = np.random.default_rng(9)
    days = 28
    r = rng.uniform(-0.04, 0.06, (regions, 1))
    adm = rng.poisson(rng.uniform(2, 40, (regions, 1)) * np.exp(r * np.arange(days))).astype(float)
    occ = np.rint(rng.uniform(5, 60, regions))
    staffed = np.full(regions, 100.0)
    scenarios = [Scenario(name="trend"),
                 Scenario(name="levels-off", kind="growth_to", value=0.0, within_days=7),
                 Scenario(name="halves", kind="change", value=0.5, within_days=14)]
    names = [f"R{i}" for i in range(regions)]
    took, cpu = timed_cpu(lambda: capacity_forecasts(
        adm, regions=names, origin=date(2030, 1, 1), scenarios=scenarios, occupied=occ,
        staffed=staffed, sims=CAPACITY_SIMS))
    sample = min(sample, regions)
    base = timed(lambda: baseline_capacity(adm[:sample], occ[:sample], staffed[:sample],
                                           list(scenarios), CAPACITY_SIMS)) * regions / sample
    print(f"{'capacity forecasts':<24} {took:8.3f} s  ({cpu:7.3f} s)   baseline {base:8.2f} s  "
          f"ratio {base / took:7.1f}x  ({regions} regions x 3 scenarios x 21 days, "
          f"{CAPACITY_SIMS} simulations, admissions + ICU beds + share; loop on {sample})")
    verdict = "PASS" if took < CAPACITY_TARGET_S else "MISS"
    note = "" if regions == 3000 else " [target is for 3000 regions]"
    print(f"{verdict}: capacity forecasts {took:.3f} s < {CAPACITY_TARGET_S:g} s{note}")


def synthetic_breaks(regions: int, days: int, seed: int = 2025) -> tuple[np.ndarray, np.ndarray]:
    """Poisson counts with 0-6 changes of growth per region (continuous log mean, the shape a
    step in transmission takes in cases), weekday effects."""
    rng = np.random.default_rng(seed)
    t = np.arange(days)
    weekday = np.array([0.0, 0.1, 0.05, 0.0, -0.1, -0.4, -0.6])
    eta = np.empty((regions, days))
    truth = np.full((regions, 6), -1)
    for i in range(regions):
        k = int(rng.integers(0, 7))
        cuts = np.sort(rng.choice(np.arange(60, days - 60, 30), size=k, replace=False))
        truth[i, :k] = cuts
        level, slope, last = np.log(rng.uniform(30, 400)), rng.normal(0, 0.01), 0
        for c in [*cuts, days]:
            eta[i, last:c] = level + slope * (t[last:c] - last)
            level = eta[i, c - 1] + slope
            slope = float(np.clip(-slope * 0.5 + rng.normal(0, 0.02), -0.05, 0.05))
            last = c
    counts = rng.poisson(np.exp(np.clip(eta, -5, 9) + weekday[t % 7])).astype(float)
    return counts, truth


def baseline_changepoint_profile(counts: np.ndarray, breaks: np.ndarray, search: int) -> None:
    """Per region: the exact stage with statsmodels, a Poisson GLM (line with kinks + weekdays,
    the same design as :func:`server.indicators.changepoints.kink_design`) for every candidate
    date of every kink, then the final fit."""
    from server.indicators.changepoints import kink_design

    days = counts.shape[1]
    for y, b in zip(counts, breaks, strict=True):
        kinks = np.sort(b[b >= 0])
        for k in range(kinks.size):
            for d in range(-search, search + 1):
                trial = kinks.copy()
                trial[k] = min(max(kinks[k] + d, 1), days - 1)
                if np.unique(trial).size < trial.size:
                    continue
                x = kink_design(days, trial[None, :])[0]
                sm.GLM(y, x, family=sm.families.Poisson()).fit()
        sm.GLM(y, kink_design(days, kinks[None, :])[0], family=sm.families.Poisson()).fit()


def bench_changepoints(regions: int, days: int, sample: int) -> None:
    """Change points in transmission (kink model: screening + exact Poisson profile)."""
    from server.indicators.changepoints import detect_changepoints

    counts, truth = synthetic_breaks(regions, days)
    holder: dict[str, object] = {}
    began, cpu0 = time.perf_counter(), time.process_time()
    holder["res"] = res = detect_changepoints(counts)
    took, cpu = time.perf_counter() - began, time.process_time() - cpu0
    sample = min(sample, regions)
    base = timed(lambda: baseline_changepoint_profile(counts[:sample], res.breaks[:sample], 7))
    base *= regions / sample
    found = res.breaks
    hit = [np.any(np.abs(found[i][found[i] >= 0] - c) <= 3) for i in range(regions)
           for c in truth[i] if c >= 0]
    print(f"{'change points':<24} {took:8.3f} s  ({cpu:7.3f} s)   baseline {base:8.2f} s  "
          f"ratio {base / took:7.1f}x  (statsmodels loop: exact stage only, on {sample} regions)")
    print(f"  breaks: mean {np.mean(res.n_breaks):.2f} found vs {np.mean((truth >= 0).sum(1)):.2f} "
          f"true per region; true breaks found within 3 days: {np.mean(hit):.3f}")
    verdict = "PASS" if took < CHANGEPOINT_TARGET_S else "MISS"
    note = "" if (regions, days) == (3000, 1096) else " [targets are for 3000 x 1096]"
    print(f"{verdict}: change points {took:.3f} s < {CHANGEPOINT_TARGET_S:g} s{note}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--regions", type=int, default=3000)
    parser.add_argument("--days", type=int, default=1096)
    parser.add_argument("--sample", type=int, default=5, help="regions in each baseline loop")
    parser.add_argument("--only-changepoints", action="store_true",
                        help="run only the change-point section")
    parser.add_argument("--only-capacity", action="store_true",
                        help="run only the capacity-forecast section")
    parser.add_argument("--only-phase", action="store_true",
                        help="run only the wave-phase section (bench/phase.py)")
    parser.add_argument("--store", action="store_true",
                        help="also time the nowcast's store read in a temporary SQLite")
    args = parser.parse_args()
    if args.only_phase:
        phase_section(args.regions, min(args.days, PHASE_DAYS), args.sample)
        return
    if args.only_changepoints:
        bench_changepoints(args.regions, args.days, min(args.sample, 2))
        return
    if args.only_capacity:
        bench_capacity(args.regions, max(args.sample, 20))
        return
    regions, days = args.regions, args.days
    data = synthetic(regions, days)
    cases, tests, log_ww = data["cases"], data["tests"], data["log_ww"]
    si = gamma_serial_interval(4.7, 2.9)
    sample = min(args.sample, regions)
    scale = regions / sample
    growth_sample = 1

    print(f"regions x days: {regions} x {days}; baselines on {sample} regions "
          f"(growth: {growth_sample}; farrington: last 4 weeks), scaled")
    print(f"{'':<24} {'wall':>8}     {'cpu':>7}")
    rows: list[tuple[str, float, float, float | None]] = []

    def bench(name: str, ours: Callable[[], object], base: Callable[[], object] | None,
              base_scale: float = scale) -> float:
        t, cpu = timed_cpu(ours)
        b = timed(base) * base_scale if base is not None else None
        rows.append((name, t, cpu, b))
        ratio = f"baseline {b:8.2f} s  ratio {b / t:7.1f}x" if b is not None else "(no baseline)"
        print(f"{name:<24} {t:8.3f} s  ({cpu:7.3f} s)   {ratio}", flush=True)
        return t

    t_rt = bench("rt (Cori)", lambda: reproduction_number(cases, si),
                 lambda: baseline_rt(cases[:sample], si.pmf))
    bench("incidence (Garwood)", lambda: incidence_rate(cases, 1e5),
          lambda: baseline_incidence(cases[:sample]))
    bench("positivity (Wilson)", lambda: positivity(cases, tests),
          lambda: baseline_positivity(cases[:sample], tests[:sample]))
    growth_holder: dict[str, object] = {}

    def run_growth() -> None:
        growth_holder["g"] = rolling_growth_rate(cases)

    bench("growth (Poisson GLM)", run_growth, lambda: baseline_growth(cases[:growth_sample]),
          base_scale=regions / growth_sample)
    bench("ears C1", lambda: ears(cases, method="C1"), lambda: baseline_ears(cases[:sample]))
    weekly = weekly_sum(cases, dt.date(2021, 1, 4)).values
    assessed_weeks = max(weekly.shape[1] - (52 * 2 + 3), 1)
    enough_weeks = weekly.shape[1] >= 52 * 2 + 3 + 4  # two years of history for 4 weeks
    bench("farrington (weekly)", lambda: farrington_flexible(weekly),
          (lambda: baseline_farrington(weekly[:sample])) if enough_weeks else None,
          base_scale=scale * assessed_weeks / 4)
    bench("wastewater smooth", lambda: smooth(log_ww, neighbours=5),
          lambda: baseline_smooth(log_ww[:sample]))
    bench("wastewater trend", lambda: trend(log_ww), lambda: baseline_trend(log_ww[:sample]))
    bench("wastewater level", lambda: ww_level(log_ww), lambda: baseline_level(log_ww[:sample]))

    def run_admission_growth() -> None:  # computed once; the ICU projection reuses it
        growth_holder["adm"] = rolling_growth_rate(data["admissions"], day_of_week=False)

    bench("admissions growth", run_admission_growth,
          lambda: baseline_growth(data["admissions"][:growth_sample]),
          base_scale=regions / growth_sample)
    a0 = np.nanmean(data["admissions"][:, -7:], axis=1)
    los = length_of_stay()

    def run_icu() -> None:
        g = growth_holder["adm"]
        assert isinstance(g, GrowthRate)
        proj = project_icu(a0, a0 * 9, np.full(regions, 400.0), np.nan_to_num(g.estimate[:, -1]),
                           np.nan_to_num(g.lower[:, -1]), np.nan_to_num(g.upper[:, -1]), los=los)
        capacity_crossing(proj)

    bench("icu projection", run_icu,
          lambda: baseline_icu(a0[:sample], a0[:sample] * 9, np.full(sample, 0.01), los.survival))
    # testing changes as known each day (the testing_change kind); baseline: the whole-series
    # screen (server.indicators.testing) re-run on the days up to each day, timed on every 28th
    # day of 2 regions and scaled
    pos = np.minimum(cases, tests)
    as_known_days = range(60, days, 28)

    def rerun_daily() -> None:
        for d in as_known_days:
            detect_testing_changes(tests[:2, : d + 1], pos[:2, : d + 1], population=[1e5] * 2)

    bench("testing changes (known)", lambda: testing_changes_as_known(tests, pos), rerun_daily,
          base_scale=regions / 2 * days / len(as_known_days))
    nowcast_section(bench, cases, regions, days, sample)
    p_wall, p_cpu, p_base = phase_section(regions, min(days, PHASE_DAYS), sample)
    rows.append(("wave phase", p_wall, p_cpu, p_base))
    daily_total = sum(t for _, t, _, _ in rows)
    daily_cpu = sum(c for _, _, c, _ in rows)

    curve_section(regions, min(days, 120), sample)  # analyst tool, not in the daily set

    print(f"daily indicator set:     {daily_total:8.3f} s  ({daily_cpu:7.3f} s cpu)")
    for name, value, target, note in (
        ("rt", t_rt, RT_TARGET_S, ""),
        ("full daily set", daily_total, FULL_TARGET_S, " (curve fit excluded)"),
    ):
        verdict = "PASS" if value < target else "MISS"
        if (regions, days) != (3000, 1096):
            note += " [targets are for 3000 x 1096]"
        print(f"{verdict}: {name} {value:.3f} s < {target:g} s{note}")
    if args.store:
        store_read(regions)
    forecast_scoring_section(cases, regions, sample)
    if args.store:
        forecast_store_section(cases, regions)

    bench_capacity(regions, max(args.sample, 20))
    bench_changepoints(regions, days, min(args.sample, 2))

# -- nowcasts from vintages (triangle, pooled weekday delays, 7-day nowcast) ---------------------

NOWCAST_PMF = np.array([0.22, 0.38, 0.18, 0.09, 0.05, 0.03, 0.02, 0.012, 0.008, 0.005, 0.005])


def vintage_rows(cases: np.ndarray, ref: int, seed: int = 5) -> tuple[np.ndarray, ...]:
    """Invented vintage rows (region, ref_day, receipt_day, value) of the last ``ref`` days, in
    arrival order: each day's count split over delays 0..10, one row per delay with news."""
    rng = np.random.default_rng(seed)
    final = cases[:, -ref:].astype(np.int64)
    by_delay = rng.multinomial(final, NOWCAST_PMF / NOWCAST_PMF.sum()).astype(float)
    cum = np.cumsum(by_delay, axis=2)
    d = np.arange(NOWCAST_PMF.size)
    emit = (d == 0) | (by_delay > 0)
    emit &= (np.arange(ref)[:, None] + d[None, :] <= ref)[None]
    r, i, k = np.nonzero(emit)
    order = np.argsort(i + k, kind="stable")
    return r[order], i[order], (i + k)[order], cum[r, i, k][order]


def nowcast_section(bench: Callable[..., float], cases: np.ndarray, regions: int, days: int,
                    sample: int) -> None:
    """Nowcasts built from vintage rows as the daily evaluation builds them: the triangle of the
    last 60 days (60 delays), pooled weekday chain-ladder delays, the 7-day nowcast over all
    days. Baselines: pandas ``triangle_from_vintages``, a per-region loop of the plain chain
    ladder ``estimate_delay``, and the earlier per-day ``nowcast`` (no delay uncertainty)."""
    ref, width = min(60, days), 60
    region, ref_day, receipt, value = vintage_rows(cases, ref)
    groups = np.arange(regions) // 20  # invented parent areas of 20 districts
    holder: dict[str, object] = {}

    def triangle() -> None:
        holder["tri"] = triangle_from_rows(region, ref_day, receipt, value, regions=regions,
                                           days=ref, delays=width, last_receipt=ref)

    def base_triangle() -> None:
        pick = region < sample
        frame = pd.DataFrame({"region": region[pick], "ref_date": ref_day[pick],
                              "known_on": receipt[pick], "value": value[pick]})
        origin = pd.Timestamp("2031-01-01")
        frame["ref_date"] = origin + pd.to_timedelta(frame["ref_date"], unit="D")
        frame["known_on"] = origin + pd.to_timedelta(frame["known_on"], unit="D")
        triangle_from_vintages(frame, delays=width, as_of=origin + pd.Timedelta(days=ref))

    bench("nowcast triangle", triangle, base_triangle)
    tri = holder["tri"]
    assert isinstance(tri, np.ndarray)

    def delays() -> None:
        holder["model"] = delay_model(tri, cutoffs=[ref], groups=groups, window=60,
                                      period=NOWCAST_PERIOD)

    bench("nowcast delays", delays, lambda: [estimate_delay(tri[r]) for r in range(sample)])
    model = holder["model"]
    assert isinstance(model, DelayModel)
    known = cases.copy()
    known[:, -ref:] = tri[:, np.arange(ref), np.clip(ref - np.arange(ref), 0, width - 1)]
    known_delay = ref - (np.arange(days) - (days - ref))
    bench("nowcast 7-day", lambda: nowcast_window(known, known_delay, model, window=7),
          lambda: nowcast(tri[:sample]))


def store_read(regions: int, ref: int = 60) -> None:
    """Store-read cost of the triangle: one read of every vintage row of the last ``ref`` days
    (``read_vintage_rows``), against ``read_dense`` of the same days, in a temporary SQLite."""
    import tempfile
    from datetime import UTC, date, datetime, timedelta
    from pathlib import Path

    from server.services.database import Database
    from server.store import (
        MeasureRecord,
        RegionRecord,
        append_vintage,
        make_sessionmaker,
        read_dense,
        scratch_engine,
        upgrade,
        upsert_measures,
        upsert_regions,
    )
    from server.store.reads import read_vintage_rows

    data = synthetic(regions, ref)
    region, ref_day, receipt, value = vintage_rows(data["cases"], ref)
    codes = np.array([f"B{i:05d}" for i in range(regions)])
    first = date(2031, 1, 1)
    with tempfile.TemporaryDirectory() as tmp, scratch_engine(
        f"sqlite:///{Path(tmp) / 'bench.db'}", prefix="tw_bench"
    ) as engine:
        upgrade(engine)
        db = Database(engine=engine, sessions=make_sessionmaker(engine))
        with db.transaction() as s:
            upsert_regions(session=s, records=[
                RegionRecord(code=c, name=c, level="district", parent=None, population=10_000)
                for c in codes])
            upsert_measures(session=s, records=[
                MeasureRecord(name="cases", unit="persons", kind="count", aggregation="sum")])
        t0 = time.perf_counter()
        for day in range(ref + 1):
            pick = receipt == day
            frame = pd.DataFrame({
                "region": codes[region[pick]], "measure": "cases",
                "ref_date": [first + timedelta(days=int(i)) for i in ref_day[pick]],
                "value": value[pick]})
            at = datetime(2031, 1, 1, 6, tzinfo=UTC) + timedelta(days=day)
            with db.transaction() as s:
                append_vintage(session=s, feed="bench", received_at=at, rows=frame,
                               checksum=f"bench-{day}")
        print(f"store: {region.size:,} vintage rows of {regions} regions x {ref} days "
              f"written in {time.perf_counter() - t0:.1f} s")
        end = first + timedelta(days=ref - 1)
        with db.sessions() as s:
            t_rows, c_rows = timed_cpu(lambda: read_vintage_rows(
                session=s, measures=["cases"], regions=list(codes), start=first, end=end))
            t_dense, c_dense = timed_cpu(lambda: read_dense(
                session=s, measures=["cases"], start=first, end=end, regions=list(codes)))
        print(f"{'store read (triangle)':<24} {t_rows:8.3f} s  ({c_rows:7.3f} s)   read_dense "
              f"of the same days {t_dense:.3f} s ({c_dense:.3f} s cpu)  ratio "
              f"{t_rows / t_dense:.1f}x (cpu {c_rows / c_dense:.1f}x)")


# -- the forecast record: one year of daily forecasts scored --------------------------------------

FORECAST_LEVELS = np.array([0.05, 0.25, 0.5, 0.75, 0.95])
FORECAST_HORIZONS = np.arange(1, 22)
FORECAST_CHUNK = 30  # origins scored in one pass (memory: regions x 30 x 21 x 5 floats)


def year_of_forecasts(cases: np.ndarray, origins: int = 365) -> tuple[np.ndarray, ...]:
    """Poisson-persistence forecasts of ``cases`` made on each of the last ``origins`` days that
    have 21 later days, their outcomes and baselines: (origins, regions, 21, 5) etc."""
    days = cases.shape[1]
    first = days - 21 - origins
    if first < 7:
        raise SystemExit(f"--days {days}: the forecast section needs {origins + 28} days")
    vals = np.empty((origins, cases.shape[0], FORECAST_HORIZONS.size, FORECAST_LEVELS.size))
    obs = np.empty((origins, cases.shape[0], FORECAST_HORIZONS.size))
    base = np.empty((origins, cases.shape[0]))
    for k in range(origins):
        o = first + k
        window = cases[:, o - 6: o + 1]
        vals[k] = poisson_persistence(window, horizons=FORECAST_HORIZONS, levels=FORECAST_LEVELS)
        obs[k] = cases[:, o + FORECAST_HORIZONS]
        base[k] = last_week_mean(window)
    return vals, obs, base


def score_year(vals: np.ndarray, obs: np.ndarray, base: np.ndarray) -> object:
    """The record of every region and horizon over the newest 60 forecasts (vectorised)."""
    n_o, n_r = base.shape
    parts = [score_forecasts(vals[a: a + FORECAST_CHUNK].reshape(-1, *vals.shape[2:]),
                             FORECAST_LEVELS, obs[a: a + FORECAST_CHUNK].reshape(-1, vals.shape[2]),
                             base[a: a + FORECAST_CHUNK].reshape(-1))
             for a in range(0, n_o, FORECAST_CHUNK)]
    scores = ForecastScores(*(np.concatenate([getattr(p, f) for p in parts]) for f in
                              ("scored", "wis", "naive_error", "inside_50", "inside_90")),
                            has_50=True, has_90=True)
    groups = np.tile(np.arange(n_r), n_o)
    order = np.repeat(np.arange(n_o), n_r)
    return forecast_record(scores, groups=groups, n_groups=n_r, order=order,
                           horizons=FORECAST_HORIZONS, last=60)


def baseline_score_loop(vals: np.ndarray, obs: np.ndarray, base: np.ndarray) -> None:
    """Per region and origin: scoringrules' interval scores, coverage and the naive error with
    numpy, then the newest 60 per horizon with pandas."""
    import scoringrules as sr

    alphas = np.array([0.1, 0.5])
    for r in range(vals.shape[1]):
        wis, naive, in50, in90 = [], [], [], []
        for k in range(vals.shape[0]):
            q, y = vals[k, r], obs[k, r]
            intervals = sr.interval_score(y, q[:, :2], q[:, :2:-1], alphas, backend="numpy")
            wis.append((0.5 * np.abs(y - q[:, 2]) + (alphas / 2 * intervals).sum(axis=1)) / 2.5)
            naive.append(np.abs(y - base[k, r]))
            in50.append((q[:, 1] <= y) & (y <= q[:, 3]))
            in90.append((q[:, 0] <= y) & (y <= q[:, 4]))
        frame = pd.DataFrame({
            "origin": np.repeat(np.arange(vals.shape[0]), FORECAST_HORIZONS.size),
            "horizon": np.tile(FORECAST_HORIZONS, vals.shape[0]),
            "wis": np.concatenate(wis), "naive": np.concatenate(naive),
            "in50": np.concatenate(in50), "in90": np.concatenate(in90),
        })
        newest = frame.sort_values("origin").groupby("horizon").tail(60)
        newest.groupby("horizon")[["wis", "naive", "in50", "in90"]].mean()


def forecast_scoring_section(cases: np.ndarray, regions: int, sample: int) -> None:
    vals, obs, base = year_of_forecasts(cases)
    rec = score_year(vals, obs, base)  # warm-up, and the figures below
    took, cpu = timed_cpu(lambda: score_year(vals, obs, base))
    loop = timed(lambda: baseline_score_loop(vals[:, :sample], obs[:, :sample],
                                             base[:, :sample])) * regions / sample
    n = vals.shape[0] * regions
    print(f"{'forecast record (1 y)':<24} {took:8.3f} s  ({cpu:7.3f} s)   baseline {loop:8.2f} s  "
          f"ratio {loop / took:7.1f}x  ({n:,} forecasts x 21 horizons x 5 quantiles, newest 60; "
          f"loop with scoringrules on {sample} regions)")
    assert hasattr(rec, "coverage_90")
    print(f"  persistence on the synthetic counts: 90 % band held "
          f"{np.nanmean(rec.coverage_90):.1%}, 50 % band {np.nanmean(rec.coverage_50):.1%}, "
          f"relative WIS {np.nanmedian(rec.relative_wis):.2f} (median over regions and horizons)")


def forecast_store_section(cases: np.ndarray, regions: int, mornings: int = 100) -> None:
    """The stored path in a temporary SQLite: one morning's forecasts of every region written
    (``store_forecasts``), then the record of the newest 60 read back and scored
    (``forecast_record``: the runs of the last 88 days, outcomes from ``read_dense``)."""
    import tempfile
    from datetime import UTC, date, datetime, timedelta
    from pathlib import Path

    from server.indicators.quantile_forecast import QuantileForecast
    from server.services.database import Database
    from server.services.forecast_known import KnownData
    from server.services.forecast_record import forecast_record as stored_record
    from server.services.forecast_store import store_forecasts
    from server.store import (
        MeasureRecord,
        RegionRecord,
        append_vintage,
        make_sessionmaker,
        scratch_engine,
        upgrade,
        upsert_measures,
        upsert_regions,
    )

    days = cases.shape[1]
    first_origin = days - 21 - mornings
    codes = [f"B{i:05d}" for i in range(regions)]
    day0 = date(2031, 1, 1)
    with tempfile.TemporaryDirectory() as tmp, scratch_engine(
        f"sqlite:///{Path(tmp) / 'bench.db'}", prefix="tw_bench"
    ) as engine:
        upgrade(engine)
        db = Database(engine=engine, sessions=make_sessionmaker(engine))
        with db.transaction() as s:
            upsert_regions(session=s, records=[
                RegionRecord(code=c, name=c, level="district", parent=None, population=10_000)
                for c in codes])
            upsert_measures(session=s, records=[MeasureRecord(
                name="hosp_admissions", unit="persons", kind="count", aggregation="sum")])
            lo = first_origin - 7
            r, d = np.meshgrid(np.arange(regions), np.arange(lo, days), indexing="ij")
            append_vintage(session=s, feed="bench", checksum="bench",
                           received_at=datetime(2032, 1, 1, tzinfo=UTC), rows=pd.DataFrame({
                               "region": np.asarray(codes)[r.ravel()],
                               "measure": "hosp_admissions",
                               "ref_date": [day0 + timedelta(days=int(x)) for x in d.ravel()],
                               "value": cases[:, lo:].ravel()}))
        dates = np.arange(np.datetime64(day0, "D"), np.datetime64(day0, "D") + days)
        writes = []
        for k in range(mornings):
            o = first_origin + k
            known = KnownData(cutoff=datetime(2031, 1, 2, tzinfo=UTC) + timedelta(days=o),
                              regions=tuple(codes), dates=dates[o - 6: o + 1],
                              values={"hosp_admissions": cases[:, o - 6: o + 1]})
            fc = QuantileForecast(
                target="hosp_admissions", scenario="persistence", regions=tuple(codes),
                origin=day0 + timedelta(days=o), horizons=FORECAST_HORIZONS,
                levels=FORECAST_LEVELS, values=poisson_persistence(
                    cases[:, o - 6: o + 1], horizons=FORECAST_HORIZONS, levels=FORECAST_LEVELS))
            t0 = time.perf_counter()
            with db.transaction() as s:
                store_forecasts(session=s, forecasts=[fc], cutoff=known.cutoff, known=known)
            writes.append(time.perf_counter() - t0)
        with db.transaction() as s:
            took, cpu = timed_cpu(lambda: stored_record(session=s, last=60))
            one, _ = timed_cpu(lambda: stored_record(session=s, last=60, regions=codes[:1]))
        print(f"{'forecast store (sqlite)':<24} one morning of {regions:,} regions: median "
              f"{np.median(writes):.3f} s to write; record of the newest 60 for all regions "
              f"{took:.3f} s ({cpu:.3f} s cpu), for one region {one:.3f} s "
              f"({mornings} mornings stored)")


if __name__ == "__main__":
    main()
