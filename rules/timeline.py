"""Summary of tier timelines: changes per year, days in each tier, prepare-signal lead times.

Pure functions on the arrays an :class:`~rules.evaluation.Evaluation` holds, used by backtests to
judge a ruleset against the past.

Definitions (per region; ``tier`` is the tier in force, -1 insufficient data):

* a *change* is a day whose tier differs from the day before, both days known (>= 0);
* an *escalation* is a change upwards;
* a prepare *episode* of a signal starts on a day it shows and did not show the day before;
* an escalation on day ``e`` is *preceded* by a prepare signal when an episode started on a day
  ``o`` with ``e - lookback <= o < e`` and after the region's previous change; its *lead* is
  ``e - o`` for the earliest such ``o``;
* an episode is *unfollowed* when no escalation comes within ``lookback`` days of its start.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from rules.errors import EvaluationInputError

__all__ = ["RegionTimeline", "TimelineSummary", "summarise_timeline"]

DAYS_PER_YEAR = 365.25


@dataclass(frozen=True, kw_only=True)
class RegionTimeline:
    """One region's figures over the summarised period."""

    region: str
    changes: int
    escalations: int
    preceded: int
    leads: tuple[int, ...]
    episodes: int
    unfollowed: int
    days_in_tier: tuple[int, ...]  # index 0: insufficient data, then tiers 0..N


@dataclass(frozen=True, kw_only=True)
class TimelineSummary:
    """Figures of all regions; ``days`` is the length of the period."""

    days: int
    lookback: int
    n_tiers: int
    regions: tuple[RegionTimeline, ...]

    @property
    def changes_per_year(self) -> float:
        """Mean tier changes per region per year."""
        if not self.regions or not self.days:
            return float("nan")
        return float(np.mean([r.changes for r in self.regions])) * DAYS_PER_YEAR / self.days

    @property
    def tier_shares(self) -> tuple[float, ...]:
        """Share of region-days in insufficient data, then each tier 0..N."""
        total = np.asarray(np.sum([r.days_in_tier for r in self.regions], axis=0, dtype=np.float64))
        s = total.sum()
        return tuple(float(x) for x in (total / s if s else total))

    @property
    def escalations(self) -> int:
        return sum(r.escalations for r in self.regions)

    @property
    def preceded_share(self) -> float:
        """Share of escalations preceded by a prepare signal (NaN without escalations)."""
        n = self.escalations
        return sum(r.preceded for r in self.regions) / n if n else float("nan")

    @property
    def leads(self) -> tuple[int, ...]:
        return tuple(x for r in self.regions for x in r.leads)

    @property
    def median_lead(self) -> float:
        leads = self.leads
        return float(np.median(leads)) if leads else float("nan")


def summarise_timeline(
    tier: NDArray[np.integer],
    prepare: NDArray[np.bool_],
    *,
    regions: tuple[str, ...] | list[str],
    n_tiers: int,
    lookback: int = 42,
) -> TimelineSummary:
    """Summarise tiers ``(regions, days)`` and prepare signals ``(signals, regions, days)``.

    Raises
    ------
    EvaluationInputError
        When the shapes do not agree or ``lookback`` is not positive.
    """
    t = np.asarray(tier, dtype=np.int64)
    p = np.asarray(prepare, dtype=bool)
    if t.ndim != 2 or t.shape[0] != len(regions):
        raise EvaluationInputError("tier", f"shape {t.shape} does not fit {len(regions)} regions")
    if p.ndim != 3 or p.shape[1:] != t.shape:
        raise EvaluationInputError("prepare", f"shape {p.shape} does not match tier {t.shape}")
    if lookback < 1:
        raise EvaluationInputError("lookback", f"must be >= 1, got {lookback}")
    n_r, n_d = t.shape
    known = (t[:, 1:] >= 0) & (t[:, :-1] >= 0)
    change = np.zeros_like(t, dtype=bool)
    change[:, 1:] = known & (t[:, 1:] != t[:, :-1])
    up = np.zeros_like(change)
    up[:, 1:] = change[:, 1:] & (t[:, 1:] > t[:, :-1])
    onset = p.copy()
    onset[:, :, 1:] &= ~p[:, :, :-1]
    any_onset = np.asarray(onset.any(axis=0))  # (regions, days)
    counts = np.stack([(t == k).sum(axis=1) for k in range(-1, n_tiers)], axis=1)
    out = []
    for r in range(n_r):  # summary only (not a hot path): a few changes per region
        ups = np.flatnonzero(up[r])
        chs = np.flatnonzero(change[r])
        onsets = np.flatnonzero(any_onset[r])
        leads: list[int] = []
        for e in ups:
            before = chs[chs < e]
            floor = max(int(before[-1]) if before.size else -1, int(e) - lookback - 1)
            cands = onsets[(onsets > floor) & (onsets < e)]
            if cands.size:
                leads.append(int(e - cands[0]))
        unfollowed = sum(1 for o in onsets if not np.any((ups >= o) & (ups <= o + lookback)))
        out.append(
            RegionTimeline(
                region=str(regions[r]), changes=int(chs.size), escalations=int(ups.size),
                preceded=len(leads), leads=tuple(leads), episodes=int(onsets.size),
                unfollowed=int(unfollowed), days_in_tier=tuple(int(x) for x in counts[r]),
            )
        )
    return TimelineSummary(days=n_d, lookback=lookback, n_tiers=n_tiers, regions=tuple(out))
