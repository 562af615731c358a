"""Use case: evaluate the active ruleset for the regions of its level and store the assessments.

The regions are the districts, or the areas or the county of a policy with ``level``
(:func:`server.services.level_data.evaluate_policy`: indicators from counts summed up the
region tree, as known at the cutoff).

An evaluation reads the data as known at a cutoff (the newest vintage received, unless a cutoff is
given), computes the indicators, runs the rules engine over the whole history and records an
``evaluation_run`` (ruleset, cutoff, first and last day, rows written). It stores an assessment
(recommended tier, criteria, prepare signals, explanation) under its cutoff only for the district
and day pairs whose result differs from the newest row stored at an earlier cutoff, or that have
none: a new morning's data usually change the last weeks, not the whole history. The rows are
compared in bulk by ``content_sha256``, a hash of everything but the cutoff and creation time.
Only the region-days whose engine state changed since the newest earlier run are built and
hashed at all (:mod:`server.services.run_fingerprints`); the others equal the row in force.

The assessment of a district and day *as of run C* is therefore the row with the greatest
``data_cutoff`` not after C (:func:`assessments_as_of`); the newest run is the newest
``evaluation_run`` of the active ruleset. Re-running with the same ruleset and cutoff reuses the
run (nothing is recomputed or rewritten). A run stored at a cutoff older than an existing run (a
replay of a past morning) keeps the later run's reading unchanged: where it writes a row that the
later run had read from before its cutoff, it copies that older row to the later run's cutoff.

New data mean a new evaluation in one place only, :func:`evaluate_if_behind`: it compares the
newest vintage with the newest run of each active ruleset, and every way in and every start
(``serve``, the scheduler, ``ingest``) calls it, so a process killed between its ingest and its
evaluation leaves nothing unevaluated for long. Evaluations serialise on a lock
(:func:`serialise_evaluations`); one that finds the run of its cutoff stored meanwhile reuses
it, on SQLite and PostgreSQL alike.

When the caller passes a loaded notification config (``notify=``, from ``settings.notify_file``),
a run that evaluates (one that does not reuse a stored run) delivers the newest day's events:
recommended tier changes in force that day and prepare signals that started showing that day;
events already delivered are not sent again. Failures are logged and audited and never break
the evaluation (:func:`server.services.notify.deliver_and_record`).

Several policies are active at once (one per pathogen, one for hospital pressure, ...). A policy
is a ruleset ``name``; its versions replace each other. Activating a ruleset
(:func:`activate_ruleset`, the one way every caller activates) retires the other active versions
of the same name (and, with ``replaces``, of another policy it takes over from), writes the audit
log and evaluates the new one, so each policy has at most one active version.
:func:`active_rulesets` lists the active ones in a stable order: by the first time each policy
name was stored (the lowest ruleset id of the name), so the policy the office adopted first comes
first and is the *lead* policy (:func:`active_ruleset` without a name), which pages that show one
policy show by default and which imported decisions belong to unless told otherwise.
"""

from __future__ import annotations

import hashlib
import json
import logging
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, date, datetime, timedelta
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray
from sqlalchemy import Select, and_, func, insert, select, text, type_coerce, update
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

import rules
from rules import Evaluation, Ruleset, parse_ruleset
from server.services import run_fingerprints
from server.services.audit import record
from server.services.database import Database
from server.services.district_data import store_measures
from server.services.errors import ServiceError
from server.services.forecast_known import Forecaster
from server.services.forecast_store import forecasts_stored, store_morning_forecasts
from server.services.indicator_kinds import indicator_check, measure_needs
from server.services.level_data import evaluate_policy
from server.services.notify import Delivery, NotifyConfig, deliver_and_record, events_on_day
from server.services.ruleset_cache import parsed
from server.store.models import Assessment, Measure, Observation, Region, Vintage
from server.store.models import EvaluationRun as RunRow
from server.store.models import Ruleset as RulesetRow
from server.store.types import UTCDateTime

log = logging.getLogger(__name__)

