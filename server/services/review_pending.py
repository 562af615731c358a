"""Read model: the current run's recommendations and the changes awaiting a decision.

A *pending change* is a district whose newest recommended tier (active ruleset, newest
evaluation run, last day) differs from its official tier and that no one has decided on since
the recommendation took its current value (:func:`current_run` gives each district's current
recommendation and the day it took that value). Each active policy has its own pending changes,
against its own official tiers (:func:`server.services.review_official.policy_condition`).

A recommendation of *insufficient data* (tier -1: a gate failed) is a pending change too, since
the data no longer support the official tier (:func:`server.services.review_decisions.decide`
says how confirming it settles the district).
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date

from sqlalchemy import func, or_, select
from sqlalchemy.orm import Session, aliased

from rules import Ruleset
from rules.record import stored_sentence
from server.services.assessments import LatestItem, LatestRun, assessments_as_of, newest_run
from server.services.review_official import decisions_by_region
from server.services.ruleset_cache import parsed
from server.services.rulesets import active_rulesets
from server.services.tiers import Scale, decision_scales, tier_label, tier_name
from server.store.models import Assessment, Region
from server.store.models import Decision as DecisionRow


@dataclass(frozen=True, kw_only=True)
class PendingChange:
    """A recommendation that differs from the official tier and awaits a decision."""

    region: str
    name: str
    official_tier: int | None
    official_name: str
    recommended_tier: int
    recommended_name: str
    since: date
    assessment_id: int
    sentence: str
    #: The decision that set the official tier (None: never decided); a decision form sends it
    #: back with the tier, so a decision taken meanwhile is noticed (409).
    official_decision_id: int | None = None
    #: How the active policy takes over an official tier decided under another ruleset
    #: (empty when it was decided under the active one).
    official_note: str = ""
    #: The policy (ruleset name) the change belongs to.
    policy: str = ""


def _takeover(scale: Scale, tier: int, active: Ruleset, active_id: int, active_label: str) -> str:
    """How the active policy takes over an official tier decided under another ruleset."""
    if scale.ruleset_id == active_id:
        return ""
    under = f" under {scale.label}" if scale.label else " (ruleset not known)"
    return (
        f"Official: {tier_label(scale.ruleset, tier)}{under}; the active policy {active_label} "
        f"has tiers 0–{active.top_tier}: the next decision will be on its scale"
    )


def current_run(*, session: Session, policy: str | None = None) -> LatestRun | None:
    """Each district's current recommendation under the newest run of ``policy``'s active
    ruleset (the lead policy's when None), and the day it took that value, without reading
    every day of the history.

    A district's current recommendation starts on its newest *transition* in force at the run:
    the newest row (greatest day, as of the run's cutoff) whose ``previous_tier`` differs from
    its ``recommended_tier``. Rows stay consistent across runs (a run that changes a day's tier
    changes the next day's ``previous_tier``, so it stores that day anew), so this is the first
    day of the trailing run of days with the current tier; with no transition in force it is the
    district's first assessed day. Transitions are few, and checking that one is still in force
    (no newer row of its day up to the cutoff) is one index probe each.
    """
    newest = newest_run(session=session, policy=policy)
    if newest is None:
        return None
    row, run = newest
    cutoff, last_day = run.data_cutoff, run.last_day
    query = assessments_as_of(
        select(Region.id, Region.code, Region.name, Assessment)
        .join(Region, Region.id == Assessment.region_id),
        ruleset_id=row.id, cutoff=cutoff, start=last_day, end=last_day,
    ).order_by(Region.code)
    found = session.execute(query).all()
    a, b = Assessment, aliased(Assessment)
    superseded = (
        select(b.id).where(
            b.ruleset_id == a.ruleset_id, b.region_id == a.region_id, b.ref_date == a.ref_date,
            b.data_cutoff > a.data_cutoff, b.data_cutoff <= cutoff,
        ).exists()
    )
    transitions = session.execute(
        select(a.region_id, func.max(a.ref_date))
        .where(
            a.ruleset_id == row.id, a.data_cutoff <= cutoff, a.ref_date <= last_day,
            or_(a.previous_tier.is_(None), a.previous_tier != a.recommended_tier),
            ~superseded,
        )
        .group_by(a.region_id)
    ).all()
    since: dict[int, date] = dict(transitions)
    missing = [rid for rid, *_ in found if rid not in since]
    if missing:
        first = (
            select(func.min(a.ref_date))
            .where(a.ruleset_id == row.id, a.region_id == Region.id, a.data_cutoff <= cutoff)
            .scalar_subquery()
        )
        since.update(session.execute(
            select(Region.id, first).where(Region.id.in_(missing))
        ).all())
    items = tuple(
        LatestItem(region_id=rid, code=code, name=name, assessment=item, since=since[rid])
        for rid, code, name, item in found
    )
    return LatestRun(
        ruleset_row=row, ruleset=parsed(row), data_cutoff=cutoff, last_day=last_day,
        items=items,
    )


def pending_changes(*, session: Session, policy: str | None = None) -> list[PendingChange]:
    """Districts whose newest recommendation differs from their latest decision: of ``policy``
    when given, else of every active policy (in :func:`active_rulesets` order), each by code.

    A district stays settled after a decision on a recommendation until the recommendation
    changes again (an override that keeps the tier is not asked again every day).
    """
    names = [policy] if policy is not None else [
        r.name for r in active_rulesets(session=session)]
    return [change for name in names for change in _pending_of(session, name)]


def _pending_of(session: Session, policy: str) -> list[PendingChange]:
    latest = current_run(session=session, policy=policy)
    if latest is None:
        return []
    decisions = decisions_by_region(session, published_only=False, policy=policy)
    answered = _answered_assessments(session, decisions)
    scales = decision_scales(session=session, rows=[rows[-1] for rows in decisions.values()])
    active_row = latest.ruleset_row
    active_label = f"{active_row.name} {active_row.version}"
    out = []
    for item in latest.items:
        rows = decisions.get(item.region_id, [])
        last = rows[-1] if rows else None
        official = last.tier if last is not None else None
        if item.assessment.recommended_tier == official:
            continue
        last_answer = answered.get(item.region_id)
        if (
            last_answer is not None
            and last_answer[1] == item.assessment.recommended_tier
            and last_answer[0] >= item.since
        ):
            continue
        scale = scales[last.id] if last is not None else None
        out.append(
            PendingChange(
                region=item.code, name=item.name, official_tier=official,
                official_name="" if official is None or scale is None else scale.name(official),
                recommended_tier=item.assessment.recommended_tier,
                recommended_name=tier_name(latest.ruleset, item.assessment.recommended_tier),
                since=item.since, assessment_id=item.assessment.id,
                sentence=stored_sentence(item.assessment.explanation),
                official_decision_id=None if last is None else last.id,
                official_note="" if official is None or scale is None else _takeover(
                    scale, official, latest.ruleset, active_row.id, active_label),
                policy=active_row.name,
            )
        )
    return sorted(out, key=lambda p: p.region)


def _answered_assessments(
    session: Session, decisions: dict[int, list[DecisionRow]]
) -> dict[int, tuple[date, int]]:
    """Per region: (day, recommended tier) of the assessment its latest decision answered."""
    ids = {rows[-1].assessment_id: rid for rid, rows in decisions.items() if rows[-1].assessment_id}
    if not ids:
        return {}
    query = select(Assessment.id, Assessment.ref_date, Assessment.recommended_tier).where(
        Assessment.id.in_(list(ids))
    )
    return {ids[aid]: (day, tier) for aid, day, tier in session.execute(query)}
