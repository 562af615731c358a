"""Benchmark the rules engine at national scale: 3 000 regions x 1 096 days, 6 criteria.

Prints the time of ``rules.evaluate`` (wall and CPU) and its ratio against one vectorised numpy
pass over the same arrays (each indicator compared with its enter thresholds, levels summed,
highest taken), measured in the same run, and the time of ``rules.fingerprint.fingerprints``
(what a run computes to skip the unchanged region-days) against ``evaluate``. Data are
invented (seeded random walks). Run:
``/work/main/.venv/bin/python bench/engine.py [regions] [days]``.
"""

from __future__ import annotations

import sys
import time

import numpy as np

from rules import IndicatorSeries, evaluate, parse_ruleset
from rules.fingerprint import fingerprints

NAMES = ("incidence_7d", "positivity_7d", "admissions_7d", "icu_share", "rt", "ww_level")
THRESHOLDS = ((50, 150, 300), (5, 10, 20), (3, 8, 15), (5, 10, 20), (1.0, 1.2, 1.5), (2, 4, 6))

RULES = (
    """\
name: bench
version: "1"
tiers:
  - {name: T0, staff: s, public: p}
  - {name: T1, staff: s, public: p}
  - {name: T2, staff: s, public: p}
  - {name: T3, staff: s, public: p}
freshness: {max_age_days: 3}
indicators:
"""
    + "".join(f"  {n}: {{label: {n}}}\n" for n in NAMES)
    + """\
  tests_7d: {label: tests}
criteria:
"""
    + "".join(
        f"  - {{id: c{i}, indicator: {n}, statistic: bounds, enter: {list(t)}, "
        f"exit: {[round(v * 0.8, 3) for v in t]}}}\n"
        for i, (n, t) in enumerate(zip(NAMES, THRESHOLDS, strict=True))
    )
    + """\
conditions:
  - when: {criterion: c0, level_at_least: 2}
    then: {criterion: c2, enter: [2, 6, 12], exit: [1.5, 4.5, 10]}
gates:
  - {id: testing, indicator: tests_7d, at_least: 150}
timing: {confirm_days: 3, release_days: 14, min_days_in_tier: 7, max_steps_down: 1,
         effective_delay_days: 1}
overrides:
  - id: small
    match: {levels: [small]}
    criteria: {c0: {enter: [80, 200, 400], exit: [60, 160, 320]}}
prepare:
  - {id: ww, indicator: ww_level, above: 3, for: 3, count_by: samples, clear_after_days: 10}
  - {id: rt, indicator: rt, statistic: lower, above: 1, for: 5, clear_after_days: 7}
"""
)


def _data(n_r: int, n_d: int) -> dict[str, IndicatorSeries]:
    rng = np.random.default_rng(2031)
    out = {}
    for name, thr in zip(NAMES, THRESHOLDS, strict=True):
        walk = np.cumsum(rng.normal(0, 0.05, (n_r, n_d)), axis=1)
        est = thr[1] * np.exp(walk - walk.mean(axis=1, keepdims=True))
        est[rng.random((n_r, n_d)) < 0.02] = np.nan
        out[name] = IndicatorSeries(
            estimate=est,
            lower=est * 0.9,
            upper=est * 1.1,
            age_days=rng.integers(0, 5, (n_r, n_d)).astype(float),
        )
    out["tests_7d"] = IndicatorSeries(estimate=rng.uniform(100, 900, (n_r, n_d)))
    return out


def _baseline(data: dict[str, IndicatorSeries]) -> np.ndarray:
    levels = [
        (data[n].estimate[None] >= np.asarray(t, dtype=float)[:, None, None]).sum(axis=0)
        for n, t in zip(NAMES, THRESHOLDS, strict=True)
    ]
    return np.max(levels, axis=0)


def main(n_r: int = 3000, n_d: int = 1096) -> None:
    rs = parse_ruleset(RULES, source="bench")
    data = _data(n_r, n_d)
    regions = [f"r{i}" for i in range(n_r)]
    levels = ["small" if i % 5 == 0 else "district" for i in range(n_r)]
    dates = np.arange(n_d) + np.datetime64("2030-01-01")
    t0 = time.perf_counter()
    _baseline(data)
    t_base = time.perf_counter() - t0
    t0, c0 = time.perf_counter(), time.process_time()
    ev = evaluate(rs, data, regions=regions, dates=dates, region_levels=levels)
    t_eval, c_eval = time.perf_counter() - t0, time.process_time() - c0
    t0 = time.perf_counter()
    for d in range(0, n_d, 100):
        ev.explain(0, d)
    t_expl = (time.perf_counter() - t0) / len(range(0, n_d, 100))
    t0 = time.perf_counter()
    fingerprints(ev, b"bench")
    t_fp = time.perf_counter() - t0
    changes = int((np.diff(ev.decided.astype(int), axis=1) != 0).sum())
    print(f"regions x days: {n_r} x {n_d}, criteria: {len(rs.criteria)}")
    print(f"numpy baseline pass: {t_base:.3f} s")
    print(f"rules.evaluate:      {t_eval:.3f} s  (ratio {t_eval / t_base:.1f}x)")
    print(f"  CPU time:          {c_eval:.3f} s  (the wall time inflates on a busy machine)")
    print(f"explain one cell:    {t_expl * 1e3:.2f} ms")
    print(f"fingerprints:        {t_fp:.3f} s  ({t_fp / t_eval:.2f}x rules.evaluate; explaining "
          f"every cell would take ~{t_expl * n_r * n_d:.0f} s)")
    print(f"tier changes: {changes}, insufficient cells: {(ev.tier < 0).sum()}")


if __name__ == "__main__":
    args = [int(a) for a in sys.argv[1:3]]
    main(*args)
