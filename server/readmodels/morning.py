"""Use case: the analyst's morning overview of every district.

For each district: the official (published) tier, the newest recommended tier (a pending change
stands out), active prepare signals, the key indicators with their intervals and a 14-day series
for a sparkline; the freshness of each feed; and what changed since the previous day.

The assessment-derived part depends only on the active ruleset and the data cutoff of its newest
evaluation run, so it is built once per run and kept in memory; the review part (official tiers,
pending changes) is merged in once per state of the decisions (one query per request tells).
The lines are the lead policy's; with several active policies, :attr:`MorningOverview.policies`
holds every policy's tier per district (:mod:`server.readmodels.policy_columns`).
"""

from __future__ import annotations

import math
import threading
from collections.abc import Mapping
from dataclasses import dataclass, replace
from datetime import UTC, date, datetime, timedelta
from typing import Any, Literal

from sqlalchemy import func, select, type_coerce
from sqlalchemy.orm import Session, aliased

from rules import Ruleset
from server.feeds.definition import FeedCatalogue
from server.readmodels.overview import DataOverview, data_overview
from server.readmodels.policy_columns import PolicyColumn, policy_columns
from server.services.assessments import assessments_as_of, newest_run_of
from server.services.errors import ServiceError
from server.services.feeds import FeedStatus, feed_statuses
from server.services.review import official_tiers, pending_changes
from server.services.review_official import policy_owners
from server.services.ruleset_cache import parsed
from server.services.rulesets import active_ruleset, active_rulesets
from server.services.tiers import decision_scales, tier_name
from server.store.models import Assessment, Decision, FeedState, Measure, Region, Vintage
from server.store.types import UTCDateTime

__all__ = [
    "Change",
    "DistrictLine",
    "FeedFreshness",
    "KeyIndicator",
    "MeasureLabel",
    "MorningOverview",
    "SortKey",
    "SortKeyError",
    "measure_label",
    "morning_overview",
]

SPARK_DAYS = 14
SortKey = Literal["name", "tier", "recommended", "pending", "code"]
SORT_KEYS: tuple[str, ...] = ("pending", "name", "code", "tier", "recommended")


class SortKeyError(ServiceError, ValueError):
    """The overview was asked to sort by a key it does not know (the page answers 422)."""

    def __init__(self, sort: str) -> None:
        self.sort = sort
        super().__init__(f"sort must be one of {', '.join(SORT_KEYS)}, got {sort!r}")


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
class FeedFreshness:
    """One source of data on the overview: a configured feed, or another source that delivered.

    ``status`` is the Feeds page's verdict for a configured feed (:attr:`FeedStatus.health`:
    ``ok``, ``attention``, ``no delivery yet``, ``overdue``), judged by the feed's own staleness
    limit and cadence; ``not configured`` for a source without a definition (no limit to judge
    by). ``received_at`` and ``age_hours`` are None before a first delivery.
    """

    feed: str
    configured: bool
    status: str
    received_at: datetime | None
    age_hours: float | None
    rows_accepted: int
    rows_rejected: int
    stale_regions: int = 0
    stale_after_days: float | None = None

    @property
    def late(self) -> bool:
        """Whether the feed needs attention (anything but ``ok`` for a configured feed)."""
        return self.configured and self.status != "ok"


@dataclass(frozen=True, kw_only=True)
class MeasureLabel:
    """How the overview names a measure: a short label and the catalogue's description."""

    name: str
    label: str
    unit: str
    description: str


#: Where a measure's description stops being its name ("Confirmed cases" of "Confirmed cases
#: by test date; provisional, ...").
_LABEL_ENDS = (";", ",", " by ", " at the ", " over ", " (")


def measure_label(name: str, unit: str, description: str) -> MeasureLabel:
    """A short label from the description's first phrase (the name when it has none)."""
    label = description.strip()
    for end in _LABEL_ENDS:
        label = label.split(end, 1)[0]
    label = label.strip().rstrip(".")
    return MeasureLabel(name=name, label=label or name.replace("_", " "), unit=unit,
                        description=description.strip())


@dataclass(frozen=True, kw_only=True)
class Change:
    code: str
    name: str
    what: str


