"""Evaluations after crashes and at the same time, on SQLite and PostgreSQL (committed databases).

``evaluate_if_behind`` is the one place that decides that new data mean a new evaluation; two
evaluations at one cutoff serialise, and the later one reuses the run the earlier one stored.
"""

from __future__ import annotations

import hashlib
import io
import threading
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import func, select

import server.services.evaluation as evaluation
from server.feeds.definition import FeedDefinition, load_feeds
from server.feeds.sources import Payload
from server.services.database import Database
from server.services.evaluation import EvaluationRun, evaluate_if_behind, evaluation_behind
from server.services.feeds import ingest_recorded
from server.services.ingest import IngestOutcome
from server.store.models import Assessment, Vintage
from server.store.models import EvaluationRun as RunRow
from tests.server.conftest import cases_csv, seed_small_office


def _feed(db: Database, folder: Path) -> FeedDefinition:
    return load_feeds(seed_small_office(db, folder))["long-csv"]


def _ingest(db: Database, feed: FeedDefinition, body: bytes, *, evaluate: bool) -> IngestOutcome:
    return ingest_recorded(db, feed=feed, payload=Payload.from_bytes("push", body),
                           evaluate=evaluate)


def _runs(db: Database) -> list[RunRow]:
    with db.sessions() as session:
        return list(session.scalars(select(RunRow).order_by(RunRow.data_cutoff)))


def test_evaluate_if_behind_evaluates_new_data_once(committed_db: Database,
                                                    tmp_path: Path) -> None:
    feed = _feed(committed_db, tmp_path)
    assert evaluate_if_behind(committed_db) is None  # no data yet
    _ingest(committed_db, feed, cases_csv(30), evaluate=False)
    first = evaluate_if_behind(committed_db)
    assert first is not None and not first.reused and first.written > 0
    assert evaluate_if_behind(committed_db) is None  # nothing new
    _ingest(committed_db, feed, cases_csv(30, value=40), evaluate=False)
    second = evaluate_if_behind(committed_db)
    assert second is not None and second.data_cutoff > first.data_cutoff
    with committed_db.sessions() as session:
        newest = session.scalar(select(func.max(Vintage.received_at)))
        assert evaluation_behind(session=session) is None
    assert [r.data_cutoff for r in _runs(committed_db)] == [first.data_cutoff, newest]


def test_ingest_rerun_after_a_kill_before_its_evaluation_evaluates(
    committed_db: Database, tmp_path: Path
) -> None:
    # The state a process killed between its ingest's commit and its evaluation leaves behind:
    # the vintage is stored, no run covers it. Rerunning the same ingest finds the payload
    # identical and must still evaluate (it answered "nothing changed" and skipped before).
    feed = _feed(committed_db, tmp_path)
    landed = _ingest(committed_db, feed, cases_csv(30), evaluate=False).receipt
    rerun = _ingest(committed_db, feed, cases_csv(30), evaluate=True)
    assert rerun.receipt.unchanged and rerun.receipt.identical_to == landed.vintage_id
    assert rerun.evaluation is not None and rerun.evaluation.data_cutoff == landed.received_at
    assert [r.data_cutoff for r in _runs(committed_db)] == [landed.received_at]


