"""Page data: the tiers a region above the districts holds under policies set at its level.

A policy with ``level: areas`` or ``level: county`` stores assessments for those regions
(:mod:`server.services.level_data`). :func:`region_tiers` reads, for each active such policy,
the region's assessment of the newest run's last day as of that run's cutoff
(:func:`server.services.assessments.assessments_as_of`), for the area page;
:func:`above_district` those of a district's area and county, for the district page.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, datetime

from sqlalchemy import select
from sqlalchemy.orm import Session

from rules import Tier
from rules.record import stored_sentence
from server.services.assessments import assessments_as_of, newest_run_of
from server.services.ruleset_cache import parsed
from server.store.models import Assessment, Region
from server.store.models import Ruleset as RulesetRow

__all__ = ["RegionTier", "above_district", "region_tiers"]


@dataclass(frozen=True, kw_only=True)
class RegionTier:
    """A region's recommended tier under one policy set at its level, on the newest day."""

    policy: str  # name and version
    region: str  # code of the region assessed
    region_name: str
    level: str  # the policy's level (areas, county)
    day: date
    tier: int  # -1: insufficient data
    #: the tier with its names and texts per language (None: insufficient data)
    tier_info: Tier | None
    n_tiers: int
    sentence: str
    data_cutoff: datetime


def region_tiers(*, session: Session, code: str) -> tuple[RegionTier, ...]:
    """The tiers of region ``code`` under every active policy above the districts that has
    assessed it (empty: none does)."""
    region = session.execute(select(Region.id, Region.name).where(Region.code == code)).first()
    if region is None:
        return ()
    region_id, region_name = region
    out = []
    for row in session.scalars(select(RulesetRow).where(RulesetRow.status == "active")
                               .order_by(RulesetRow.id)):
        rs = parsed(row)
        if rs.level == "districts":
            continue
        run = newest_run_of(session=session, ruleset_id=row.id)
        if run is None:
            continue
        found = session.scalar(assessments_as_of(
            select(Assessment), ruleset_id=row.id, cutoff=run.data_cutoff,
            region_id=region_id, start=run.last_day, end=run.last_day))
        if found is None:
            continue
        tier = found.recommended_tier
        out.append(RegionTier(
            policy=f"{row.name} {row.version}", region=code, region_name=region_name,
            level=rs.level, day=found.ref_date, tier=tier,
            tier_info=rs.tiers[tier] if 0 <= tier < rs.n_tiers else None, n_tiers=rs.n_tiers,
            sentence=stored_sentence(found.explanation), data_cutoff=run.data_cutoff,
        ))
    return tuple(out)


def above_district(*, session: Session, code: str) -> tuple[RegionTier, ...]:
    """The tiers of the regions above district ``code`` (its area, the county) under active
    policies set at their level, nearest region first."""
    out: list[RegionTier] = []
    node = session.scalar(select(Region).where(Region.code == code))
    seen: set[int] = set()
    while node is not None and node.parent is not None and node.parent.id not in seen:
        node = node.parent
        seen.add(node.id)
        out += region_tiers(session=session, code=node.code)
    return tuple(out)