@dataclass(frozen=True, kw_only=True)
class MorningOverview:
    ruleset: str | None
    data_cutoff: datetime | None
    day: date | None
    lines: tuple[DistrictLine, ...]
    total: int
    page: int
    pages: int
    pending: int
    tier_counts: Mapping[int, int]
    tier_names: tuple[str, ...]
    feeds: tuple[FeedFreshness, ...]
    changes: tuple[Change, ...]
    every: tuple[DistrictLine, ...]
    data_on_hand: DataOverview
    #: label of each measure of ``data_on_hand`` (same order)
    measures: tuple[MeasureLabel, ...] = ()
    #: districts with a decision taken but not yet published
    decided: int = 0
    #: changes exactly when ``data_on_hand`` does (the newest vintage id): a key for caching
    #: anything rendered from it
    data_on_hand_key: int = 0
    #: every active policy, the lead first, when more than one is active (else empty)
    policies: tuple[PolicyColumn, ...] = ()


@dataclass(frozen=True, kw_only=True)
class _Base:
    day: date | None
    lines: tuple[DistrictLine, ...]
    changes: tuple[Change, ...]


@dataclass(frozen=True, kw_only=True)
class _Review:
    """The base lines merged with official tiers and pending changes."""

    lines: tuple[DistrictLine, ...]
    tier_counts: Mapping[int, int]
    pending: int
    decided: int
    published: tuple[Change, ...] = ()


_CACHE: dict[tuple[object, ...], _Base] = {}
_REVIEW: dict[tuple[object, ...], _Review] = {}
_LOCK = threading.Lock()


def _published_changes(
    session: Session, base: _Base, since: datetime | None, ruleset: Ruleset | None
) -> tuple[Change, ...]:
    """Districts whose published official tier changed after ``since`` (the previous morning).

    The official tier is the published decision with the latest effective date (ties: the later
    decision), as in :func:`server.services.review.official_tiers`; each is named under the
    ruleset it was decided under (:mod:`server.services.tiers`)."""
    if since is None or ruleset is None:
        return ()
    names = {line.code: line.name for line in base.lines}
    rows = session.execute(
        select(Region.code, Decision)
        .join(Region, Region.id == Decision.region_id)
        .where(Decision.published_at.is_not(None))
        .order_by(Decision.effective_date, Decision.decided_at, Decision.id)
    ).all()
    # each policy's official tiers apart (a policy no longer active: the one it counts for)
    active = [r.name for r in active_rulesets(session=session)]
    prefix = len(active) > 1
    owners = policy_owners(session)

    def key(code: str, row: Decision) -> tuple[str, str] | None:
        owner = row.policy if row.policy in active or not active else owners.get(row.policy)
        return None if owner is None else (owner, code)

    before: dict[tuple[str, str], Decision] = {}
    after: dict[tuple[str, str], Decision] = {}
    for code, row in rows:
        k = key(code, row)
        if k is None:  # a stopped policy's decision counts for none
            continue
        after[k] = row
        if row.published_at is not None and row.published_at.astimezone(UTC) <= since:
            before[k] = row
    changed = {k: row for k, row in after.items()
               if k not in before or before[k].tier != row.tier}
    scales = decision_scales(session=session, rows=[*changed.values(), *(
        before[c] for c in changed if c in before)])

    def name(row: Decision) -> str:
        return f"{scales[row.id].name(row.tier)} ({row.tier})"

    return tuple(
        Change(code=code, name=names.get(code, code), what=(
            (f"{policy}: " if prefix else "") + (
                f"official tier published: {name(before[(policy, code)])} to {name(row)}"
                if (policy, code) in before else f"official tier first published: {name(row)}")
        ))
        for (policy, code), row in sorted(changed.items(), key=lambda kv: (kv[0][1], kv[0][0]))
    )


def _overrides(session: Session, base: _Base, since: datetime | None) -> tuple[Change, ...]:
    """Overrides taken after ``since`` (the previous morning), published or not: a person set
    a tier other than the engine's recommendation, which the day's changes should say even
    when the published tier did not move. Tiers are named under the ruleset each decision was
    made under (:mod:`server.services.tiers`)."""
    if since is None:
        return ()
    names = {line.code: line.name for line in base.lines}
    rows = session.execute(
        select(Region.code, Decision, Assessment.recommended_tier)
        .join(Region, Region.id == Decision.region_id)
        .outerjoin(Assessment, Assessment.id == Decision.assessment_id)
        .where(Decision.kind == "overridden", Decision.decided_at > since)
        .order_by(Region.code, Decision.decided_at, Decision.id)
    ).all()
    if not rows:
        return ()
    scales = decision_scales(session=session, rows=[row for _code, row, _rec in rows])
    several = len(active_rulesets(session=session)) > 1
    out = []
    for code, row, recommended in rows:
        scale = scales[row.id]
        rec = "" if recommended is None else (
            f" (recommended: {scale.name(recommended)}"
            f"{'' if recommended < 0 else f' ({recommended})'})")
        state = ("published" if row.published_at is not None
                 else "not yet published")
        out.append(Change(code=code, name=names.get(code, code), what=(
            (f"{row.policy}: " if several else "")
            + f"overridden to {scale.name(row.tier)} ({row.tier}){rec}, in force from "
            f"{row.effective_date.isoformat()}, {state}: {row.reason}"
        )))
    return tuple(out)


