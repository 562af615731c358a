"""The invented county's official tier history: what its (invented) officials decided before today.

A real office has taken decisions for as long as it has had tiers; the demo should not start with
a county where nothing was ever published. This module plays the office of the invented scenario:
it follows each district's recommended tiers and records the official tier a weekly review would
have set -- a change is taken up once it has held for a few days, and the newest ones are left
for the demo's approver to decide. One step down, in the most populous district, is held a week
longer than recommended, as offices sometimes do, so the history shows an official line that
departs from the recommendation with a reason.

Everything here is invented for the demonstration.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from datetime import UTC, date, datetime, time, timedelta

import numpy as np

from server.services.official_history import OfficialRecord

__all__ = ["DECIDER", "HOLD_DAYS", "PENDING_DAYS", "REVIEW_LAG_DAYS", "official_history"]

DECIDER = "otto.approver"   # the demo's approver account
REVIEW_LAG_DAYS = 2         # a change is taken up once it has held this many days
PENDING_DAYS = 7            # changes newer than this are left to the demo's reviewer
HOLD_DAYS = 7               # the one step down held longer than recommended
DECIDED_AT = time(14, 0)    # the review meets in the early afternoon (UTC)


def _record(code: str, effective: date, tier: int, reason: str) -> OfficialRecord:
    decided = datetime.combine(effective - timedelta(days=1), DECIDED_AT, tzinfo=UTC)
    return OfficialRecord(
        line=0, region=code, effective_date=effective, tier=tier, reason=reason,
        decided_by=DECIDER, decided_at=decided,
    )


def _holds(row: np.ndarray, d: int, span: int, last_index: int) -> bool:
    """Whether the recommendation of day ``d`` holds ``span`` more days, before the pending days."""
    return d + span <= last_index - PENDING_DAYS and bool(np.all(row[d : d + span + 1] == row[d]))


def _held_changes(row: np.ndarray, last_index: int) -> list[int]:
    """Days whose recommendation differs from the day before and holds for the review lag."""
    out = []
    for d in range(row.size):
        if row[d] < 0 or (d > 0 and row[d] == row[d - 1]):
            continue
        if d + REVIEW_LAG_DAYS > last_index - PENDING_DAYS:
            break
        if _holds(row, d, REVIEW_LAG_DAYS, last_index):
            out.append(d)
    return out


def official_history(
    *, regions: Sequence[str], populations: Sequence[int], dates: np.ndarray, tier: np.ndarray,
    tier_name: Callable[[int], str],
) -> list[OfficialRecord]:
    """Official decisions of the invented office, from the recommended tiers ``tier``.

    Parameters
    ----------
    regions, populations : sequences of length regions
        District codes and populations.
    dates : ndarray of datetime64[D], shape (days,)
    tier : ndarray of int, shape (regions, days)
        Recommended tier per district and day (-1: insufficient data).
    tier_name : callable
        Name of a tier level.

    Returns
    -------
    list of OfficialRecord
        Sorted by district and effective date; nothing in the last :data:`PENDING_DAYS` days.
    """
    days = [d.astype(date) for d in np.asarray(dates, dtype="datetime64[D]")]
    last_index = len(days) - 1
    held_district = int(np.argmax(np.asarray(populations)))
    top = int(np.max(tier))
    out: list[OfficialRecord] = []
    for r, code in enumerate(regions):
        official: int | None = None
        held = False
        for d in _held_changes(np.asarray(tier[r]), last_index):
            new = int(tier[r, d])
            if new == official:
                continue
            effective = days[d] + timedelta(days=REVIEW_LAG_DAYS + 1)
            if official is None:
                out.append(_record(code, effective, new,
                                   f"Tier in force when the alert system started: "
                                   f"{tier_name(new)}."))
            elif (r == held_district and not held and official == top and new < official
                  and _holds(tier[r], d, REVIEW_LAG_DAYS + HOLD_DAYS, last_index)):
                held = True
                out.append(_record(
                    code, effective, official,
                    f"Step down to {tier_name(new)} postponed one week: hospital beds are still "
                    f"scarce; agreed with the district hospital.",
                ))
                out.append(_record(code, effective + timedelta(days=HOLD_DAYS), new,
                                   f"Weekly review: step down to {tier_name(new)} after the "
                                   f"extra week."))
            else:
                verb = "up" if new > official else "down"
                out.append(_record(code, effective, new,
                                   f"Weekly review: recommended step {verb} to "
                                   f"{tier_name(new)} confirmed."))
            official = new
    return out