#: Key of the PostgreSQL advisory lock that serialises evaluations (every ruleset, every process).
EVALUATION_LOCK_KEY = int.from_bytes(
    hashlib.sha256(b"tierwise-evaluation").digest()[:8], "big", signed=True
)
#: How long an evaluation on SQLite waits for the database's write lock, in milliseconds: an
#: ingest holds that lock for its whole length (tens of seconds for a large file), longer than
#: the engine's usual ``busy_timeout`` (``server/store/engine.py``). Common practice, no source.
SQLITE_LOCK_WAIT_MS = 300_000


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
    *, session: Session, path: Path, author: str = "", activate: bool = False,
    stale_after: Mapping[str, timedelta] | None = None, replaces: str | None = None,
) -> RulesetRow:
    """Store the ruleset file as a version (once per distinct text); optionally make it active.

    Activation is :func:`activate_ruleset` (the other versions of its name retired, and those of
    ``replaces``; audited, evaluated with ``stale_after`` as in :func:`evaluate_districts`).
    """
    text = path.read_text(encoding="utf-8")
    loaded = parse_ruleset(text, source=str(path),
                           indicators=indicator_check(store_measures(session=session)))
    row = session.scalar(select(RulesetRow).where(RulesetRow.sha256 == loaded.sha256))
    if row is None:
        row = RulesetRow(
            name=loaded.name, version=str(loaded.version), yaml_text=text, sha256=loaded.sha256,
            author=author, created_at=datetime.now(UTC), status="draft",
        )
        session.add(row)
        session.flush()
        record(session=session, actor=author or "system", action="ruleset.store",
               subject=f"{loaded.name} {loaded.version}", details={"sha256": loaded.sha256})
    session.flush()
    if activate and row.status != "active":
        activate_ruleset(session=session, row=row, actor=author or "system",
                         stale_after=stale_after, replaces=replaces)
    return row


def activate_ruleset(
    *, session: Session, row: RulesetRow, actor: str, notify: NotifyConfig | None = None,
    stale_after: Mapping[str, timedelta] | None = None, replaces: str | None = None,
) -> EvaluationRun | None:
    """Make ``row`` the active version of its policy, audit it, and evaluate it on the newest data.

    The other active versions of the same name are retired; other policies stay active, unless
    ``replaces`` names one this ruleset takes over from (its active version is retired too, and
    its decisions count for this policy: :func:`server.services.review_official.policy_owners`).
    Used by every way of activating (:func:`store_ruleset`, the policies page). Returns the
    evaluation (None when there are no data yet); ``notify`` and ``stale_after`` as in
    :func:`evaluate_districts`.
    """
    names = {row.name} | ({replaces} if replaces else set())
    session.execute(
        update(RulesetRow)
        .where(RulesetRow.status == "active", RulesetRow.id != row.id,
               RulesetRow.name.in_(sorted(names)))
        .values(status="retired")
    )
    row.status = "active"
    record(session=session, actor=actor, action="ruleset.activate",
           subject=f"{row.name} {row.version}",
           details={"sha256": row.sha256, "policy": row.name,
                    **({"replaces": replaces} if replaces else {})})
    session.flush()
    return evaluate_districts(session=session, ruleset_row=row, notify=notify,
                              stale_after=stale_after)


def retire_ruleset(*, session: Session, row: RulesetRow, actor: str) -> None:
    """Stop running an active policy: its version is retired (audited as ``ruleset.retire``);
    its assessments and decisions stay and count for no other policy
    (:func:`server.services.review_official.policy_owners`)."""
    if row.status != "active":
        return
    row.status = "retired"
    record(session=session, actor=actor, action="ruleset.retire",
           subject=f"{row.name} {row.version}", details={"sha256": row.sha256, "policy": row.name})
    session.flush()


def active_rulesets(*, session: Session) -> list[RulesetRow]:
    """Every active ruleset (one per policy name), the lead policy first.

    The order is stable: by the first time each policy's name was stored (lowest ruleset id of
    the name), so a new version of a policy keeps its place."""
    rows = list(session.scalars(select(RulesetRow).where(RulesetRow.status == "active")))
    if len(rows) < 2:
        return rows
    first = dict(session.execute(
        select(RulesetRow.name, func.min(RulesetRow.id))
        .where(RulesetRow.name.in_(sorted({r.name for r in rows})))
        .group_by(RulesetRow.name)
    ).all())
    return sorted(rows, key=lambda r: (first[r.name], r.id))


