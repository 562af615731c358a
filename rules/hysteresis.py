"""The tier transition: previous state + today's candidate bounds -> new state.

Each day, criteria combine into a *low* candidate (unknown criteria counted at level 0) and a
*high* candidate (unknown criteria counted at their top level). The candidate the tier reacts to is

    candidate = clip(tier, low, high),

so the tier rises only when the known criteria alone call for it and falls only when it would fall
whatever the unknown criteria were: unknown never raises and never lowers. Then, with timing
``confirm_days`` (c), ``release_days`` (r), ``min_days_in_tier`` (m) and ``max_steps_down`` (s):

    up_t   = up_{t-1} + 1   if candidate > tier else 0;  up_target = min of candidates in the run
    down_t = down_{t-1} + 1 if candidate < tier else 0;  down_target = max of candidates in the run
    rise  when up_t >= c                       -> tier = up_target
    fall  when down_t >= r and since_t >= m    -> tier = max(down_target, tier - s)

``since`` counts days since the last change (the change day is day 0). On a day whose gate fails
the counters are frozen (``since`` still advances). All operations are numpy over regions.

References
----------
The rise/fall counters follow the consecutive-day persistence rules written into published tier
frameworks (see ``/work/shared/REFERENCES.md``: rules of 3 days up / 5 days down, 7 up / 14 down).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from rules.model import Combination, Timing

__all__ = ["NEVER_CHANGED", "TierState", "candidate_bounds", "step_tiers"]

IntArray = NDArray[np.int32]


#: ``since`` of a region whose tier has not changed in the evaluated period: far beyond any
#: ``min_days_in_tier`` (and growing by one a day); pages show it as "—".
NEVER_CHANGED = 10**6


@dataclass(frozen=True, kw_only=True, eq=False)
class TierState:
    """Hysteresis state of every region (all arrays shaped ``(regions,)``)."""

    tier: IntArray
    since: IntArray
    up: IntArray
    up_target: IntArray
    down: IntArray
    down_target: IntArray

    @classmethod
    def initial(
        cls, n_regions: int, tier: int | NDArray[np.int32] = 0, since: int = NEVER_CHANGED
    ) -> TierState:
        """Regions at ``tier``, long enough in it that ``min_days_in_tier`` does not block."""
        t = np.broadcast_to(np.asarray(tier, dtype=np.int32), (n_regions,)).copy()
        zeros = np.zeros(n_regions, dtype=np.int32)
        return cls(
            tier=t,
            since=np.full(n_regions, since, dtype=np.int32),
            up=zeros,
            up_target=zeros.copy(),
            down=zeros.copy(),
            down_target=zeros.copy(),
        )


def candidate_bounds(
    levels: NDArray[np.int8],
    known: NDArray[np.bool_],
    max_level: NDArray[np.int8],
    combination: Combination,
    weights: NDArray[np.float64],
    cutoffs: NDArray[np.float64],
) -> tuple[IntArray, IntArray]:
    """Low and high candidate tiers ``(regions,)`` from criterion levels ``(criteria, regions)``.

    Notes
    -----
    highest: ``max_c L_c``; at_least m: the m-th largest ``L_c``; score: number of cut-offs
    ``<= sum_c w_c L_c``. Low uses ``L_c = 0`` for unknown criteria, high ``L_c = top_c``.
    """
    low_l = np.where(known, levels, 0)
    high_l = np.where(known, levels, max_level[:, np.newaxis])
    if combination.method == "highest":
        return low_l.max(axis=0).astype(np.int32), high_l.max(axis=0).astype(np.int32)
    if combination.method == "at_least":
        m = int(combination.m or 1)
        k = low_l.shape[0] - m
        return (np.partition(low_l, k, axis=0)[k], np.partition(high_l, k, axis=0)[k])
    s_low = weights @ low_l
    s_high = weights @ high_l
    low = (s_low[np.newaxis, :] >= cutoffs[:, np.newaxis]).sum(axis=0, dtype=np.int32)
    high = (s_high[np.newaxis, :] >= cutoffs[:, np.newaxis]).sum(axis=0, dtype=np.int32)
    return low, high


def step_tiers(
    state: TierState, low: IntArray, high: IntArray, ok: NDArray[np.bool_], timing: Timing
) -> tuple[TierState, IntArray]:
    """One day of hysteresis for all regions; returns the new state and the candidate used."""
    tier = state.tier
    cand = np.minimum(np.maximum(tier, low), high).astype(np.int32, copy=False)  # low <= high
    higher = cand > tier
    lower = cand < tier
    up = (state.up + 1) * higher
    up_target = np.where(state.up > 0, np.minimum(state.up_target, cand), cand) * higher
    down = (state.down + 1) * lower
    down_target = np.where(state.down > 0, np.maximum(state.down_target, cand), cand) * lower
    since = state.since + 1
    rise = up >= timing.confirm_days
    fall = (down >= timing.release_days) & (since >= timing.min_days_in_tier)
    fall_to = down_target
    if timing.max_steps_down is not None:
        fall_to = np.maximum(down_target, tier - timing.max_steps_down)
    new_tier = np.where(rise, up_target, np.where(fall, fall_to, tier))
    changed = new_tier != tier
    if ok.all():  # the common day: no gate failed, nothing frozen
        keep = ~changed
        new = TierState(
            tier=new_tier.astype(np.int32, copy=False),
            since=since * keep,
            up=up * keep,
            up_target=up_target * keep,
            down=down * keep,
            down_target=down_target * keep,
        )
        return new, cand
    reset = changed | ~ok
    new = TierState(
        tier=np.where(ok, new_tier, tier).astype(np.int32, copy=False),
        since=np.where(changed & ok, 0, since).astype(np.int32, copy=False),
        up=np.where(reset, np.where(ok, 0, state.up), up).astype(np.int32, copy=False),
        up_target=np.where(reset, np.where(ok, 0, state.up_target), up_target).astype(
            np.int32, copy=False
        ),
        down=np.where(reset, np.where(ok, 0, state.down), down).astype(np.int32, copy=False),
        down_target=np.where(reset, np.where(ok, 0, state.down_target), down_target).astype(
            np.int32, copy=False
        ),
    )
    return new, cand
