"""Before/after estimates of events against known truth; prints interval coverage.

Run: ``.venv/bin/python bench/before_after_validation.py --events 2000``. Two invented scenarios:

- ``kink``: reported counts whose log-mean changes slope at event + delay (the model's own
  shape), negative binomial (size 30), day-of-week effects, no transition days. Truth: the two
  slopes.
- ``renewal``: infections from the renewal equation with R stepping at the event day
  (R before, R after ~ U(0.7, 1.4)), gamma generation interval mean 4.7, sd 2.9; each infection
  reported after a log-normal incubation (median 5.1 d, 97.5 % within 11.5 d, Lauer et al. 2020)
  plus 2 days; Poisson counts. Truth: the Euler-Lotka growth rates of the two R values
  (Wallinga & Lipsitch 2007). Defaults of :func:`before_after` (delay 7, transition 7).

Prints the share of events whose truth lies in the 95 % interval of r_before, r_after,
r_after - r_before and R_after / R_before. Not a test and not a speed benchmark.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np
from scipy import stats

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from server.indicators.before_after import before_after  # noqa: E402
from server.indicators.serial_interval import (  # noqa: E402
    gamma_serial_interval,
    reproduction_to_growth,
)

SI_MEAN, SI_SD = 4.7, 2.9


def _coverage(res, rb, ra) -> dict[str, float]:  # type: ignore[no-untyped-def]
    shape, scale = (SI_MEAN / SI_SD) ** 2, SI_SD**2 / SI_MEAN
    ratio = ((1 + ra * scale) / (1 + rb * scale)) ** shape
    ok = res.status == "ready"

    def share(lo, truth, hi):  # type: ignore[no-untyped-def]
        return float(((lo <= truth) & (truth <= hi))[ok].mean())

    return {
        "fitted": float(ok.mean()),
        "r_before": share(res.r_before_lower, rb, res.r_before_upper),
        "r_after": share(res.r_after_lower, ra, res.r_after_upper),
        "r_change": share(res.r_change_lower, ra - rb, res.r_change_upper),
        "rt_ratio": share(res.rt_ratio_lower, ratio, res.rt_ratio_upper),
    }


def kink(n: int, rng: np.random.Generator) -> dict[str, float]:
    days, at = 80, 40
    rb, ra = rng.uniform(-0.08, 0.08, n), rng.uniform(-0.08, 0.08, n)
    t = np.arange(days)
    log_mu = np.log(60) + np.where(t < at, rb[:, None] * (t - at), ra[:, None] * (t - at))
    log_mu += np.log([1.0, 1.1, 1.05, 1.0, 0.95, 0.7, 0.6])[t % 7]
    mu = np.exp(log_mu)
    y = rng.negative_binomial(30, 30 / (30 + mu)).astype(float)
    res = before_after(y, np.arange(n), np.full(n, at - 7), transition=0, lead=0)
    return _coverage(res, rb, ra)


def renewal(n: int, rng: np.random.Generator) -> dict[str, float]:
    days, event = 160, 100
    w = gamma_serial_interval(SI_MEAN, SI_SD).pmf
    r_b, r_a = rng.uniform(0.7, 1.4, n), rng.uniform(0.7, 1.4, n)
    rb = reproduction_to_growth(r_b, SI_MEAN, SI_SD)
    ra = reproduction_to_growth(r_a, SI_MEAN, SI_SD)
    inf = np.zeros((n, days))
    inf[:, :10] = 200.0 * np.exp(rb[:, None] * (np.arange(10) - 9))
    for t in range(10, days):
        k = min(t, w.size - 1)
        lam = (inf[:, t - k:t][:, ::-1] * w[1:k + 1]).sum(axis=1)
        inf[:, t] = np.where(t < event, r_b, r_a) * lam
    sigma = np.log(11.5 / 5.1) / stats.norm.ppf(0.975)
    lags = np.arange(40)
    cdf = stats.lognorm.cdf(lags + 0.5 - 2, sigma, scale=5.1)
    delay = np.diff(np.r_[0.0, cdf])
    delay /= delay.sum()
    expected = np.stack([np.convolve(row, delay)[:days] for row in inf])
    y = rng.poisson(expected).astype(float)
    res = before_after(y, np.arange(n), np.full(n, event), day_of_week=False)
    return _coverage(res, rb, ra)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--events", type=int, default=2000)
    parser.add_argument("--seed", type=int, default=15)
    args = parser.parse_args()
    rng = np.random.default_rng(args.seed)
    for name, fn in (("kink", kink), ("renewal", renewal)):
        cov = fn(args.events, rng)
        cells = "  ".join(f"{k} {v:.3f}" for k, v in cov.items())
        print(f"{name:8s} {cells}")  # noqa: T201


if __name__ == "__main__":
    main()