def active_ruleset(*, session: Session, policy: str | None = None) -> RulesetRow | None:
    """The active ruleset of ``policy`` (a ruleset name), or the lead policy's when None
    (the first of :func:`active_rulesets`); None when there is none."""
    if policy is not None:
        return session.scalar(
            select(RulesetRow).where(RulesetRow.status == "active", RulesetRow.name == policy)
            .order_by(RulesetRow.id.desc()).limit(1)
        )
    rows = active_rulesets(session=session)
    return rows[0] if rows else None


class InactivePolicyError(ServiceError, LookupError):
    """A policy name that is not the name of an active ruleset (pages answer 404)."""

    def __init__(self, policy: str, active: Sequence[str]) -> None:
        self.policy = policy
        choices = ", ".join(active) or "none is active"
        super().__init__(f"policy: {policy!r} is not an active policy (active: {choices})")


def require_policy(*, session: Session, policy: str | None) -> RulesetRow | None:
    """The active ruleset of ``policy`` (the lead's when None; None when nothing is active).

    Raises :class:`InactivePolicyError` for a name that is not active."""
    row = active_ruleset(session=session, policy=policy)
    if row is None and policy is not None:
        raise InactivePolicyError(policy, [r.name for r in active_rulesets(session=session)])
    return row


def newest_cutoff(*, session: Session) -> datetime | None:
    """Time stamp of the newest vintage: the default data cutoff."""
    return session.scalar(select(type_coerce(func.max(Vintage.received_at), UTCDateTime())))


def _date_range(session: Session, cutoff: datetime, measures: Sequence[str] = ()
                ) -> tuple[date, date] | None:
    """First and last stored days known at ``cutoff``, of ``measures`` (all when empty): a
    policy is evaluated over the span of the measures it reads, so a long history of one
    measure (the demo's pathogen seasons) does not lengthen the others' evaluation."""
    query = (select(func.min(Observation.ref_date), func.max(Observation.ref_date))
             .join(Vintage, Vintage.id == Observation.vintage_id)
             .where(Vintage.received_at <= cutoff))
    if measures:
        query = query.join(Measure, Measure.id == Observation.measure_id).where(
            Measure.name.in_(sorted(set(measures))))
    first, last = session.execute(query).one()
    return None if first is None else (first, last)


def evaluate_districts(
    *, session: Session, ruleset_row: RulesetRow, cutoff: datetime | None = None,
    notify: NotifyConfig | None = None, stale_after: Mapping[str, timedelta] | None = None,
) -> EvaluationRun | None:
    """Evaluate ``ruleset_row`` over all stored history as known at ``cutoff`` for the regions
    of its level (:func:`server.services.level_data.evaluate_policy`); store results.

    Records the run and stores only the assessments that changed (module docstring). With
    ``notify``, the run sends the newest day's tier changes and starting prepare signals to its
    recipients (a reused run sends nothing). ``stale_after`` (feed name -> staleness limit,
    :func:`server.services.district_indicators.feed_limits` of the feed catalogue) makes a
    measure stale, hence unknown, on the days past its feed's limit (``docs/feeds.md``,
    "Staleness in the engine"); without it only the ruleset's ``max_age_days`` applies. Every
    caller that has the feed catalogue passes it. Returns None when there are no data yet.
    """
    cutoff = cutoff or newest_cutoff(session=session)
    if cutoff is None:
        return None
    ruleset = parsed(ruleset_row)
    needs = measure_needs(ruleset, store_measures(session=session))
    span = _date_range(session, cutoff, (*needs.district, *needs.area, *needs.plant))
    if span is None:
        return None
    start, end = span
    reused = EvaluationRun(
        ruleset_id=ruleset_row.id, ruleset_name=ruleset_row.name, data_cutoff=cutoff,
        start=start, end=end, written=0, reused=True, evaluation=None,
    )
    if _stored_run(session, ruleset_row.id, cutoff):
        return reused
    result = evaluate_policy(session=session, ruleset=ruleset, start=start, end=end,
                             as_of=cutoff, stale_after=stale_after, needs=needs)
    serialise_evaluations(session)
    if _stored_run(session, ruleset_row.id, cutoff):  # another evaluation stored it meanwhile
        return reused
    try:
        with session.begin_nested():
            written, kept = _store_assessments(session, ruleset_row.id, cutoff, result)
            session.add(RunRow(
                ruleset_id=ruleset_row.id, data_cutoff=cutoff, first_day=start, last_day=end,
                rows_written=written, created_at=datetime.now(UTC), fingerprints=kept,
            ))
            session.flush()
    except IntegrityError:
        # Only reachable when an evaluation that does not take the lock stored the same run
        # first: reuse the run that won.
        if not _stored_run(session, ruleset_row.id, cutoff):
            raise
        log.info("evaluation of %s at %s collided with a stored run; reusing it",
                 ruleset_row.name, cutoff.isoformat())
        return reused
    notified: tuple[Delivery, ...] = ()
    if notify is not None:
        notified = deliver_and_record(
            events_on_day(result), notify, session=session, actor="system", context="evaluation"
        )
    return EvaluationRun(
        ruleset_id=ruleset_row.id, ruleset_name=ruleset_row.name, data_cutoff=cutoff,
        start=start, end=end, written=written, reused=False, evaluation=result,
        notified=notified,
    )


