"""Read model: the public downloads (published tiers, their changes, weekly cases) and their
data dictionary, and the entries of the public Atom feeds.

Only what the public pages show is here: published tiers (never a recommendation or an
unpublished decision, never a reason or a user name) and weekly case counts with small counts
suppressed (:func:`server.readmodels.pages.suppress_count`). Tier names are the active policy's, in
the page's language; a tier published under an earlier policy with more tiers keeps its number
and reads "Tier N". With several active policies every table row and feed entry names its policy
(the ``policy`` column; decisions of a policy no longer active count for the lead one).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from datetime import date, datetime, timedelta

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from rules import Ruleset
from server.readmodels.pages import (
    REPORTING_DELAY_DAYS,
    UnknownDistrictError,
    public_map,
    weekly_figures,
)
from server.services.review_official import policy_condition
from server.services.ruleset_cache import parsed
from server.services.rulesets import active_ruleset, active_rulesets
from server.store import read_dense
from server.store.models import Decision, Measure, Observation, Region

__all__ = [
    "DICTIONARY",
    "DataField",
    "DistrictChanges",
    "DownloadTable",
    "PublishedChange",
    "district_changes",
    "published_changes",
    "published_tier_table",
    "tier_change_table",
    "weekly_case_table",
]

WEEKS = 52


@dataclass(frozen=True, kw_only=True)
class DataField:
    name: str
    type: str
    meaning: str


@dataclass(frozen=True, kw_only=True)
class DownloadTable:
    """One download: its name, its columns (as in :data:`DICTIONARY`) and its rows."""

    name: str
    columns: tuple[str, ...]
    rows: tuple[tuple[str | int | float | bool | None, ...], ...]


#: Every download with the meaning of each column (the data dictionary).
DICTIONARY: dict[str, tuple[DataField, ...]] = {
    "tiers": (
        DataField(name="code", type="text", meaning="District code used by the health office."),
        DataField(name="name", type="text", meaning="District name."),
        DataField(name="area", type="text", meaning="Area the district belongs to (may be empty)."),
        DataField(name="tier", type="integer",
                  meaning="Published alert tier, 0 the lowest; empty when none is published."),
        DataField(name="tier_name", type="text", meaning="Name of the tier in the policy."),
        DataField(name="since", type="date (ISO 8601)",
                  meaning="Day from which the tier is in force."),
        DataField(name="published_at", type="date-time (ISO 8601, UTC)",
                  meaning="When the health authority published the tier."),
        DataField(name="policy", type="text",
                  meaning="The alert policy the tier belongs to (one row per district and "
                          "policy; the lead policy's rows first)."),
    ),
    "tier_changes": (
        DataField(name="code", type="text", meaning="District code."),
        DataField(name="name", type="text", meaning="District name."),
        DataField(name="effective_date", type="date (ISO 8601)",
                  meaning="Day from which the new tier is in force."),
        DataField(name="tier", type="integer", meaning="The new published tier."),
        DataField(name="tier_name", type="text", meaning="Name of the new tier."),
        DataField(name="previous_tier", type="integer",
                  meaning="The published tier before the change; empty for the first one."),
        DataField(name="published_at", type="date-time (ISO 8601, UTC)",
                  meaning="When the change was published."),
        DataField(name="policy", type="text", meaning="The alert policy the change belongs to."),
    ),
    "weekly_cases": (
        DataField(name="code", type="text", meaning="District code."),
        DataField(name="week_end", type="date (ISO 8601)",
                  meaning="Last day of the seven-day week (weeks end on the newest data day)."),
        DataField(name="cases", type="text",
                  meaning="Confirmed cases in the week by test date; '<N' when fewer than N "
                          "(suppressed to protect privacy); empty when a day is missing."),
        DataField(name="rate_per_100k", type="number",
                  meaning="Cases per 100 000 residents; empty when the count is suppressed."),
        DataField(name="provisional", type="true/false",
                  meaning="True while the week still contains days whose late reports are "
                          f"arriving (the last {REPORTING_DELAY_DAYS} days): it will rise."),
    ),
}


@dataclass(frozen=True, kw_only=True)
class PublishedChange:
    """A change of a district's published tier (the first publication counts as one)."""

    decision_id: int
    code: str
    name: str
    tier: int
    tier_name: str
    previous_tier: int | None
    previous_name: str | None
    effective_date: date
    published_at: datetime
    #: the policy (ruleset name) the change belongs to
    policy: str = ""


def _ruleset(session: Session, policy: str | None = None) -> Ruleset | None:
    row = active_ruleset(session=session, policy=policy)
    return None if row is None else parsed(row)


def _namer(ruleset: Ruleset | None, lang: str | None) -> Callable[[int], str]:
    tiers = {} if ruleset is None else {t.level: t for t in ruleset.tiers}

    def name(level: int) -> str:
        t = tiers.get(level)
        return t.name_in(lang) if t is not None else f"Tier {level}"

    return name


