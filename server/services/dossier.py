"""Use case: the staff district page and the explanation of one district and day.

The district page reads the stored assessments of the active ruleset as of its newest evaluation
run (for each day, the row with the greatest data cutoff not after the run's:
:func:`server.services.evaluation.assessments_as_of`): each criterion's value, interval and the
enter/exit thresholds in force on each day (conditions and overrides included, exactly as the
engine used them), the recommended tier, prepare signals, and the official tier from the
decisions. Revisions show the values of recent days as known on different mornings, from the
store's vintages.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import date, datetime, timedelta
from typing import Any

from sqlalchemy import func, select
from sqlalchemy.orm import Session, aliased

from server.services.backtest import nowcast_accuracy_report
from server.services.district_indicators import NowcastSeries, district_nowcast
from server.services.errors import ServiceError
from server.services.evaluation import active_ruleset, assessments_as_of, newest_run_of
from server.services.policies import parsed
from server.store import revision_history
from server.store.models import Assessment, Decision, Region

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


def _official_by_day(session: Session, region_id: int, days: list[date]) -> list[int | None]:
    rows = session.execute(
        select(Decision.effective_date, Decision.tier)
        .where(Decision.region_id == region_id, Decision.published_at.is_not(None))
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
    days: int = 120,
) -> DistrictDossier:
    """Everything the staff district page shows, for ``start..end`` (default: the last ``days``).

    Raises :class:`PeriodError` when both ``start`` and ``end`` are given and ``start > end``.
    """
    check_period(start, end)
    region, area = _region(session, code)
    row = active_ruleset(session=session)
    cutoff = _cutoff(session, row.id) if row else None
    if row is None or cutoff is None:
        raise NoAssessmentError(code, None)
    rs = parsed(row)
    span = session.execute(assessments_as_of(
        select(func.min(Assessment.ref_date), func.max(Assessment.ref_date))
        .select_from(Assessment),
        ruleset_id=row.id, cutoff=cutoff, region_id=region.id,
    )).one()
    if span[0] is None:
        raise NoAssessmentError(code, None)
    first, last = span
    end = min(end or last, last)
    start = max(start or end - timedelta(days=days - 1), first)
    if start > end:
        start = end
    rows = list(session.scalars(assessments_as_of(
        select(Assessment), ruleset_id=row.id, cutoff=cutoff, region_id=region.id,
        start=start, end=end,
    ).order_by(Assessment.ref_date)))
    dates = [a.ref_date for a in rows]
    criteria = []
    for k, crit in enumerate(rs.criteria):
        spec = rs.indicator(crit.indicator)
        items = [a.explanation.get("data", {}).get("criteria", [{}] * (k + 1))[k] for a in rows]
        n = rs.n_tiers - 1
        criteria.append(CriterionSeries(
            id=crit.id, label=crit.label or spec.label, unit=spec.unit, decimals=spec.decimals,
            dates=tuple(dates), value=tuple(_num(i.get("value")) for i in items),
            lower=tuple(_num(i.get("lower")) for i in items),
            upper=tuple(_num(i.get("upper")) for i in items),
            enter=tuple(tuple(_num((i.get("enter") or [None] * n)[t]) for i in items)
                        for t in range(n)),
            exit=tuple(tuple(_num((i.get("exit") or [None] * n)[t]) for i in items)
                       for t in range(n)),
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
        code=region.code, name=region.name, area=area, population=int(region.population),
        ruleset=f"{row.name} {row.version}", tier_names=tuple(t.name for t in rs.tiers),
        start=start, end=end, first_day=first, last_day=last, criteria=tuple(criteria),
        dates=tuple(dates), recommended=tuple(a.recommended_tier for a in rows),
        official=tuple(_official_by_day(session, region.id, dates)), prepare_days=prepare,
        revisions=revisions,
        sentence=rows[-1].explanation.get("sentence", "") if rows else "",
        sentence_day=rows[-1].ref_date if rows else None,
        nowcast=district_nowcast(session=session, code=code, end=last, as_of=cutoff),
        nowcast_accuracy=_nowcast_line(session, code),
    )


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


@dataclass(frozen=True, kw_only=True)
class ExplanationPage:
    code: str
    name: str
    day: date
    assessment_id: int
    ruleset_name: str
    ruleset_version: str
    ruleset_sha256: str
    #: the cutoff the assessment was computed at (its row's own; reproducible from it)
    data_cutoff: datetime
    #: the cutoff of the evaluation run it is shown under (the newest run; same or later)
    run_cutoff: datetime
    tier: int
    tier_name: str
    previous_name: str
    action: str
    sentence: str
    criteria: tuple[ExplainedCriterion, ...]
    counters: tuple[tuple[str, str], ...]
    held_by: tuple[str, ...]
    gates: tuple[tuple[str, bool, str], ...]
    prepare: tuple[tuple[str, bool, str], ...]
    official_name: str | None


def _fmt(v: float | None, decimals: int, unit: str = "") -> str:
    if v is None:
        return "n/a"
    text = f"{v:.{decimals}f}"
    if not unit:
        return text
    return text + unit if unit.startswith("%") else f"{text} {unit}"


def explanation_page(*, session: Session, code: str, day: date | None = None) -> ExplanationPage:
    """Why district ``code`` has its recommended tier on ``day`` (default: the newest day).

    The assessment is the one in force at the newest run of the active ruleset; an unchanged
    result keeps the row of the earlier cutoff it was first computed at, and the page gives both
    that cutoff (``data_cutoff``) and the run's (``run_cutoff``).
    """
    region, _area = _region(session, code)
    row = active_ruleset(session=session)
    cutoff = _cutoff(session, row.id) if row else None
    if row is None or cutoff is None:
        raise NoAssessmentError(code, day)
    rs = parsed(row)
    query = assessments_as_of(
        select(Assessment), ruleset_id=row.id, cutoff=cutoff, region_id=region.id,
        start=day, end=day,
    )
    if day is None:
        query = query.order_by(Assessment.ref_date.desc()).limit(1)
    a = session.scalars(query).first()
    if a is None:
        raise NoAssessmentError(code, day)
    data = a.explanation.get("data", {})
    names = [t.name for t in rs.tiers]
    crits = []
    for item in data.get("criteria", []):
        spec = rs.indicator(item["indicator"])
        interval = (f"{_fmt(item['lower'], spec.decimals)}–{_fmt(item['upper'], spec.decimals)}"
                    if item.get("lower") is not None and item.get("upper") is not None else "—")
        thresholds = tuple(
            (names[t + 1], _fmt(e, spec.decimals, spec.unit) if e is not None else "—",
             _fmt(x, spec.decimals, spec.unit) if x is not None else "—")
            for t, (e, x) in enumerate(zip(item.get("enter", []), item.get("exit", []),
                                           strict=False))
        )
        note = f"thresholds changed while {item['conditioned_by']} is high" \
            if item.get("conditioned_by") else ""
        crits.append(ExplainedCriterion(
            label=item.get("label", item["id"]),
            value_text=_fmt(item.get("value"), spec.decimals, spec.unit),
            interval_text=interval, statistic=item.get("statistic", "estimate"),
            direction=item.get("direction", "rising"), level=int(item.get("level", 0)),
            status=item.get("status", ""), thresholds=thresholds,
            count_text="—" if item.get("count") is None else f"{item['count']:.0f}", note=note,
        ))
    c = data.get("counters", {})
    counters = (
        ("Days the candidate was higher", f"{c.get('up', 0)} of {c.get('confirm_days', 0)}"),
        ("Days the candidate was lower", f"{c.get('down', 0)} of {c.get('release_days', 0)}"),
        ("Days since the last change",
         f"{c.get('since_change', 0)} (minimum {c.get('min_days_in_tier', 0)})"),
        ("Candidate tier", rs.tier_name(int(data.get("candidate", a.recommended_tier)))),
    )
    gates = tuple((g["id"], bool(g["passed"]),
                   g.get("message") or "") for g in data.get("gates", []))
    prepare = tuple((s["id"], bool(s["active"]), s.get("message") or "")
                    for s in data.get("prepare", []))
    official = session.execute(
        select(Decision.tier).where(Decision.region_id == region.id,
                                    Decision.published_at.is_not(None),
                                    Decision.effective_date <= a.ref_date + timedelta(days=1))
        .order_by(Decision.effective_date.desc(), Decision.id.desc()).limit(1)
    ).scalar()
    previous = a.previous_tier if a.previous_tier is not None else a.recommended_tier
    return ExplanationPage(
        code=region.code, name=region.name, day=a.ref_date, assessment_id=a.id,
        ruleset_name=row.name, ruleset_version=row.version, ruleset_sha256=row.sha256,
        data_cutoff=a.data_cutoff, run_cutoff=cutoff, tier=a.recommended_tier,
        tier_name=rs.tier_name(a.recommended_tier), previous_name=rs.tier_name(previous),
        action=str(data.get("action", "")), sentence=a.explanation.get("sentence", ""),
        criteria=tuple(crits), counters=counters, held_by=tuple(data.get("held_by", [])),
        gates=gates, prepare=prepare,
        official_name=rs.tier_name(official) if official is not None else None,
    )