def _stored_run(session: Session, ruleset_id: int, cutoff: datetime) -> bool:
    return session.scalar(
        select(RunRow.id).where(RunRow.ruleset_id == ruleset_id, RunRow.data_cutoff == cutoff)
    ) is not None


def serialise_evaluations(session: Session) -> None:
    """Hold the evaluation lock until ``session``'s transaction ends (commit or rollback).

    Two evaluations at the same cutoff would otherwise both store their rows and collide on the
    unique keys of ``assessment`` and ``evaluation_run``; taken just before an evaluation reads
    the rows it compares with and stores its own, the lock makes the second one see the first
    one's run and reuse it (:func:`evaluate_districts`).

    PostgreSQL: ``pg_advisory_xact_lock`` on :data:`EVALUATION_LOCK_KEY`, released at the end
    of the transaction or when a killed holder's connection goes. SQLite: the first write of a
    transaction takes the database's write lock until the transaction ends, and a write that
    changes no row is enough; it waits up to :data:`SQLITE_LOCK_WAIT_MS` for that lock.
    """
    if session.get_bind().dialect.name == "postgresql":
        session.execute(text("SELECT pg_advisory_xact_lock(:k)"), {"k": EVALUATION_LOCK_KEY})
        return
    connection = session.connection()
    before = int(connection.exec_driver_sql("PRAGMA busy_timeout").scalar() or 0)
    connection.exec_driver_sql(f"PRAGMA busy_timeout = {SQLITE_LOCK_WAIT_MS}")
    try:
        connection.exec_driver_sql(
            "UPDATE evaluation_run SET rows_written = rows_written WHERE 0 = 1"
        )
    finally:
        connection.exec_driver_sql(f"PRAGMA busy_timeout = {before}")


def policies_behind(*, session: Session) -> tuple[list[RulesetRow], datetime | None]:
    """The active rulesets (in :func:`active_rulesets` order) whose newest evaluation is older
    than the newest data, and the newest data cutoff (None: no data).

    Compares the newest vintage's ``received_at`` (the default cutoff) with the newest
    ``evaluation_run`` cutoff of each active ruleset. Vintages taken in without an explicit time
    are stamped in commit order (:func:`server.services.ingest.ingest_payload`), so a vintage
    committed after a run always has a later ``received_at`` than that run's cutoff.
    """
    newest = newest_cutoff(session=session)
    if newest is None:
        return [], None
    behind = []
    for row in active_rulesets(session=session):
        run = newest_run_of(session=session, ruleset_id=row.id)
        if run is None or run.data_cutoff < newest:
            behind.append(row)
    return behind, newest


