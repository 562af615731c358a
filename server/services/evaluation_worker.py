"""One evaluation worker per process: evaluations after pushes and uploads, off the request path.

A web route that stored a vintage calls :meth:`EvaluationWorker.request` and answers at once.
The worker's single thread runs :func:`~server.services.evaluation.evaluate_if_behind`; requests
made while it waits or runs *coalesce*: however many vintages arrive, at most one more run
follows, and it covers every vintage committed before it starts. So a burst of pushes costs one
or two evaluations and one database connection, not one of each per push, and an evaluation
that fails is logged (and retried a few times), never raised into a request or its connection.

The web app starts one at start-up (``web/app.py``) and asks it once then, so data that a killed
process landed without evaluating are evaluated as soon as the server is up.
"""

from __future__ import annotations

import logging
import threading
from collections.abc import Callable, Mapping
from datetime import timedelta

from server.services.database import Database
from server.services.evaluation import evaluate_if_behind
from server.services.notify import NotifyConfig

log = logging.getLogger(__name__)

#: Seconds between the attempts of a failing evaluation, and how many attempts follow the first
#: (common practice, no source): a locked database or a dropped connection usually passes.
RETRY_SECONDS = 5.0
RETRIES = 3

Limits = Callable[[], Mapping[str, timedelta] | None]


class EvaluationWorker:
    """A single thread that evaluates when asked; requests made before it starts a run coalesce.

    ``limits`` is called before each run for the feed staleness limits (the feed file may have
    changed); it may raise, which counts as a failed run. The thread starts on the first
    request and stops at :meth:`close`.
    """

    def __init__(
        self, db: Database, *, notify: NotifyConfig | None = None, limits: Limits | None = None,
        retry_seconds: float = RETRY_SECONDS, retries: int = RETRIES,
    ) -> None:
        if retry_seconds < 0 or retries < 0:
            raise ValueError(
                f"retry_seconds and retries must be >= 0, got {retry_seconds} and {retries}"
            )
        self._db = db
        self._notify = notify
        self._limits = limits
        self._retry_seconds = retry_seconds
        self._retries = retries
        self._cond = threading.Condition()
        self._pending = False
        self._running = False
        self._closed = False
        self._thread: threading.Thread | None = None
        self.runs = 0  # evaluations attempted (each call of evaluate_if_behind)
        self.evaluated = 0  # attempts that stored or reused a run
        self.failures = 0

    def request(self) -> None:
        """Ask for an evaluation of everything stored so far; returns at once."""
        with self._cond:
            if self._closed:
                return
            self._pending = True
            if self._thread is None:
                self._thread = threading.Thread(target=self._loop, name="tierwise-evaluation",
                                                daemon=True)
                self._thread.start()
            self._cond.notify_all()

    def wait_idle(self, timeout: float | None = None) -> bool:
        """Block until no evaluation is queued or running; False when ``timeout`` passed first."""
        with self._cond:
            return self._cond.wait_for(lambda: not (self._pending or self._running), timeout)

    def close(self, timeout: float = 60.0) -> None:
        """Stop taking requests; wait up to ``timeout`` seconds for a running evaluation.

        A queued request is dropped: the next start evaluates what it would have.
        """
        with self._cond:
            self._closed = True
            self._cond.notify_all()
            thread = self._thread
        if thread is not None:
            thread.join(timeout)

    def _loop(self) -> None:
        failed = 0
        while True:
            with self._cond:
                self._cond.wait_for(lambda: self._pending or self._closed)
                if self._closed:
                    self._pending = False
                    self._cond.notify_all()
                    return
                self._pending = False
                self._running = True
            ok = self._run_once()
            with self._cond:
                self._running = False
                failed = 0 if ok else failed + 1
                if not ok and failed <= self._retries:
                    self._pending = True  # retried after the pause below
                self._cond.notify_all()
            if not ok and failed <= self._retries:
                with self._cond:
                    self._cond.wait_for(lambda: self._closed, self._retry_seconds)

    def _run_once(self) -> bool:
        try:
            limits = self._limits() if self._limits is not None else None
            run = evaluate_if_behind(self._db, notify=self._notify, stale_after=limits)
        except Exception:  # logged, never raised: the worker must outlive any failure
            log.exception("background evaluation failed")
            with self._cond:
                self.runs += 1
                self.failures += 1
            return False
        with self._cond:
            self.runs += 1
            self.evaluated += run is not None
        if run is not None:
            log.info("evaluated %s at cutoff %s: %d assessments written%s", run.ruleset_name,
                     run.data_cutoff.isoformat(), run.written, " (reused)" if run.reused else "")
        return True


__all__ = ["RETRIES", "RETRY_SECONDS", "EvaluationWorker"]
