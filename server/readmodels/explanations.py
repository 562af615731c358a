"""Which stored assessment explains a district's day, read as one typed record, and what later
data changed about it.

Assessments are stored change-only per evaluation run (:mod:`server.services.evaluation`): for a
district and day there is a row for every run whose result differed from the one before. The
assessment *made for* a day is the first of them, the one computed when that day was first
assessed, from the data as they were then; later rows are the same day re-read with revised
data. :func:`explained_day` reads that first row by default (or the row in force at a given
cutoff) and returns it as a :class:`ExplainedDay`: the typed record of its explanation
(:func:`rules.record.read_explanation`) plus the criteria its sentence rests on, read at the
row's own cutoff, so a headline, its sentence and a table of criteria all come from the data of
one evaluation. :func:`revised_since` compares it with the newest run's reading of the same day,
criterion by criterion, through the one formatter of :mod:`rules.formatting`.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC, date, datetime

from sqlalchemy import select
from sqlalchemy.orm import Session

from rules import Ruleset
from rules.formatting import reading_text
from rules.record import CriterionState, ExplanationRecord, read_explanation, stored_criteria
from server.services.assessments import assessments_as_of
from server.store.models import Assessment

__all__ = [
    "CriterionRevision",
    "ExplainedDay",
    "RevisedSince",
    "explained_day",
    "record_of",
    "revised_since",
]


@dataclass(frozen=True, kw_only=True)
class ExplainedDay:
    """One stored assessment of a district and day, as a typed record.

    ``basis`` are the criteria the sentence describes: those of ``basis_day`` (the day a move
    was decided, else the day itself) as known at ``data_cutoff``, the same evaluation's data.
    ``first`` says whether this is the assessment made for the day (its first stored row).
    """

    assessment_id: int
    ruleset_id: int
    region_id: int
    day: date
    data_cutoff: datetime
    created_at: datetime
    recommended_tier: int
    previous_tier: int | None
    record: ExplanationRecord
    basis_day: date
    basis: tuple[CriterionState, ...]
    first: bool


@dataclass(frozen=True, kw_only=True)
class CriterionRevision:
    """A criterion whose reading changed with later data (texts from the one formatter)."""

    label: str
    old: str
    new: str
    old_level: int
    new_level: int


@dataclass(frozen=True, kw_only=True)
class RevisedSince:
    """How the newest evaluation reads the same day.

    ``newest_cutoff`` is the own cutoff of the newest row for the day (the newest run may have
    kept it unchanged from an earlier one); ``criteria`` lists only the criteria whose text
    changed (value, interval and unit as written by :func:`rules.formatting.reading_text`).
    """

    newest_assessment_id: int
    newest_cutoff: datetime
    tier_then: int
    tier_now: int
    criteria: tuple[CriterionRevision, ...]

    @property
    def nothing_changed(self) -> bool:
        """A newer row, but no criterion reads differently and the tier is the same."""
        return not self.criteria and self.tier_then == self.tier_now


def _aware(value: datetime) -> datetime:
    return value if value.tzinfo is not None else value.replace(tzinfo=UTC)


def _rows_of_day(session: Session, *, ruleset_id: int, region_id: int, day: date,
                 cutoff: datetime) -> list[Assessment]:
    """Every stored row of the district and day up to ``cutoff``, oldest cutoff first."""
    return list(session.scalars(
        select(Assessment).where(
            Assessment.ruleset_id == ruleset_id, Assessment.region_id == region_id,
            Assessment.ref_date == day, Assessment.data_cutoff <= cutoff,
        ).order_by(Assessment.data_cutoff)
    ))


def _criteria_on(session: Session, *, ruleset_id: int, region_id: int, day: date,
                 cutoff: datetime) -> tuple[CriterionState, ...] | None:
    """The criteria of ``day`` as known at ``cutoff`` (None: no row)."""
    row = session.scalars(assessments_as_of(
        select(Assessment), ruleset_id=ruleset_id, cutoff=cutoff, region_id=region_id,
        start=day, end=day,
    )).first()
    if row is None:
        return None
    return stored_criteria(row.explanation)


def record_of(session: Session, row: Assessment, *, first: bool) -> ExplainedDay:
    """``row`` as an :class:`ExplainedDay`; the basis criteria are read at the row's cutoff."""
    record = read_explanation(row.explanation, tier=row.recommended_tier)
    basis_day, basis = record.basis_day, record.criteria
    if basis_day != row.ref_date:
        found = _criteria_on(session, ruleset_id=row.ruleset_id, region_id=row.region_id,
                             day=basis_day, cutoff=row.data_cutoff)
        if found is None:  # the decision day is not stored (older data): the day's own
            basis_day = row.ref_date
        else:
            basis = found
    return ExplainedDay(
        assessment_id=row.id, ruleset_id=row.ruleset_id, region_id=row.region_id,
        day=row.ref_date, data_cutoff=row.data_cutoff, created_at=row.created_at,
        recommended_tier=row.recommended_tier, previous_tier=row.previous_tier, record=record,
        basis_day=basis_day, basis=basis, first=first,
    )


def explained_day(
    *, session: Session, ruleset_id: int, region_id: int, day: date, run_cutoff: datetime,
    as_of: datetime | None = None,
) -> ExplainedDay | None:
    """The assessment made for ``day`` (its first stored row up to ``run_cutoff``), or with
    ``as_of`` the row in force at that cutoff (never later than ``run_cutoff``); None when the
    day has no row there."""
    rows = _rows_of_day(session, ruleset_id=ruleset_id, region_id=region_id, day=day,
                        cutoff=run_cutoff)
    if as_of is not None:
        limit = _aware(as_of)
        rows_then = [r for r in rows if r.data_cutoff <= limit]
        if not rows_then:
            return None
        return record_of(session, rows_then[-1], first=rows_then[-1].id == rows[0].id)
    if not rows:
        return None
    return record_of(session, rows[0], first=True)


def _reading(ruleset: Ruleset, c: CriterionState) -> str:
    return reading_text(ruleset.indicator(c.indicator), c.value, c.lower, c.upper)


def revised_since(
    *, session: Session, ruleset: Ruleset, shown: ExplainedDay, run_cutoff: datetime
) -> RevisedSince | None:
    """The newest run's reading of ``shown.day`` compared with ``shown``: the criteria of
    ``shown.basis_day`` whose text changed, and the tier then and now. None when the newest
    reading is ``shown`` itself."""
    newest = explained_day(session=session, ruleset_id=shown.ruleset_id,
                           region_id=shown.region_id, day=shown.day, run_cutoff=run_cutoff,
                           as_of=run_cutoff)
    if newest is None or newest.assessment_id == shown.assessment_id:
        return None
    if newest.basis_day == shown.basis_day:
        now = newest.basis
    elif newest.day == shown.basis_day:
        now = newest.record.criteria
    else:
        now = _criteria_on(session, ruleset_id=shown.ruleset_id, region_id=shown.region_id,
                           day=shown.basis_day, cutoff=run_cutoff) or ()
    by_id = {c.id: c for c in now}
    changes = []
    for old in shown.basis:
        new = by_id.get(old.id)
        if new is None:
            continue
        before, after = _reading(ruleset, old), _reading(ruleset, new)
        if before != after or old.level != new.level:
            changes.append(CriterionRevision(label=old.label, old=before, new=after,
                                             old_level=old.level, new_level=new.level))
    return RevisedSince(
        newest_assessment_id=newest.assessment_id, newest_cutoff=newest.data_cutoff,
        tier_then=shown.recommended_tier, tier_now=newest.recommended_tier,
        criteria=tuple(changes),
    )
