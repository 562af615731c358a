"""Read model: the overview's lines with the review's state merged in.

Each district line of the newest run (:mod:`server.readmodels.district_lines`) gets its official
(published) tier, whether a change awaits review, and the tier of a decision taken but not yet
published; with them the tier counts and the published changes and overrides since the previous
morning (:mod:`server.readmodels.day_changes`). All of it is a function of the decision table
and the newest assessments, so it is rebuilt only when a stamp of both changes (one query per
request tells).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, replace
from datetime import datetime

from sqlalchemy import func, select, type_coerce
from sqlalchemy.orm import Session

from rules import Ruleset
from server.readmodels.cache import BoundedCache
from server.readmodels.day_changes import Change, overrides, published_changes
from server.readmodels.district_lines import DistrictBase, DistrictLine
from server.services.review import official_tiers, pending_changes
from server.store.models import Decision
from server.store.types import UTCDateTime

__all__ = ["ReviewState", "review_state"]


@dataclass(frozen=True, kw_only=True)
class ReviewState:
    """The base lines merged with official tiers and pending changes."""

    lines: tuple[DistrictLine, ...]
    tier_counts: Mapping[int, int]
    pending: int
    decided: int
    published: tuple[Change, ...] = ()


#: the newest state of the decisions, per worker
_STATES: BoundedCache[tuple[object, ...], ReviewState] = BoundedCache(size=1)


def review_state(
    session: Session, key: tuple[object, ...], base: DistrictBase, since: datetime | None = None,
    ruleset: Ruleset | None = None, policy: str | None = None,
) -> ReviewState:
    """The lines with official tiers and pending changes, rebuilt only when decisions or
    assessments change.

    Both are functions of the decision table and the newest assessments; the stamp (newest
    decision id, number published, newest publication, and the assessment ``key`` of
    :func:`server.readmodels.district_lines.district_base`) changes with every decision,
    publication and evaluation. One query per request when nothing changed.
    """
    stamp = (*key, *session.execute(
        select(func.max(Decision.id), func.count(Decision.published_at),
               type_coerce(func.max(Decision.published_at), UTCDateTime()))
    ).one())
    return _STATES.get_or_build(stamp, lambda: _build(session, base, since, ruleset, policy))


def _build(
    session: Session, base: DistrictBase, since: datetime | None, ruleset: Ruleset | None,
    policy: str | None,
) -> ReviewState:
    official = official_tiers(session=session, published_only=True)
    decided = {
        code: o for code, o in official_tiers(session=session, published_only=False).items()
        if o.published_at is None
    }
    pending = {p.region: p for p in pending_changes(session=session, policy=policy)}
    lines = []
    counts: dict[int, int] = {}
    for line in base.lines:
        off, pend, dec = official.get(line.code), pending.get(line.code), decided.get(line.code)
        lines.append(replace(
            line, official_tier=off.tier if off else None,
            official_name=off.tier_name if off else None, pending=pend is not None,
            assessment_id=pend.assessment_id if pend else line.assessment_id,
            decided_tier=dec.tier if dec else None, decided_name=dec.tier_name if dec else None,
        ))
        if off is not None:
            counts[off.tier] = counts.get(off.tier, 0) + 1
    names = {line.code: line.name for line in base.lines}
    return ReviewState(lines=tuple(lines), tier_counts=counts, pending=len(pending),
                       decided=sum(1 for line in lines if line.decided_tier is not None),
                       published=published_changes(session, names, since, ruleset)
                       + overrides(session, names, since))
