"""Use case: evaluate the active ruleset for every district and store the assessments.

An evaluation reads the data as known at a cutoff (the newest vintage received, unless a cutoff is
given), computes the indicators, runs the rules engine over the whole history and stores one
assessment per district and day, each with its explanation, the ruleset and the cutoff. Re-running
with the same ruleset and cutoff reproduces the same assessments (they are read, not rewritten).

When the caller passes a loaded notification config (``notify=``, from ``settings.notify_file``),
a run that stores new assessments delivers the newest day's events: recommended tier changes in
force that day and prepare signals that started showing that day. Failures are logged and audited
and never break the evaluation (:func:`server.services.notify.deliver_and_record`).

Activating a ruleset (:func:`activate_ruleset`, the one way every caller activates) retires every
other active version, writes the audit log and evaluates the new one, so exactly one ruleset is
active at any time.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import UTC, date, datetime
from pathlib import Path

from sqlalchemy import func, insert, select, type_coerce, update
from sqlalchemy.orm import Session

import rules
from rules import Evaluation, Ruleset, evaluate, parse_ruleset
from server.services.audit import record
from server.services.district_indicators import district_indicators, load_district_data
from server.services.notify import Delivery, NotifyConfig, deliver_and_record, events_on_day
from server.store.models import Assessment, Observation, Region, Vintage
from server.store.models import Ruleset as RulesetRow
from server.store.types import UTCDateTime


@dataclass(frozen=True, kw_only=True)
class EvaluationRun:
    """What one evaluation did."""

    ruleset_id: int
    ruleset_name: str
    data_cutoff: datetime
    start: date
    end: date
    written: int
    reused: bool
    evaluation: Evaluation | None
    notified: tuple[Delivery, ...] = field(default=())


def store_ruleset(
    *, session: Session, path: Path, author: str = "", activate: bool = False
) -> RulesetRow:
    """Store the ruleset file as a version (once per distinct text); optionally make it active.

    Activation is :func:`activate_ruleset` (every other version retired, audited, evaluated).
    """
    text = path.read_text(encoding="utf-8")
    parsed = parse_ruleset(text, source=str(path))
    row = session.scalar(select(RulesetRow).where(RulesetRow.sha256 == parsed.sha256))
    if row is None:
        row = RulesetRow(
            name=parsed.name, version=str(parsed.version), yaml_text=text, sha256=parsed.sha256,
            author=author, created_at=datetime.now(UTC), status="draft",
        )
        session.add(row)
        session.flush()
        record(session=session, actor=author or "system", action="ruleset.store",
               subject=f"{parsed.name} {parsed.version}", details={"sha256": parsed.sha256})
    session.flush()
    if activate and row.status != "active":
        activate_ruleset(session=session, row=row, actor=author or "system")
    return row


def activate_ruleset(
    *, session: Session, row: RulesetRow, actor: str, notify: NotifyConfig | None = None
) -> EvaluationRun | None:
    """Make ``row`` the one active ruleset, audit it, and evaluate it on the newest data.

    Every other active version is retired, whatever its name, so at most one ruleset is ever
    active. Used by every way of activating (:func:`store_ruleset`, the policies page). Returns
    the evaluation (None when there are no data yet); ``notify`` as in
    :func:`evaluate_districts`.
    """
    session.execute(
        update(RulesetRow)
        .where(RulesetRow.status == "active", RulesetRow.id != row.id)
        .values(status="retired")
    )
    row.status = "active"
    record(session=session, actor=actor, action="ruleset.activate",
           subject=f"{row.name} {row.version}", details={"sha256": row.sha256})
    session.flush()
    return evaluate_districts(session=session, ruleset_row=row, notify=notify)


def active_ruleset(*, session: Session) -> RulesetRow | None:
    return session.scalar(
        select(RulesetRow).where(RulesetRow.status == "active").order_by(RulesetRow.id.desc())
    )


def newest_cutoff(*, session: Session) -> datetime | None:
    """Time stamp of the newest vintage: the default data cutoff."""
    return session.scalar(select(type_coerce(func.max(Vintage.received_at), UTCDateTime())))


def _date_range(session: Session, cutoff: datetime) -> tuple[date, date] | None:
    first, last = session.execute(
        select(func.min(Observation.ref_date), func.max(Observation.ref_date))
        .join(Vintage, Vintage.id == Observation.vintage_id)
        .where(Vintage.received_at <= cutoff)
    ).one()
    return None if first is None else (first, last)


def evaluate_districts(
    *, session: Session, ruleset_row: RulesetRow, cutoff: datetime | None = None,
    notify: NotifyConfig | None = None,
) -> EvaluationRun | None:
    """Evaluate ``ruleset_row`` over all stored history as known at ``cutoff``; store results.

    With ``notify``, newly stored assessments send the newest day's tier changes and starting
    prepare signals to its recipients (a reused run sends nothing). Returns None when there are
    no data yet.
    """
    cutoff = cutoff or newest_cutoff(session=session)
    if cutoff is None:
        return None
    span = _date_range(session, cutoff)
    if span is None:
        return None
    start, end = span
    existing = session.scalar(
        select(func.count()).select_from(Assessment).where(
            Assessment.ruleset_id == ruleset_row.id, Assessment.data_cutoff == cutoff
        )
    )
    if existing:
        return EvaluationRun(
            ruleset_id=ruleset_row.id, ruleset_name=ruleset_row.name, data_cutoff=cutoff,
            start=start, end=end, written=0, reused=True, evaluation=None,
        )
    ruleset = parse_ruleset(ruleset_row.yaml_text, source=f"ruleset:{ruleset_row.name}")
    data = load_district_data(session=session, start=start, end=end, as_of=cutoff)
    result = evaluate(
        ruleset, district_indicators(data, ruleset), regions=data.regions, dates=data.dates,
        region_levels=data.levels,
    )
    written = _store_assessments(session, ruleset_row.id, cutoff, result)
    notified: tuple[Delivery, ...] = ()
    if notify is not None and written:
        notified = deliver_and_record(
            events_on_day(result), notify, session=session, actor="system", context="evaluation"
        )
    return EvaluationRun(
        ruleset_id=ruleset_row.id, ruleset_name=ruleset_row.name, data_cutoff=cutoff,
        start=start, end=end, written=written, reused=False, evaluation=result,
        notified=notified,
    )


def evaluate_active(
    *, session: Session, notify: NotifyConfig | None = None
) -> EvaluationRun | None:
    """Evaluate the active ruleset on the newest data (the hook run after every ingestion).

    ``notify`` as in :func:`evaluate_districts`. Returns None when no ruleset is active or there
    are no data.
    """
    row = active_ruleset(session=session)
    if row is None:
        return None
    return evaluate_districts(session=session, ruleset_row=row, notify=notify)


def _store_assessments(
    session: Session, ruleset_id: int, cutoff: datetime, result: Evaluation
) -> int:
    region_ids = dict(session.execute(select(Region.code, Region.id)).all())
    criteria = [c.id for c in result.ruleset.criteria]
    signals = [s.id for s in result.ruleset.prepare]
    now = datetime.now(UTC)
    rows = []
    for r, code in enumerate(result.regions):
        for d in range(result.dates.size):
            explanation = result.explain(r, d)
            rows.append({
                "ruleset_id": ruleset_id,
                "region_id": region_ids[code],
                "ref_date": result.dates[d].astype(date),
                "data_cutoff": cutoff,
                "recommended_tier": int(result.tier[r, d]),
                "previous_tier": (
                    int(result.tier[r, d - 1]) if d else int(result.start_in_force[r])
                ),
                "criteria": {
                    cid: {
                        "level": int(result.levels[k, r, d]),
                        "known": bool(result.known[k, r, d]),
                    }
                    for k, cid in enumerate(criteria)
                },
                "prepare_signals": {
                    sid: bool(result.prepare[k, r, d]) for k, sid in enumerate(signals)
                },
                "explanation": {"sentence": explanation.sentence, "data": explanation.data},
                "created_at": now,
            })
    if rows:
        session.execute(insert(Assessment), rows)
    return len(rows)


@dataclass(frozen=True, kw_only=True)
class LatestAssessment:
    region: str
    ref_date: date
    tier: int
    tier_name: str
    previous_tier: int | None
    prepare: tuple[str, ...]
    sentence: str


def _newest_run(session: Session) -> tuple[RulesetRow, datetime, date] | None:
    """The active ruleset, its newest stored data cutoff and that run's last day (None: none)."""
    row = active_ruleset(session=session)
    if row is None:
        return None
    cutoff = session.scalar(
        select(type_coerce(func.max(Assessment.data_cutoff), UTCDateTime()))
        .where(Assessment.ruleset_id == row.id)
    )
    if cutoff is None:
        return None
    last_day = session.scalar(
        select(func.max(Assessment.ref_date)).where(
            Assessment.ruleset_id == row.id, Assessment.data_cutoff == cutoff
        )
    )
    return None if last_day is None else (row, cutoff, last_day)


