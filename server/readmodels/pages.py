"""Use case: the data of the public pages (published tiers only, small counts suppressed).

Nothing staff-only reaches these objects: no recommended tiers, pending reviews, rejected rows or
user names. Only decisions that have been *published* count. Weekly case counts below the
configured small-count threshold are replaced by ``"<N"`` and the rate derived from them is
withheld (the small-cell rule of health statistics).

The newest weeks of the trend are *provisional*: cases are counted by test date and late reports
keep arriving for some days, so a week that still contains days inside the reporting-delay window
(:data:`REPORTING_DELAY_DAYS`) reads low and must not be shown as a real drop. Its count and rate
are the reports received so far (not inflated by a nowcast); the week is flagged so that pages and
the JSON say so.

The page data depend only on the publication state, the newest vintage and the active ruleset
(its tier names and public texts), summarised in a *stamp*; pages and their ETags are keyed by it,
so a cached page is served until something is published, new data arrive or another ruleset is
activated.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import date, datetime, timedelta
from typing import Any

import numpy as np
from sqlalchemy import Select, func, select, type_coerce
from sqlalchemy.orm import Session, aliased

from rules import Ruleset
from server.readmodels.outlook import Outlook, district_outlook
from server.readmodels.policy_columns import assessed_regions, policy_level
from server.services.errors import ServiceError
from server.services.review_official import OfficialTier, official_tiers
from server.services.ruleset_cache import parsed
from server.services.rulesets import active_ruleset, active_rulesets
from server.store import read_dense
from server.store.models import AuditEntry, Decision, Measure, Observation, Region, Vintage
from server.store.models import Ruleset as RulesetRow
from server.store.types import UTCDateTime

__all__ = [
    "PublicDistrictPage",
    "PublicMap",
    "PublicMapEntry",
    "PublicStamp",
    "TierInfo",
    "UnknownDistrictError",
    "WeekFigure",
    "public_district_page",
    "public_map",
    "public_stamp",
    "suppress_count",
]

TREND_WEEKS = 12
# Days before the newest reference date whose counts are still incomplete (late reports). A week
# that contains any of them is provisional. Common practice, no source; the demo's reporting
# delays put about 97 % of a day's cases in within 7 days.
REPORTING_DELAY_DAYS = 7


class UnknownDistrictError(ServiceError, LookupError):
    def __init__(self, code: str) -> None:
        self.code = code
        super().__init__(f"no district with code {code!r}")


@dataclass(frozen=True, kw_only=True)
class TierInfo:
    """A tier as residents read it: name, meaning, what applies and advice for people at risk."""

    level: int
    name: str
    public: str
    measures: tuple[str, ...] = ()
    advice: str = ""


@dataclass(frozen=True, kw_only=True)
class PolicyTier:
    """A district's published tier under one more active policy than the lead one: the policy's
    name and description, the tier's name and meaning in the page's language, since when, and
    the area whose tier it is under a policy that assesses areas."""

    policy: str
    description: str
    tier: int
    tier_name: str
    public_text: str
    since: date | None
    area: str | None = None


@dataclass(frozen=True, kw_only=True)
class PublicMapEntry:
    code: str
    name: str
    area: str | None
    tier: int | None
    tier_name: str | None
    since: date | None
    geometry: dict[str, Any] | None
    #: the published tiers of the other active policies (lead policy: the fields above)
    policies: tuple[PolicyTier, ...] = ()


@dataclass(frozen=True, kw_only=True)
class PublicMap:
    districts: tuple[PublicMapEntry, ...]
    tiers: tuple[TierInfo, ...]
    last_published: datetime | None
    stamp: str
    #: the other active policies with a published tier somewhere, in policy order
    policies: tuple[str, ...] = ()


@dataclass(frozen=True, kw_only=True)
class WeekFigure:
    """One week of cases: ``count_text`` is the count or ``"<N"``; ``rate`` None when withheld.

    ``provisional`` weeks contain days inside the reporting-delay window: their count and rate
    are the reports received so far and will rise as late reports arrive.
    """

    week_end: date
    count_text: str
    rate: float | None
    suppressed: bool
    provisional: bool = False


@dataclass(frozen=True, kw_only=True)
class PublicDistrictPage:
    code: str
    name: str
    area: str | None
    tier: int | None
    tier_name: str | None
    public_text: str | None
    since: date | None
    published_at: datetime | None
    data_until: date | None
    weeks: tuple[WeekFigure, ...]
    tiers: tuple[TierInfo, ...]
    threshold: int
    stamp: str
    outlook: Outlook | None = None
    #: the published tiers of the other active policies (lead policy: the fields above)
    policies: tuple[PolicyTier, ...] = ()

    @property
    def tier_info(self) -> TierInfo | None:
        """The published tier's texts (None when nothing is published)."""
        return next((t for t in self.tiers if t.level == self.tier), None)