def _review_state(
    session: Session, key: tuple[object, ...], base: _Base, since: datetime | None = None,
    ruleset: Ruleset | None = None, policy: str | None = None,
) -> _Review:
    """The lines with official tiers and pending changes, rebuilt only when decisions or
    assessments change.

    Both are functions of the decision table and the newest assessments; the stamp (newest
    decision id, number published, newest publication, and the assessment key) changes with
    every decision, publication and evaluation. One query per request when nothing changed.
    """
    stamp = (*key, *session.execute(
        select(func.max(Decision.id), func.count(Decision.published_at),
               type_coerce(func.max(Decision.published_at), UTCDateTime()))
    ).one())
    with _LOCK:
        hit = _REVIEW.get(stamp)
    if hit is None:
        official = official_tiers(session=session, published_only=True)
        decided = {
            code: o for code, o in official_tiers(session=session, published_only=False).items()
            if o.published_at is None
        }
        pending = {p.region: p for p in pending_changes(session=session, policy=policy)}
        lines = []
        counts: dict[int, int] = {}
        for line in base.lines:
            off, pend, dec = official.get(line.code), pending.get(line.code), decided.get(line.code)
            lines.append(replace(
                line, official_tier=off.tier if off else None,
                official_name=off.tier_name if off else None, pending=pend is not None,
                assessment_id=pend.assessment_id if pend else line.assessment_id,
                decided_tier=dec.tier if dec else None, decided_name=dec.tier_name if dec else None,
            ))
            if off is not None:
                counts[off.tier] = counts.get(off.tier, 0) + 1
        hit = _Review(lines=tuple(lines), tier_counts=counts, pending=len(pending),
                      decided=sum(1 for line in lines if line.decided_tier is not None),
                      published=_published_changes(session, base, since, ruleset)
                      + _overrides(session, base, since))
        with _LOCK:
            _REVIEW.clear()
            _REVIEW[stamp] = hit
    return hit


def _fmt(value: float | None, decimals: int, unit: str) -> str:
    if value is None or not math.isfinite(value):
        return "n/a"
    text = f"{value:.{decimals}f}"
    return text + unit if unit.startswith("%") else (f"{text} {unit}" if unit else text)


def _build_base(
    session: Session, ruleset_id: int, ruleset: Ruleset, cutoff: datetime, last: date
) -> _Base:
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
            data = newest.explanation.get("data", {})
            sentence = newest.explanation.get("sentence", "")
            prepare = tuple(k for k, v in newest.prepare_signals.items() if v)
            indicators = tuple(_indicators(ruleset, data, history, days))
            before = history.get(last - timedelta(days=1))
            if before is not None:
                changes += _changes(ruleset, code, name, before, newest)
        lines.append(DistrictLine(
            code=code, name=name, area=area, population=int(population),
            official_tier=None, official_name=None,
            recommended_tier=newest.recommended_tier if newest else None,
            recommended_name=tier_name(ruleset, newest.recommended_tier) if newest else None,
            pending=False, assessment_id=newest.id if newest else None, prepare=prepare,
            indicators=indicators, sentence=sentence, geometry=geometry,
        ))
    lines.sort(key=lambda x: x.name)
    return _Base(day=last, lines=tuple(lines), changes=tuple(changes))


def _indicators(
    ruleset: Ruleset, data: dict[str, Any], history: dict[date, Assessment], days: list[date]
) -> list[KeyIndicator]:
    out = []
    for k, item in enumerate(data.get("criteria", [])):
        spec = ruleset.indicator(item["indicator"])
        series = []
        for day in days:
            a = history.get(day)
            crits = a.explanation.get("data", {}).get("criteria", []) if a else []
            v = crits[k].get("value") if k < len(crits) else None
            series.append(float("nan") if v is None else float(v))
        interval = None
        if item.get("lower") is not None and item.get("upper") is not None:
            interval = (f"{item['lower']:.{spec.decimals}f}–{item['upper']:.{spec.decimals}f}")
        out.append(KeyIndicator(
            id=item["id"], label=item.get("label") or spec.label,
            value_text=_fmt(item.get("value"), spec.decimals, spec.unit),
            interval_text=interval, level=int(item.get("level", 0)),
            known=bool(item.get("known", False)), series=tuple(series),
        ))
    return out


