"""Benchmark section: the phase of every region's current wave (``server.indicators.phase``).

Run from ``bench/indicators.py`` (its phase section) or alone:
``.venv/bin/python bench/phase.py --regions 3000 --days 150 --sample 5``. Invented, seeded waves:
each region has one to three logistic or Richards waves in the window plus Poisson noise. The
baseline is a per-region loop: the same wave start, then :func:`scipy.optimize.minimize`
(L-BFGS-B, same bounds) on the same Poisson negative log-likelihood from the same starting
values, logistic and Richards, timed on ``--sample`` regions and scaled. Also prints how closely
the two agree on the sample (log-likelihood and final size). Prints only.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from scipy.optimize import minimize

from server.indicators.curves import richards_cumulative
from server.indicators.phase import _bounds, _starts, fit_phase, wave_start

PHASE_TARGET_S = 10.0
#: Days of each fit's window (server.services.phase_indicators.WINDOW_DAYS).
PHASE_DAYS = 150


def synthetic_waves(regions: int, days: int, seed: int = 2031) -> np.ndarray:
    """Daily counts: a sum of 1-3 Richards waves per region, Poisson noise (invented)."""
    rng = np.random.default_rng(seed)
    t = np.arange(days, dtype=np.float64)
    mean = np.full((regions, days), 0.5)
    for w in range(3):
        on = (rng.random(regions) < 0.6) | (w == 0)
        k = rng.lognormal(np.log(3000), 1.0, regions)
        a = rng.uniform(0.08, 0.3, regions)
        v = rng.choice([0.5, 1.0, 2.0], regions)
        t0 = rng.uniform(0.2, 1.1, regions) * days - (2 - w) * days / 3
        c = richards_cumulative(t[None, :], k[:, None], a[:, None], t0[:, None], v[:, None])
        c0 = richards_cumulative(t[None, :] - 1, k[:, None], a[:, None], t0[:, None], v[:, None])
        mean += np.where(on[:, None], c - c0, 0.0)
    return rng.poisson(mean).astype(np.float64)


def _nll(theta: np.ndarray, t: np.ndarray, y: np.ndarray) -> float:
    k, a, t0, v = np.exp(theta[0]), np.exp(theta[1]), theta[2], np.exp(theta[3])
    mu = np.maximum(richards_cumulative(t, k, a, t0, v) - richards_cumulative(t - 1, k, a, t0, v),
                    1e-10)
    return float(np.sum(mu - y * np.log(mu)))


def scipy_fit(y: np.ndarray) -> tuple[float, float]:
    """One region, per-region scipy: (best log-likelihood, its final size) of the AIC choice."""
    row = y[None, :]
    start = wave_start(row)
    days = np.arange(y.size, dtype=np.float64)
    last = np.array([y.size - 1])
    w = (days >= start[0]).astype(np.float64)[None, :]
    lo, hi = _bounds(np.array([y[start[0]:].sum()]), start, last)
    t, yy = days[start[0]:], y[start[0]:]
    best_l = None
    for x0 in _starts(np.where(w > 0, row, 0.0), w, days, start, last):
        r = minimize(lambda p: _nll(np.append(p, 0.0), t, yy), np.clip(x0[0, :3], lo[0, :3],
                     hi[0, :3]), method="L-BFGS-B", bounds=list(zip(lo[0, :3], hi[0, :3],
                                                                      strict=True)))
        if best_l is None or r.fun < best_l.fun:
            best_l = r
    assert best_l is not None
    best_r = None
    for lv in (np.log(0.5), 0.0, np.log(2.0)):
        r = minimize(_nll, np.append(best_l.x, lv), args=(t, yy), method="L-BFGS-B",
                     bounds=list(zip(lo[0], hi[0], strict=True)))
        if best_r is None or r.fun < best_r.fun:
            best_r = r
    assert best_r is not None
    if 2.0 * (best_l.fun - best_r.fun) > 2.0:
        return -best_r.fun, float(np.exp(best_r.x[0]))
    return -best_l.fun, float(np.exp(best_l.x[0]))


def phase_section(regions: int, days: int, sample: int) -> tuple[float, float, float]:
    """Time :func:`fit_phase` on ``regions`` rows and the scipy loop on ``sample``; print.
    Returns (wall, cpu, scaled baseline) seconds."""
    counts = synthetic_waves(regions, days)
    wall, cpu = time.perf_counter(), time.process_time()
    fit = fit_phase(counts)
    wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
    sample = max(1, min(sample, regions))
    t_base = time.perf_counter()
    ref = [scipy_fit(counts[r]) for r in range(sample)]
    base = (time.perf_counter() - t_base) * regions / sample
    d_ll = [fit.loglik[r] - ref[r][0] for r in range(sample)]
    d_k = [abs(fit.final_size.estimate[r] / ref[r][1] - 1.0) for r in range(sample)]
    print(f"{'wave phase (' + str(days) + ' days)':<24} {wall:8.3f} s  ({cpu:7.3f} s)   "
          f"baseline {base:8.2f} s  ratio {base / wall:7.1f}x  (scipy loop on {sample}, scaled)")
    print(f"  phase vs scipy on {sample} regions: loglik ours - scipy min {min(d_ll):+.3g}, "
          f"max {max(d_ll):+.3g}; final size rel. diff. max {max(d_k):.2g}; "
          f"fitted {int(np.isfinite(fit.phase).sum())}/{regions}")
    verdict = "PASS" if wall < PHASE_TARGET_S else "MISS"
    note = "" if (regions, days) == (3000, PHASE_DAYS) else " [target is for 3000 x 150]"
    print(f"{verdict}: wave phase {wall:.3f} s < {PHASE_TARGET_S:g} s{note}")
    return wall, cpu, base


SCENARIOS = (  # (name, K, a, t0, v, last day): invented waves
    ("logistic, after the turn", 5000.0, 0.2, 40.0, 1.0, 59),
    ("logistic, other", 2000.0, 0.3, 30.0, 1.0, 45),
    ("richards v=2.5, after", 8000.0, 0.15, 45.0, 2.5, 79),
    ("richards v=0.6, after", 12000.0, 0.1, 50.0, 0.6, 85),
    ("logistic, before (day 24)", 5000.0, 0.2, 40.0, 1.0, 24),
)


def accuracy_section(reps: int, seed: int = 99) -> None:
    """Parameter recovery and interval coverage on simulated waves (wave start detected)."""
    rng = np.random.default_rng(seed)
    print(f"recovery and 95 % coverage over {reps} simulated waves each (start detected):")
    for name, k, a, t0, v, last in SCENARIOS:
        t = np.arange(last + 1, dtype=np.float64)
        mu = richards_cumulative(t, k, a, t0, v) - richards_cumulative(t - 1, k, a, t0, v)
        y = rng.poisson(np.broadcast_to(mu + 0.5, (reps, t.size))).astype(np.float64)
        fit = fit_phase(y, model="logistic" if v == 1.0 else "richards")
        ok = fit.converged

        def cover(iv: object, truth: float, ok: np.ndarray = ok) -> float:
            lo, hi = iv.lower[ok], iv.upper[ok]  # type: ignore[attr-defined]
            return float(np.mean((lo <= truth) & (truth <= hi)))

        share = richards_cumulative(float(last), k, a, t0, v) / k
        weeks = [mu[last - 7 * j - 6: last - 7 * j + 1].sum() + 3.5 for j in range(3)]
        r_true = np.log(weeks[0] / weeks[1]) / 7
        dr_true = np.log(weeks[0] * weeks[2] / weeks[1] ** 2) / 7
        r_cov = np.mean((fit.growth_rate.lower <= r_true) & (r_true <= fit.growth_rate.upper))
        dr_cov = np.mean((fit.growth_change.lower <= dr_true)
                         & (dr_true <= fit.growth_change.upper))
        k_med = np.median(fit.final_size.estimate[ok]) if ok.any() else np.nan
        phases = np.bincount(fit.phase[np.isfinite(fit.phase)].astype(int), minlength=4)
        print(f"  {name:<27} identified {ok.mean():.2f}; K median {k_med:8.0f} (true {k:.0f}) "
              f"cover {cover(fit.final_size, k):.3f}; t0 median "
              f"{np.median(fit.turning_day.estimate[ok]):5.1f} cover "
              f"{cover(fit.turning_day, t0):.3f}; share cover {cover(fit.share_reached, share):.3f}"
              + (f"; v cover {cover(fit.shape, v):.3f}" if v != 1.0 else "")
              + f"; weekly r cover {r_cov:.3f}, dr {dr_cov:.3f}; lower-bound flag "
              f"{fit.final_size_is_lower_bound.mean():.2f}; phases (decl, past, slow, grow) "
              f"{phases.tolist()}")


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--regions", type=int, default=3000)
    parser.add_argument("--days", type=int, default=PHASE_DAYS)
    parser.add_argument("--sample", type=int, default=5)
    parser.add_argument("--accuracy", type=int, default=0, metavar="REPS",
                        help="also print recovery and coverage over REPS simulated waves")
    args = parser.parse_args()
    phase_section(args.regions, args.days, args.sample)
    if args.accuracy:
        accuracy_section(args.accuracy)