@dataclass(frozen=True, kw_only=True)
class PublicStamp:
    """What the public pages depend on: ``key`` changes on publication or new data."""

    key: str
    last_modified: datetime | None


def public_stamp(*, session: Session) -> PublicStamp:
    """A short key that changes whenever something is published, new data arrive or another
    ruleset (other tier names and texts) is activated."""
    published = session.scalar(
        select(type_coerce(func.max(Decision.published_at), UTCDateTime()))
    )
    n_published = session.scalar(
        select(func.count()).select_from(Decision).where(Decision.published_at.is_not(None))
    )
    newest = session.scalar(select(func.max(Vintage.id)))
    received = session.scalar(
        select(type_coerce(func.max(Vintage.received_at), UTCDateTime()))
    )
    rows = active_rulesets(session=session)
    activated = session.scalar(
        select(type_coerce(func.max(AuditEntry.at), UTCDateTime()))
        .where(AuditEntry.action == "ruleset.activate")
    ) if rows else None
    stamp = published.isoformat() if published else "-"
    ruleset = ",".join(f"{r.id}:{r.sha256[:16]}" for r in rows) or "-"
    changed = max((t for t in (published, received, activated) if t is not None), default=None)
    return PublicStamp(key=f"{stamp}|{n_published}|{newest or 0}|{ruleset}",
                       last_modified=changed)


def _tiers(ruleset: Ruleset | None, lang: str | None) -> tuple[TierInfo, ...]:
    """The active ruleset's tiers in ``lang`` (its translations; the default text otherwise)."""
    if ruleset is None:
        return ()
    return tuple(TierInfo(level=t.level, name=t.name_in(lang), public=t.public_in(lang).strip(),
                          measures=t.measures_in(lang), advice=t.advice_in(lang).strip())
                 for t in ruleset.tiers)


def _tier_text(
    session: Session, active_id: int | None, tiers: tuple[TierInfo, ...],
    off: OfficialTier | None, lang: str | None,
) -> tuple[str | None, ...]:
    """(name, public text) of an official tier in the page's language.

    ``tiers`` are the active ruleset's; a tier decided under another ruleset (before a policy
    change) keeps that ruleset's name and text (:mod:`server.services.tiers`)."""
    if off is None:
        return None, None
    if off.ruleset_id is not None and off.ruleset_id != active_id:
        row = session.get(RulesetRow, off.ruleset_id)
        tiers = _tiers(parsed(row) if row is not None else None, lang)
    info = next((t for t in tiers if t.level == off.tier), None)
    return (info.name, info.public) if info is not None else (off.tier_name, off.public_text)


def other_policy_tiers(
    *, session: Session, lang: str | None = None
) -> dict[str, tuple[PolicyTier, ...]]:
    """Per district code, its published tier under each active policy after the lead one (in
    policy order); a policy of ``level: areas`` gives a district its parent area's tier."""
    rows = active_rulesets(session=session)[1:]
    if not rows:
        return {}
    out: dict[str, list[PolicyTier]] = {}
    for row in rows:
        ruleset = parsed(row)
        tiers = _tiers(ruleset, lang)
        published = official_tiers(session=session, published_only=True, policy=row.name)
        level = policy_level(ruleset)
        for code, region in assessed_regions(session=session, level=level).items():
            off = published.get(region.code)
            if off is None:
                continue
            name, text = _tier_text(session, row.id, tiers, off, lang)
            out.setdefault(code, []).append(PolicyTier(
                policy=row.name, description=ruleset.description.strip(), tier=off.tier,
                tier_name=name or off.tier_name, public_text=text or "", since=off.since,
                area=None if level == "districts" else region.name,
            ))
    return {code: tuple(found) for code, found in out.items()}


def _districts(session: Session) -> list[tuple[Region, str | None]]:
    parent = aliased(Region)
    query = (
        select(Region, parent.name)
        .outerjoin(parent, parent.id == Region.parent_id)
        .where(Region.level == "district")
        .order_by(Region.name)
    )
    return [(r, p) for r, p in session.execute(query).all()]


def public_map(*, session: Session, lang: str | None = None) -> PublicMap:
    """Every district with its published tier (None when nothing is published yet).

    Tier names and texts are in ``lang`` where the ruleset translates them."""
    published = official_tiers(session=session, published_only=True)
    active = active_ruleset(session=session)
    active_id = None if active is None else active.id
    tiers = _tiers(None if active is None else parsed(active), lang)
    others = other_policy_tiers(session=session, lang=lang)
    entries = []
    for region, area in _districts(session):
        off = published.get(region.code)
        entries.append(
            PublicMapEntry(
                code=region.code, name=region.name, area=area,
                tier=off.tier if off else None,
                tier_name=_tier_text(session, active_id, tiers, off, lang)[0],
                since=off.since if off else None, geometry=region.geometry,
                policies=others.get(region.code, ()),
            )
        )
    last = max((o.published_at for o in published.values() if o.published_at), default=None)
    named = {t.policy for found in others.values() for t in found}
    return PublicMap(
        districts=tuple(entries), tiers=tiers, last_published=last,
        stamp=public_stamp(session=session).key,
        policies=tuple(r.name for r in active_rulesets(session=session)[1:] if r.name in named),
    )


