"""The per-process evaluation worker: requests coalesce, failures are logged and retried."""

from __future__ import annotations

import logging
import threading
from pathlib import Path
from typing import Any

import pytest

import server.services.evaluation_worker as worker_module
from server.feeds.definition import load_feeds
from server.feeds.sources import Payload
from server.services.database import Database
from server.services.evaluation import evaluation_behind
from server.services.evaluation_worker import EvaluationWorker
from server.services.feeds import ingest_recorded
from tests.server.conftest import cases_csv, seed_small_office


class _Evaluations:
    """Stands in for ``evaluate_if_behind``: counts calls, can hold a call or fail."""

    def __init__(self, failures: int = 0) -> None:
        self.calls = 0
        self.failures = failures
        self.started = threading.Event()
        self.release = threading.Event()
        self.release.set()

    def __call__(self, db: object, **_kwargs: Any) -> None:
        self.calls += 1
        self.started.set()
        assert self.release.wait(30)
        if self.calls <= self.failures:
            raise RuntimeError("database is locked")


def test_worker_requests_during_a_run_coalesce_into_one_more(
    monkeypatch: pytest.MonkeyPatch
) -> None:
    fake = _Evaluations()
    fake.release.clear()
    monkeypatch.setattr(worker_module, "evaluate_if_behind", fake)
    worker = EvaluationWorker(Database.__new__(Database))
    worker.request()
    assert fake.started.wait(10)
    for _ in range(50):  # a burst of pushes while the first evaluation runs
        worker.request()
    fake.release.set()
    assert worker.wait_idle(30)
    worker.close()
    assert fake.calls == 2 and worker.runs == 2


def test_worker_logs_a_failure_and_retries(
    monkeypatch: pytest.MonkeyPatch, caplog: pytest.LogCaptureFixture
) -> None:
    fake = _Evaluations(failures=2)
    monkeypatch.setattr(worker_module, "evaluate_if_behind", fake)
    worker = EvaluationWorker(Database.__new__(Database), retry_seconds=0.01, retries=3)
    with caplog.at_level(logging.ERROR, logger="server.services.evaluation_worker"):
        worker.request()
        assert worker.wait_idle(30)
    assert (fake.calls, worker.failures, worker.runs) == (3, 2, 3)
    assert [r.getMessage() for r in caplog.records] == ["background evaluation failed"] * 2
    worker.request()  # still alive after failures
    assert worker.wait_idle(30)
    worker.close()
    assert fake.calls == 4


def test_worker_gives_up_after_its_retries(monkeypatch: pytest.MonkeyPatch) -> None:
    fake = _Evaluations(failures=10)
    monkeypatch.setattr(worker_module, "evaluate_if_behind", fake)
    worker = EvaluationWorker(Database.__new__(Database), retry_seconds=0.01, retries=2)
    worker.request()
    assert worker.wait_idle(30)
    worker.close()
    assert (fake.calls, worker.failures) == (3, 3)


def test_worker_rejects_negative_retries() -> None:
    with pytest.raises(ValueError, match="retries must be >= 0, got 1.0 and -1"):
        EvaluationWorker(Database.__new__(Database), retry_seconds=1.0, retries=-1)


def test_worker_evaluates_every_vintage_of_a_burst(committed_db: Database,
                                                   tmp_path: Path) -> None:
    feed = load_feeds(seed_small_office(committed_db, tmp_path))["long-csv"]
    worker = EvaluationWorker(committed_db)
    for k in range(20):
        ingest_recorded(committed_db, feed=feed,
                        payload=Payload.from_bytes("push", cases_csv(10, value=k)))
        worker.request()
    assert worker.wait_idle(120)
    worker.close()
    with committed_db.sessions() as session:
        assert evaluation_behind(session=session) is None
    assert worker.failures == 0 and 1 <= worker.evaluated <= worker.runs <= 20
