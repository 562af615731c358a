"""Prepare signals: sustained conditions on leading indicators, with a quiet period to clear.

For signal ``s`` with condition ``x op v`` on statistic ``x`` (estimate, lower or upper bound):

    run_t   = run_{t-1} + 1 if met_t else 0          (count_by days: a missing day resets)
    run_t   = run_{t-1} + 1 if met_t, 0 if not met,  run_{t-1} if missing   (count_by samples)
    quiet_t = 0 if met_t else quiet_{t-1} + 1
    active_t = True if run_t >= n, False if active_{t-1} and quiet_t >= q, else active_{t-1}

with ``n = for`` and ``q = clear_after_days``. The loop runs over days, numpy over
(signals, regions). A signal with ``below_tier`` only shows while the tier in force is below it.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from rules.errors import EvaluationInputError
from rules.levels import is_stale
from rules.model import PrepareSignal
from rules.ruleset import Ruleset
from rules.series import IndicatorSeries

__all__ = ["SignalState", "compare", "evaluate_signals"]


@dataclass(frozen=True, kw_only=True, eq=False)
class SignalState:
    """Run, quiet and active arrays shaped ``(signals, regions)``."""

    run: NDArray[np.int32]
    quiet: NDArray[np.int32]
    active: NDArray[np.bool_]

    @classmethod
    def initial(cls, n_signals: int, n_regions: int) -> SignalState:
        z = np.zeros((n_signals, n_regions), dtype=np.int32)
        return cls(run=z, quiet=np.full_like(z, 10**6), active=np.zeros(z.shape, dtype=bool))


def compare(values: NDArray[np.float64], op: str, value: float) -> NDArray[np.bool_]:
    """``values op value`` element-wise; NaN gives False."""
    if op == "above":
        return values > value
    if op == "at_least":
        return values >= value
    if op == "below":
        return values < value
    return values <= value


def _statistic(sig: PrepareSignal, series: IndicatorSeries) -> NDArray[np.float64]:
    if sig.statistic == "estimate":
        return series.estimate
    arr = series.lower if sig.statistic == "lower" else series.upper
    if arr is None:
        raise EvaluationInputError(
            f"indicators[{sig.indicator!r}].{sig.statistic}",
            f"signal {sig.id!r} reads the {sig.statistic} bound but none was given",
        )
    return arr


def evaluate_signals(
    ruleset: Ruleset,
    indicators: Mapping[str, IndicatorSeries],
    in_force: NDArray[np.int32],
    start: SignalState,
) -> tuple[NDArray[np.bool_], NDArray[np.bool_], NDArray[np.int32], SignalState]:
    """Return (shown, met, run) shaped ``(signals, regions, days)`` and the final state.

    ``in_force`` is the tier in force ``(regions, days)`` (-1 for insufficient data).
    """
    n_s = len(ruleset.prepare)
    n_r, n_d = in_force.shape
    met = np.zeros((n_d, n_s, n_r), dtype=bool)
    present = np.zeros((n_d, n_s, n_r), dtype=bool)
    for s, sig in enumerate(ruleset.prepare):
        series = indicators[sig.indicator]
        x = _statistic(sig, series)
        ok = np.isfinite(x) & ~is_stale(series, ruleset.indicator(sig.indicator).max_age_days)
        present[:, s, :] = ok.T
        met[:, s, :] = (ok & compare(x, sig.op, sig.value)).T
    need = np.array([sig.for_count for sig in ruleset.prepare], dtype=np.int32)[:, np.newaxis]
    clear = np.array([sig.clear_after_days for sig in ruleset.prepare], dtype=np.int32)[:, None]
    by_samples = np.array([s.count_by == "samples" for s in ruleset.prepare], dtype=bool)[:, None]
    active_out = np.empty((n_d, n_s, n_r), dtype=bool)
    run_out = np.empty((n_d, n_s, n_r), dtype=np.int32)
    run, quiet, active = start.run.copy(), start.quiet.copy(), start.active.copy()
    for d in range(n_d):
        m, p = met[d], present[d]
        run = np.where(m, run + 1, np.where(by_samples & ~p, run, 0))
        quiet = np.where(m, 0, quiet + 1)
        fired = run >= need
        active = fired | (active & (quiet < clear))
        active_out[d] = active
        run_out[d] = run
    shown = active_out.transpose(1, 2, 0).copy()
    for s, sig in enumerate(ruleset.prepare):
        if sig.below_tier is not None:
            shown[s] &= (in_force >= 0) & (in_force < sig.below_tier)
    state = SignalState(run=run.astype(np.int32), quiet=quiet.astype(np.int32), active=active)
    return shown, met.transpose(1, 2, 0).copy(), run_out.transpose(1, 2, 0).copy(), state
