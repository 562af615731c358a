"""Use case: the review-queue page: pending changes, unpublished decisions, history, tier names."""

from __future__ import annotations

from dataclasses import dataclass

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from server.readmodels.review_cards import ReviewCard, review_cards
from server.services.review_official import DecisionRecord, decision_history, policy_condition
from server.services.review_pending import PendingChange, pending_changes
from server.services.review_publication import has_something_to_publish
from server.services.ruleset_cache import parsed
from server.services.rulesets import active_rulesets, require_policy
from server.store.models import Decision as DecisionRow
from server.store.models import Region

__all__ = ["HISTORY_LIMIT", "ReviewQueue", "review_queue"]

#: Decisions the review page lists unless asked for all of them.
HISTORY_LIMIT = 30


@dataclass(frozen=True, kw_only=True)
class ReviewQueue:
    """What the review page shows.

    ``history`` is newest first: at most :data:`HISTORY_LIMIT` unless ``history_all``, of one
    district when ``history_region`` is set; ``history_total`` counts the decisions the same
    filter matches; ``history_regions`` are the (code, name) pairs with a decision, for the filter.
    """

    pending: tuple[PendingChange, ...]
    #: one card per pending change, same order: the change, its day and its reasons
    cards: tuple[ReviewCard, ...]
    unpublished: tuple[DecisionRecord, ...]
    publishable: bool
    history: tuple[DecisionRecord, ...]
    history_total: int
    history_all: bool
    history_region: str | None
    history_regions: tuple[tuple[str, str], ...]
    tier_names: tuple[str, ...]
    #: every active policy (lead first) with its tier names; the pending changes carry theirs
    policies: tuple[tuple[str, tuple[str, ...]], ...] = ()
    #: the policy the page is restricted to (None: every policy)
    policy: str | None = None
    #: per policy: whether publishing it alone would publish anything
    publishable_policies: tuple[str, ...] = ()

    def tier_names_of(self, policy: str) -> tuple[str, ...]:
        """The tier names of ``policy`` (the lead's when it is not active)."""
        return dict(self.policies).get(policy, self.tier_names)


def review_queue(
    *, session: Session, show_all: bool = False, region: str | None = None,
    history_limit: int = HISTORY_LIMIT, policy: str | None = None,
) -> ReviewQueue:
    """What the review page shows (see :class:`ReviewQueue`), of one active ``policy`` or of
    all; an unknown ``region`` filters to nothing.

    Raises :class:`server.services.rulesets.InactivePolicyError` for a policy not active."""
    row = require_policy(session=session, policy=policy)
    names = tuple(t.name for t in parsed(row).tiers) if row is not None else ()
    actives = active_rulesets(session=session)
    policies = tuple((r.name, tuple(t.name for t in parsed(r).tiers)) for r in actives)
    unpublished = tuple(decision_history(session=session, unpublished_only=True, policy=policy))
    history = decision_history(
        session=session, region=region or None, limit=None if show_all else history_limit,
        policy=policy,
    )
    regions = tuple(
        (code, name) for code, name in session.execute(
            select(Region.code, Region.name)
            .where(Region.id.in_(select(DecisionRow.region_id).distinct()))
            .order_by(Region.code)
        )
    )
    count = select(func.count()).select_from(DecisionRow)
    if policy is not None:
        count = count.where(policy_condition(session, policy))
    if region:
        count = count.join(Region, Region.id == DecisionRow.region_id).where(Region.code == region)
    total = session.scalar(count) or 0
    pending = tuple(pending_changes(session=session, policy=policy))
    several = len(actives) > 1
    return ReviewQueue(
        pending=pending, cards=review_cards(session=session, pending=pending),
        unpublished=unpublished,
        publishable=has_something_to_publish(session=session, policy=policy),
        history=tuple(history), history_total=total, history_all=show_all,
        history_region=region or None, history_regions=regions, tier_names=names,
        policies=policies, policy=policy,
        publishable_policies=tuple(
            r.name for r in actives
            if several and has_something_to_publish(session=session, policy=r.name)),
    )
