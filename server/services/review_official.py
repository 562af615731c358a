"""Read model: the official tier of each district and the history of decisions.

The official tier is the decision that takes effect last (:data:`RANK`; ties: the one taken
last), so a late decision about an earlier day never wins. Each tier is named under the ruleset
it was decided under (:mod:`server.services.tiers`), so a tier the active policy does not have
(after a policy change) keeps its name. Decisions are taken in
:mod:`server.services.review_decisions` and published in :mod:`server.services.review_publication`.

Each policy (ruleset name) has its own official tiers: a decision belongs to the policy in its
``policy`` column (revision 0010). Decisions of a policy that is no longer active (one replaced
under another name, or taken before any ruleset was active) count for the lead policy
(:func:`policy_condition`), so a database with one active policy reads every decision, as before.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC, date, datetime, timedelta

from sqlalchemy import ColumnElement, select, true
from sqlalchemy.orm import Session

from server.services.ruleset_cache import parsed
from server.services.rulesets import active_ruleset, active_rulesets
from server.services.tiers import decision_scales, tier_name
from server.store.models import Assessment, AuditEntry, Region, User
from server.store.models import Decision as DecisionRow
from server.store.models import Ruleset as RulesetRow


@dataclass(frozen=True, kw_only=True)
class OfficialTier:
    """The tier in force for a district by decision (published, unless asked otherwise)."""

    region: str
    name: str
    tier: int
    tier_name: str
    public_text: str
    since: date
    published_at: datetime | None
    #: The decision that set the tier, and the ruleset it was decided under (its name and
    #: version; ``ruleset_id`` None when not known).
    decision_id: int = 0
    ruleset_id: int | None = None
    ruleset_label: str = ""
    #: The policy (ruleset name) the decision belongs to.
    policy: str = ""


@dataclass(frozen=True, kw_only=True)
class DecisionRecord:
    """A decision in the history, with the recommendation it answered."""

    id: int
    region: str
    name: str
    tier: int
    tier_name: str
    recommended_tier: int | None
    recommended_name: str
    kind: str
    reason: str
    user: str
    decided_at: datetime
    effective_date: date
    published_at: datetime | None
    #: the day and data cutoff of the assessment answered (None: none, or another ruleset's),
    #: for its explanation as it was when decided
    assessment_day: date | None = None
    assessment_cutoff: datetime | None = None
    #: True when the decision answered no assessment (``recorded``, imported) and the
    #: recommendation shown is the engine's for the day it was taken, read as known then, or,
    #: when that day was first assessed after the decision, as first assessed
    #: (``recommended_later``)
    recommended_looked_up: bool = False
    recommended_later: bool = False
    #: The policy (ruleset name) the decision belongs to.
    policy: str = ""


#: The order in which decisions take over from one another: by the day a decision takes effect,
#: then by when it was taken (a late decision about an earlier day never outranks a later day).
RANK = (DecisionRow.effective_date, DecisionRow.decided_at, DecisionRow.id)


def rank(row: DecisionRow) -> tuple[date, datetime, int]:
    return (row.effective_date, row.decided_at, row.id)


def policy_owners(session: Session) -> dict[str, str | None]:
    """Every policy name not active now -> the active policy its decisions count for.

    A name replaced by another (``activate_ruleset(..., replaces=...)``) counts for the policy
    that replaced it (followed along a chain of replacements); a name stopped on the Policies
    page (``ruleset.retire``) for none; any other name no longer active (a policy replaced
    before several policies could run, decisions recorded before any ruleset was active) for
    the lead policy. The last of these events of a name decides. Read once per session."""
    active = [r.name for r in active_rulesets(session=session)]
    key = ("policy_owners", tuple(active))
    cached = session.info.get(key)
    if cached is not None:
        return dict(cached)
    inactive = set(session.scalars(select(RulesetRow.name).distinct())) - set(active)
    inactive |= set(session.scalars(select(DecisionRow.policy).distinct())) - set(active)
    fate: dict[str, str | None] = {}  # name -> the name that replaced it, None: stopped
    if inactive and active:
        for action, subject, details in session.execute(
            select(AuditEntry.action, AuditEntry.subject, AuditEntry.details)
            .where(AuditEntry.action.in_(("ruleset.activate", "ruleset.retire")))
            .order_by(AuditEntry.id)
        ):
            name = str((details or {}).get("policy") or subject.rsplit(" ", 1)[0])
            if action == "ruleset.retire":
                fate[name] = None
            else:
                fate.pop(name, None)  # active again: a later event decides anew
                replaced = (details or {}).get("replaces")
                if replaced:
                    fate[str(replaced)] = name
    owners: dict[str, str | None] = {}
    for name in inactive:
        seen, at = set(), name
        while at not in active and at in fate and at not in seen:
            seen.add(at)
            nxt = fate[at]
            if nxt is None:
                break
            at = nxt
        owners[name] = at if at in active else (
            None if at in fate and fate[at] is None else active[0] if active else None)
    session.info[key] = dict(owners)
    return owners


def policy_condition(session: Session, policy: str | None) -> ColumnElement[bool]:
    """Which decisions belong to ``policy`` (the lead policy when None): its own, and those of
    the policies no longer active that count for it (:func:`policy_owners`). With no active
    policy: every decision; with one, every decision but those of stopped policies."""
    names = [r.name for r in active_rulesets(session=session)]
    if not names:
        return true()
    name = names[0] if policy is None else policy
    mine = {name} | {n for n, owner in policy_owners(session).items() if owner == name}
    return DecisionRow.policy.in_(sorted(mine))


def decisions_by_region(
    session: Session, published_only: bool, policy: str | None = None
) -> dict[int, list[DecisionRow]]:
    """Decisions of ``policy`` (:func:`policy_condition`) per region id, lowest rank first
    (:data:`RANK`)."""
    query = select(DecisionRow).where(policy_condition(session, policy)).order_by(*RANK)
    if published_only:
        query = query.where(DecisionRow.published_at.is_not(None))
    out: dict[int, list[DecisionRow]] = {}
    for row in session.scalars(query):
        out.setdefault(row.region_id, []).append(row)
    return out


def _since(rows: list[DecisionRow]) -> date:
    """Effective date of the first decision of the trailing run at the newest tier."""
    since = rows[-1].effective_date
    for row in reversed(rows):
        if row.tier != rows[-1].tier:
            break
        since = row.effective_date
    return since


def official_tiers(
    *, session: Session, published_only: bool = True, policy: str | None = None
) -> dict[str, OfficialTier]:
    """Official tier under ``policy`` (the lead policy when None) of every district that has
    one, by region code.

    Each is named under the ruleset it was decided under (:mod:`server.services.tiers`), so
    a tier the active policy does not have (after a policy change) keeps its name."""
    regions = {r.id: r for r in session.scalars(select(Region))}
    decisions = decisions_by_region(session, published_only, policy)
    scales = decision_scales(session=session, rows=[rows[-1] for rows in decisions.values()])
    out = {}
    for region_id, rows in decisions.items():
        last = rows[-1]
        region = regions[region_id]
        scale = scales[last.id]
        out[region.code] = OfficialTier(
            region=region.code, name=region.name, tier=last.tier,
            tier_name=scale.name(last.tier), public_text=scale.public(last.tier),
            since=_since(rows), published_at=last.published_at, decision_id=last.id,
            ruleset_id=scale.ruleset_id, ruleset_label=scale.label, policy=last.policy,
        )
    return out


def decision_history(
    *, session: Session, region: str | None = None, limit: int | None = None,
    unpublished_only: bool = False, policy: str | None = None,
) -> list[DecisionRecord]:
    """Every decision, newest first (of one district when ``region`` is given, only the
    unpublished ones with ``unpublished_only``, of one policy (:func:`policy_condition`) when
    ``policy`` is given; at most ``limit`` when given). Tiers are named under the ruleset each
    decision was made under (:mod:`server.services.tiers`); imported decisions are looked up
    under ``policy``'s active ruleset (the lead's when None)."""
    active = active_ruleset(session=session, policy=policy)
    active_id = -1 if active is None else active.id
    # only the active rulesets' assessments are linked (their explanation pages exist)
    linked = {r.id for r in active_rulesets(session=session)} | {active_id}
    query = (
        select(DecisionRow, Region.code, Region.name, User.name, Assessment.recommended_tier,
               Assessment.ref_date, Assessment.data_cutoff, Assessment.ruleset_id)
        .join(Region, Region.id == DecisionRow.region_id)
        .outerjoin(User, User.id == DecisionRow.decided_by)
        .outerjoin(Assessment, Assessment.id == DecisionRow.assessment_id)
        .order_by(DecisionRow.decided_at.desc(), DecisionRow.id.desc())
    )
    if region is not None:
        query = query.where(Region.code == region)
    if unpublished_only:
        query = query.where(DecisionRow.published_at.is_(None))
    if policy is not None:
        query = query.where(policy_condition(session, policy))
    if limit is not None:
        query = query.limit(limit)
    found = session.execute(query).all()
    scales = decision_scales(session=session, rows=[r[0] for r in found])
    # imported decisions are looked up under the policy's ruleset: those of another active
    # policy than ``active`` are left as they are
    others = {r.name for r in active_rulesets(session=session)} - (
        set() if active is None else {active.name})
    looked_up = _recommended_when_taken(
        session, active_id,
        [r[0] for r in found if r[0].assessment_id is None and r[0].policy not in others])
    out = []
    for row, code, name, user, recommended, day, cutoff, ruleset_id in found:
        later = False
        if row.assessment_id is None and row.id in looked_up:
            recommended, day, cutoff, later = looked_up[row.id]
            ruleset_id = active_id
            name_of = tier_name(parsed(active) if active else None, recommended)
        else:
            name_of = "" if recommended is None else scales[row.id].name(recommended)
        out.append(DecisionRecord(
            id=row.id, region=code, name=name, tier=row.tier,
            tier_name=scales[row.id].name(row.tier), recommended_tier=recommended,
            recommended_name=name_of,
            kind=row.kind, reason=row.reason, user=user or "", decided_at=row.decided_at,
            effective_date=row.effective_date, published_at=row.published_at,
            assessment_day=day if ruleset_id in linked else None,
            assessment_cutoff=cutoff if ruleset_id in linked else None,
            recommended_looked_up=row.assessment_id is None and row.id in looked_up,
            recommended_later=later, policy=row.policy,
        ))
    return out


def _recommended_when_taken(
    session: Session, ruleset_id: int, rows: list[DecisionRow]
) -> dict[int, tuple[int, date, datetime, bool]]:
    """For decisions that answered no assessment (imported ``recorded`` ones): decision id ->
    (recommended tier, day, data cutoff, first assessed after the decision) of the active
    ruleset's assessment of the day the decision was taken (its ``decided_at`` in UTC, at the
    latest the day before it took effect), as known at ``decided_at``: the row with the greatest
    data cutoff not after it, else (the day was assessed only later) the first row of the day.
    Decisions whose day has no assessment are left out."""
    if not rows or ruleset_id < 0:
        return {}
    def day_of(r: DecisionRow) -> date:
        return min(r.decided_at.astimezone(UTC).date(), r.effective_date - timedelta(days=1))
    wanted = {(r.region_id, day_of(r)) for r in rows}
    found = session.execute(
        select(Assessment.region_id, Assessment.ref_date, Assessment.data_cutoff,
               Assessment.recommended_tier)
        .where(Assessment.ruleset_id == ruleset_id,
               Assessment.region_id.in_(sorted({k[0] for k in wanted})),
               Assessment.ref_date.in_(sorted({k[1] for k in wanted})))
        .order_by(Assessment.data_cutoff)
    ).all()
    by_key: dict[tuple[int, date], list[tuple[datetime, int]]] = {}
    for region_id, day, cutoff, tier in found:
        if (region_id, day) in wanted:
            by_key.setdefault((region_id, day), []).append((cutoff, tier))
    out = {}
    for r in rows:
        day = day_of(r)
        versions = by_key.get((r.region_id, day))
        if not versions:
            continue
        known = [v for v in versions if v[0] <= r.decided_at]
        cutoff, tier = known[-1] if known else versions[0]
        out[r.id] = (tier, day, cutoff, not known)
    return out
