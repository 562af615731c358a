"""Use case: decide on a tier change (confirm the recommendation or override it).

The engine recommends; people decide. A *pending change* is a district whose newest recommended
tier (active ruleset, newest evaluation run, last day) differs from its official tier and that no
one has decided on since the recommendation took its current value. An approver confirms the
recommendation or overrides it, always with a reason (:mod:`server.services.review_pending`
lists the changes, :mod:`server.services.review_publication` publishes the decisions). Every
decision is written to the audit log.

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

Each active policy is decided on its own: a decision belongs to the policy (ruleset name) of the
assessment it answers, and is compared with that policy's official tier.

A recommendation of *insufficient data* (tier -1: a gate failed) is a pending change too, since
the data no longer support the official tier. Confirming it keeps the official tier unchanged
(the decision records that tier, the reason, and the -1 it answered), which settles the district
until its recommendation changes again; a district with no official tier yet cannot be confirmed
at "insufficient data" and needs an override with a tier.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC, date, datetime, timedelta
from zoneinfo import ZoneInfo

from sqlalchemy import select, update
from sqlalchemy.orm import Session

from rules import Ruleset
from server.services.assessments import current_assessment_id
from server.services.audit import record
from server.services.errors import ServiceError
from server.services.review_official import RANK, policy_condition
from server.services.ruleset_cache import parsed
from server.services.rulesets import active_ruleset
from server.services.tiers import decision_scales, tier_label, tier_name
from server.services.users import may
from server.store.models import Assessment, Region, User
from server.store.models import Decision as DecisionRow
from server.store.models import Ruleset as RulesetRow


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
    #: The policy (ruleset name) the decision belongs to.
    policy: str = ""


def active_policy(session: Session, policy: str | None = None) -> Ruleset | None:
    """The parsed active ruleset of ``policy`` (the lead policy's when None)."""
    row = active_ruleset(session=session, policy=policy)
    return None if row is None else parsed(row)


def policy_of_assessment(*, session: Session, assessment_id: int) -> str:
    """The policy (ruleset name) an assessment belongs to ("" when there is no such row)."""
    return session.scalar(
        select(RulesetRow.name).join(Assessment, Assessment.ruleset_id == RulesetRow.id)
        .where(Assessment.id == assessment_id)
    ) or ""


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


def approving_user(session: Session, user: str) -> User:
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
        published_at=row.published_at, policy=row.policy,
    )


def _official_of(session: Session, region_id: int, policy: str) -> DecisionRow | None:
    """The region's top-ranked decision of ``policy`` (published or not), None when never
    decided."""
    return session.scalar(
        select(DecisionRow)
        .where(DecisionRow.region_id == region_id, policy_condition(session, policy))
        .order_by(*(c.desc() for c in RANK))
        .limit(1)
    )


def lock_district(session: Session, region_id: int) -> None:
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


def _current_for(session: Session, posted: Assessment, policy: str) -> Assessment:
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
    current_id = current_assessment_id(session=session, region_id=posted.region_id,
                                       policy=policy)
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
    ruleset = active_policy(session, policy)
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
    approver = approving_user(session, user)
    assessment = session.get(Assessment, assessment_id)
    if assessment is None:
        raise ReviewError("assessment_id", f"no assessment {assessment_id}")
    policy = session.scalar(
        select(RulesetRow.name).where(RulesetRow.id == assessment.ruleset_id)) or ""
    lock_district(session, assessment.region_id)
    official = _official_of(session, assessment.region_id, policy)
    _check_seen(session, assessment.region_id, official, official_tier, official_decision_id)
    posted = assessment
    assessment = _current_for(session, posted, policy)
    ruleset = active_policy(session, policy)
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
        policy=policy, region_id=assessment.region_id, assessment_id=assessment.id,
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
            "policy": policy,
            "seen_official_tier": official_tier, "seen_official_decision_id": official_decision_id,
            **({"posted_assessment_id": posted.id} if posted.id != assessment.id else {}),
            "recommended_tier": assessment.recommended_tier, "reason": row.reason,
            "effective_date": row.effective_date.isoformat(),
            **({"kept_official_tier": kept} if kept is not None else {}),
        },
        at=now,
    )
    return _as_decision(row, code, user, ruleset)
