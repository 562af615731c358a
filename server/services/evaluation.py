"""Use case: evaluate the active ruleset for the regions of its level and store the assessments.

The regions are the districts, or the areas or the county of a policy with ``level``
(:func:`server.services.level_data.evaluate_policy`: indicators from counts summed up the
region tree, as known at the cutoff).

An evaluation reads the data as known at a cutoff (the newest vintage received, unless a cutoff is
given), computes the indicators, runs the rules engine over the whole history and records an
``evaluation_run`` (ruleset, cutoff, first and last day, rows written). It stores an assessment
only for the district and day pairs whose result changed since the newest earlier run
(:func:`server.services.assessments.store_assessments`; the row in force at a run:
:func:`server.services.assessments.assessments_as_of`). Re-running with the same ruleset and
cutoff reuses the run (nothing is recomputed or rewritten).

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

Several policies are active at once (:func:`server.services.rulesets.active_rulesets`, the lead
policy first); each is evaluated on its own. Activating a ruleset evaluates it
(:func:`server.services.ruleset_activation.activate_ruleset`).
"""

from __future__ import annotations

import hashlib
import logging
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, date, datetime, timedelta

from sqlalchemy import func, select, text, type_coerce
from sqlalchemy.exc import IntegrityError
from sqlalchemy.orm import Session

from rules import Evaluation
from server.services.assessments import newest_run_of, store_assessments
from server.services.database import Database
from server.services.district_data import store_measures
from server.services.forecast_known import Forecaster
from server.services.forecast_store import forecasts_stored, store_morning_forecasts
from server.services.indicator_kinds import measure_needs
from server.services.level_data import evaluate_policy
from server.services.notify import Delivery, NotifyConfig, deliver_and_record, events_on_day
from server.services.ruleset_cache import parsed
from server.services.rulesets import active_rulesets
from server.store.models import EvaluationRun as RunRow
from server.store.models import Measure, Observation, Vintage
from server.store.models import Ruleset as RulesetRow
from server.store.types import UTCDateTime

__all__ = [
    "EvaluationRun",
    "evaluate_districts",
    "evaluate_if_behind",
    "evaluation_behind",
    "newest_cutoff",
    "policies_behind",
    "serialise_evaluations",
    "store_forecasts_after_tiers",
]


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
            written, kept = store_assessments(session, ruleset_row.id, cutoff, result)
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
    """The active rulesets (in :func:`~server.services.rulesets.active_rulesets` order) whose
    newest evaluation is older than the newest data, and the newest data cutoff (None: no data).

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