def evaluation_behind(*, session: Session) -> tuple[RulesetRow, datetime] | None:
    """The first active ruleset behind the newest data and that cutoff (None: no active
    ruleset, no data, or every active ruleset evaluated up to the newest vintage);
    :func:`policies_behind` lists them all."""
    rows, newest = policies_behind(session=session)
    return None if not rows or newest is None else (rows[0], newest)


def evaluate_if_behind(
    db: Database, *, notify: NotifyConfig | None = None,
    stale_after: Mapping[str, timedelta] | None = None, forecaster: Forecaster | None = None,
    runs: list[EvaluationRun] | None = None,
) -> EvaluationRun | None:
    """Evaluate every active ruleset that is behind at the newest cutoff, when new data are not
    yet evaluated (:func:`policies_behind`, all in one transaction, in policy order).

    The one place that decides that new data mean a new evaluation: every way in (push, upload,
    ``tierwise ingest``, scheduled feed runs) calls it after its ingest commits, and every start
    (``tierwise serve``, the scheduler's leader, ``tierwise ingest``) calls it too, so data
    landed by a process killed before its evaluation are evaluated by the next start. Runs in
    its own transaction; concurrent calls serialise (:func:`serialise_evaluations`) and the
    later one reuses the stored run. Returns the first policy's run (None when there is nothing
    to evaluate); ``runs`` collects every policy's run when given.
    ``notify`` and ``stale_after`` as in :func:`evaluate_districts`. After the runs commit, the
    morning's forecasts are stored (:func:`store_forecasts_after_tiers`, ``forecaster``).
    """
    done: list[EvaluationRun] = []
    with db.transaction() as session:
        rows, cutoff = policies_behind(session=session)
        for row in rows:
            run = evaluate_districts(session=session, ruleset_row=row, cutoff=cutoff,
                                     notify=notify, stale_after=stale_after)
            if run is not None:
                done.append(run)
    if runs is not None:
        runs.extend(done)
    if done:
        store_forecasts_after_tiers(db, done[0].data_cutoff, forecaster=forecaster)
    return done[0] if done else None


def store_forecasts_after_tiers(
    db: Database, cutoff: datetime, *, forecaster: Forecaster | None = None
) -> int:
    """The morning's forecast step, after the tiers are committed: store the forecasts made
    from the data known at ``cutoff`` (``forecast_record.store_morning_forecasts``; by default
    with its ``default_forecaster``),
    in a transaction of its own, unless forecasts were stored at that cutoff already. A failure
    is logged, never raised: the tiers stand without the forecasts. Returns the rows written.
    """
    try:
        with db.transaction() as session:
            if forecasts_stored(session=session, cutoff=cutoff):
                return 0
            written = store_morning_forecasts(session=session, cutoff=cutoff,
                                              forecaster=forecaster)
    except Exception:  # logged, never raised: the forecast record must not hold up the tiers
        log.exception("storing the forecasts at cutoff %s failed", cutoff.isoformat())
        return 0
    log.info("stored forecasts at cutoff %s: %d region rows", cutoff.isoformat(), written)
    return written


def assessments_as_of(
    query: Select[Any], *, ruleset_id: int, cutoff: datetime, before: bool = False,
    region_id: int | None = None, start: date | None = None, end: date | None = None,
) -> Select[Any]:
    """Restrict ``query`` (which selects from :class:`Assessment`) to the rows in force at a run.

    For each region and day, the row of ``ruleset_id`` with the greatest ``data_cutoff`` not
    after ``cutoff`` (strictly before it with ``before``), optionally for one region and a range
    of days. One grouped subquery joined back on the unique key (ruleset, region, day, cutoff);
    the key's index (and ``ix_assessment_ruleset_day`` for one day across regions) serves both.
    """
    a = Assessment
    where = [a.ruleset_id == ruleset_id,
             a.data_cutoff < cutoff if before else a.data_cutoff <= cutoff]
    if region_id is not None:
        where.append(a.region_id == region_id)
    if start is not None:
        where.append(a.ref_date >= start)
    if end is not None:
        where.append(a.ref_date <= end)
    newest = (
        select(a.region_id, a.ref_date, func.max(a.data_cutoff).label("data_cutoff"))
        .where(*where)
        .group_by(a.region_id, a.ref_date)
        .subquery("newest")
    )
    return query.join(newest, and_(
        a.region_id == newest.c.region_id, a.ref_date == newest.c.ref_date,
        a.data_cutoff == newest.c.data_cutoff,
    )).where(a.ruleset_id == ruleset_id)


