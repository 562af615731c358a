"""Read model: every active policy's tier per district, for the pages that show them side by side.

Several policies are active at once (:func:`server.services.rulesets.active_rulesets`, the lead
first). For each one this gives, per district code, the official (published) tier, the newest
recommended tier and whether a change awaits review, with the policy's pending changes. A policy
whose assessments are for areas (``level: areas``, or ``county``) gives each district the tier of
the region above it at that level (:func:`assessed_regions`; :attr:`PolicyCell.area` names it).

The result depends only on the decisions and the newest run of each active policy, so it is kept
per worker under a stamp of both (one small query per request when nothing changed).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

from sqlalchemy import func, select, type_coerce
from sqlalchemy.orm import Session

from server.readmodels.cache import BoundedCache
from server.services.assessments import newest_run_of
from server.services.review_official import official_tiers
from server.services.review_pending import PendingChange, current_run, pending_changes
from server.services.ruleset_cache import parsed
from server.services.rulesets import active_rulesets
from server.store.models import Decision, Region
from server.store.models import Ruleset as RulesetRow
from server.store.types import UTCDateTime

__all__ = ["AssessedRegion", "PolicyCell", "PolicyColumn", "assessed_regions", "policy_columns",
           "policy_level"]


@dataclass(frozen=True, kw_only=True)
class PolicyCell:
    """One district under one policy."""

    official_tier: int | None
    official_name: str | None
    recommended_tier: int | None
    recommended_name: str | None
    pending: bool
    assessment_id: int | None
    #: the area whose tier this is (an area-level policy), else None
    area: str | None = None


@dataclass(frozen=True, kw_only=True)
class PolicyColumn:
    """One active policy: its name, version, level and tiers, and a cell per district code."""

    name: str
    label: str
    level: str
    lead: bool
    tier_names: tuple[str, ...]
    cells: Mapping[str, PolicyCell]
    pending: tuple[PendingChange, ...] = field(default=())


def policy_level(ruleset: object) -> str:
    """The level a policy assesses: ``districts`` unless the ruleset says otherwise."""
    return str(getattr(ruleset, "level", "districts") or "districts")


@dataclass(frozen=True, kw_only=True)
class AssessedRegion:
    """The region whose assessments stand for a district under a policy."""

    id: int
    code: str
    name: str


def assessed_regions(*, session: Session, level: str) -> dict[str, AssessedRegion]:
    """Per district code, the region a policy of ``level`` assesses for it: the district itself
    (``districts``), its parent (``areas``: the area above it) or the top of the tree above it
    (``county``); districts without one are left out."""
    rows = {rid: (code, name, lvl, parent) for rid, code, name, lvl, parent in session.execute(
        select(Region.id, Region.code, Region.name, Region.level, Region.parent_id))}
    out = {}
    for rid, (code, _name, lvl, parent) in rows.items():
        if lvl != "district":
            continue
        chosen: int | None = rid if level == "districts" else parent
        if level == "county":
            seen: set[int] = set()
            while chosen is not None and rows[chosen][3] is not None and chosen not in seen:
                seen.add(chosen)
                chosen = rows[chosen][3]
        if chosen is not None:
            out[code] = AssessedRegion(id=chosen, code=rows[chosen][0], name=rows[chosen][1])
    return out


#: the newest stamp's columns, per worker
_CACHE: BoundedCache[tuple[object, ...], tuple[PolicyColumn, ...]] = BoundedCache(size=1)


def policy_columns(*, session: Session) -> tuple[PolicyColumn, ...]:
    """Every active policy (the lead first) with its tier per district code."""
    rows = active_rulesets(session=session)
    runs = [newest_run_of(session=session, ruleset_id=r.id) for r in rows]
    stamp = (
        tuple((r.id, None if run is None else (run.data_cutoff, run.rows_written))
              for r, run in zip(rows, runs, strict=True)),
        *session.execute(
            select(func.max(Decision.id), func.count(Decision.published_at),
                   type_coerce(func.max(Decision.published_at), UTCDateTime()))
        ).one(),
    )
    return _CACHE.get_or_build(stamp, lambda: _build(session, rows))


def _build(session: Session, rows: list[RulesetRow]) -> tuple[PolicyColumn, ...]:
    columns = []
    for k, row in enumerate(rows):
        ruleset = parsed(row)
        level = policy_level(ruleset)
        latest = current_run(session=session, policy=row.name)
        items = {} if latest is None else {i.code: i for i in latest.items}
        official = official_tiers(session=session, published_only=True, policy=row.name)
        pending = pending_changes(session=session, policy=row.name)
        waiting = {p.region: p for p in pending}
        cells = {}
        for code, region in assessed_regions(session=session, level=level).items():
            key = region.code
            item, off, change = items.get(key), official.get(key), waiting.get(key)
            recommended = None if item is None else item.assessment.recommended_tier
            cells[code] = PolicyCell(
                official_tier=None if off is None else off.tier,
                official_name=None if off is None else off.tier_name,
                recommended_tier=recommended,
                recommended_name=None if recommended is None else (
                    "insufficient data" if recommended < 0 else ruleset.tier_name(recommended)),
                pending=change is not None,
                assessment_id=(change.assessment_id if change is not None
                               else None if item is None else item.assessment.id),
                area=None if level == "districts" else region.name,
            )
        columns.append(PolicyColumn(
            name=row.name, label=f"{row.name} {row.version}", level=level, lead=k == 0,
            tier_names=tuple(t.name for t in ruleset.tiers), cells=cells, pending=tuple(pending),
        ))
    return tuple(columns)