def current_assessment_id(*, session: Session, region_id: int) -> int | None:
    """Id of a district's current item in the review: its assessment of the last day of the
    newest stored run (active ruleset, newest data cutoff); None when there is none."""
    newest = _newest_run(session)
    if newest is None:
        return None
    row, cutoff, last_day = newest
    return session.scalar(
        select(Assessment.id).where(
            Assessment.ruleset_id == row.id, Assessment.data_cutoff == cutoff,
            Assessment.ref_date == last_day, Assessment.region_id == region_id,
        )
    )


def latest_assessments(*, session: Session) -> dict[str, LatestAssessment]:
    """The newest stored assessment of each district under the active ruleset."""
    newest = _newest_run(session)
    if newest is None:
        return {}
    row, cutoff, last_day = newest
    ruleset: Ruleset = parse_ruleset(row.yaml_text, source=row.name)
    query = (
        select(Region.code, Assessment)
        .join(Region, Region.id == Assessment.region_id)
        .where(
            Assessment.ruleset_id == row.id, Assessment.data_cutoff == cutoff,
            Assessment.ref_date == last_day,
        )
    )
    out = {}
    for code, a in session.execute(query).all():
        out[code] = LatestAssessment(
            region=code, ref_date=a.ref_date, tier=a.recommended_tier,
            tier_name=ruleset.tier_name(a.recommended_tier), previous_tier=a.previous_tier,
            prepare=tuple(k for k, v in a.prepare_signals.items() if v),
            sentence=a.explanation.get("sentence", ""),
        )
    return out


