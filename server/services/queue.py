"""Use case: the review-queue page: pending changes, unpublished decisions, history, tier names."""

from __future__ import annotations

from dataclasses import dataclass

from sqlalchemy.orm import Session

from server.services.evaluation import active_ruleset
from server.services.policies import parsed
from server.services.review import (
    DecisionRecord,
    PendingChange,
    decision_history,
    pending_changes,
)

__all__ = ["ReviewQueue", "review_queue"]


@dataclass(frozen=True, kw_only=True)
class ReviewQueue:
    pending: tuple[PendingChange, ...]
    unpublished: tuple[DecisionRecord, ...]
    history: tuple[DecisionRecord, ...]
    tier_names: tuple[str, ...]


def review_queue(*, session: Session, history_limit: int = 200) -> ReviewQueue:
    """What the review page shows; the history is newest first, at most ``history_limit``."""
    history = decision_history(session=session)
    row = active_ruleset(session=session)
    names = tuple(t.name for t in parsed(row).tiers) if row is not None else ()
    return ReviewQueue(
        pending=tuple(pending_changes(session=session)),
        unpublished=tuple(h for h in history if h.published_at is None),
        history=tuple(history[:history_limit]), tier_names=names,
    )
