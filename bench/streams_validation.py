"""Breaks in hospital admissions and wastewater against known truth (the clean step scenario).

Run: ``.venv/bin/python bench/streams_validation.py --seeds 50``. For each stream of
:mod:`demo_seed.steps` (cases by test date, hospital admissions, wastewater concentration over
its faecal marker) prints, over all seeds:

- detection: share of true transmission steps of at least 20 % (R ratio <= 0.8 or >= 1.2)
  with an estimated break within +-5 days of the true step as it shows in that stream (the
  break's transmission day ``break - delay + E[T^2] / (2 E[T])`` against the step's infection
  day, ``delay`` the simulator's mean infection-to-stream delay, as
  ``bench/effects_validation.py`` does for cases);
  (also within +-10 days);
- false breaks: share of estimated breaks with no true step (any size) within +-7 days (for
  cases also none within 7 days of a testing change);
- date intervals: for steps with a break within 10 days, the share whose infection day lies
  in the nearest break's 95 % date interval (whole break days as continuous time, half a day
  beyond each end, shifted to transmission time like the break);
- agreement: for case breaks within 5 days of a true step, the share whose admissions /
  wastewater agree (a break of the same direction) under the default alignment (+3 / -4
  days) and tolerance (7 days), and the
  same share for case breaks with no true step near (agreement there is a false alarm).

Cases and admissions: :func:`server.indicators.changepoints.detect_changepoints` (kink model,
its defaults except the generation interval); wastewater:
:func:`server.indicators.level_breaks.detect_level_breaks`. This is not a test; it measures
the methods on invented data.
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
from server.indicators.level_breaks import detect_level_breaks  # noqa: E402
from server.indicators.stream_agreement import (  # noqa: E402
    ALIGNMENT,
    DEFAULT_TOLERANCE,
    stream_agreement,
)

GI_MEAN, GI_SD = 7.0, 5.0  # the step scenario's SEIR generation interval (latent 3 + inf. 4)
HIT, NEAR = 5, 7


def evaluate(seed: int, regions: int, days: int, min_change: float) -> dict[str, list[float]]:
    sc = simulate_steps(seed, regions=regions, days=days)
    lag = (GI_SD**2 + GI_MEAN**2) / (2.0 * GI_MEAN)
    res = {
        "cases": detect_changepoints(sc.cases, si_mean=GI_MEAN, si_sd=GI_SD,
                                     min_change=min_change),
        "admissions": detect_changepoints(sc.admissions, si_mean=GI_MEAN, si_sd=GI_SD,
                                          min_change=min_change),
        "wastewater": detect_level_breaks(sc.wastewater, si_mean=GI_MEAN, si_sd=GI_SD,
                                          min_change=min_change),
    }
    found = {s: r.breaks for s, r in res.items()}
    delay = {"cases": sc.report_shift, "admissions": sc.admission_shift,
             "wastewater": sc.shedding_shift}
    agree = {s: stream_agreement(found["cases"], found[s], alignment=ALIGNMENT[s],
                                 tolerance=DEFAULT_TOLERANCE,
                                 case_change=res["cases"].growth_change,
                                 other_change=res[s].growth_change)
             for s in ("admissions", "wastewater")}
    out: dict[str, list[float]] = {}

    def add(key: str, value: float) -> None:
        out.setdefault(key, []).append(value)

    for i in range(regions):
        steps = [(float(d), r) for d, r in zip(sc.change_day[i], sc.change_ratio[i], strict=True)
                 if d >= 0]
        for stream, b in found.items():
            days_found = b[i][b[i] >= 0]
            when = days_found - delay[stream] + lag  # transmission time
            lo = res[stream].break_lower[i][b[i] >= 0] - 0.5 - delay[stream] + lag
            hi = res[stream].break_upper[i][b[i] >= 0] + 0.5 - delay[stream] + lag
            for d, ratio in steps:
                if ratio <= 0.8 or ratio >= 1.2:
                    gap = np.abs(when - d).min() if when.size else np.inf
                    add(f"{stream}_hit", float(gap <= HIT))
                    add(f"{stream}_hit10", float(gap <= 10))
                    if gap <= 10:  # the nearest break's date interval, in transmission time
                        k = int(np.argmin(np.abs(when - d)))
                        add(f"{stream}_date_cover", float(lo[k] <= d <= hi[k]))
            for w, c in zip(when, days_found, strict=True):
                near_step = any(abs(w - d) <= NEAR for d, _ in steps)
                near_test = stream == "cases" and sc.testing_day[i] >= 0 and abs(
                    c - sc.testing_day[i]) <= NEAR
                if not near_test:
                    add(f"{stream}_false", float(not near_step))
        cb = found["cases"][i]
        for k in np.flatnonzero(cb >= 0):
            w = cb[k] - delay["cases"] + lag
            true = any(abs(w - d) <= HIT for d, _ in steps)
            for s in ("admissions", "wastewater"):
                add(f"{s}_agree_{'true' if true else 'false'}", float(agree[s].agrees[i, k]))
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--seeds", type=int, default=50)
    parser.add_argument("--seed-start", type=int, default=0)
    parser.add_argument("--regions", type=int, default=20)
    parser.add_argument("--days", type=int, default=240)
    parser.add_argument("--min-change", type=float, default=0.1)
    args = parser.parse_args()
    total: dict[str, list[float]] = {}
    began = time.perf_counter()
    for seed in range(args.seed_start, args.seed_start + args.seeds):
        for k, v in evaluate(seed, args.regions, args.days, args.min_change).items():
            total.setdefault(k, []).extend(v)
    took = time.perf_counter() - began

    def share(key: str) -> str:
        v = total.get(key, [])
        return f"{np.mean(v):.3f} of {len(v)}" if v else "n/a"

    print(f"seeds {args.seed_start}..{args.seed_start + args.seeds - 1}: {args.seeds} x "
          f"{args.regions} regions x {args.days} days ({took:.0f} s)")
    for s in ("cases", "admissions", "wastewater"):
        print(f"{s:>10}: steps >= 20 % found within +-{HIT} d: {share(s + '_hit')} "
              f"(+-10 d: {share(s + '_hit10')}); false breaks (no step within {NEAR} d): "
              f"{share(s + '_false')}")
    for s in ("cases", "admissions", "wastewater"):
        print(f"{s:>10}: 95 % date interval holds the step (nearest break within 10 d): "
              f"{share(s + '_date_cover')}")
    for s in ("admissions", "wastewater"):
        print(f"{s:>10} agree with case breaks near a true step: {share(s + '_agree_true')}; "
              f"with case breaks near none: {share(s + '_agree_false')}")


if __name__ == "__main__":
    main()