@dataclass(frozen=True, kw_only=True, eq=False)
class LatestItem:
    """A district's newest stored assessment and the first day of its current recommendation."""

    region_id: int
    code: str
    name: str
    assessment: Assessment
    since: date


@dataclass(frozen=True, kw_only=True, eq=False)
class LatestRun:
    """The newest stored evaluation of the active ruleset: one item per district."""

    ruleset_row: RulesetRow
    ruleset: Ruleset
    data_cutoff: datetime
    last_day: date
    items: tuple[LatestItem, ...]


def latest_assessment_rows(*, session: Session) -> LatestRun | None:
    """Assessments of the last day under the active ruleset and newest cutoff, with run starts.

    ``since`` is the first day of the trailing run of days with the same recommended tier.
    """
    newest = _newest_run(session)
    if newest is None:
        return None
    row, cutoff, last_day = newest
    where = (Assessment.ruleset_id == row.id, Assessment.data_cutoff == cutoff)
    history = session.execute(
        select(Assessment.region_id, Assessment.ref_date, Assessment.recommended_tier)
        .where(*where)
        .order_by(Assessment.region_id, Assessment.ref_date.desc())
    ).all()
    since: dict[int, date] = {}
    current: dict[int, int] = {}
    broken: set[int] = set()
    for region_id, day, tier in history:
        if region_id in broken:
            continue
        if region_id not in current:
            current[region_id] = tier
        if tier != current[region_id]:
            broken.add(region_id)
            continue
        since[region_id] = day
    query = (
        select(Region.id, Region.code, Region.name, Assessment)
        .join(Region, Region.id == Assessment.region_id)
        .where(*where, Assessment.ref_date == last_day)
        .order_by(Region.code)
    )
    items = tuple(
        LatestItem(region_id=rid, code=code, name=name, assessment=a, since=since[rid])
        for rid, code, name, a in session.execute(query).all()
    )
    return LatestRun(
        ruleset_row=row, ruleset=parse_ruleset(row.yaml_text, source=row.name),
        data_cutoff=cutoff, last_day=last_day, items=items,
    )


PACKAGED_POLICIES = Path(rules.__file__).with_name("policies")


def policies_dir(configured: Path | None) -> Path:
    """The configured rules folder, or the policies shipped with tierwise."""
    return configured if configured is not None else PACKAGED_POLICIES


def default_ruleset_path(configured: Path | None) -> Path:
    """The policy the demo and a fresh installation start with."""
    return policies_dir(configured) / "county.yaml"


__all__ = [
    "EvaluationRun",
    "LatestAssessment",
    "LatestItem",
    "LatestRun",
    "activate_ruleset",
    "active_ruleset",
    "current_assessment_id",
    "default_ruleset_path",
    "evaluate_active",
    "evaluate_districts",
    "latest_assessment_rows",
    "latest_assessments",
    "newest_cutoff",
    "policies_dir",
    "store_ruleset",
]