def published_changes(
    *, session: Session, code: str | None = None, lang: str | None = None,
) -> list[PublishedChange]:
    """Every change of a published tier, newest first (of one district with ``code``), of
    every active policy (each district's changes counted within its policy)."""
    if code is not None and session.scalar(
            select(Region.id).where(Region.code == code, Region.level == "district")) is None:
        raise UnknownDistrictError(code)
    names = [r.name for r in active_rulesets(session=session)] or [None]
    out: list[PublishedChange] = []
    for policy in names:
        out += _changes_of(session, code, lang, policy)
    out.sort(key=lambda c: (c.published_at, c.effective_date, c.decision_id), reverse=True)
    return out


def _changes_of(
    session: Session, code: str | None, lang: str | None, policy: str | None
) -> list[PublishedChange]:
    name = _namer(_ruleset(session, policy), lang)
    query = (
        select(Decision, Region.code, Region.name)
        .join(Region, Region.id == Decision.region_id)
        .where(Decision.published_at.is_not(None), Region.level == "district",
               policy_condition(session, policy))
        .order_by(Decision.region_id, Decision.effective_date, Decision.decided_at, Decision.id)
    )
    if code is not None:
        query = query.where(Region.code == code)
    out: list[PublishedChange] = []
    last: dict[str, int] = {}
    for row, rcode, rname in session.execute(query):
        before = last.get(rcode)
        last[rcode] = row.tier
        if before == row.tier:
            continue
        assert row.published_at is not None
        out.append(PublishedChange(
            decision_id=row.id, code=rcode, name=rname, tier=row.tier, tier_name=name(row.tier),
            previous_tier=before, previous_name=None if before is None else name(before),
            effective_date=row.effective_date, published_at=row.published_at,
            policy=policy or row.policy,
        ))
    return out


@dataclass(frozen=True, kw_only=True)
class DistrictChanges:
    code: str
    name: str
    changes: tuple[PublishedChange, ...]


def district_changes(*, session: Session, code: str, lang: str | None = None) -> DistrictChanges:
    """One district's name and the changes of its published tier, newest first."""
    name = session.scalar(select(Region.name).where(Region.code == code,
                                                    Region.level == "district"))
    if name is None:
        raise UnknownDistrictError(code)
    changes = published_changes(session=session, code=code, lang=lang)
    return DistrictChanges(code=code, name=name, changes=tuple(changes))


def _columns(table: str) -> tuple[str, ...]:
    return tuple(f.name for f in DICTIONARY[table])


def tier_change_table(*, session: Session, lang: str | None = None) -> DownloadTable:
    changes = published_changes(session=session, lang=lang)
    rows = tuple(
        (c.code, c.name, c.effective_date.isoformat(), c.tier, c.tier_name, c.previous_tier,
         c.published_at.isoformat(), c.policy)
        for c in changes
    )
    return DownloadTable(name="tier_changes", columns=_columns("tier_changes"), rows=rows)


def published_tier_table(*, session: Session, lang: str | None = None) -> DownloadTable:
    data = public_map(session=session, lang=lang)
    lead = active_ruleset(session=session)
    lead_name = "" if lead is None else lead.name
    published: dict[tuple[str, str], PublishedChange] = {}
    for c in published_changes(session=session, lang=lang):  # newest first: keep the newest
        published.setdefault((c.policy, c.code), c)
    rows = []
    for d in data.districts:
        change = published.get((lead_name, d.code))
        rows.append((d.code, d.name, d.area, d.tier, d.tier_name,
                     d.since.isoformat() if d.since else None,
                     change.published_at.isoformat() if change else None, lead_name))
    for policy in data.policies:
        for d in data.districts:
            t = next((t for t in d.policies if t.policy == policy), None)
            if t is None:
                continue
            change = published.get((policy, d.code))
            rows.append((d.code, d.name, d.area, t.tier, t.tier_name,
                         t.since.isoformat() if t.since else None,
                         change.published_at.isoformat() if change else None, policy))
    return DownloadTable(name="tiers", columns=_columns("tiers"), rows=tuple(rows))


def weekly_case_table(*, session: Session, threshold: int, weeks: int = WEEKS) -> DownloadTable:
    """Weekly cases of every district (the last ``weeks`` weeks), suppressed as on the pages."""
    last_day = session.scalar(
        select(func.max(Observation.ref_date))
        .join(Measure, Measure.id == Observation.measure_id)
        .where(Measure.name == "cases")
    )
    if last_day is None:
        return DownloadTable(name="weekly_cases", columns=_columns("weekly_cases"), rows=())
    districts = session.execute(
        select(Region.code, Region.population)
        .where(Region.level == "district").order_by(Region.code)
    ).all()
    start = last_day - timedelta(days=7 * weeks - 1)
    dense = read_dense(session=session, measures=["cases"], start=start, end=last_day,
                       regions=[c for c, _p in districts])
    index = {c: i for i, c in enumerate(dense.regions)}
    rows = []
    for code, population in districts:
        if code not in index:
            continue
        series = dense["cases"][index[code]]
        weeks = weekly_figures(series, dense.dates, float(population or 0), threshold)
        first = next((i for i, w in enumerate(weeks) if w.count_text != "—"), len(weeks))
        for w in weeks[first:]:  # weeks before the district's first data are left out
            rate = None if w.rate is None else round(w.rate, 1)
            rows.append((code, w.week_end.isoformat(),
                         None if w.count_text == "—" else w.count_text, rate, w.provisional))
    return DownloadTable(name="weekly_cases", columns=_columns("weekly_cases"),
                         rows=tuple(rows))

