"""Use case: the staff district page and the explanation of one district and day.

The district page reads the stored assessments of the active ruleset as of its newest evaluation
run (for each day, the row with the greatest data cutoff not after the run's:
:func:`server.services.assessments.assessments_as_of`): each criterion's value, interval and the
enter/exit thresholds in force on each day (conditions and overrides included, exactly as the
engine used them), the recommended tier, prepare signals, and the official tier from the
decisions. Revisions show the values of recent days as known on different mornings, from the
store's vintages.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from datetime import date, datetime, timedelta
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session, aliased

from rules import Ruleset
from rules.formatting import interval_text, value_text
from rules.hysteresis import NEVER_CHANGED
from rules.record import CriterionState, stored_criteria, stored_sentence
from server.readmodels.explanations import RevisedSince, explained_day, revised_since
from server.readmodels.policy_columns import assessed_regions, policy_level
from server.services.assessments import assessments_as_of, newest_run_of
from server.services.district_data import store_measures
from server.services.district_nowcasts import NowcastSeries, district_nowcast
from server.services.errors import ServiceError
from server.services.forecast_record import RecordLine, record_lines
from server.services.level_data import area_figures
from server.services.nowcast_scores import nowcast_accuracy_report
from server.services.review_official import policy_condition
from server.services.ruleset_cache import parsed
from server.services.rulesets import active_rulesets, require_policy
from server.services.tiers import decision_scales, tier_label, tier_name
from server.store import revision_history
from server.store.models import Assessment, Decision, Region
from server.store.models import Ruleset as RulesetRow

__all__ = [
    "CriterionSeries",
    "DistrictDossier",
    "ExplanationPage",
    "ExplainedCriterion",
    "NoAssessmentError",
    "PeriodError",
    "RevisionRow",
    "district_dossier",
    "explanation_page",
]

REVISION_DAYS = 7
REVISION_MEASURE = "cases"
#: Mornings the district page scores the nowcast over (about half a year).
NOWCAST_MORNINGS = 182


class NoAssessmentError(ServiceError, LookupError):
    def __init__(self, code: str, day: date | None) -> None:
        when = f" on {day}" if day else ""
        super().__init__(f"no assessment of district {code!r}{when} under the active ruleset")


class PeriodError(ServiceError, ValueError):
    """A requested period that ends before it starts (the page answers 422)."""

    def __init__(self, start: date, end: date) -> None:
        self.start = start
        self.end = end
        super().__init__(f"start {start.isoformat()} is after end {end.isoformat()}")


def check_period(start: date | None, end: date | None) -> None:
    """Refuse ``start > end`` when both are given (either may be left open)."""
    if start is not None and end is not None and start > end:
        raise PeriodError(start, end)


@dataclass(frozen=True, kw_only=True)
class CriterionSeries:
    """One criterion over the period; thresholds are (tiers, days), None where not reachable."""

    id: str
    label: str
    unit: str
    decimals: int
    dates: tuple[date, ...]
    value: tuple[float | None, ...]
    lower: tuple[float | None, ...]
    upper: tuple[float | None, ...]
    enter: tuple[tuple[float | None, ...], ...]
    exit: tuple[tuple[float | None, ...], ...]
    #: the name of the district's area when the value is the area's figure (ICU beds are
    #: reported per area: :func:`server.services.level_data.area_figures`)
    area: str | None = None


@dataclass(frozen=True, kw_only=True)
class RevisionRow:
    ref_date: date
    values: tuple[tuple[datetime, float], ...]


@dataclass(frozen=True, kw_only=True)
class DistrictDossier:
    code: str
    name: str
    area: str | None
    population: int
    ruleset: str
    tier_names: tuple[str, ...]
    start: date
    end: date
    first_day: date
    last_day: date
    criteria: tuple[CriterionSeries, ...]
    dates: tuple[date, ...]
    recommended: tuple[int, ...]
    official: tuple[int | None, ...]
    prepare_days: tuple[tuple[date, str], ...]
    revisions: tuple[RevisionRow, ...]
    sentence: str
    #: the day ``sentence`` describes: the period's last assessed day (None: no assessment)
    sentence_day: date | None = None
    #: newest days of cases, reported and nowcast, as known at the run's cutoff
    nowcast: NowcastSeries | None = None
    #: accuracy of the nowcast of the last 7 days over the last NOWCAST_MORNINGS mornings
    nowcast_accuracy: str | None = None
    #: the forecast record of the district and of its area (staff/_forecast_record.html)
    forecast_record: tuple[RecordLine, ...] = ()
    #: the policy shown (a ruleset name) and every active policy, the lead first
    policy: str = ""
    policies: tuple[str, ...] = ()
    #: the area whose tiers these are, when the policy assesses areas (else None)
    assessed_area: str | None = None
    #: code of the district's area (its page: breaks summed over the area's districts)
    area_code: str | None = None


def _region(session: Session, code: str) -> tuple[Region, str | None]:
    parent = aliased(Region)
    row = session.execute(
        select(Region, parent.name).outerjoin(parent, parent.id == Region.parent_id)
        .where(Region.code == code, Region.level == "district")
    ).first()
    if row is None:
        raise NoAssessmentError(code, None)
    return row[0], row[1]


def _cutoff(session: Session, ruleset_id: int) -> datetime | None:
    """Data cutoff of the newest evaluation run of ``ruleset_id`` (None: never evaluated)."""
    run = newest_run_of(session=session, ruleset_id=ruleset_id)
    return None if run is None else run.data_cutoff


def _assessed(session: Session, region: Region, row: RulesetRow) -> tuple[int, str | None]:
    """The region whose assessments a district shows under ``row`` (the region above it at the
    policy's level, :func:`~server.readmodels.policy_columns.assessed_regions`) and that region's
    name (None: the district itself)."""
    level = policy_level(parsed(row))
    if level != "districts":
        found = assessed_regions(session=session, level=level).get(region.code)
        if found is not None:
            return found.id, found.name
    return region.id, None


@dataclass(frozen=True)
class _Shown:
    """What both pages of a district start from: the district, its area, the policy's stored
    version and parsed ruleset, the newest run's cutoff, and the region assessed under the
    policy (the district or the region above it at the policy's level)."""

    region: Region
    area: str | None
    row: RulesetRow
    rs: Ruleset
    cutoff: datetime
    assessed: int
    assessed_area: str | None
    of_area: frozenset[str]


def _shown(session: Session, code: str, policy: str | None, day: date | None) -> _Shown:
    """Raises :class:`NoAssessmentError` when the district is unknown or the policy never ran,
    :class:`~server.services.rulesets.InactivePolicyError` for a policy that is not active."""
    region, area = _region(session, code)
    row = require_policy(session=session, policy=policy)
    cutoff = _cutoff(session, row.id) if row else None
    if row is None or cutoff is None:
        raise NoAssessmentError(code, day)
    rs = parsed(row)
    assessed, assessed_area = _assessed(session, region, row)
    return _Shown(region=region, area=area, row=row, rs=rs, cutoff=cutoff, assessed=assessed,
                  assessed_area=assessed_area,
                  of_area=frozenset(area_figures(rs, store_measures(session=session))))


def _official_by_day(
    session: Session, region_id: int, days: list[date], policy: str | None = None
) -> list[int | None]:
    rows = session.execute(
        select(Decision.effective_date, Decision.tier)
        .where(Decision.region_id == region_id, Decision.published_at.is_not(None),
               policy_condition(session, policy))
        .order_by(Decision.effective_date, Decision.decided_at, Decision.id)
    ).all()
    out: list[int | None] = []
    i, current = 0, None
    for day in days:
        while i < len(rows) and rows[i][0] <= day:
            current = rows[i][1]
            i += 1
        out.append(current)
    return out


def _num(v: Any) -> float | None:
    return None if v is None or not math.isfinite(float(v)) else float(v)


def district_dossier(
    *, session: Session, code: str, start: date | None = None, end: date | None = None,
    days: int = 120, policy: str | None = None,
) -> DistrictDossier:
    """Everything the staff district page shows, for ``start..end`` (default: the last ``days``),
    under ``policy`` (the lead policy when None).

    Raises :class:`PeriodError` when both ``start`` and ``end`` are given and ``start > end``,
    :class:`~server.services.rulesets.InactivePolicyError` for a policy that is not active.
    """
    check_period(start, end)
    shown = _shown(session, code, policy, None)
    region, area, row, rs, cutoff = shown.region, shown.area, shown.row, shown.rs, shown.cutoff
    of_area, assessed = shown.of_area, shown.assessed
    span = session.execute(assessments_as_of(
        select(func.min(Assessment.ref_date), func.max(Assessment.ref_date))
        .select_from(Assessment),
        ruleset_id=row.id, cutoff=cutoff, region_id=assessed,
    )).one()
    if span[0] is None:
        raise NoAssessmentError(code, None)
    first, last = span
    end = min(end or last, last)
    start = max(start or end - timedelta(days=days - 1), first)
    if start > end:
        start = end
    rows = list(session.scalars(assessments_as_of(
        select(Assessment), ruleset_id=row.id, cutoff=cutoff, region_id=assessed,
        start=start, end=end,
    ).order_by(Assessment.ref_date)))
    dates = [a.ref_date for a in rows]
    criteria = []
    stored = [{c.id: c for c in stored_criteria(a.explanation)} for a in rows]
    n = rs.n_tiers - 1
    for crit in rs.criteria:
        spec = rs.indicator(crit.indicator)
        items = [day.get(crit.id) for day in stored]

        def column(get: Callable[[CriterionState], float | None],
                   items: list[CriterionState | None] = items) -> tuple[float | None, ...]:
            return tuple(None if i is None else _num(get(i)) for i in items)

        criteria.append(CriterionSeries(
            id=crit.id, label=crit.label or spec.label, unit=spec.unit, decimals=spec.decimals,
            dates=tuple(dates), value=column(lambda i: i.value),
            lower=column(lambda i: i.lower), upper=column(lambda i: i.upper),
            enter=tuple(column(lambda i, t=t: i.enter[t] if t < len(i.enter) else None)
                        for t in range(n)),
            exit=tuple(column(lambda i, t=t: i.exit[t] if t < len(i.exit) else None)
                       for t in range(n)),
            area=area if crit.indicator in of_area else None,
        ))
    prepare = tuple((a.ref_date, sid) for a in rows for sid, on in a.prepare_signals.items() if on)
    revisions = tuple(
        RevisionRow(ref_date=day, values=tuple(
            (r.received_at, r.value)
            for r in revision_history(session=session, region=code, measure=REVISION_MEASURE,
                                      ref_date=day)
        ))
        for day in (last - timedelta(days=k) for k in range(REVISION_DAYS))
    )
    return DistrictDossier(
        code=region.code, name=region.name, area=area,
        area_code=session.scalar(select(Region.code).where(Region.id == region.parent_id)),
        population=int(region.population),
        ruleset=f"{row.name} {row.version}", tier_names=tuple(t.name for t in rs.tiers),
        start=start, end=end, first_day=first, last_day=last, criteria=tuple(criteria),
        dates=tuple(dates), recommended=tuple(a.recommended_tier for a in rows),
        official=tuple(_official_by_day(session, assessed, dates, row.name)),
        prepare_days=prepare,
        revisions=revisions,
        sentence=stored_sentence(rows[-1].explanation) if rows else "",
        sentence_day=rows[-1].ref_date if rows else None,
        nowcast=district_nowcast(session=session, code=code, end=last, as_of=cutoff),
        nowcast_accuracy=_nowcast_line(session, code),
        forecast_record=_forecast_record(session, region),
        policy=row.name, policies=tuple(r.name for r in active_rulesets(session=session)),
        assessed_area=shown.assessed_area,
    )


def _forecast_record(session: Session, region: Region) -> tuple[RecordLine, ...]:
    """The record sentences of the district's own forecasts and of its area's (ICU)."""
    lines = record_lines(session=session, region=region.code)
    if region.parent is not None:
        lines += record_lines(session=session, region=region.parent.code)
    return tuple(lines)


def _nowcast_line(session: Session, code: str) -> str | None:
    """The district's cases nowcast accuracy line (None: no morning to score)."""
    scores = nowcast_accuracy_report(session=session, measures=(REVISION_MEASURE,),
                                     regions=(code,), last_mornings=NOWCAST_MORNINGS)
    mine = [s for s in scores if s.region == code and s.mornings]
    return mine[0].line if mine else None


@dataclass(frozen=True, kw_only=True)
class ExplainedCriterion:
    label: str
    value_text: str
    interval_text: str
    statistic: str
    direction: str
    level: int
    status: str
    thresholds: tuple[tuple[str, str, str], ...]  # (tier name, enter, exit)
    count_text: str
    note: str
    #: the area whose figure the district is given (None: the district's own)
    area: str | None = None


@dataclass(frozen=True, kw_only=True)
class ExplanationPage:
    """One assessment of a district and day, from one stored record.

    By default the assessment *made for* the day (its first stored row: the data as they were
    when the day was first assessed); with ``as_of`` the one in force at that cutoff.
    ``criteria`` are those the sentence describes, of ``basis_day`` (the day a move was decided,
    else ``day``), as known at the same cutoff. ``revised`` compares with the newest run's
    reading of the day (None: the newest run reads this very record).
    """

    code: str
    name: str
    day: date
    assessment_id: int
    ruleset_name: str
    ruleset_version: str
    ruleset_sha256: str
    #: the cutoff the assessment was computed at (its row's own; reproducible from it)
    data_cutoff: datetime
    #: when the row was written
    made_at: datetime
    #: the cutoff of the newest evaluation run (same or later)
    run_cutoff: datetime | None
    #: True: the first assessment of the day; False: a later reading (``as_of``)
    first: bool
    tier: int
    tier_name: str
    #: "Severe (3)", as the sentences and "Revised since" name it
    tier_label: str
    previous_name: str
    action: str
    decided_on: date | None
    sentence: str
    basis_day: date
    criteria: tuple[ExplainedCriterion, ...]
    counters: tuple[tuple[str, str], ...]
    held_by: tuple[str, ...]
    gates: tuple[tuple[str, bool, str], ...]
    prepare: tuple[tuple[str, bool, str], ...]
    official_name: str | None
    revised: RevisedSince | None
    tier_now_name: str | None
    #: the policy explained and every active policy, the lead first
    policy: str = ""
    policies: tuple[str, ...] = ()
    #: the area whose assessment this is, when the policy assesses areas (else None)
    assessed_area: str | None = None


def _explained_criterion(rs: Ruleset, c: CriterionState, names: list[str],
                         area: str | None = None) -> ExplainedCriterion:
    spec = rs.indicator(c.indicator)
    thresholds = tuple(
        (names[t + 1], "—" if e is None else value_text(spec, e),
         "—" if x is None else value_text(spec, x))
        for t, (e, x) in enumerate(zip(c.enter, c.exit, strict=False))
    )
    note = f"thresholds changed while {c.conditioned_by} is high" if c.conditioned_by else ""
    return ExplainedCriterion(
        label=c.label, value_text=value_text(spec, c.value),
        interval_text=interval_text(spec, c.lower, c.upper), statistic=c.statistic,
        direction=c.direction, level=c.level, status=c.status, thresholds=thresholds,
        count_text="—" if c.count is None else f"{c.count:.0f}", note=note, area=area,
    )


def explanation_page(
    *, session: Session, code: str, day: date | None = None, as_of: datetime | None = None,
    policy: str | None = None,
) -> ExplanationPage:
    """Why district ``code`` has its recommended tier on ``day`` (default: the newest day).

    Shows the assessment made for the day, from the data as they were then (``as_of``: the one
    in force at that cutoff instead), and what the newest run reads differently
    (:mod:`server.readmodels.explanations`). Under ``policy`` (the lead policy when None; a
    policy of ``level: areas`` explains the district's area).
    """
    ctx = _shown(session, code, policy, day)
    region, area, row, rs, cutoff = ctx.region, ctx.area, ctx.row, ctx.rs, ctx.cutoff
    of_area, assessed = ctx.of_area, ctx.assessed
    if day is None:
        day = session.scalar(assessments_as_of(
            select(func.max(Assessment.ref_date)).select_from(Assessment),
            ruleset_id=row.id, cutoff=cutoff, region_id=assessed,
        ))
        if day is None:
            raise NoAssessmentError(code, None)
    shown = explained_day(session=session, ruleset_id=row.id, region_id=assessed, day=day,
                          run_cutoff=cutoff, as_of=as_of)
    if shown is None:
        raise NoAssessmentError(code, day)
    record = shown.record
    names = [t.name for t in rs.tiers]
    c = record.counters
    counters = (
        ("Days the candidate was higher", f"{c.up} of {c.confirm_days}"),
        ("Days the candidate was lower", f"{c.down} of {c.release_days}"),
        ("Days since the last change",
         f"{'—' if c.since_change >= NEVER_CHANGED else c.since_change} "
         f"(minimum {c.min_days_in_tier})"),
        ("Candidate tier", tier_label(rs, record.candidate)),
    )
    official = session.execute(
        select(Decision).where(Decision.region_id == assessed,
                                    policy_condition(session, row.name),
                                    Decision.published_at.is_not(None),
                                    Decision.effective_date <= shown.day + timedelta(days=1))
        .order_by(Decision.effective_date.desc(), Decision.id.desc()).limit(1)
    ).scalar()
    previous = shown.previous_tier if shown.previous_tier is not None else shown.recommended_tier
    revised = revised_since(session=session, ruleset=rs, shown=shown, run_cutoff=cutoff)
    return ExplanationPage(
        code=region.code, name=region.name, day=shown.day, assessment_id=shown.assessment_id,
        ruleset_name=row.name, ruleset_version=row.version, ruleset_sha256=row.sha256,
        data_cutoff=shown.data_cutoff, made_at=shown.created_at, run_cutoff=cutoff,
        first=shown.first, tier=shown.recommended_tier,
        tier_name=tier_name(rs, shown.recommended_tier),
        tier_label=tier_label(rs, shown.recommended_tier),
        previous_name=tier_name(rs, previous), action=record.action,
        decided_on=record.decided_on, sentence=record.sentence, basis_day=shown.basis_day,
        criteria=tuple(
            _explained_criterion(rs, item, names, area if item.indicator in of_area else None)
            for item in shown.basis),
        counters=counters, held_by=record.held_by,
        gates=tuple((g.id, g.passed, g.message) for g in record.gates),
        prepare=tuple((s.id, s.active, s.message) for s in record.prepare),
        # named under the ruleset it was decided under (a policy change keeps the old name)
        official_name=(decision_scales(session=session, rows=[official])[official.id]
                       .name(official.tier) if official is not None else None),
        revised=revised,
        tier_now_name=None if revised is None else tier_label(rs, revised.tier_now),
        policy=row.name, policies=tuple(r.name for r in active_rulesets(session=session)),
        assessed_area=ctx.assessed_area,
    )

