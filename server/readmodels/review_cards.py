"""Use case: what each review card says about the change it asks a decision on.

A pending change (:func:`server.services.review.pending_changes`) is a district whose current
recommendation differs from its official tier. Its card explains the change itself, not today's
assessment: the day the recommendation took its current value (``since``, from
:func:`server.services.review.current_run`), that day's assessment and its reasons, and how many
days the recommendation has held since. The assessment shown is the one made for that day, from
the data as they were then (its first stored row), when it already recommended the change;
otherwise, when the change only showed with later data, the row in force at the newest run.
"Full explanation" opens the explanation page of that day at that row's cutoff
(:func:`server.readmodels.dossier.explanation_page` with ``as_of``), so card and page read the same
record.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from datetime import date, datetime

from sqlalchemy import select
from sqlalchemy.orm import Session

from rules.record import read_explanation
from server.services.assessments import newest_run
from server.services.review_pending import PendingChange
from server.store.models import Assessment, Region

__all__ = ["ReviewCard", "review_cards"]


@dataclass(frozen=True, kw_only=True)
class ReviewCard:
    """One pending change as its card shows it.

    ``changed_on`` is the first day of the current recommendation; ``days_held`` counts the days
    from it through ``last_day`` (the newest assessed day), both included. ``sentence`` is the
    explanation of ``changed_on`` from the row computed at ``data_cutoff``; ``first`` says it is
    the assessment made for that day (not a later reading).
    """

    pending: PendingChange
    changed_on: date
    last_day: date
    days_held: int
    sentence: str
    data_cutoff: datetime
    first: bool


def _change_row(rows: list[Assessment], tier: int) -> tuple[Assessment, bool]:
    """The row a card explains, from a day's rows (oldest cutoff first): the first row when it
    moved to ``tier``, else the newest (the change showed only with later data)."""
    first = rows[0]
    moved = first.recommended_tier == tier and first.previous_tier != tier
    return (first, True) if moved else (rows[-1], len(rows) == 1)


def review_cards(*, session: Session, pending: Sequence[PendingChange]) -> tuple[ReviewCard, ...]:
    """A card for each of ``pending`` (same order): the change, its day and its reasons, each
    read under its own policy's newest run."""
    groups: dict[str, list[PendingChange]] = {}
    for p in pending:
        groups.setdefault(p.policy, []).append(p)
    made = {id(card.pending): card for policy, group in groups.items()
            for card in _cards(session, group, policy or None)}
    return tuple(made[id(p)] for p in pending if id(p) in made)


def _cards(
    session: Session, pending: Sequence[PendingChange], policy: str | None
) -> tuple[ReviewCard, ...]:
    newest = newest_run(session=session, policy=policy)
    if newest is None or not pending:
        return ()
    row, run = newest
    codes = {p.region for p in pending}
    days = {p.since for p in pending}
    found = session.execute(
        select(Region.code, Assessment)
        .join(Region, Region.id == Assessment.region_id)
        .where(Assessment.ruleset_id == row.id, Region.code.in_(codes),
               Assessment.ref_date.in_(days), Assessment.data_cutoff <= run.data_cutoff)
        .order_by(Assessment.data_cutoff)
    ).all()
    rows: dict[tuple[str, date], list[Assessment]] = {}
    for code, a in found:
        rows.setdefault((code, a.ref_date), []).append(a)
    cards = []
    for p in pending:
        of_day = rows.get((p.region, p.since))
        if not of_day:  # no row of that day under the active ruleset: the current one
            current = session.get(Assessment, p.assessment_id)
            if current is None:
                continue
            chosen, first = current, False
        else:
            chosen, first = _change_row(of_day, p.recommended_tier)
        record = read_explanation(chosen.explanation, tier=chosen.recommended_tier)
        cards.append(ReviewCard(
            pending=p, changed_on=chosen.ref_date, last_day=run.last_day,
            days_held=(run.last_day - chosen.ref_date).days + 1,
            sentence=record.sentence, data_cutoff=chosen.data_cutoff, first=first,
        ))
    return tuple(cards)
