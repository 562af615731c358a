"""Change points and testing changes against known truth (the clean step scenario).

Run: ``.venv/bin/python bench/effects_validation.py --seeds 50``. Prints, over all seeds:

- detection: share of true transmission steps of at least 20 % (R ratio <= 0.8 or >= 1.2)
  with an estimated break within +-3 days of the day the step shows in cases by test date
  (infection day + mean infection-to-test delay), and the same for smaller steps;
- false breaks: share of estimated breaks with no true step (any size) or testing change
  within +-7 days;
- coverage: share of matched steps whose true change of growth rate (Euler-Lotka, from the
  simulator's R and generation interval, 28 days after the step) lies in the 95 % interval
  of the estimated growth change;
- testing changes flagged within +-3 days, and testing flags with no true testing change.

This is not a benchmark of speed and not a test; it measures the methods on invented data.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from demo_seed.steps import simulate_steps  # noqa: E402
from server.indicators.changepoints import detect_changepoints  # noqa: E402

SETTLE = 28  # days after a step at which its new growth rate is taken as the truth


def evaluate(seed: int, regions: int, days: int) -> dict[str, list[float]]:
    sc = simulate_steps(seed, regions=regions, days=days)
    cp = detect_changepoints(sc.cases)
    try:
        from server.indicators.testing import detect_testing_changes
    except ImportError:  # testing module not present
        tc = None
    else:
        tc = detect_testing_changes(sc.tests, sc.positives, population=sc.population)
    out: dict[str, list[float]] = {k: [] for k in (
        "hit_big", "hit_small", "false", "false_excl_testing", "cover", "cover_rt",
        "testing_hit", "testing_false", "offset")}
    for i in range(regions):
        est = cp.breaks[i][cp.breaks[i] >= 0]
        shown = [(d + sc.report_shift, ratio, d) for d, ratio in
                 zip(sc.change_day[i], sc.change_ratio[i], strict=True) if d >= 0]
        testing = [int(sc.testing_day[i])] if sc.testing_day[i] >= 0 else []
        for when, ratio, day in shown:
            dist = np.abs(est - when)
            hit = bool(dist.size and dist.min() <= 3)
            big = ratio <= 0.8 or ratio >= 1.2
            out["hit_big" if big else "hit_small"].append(float(hit))
            if hit:
                k = int(np.argmin(dist))
                out["offset"].append(float(est[k] - when))
                before = sc.growth[i, max(day - 1, 0)]
                after = sc.growth[i, min(day + SETTLE, days - 1)]
                truth = after - before
                lo, hi = cp.growth_change_lower[i, k], cp.growth_change_upper[i, k]
                out["cover"].append(float(lo <= truth <= hi))
        for b in est:
            near_step = any(abs(b - w) <= 7 for w, _, _ in shown)
            near_test = any(abs(b - d) <= 7 for d in testing)
            out["false"].append(float(not near_step and not near_test))
            if not near_test:
                out["false_excl_testing"].append(float(not near_step))
        if tc is not None:
            flags = tc.flagged_days(i)
            for d in testing:
                out["testing_hit"].append(float(any(abs(f - d) <= 3 for f in flags)))
            for f in flags:
                out["testing_false"].append(float(not any(abs(f - d) <= 3 for d in testing)))
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=50)
    parser.add_argument("--regions", type=int, default=20)
    parser.add_argument("--days", type=int, default=240)
    args = parser.parse_args()
    total: dict[str, list[float]] = {}
    began = time.perf_counter()
    for seed in range(args.seeds):
        for k, v in evaluate(seed, args.regions, args.days).items():
            total.setdefault(k, []).extend(v)
    took = time.perf_counter() - began

    def share(key: str) -> str:
        v = total.get(key, [])
        return f"{np.mean(v):.3f} of {len(v)}" if v else "n/a"

    print(f"seeds {args.seeds} x {args.regions} regions x {args.days} days ({took:.0f} s)")
    print(f"steps >= 20 % found within +-3 days: {share('hit_big')}")
    print(f"steps < 20 % found within +-3 days:  {share('hit_small')}")
    off = np.array(total.get("offset", []))
    if off.size:
        print(f"offset of matched breaks: mean {off.mean():+.2f} d, sd {off.std():.2f} d")
    print(f"false breaks (no true step or testing change within 7 d): {share('false')}")
    print(f"  among breaks away from testing changes: {share('false_excl_testing')}")
    print(f"95 % interval of the growth change covers the truth: {share('cover')}")
    print(f"testing changes flagged within +-3 days: {share('testing_hit')}")
    print(f"testing flags with no true testing change within 3 d: {share('testing_false')}")


if __name__ == "__main__":
    main()
