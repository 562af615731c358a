"""Testing changes as known, and the policy's testing hold, against the simulator's truth.

Run: ``.venv/bin/python bench/testing_validation.py --seeds 50``. On the clean step scenario
(``demo_seed/steps.py``: every region gets a testing-policy change on a known test date, at
least 21 days from every transmission step as it shows in cases) it prints, over all seeds:

- flagged within 3 days: share of true testing changes for which, by the change day + 3, the
  as-known screen (:func:`server.indicators.testing_known.testing_changes_as_known`) knew a
  change dated within 3 days of the truth; the same per seed (all of a seed's changes);
  detection delays; date error as known 7 days after the change;
- false flags per region-year: known changes dated more than 3 days from any true one;
- the hold: a two-tier policy on invented week-on-week growth criteria (7-day cases over the 7
  days before, the case criterion; the same for hospital admissions, the criterion that does
  not depend on testing) is evaluated with and without ``testing_hold`` (14 days). *Testing-only
  escalations*: raises decided without the hold in the 14 days from a true testing change while
  the admissions criterion stayed below the tier; the share the hold kept back (a raise of the
  held engine within those days on a day the admissions criterion agreed is the policy's
  ``unless`` at work, counted apart as let through). *Real rises*:
  raises decided without the hold within 28 days after a true step up of R (>= 20 %) as it
  shows in cases; the share the held engine also raised within those days, and its extra delay.
- *Real rises with a testing change on the same day*: the same regions' infections observed
  again (the demo's observation models, new draws) with the testing change put on the day
  their first step up of R (>= 20 %) shows in cases; the raises without the hold within 28
  days of it, the share the held engine also raised, its extra delay, and the share raised
  while the hold was on (admissions agreed) rather than after its 14 days.

Not a benchmark of speed and not a test; it measures the method on invented data.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from demo_seed.observation import case_reports, hospital_admissions, lab_tests  # noqa: E402
from demo_seed.steps import simulate_steps  # noqa: E402
from rules import IndicatorSeries, evaluate, parse_ruleset  # noqa: E402
from server.indicators.testing_known import testing_changes_as_known  # noqa: E402

HOLD_DAYS = 14
POLICY = """
name: testing-hold-check
version: "1"
tiers:
  - {name: Calm, staff: ., public: .}
  - {name: Rising, staff: ., public: .}
indicators:
  case_growth: {label: cases week on week}
  admission_growth: {label: admissions week on week}
  testing_change: {label: testing change, unit: days}
criteria:
  - {id: cases, indicator: case_growth, enter: [1.25], exit: [1.05]}
  - {id: admissions, indicator: admission_growth, enter: [1.25], exit: [1.05]}
timing: {confirm_days: 3, release_days: 7}
"""
HOLD = f"""
testing_hold:
  indicator: testing_change
  days: {HOLD_DAYS}
  criteria: [cases]
  unless: [admissions]