def content_sha256(row: dict[str, Any]) -> str:
    """SHA-256 of what an assessment says: tiers, criteria, prepare signals and explanation.

    The cutoff, creation time and the region and day (the row's key) are left out, so two runs
    that reach the same result for a district and day give the same hash.
    """
    payload = json.dumps(
        [row["recommended_tier"], row["previous_tier"], row["criteria"],
         row["prepare_signals"], row["explanation"]],
        sort_keys=True, separators=(",", ":"),
    )
    return hashlib.sha256(payload.encode("utf-8")).hexdigest()


def _assessment_rows(
    session: Session, ruleset_id: int, cutoff: datetime, result: Evaluation,
    build: NDArray[np.bool_] | None = None,
) -> list[dict[str, Any]]:
    """The rows of the region-days in ``build`` ``(regions, days)`` (None: every one), in
    region then day order."""
    region_ids = dict(session.execute(select(Region.code, Region.id)).all())
    criteria = [c.id for c in result.ruleset.criteria]
    signals = [s.id for s in result.ruleset.prepare]
    now = datetime.now(UTC)
    rows = []
    wanted = None if build is None else build.tolist()
    for r, code in enumerate(result.regions):
        for d in range(result.dates.size):
            if wanted is not None and not wanted[r][d]:
                continue
            explanation = result.explain(r, d)
            row: dict[str, Any] = {
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
            }
            row["content_sha256"] = content_sha256(row)
            rows.append(row)
    return rows


_CHUNK = 500  # ids per IN list (well under SQLite's bound-parameter limit)


def _store_assessments(
    session: Session, ruleset_id: int, cutoff: datetime, result: Evaluation
) -> tuple[int, bytes | None]:
    """Store the rows that differ from the newest earlier ones; returns how many were stored
    and the fingerprints the run keeps.

    Only the region-days whose engine state differs from the newest earlier run's are built
    (:mod:`server.services.run_fingerprints`); the others equal the row in force before
    ``cutoff`` and would not be stored.
    """
    plan = run_fingerprints.plan(session, ruleset_id, cutoff, result)
    if plan.keep is not None:
        run_fingerprints.keep_only(session, ruleset_id, cutoff)
    rows = _assessment_rows(session, ruleset_id, cutoff, result, plan.build)
    if not rows:
        return 0, plan.keep
    start, end = result.dates[0].astype(date), result.dates[-1].astype(date)
    if plan.build is not None:  # only the rows built are compared: from the first day built
        start = result.dates[int(np.flatnonzero(plan.build.any(axis=0))[0])].astype(date)
    earlier = {
        (rid, day): (aid, sha)
        for aid, rid, day, sha in session.execute(assessments_as_of(
            select(Assessment.id, Assessment.region_id, Assessment.ref_date,
                   Assessment.content_sha256),
            ruleset_id=ruleset_id, cutoff=cutoff, before=True, start=start, end=end,
        ))
    }
    changed = []
    for row in rows:
        prev = earlier.get((row["region_id"], row["ref_date"]))
        # rows stored before revision 0003 carry no hash: treated as changed, stored once more
        if prev is None or prev[1] is None or prev[1] != row["content_sha256"]:
            changed.append(row)
    if changed:
        session.execute(insert(Assessment), changed)
        _keep_next_run(session, ruleset_id, cutoff, changed, earlier, start, end)
    return len(changed), plan.keep


