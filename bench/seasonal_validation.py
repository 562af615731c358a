"""The moving epidemic method (server.indicators.seasonal) on simulated seasons with known truth.

Run: ``.venv/bin/python bench/seasonal_validation.py --replicates 2000``. Each replicate (one
"region") has ``--seasons`` past seasons of 33 weekly Poisson counts: a baseline of 20 a week and
a Gaussian wave whose height varies between seasons (log-normal, sd 0.4) and whose peak week
varies (sd 2 weeks). Prints:

- coverage of the epidemic threshold ("mean" interval, as published): share of replicates whose
  upper 95 % limit is at or above the true mean of the pooled pre-epidemic values (the mean of the
  n highest pre-epidemic values of a season, n = round(30 / seasons), over 40 000 simulated
  seasons with the same timing rule);
- the same for the intensity thresholds at 40 %, 90 %, 97.5 % (true geometric mean of the n
  highest epidemic values);
- "point" interval: share of a new season's n highest pre-epidemic values under the epidemic
  threshold, and of its n highest epidemic values under the medium, high and very high thresholds
  (the package's point intervals read as prediction limits);
- speed: all replicates at once against one replicate at a time (ratio, same process).

Not a test; it measures the method on invented data.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from server.indicators.seasonal import (  # noqa: E402
    epidemic_timing,
    mem_thresholds,
    n_values,
)

WEEKS = 33


def simulate(rng: np.random.Generator, shape: tuple[int, int]) -> np.ndarray:
    t = np.arange(WEEKS)
    height = 300 * np.exp(rng.normal(0, 0.4, size=shape))
    peak = 16 + rng.normal(0, 2, size=shape)
    mean = 20 + height[..., None] * np.exp(-0.5 * ((t - peak[..., None]) / 3.0) ** 2)
    return rng.poisson(mean).astype(float)


def top_values(seasons: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """n highest pre-epidemic and epidemic values of each season (regions, seasons, n)."""
    t = epidemic_timing(seasons)
    week = np.arange(WEEKS)
    pre = np.where(week < t.start[..., None], seasons, -np.inf)
    epi = np.where((week >= t.start[..., None]) & (week <= t.end[..., None]), seasons, -np.inf)
    pre = -np.sort(-pre, axis=-1)[..., :n]
    epi = -np.sort(-epi, axis=-1)[..., :n]
    return np.where(np.isfinite(pre), pre, np.nan), np.where(np.isfinite(epi), epi, np.nan)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--replicates", type=int, default=2000)
    ap.add_argument("--seasons", type=int, default=5)
    ap.add_argument("--seed", type=int, default=1)
    a = ap.parse_args()
    rng = np.random.default_rng(a.seed)
    n = int(n_values(a.seasons))
    # truth from many seasons
    truth_pre, truth_epi = top_values(simulate(rng, (1, 40_000)), n)
    true_mean = np.nanmean(truth_pre)
    true_gmean = np.exp(np.nanmean(np.log(truth_epi)))
    past = simulate(rng, (a.replicates, a.seasons))
    th = mem_thresholds(past)
    ok = np.isfinite(th.epidemic)
    print(f"seasons {a.seasons}, n = {n}, replicates {a.replicates} ({ok.sum()} with a threshold)")
    print(f"mean interval: epidemic threshold >= true mean {true_mean:.2f}: "
          f"{np.mean(th.epidemic[ok] >= true_mean):.3f} (nominal 0.95)")
    for j, level in enumerate((0.40, 0.90, 0.975)):
        cover = np.mean(th.intensity[:, j] >= true_gmean)
        print(f"mean interval: intensity {level} >= true geometric mean {true_gmean:.1f}: "
              f"{cover:.3f} (nominal {level})")
    pt = mem_thresholds(past, interval="point")
    new_pre, new_epi = top_values(simulate(rng, (a.replicates, 1)), n)
    under = np.nanmean(new_pre[:, 0, :] <= pt.epidemic[:, None])
    print(f"point interval: new season's top pre-epidemic values under the threshold: "
          f"{under:.3f} (nominal 0.95)")
    for j, level in enumerate((0.40, 0.90, 0.975)):
        share = np.nanmean(new_epi[:, 0, :] <= pt.intensity[:, j, None])
        print(f"point interval: new season's top epidemic values under the {level} threshold: "
              f"{share:.3f} (nominal {level})")
    # speed: vectorised over replicates against a loop of single replicates
    k = min(a.replicates, 300)
    t0 = time.perf_counter()
    mem_thresholds(past[:k])
    t1 = time.perf_counter()
    for r in range(k):
        mem_thresholds(past[r : r + 1])
    t2 = time.perf_counter()
    print(f"speed: {k} regions at once vs one at a time: {(t2 - t1) / (t1 - t0):.1f}x faster")


if __name__ == "__main__":
    main()