"""


def week_on_week(counts: np.ndarray) -> np.ndarray:
    """7-day sum over the 7-day sum a week before (NaN for the first 13 days)."""
    c = np.zeros((counts.shape[0], counts.shape[1] + 1))
    np.cumsum(counts, axis=1, out=c[:, 1:])
    s7 = c[:, 7:] - c[:, :-7]  # sum of days [t - 6, t] at column t - 6
    out = np.full(counts.shape, np.nan)
    with np.errstate(divide="ignore", invalid="ignore"):
        out[:, 13:] = s7[:, 7:] / s7[:, :-7]
    return np.where(np.isfinite(out), out, np.nan)


def raise_days(decided: np.ndarray) -> list[np.ndarray]:
    """Per region, the days a raise was decided."""
    prev = np.concatenate([np.zeros((decided.shape[0], 1), decided.dtype), decided[:, :-1]], 1)
    return [np.flatnonzero(row) for row in decided > prev]


def run_seed(seed: int, regions: int, days: int) -> dict[str, list[float]]:
    sc = simulate_steps(seed, regions=regions, days=days, testing_share=1.0)
    known = testing_changes_as_known(sc.tests, sc.positives)
    adm = hospital_admissions(sc.infections, np.random.default_rng([seed, 34])).admissions
    series = {
        "case_growth": IndicatorSeries(estimate=week_on_week(sc.cases)),
        "admission_growth": IndicatorSeries(estimate=week_on_week(adm)),
        "testing_change": IndicatorSeries(estimate=known.since, size=known.tests_ratio),
    }
    codes = [f"R{i}" for i in range(regions)]
    kwargs = {"regions": codes, "dates": sc.dates}
    free = evaluate(parse_ruleset(POLICY), series, **kwargs)
    held = evaluate(parse_ruleset(POLICY + HOLD), series, **kwargs)
    free_up, held_up = raise_days(free.decided), raise_days(held.decided)
    out: dict[str, list[float]] = {k: [] for k in (
        "flagged", "delay", "date_error", "false", "region_years", "testing_only",
        "held_back", "let_through", "real", "real_kept", "extra_delay")}
    adm_level = free.levels[1]
    for i in range(regions):
        td = int(sc.testing_day[i])
        dates_known = known.change_day[i]
        near = (np.abs(dates_known - td) <= 3) & (dates_known >= 0)
        by = min(td + 3, days - 1)
        out["flagged"].append(float(near[: by + 1].any()))
        if near.any():
            out["delay"].append(float(np.argmax(near) - td))
            at = min(td + 7, days - 1)
            if dates_known[at] >= 0:
                out["date_error"].append(float(dates_known[at] - td))
        starts = np.unique(dates_known[dates_known >= 0])
        out["false"].append(float(np.sum(np.abs(starts - td) > 3)))
        out["region_years"].append(days / 365.25)
        window = (free_up[i] >= td) & (free_up[i] < td + HOLD_DAYS)
        for day in free_up[i][window]:
            if adm_level[i, td:day + 1].max() >= 1:
                continue  # admissions agreed: not a testing-only rise
            out["testing_only"].append(1.0)
            later = held_up[i][(held_up[i] >= td) & (held_up[i] < td + HOLD_DAYS)]
            # a raise the admissions criterion agreed with on its day is let through (unless)
            alone = [h for h in later if adm_level[i, h] < 1]
            out["held_back"].append(float(not alone))
            out["let_through"].append(float(len(later) > len(alone)))
        for step, ratio in zip(sc.change_day[i], sc.change_ratio[i], strict=True):
            if step < 0 or ratio < 1.2:
                continue
            shown = int(step + round(sc.report_shift))
            ups = free_up[i][(free_up[i] >= shown) & (free_up[i] < shown + 28)]
            if ups.size == 0:
                continue
            out["real"].append(1.0)
            kept = held_up[i][(held_up[i] >= shown) & (held_up[i] < shown + 28)]
            out["real_kept"].append(float(kept.size > 0))
            if kept.size:
                out["extra_delay"].append(float(kept[0] - ups[0]))
    out.update(coinciding(sc, adm, seed, kwargs))
    return out


def coinciding(sc, adm: np.ndarray, seed: int, kwargs: dict) -> dict[str, list[float]]:  # type: ignore[no-untyped-def, type-arg]
    """The testing change moved onto the day a real rise shows (see the module docstring)."""
    regions, days = sc.cases.shape
    rng = np.random.default_rng([seed, 35])
    shown = np.full(regions, -1)
    cases, tests, pos = (np.full((regions, days), np.nan) for _ in range(3))
    for i in range(regions):
        ups = [int(d + round(sc.report_shift)) for d, r in zip(sc.change_day[i],
                                                               sc.change_ratio[i], strict=True)
               if d >= 0 and r >= 1.2]
        if not ups:
            continue
        shown[i] = ups[0]
        rep = case_reports(sc.infections[i:i + 1], sc.dates, shown[i], rng)
        lab = lab_tests(rep.final, sc.population[i:i + 1], sc.dates, shown[i], rng)
        cases[i], tests[i], pos[i] = rep.final[0], lab.tests[0], lab.positives[0]
    rows = np.flatnonzero(shown >= 0)
    out: dict[str, list[float]] = {"both": [], "both_kept": [], "both_delay": [],
                                   "both_during": []}
    if not rows.size:
        return out
    known = testing_changes_as_known(tests[rows], pos[rows])
    series = {
        "case_growth": IndicatorSeries(estimate=week_on_week(cases[rows])),
        "admission_growth": IndicatorSeries(estimate=week_on_week(adm[rows])),
        "testing_change": IndicatorSeries(estimate=known.since, size=known.tests_ratio),
    }
    kw = {**kwargs, "regions": [f"R{i}" for i in rows]}
    free = evaluate(parse_ruleset(POLICY), series, **kw)
    held = evaluate(parse_ruleset(POLICY + HOLD), series, **kw)
    for k, (f_up, h_up) in enumerate(zip(raise_days(free.decided), raise_days(held.decided),
                                         strict=True)):
        s0 = int(shown[rows[k]])
        ups = f_up[(f_up >= s0) & (f_up < s0 + 28)]
        if not ups.size:
            continue
        out["both"].append(1.0)
        kept = h_up[(h_up >= s0) & (h_up < s0 + 28)]
        out["both_kept"].append(float(kept.size > 0))
        if kept.size:
            out["both_delay"].append(float(kept[0] - ups[0]))
            since = known.since[k, kept[0]]
            out["both_during"].append(float(0 <= since < HOLD_DAYS))
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=50)
    ap.add_argument("--regions", type=int, default=20)
    ap.add_argument("--days", type=int, default=240)
    a = ap.parse_args()
    t0 = time.perf_counter()
    total: dict[str, list[float]] = {}
    per_seed = []
    for seed in range(a.seeds):
        res = run_seed(seed, a.regions, a.days)
        per_seed.append(float(np.mean(res["flagged"]) == 1.0))
        for k, v in res.items():
            total.setdefault(k, []).extend(v)
    n = len(total["flagged"])
    delay = np.array(total["delay"])
    err = np.array(total["date_error"])
    print(f"{a.seeds} seeds x {a.regions} regions x {a.days} days, "
          f"{time.perf_counter() - t0:.1f} s")
    print(f"testing changes flagged within 3 days: {np.mean(total['flagged']):.1%} of {n}; "
          f"seeds with all flagged: {np.mean(per_seed):.1%} of {a.seeds}")
    print(f"detection delay (days after the change): median {np.median(delay):.0f}, "
          f"max {delay.max():.0f}; date error 7 days on: "
          f"{np.mean(np.abs(err) <= 1):.1%} within 1 day, max {np.abs(err).max():.0f}")
    years = float(np.sum(total["region_years"]))
    print(f"false flags: {np.sum(total['false']):.0f} in {years:.0f} region-years "
          f"({np.sum(total['false']) / years:.3f} per region-year)")
    print(f"testing-only escalations held back: {np.mean(total['held_back']):.1%} of "
          f"{len(total['testing_only'])} (later let through as admissions agreed: "
          f"{np.mean(total['let_through']):.1%})")
    extra = np.array(total["extra_delay"])
    print(f"real rises (R up >= 20 %) still raised with the hold: {np.mean(total['real_kept']):.1%}"
          f" of {len(total['real'])}; extra delay median {np.median(extra):.0f}, "
          f"max {extra.max():.0f} days")
    both = np.array(total["both_delay"])
    print(f"real rises with a testing change the same day, still raised with the hold: "
          f"{np.mean(total['both_kept']):.1%} of {len(total['both'])}; extra delay median "
          f"{np.median(both):.0f}, 90th percentile {np.percentile(both, 90):.0f}, max "
          f"{both.max():.0f} days; raised while the hold was on (admissions agreed): "
          f"{np.mean(total['both_during']):.1%}")


if __name__ == "__main__":
    main()