def _at_once(calls: int, target: Any) -> list[Any]:
    """Run ``target`` in ``calls`` threads; the results, or the exceptions raised."""
    results: list[Any] = [None] * calls

    def run(k: int) -> None:
        try:
            results[k] = target()
        except Exception as exc:  # reported by the assertions of the test
            results[k] = exc

    threads = [threading.Thread(target=run, args=(k,)) for k in range(calls)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(120)
    return results


def test_two_evaluations_at_once_store_one_run(
    committed_db: Database, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    feed = _feed(committed_db, tmp_path)
    _ingest(committed_db, feed, cases_csv(60), evaluate=False)
    both_computed = threading.Barrier(2, timeout=60)
    engine = evaluation.evaluate_policy

    def evaluate_then_wait(*args: Any, **kwargs: Any) -> Any:
        result = engine(*args, **kwargs)
        both_computed.wait()  # neither stores before both have computed: they must collide
        return result

    monkeypatch.setattr(evaluation, "evaluate_policy", evaluate_then_wait)
    results = _at_once(2, lambda: evaluate_if_behind(committed_db))
    assert all(isinstance(r, EvaluationRun) for r in results), results
    assert sorted(r.reused for r in results) == [False, True]
    assert len({r.data_cutoff for r in results}) == 1
    runs = _runs(committed_db)
    assert len(runs) == 1
    with committed_db.sessions() as session:
        stored = session.scalar(select(func.count()).select_from(Assessment))
    assert stored == runs[0].rows_written == max(r.written for r in results) > 0


def test_a_collision_on_the_unique_keys_reuses_the_stored_run(
    committed_db: Database, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Without the lock (as with an evaluator that does not take it) both store; the second
    # meets the first's rows on the unique keys and reuses its run. On SQLite the second
    # cannot get that far: its write waits for the first's write lock and then finds its read
    # snapshot outdated, so there only the lock serialises (the test above).
    if committed_db.engine.dialect.name != "postgresql":
        pytest.skip("a collision on the unique keys needs concurrent writers (PostgreSQL)")
    feed = _feed(committed_db, tmp_path)
    _ingest(committed_db, feed, cases_csv(60), evaluate=False)
    both_storing = threading.Barrier(2, timeout=60)
    store = evaluation.store_assessments

    def wait_then_store(*args: Any, **kwargs: Any) -> int:
        both_storing.wait()
        return store(*args, **kwargs)

    monkeypatch.setattr(evaluation, "serialise_evaluations", lambda session: None)
    monkeypatch.setattr(evaluation, "store_assessments", wait_then_store)
    results = _at_once(2, lambda: evaluate_if_behind(committed_db))
    assert all(isinstance(r, EvaluationRun) for r in results), results
    assert sorted(r.reused for r in results) == [False, True]
    assert len(_runs(committed_db)) == 1


class _HeldStream(io.BytesIO):
    """A payload stream whose first read waits until ``release`` is set."""

    def __init__(self, content: bytes, reading: threading.Event,
                 release: threading.Event) -> None:
        super().__init__(content)
        self._reading, self._release = reading, release

    def read(self, n: int | None = -1) -> bytes:
        self._reading.set()
        assert self._release.wait(60), "the held ingest was never released"
        return super().read(n)


def test_a_vintage_committed_after_an_evaluation_is_seen_as_new(
    committed_db: Database, tmp_path: Path
) -> None:
    # Ingest A starts first and commits last; B lands and is evaluated in between. A's
    # received_at must come after B's evaluation cutoff, or A's rows would never be evaluated.
    if committed_db.engine.dialect.name != "postgresql":
        pytest.skip("SQLite lets one ingest write at a time: A holds the lock B needs")
    feed = _feed(committed_db, tmp_path)
    body = cases_csv(20, value=9)
    reading, release = threading.Event(), threading.Event()
    held = Payload(label="held", opener=lambda: _HeldStream(body, reading, release),
                   checksum=hashlib.sha256(body).hexdigest(), size=len(body))
    outcome: list[IngestOutcome] = []
    first = threading.Thread(target=lambda: outcome.append(ingest_recorded(
        committed_db, feed=feed, payload=held, evaluate=False)))
    first.start()
    assert reading.wait(60)
    late = _ingest(committed_db, feed, cases_csv(20), evaluate=True)
    assert late.evaluation is not None
    release.set()
    first.join(60)
    assert outcome[0].receipt.received_at > late.evaluation.data_cutoff
    with committed_db.sessions() as session:
        assert evaluation_behind(session=session) is not None
    caught_up = evaluate_if_behind(committed_db)
    assert caught_up is not None and caught_up.data_cutoff == outcome[0].receipt.received_at