def _changes(
    ruleset: Ruleset, code: str, name: str, before: Assessment, now: Assessment
) -> list[Change]:
    out = []
    if before.recommended_tier != now.recommended_tier:
        verb = "rose" if now.recommended_tier > before.recommended_tier else "fell"
        out.append(Change(code=code, name=name, what=(
            f"recommended tier {verb} from {tier_name(ruleset, before.recommended_tier)} "
            f"to {tier_name(ruleset, now.recommended_tier)}"
        )))
    for sid, on in now.prepare_signals.items():
        if on and not before.prepare_signals.get(sid, False):
            out.append(Change(code=code, name=name, what=f"prepare signal {sid} fired"))
    return out


_STATUSES: dict[tuple[object, ...], tuple[FeedStatus, ...]] = {}


def _statuses(
    session: Session, now: datetime, catalogue: FeedCatalogue, time_zone: str
) -> tuple[FeedStatus, ...]:
    """:func:`feed_statuses`, kept for the rest of the minute while no vintage landed and no
    feed run was recorded (its freshness query reads every observation's vintage: ~0.1 s at
    3 000 regions). Its verdicts depend on the clock only through the office day and the
    overdue instant, so they are at most a minute behind the Feeds page's."""
    newest = session.scalar(select(func.max(Vintage.id)))
    states = session.execute(
        select(func.count(), type_coerce(func.max(FeedState.last_attempt_at), UTCDateTime()),
               func.sum(FeedState.failures)).select_from(FeedState)
    ).one()
    key = (str(catalogue.path), tuple(sorted(catalogue.feeds)), time_zone, newest, *states,
           int(now.timestamp() // 60))
    with _LOCK:
        hit = _STATUSES.get(key)
    if hit is None:
        hit = tuple(feed_statuses(session=session, catalogue=catalogue, now=now,
                                  time_zone=time_zone))
        with _LOCK:
            _STATUSES.clear()
            _STATUSES[key] = hit
    return hit


def _feeds(
    session: Session, now: datetime, catalogue: FeedCatalogue | None, time_zone: str
) -> tuple[FeedFreshness, ...]:
    """Every configured feed with the Feeds page's verdict (:func:`feed_statuses`), then every
    other source that delivered (no definition, so no verdict), each by name."""
    out = []
    if catalogue is not None:
        for st in _statuses(session, now, catalogue, time_zone):
            received = st.last_received_at
            out.append(FeedFreshness(
                feed=st.name, configured=True, status=st.health, received_at=received,
                age_hours=None if received is None else (now - received).total_seconds() / 3600,
                rows_accepted=st.last_accepted, rows_rejected=st.last_rejected,
                stale_regions=len(st.stale_regions), stale_after_days=st.stale_after_days,
            ))
    known = {f.feed for f in out}
    newest = (
        select(Vintage.feed, func.max(Vintage.id).label("vid")).group_by(Vintage.feed).subquery()
    )
    rows = session.execute(
        select(Vintage.feed, type_coerce(Vintage.received_at, UTCDateTime()),
               Vintage.rows_accepted, Vintage.rows_rejected)
        .join(newest, newest.c.vid == Vintage.id)
        .order_by(Vintage.feed)
    ).all()
    for feed, received, accepted, rejected in rows:
        if feed in known:
            continue
        out.append(FeedFreshness(
            feed=feed, configured=False, status="not configured", received_at=received,
            age_hours=(now - received).total_seconds() / 3600, rows_accepted=accepted,
            rows_rejected=rejected,
        ))
    return tuple(out)


def _sort(lines: list[DistrictLine], key: str) -> list[DistrictLine]:
    def tier(v: int | None) -> int:
        return -99 if v is None else v

    if key == "code":
        return sorted(lines, key=lambda x: x.code)
    if key == "tier":
        return sorted(lines, key=lambda x: (-tier(x.official_tier), x.name))
    if key == "recommended":
        return sorted(lines, key=lambda x: (-tier(x.recommended_tier), x.name))
    if key == "pending":
        return sorted(lines, key=lambda x: (not x.pending, not x.prepare, x.name))
    return sorted(lines, key=lambda x: x.name)


_ON_HAND: dict[int, tuple[DataOverview, tuple[MeasureLabel, ...]]] = {}


def _data_on_hand(session: Session) -> tuple[int, DataOverview, tuple[MeasureLabel, ...]]:
    """The newest reference date of each measure per region and the measures' labels, cached
    per newest vintage (the key, returned with them)."""
    key = int(session.scalar(select(func.max(Vintage.id))) or 0)
    with _LOCK:
        cached = _ON_HAND.get(key)
    if cached is None:
        overview = data_overview(session=session)
        found = {
            name: measure_label(name, unit, description or "")
            for name, unit, description in session.execute(
                select(Measure.name, Measure.unit, Measure.description))
        }
        labels = tuple(found.get(m, measure_label(m, "", "")) for m in overview.measures)
        cached = (overview, labels)
        with _LOCK:
            _ON_HAND.clear()
            _ON_HAND[key] = cached
    return key, *cached


def morning_overview(
    *, session: Session, sort: str = "pending", query: str = "", tier: int | None = None,
    pending_only: bool = False, page: int = 1, per_page: int = 100,
    now: datetime | None = None, catalogue: FeedCatalogue | None = None,
    time_zone: str = "UTC",
) -> MorningOverview:
    """Every district's official and recommended tier, signals, indicators; filtered, sorted and
    paged (``page`` counts from 1); the feeds of ``catalogue`` judged as on the Feeds page
    (without a catalogue only the sources that delivered, unjudged)."""
    if sort not in SORT_KEYS:
        raise SortKeyError(sort)
    if page < 1 or per_page < 1:
        raise ValueError(f"page and per_page must be >= 1, got {page} and {per_page}")
    now = now or datetime.now(UTC)
    row = active_ruleset(session=session)
    feeds = _feeds(session, now, catalogue, time_zone)
    on_hand_key, on_hand, measures = _data_on_hand(session)
    if row is None:
        return MorningOverview(
            ruleset=None, data_cutoff=None, day=None, lines=(), total=0, page=1, pages=1,
            pending=0, tier_counts={}, tier_names=(), feeds=feeds, changes=(), every=(),
            data_on_hand=on_hand, data_on_hand_key=on_hand_key, measures=measures,
        )
    run = newest_run_of(session=session, ruleset_id=row.id)
    cutoff = run.data_cutoff if run is not None else None
    ruleset = parsed(row)
    # a replay of an older cutoff may copy rows to this run (same content, new ids): rows_written
    # counts them, so the key changes with them
    key = (row.id, cutoff.isoformat(), run.rows_written) if run is not None else (row.id, "-")
    with _LOCK:
        base = _CACHE.get(key)
    if base is None:
        base = (
            _build_base(session, row.id, ruleset, run.data_cutoff, run.last_day) if run
            else _Base(day=None, lines=(), changes=())
        )
        with _LOCK:
            _CACHE.clear()
            _CACHE[key] = base
    # publications since the previous morning's data count as changes too
    review = _review_state(session, key, base, cutoff - timedelta(days=1) if cutoff else None,
                           ruleset, row.name)
    several = len(active_rulesets(session=session)) > 1
    columns = policy_columns(session=session) if several else ()
    lines = review.lines
    # "pending only": a change awaits review under any active policy
    waiting = {code for c in columns for code, cell in c.cells.items() if cell.pending}
    chosen = [
        line for line in lines
        if (not query or query.lower() in line.name.lower() or query.lower() in line.code.lower())
        and (tier is None or line.recommended_tier == tier or line.official_tier == tier)
        and (not pending_only or line.pending or line.code in waiting)
    ]
    chosen = _sort(chosen, sort)
    pages = max(1, math.ceil(len(chosen) / per_page))
    page = min(page, pages)
    return MorningOverview(
        ruleset=f"{row.name} {row.version}", data_cutoff=cutoff, day=base.day,
        lines=tuple(chosen[(page - 1) * per_page: page * per_page]), total=len(chosen),
        page=page, pages=pages, pending=review.pending, decided=review.decided,
        tier_counts=review.tier_counts,
        tier_names=tuple(t.name for t in ruleset.tiers), feeds=feeds,
        changes=base.changes + review.published,
        every=tuple(lines), data_on_hand=on_hand, data_on_hand_key=on_hand_key,
        measures=measures, policies=columns,
    )
