"""The job APScheduler stores and calls: a textual reference plus a process-local registry.

APScheduler's SQLAlchemy job store pickles each job with a reference to its function
(``server.scheduler.jobs:run_scheduled_feed``) and its arguments. The database, the feed catalogue
and the retry policy are not picklable, so the job carries only the key of a :class:`Runtime`
registered by the scheduler of this process, and the feed's name.
"""

from __future__ import annotations

import logging
import threading
from collections.abc import Mapping
from dataclasses import dataclass, field

from server.services.database import Database
from server.services.evaluation import EvaluationRun, evaluate_if_behind
from server.services.feed_runs import FeedRun, run_feed
from server.services.feeds import catalogue_limits, feed_named

log = logging.getLogger(__name__)

JOB_FUNCTION = "server.scheduler.jobs:run_scheduled_feed"
CATCH_UP_FUNCTION = "server.scheduler.jobs:catch_up_evaluation"


@dataclass(frozen=True, kw_only=True)
class Runtime:
    """What a job needs that cannot be pickled into the job store."""

    db: Database
    catalogue: object  # FeedCatalogue; typed loosely to keep this module free of feed imports
    time_zone: str = "UTC"
    environ: Mapping[str, str] = field(default_factory=dict)
    retry: object | None = None  # RetryPolicy
    notify: object | None = None  # NotifyConfig: recipients of tier-change notices


_RUNTIMES: dict[str, Runtime] = {}
_LOCK = threading.Lock()


def register(key: str, runtime: Runtime) -> None:
    with _LOCK:
        _RUNTIMES[key] = runtime


def unregister(key: str) -> None:
    with _LOCK:
        _RUNTIMES.pop(key, None)


def run_scheduled_feed(key: str, feed_name: str) -> FeedRun | None:
    """Run one feed for the scheduler registered under ``key`` (None if it has gone away)."""
    with _LOCK:
        runtime = _RUNTIMES.get(key)
    if runtime is None:
        log.warning("no scheduler runtime %r in this process; skipping feed %s", key, feed_name)
        return None
    feed = feed_named(runtime.catalogue, feed_name)  # type: ignore[arg-type]
    run = run_feed(
        runtime.db, feed=feed, time_zone=runtime.time_zone, environ=runtime.environ,
        policy=runtime.retry,  # type: ignore[arg-type]
        notify=runtime.notify,  # type: ignore[arg-type]
        stale_after=catalogue_limits(runtime.catalogue),  # type: ignore[arg-type]
        precedence=runtime.catalogue.precedence(),  # type: ignore[attr-defined]
    )
    log.info("feed %s: %d vintage(s) landed, not modified: %s, errors: %s",
             feed_name, run.landed, run.not_modified, list(run.errors))
    return run


def catch_up_evaluation(key: str) -> EvaluationRun | None:
    """Evaluate data stored but not yet evaluated (a process killed between its ingest and its
    evaluation), for the scheduler registered under ``key``: run once when an instance becomes
    the leader (:func:`~server.services.evaluation.evaluate_if_behind`)."""
    with _LOCK:
        runtime = _RUNTIMES.get(key)
    if runtime is None:
        log.warning("no scheduler runtime %r in this process; skipping the catch-up", key)
        return None
    run = evaluate_if_behind(
        runtime.db, notify=runtime.notify,  # type: ignore[arg-type]
        stale_after=catalogue_limits(runtime.catalogue),  # type: ignore[arg-type]
    )
    if run is not None:
        log.info("catch-up: evaluated %s at cutoff %s", run.ruleset_name,
                 run.data_cutoff.isoformat())
    return run