def suppress_count(count: float, threshold: int) -> tuple[str, bool]:
    """``(text, suppressed)``: counts below ``threshold`` become ``"<threshold"``.

    Notes
    -----
    The small-cell rule of health statistics suppresses counts under a threshold (commonly 10)
    and every rate derived from them. Zero is suppressed too, so that a published zero cannot be
    told apart from a suppressed cell by subtraction from totals (conservative choice).
    """
    if threshold < 1:
        raise ValueError(f"threshold must be >= 1, got {threshold}")
    if not np.isfinite(count):
        return "—", True
    if count < threshold:
        return f"<{threshold}", True
    return f"{count:,.0f}".replace(",", "\u202f"), False


def weekly_figures(
    daily: np.ndarray, dates: np.ndarray, population: float, threshold: int,
    delay_days: int = REPORTING_DELAY_DAYS,
) -> tuple[WeekFigure, ...]:
    r"""Sum daily counts into weeks ending on the last date; rates per 100 000, suppressed.

    Weeks with any missing day are reported as unknown ("—") rather than as a partial sum.
    A week with a day among the last ``delay_days`` dates is marked provisional; its count and
    rate stay the reports received so far.

    Notes
    -----
    Week :math:`w` covers days :math:`7w .. 7w+6` of the tail; its rate is
    :math:`10^5 \sum_d c_d / N` for population :math:`N`. It is provisional when its last day
    :math:`t_w > t_{last} - \text{delay\_days}`.
    """
    if delay_days < 0:
        raise ValueError(f"delay_days must be >= 0, got {delay_days}")
    n = daily.size // 7
    if n == 0:
        return ()
    tail = daily[-7 * n:].reshape(n, 7)
    ends = dates[-7 * n:].reshape(n, 7)[:, -1]
    complete = np.isfinite(tail).all(axis=1)
    sums = np.where(complete, np.nansum(tail, axis=1), np.nan)
    window_start = dates[-1] - np.timedelta64(delay_days, "D")
    provisional = ends > window_start
    out = []
    for s, end, ok, late in zip(sums, ends, complete, provisional, strict=True):
        text, hidden = suppress_count(float(s), threshold) if ok else ("—", True)
        rate = None if hidden or population <= 0 else float(s) / population * 100_000
        out.append(WeekFigure(week_end=end.astype(date), count_text=text, rate=rate,
                              suppressed=hidden, provisional=bool(late)))
    return tuple(out)


def public_district_page(
    *, session: Session, code: str, threshold: int, lang: str | None = None
) -> PublicDistrictPage:
    """The public page of one district: published tier and a suppressed weekly case trend.

    Tier names and texts are in ``lang`` where the ruleset translates them."""
    parent = aliased(Region)
    row = session.execute(
        select(Region, parent.name)
        .outerjoin(parent, parent.id == Region.parent_id)
        .where(Region.code == code, Region.level == "district")
    ).first()
    if row is None:
        raise UnknownDistrictError(code)
    region, area = row
    off = official_tiers(session=session, published_only=True).get(code)
    newest = session.scalar(select(func.max(Vintage.id)))
    weeks: tuple[WeekFigure, ...] = ()
    data_until = None
    if newest is not None:
        last_day = session.scalar(_last_case_day(region.id))
        if last_day is not None:
            start = last_day - timedelta(days=7 * TREND_WEEKS - 1)
            dense = read_dense(session=session, measures=["cases"], start=start, end=last_day,
                               regions=[code])
            weeks = weekly_figures(dense["cases"][0], dense.dates, float(region.population),
                                   threshold)
            data_until = last_day
    active = active_ruleset(session=session)
    active_id = None if active is None else active.id
    tiers = _tiers(None if active is None else parsed(active), lang)
    tier_name, public_text = _tier_text(session, active_id, tiers, off, lang)
    return PublicDistrictPage(
        code=region.code, name=region.name, area=area,
        tier=off.tier if off else None, tier_name=tier_name, public_text=public_text,
        since=off.since if off else None,
        published_at=off.published_at if off else None, data_until=data_until, weeks=weeks,
        tiers=tiers, threshold=threshold, stamp=public_stamp(session=session).key,
        outlook=district_outlook(session=session, code=code, official=off, lang=lang),
        policies=other_policy_tiers(session=session, lang=lang).get(code, ()),
    )


def _last_case_day(region_id: int) -> Select[tuple[date]]:
    return (
        select(func.max(Observation.ref_date))
        .join(Measure, Measure.id == Observation.measure_id)
        .where(Observation.region_id == region_id, Measure.name == "cases")
    )
