"""Read model: the overview's line per district as the engine left it, before any review.

For each district: the newest recommended tier, active prepare signals, the key indicators with
their intervals and a 14-day series for a sparkline, and the assessment's sentence; with them the
engine's changes from the day before (:func:`server.readmodels.day_changes.recommended_changes`).
All of it depends only on the active ruleset and its newest evaluation run, so
:func:`district_base` builds it once per run and keeps it per worker; official tiers and
pending changes are merged in later (:mod:`server.readmodels.review_state`).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import date, datetime, timedelta
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session, aliased

from rules import Ruleset
from rules.formatting import interval_text, value_text
from rules.record import stored_criteria, stored_sentence
from server.readmodels.cache import BoundedCache
from server.readmodels.day_changes import Change, recommended_changes
from server.services.assessments import assessments_as_of
from server.services.tiers import tier_name
from server.store.models import Assessment, EvaluationRun, Region
from server.store.models import Ruleset as RulesetRow

__all__ = ["SPARK_DAYS", "DistrictBase", "DistrictLine", "KeyIndicator", "district_base"]

SPARK_DAYS = 14


@dataclass(frozen=True, kw_only=True)
class KeyIndicator:
    id: str
    label: str
    value_text: str
    interval_text: str | None
    level: int
    known: bool
    series: tuple[float, ...]


@dataclass(frozen=True, kw_only=True)
class DistrictLine:
    code: str
    name: str
    area: str | None
    population: int
    official_tier: int | None
    official_name: str | None
    recommended_tier: int | None
    recommended_name: str | None
    pending: bool
    assessment_id: int | None
    prepare: tuple[str, ...]
    indicators: tuple[KeyIndicator, ...]
    sentence: str
    geometry: dict[str, Any] | None
    #: tier of a decision taken but not yet published (None: nothing awaits publication)
    decided_tier: int | None = None
    decided_name: str | None = None


@dataclass(frozen=True, kw_only=True)
class DistrictBase:
    """Every district's line (by name) of one run, with the engine's changes of its last day."""

    day: date | None
    lines: tuple[DistrictLine, ...]
    changes: tuple[Change, ...]


#: the newest run's base, per worker
_BASES: BoundedCache[tuple[object, ...], DistrictBase] = BoundedCache(size=1)


def district_base(
    session: Session, row: RulesetRow, run: EvaluationRun | None, ruleset: Ruleset
) -> tuple[tuple[object, ...], DistrictBase]:
    """The lines of ``run`` (the newest run of the ruleset ``row``, parsed as ``ruleset``) and
    the key they are kept under: it changes with the run's cutoff and the rows it wrote."""
    # a replay of an older cutoff may copy rows to this run (same content, new ids): rows_written
    # counts them, so the key changes with them
    if run is None:
        key: tuple[object, ...] = (row.id, "-")
        return key, _BASES.get_or_build(key, lambda: DistrictBase(day=None, lines=(), changes=()))
    key = (row.id, run.data_cutoff.isoformat(), run.rows_written)
    return key, _BASES.get_or_build(key, lambda: _build(
        session, row.id, ruleset, run.data_cutoff, run.last_day))


def _build(
    session: Session, ruleset_id: int, ruleset: Ruleset, cutoff: datetime, last: date
) -> DistrictBase:
    parent = aliased(Region)
    regions = session.execute(
        select(Region.id, Region.code, Region.name, parent.name, Region.population,
               Region.geometry)
        .outerjoin(parent, parent.id == Region.parent_id)
        .where(Region.level == "district")
    ).all()
    by_region: dict[int, dict[date, Assessment]] = {}
    rows = session.scalars(assessments_as_of(
        select(Assessment), ruleset_id=ruleset_id, cutoff=cutoff,
        start=last - timedelta(days=SPARK_DAYS - 1), end=last,
    ))
    for a in rows:
        by_region.setdefault(a.region_id, {})[a.ref_date] = a
    days = [last - timedelta(days=k) for k in range(SPARK_DAYS - 1, -1, -1)]
    lines, changes = [], []
    for rid, code, name, area, population, geometry in regions:
        history = by_region.get(rid, {})
        newest = history.get(last)
        indicators: tuple[KeyIndicator, ...] = ()
        prepare: tuple[str, ...] = ()
        sentence = ""
        if newest is not None:
            sentence = stored_sentence(newest.explanation)
            prepare = tuple(k for k, v in newest.prepare_signals.items() if v)
            indicators = tuple(_indicators(ruleset, newest, history, days))
            before = history.get(last - timedelta(days=1))
            if before is not None:
                changes += recommended_changes(ruleset, code, name, before, newest)
        lines.append(DistrictLine(
            code=code, name=name, area=area, population=int(population),
            official_tier=None, official_name=None,
            recommended_tier=newest.recommended_tier if newest else None,
            recommended_name=tier_name(ruleset, newest.recommended_tier) if newest else None,
            pending=False, assessment_id=newest.id if newest else None, prepare=prepare,
            indicators=indicators, sentence=sentence, geometry=geometry,
        ))
    lines.sort(key=lambda x: x.name)
    return DistrictBase(day=last, lines=tuple(lines), changes=tuple(changes))


def _indicators(
    ruleset: Ruleset, newest: Assessment, history: dict[date, Assessment], days: list[date]
) -> list[KeyIndicator]:
    """The newest day's criteria with a value per day of ``days`` for the sparkline (the stored
    record read through :func:`rules.record.stored_criteria`; figures through
    :mod:`rules.formatting`, as the sentences and the district page print them)."""
    by_day = {day: stored_criteria(a.explanation) for day in days if (a := history.get(day))}
    out = []
    for k, item in enumerate(stored_criteria(newest.explanation)):
        spec = ruleset.indicator(item.indicator)
        series = []
        for day in days:
            crits = by_day.get(day, ())
            v = crits[k].value if k < len(crits) else None
            series.append(float("nan") if v is None else v)
        interval = None
        if item.lower is not None and item.upper is not None:
            interval = interval_text(spec, item.lower, item.upper)
        value = item.value if item.value is not None and math.isfinite(item.value) else None
        out.append(KeyIndicator(
            id=item.id, label=item.label or spec.label, value_text=value_text(spec, value),
            interval_text=interval, level=item.level, known=item.known, series=tuple(series),
        ))
    return out
