"""Change points and testing changes against known truth (the clean step scenario).

Run: ``.venv/bin/python bench/effects_validation.py --seeds 50``. Prints, over all seeds:

- detection: share of true transmission steps of at least 20 % (R ratio <= 0.8 or >= 1.2)
  with an estimated break within +-3 days of the day the step shows in cases by test date
  (infection day + mean infection-to-test delay), and the same for smaller steps;
- false breaks: share of estimated breaks with no true step (any size) or testing change
  within +-7 days;
- coverage: share of matched steps whose true change of growth rate (Euler-Lotka, from the
  simulator's R and generation interval, 28 days after the step) lies in the 95 % interval
  of the estimated growth change; and share of steps with a break within 10 days whose
  true day lies in that break's 95 % interval of the transmission date;
- testing changes flagged within +-3 days, and testing flags with no true testing change.

The kink model's final fit uses the hinges smoothed by the generation interval and the
simulator's infection-to-test delay (mean and SD), the kernel's default with a delay;
``--no-smoothing`` gives the plain hinges.

This is not a benchmark of speed and not a test; it measures the methods on invented data.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from scipy import stats  # noqa: E402

from demo_seed.observation import INFECTION_TO_TEST  # noqa: E402
from demo_seed.steps import StepScenario, simulate_steps  # noqa: E402
from server.indicators.changepoints import (  # noqa: E402
    block_dispersion,
    detect_changepoints,
    hac_covariance,
)
from server.indicators.testing import detect_testing_changes  # noqa: E402

SETTLE = 28  # days after a step at which its new growth rate is taken as the truth
GI_MEAN, GI_SD = 7.0, 5.0  # the step scenario's SEIR: exponential latent 3 d + infectious 4 d
SHAPE = "kink"
SHIFTS = True
PENALTY = 1.0
BLOCK: int | None = 42
MIN_CHANGE = 0.1
DATE_UNCERTAINTY = True
CALIBRATE = (14, 28, 42, 56)  # block lengths whose coverage --calibrate prints
SMOOTHING = True  # smoothed hinges (the kernel's default with a delay; --no-smoothing)
INFECTIONS = False  # --infections: run on the simulated infections (the dating ceiling)
THINNED = 0.0  # --thinned P (with --infections): Poisson(P x infections) instead
LOCAL: int | None = 42  # local_window of detect_changepoints (--local-window; 0: none)
HAC = False  # also print the coverage of Newey-West (HAC) intervals (--hac)


def _realised_change(sc: StepScenario, i: int, day: int, days: int) -> float:
    """Change of the simulated infections' own growth at a step: the least-squares slope of
    log infections over [day + 7, next step or day + 49) minus that over
    [previous step + 7 or day - 42, day) (7 days skipped after a step for the transient)."""
    steps = sorted(int(d) for d in sc.change_day[i] if d >= 0)
    prev = max([d + 7 for d in steps if d < day] + [day - 42, 0])
    nxt = min([d for d in steps if d > day] + [day + 49, days])

    def slope(a: int, b: int) -> float:
        if b - a < 10:
            return float("nan")
        t = np.arange(a, b)
        return float(np.polyfit(t, np.log(np.maximum(sc.infections[i, a:b], 0.5)), 1)[0])

    return slope(day + 7, nxt) - slope(prev, day)


def evaluate(seed: int, regions: int, days: int) -> dict[str, list[float]]:
    sc = simulate_steps(seed, regions=regions, days=days)
    tc = detect_testing_changes(sc.tests, sc.positives, population=sc.population)
    shifts = np.full((regions, 3), -1, dtype=np.int64)
    for i in range(regions):
        flagged = tc.flagged_days(i)[:3]
        shifts[i, : len(flagged)] = flagged
    # the simulator's generation interval (exponential latent 3 d + infectious 4 d: mean 7,
    # SD 5) and infection-to-test delay; the method is told these, not the step dates
    if INFECTIONS:  # the ceiling: the simulated infections themselves, no observation layer
        series = sc.infections
        if THINNED:  # each infection counted with probability THINNED: Poisson noise alone
            series = np.random.default_rng([seed, 77]).poisson(
                THINNED * sc.infections).astype(float)
        cp = detect_changepoints(series, si_mean=GI_MEAN, si_sd=GI_SD,
                                 infection_delay=0.0, penalty=PENALTY, shape=SHAPE,
                                 dependence_block=BLOCK, min_change=MIN_CHANGE,
                                 date_uncertainty=DATE_UNCERTAINTY, smoothing=False,
                                 local_window=LOCAL)
    else:
        cp = detect_changepoints(sc.cases, level_shifts=shifts if SHIFTS else None,
                                 si_mean=GI_MEAN, si_sd=GI_SD, infection_delay=sc.report_shift,
                                 penalty=PENALTY, shape=SHAPE, dependence_block=BLOCK,
                                 min_change=MIN_CHANGE, date_uncertainty=DATE_UNCERTAINTY,
                                 smoothing=SMOOTHING and SHAPE == "kink",
                                 delay_sd=INFECTION_TO_TEST[1], local_window=LOCAL)
    if BLOCK is None and SHAPE == "kink":  # half-widths the other block lengths would give
        phi0 = cp.fit.dispersion
        q = 2 + (cp.breaks >= 0).sum(axis=1) + (cp.fit.level_shifts >= 0).sum(axis=1)
        widen = {}
        for b in CALIBRATE:
            phi_b, df = block_dispersion(sc.cases, cp.fit.mu, b, q)
            t = stats.t.ppf(0.975, np.where(np.isfinite(df), df, 1.0))
            wider = np.isfinite(phi_b) & (phi_b > phi0)
            widen[b] = np.where(wider, t / 1.959964 * np.sqrt(phi_b / phi0), 1.0)
    out: dict[str, list[float]] = {k: [] for k in (
        "hit_big", "hit_small", "false", "false_excl_testing", "cover", "cover_big",
        "testing_hit", "testing_false", "offset", "n_breaks_error", "cover_realised",
        "cover_alone", "cover_hac", "date_cover", "date_cover_rise", "date_cover_fall",
        *(f"cover_block{b}" for b in CALIBRATE))}
    if HAC and SHAPE == "kink":  # Newey-West sandwich with Muggeo's date columns
        lags = (BLOCK or 42) - 1
        hac = hac_covariance(cp.fit, sc.cases, lags)
        kk = np.arange(cp.breaks.shape[1])
        hac_se = np.sqrt(hac[:, 2 + kk, 2 + kk]) / days
    for i in range(regions):
        has = cp.breaks[i] >= 0
        if SHAPE == "kink":  # transmission time
            est = cp.transmission_day[i][has]
            shown = [(float(d), ratio, d) for d, ratio in
                     zip(sc.change_day[i], sc.change_ratio[i], strict=True) if d >= 0]
        else:  # the old step model: count time, where the step shows on average
            est = cp.breaks[i][has].astype(float)
            shown = [(d + sc.report_shift, ratio, d) for d, ratio in
                     zip(sc.change_day[i], sc.change_ratio[i], strict=True) if d >= 0]
        counted = cp.breaks[i][has]
        testing = [int(sc.testing_day[i])] if sc.testing_day[i] >= 0 else []
        out["n_breaks_error"].append(float(has.sum() - len(shown)))
        for when, ratio, day in shown:
            dist = np.abs(est - when)
            hit = bool(dist.size and dist.min() <= 3)
            big = ratio <= 0.8 or ratio >= 1.2
            out["hit_big" if big else "hit_small"].append(float(hit))
            if SHAPE == "kink" and dist.size and dist.min() <= 10:  # the date's interval
                j = int(np.argmin(dist))
                lo_d = cp.transmission_lower[i][has][j]
                hi_d = cp.transmission_upper[i][has][j]
                inside = float(lo_d <= when <= hi_d)
                out["date_cover"].append(inside)
                out["date_cover_rise" if ratio > 1 else "date_cover_fall"].append(inside)
            if hit:
                k = int(np.argmin(dist))
                out["offset"].append(float(est[k] - when))
                before = sc.growth[i, max(day - 1, 0)]
                after = sc.growth[i, min(day + SETTLE, days - 1)]
                truth = after - before
                lo, hi = cp.growth_change_lower[i, k], cp.growth_change_upper[i, k]
                out["cover"].append(float(lo <= truth <= hi))
                if BLOCK is None and SHAPE == "kink":
                    mid, half = 0.5 * (lo + hi), 0.5 * (hi - lo)
                    for b in CALIBRATE:
                        h = half * widen[b][i]
                        out[f"cover_block{b}"].append(float(mid - h <= truth <= mid + h))
                if HAC and SHAPE == "kink":
                    d_k, h = cp.growth_change[i, k], 1.959964 * hac_se[i, k]
                    out["cover_hac"].append(float(d_k - h <= truth <= d_k + h))
                if big:
                    out["cover_big"].append(float(lo <= truth <= hi))
                alone = np.sum(np.abs(est - est[k]) <= 21) == 1
                if alone:
                    out["cover_alone"].append(float(lo <= truth <= hi))
                real = _realised_change(sc, i, day, days)
                if np.isfinite(real):
                    out["cover_realised"].append(float(lo <= real <= hi))
        for b, c in zip(est, counted, strict=True):
            near_step = any(abs(b - w) <= 7 for w, _, _ in shown)
            near_test = any(abs(c - d) <= 7 for d in testing)
            out["false"].append(float(not near_step and not near_test))
            if not near_test:
                out["false_excl_testing"].append(float(not near_step))
        flags = tc.flagged_days(i)
        for d in testing:
            out["testing_hit"].append(float(any(abs(f - d) <= 3 for f in flags)))
        for f in flags:
            out["testing_false"].append(float(not any(abs(f - d) <= 3 for d in testing)))
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=50)
    parser.add_argument("--seed-start", type=int, default=0,
                        help="first seed (calibrate on seeds disjoint from those reported)")
    parser.add_argument("--block", type=int, default=42,
                        help="dependence_block of detect_changepoints; 0 for none (daily "
                             "dispersion only), which also prints the coverage other block "
                             "lengths would give")
    parser.add_argument("--regions", type=int, default=20)
    parser.add_argument("--days", type=int, default=240)
    parser.add_argument("--shape", choices=("kink", "step"), default="kink")
    parser.add_argument("--penalty", type=float, default=1.0)
    parser.add_argument("--min-change", type=float, default=0.1,
                        help="min_change of detect_changepoints (0: every kink the BIC keeps)")
    parser.add_argument("--no-date-uncertainty", action="store_true",
                        help="growth intervals conditional on the break dates")
    parser.add_argument("--hac", action="store_true",
                        help="also print the coverage of Newey-West (HAC) intervals of the "
                             "growth change (block - 1 lags, dates free, normal quantile)")
    parser.add_argument("--no-shifts", action="store_true",
                        help="do not pass the flagged testing changes as level shifts")
    parser.add_argument("--no-smoothing", action="store_true",
                        help="plain hinges in the final fit (smoothing=False of "
                             "detect_changepoints; the default smooths them by the generation "
                             "interval and the simulator's infection-to-test delay)")
    parser.add_argument("--local-window", type=int, default=42,
                        help="local_window of detect_changepoints: the growth change at a "
                             "kink from the days within this many of it (0: whole segments)")
    parser.add_argument("--infections", action="store_true",
                        help="run the change points on the simulated infections themselves "
                             "(no ascertainment, delay or weekday effects; transmission time "
                             "is count time): how well the epidemic's own randomness lets a "
                             "step be dated")
    parser.add_argument("--thinned", type=float, default=0.0,
                        help="with --infections: count each infection with this probability "
                             "(Poisson), the ascertainment's noise without its delay")
    args = parser.parse_args()
    global LOCAL, INFECTIONS, THINNED
    INFECTIONS, THINNED = args.infections, args.thinned
    LOCAL = args.local_window or None
    global SHAPE, SHIFTS, PENALTY, BLOCK, MIN_CHANGE, DATE_UNCERTAINTY, HAC, SMOOTHING
    SMOOTHING = not args.no_smoothing
    HAC = args.hac
    MIN_CHANGE, DATE_UNCERTAINTY = args.min_change, not args.no_date_uncertainty
    SHAPE, SHIFTS, PENALTY = args.shape, not args.no_shifts, args.penalty
    BLOCK = args.block or None
    total: dict[str, list[float]] = {}
    began = time.perf_counter()
    for seed in range(args.seed_start, args.seed_start + args.seeds):
        for k, v in evaluate(seed, args.regions, args.days).items():
            total.setdefault(k, []).extend(v)
    took = time.perf_counter() - began

    def share(key: str) -> str:
        v = total.get(key, [])
        return f"{np.mean(v):.3f} of {len(v)}" if v else "n/a"

    last = args.seed_start + args.seeds - 1
    print(f"seeds {args.seed_start}..{last}: {args.seeds} x {args.regions} regions x "
          f"{args.days} days ({took:.0f} s)")
    print(f"steps >= 20 % found within +-3 days: {share('hit_big')}")
    print(f"steps < 20 % found within +-3 days:  {share('hit_small')}")
    off = np.array(total.get("offset", []))
    if off.size:
        print(f"offset of matched breaks: mean {off.mean():+.2f} d, sd {off.std():.2f} d")
    print(f"false breaks (no true step or testing change within 7 d): {share('false')}")
    print(f"  among breaks away from testing changes: {share('false_excl_testing')}")
    print(f"95 % interval of the growth change covers the truth: {share('cover')}")
    print(f"  steps >= 20 % only: {share('cover_big')}")
    print(f"  against the simulated infections' own growth change: {share('cover_realised')}")
    print(f"  breaks with no other break within 21 days: {share('cover_alone')}")
    if total.get("cover_hac"):
        print(f"  Newey-West (HAC) intervals instead: {share('cover_hac')}")
    for b in CALIBRATE:
        if total.get(f"cover_block{b}"):
            print(f"  with a {b}-day block dispersion: {share(f'cover_block{b}')}")
    print(f"95 % interval of the transmission date covers the true day (breaks within 10 d): "
          f"{share('date_cover')}")
    print(f"  rising steps: {share('date_cover_rise')}; falling: {share('date_cover_fall')}")
    err = np.array(total.get("n_breaks_error", []))
    print(f"breaks found minus true steps per region: mean {err.mean():+.2f}, "
          f"exact {np.mean(err == 0):.3f}")
    print(f"testing changes flagged within +-3 days: {share('testing_hit')}")
    print(f"testing flags with no true testing change within 3 d: {share('testing_false')}")


if __name__ == "__main__":
    main()
