"""Use case: review and publish tier changes.

The engine recommends; people decide. A *pending change* is a district whose newest recommended
tier (active ruleset, newest evaluation run, last day) differs from its official tier and that no
one has decided on since the recommendation took its current value. An approver confirms the
recommendation or overrides it, always with a reason; :func:`publish` makes every unpublished
decision visible to the public. Districts with no decision yet start from their recommended tier
when first published. Every decision and publication is written to the audit log.

A decision takes effect as the active policy's ``timing.effective_delay_days`` says
(:func:`effective_from`): that many days after the office's calendar day on which it is taken,
and never before the day after the data it answered (a decision taken on the 4th under a delay of
one day is in force from the 5th; under no delay from the 4th).

Only the district's current item can be decided: its assessment of the newest
day in force at the active ruleset's newest evaluation run (the row with the greatest data cutoff
not after the run's; a run stores only what changed, so an unchanged recommendation keeps its
row, its id and any decision on it); a form posted for any other assessment (an older day, a row
superseded by a newer run, a retired ruleset) is refused. Decisions keep pointing at their row,
which is never deleted. The official tier is the decision that
takes effect last (ties: the one taken last), so a late decision about an earlier day never wins.

A recommendation of *insufficient data* (tier -1: a gate failed) is a pending change too, since
the data no longer support the official tier. Confirming it keeps the official tier unchanged
(the decision records that tier, the reason, and the -1 it answered), which settles the district
until its recommendation changes again; a district with no official tier yet cannot be confirmed
at "insufficient data" and needs an override with a tier.

With a loaded notification config (``publish(..., notify=...)``) a publication sends one
``published`` event per district whose official public tier it changed (including a first
publication); a failed delivery is logged and audited and never undoes the publication.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import UTC, date, datetime, timedelta
from zoneinfo import ZoneInfo

from sqlalchemy import func, or_, select, update
from sqlalchemy.orm import Session, aliased

from rules import Ruleset
from server.services.audit import record
from server.services.errors import ServiceError
from server.services.evaluation import (
    LatestItem,
    LatestRun,
    active_ruleset,
    assessments_as_of,
    current_assessment_id,
    newest_run,
)
from server.services.notify import Delivery, Event, NotifyConfig, deliver_and_record
from server.services.ruleset_cache import parsed
from server.services.tiers import Scale, decision_scales, tier_label, tier_name
from server.services.users import may
from server.store.models import Assessment, Region, User
from server.store.models import Decision as DecisionRow

__all__ = [
    "Decision",
    "DecisionConflictError",
    "DecisionRecord",
    "OfficialTier",
    "PendingChange",
    "PublishResult",
    "RecommendationChangedError",
    "ReviewError",
    "current_run",
    "decide",
    "decision_history",
    "effective_from",
    "has_something_to_publish",
    "official_tiers",
    "pending_changes",
    "publish",
]


class ReviewError(ServiceError, ValueError):
    """A decision or publication that cannot be made; names the offending argument and value."""

    def __init__(self, argument: str, message: str) -> None:
        self.argument = argument
        super().__init__(f"{argument}: {message}")


class RecommendationChangedError(ReviewError):
    """The recommendation a decision form was opened for changed before it was posted."""

    def __init__(
        self, *, posted_id: int, region: str, current_id: int | None, tier: int | None,
        tier_name: str | None,
    ) -> None:
        self.posted_id = posted_id
        self.region = region
        self.current_id = current_id
        self.tier = tier
        self.tier_name = tier_name
        now = (
            f"it now recommends {tier_name} (assessment {current_id})"
            if current_id is not None else "it has no current recommendation"
        )
        super().__init__(
            "assessment_id",
            f"{posted_id} is not the district's current recommendation any more: new data "
            f"changed {region}'s recommendation while the form was open; {now}; review it again",
        )


class DecisionConflictError(ReviewError):
    """The district was decided since the form was opened: the official tier (or the decision
    that set it) is not the one the form saw. Two approvers deciding the same change at the same
    moment get one stored decision and this error."""

    def __init__(
        self, *, region: str, seen_tier: int | None, seen_decision_id: int | None,
        tier: int | None, tier_name: str, decision_id: int | None, by: str,
        at: datetime | None,
    ) -> None:
        self.region = region
        self.seen_tier = seen_tier
        self.seen_decision_id = seen_decision_id
        self.tier = tier
        self.tier_name = tier_name
        self.decision_id = decision_id
        self.by = by
        self.at = at
        saw = "no official tier" if seen_tier is None else f"official tier {seen_tier}"
        if decision_id is None:
            now = "it has no official tier"
        else:
            when = f" at {at:%Y-%m-%d %H:%M:%S} UTC" if at is not None else ""
            who = f" by {by}" if by else ""
            now = f"it is now {tier_name} (decision {decision_id}{who}{when})"
        super().__init__(
            "official_tier",
            f"the form for {region} saw {saw} (decision {seen_decision_id or 'none'}); {now}; "
            "someone decided meanwhile: review it again",
        )


@dataclass(frozen=True, kw_only=True)
class OfficialTier:
    """The tier in force for a district by decision (published, unless asked otherwise)."""

    region: str
    name: str
    tier: int
    tier_name: str
    public_text: str
    since: date
    published_at: datetime | None
    #: The decision that set the tier, and the ruleset it was decided under (its name and
    #: version; ``ruleset_id`` None when not known).
    decision_id: int = 0
    ruleset_id: int | None = None
    ruleset_label: str = ""


@dataclass(frozen=True, kw_only=True)
class PendingChange:
    """A recommendation that differs from the official tier and awaits a decision."""

    region: str
    name: str
    official_tier: int | None
    official_name: str
    recommended_tier: int
    recommended_name: str
    since: date
    assessment_id: int
    sentence: str
    #: The decision that set the official tier (None: never decided); a decision form sends it
    #: back with the tier, so a decision taken meanwhile is noticed (409).
    official_decision_id: int | None = None
    #: How the active policy takes over an official tier decided under another ruleset
    #: (empty when it was decided under the active one).
    official_note: str = ""


@dataclass(frozen=True, kw_only=True)
class Decision:
    """One decision as taken (``kind`` is ``confirmed`` or ``overridden``)."""

    id: int
    region: str
    tier: int
    tier_name: str
    kind: str
    reason: str
    user: str
    decided_at: datetime
    effective_date: date
    assessment_id: int | None
    published_at: datetime | None


@dataclass(frozen=True, kw_only=True)
class DecisionRecord:
    """A decision in the history, with the recommendation it answered."""

    id: int
    region: str
    name: str
    tier: int
    tier_name: str
    recommended_tier: int | None
    recommended_name: str
    kind: str
    reason: str
    user: str
    decided_at: datetime
    effective_date: date
    published_at: datetime | None
    #: the day and data cutoff of the assessment answered (None: none, or another ruleset's),
    #: for its explanation as it was when decided
    assessment_day: date | None = None
    assessment_cutoff: datetime | None = None
    #: True when the decision answered no assessment (``recorded``, imported) and the
    #: recommendation shown is the engine's for the day it was taken, read as known then, or,
    #: when that day was first assessed after the decision, as first assessed
    #: (``recommended_later``)
    recommended_looked_up: bool = False
    recommended_later: bool = False


@dataclass(frozen=True, kw_only=True)
class PublishResult:
    """What one publication made public."""

    published_at: datetime
    decisions: int
    regions: tuple[str, ...]
    initial: tuple[str, ...]
    notified: tuple[Delivery, ...] = field(default=())


def _active(session: Session) -> Ruleset | None:
    row = active_ruleset(session=session)
    return None if row is None else parsed(row)


#: The order in which decisions take over from one another: by the day a decision takes effect,
#: then by when it was taken (a late decision about an earlier day never outranks a later day).
_RANK = (DecisionRow.effective_date, DecisionRow.decided_at, DecisionRow.id)


def _rank(row: DecisionRow) -> tuple[date, datetime, int]:
    return (row.effective_date, row.decided_at, row.id)


def _decisions(session: Session, published_only: bool) -> dict[int, list[DecisionRow]]:
    """Decisions per region id, lowest rank first (:data:`_RANK`)."""
    query = select(DecisionRow).order_by(*_RANK)
    if published_only:
        query = query.where(DecisionRow.published_at.is_not(None))
    out: dict[int, list[DecisionRow]] = {}
    for row in session.scalars(query):
        out.setdefault(row.region_id, []).append(row)
    return out


def _since(rows: list[DecisionRow]) -> date:
    """Effective date of the first decision of the trailing run at the newest tier."""
    since = rows[-1].effective_date
    for row in reversed(rows):
        if row.tier != rows[-1].tier:
            break
        since = row.effective_date
    return since


def official_tiers(*, session: Session, published_only: bool = True) -> dict[str, OfficialTier]:
    """Official tier of every district that has one, by region code.

    Each is named under the ruleset it was decided under (:mod:`server.services.tiers`), so
    a tier the active policy does not have (after a policy change) keeps its name."""
    regions = {r.id: r for r in session.scalars(select(Region))}
    decisions = _decisions(session, published_only)
    scales = decision_scales(session=session, rows=[rows[-1] for rows in decisions.values()])
    out = {}
    for region_id, rows in decisions.items():
        last = rows[-1]
        region = regions[region_id]
        scale = scales[last.id]
        out[region.code] = OfficialTier(
            region=region.code, name=region.name, tier=last.tier,
            tier_name=scale.name(last.tier), public_text=scale.public(last.tier),
            since=_since(rows), published_at=last.published_at, decision_id=last.id,
            ruleset_id=scale.ruleset_id, ruleset_label=scale.label,
        )
    return out


def _takeover(scale: Scale, tier: int, active: Ruleset, active_id: int, active_label: str) -> str:
    """How the active policy takes over an official tier decided under another ruleset."""
    if scale.ruleset_id == active_id:
        return ""
    under = f" under {scale.label}" if scale.label else " (ruleset not known)"
    return (
        f"Official: {tier_label(scale.ruleset, tier)}{under}; the active policy {active_label} "
        f"has tiers 0–{active.top_tier}: the next decision will be on its scale"
    )


def current_run(*, session: Session) -> LatestRun | None:
    """Each district's current recommendation under the active ruleset's newest run, and the
    day it took that value, without reading every day of the history.

    A district's current recommendation starts on its newest *transition* in force at the run:
    the newest row (greatest day, as of the run's cutoff) whose ``previous_tier`` differs from
    its ``recommended_tier``. Rows stay consistent across runs (a run that changes a day's tier
    changes the next day's ``previous_tier``, so it stores that day anew), so this is the first
    day of the trailing run of days with the current tier; with no transition in force it is the
    district's first assessed day. Transitions are few, and checking that one is still in force
    (no newer row of its day up to the cutoff) is one index probe each.
    """
    newest = newest_run(session=session)
    if newest is None:
        return None
    row, run = newest
    cutoff, last_day = run.data_cutoff, run.last_day
    query = assessments_as_of(
        select(Region.id, Region.code, Region.name, Assessment)
        .join(Region, Region.id == Assessment.region_id),
        ruleset_id=row.id, cutoff=cutoff, start=last_day, end=last_day,
    ).order_by(Region.code)
    found = session.execute(query).all()
    a, b = Assessment, aliased(Assessment)
    superseded = (
        select(b.id).where(
            b.ruleset_id == a.ruleset_id, b.region_id == a.region_id, b.ref_date == a.ref_date,
            b.data_cutoff > a.data_cutoff, b.data_cutoff <= cutoff,
        ).exists()
    )
    transitions = session.execute(
        select(a.region_id, func.max(a.ref_date))
        .where(
            a.ruleset_id == row.id, a.data_cutoff <= cutoff, a.ref_date <= last_day,
            or_(a.previous_tier.is_(None), a.previous_tier != a.recommended_tier),
            ~superseded,
        )
        .group_by(a.region_id)
    ).all()
    since: dict[int, date] = dict(transitions)
    missing = [rid for rid, *_ in found if rid not in since]
    if missing:
        first = (
            select(func.min(a.ref_date))
            .where(a.ruleset_id == row.id, a.region_id == Region.id, a.data_cutoff <= cutoff)
            .scalar_subquery()
        )
        since.update(session.execute(
            select(Region.id, first).where(Region.id.in_(missing))
        ).all())
    items = tuple(
        LatestItem(region_id=rid, code=code, name=name, assessment=item, since=since[rid])
        for rid, code, name, item in found
    )
    return LatestRun(
        ruleset_row=row, ruleset=parsed(row), data_cutoff=cutoff, last_day=last_day,
        items=items,
    )


def pending_changes(*, session: Session) -> list[PendingChange]:
    """Districts whose newest recommendation differs from their latest decision, by code.

    A district stays settled after a decision on a recommendation until the recommendation
    changes again (an override that keeps the tier is not asked again every day).
    """
    latest = current_run(session=session)
    if latest is None:
        return []
    decisions = _decisions(session, published_only=False)
    answered = _answered_assessments(session, decisions)
    scales = decision_scales(session=session, rows=[rows[-1] for rows in decisions.values()])
    active_row = latest.ruleset_row
    active_label = f"{active_row.name} {active_row.version}"
    out = []
    for item in latest.items:
        rows = decisions.get(item.region_id, [])
        last = rows[-1] if rows else None
        official = last.tier if last is not None else None
        if item.assessment.recommended_tier == official:
            continue
        last_answer = answered.get(item.region_id)
        if (
            last_answer is not None
            and last_answer[1] == item.assessment.recommended_tier
            and last_answer[0] >= item.since
        ):
            continue
        scale = scales[last.id] if last is not None else None
        out.append(
            PendingChange(
                region=item.code, name=item.name, official_tier=official,
                official_name="" if official is None or scale is None else scale.name(official),
                recommended_tier=item.assessment.recommended_tier,
                recommended_name=tier_name(latest.ruleset, item.assessment.recommended_tier),
                since=item.since, assessment_id=item.assessment.id,
                sentence=str(item.assessment.explanation.get("sentence", "")),
                official_decision_id=None if last is None else last.id,
                official_note="" if official is None or scale is None else _takeover(
                    scale, official, latest.ruleset, active_row.id, active_label),
            )
        )
    return sorted(out, key=lambda p: p.region)


def _answered_assessments(
    session: Session, decisions: dict[int, list[DecisionRow]]
) -> dict[int, tuple[date, int]]:
    """Per region: (day, recommended tier) of the assessment its latest decision answered."""
    ids = {rows[-1].assessment_id: rid for rid, rows in decisions.items() if rows[-1].assessment_id}
    if not ids:
        return {}
    query = select(Assessment.id, Assessment.ref_date, Assessment.recommended_tier).where(
        Assessment.id.in_(list(ids))
    )
    return {ids[aid]: (day, tier) for aid, day, tier in session.execute(query)}


def effective_from(
    data_day: date, decided_at: datetime, ruleset: Ruleset | None, time_zone: str = "UTC"
) -> date:
    """The first day a decision is in force: ``timing.effective_delay_days`` of ``ruleset``
    after the office's calendar day of ``decided_at`` (in ``time_zone``), and at the earliest
    the day after ``data_day``, the day of the data it answered (docs/decisions.md).

    A decision taken on day t under a delay of k days is in force from t + k, as the engine
    counts it for its own decisions (``docs/rules.md``, "Semantics", point 4); the floor keeps a
    decision from reaching back over days already assessed.
    """
    delay = 1 if ruleset is None else ruleset.timing.effective_delay_days
    taken_on = decided_at.astimezone(ZoneInfo(time_zone)).date()
    return max(data_day + timedelta(days=1), taken_on + timedelta(days=delay))


def _approver(session: Session, user: str) -> User:
    row = session.scalar(select(User).where(User.name == user))
    if row is None or not row.active:
        raise ReviewError("user", f"{user!r} is not an active staff account")
    if not may(row.role, "decide"):
        raise ReviewError("user", f"{user!r} is a {row.role}; only approvers and admins decide")
    return row


def _as_decision(row: DecisionRow, code: str, user: str, ruleset: Ruleset | None) -> Decision:
    return Decision(
        id=row.id, region=code, tier=row.tier, tier_name=tier_name(ruleset, row.tier),
        kind=row.kind, reason=row.reason, user=user, decided_at=row.decided_at,
        effective_date=row.effective_date, assessment_id=row.assessment_id,
        published_at=row.published_at,
    )


def _official_of(session: Session, region_id: int) -> DecisionRow | None:
    """The region's top-ranked decision (published or not), None when never decided."""
    return session.scalar(
        select(DecisionRow)
        .where(DecisionRow.region_id == region_id)
        .order_by(*(c.desc() for c in _RANK))
        .limit(1)
    )


def _lock_district(session: Session, region_id: int) -> None:
    """Hold the district's decisions until the transaction ends.

    PostgreSQL: a row lock on the region (``SELECT ... FOR UPDATE``); a second decision on the
    same district waits for the first transaction to end, and its next statement (READ
    COMMITTED) sees the decision the first one stored. SQLite: a write that changes nothing takes
    the database's one write lock now, before the decision reads what it compares (in WAL mode
    the first statement of a write transaction reads the newest commit). Either way the check
    "the official decision is still the one the form saw" and the insert are one atomic step.
    """
    if session.get_bind().dialect.name == "postgresql":
        session.execute(select(Region.id).where(Region.id == region_id).with_for_update())
    else:
        session.execute(
            update(Region).where(Region.id == region_id).values(name=Region.name)
            .execution_options(synchronize_session=False)
        )


def _check_seen(
    session: Session, region_id: int, official: DecisionRow | None, seen_tier: int | None,
    seen_decision_id: int | None,
) -> None:
    """Raise :class:`DecisionConflictError` unless ``official`` is what the form saw."""
    current_id = None if official is None else official.id
    current_tier = None if official is None else official.tier
    if current_id == seen_decision_id and current_tier == seen_tier:
        return
    code = session.scalar(select(Region.code).where(Region.id == region_id)) or ""
    by, name = "", "none"
    if official is not None:
        by = session.scalar(select(User.name).where(User.id == official.decided_by)) or ""
        name = tier_label(decision_scales(session=session, rows=[official])[official.id].ruleset,
                          official.tier)
    raise DecisionConflictError(
        region=code, seen_tier=seen_tier, seen_decision_id=seen_decision_id, tier=current_tier,
        tier_name=name, decision_id=current_id, by=by,
        at=None if official is None else official.decided_at,
    )


def _current_for(session: Session, posted: Assessment) -> Assessment:
    """The district's current assessment standing in for ``posted`` (a form opened earlier).

    New data may re-evaluate a district while an approver types a reason. When the current
    assessment (newest day of the newest run, active ruleset) recommends the tier the form was
    posted for, under the same ruleset, the decision is taken on the current one.

    Raises
    ------
    RecommendationChangedError
        When the recommendation changed meanwhile (another tier or another ruleset), or the
        district has no current assessment.
    """
    current_id = current_assessment_id(session=session, region_id=posted.region_id)
    if current_id == posted.id:
        return posted
    current = None if current_id is None else session.get(Assessment, current_id)
    if (
        current is not None
        and current.ruleset_id == posted.ruleset_id
        and current.recommended_tier == posted.recommended_tier
    ):
        return current
    code = session.scalar(select(Region.code).where(Region.id == posted.region_id)) or ""
    ruleset = _active(session)
    raise RecommendationChangedError(
        posted_id=posted.id, region=code, current_id=current_id,
        tier=None if current is None else current.recommended_tier,
        tier_name=None if current is None else tier_label(ruleset, current.recommended_tier),
    )


def decide(
    *, session: Session, assessment_id: int, user: str, accept: bool, tier: int | None,
    reason: str, official_tier: int | None, official_decision_id: int | None,
    time_zone: str = "UTC", now: datetime | None = None,
) -> Decision:
    """Confirm (``accept``) the recommendation of an assessment, or override it with ``tier``.

    The reason is mandatory in both cases. The decision is unpublished until :func:`publish`.
    Confirming an *insufficient data* recommendation (-1) keeps the official tier unchanged.

    ``official_tier`` and ``official_decision_id`` are what the form showed: the district's
    official tier and the decision that set it (both None when it had none;
    :attr:`PendingChange.official_decision_id`). The decision is stored only if they are still
    the district's official decision; the comparison and the insert run under a lock on the
    district (:func:`_lock_district`), so of two approvers deciding the same change at the same
    moment exactly one succeeds and the other gets :class:`DecisionConflictError`.

    The decision takes effect on :func:`effective_from` of the assessment's day and ``now``
    (the clock when None) in the office's ``time_zone``.

    Raises
    ------
    DecisionConflictError
        The district was decided since the form was opened.
    RecommendationChangedError
        New data changed the recommendation since the form was opened.
    ReviewError
        Blank reason, unknown assessment, an assessment that is not the district's current item
        in the review (another day, a row superseded by a newer run, a retired ruleset), a user
        who is not an approver, a missing or out-of-range override tier, confirming insufficient
        data with no official tier to keep.
    """
    if not reason or not reason.strip():
        raise ReviewError("reason", "a decision needs a reason")
    approver = _approver(session, user)
    assessment = session.get(Assessment, assessment_id)
    if assessment is None:
        raise ReviewError("assessment_id", f"no assessment {assessment_id}")
    _lock_district(session, assessment.region_id)
    official = _official_of(session, assessment.region_id)
    _check_seen(session, assessment.region_id, official, official_tier, official_decision_id)
    posted = assessment
    assessment = _current_for(session, posted)
    ruleset = _active(session)
    top = ruleset.top_tier if ruleset is not None else None
    kept: int | None = None
    if accept and assessment.recommended_tier < 0:
        kept = None if official is None else official.tier
        if kept is None:
            raise ReviewError(
                "accept", "insufficient data and no official tier to keep; override with a tier"
            )
        if tier is not None and tier != kept:
            raise ReviewError("tier", f"{tier} differs from the official {kept} kept; override")
        chosen, kind = kept, "confirmed"
    elif accept:
        chosen, kind = assessment.recommended_tier, "confirmed"
        if tier is not None and tier != chosen:
            raise ReviewError("tier", f"{tier} differs from the recommended {chosen}; override")
    else:
        if tier is None:
            raise ReviewError("tier", "an override needs a tier")
        if tier < 0 or (top is not None and tier > top):
            raise ReviewError("tier", f"{tier} is not a tier (0..{top})")
        chosen, kind = tier, "overridden"
    now = now or datetime.now(UTC)
    row = DecisionRow(
        region_id=assessment.region_id, assessment_id=assessment.id,
        effective_date=effective_from(assessment.ref_date, now, ruleset, time_zone),
        tier=chosen, kind=kind,
        reason=reason.strip(), decided_by=approver.id, decided_at=now, published_at=None,
    )
    session.add(row)
    session.flush()
    code = session.scalar(select(Region.code).where(Region.id == assessment.region_id)) or ""
    record(
        session=session, actor=user, action=f"decision.{kind}", subject=code,
        details={
            "decision_id": row.id, "assessment_id": assessment.id, "tier": chosen,
            "seen_official_tier": official_tier, "seen_official_decision_id": official_decision_id,
            **({"posted_assessment_id": posted.id} if posted.id != assessment.id else {}),
            "recommended_tier": assessment.recommended_tier, "reason": row.reason,
            "effective_date": row.effective_date.isoformat(),
            **({"kept_official_tier": kept} if kept is not None else {}),
        },
        at=now,
    )
    return _as_decision(row, code, user, ruleset)


def _published_events(
    before: dict[str, OfficialTier], after: dict[str, OfficialTier], rows: list[DecisionRow],
    codes: dict[int, str],
) -> list[Event]:
    """One ``published`` event per district whose published tier this publication changed."""
    last = {codes[r.region_id]: r for r in sorted(rows, key=_rank)}
    out = []
    for code in sorted(last):
        new, old = after[code], before.get(code)
        if old is not None and old.tier == new.tier:
            continue
        row = last[code]
        was = f" (was {old.tier_name})" if old is not None else " (first publication)"
        out.append(
            Event(
                kind="published", region=code, date=row.effective_date, tier=new.tier,
                previous=None if old is None else old.tier, signal=None,
                sentence=(
                    f"Published: {new.name} is at {new.tier_name} from "
                    f"{row.effective_date.isoformat()}{was}; {row.kind}: {row.reason}"
                ),
            )
        )
    return out


def _first_publications(session: Session) -> list[LatestItem]:
    """Current items of districts never decided that a publication would start (tier >= 0)."""
    decided = set(session.scalars(select(DecisionRow.region_id).distinct()))
    districts = set(session.scalars(select(Region.id).where(Region.level == "district")))
    if not districts - decided:  # every district decided once: no need to read the run
        return []
    latest = current_run(session=session)
    if latest is None:
        return []
    return [
        item for item in latest.items
        if item.region_id not in decided and item.assessment.recommended_tier >= 0
    ]


def _unpublished_count(session: Session) -> int:
    return session.scalar(
        select(func.count()).select_from(DecisionRow).where(DecisionRow.published_at.is_(None))
    ) or 0


def has_something_to_publish(*, session: Session) -> bool:
    """Whether :func:`publish` would publish anything: an unpublished decision, or a district
    never decided that a first publication would start from its recommendation."""
    return bool(_unpublished_count(session)) or bool(_first_publications(session))


def publish(
    *, session: Session, user: str, notify: NotifyConfig | None = None,
    time_zone: str = "UTC",
) -> PublishResult:
    """Publish every unpublished decision; districts never decided start from their recommendation.

    With ``notify``, the districts whose public tier changed are notified (``published`` events).
    With nothing to publish, nothing is written (no audit entry) and the result has
    ``decisions == 0``. First publications are made under the districts' locks, like
    :func:`decide`, so two publications at once start each district once.

    Raises
    ------
    ReviewError
        When ``user`` is not an approver.
    """
    approver = _approver(session, user)
    now = datetime.now(UTC)
    starting = _first_publications(session)
    if starting:
        # under the districts' locks (in id order: two publications never wait on each other in
        # a circle), read again: a decision or publication that committed meanwhile wins
        for region_id in sorted(item.region_id for item in starting):
            _lock_district(session, region_id)
        starting = _first_publications(session)
    if not starting and not _unpublished_count(session):
        return PublishResult(published_at=now, decisions=0, regions=(), initial=())
    initial: list[str] = []
    if starting:
        ruleset = _active(session)
        for item in starting:
            a = item.assessment
            session.add(
                DecisionRow(
                    region_id=item.region_id, assessment_id=a.id,
                    effective_date=effective_from(a.ref_date, now, ruleset, time_zone),
                    tier=a.recommended_tier,
                    kind="confirmed", reason="first publication: starts from the recommended tier",
                    decided_by=approver.id, decided_at=now, published_at=None,
                )
            )
            initial.append(item.code)
        session.flush()
    rows = list(session.scalars(select(DecisionRow).where(DecisionRow.published_at.is_(None))))
    codes = dict(session.execute(select(Region.id, Region.code)).all())
    before = official_tiers(session=session) if notify is not None else {}
    for row in rows:
        row.published_at = now
    session.flush()
    regions = tuple(sorted({codes[r.region_id] for r in rows}))
    record(
        session=session, actor=user, action="decision.publish", subject=", ".join(regions),
        details={"decisions": [r.id for r in rows], "initial": sorted(initial)}, at=now,
    )
    notified: tuple[Delivery, ...] = ()
    if notify is not None and rows:
        events = _published_events(before, official_tiers(session=session), rows, codes)
        notified = deliver_and_record(
            events, notify, session=session, actor=user, context="publication"
        )
    return PublishResult(
        published_at=now, decisions=len(rows), regions=regions, initial=tuple(sorted(initial)),
        notified=notified,
    )


def decision_history(
    *, session: Session, region: str | None = None, limit: int | None = None,
    unpublished_only: bool = False,
) -> list[DecisionRecord]:
    """Every decision, newest first (of one district when ``region`` is given, only the
    unpublished ones with ``unpublished_only``; at most ``limit`` when given). Tiers are named
    under the ruleset each decision was made under (:mod:`server.services.tiers`)."""
    active = active_ruleset(session=session)
    active_id = -1 if active is None else active.id  # only the active ruleset's are linked
    query = (
        select(DecisionRow, Region.code, Region.name, User.name, Assessment.recommended_tier,
               Assessment.ref_date, Assessment.data_cutoff, Assessment.ruleset_id)
        .join(Region, Region.id == DecisionRow.region_id)
        .outerjoin(User, User.id == DecisionRow.decided_by)
        .outerjoin(Assessment, Assessment.id == DecisionRow.assessment_id)
        .order_by(DecisionRow.decided_at.desc(), DecisionRow.id.desc())
    )
    if region is not None:
        query = query.where(Region.code == region)
    if unpublished_only:
        query = query.where(DecisionRow.published_at.is_(None))
    if limit is not None:
        query = query.limit(limit)
    found = session.execute(query).all()
    scales = decision_scales(session=session, rows=[r[0] for r in found])
    looked_up = _recommended_when_taken(
        session, active_id, [r[0] for r in found if r[0].assessment_id is None])
    out = []
    for row, code, name, user, recommended, day, cutoff, ruleset_id in found:
        later = False
        if row.assessment_id is None and row.id in looked_up:
            recommended, day, cutoff, later = looked_up[row.id]
            ruleset_id = active_id
            name_of = tier_name(parsed(active) if active else None, recommended)
        else:
            name_of = "" if recommended is None else scales[row.id].name(recommended)
        out.append(DecisionRecord(
            id=row.id, region=code, name=name, tier=row.tier,
            tier_name=scales[row.id].name(row.tier), recommended_tier=recommended,
            recommended_name=name_of,
            kind=row.kind, reason=row.reason, user=user or "", decided_at=row.decided_at,
            effective_date=row.effective_date, published_at=row.published_at,
            assessment_day=day if ruleset_id == active_id else None,
            assessment_cutoff=cutoff if ruleset_id == active_id else None,
            recommended_looked_up=row.assessment_id is None and row.id in looked_up,
            recommended_later=later,
        ))
    return out


def _recommended_when_taken(
    session: Session, ruleset_id: int, rows: list[DecisionRow]
) -> dict[int, tuple[int, date, datetime, bool]]:
    """For decisions that answered no assessment (imported ``recorded`` ones): decision id ->
    (recommended tier, day, data cutoff, first assessed after the decision) of the active
    ruleset's assessment of the day the decision was taken (its ``decided_at`` in UTC, at the
    latest the day before it took effect), as known at ``decided_at``: the row with the greatest
    data cutoff not after it, else (the day was assessed only later) the first row of the day.
    Decisions whose day has no assessment are left out."""
    if not rows or ruleset_id < 0:
        return {}
    def day_of(r: DecisionRow) -> date:
        return min(r.decided_at.astimezone(UTC).date(), r.effective_date - timedelta(days=1))
    wanted = {(r.region_id, day_of(r)) for r in rows}
    found = session.execute(
        select(Assessment.region_id, Assessment.ref_date, Assessment.data_cutoff,
               Assessment.recommended_tier)
        .where(Assessment.ruleset_id == ruleset_id,
               Assessment.region_id.in_(sorted({k[0] for k in wanted})),
               Assessment.ref_date.in_(sorted({k[1] for k in wanted})))
        .order_by(Assessment.data_cutoff)
    ).all()
    by_key: dict[tuple[int, date], list[tuple[datetime, int]]] = {}
    for region_id, day, cutoff, tier in found:
        if (region_id, day) in wanted:
            by_key.setdefault((region_id, day), []).append((cutoff, tier))
    out = {}
    for r in rows:
        day = day_of(r)
        versions = by_key.get((r.region_id, day))
        if not versions:
            continue
        known = [v for v in versions if v[0] <= r.decided_at]
        cutoff, tier = known[-1] if known else versions[0]
        out[r.id] = (tier, day, cutoff, not known)
    return out
