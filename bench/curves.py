"""Benchmark section: the analyst's curve fit (``server.indicators.curves.fit_growth_curve``,
``tierwise estimate curve-fit``).

Run from ``bench/indicators.py`` (its curve-fit section) or alone:
``.venv/bin/python bench/curves.py --regions 3000 --days 120 --sample 20 --boot 0``.
Invented, seeded waves (``bench/phase.py:synthetic_waves``). The baseline is the per-region path
the curve fit used before it was batched: for each region, :func:`scipy.optimize.least_squares`
(TRF, 400 evaluations) on the Poisson deviance residuals from the same six logistic starts
(and, for the Richards curve, three shapes from the best logistic), timed on ``--sample``
regions and scaled. Also prints how closely the two agree on the sample (deviance and final
size) and one bootstrap CLI-sized run (one region, 200 draws). Prints only.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from phase import synthetic_waves  # bench/phase.py, beside this script
from scipy.optimize import least_squares

from server.indicators.curves import _bounds, _starts, fit_growth_curve, richards_cumulative

CURVE_TARGET_S = 10.0  # the wave phase's target (issue 13); common practice here, no source


def _residuals(theta: np.ndarray, t: np.ndarray, y: np.ndarray) -> np.ndarray:
    k, a, t0, v = np.exp(theta[0]), np.exp(theta[1]), theta[2], np.exp(theta[3])
    mu = np.maximum(richards_cumulative(t, k, a, t0, v) - richards_cumulative(t - 1, k, a, t0, v),
                    1e-10)
    with np.errstate(divide="ignore", invalid="ignore"):
        term = np.where(y > 0, y * np.log(np.where(y > 0, y, 1.0) / mu), 0.0)
    return np.sign(y - mu) * np.sqrt(np.maximum(2.0 * (term - (y - mu)), 0.0))


def per_region_fit(y: np.ndarray, richards: bool) -> tuple[float, float]:
    """The old path for one region: (deviance, final size) of the best least-squares fit."""
    t = np.arange(y.size, dtype=np.float64)
    total = np.array([y.sum()])
    lo, hi = (b[0] for b in _bounds(y.size, total))
    best: tuple[float, np.ndarray] | None = None
    for start in _starts(float(y.size - 1), total):
        x0 = np.clip(start[0, :3], lo[:3] + 1e-9, hi[:3] - 1e-9)
        res = least_squares(lambda p: _residuals(np.append(p, 0.0), t, y), x0,
                            bounds=(lo[:3], hi[:3]), method="trf", max_nfev=400)
        dev = float(np.sum(res.fun ** 2))
        if best is None or dev < best[0]:
            best = (dev, np.append(res.x, 0.0))
    assert best is not None
    if richards:
        logistic = best[1]
        for lv in (np.log(0.5), 0.0, np.log(2.0)):
            x0 = np.clip(np.append(logistic[:3], lv), lo + 1e-9, hi - 1e-9)
            res = least_squares(lambda p: _residuals(p, t, y), x0, bounds=(lo, hi),
                                method="trf", max_nfev=400)
            dev = float(np.sum(res.fun ** 2))
            if dev < best[0]:
                best = (dev, res.x)
    return best[0], float(np.exp(best[1][0]))


def curve_section(regions: int, days: int, sample: int, n_boot: int = 0,
                  model: str = "logistic") -> tuple[float, float]:
    """Time the batched fit on ``regions`` rows and the per-region path on ``sample``; print."""
    counts = synthetic_waves(regions, days, seed=2037)
    t0 = time.perf_counter()
    fit = fit_growth_curve(counts, model=model, n_boot=n_boot, horizons=(7,))
    wall = time.perf_counter() - t0
    idx = np.linspace(0, regions - 1, min(sample, regions)).astype(int)
    t0 = time.perf_counter()
    old = [per_region_fit(counts[i], model == "richards") for i in idx]
    base = (time.perf_counter() - t0) / idx.size * regions
    d_dev = np.array([fit.deviance[i] - o[0] for i, o in zip(idx, old, strict=True)])
    d_k = np.array([fit.final_size.estimate[i] / o[1] - 1 for i, o in zip(idx, old, strict=True)])
    print(f"{'curve fit ' + model + ' (' + str(days) + ' d)':<24} {wall:8.3f} s   baseline "
          f"{base:8.2f} s  ratio {base / wall:7.1f}x  (per-region least_squares on {idx.size}, "
          f"scaled; n_boot {n_boot})")
    print(f"  batched vs per-region on {idx.size}: deviance ours - theirs median "
          f"{np.median(d_dev):+.3g}, max {d_dev.max():+.3g}; final size rel. diff median "
          f"{np.median(np.abs(d_k)):.2g}, max {np.max(np.abs(d_k)):.2g}")
    verdict = "PASS" if wall < CURVE_TARGET_S else "MISS"
    print(f"{verdict}: curve fit {wall:.3f} s < {CURVE_TARGET_S:g} s")
    return wall, base


def cli_sized(days: int = 60, n_boot: int = 200) -> None:
    """One region with the CLI's default 200 bootstrap draws, batched vs the old loop (scaled
    from the point fit: the old path refitted each draw with least_squares from the fit)."""
    counts = synthetic_waves(1, days, seed=5)
    t0 = time.perf_counter()
    fit_growth_curve(counts, n_boot=n_boot)
    wall = time.perf_counter() - t0
    t0 = time.perf_counter()
    per_region_fit(counts[0], False)
    one = time.perf_counter() - t0
    print(f"{'curve-fit CLI (1 x ' + str(n_boot) + ' boot)':<24} {wall:8.3f} s   baseline "
          f"about {one * (1 + n_boot / 6):6.2f} s (point fit x (1 + draws / 6 starts))")


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--regions", type=int, default=3000)
    parser.add_argument("--days", type=int, default=120)
    parser.add_argument("--sample", type=int, default=20)
    parser.add_argument("--boot", type=int, default=0)
    parser.add_argument("--model", default="logistic", choices=("logistic", "richards"))
    args = parser.parse_args()
    curve_section(args.regions, args.days, args.sample, args.boot, args.model)
    cli_sized()