def _keep_next_run(
    session: Session, ruleset_id: int, cutoff: datetime, changed: list[dict[str, Any]],
    earlier: dict[tuple[int, date], tuple[int, str | None]], start: date, end: date,
) -> None:
    """Keep what the next later run (if any) reads for the keys just written at ``cutoff``.

    That run read, for a key with no row between the two cutoffs, the row from before
    ``cutoff``; now it would read the new one. Copying the old row to the later run's cutoff
    restores its reading, and every run after it reads the copy or a newer row of its own.
    """
    later = session.scalar(
        select(RunRow).where(RunRow.ruleset_id == ruleset_id, RunRow.data_cutoff > cutoff)
        .order_by(RunRow.data_cutoff).limit(1)
    )
    if later is None:
        return
    a = Assessment
    covered = {(rid, day) for rid, day in session.execute(
        select(a.region_id, a.ref_date).where(
            a.ruleset_id == ruleset_id, a.data_cutoff > cutoff,
            a.data_cutoff <= later.data_cutoff, a.ref_date >= start, a.ref_date <= end,
        )
    )}
    ids = [
        earlier[key][0] for key in ((r["region_id"], r["ref_date"]) for r in changed)
        if key in earlier and key not in covered
    ]
    now = datetime.now(UTC)
    columns = ("ruleset_id", "region_id", "ref_date", "recommended_tier", "previous_tier",
               "criteria", "prepare_signals", "explanation", "content_sha256")
    for k in range(0, len(ids), _CHUNK):
        old = session.scalars(select(a).where(a.id.in_(ids[k:k + _CHUNK])))
        copies = [
            {**{c: getattr(o, c) for c in columns},
             "data_cutoff": later.data_cutoff, "created_at": now}
            for o in old
        ]
        session.execute(insert(Assessment), copies)
    later.rows_written += len(ids)
    session.flush()


def newest_run_of(*, session: Session, ruleset_id: int) -> RunRow | None:
    """The recorded evaluation run of ``ruleset_id`` with the newest data cutoff (None: none)."""
    return session.scalar(
        select(RunRow).where(RunRow.ruleset_id == ruleset_id)
        .order_by(RunRow.data_cutoff.desc()).limit(1)
    )


def newest_run(
    *, session: Session, policy: str | None = None
) -> tuple[RulesetRow, RunRow] | None:
    """The active ruleset of ``policy`` (the lead's when None) and its newest recorded
    evaluation run (None: none)."""
    row = active_ruleset(session=session, policy=policy)
    if row is None:
        return None
    run = newest_run_of(session=session, ruleset_id=row.id)
    return None if run is None else (row, run)


def _newest_run(
    session: Session, policy: str | None
) -> tuple[RulesetRow, datetime, date] | None:
    """The policy's active ruleset, the data cutoff of its newest run and that run's last day."""
    newest = newest_run(session=session, policy=policy)
    if newest is None:
        return None
    row, run = newest
    return row, run.data_cutoff, run.last_day


def current_assessment_id(
    *, session: Session, region_id: int, policy: str | None = None
) -> int | None:
    """Id of a district's current item in the review of ``policy`` (the lead's when None): its
    assessment of the last day of the newest run (the policy's active ruleset), as of that
    run's cutoff; None when there is none."""
    newest = _newest_run(session, policy)
    if newest is None:
        return None
    row, cutoff, last_day = newest
    return session.scalar(assessments_as_of(
        select(Assessment.id), ruleset_id=row.id, cutoff=cutoff, region_id=region_id,
        start=last_day, end=last_day,
    ))


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


PACKAGED_POLICIES = Path(rules.__file__).with_name("policies")


def policies_dir(configured: Path | None) -> Path:
    """The configured rules folder, or the policies shipped with tierwise."""
    return configured if configured is not None else PACKAGED_POLICIES


def default_ruleset_path(configured: Path | None) -> Path:
    """The policy the demo and a fresh installation start with."""
    return policies_dir(configured) / "county.yaml"


__all__ = [
    "EvaluationRun",
    "LatestItem",
    "LatestRun",
    "activate_ruleset",
    "InactivePolicyError",
    "active_ruleset",
    "active_rulesets",
    "assessments_as_of",
    "content_sha256",
    "current_assessment_id",
    "default_ruleset_path",
    "evaluate_districts",
    "evaluate_if_behind",
    "evaluation_behind",
    "newest_cutoff",
    "newest_run",
    "newest_run_of",
    "policies_behind",
    "policies_dir",
    "require_policy",
    "retire_ruleset",
    "serialise_evaluations",
    "store_ruleset",
]

