"""The invented county's official tier history: what its (invented) officials decided before today.

A real office has taken decisions for as long as it has had tiers; the demo should not start with
a county where nothing was ever published. This module plays the office of the invented scenario:
it follows each district's recommended tiers and records the official tier a weekly review would
have set -- a change is taken up once it has held for a few days, and the newest ones are left
for the demo's approver to decide. One step down, in the most populous district, is held a week
longer than recommended, as offices sometimes do, so the history shows an official line that
departs from the recommendation with a reason. And when the newest recommendations hold no step
down (or no step up) that awaits review, the office's review is recorded as having deferred the
newest one of the last weeks (:func:`defer_newest_change`): it kept that district's tier, with a
reason, so the morning's queue holds a change each way for the demo's approver.

Everything here is invented for the demonstration.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from datetime import UTC, date, datetime, time, timedelta

import numpy as np

from server.services.official_history import OfficialRecord

__all__ = [
    "DECIDER",
    "DEFER_WITHIN_DAYS",
    "HOLD_DAYS",
    "PENDING_DAYS",
    "REVIEW_LAG_DAYS",
    "defer_newest_change",
    "official_history",
]

DECIDER = "otto.approver"   # the demo's approver account
REVIEW_LAG_DAYS = 2         # a change is taken up once it has held this many days
PENDING_DAYS = 7            # changes newer than this are left to the demo's reviewer
HOLD_DAYS = 7               # the one step down held longer than recommended
DECIDED_AT = time(14, 0)    # the review meets in the early afternoon (UTC)
DEFER_WITHIN_DAYS = 35      # only a change of the last five weeks is deferred
_DOWN_REASON = ("Weekly review: step down to {new} deferred; {kept} kept until the district's "
                "care homes report two quiet weeks.")
_UP_REASON = ("Weekly review: step up to {new} deferred; the rise is traced to one outbreak "
              "that the district is containing. {kept} kept; to be reviewed again.")


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


def defer_newest_change(
    records: list[OfficialRecord], *, final: np.ndarray, regions: Sequence[str],
    tier_name: Callable[[int], str], newest: date,
) -> list[OfficialRecord]:
    """``records`` with the newest step down and the newest step up deferred, unless one waits.

    A change waits when a district's newest recommendation (``final``, by ``regions``) differs
    from its newest official tier. For each direction (down, up) with no change waiting, the
    newest record that moved a district that way, to the tier still recommended there and no
    more than :data:`DEFER_WITHIN_DAYS` before ``newest``, is replaced by a record of the same
    date that keeps the tier before it, with a reason; so that change waits for review.
    """
    last: dict[str, OfficialRecord] = {}
    before: dict[str, int] = {}
    for rec in records:
        if rec.region in last:
            before[rec.region] = last[rec.region].tier
        last[rec.region] = rec
    now = {code: int(final[i]) for i, code in enumerate(regions)}
    out = list(records)
    for sign, why in ((-1, _DOWN_REASON), (1, _UP_REASON)):
        if any(now[c] >= 0 and (now[c] - r.tier) * sign > 0 for c, r in last.items()):
            continue
        moves = [r for c, r in last.items()
                 if c in before and (r.tier - before[c]) * sign > 0 and now[c] == r.tier
                 and (newest - r.effective_date).days <= DEFER_WITHIN_DAYS]
        if not moves:
            continue
        move = max(moves, key=lambda r: (r.effective_date, r.region))
        kept = before[move.region]
        deferred = OfficialRecord(
            line=0, region=move.region, effective_date=move.effective_date, tier=kept,
            reason=why.format(new=tier_name(move.tier), kept=tier_name(kept)),
            decided_by=move.decided_by, decided_at=move.decided_at,
        )
        out = [deferred if r is move else r for r in out]
        last[move.region] = deferred
    return out
