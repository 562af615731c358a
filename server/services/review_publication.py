"""Use case: publish the decisions taken, so the public pages show them.

:func:`publish` makes every unpublished decision visible to the public, of every active policy
or of one (``policy=``). Districts with no decision of a policy yet start from that policy's
recommended tier when first published. Every publication is written to the audit log.

With a loaded notification config (``publish(..., notify=...)``) a publication sends one
``published`` event per district whose official public tier it changed (including a first
publication); a failed delivery is logged and audited and never undoes the publication.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import UTC, datetime

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from server.services.assessments import LatestItem
from server.services.audit import record
from server.services.notify import Delivery, Event, NotifyConfig, deliver_and_record
from server.services.review_decisions import (
    active_policy,
    approving_user,
    effective_from,
    lock_district,
)
from server.services.review_official import (
    OfficialTier,
    official_tiers,
    policy_condition,
    rank,
)
from server.services.review_pending import current_run
from server.services.rulesets import active_rulesets, require_policy
from server.store.models import Decision as DecisionRow
from server.store.models import Region


@dataclass(frozen=True, kw_only=True)
class PublishResult:
    """What one publication made public."""

    published_at: datetime
    decisions: int
    regions: tuple[str, ...]
    initial: tuple[str, ...]
    notified: tuple[Delivery, ...] = field(default=())
    #: The policies whose decisions were published.
    policies: tuple[str, ...] = ()


def _published_events(
    before: dict[str, OfficialTier], after: dict[str, OfficialTier], rows: list[DecisionRow],
    codes: dict[int, str], policy: str,
) -> list[Event]:
    """One ``published`` event per district whose published tier this publication changed."""
    last = {codes[r.region_id]: r for r in sorted(rows, key=rank)}
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
                previous=None if old is None else old.tier, signal=None, policy=policy,
                sentence=(
                    f"Published ({policy}): {new.name} is at {new.tier_name} from "
                    f"{row.effective_date.isoformat()}{was}; {row.kind}: {row.reason}"
                ),
            )
        )
    return out


def _first_publications(session: Session, policy: str | None) -> list[LatestItem]:
    """Current items of districts never decided under ``policy`` that a publication would
    start (tier >= 0)."""
    decided = set(session.scalars(
        select(DecisionRow.region_id).where(policy_condition(session, policy)).distinct()))
    districts = set(session.scalars(select(Region.id).where(Region.level == "district")))
    if not districts - decided:  # every district decided once: no need to read the run
        return []
    latest = current_run(session=session, policy=policy)
    if latest is None:
        return []
    return [
        item for item in latest.items
        if item.region_id not in decided and item.assessment.recommended_tier >= 0
    ]


def _unpublished_count(session: Session, policy: str | None) -> int:
    return session.scalar(
        select(func.count()).select_from(DecisionRow).where(
            DecisionRow.published_at.is_(None), policy_condition(session, policy))
    ) or 0


def _policies(session: Session, policy: str | None) -> list[str]:
    """``policy`` (checked: an active one), or every active policy."""
    if policy is not None:
        require_policy(session=session, policy=policy)
        return [policy]
    return [r.name for r in active_rulesets(session=session)]


def has_something_to_publish(*, session: Session, policy: str | None = None) -> bool:
    """Whether :func:`publish` would publish anything (of ``policy``, else of any active
    policy): an unpublished decision, or a district never decided that a first publication
    would start from its recommendation."""
    if not active_rulesets(session=session):
        return bool(session.scalar(select(func.count()).select_from(DecisionRow).where(
            DecisionRow.published_at.is_(None))))
    return any(bool(_unpublished_count(session, name)) or bool(_first_publications(session, name))
               for name in _policies(session, policy))


def publish(
    *, session: Session, user: str, notify: NotifyConfig | None = None,
    time_zone: str = "UTC", policy: str | None = None,
) -> PublishResult:
    """Publish every unpublished decision of ``policy`` (of every active policy when None);
    districts never decided under a policy start from its recommendation.

    With ``notify``, the districts whose public tier changed are notified (``published`` events,
    naming the policy).
    With nothing to publish, nothing is written (no audit entry) and the result has
    ``decisions == 0``. First publications are made under the districts' locks, like
    :func:`decide`, so two publications at once start each district once.

    Raises
    ------
    ReviewError
        When ``user`` is not an approver.
    """
    approver = approving_user(session, user)
    now = datetime.now(UTC)
    # no active policy: every unpublished decision (policy_condition of None is then all)
    names: list[str | None] = [*_policies(session, policy)] or [None]
    starting = {name: _first_publications(session, name) for name in names}
    if any(starting.values()):
        # under the districts' locks (in id order: two publications never wait on each other in
        # a circle), read again: a decision or publication that committed meanwhile wins
        for region_id in sorted({i.region_id for items in starting.values() for i in items}):
            lock_district(session, region_id)
        starting = {name: _first_publications(session, name) for name in names}
    if not any(starting.values()) and not any(_unpublished_count(session, n) for n in names):
        return PublishResult(published_at=now, decisions=0, regions=(), initial=())
    initial: set[str] = set()
    for name, items in starting.items():
        ruleset = active_policy(session, name)
        for item in items:
            a = item.assessment
            session.add(
                DecisionRow(
                    policy=name or "", region_id=item.region_id, assessment_id=a.id,
                    effective_date=effective_from(a.ref_date, now, ruleset, time_zone),
                    tier=a.recommended_tier,
                    kind="confirmed", reason="first publication: starts from the recommended tier",
                    decided_by=approver.id, decided_at=now, published_at=None,
                )
            )
            initial.add(item.code)
    session.flush()
    rows_of = {name: list(session.scalars(select(DecisionRow).where(
        DecisionRow.published_at.is_(None), policy_condition(session, name)))) for name in names}
    rows = [row for found in rows_of.values() for row in found]
    codes = dict(session.execute(select(Region.id, Region.code)).all())
    before = ({name: official_tiers(session=session, policy=name) for name in names}
              if notify is not None else {})
    for row in rows:
        row.published_at = now
    session.flush()
    regions = tuple(sorted({codes[r.region_id] for r in rows}))
    published = tuple(name for name, found in rows_of.items() if found and name is not None)
    record(
        session=session, actor=user, action="decision.publish", subject=", ".join(regions),
        details={"decisions": [r.id for r in rows], "initial": sorted(initial),
                 "policies": list(published)}, at=now,
    )
    notified: tuple[Delivery, ...] = ()
    if notify is not None and rows:
        events = [event for name, found in rows_of.items() if found for event in
                  _published_events(before[name], official_tiers(session=session, policy=name),
                                    found, codes, name or "")]
        notified = deliver_and_record(
            events, notify, session=session, actor=user, context="publication"
        )
    return PublishResult(
        published_at=now, decisions=len(rows), regions=regions, initial=tuple(sorted(initial)),
        notified=notified, policies=published,
    )
