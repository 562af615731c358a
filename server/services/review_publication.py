"""Use case: publish the decisions taken, so the public pages show them.

:func:`publish` makes every unpublished decision visible to the public. Districts with no
decision yet start from their recommended tier when first published. Every publication is
written to the audit log.

With a loaded notification config (``publish(..., notify=...)``) a publication sends one
``published`` event per district whose official public tier it changed (including a first
publication); a failed delivery is logged and audited and never undoes the publication.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import UTC, datetime

from sqlalchemy import func, select
from sqlalchemy.orm import Session

from server.services.audit import record
from server.services.evaluation import LatestItem
from server.services.notify import Delivery, Event, NotifyConfig, deliver_and_record
from server.services.review_decisions import (
    active_policy,
    approving_user,
    effective_from,
    lock_district,
)
from server.services.review_official import OfficialTier, official_tiers, rank
from server.services.review_pending import current_run
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


def _published_events(
    before: dict[str, OfficialTier], after: dict[str, OfficialTier], rows: list[DecisionRow],
    codes: dict[int, str],
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
    approver = approving_user(session, user)
    now = datetime.now(UTC)
    starting = _first_publications(session)
    if starting:
        # under the districts' locks (in id order: two publications never wait on each other in
        # a circle), read again: a decision or publication that committed meanwhile wins
        for region_id in sorted(item.region_id for item in starting):
            lock_district(session, region_id)
        starting = _first_publications(session)
    if not starting and not _unpublished_count(session):
        return PublishResult(published_at=now, decisions=0, regions=(), initial=())
    initial: list[str] = []
    if starting:
        ruleset = active_policy(session)
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
