"""Read model: what changed since the previous morning, one line per district and change.

Three sources, in the order the overview lists them: the engine's recommendation between two
days of the same run (:func:`recommended_changes`), official tiers published since the previous
morning (:func:`published_changes`) and overrides taken since then, published or not
(:func:`overrides`). Tiers are named under the ruleset each decision was made under
(:mod:`server.services.tiers`).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from datetime import UTC, datetime

from sqlalchemy import select
from sqlalchemy.orm import Session

from rules import Ruleset
from server.services.review_official import policy_owners
from server.services.rulesets import active_rulesets
from server.services.tiers import decision_scales, tier_name
from server.store.models import Assessment, Decision, Region

__all__ = ["Change", "overrides", "published_changes", "recommended_changes"]


@dataclass(frozen=True, kw_only=True)
class Change:
    code: str
    name: str
    what: str


def recommended_changes(
    ruleset: Ruleset, code: str, name: str, before: Assessment, now: Assessment
) -> list[Change]:
    """A district's recommended tier rising or falling, and prepare signals newly fired, from
    the day ``before`` to ``now``."""
    out = []
    if before.recommended_tier != now.recommended_tier:
        verb = "rose" if now.recommended_tier > before.recommended_tier else "fell"
        out.append(Change(code=code, name=name, what=(
            f"recommended tier {verb} from {tier_name(ruleset, before.recommended_tier)} "
            f"to {tier_name(ruleset, now.recommended_tier)}"
        )))
    for sid, on in now.prepare_signals.items():
        if on and not before.prepare_signals.get(sid, False):
            out.append(Change(code=code, name=name, what=f"prepare signal {sid} fired"))
    return out


def published_changes(
    session: Session, names: Mapping[str, str], since: datetime | None, ruleset: Ruleset | None
) -> tuple[Change, ...]:
    """Districts whose published official tier changed after ``since`` (the previous morning).

    The official tier is the published decision with the latest effective date (ties: the later
    decision), as in :func:`server.services.review.official_tiers`; each is named under the
    ruleset it was decided under (:mod:`server.services.tiers`). ``names`` gives each district
    code its name (a code without one is named by its code)."""
    if since is None or ruleset is None:
        return ()
    rows = session.execute(
        select(Region.code, Decision)
        .join(Region, Region.id == Decision.region_id)
        .where(Decision.published_at.is_not(None))
        .order_by(Decision.effective_date, Decision.decided_at, Decision.id)
    ).all()
    # each policy's official tiers apart (a policy no longer active: the one it counts for)
    active = [r.name for r in active_rulesets(session=session)]
    prefix = len(active) > 1
    owners = policy_owners(session)

    def key(code: str, row: Decision) -> tuple[str, str] | None:
        owner = row.policy if row.policy in active or not active else owners.get(row.policy)
        return None if owner is None else (owner, code)

    before: dict[tuple[str, str], Decision] = {}
    after: dict[tuple[str, str], Decision] = {}
    for code, row in rows:
        k = key(code, row)
        if k is None:  # a stopped policy's decision counts for none
            continue
        after[k] = row
        if row.published_at is not None and row.published_at.astimezone(UTC) <= since:
            before[k] = row
    changed = {k: row for k, row in after.items()
               if k not in before or before[k].tier != row.tier}
    scales = decision_scales(session=session, rows=[*changed.values(), *(
        before[c] for c in changed if c in before)])

    def name(row: Decision) -> str:
        return f"{scales[row.id].name(row.tier)} ({row.tier})"

    return tuple(
        Change(code=code, name=names.get(code, code), what=(
            (f"{policy}: " if prefix else "") + (
                f"official tier published: {name(before[(policy, code)])} to {name(row)}"
                if (policy, code) in before else f"official tier first published: {name(row)}")
        ))
        for (policy, code), row in sorted(changed.items(), key=lambda kv: (kv[0][1], kv[0][0]))
    )


def overrides(
    session: Session, names: Mapping[str, str], since: datetime | None
) -> tuple[Change, ...]:
    """Overrides taken after ``since`` (the previous morning), published or not: a person set
    a tier other than the engine's recommendation, which the day's changes should say even
    when the published tier did not move. Tiers are named under the ruleset each decision was
    made under (:mod:`server.services.tiers`)."""
    if since is None:
        return ()
    rows = session.execute(
        select(Region.code, Decision, Assessment.recommended_tier)
        .join(Region, Region.id == Decision.region_id)
        .outerjoin(Assessment, Assessment.id == Decision.assessment_id)
        .where(Decision.kind == "overridden", Decision.decided_at > since)
        .order_by(Region.code, Decision.decided_at, Decision.id)
    ).all()
    if not rows:
        return ()
    scales = decision_scales(session=session, rows=[row for _code, row, _rec in rows])
    several = len(active_rulesets(session=session)) > 1
    out = []
    for code, row, recommended in rows:
        scale = scales[row.id]
        rec = "" if recommended is None else (
            f" (recommended: {scale.name(recommended)}"
            f"{'' if recommended < 0 else f' ({recommended})'})")
        state = ("published" if row.published_at is not None
                 else "not yet published")
        out.append(Change(code=code, name=names.get(code, code), what=(
            (f"{row.policy}: " if several else "")
            + f"overridden to {scale.name(row.tier)} ({row.tier}){rec}, in force from "
            f"{row.effective_date.isoformat()}, {state}: {row.reason}"
        )))
    return tuple(out)
