"""SIGKILL at seeded random moments during ``tierwise ingest`` and ``tierwise evaluate``.

Each test works on a SQLite file of an invented office (8 districts, a one-criterion ruleset)
and files sized so a run takes a few seconds: a national file of :data:`DAYS` days that holds the
office's districts and :data:`OTHERS` districts of other offices (rejected as unknown regions and
stored as rejected rows, which makes landing take a while), then the evaluation. After every
kill no vintage and no evaluation run may be partial, and the next start must evaluate
everything that landed: for the ingest, re-running the same command (it finds the file
identical and must still evaluate); for the evaluation, ``tierwise evaluate`` or the serve
start-up check (:func:`server.services.evaluation.evaluate_if_behind`), in turn.

The runs are forked from one process that imported the CLI once (``forkserver.py``), so the
kill moments fall in the run, not in the interpreter's start.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import logging
import os
import signal
import subprocess
import sys
import time
from collections.abc import Iterator
from datetime import date, timedelta
from pathlib import Path
from typing import IO

import numpy as np
import pytest
from sqlalchemy import Engine, func, select, text

from server.feeds.definition import load_feeds
from server.feeds.sources import Payload
from server.services.database import Database
from server.services.evaluation import evaluate_if_behind, evaluation_behind
from server.services.feeds import ingest_recorded
from server.store import make_engine, make_sessionmaker, upgrade
from server.store.models import Vintage
from tests.server.conftest import seed_small_office

log = logging.getLogger(__name__)

ROOT = Path(__file__).resolve().parents[3]
SEED = 20261204
KILLS = 10
DAYS = 90
DISTRICTS = 8
OTHERS = 30
END = date(2026, 11, 30)
MEASURES = {"cases": 3, "tests": 100, "positives": 10}


class ForkServer:
    """The other end of ``forkserver.py``."""

    def __init__(self, folder: Path) -> None:
        self.folder = folder
        self.process = subprocess.Popen(
            [sys.executable, str(Path(__file__).with_name("forkserver.py")), str(folder)],
            cwd=ROOT, stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True,
        )
        assert self._pipes()[1].readline() == "ready\n", "the fork server did not start"

    def _pipes(self) -> tuple[IO[str], IO[str]]:
        assert self.process.stdin is not None and self.process.stdout is not None
        return self.process.stdin, self.process.stdout

    def start(self, env: dict[str, str], *runs: list[str]) -> list[int]:
        """Fork one child per run (at once); their pids."""
        stdin, stdout = self._pipes()
        stdin.write(json.dumps({"env": env, "runs": list(runs)}) + "\n")
        stdin.flush()
        return [int(p) for p in stdout.readline().split()]

    def finish(self) -> list[int]:
        """Exit codes of the children of the last :meth:`start` (-9: killed by SIGKILL)."""
        _, stdout = self._pipes()
        return [os.waitstatus_to_exitcode(int(s)) for s in stdout.readline().split()]

    def output(self, pid: int) -> str:
        return (self.folder / f"{pid}.log").read_text()

    def run(self, env: dict[str, str], args: list[str]) -> tuple[int, str]:
        (pid,) = self.start(env, args)
        (code,) = self.finish()
        return code, self.output(pid)

    def close(self) -> None:
        stdin, stdout = self._pipes()
        stdin.close()
        self.process.wait(30)
        stdout.close()


@pytest.fixture(scope="module")
def forkserver(tmp_path_factory: pytest.TempPathFactory) -> Iterator[ForkServer]:
    server = ForkServer(tmp_path_factory.mktemp("runs"))
    yield server
    server.close()


def write_file(folder: Path, k: int, *, others: int = OTHERS) -> Path:
    """The ``k``-th national file: every district and measure over :data:`DAYS` days, values
    + ``k``; districts ``S01``.. are the office's, ``X001``.. (``others`` of them) are not."""
    codes = [f"S{r:02d}" for r in range(1, DISTRICTS + 1)] + [
        f"X{r:03d}" for r in range(1, others + 1)]
    path = folder / f"file{k:02d}-{others}.csv"
    with path.open("w") as out:
        out.write("region,date,measure,value\n")
        for d in range(DAYS):
            day = END - timedelta(days=d)
            out.write("".join(f"{code},{day},{m},{v + k}\n"
                              for code in codes for m, v in MEASURES.items()))
    return path


def partial_vintages(engine: Engine) -> int:
    """Vintages whose stored rows differ from their counts, plus rows of no vintage."""
    with engine.connect() as c:
        kept = dict(c.execute(text(
            "SELECT vintage_id, count(*) FROM observation GROUP BY vintage_id")).all())
        rejected = dict(c.execute(text(
            "SELECT vintage_id, count(*) FROM rejected_row GROUP BY vintage_id")).all())
        vintages = c.execute(text("SELECT id, rows_accepted, rows_rejected FROM vintage")).all()
    ids = {v for v, _, _ in vintages}
    wrong = [v for v, acc, rej in vintages if kept.get(v, 0) != acc or rejected.get(v, 0) != rej]
    return len(wrong) + len((set(kept) | set(rejected)) - ids)


def partial_runs(engine: Engine) -> int:
    """Evaluation runs whose assessments differ from ``rows_written``, plus assessments stored
    under a cutoff that has no run."""
    with engine.connect() as c:
        stored = {(r, t): n for r, t, n in c.execute(text(
            "SELECT ruleset_id, data_cutoff, count(*) FROM assessment "
            "GROUP BY ruleset_id, data_cutoff")).all()}
        runs = {(r, t): n for r, t, n in c.execute(text(
            "SELECT ruleset_id, data_cutoff, rows_written FROM evaluation_run")).all()}
    return sum(stored.get(key, 0) != n for key, n in runs.items()) + len(set(stored) - set(runs))


def behind(db: Database) -> bool:
    with db.sessions() as session:
        return evaluation_behind(session=session) is not None


def kill_at(forkserver: ForkServer, env: dict[str, str], args: list[str],
            moment: float) -> bool:
    """Start ``args``, SIGKILL it ``moment`` seconds later; True when it was still running."""
    (pid,) = forkserver.start(env, args)
    time.sleep(moment)
    try:
        os.kill(pid, signal.SIGKILL)
    except ProcessLookupError:  # already finished and reaped
        pass
    (code,) = forkserver.finish()
    return code == -signal.SIGKILL


@pytest.fixture
def office(tmp_path: Path) -> Iterator[tuple[dict[str, str], Database]]:
    """The office's database file and the environment of its ``tierwise`` commands."""
    url = f"sqlite:///{tmp_path / 'office.db'}"
    engine = make_engine(url)
    upgrade(engine)
    db = Database(engine=engine, sessions=make_sessionmaker(engine))
    feeds = seed_small_office(db, tmp_path, districts=DISTRICTS)
    yield {"TIERWISE_DATABASE_URL": url, "TIERWISE_FEEDS_FILE": str(feeds)}, db
    engine.dispose()


def alive(pid: int) -> bool:
    """Whether the fork server's child ``pid`` still runs (it reaps children at once)."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    return True


@pytest.mark.slow
def test_ingest_killed_at_random_moments_loses_nothing(
    forkserver: ForkServer, office: tuple[dict[str, str], Database], tmp_path: Path
) -> None:
    env, db = office
    rng = np.random.default_rng(SEED)
    assert partial_vintages(db.engine) == 0 and partial_runs(db.engine) == 0

    def landed(checksum: str) -> int:
        with db.sessions() as session:
            return int(session.scalar(select(func.count()).select_from(Vintage)
                                      .where(Vintage.checksum == checksum)) or 0)

    def watch(pid: int, checksum: str) -> float | None:
        """Seconds until ``checksum``'s vintage is committed (None: the run ended first)."""
        started = time.monotonic()
        while alive(pid):
            if landed(checksum):
                return time.monotonic() - started
            time.sleep(0.01)
        return None

    # A first run without a kill: when its vintage commits and how long it evaluates. The
    # estimates shrink whenever a run gets past its moment (the machine got faster).
    first = write_file(tmp_path, 0)
    started = time.monotonic()
    (pid,) = forkserver.start(env, ["ingest", str(first), "--feed", "long-csv"])
    commit_at = watch(pid, hashlib.sha256(first.read_bytes()).hexdigest())
    assert forkserver.finish() == [0] and commit_at is not None
    evaluating = time.monotonic() - started - commit_at
    calibration = (commit_at, evaluating)
    phases = {"before commit": 0, "after commit, before evaluation": 0,
              "during or after evaluation": 0, "finished": 0}
    lost = partial = kills = k = 0
    while kills < KILLS and k < 2 * KILLS:  # a run that ends before its moment is no kill
        k += 1
        path = write_file(tmp_path, k)
        checksum = hashlib.sha256(path.read_bytes()).hexdigest()
        args = ["ingest", str(path), "--feed", "long-csv"]
        (pid,) = forkserver.start(env, args)
        if k % 2:  # odd kills while the file lands, even ones after its commit
            time.sleep(rng.uniform(0.05, 0.95) * commit_at)
        else:
            seen = watch(pid, checksum)
            commit_at = seen if seen is not None else commit_at
            time.sleep(rng.uniform(0.0, 0.9) * evaluating)
        with contextlib.suppress(ProcessLookupError):  # already finished
            os.kill(pid, signal.SIGKILL)
        killed = forkserver.finish() == [-signal.SIGKILL]
        partial += partial_vintages(db.engine) + partial_runs(db.engine)
        stored = landed(checksum)
        phase = ("finished" if not killed else "before commit" if not stored
                 else "after commit, before evaluation" if behind(db)
                 else "during or after evaluation")
        phases[phase] += 1
        kills += killed
        if k % 2 and stored:
            commit_at *= 0.7
        elif not killed:
            evaluating *= 0.7
        code, output = forkserver.run(env, args)  # the next start: the same command again
        assert code == 0, output
        assert ("identical to vintage" in output) == bool(stored)
        assert landed(checksum) == 1
        lost += behind(db)
    log.info("ingest: %d kills (%s), %d partial vintages or runs, %d evaluations lost; "
             "first run: commit at %.1f s, then %.1f s of evaluation", kills, phases, partial,
             lost, *calibration)
    assert partial == 0 and lost == 0
    assert kills == KILLS, phases


@pytest.mark.slow
def test_evaluate_killed_at_random_moments_loses_nothing(
    forkserver: ForkServer, office: tuple[dict[str, str], Database], tmp_path: Path
) -> None:
    env, db = office
    rng = np.random.default_rng(SEED + 1)
    feed = load_feeds(Path(env["TIERWISE_FEEDS_FILE"]))["long-csv"]

    def land(k: int) -> None:  # lands a vintage without evaluating it
        ingest_recorded(db, feed=feed, payload=Payload.from_path(
            write_file(tmp_path, k, others=0)), evaluate=False)

    land(0)
    started = time.monotonic()
    code, output = forkserver.run(env, ["evaluate"])
    assert code == 0 and "stored assessments" in output, output
    total = time.monotonic() - started
    killed_before_commit = finished = lost = partial = kills = k = 0
    while kills < KILLS and k < 2 * KILLS:  # a run that ends before its moment is no kill
        k += 1
        land(k)
        assert behind(db)
        killed = kill_at(forkserver, env, ["evaluate"], rng.uniform(0.05, 0.95) * total)
        if not killed:
            total *= 0.7  # the machine got faster: aim earlier
        partial += partial_vintages(db.engine) + partial_runs(db.engine)
        finished += not killed
        kills += killed
        if behind(db):
            killed_before_commit += 1
            if k % 2:  # the next start: `tierwise evaluate`, or the serve start-up check
                code, output = forkserver.run(env, ["evaluate"])
                assert code == 0, output
            else:
                assert evaluate_if_behind(db) is not None
        lost += behind(db)
    log.info("evaluate: %d kills (%d before the run's commit), %d runs ended before their "
             "moment, %d partial vintages or runs, %d evaluations lost; calibration: %.1f s",
             kills, killed_before_commit, finished, partial, lost, total)
    assert partial == 0 and lost == 0
    assert kills == KILLS


def test_two_evaluate_commands_at_once_both_succeed(
    forkserver: ForkServer, office: tuple[dict[str, str], Database], tmp_path: Path
) -> None:
    env, db = office
    feed = load_feeds(Path(env["TIERWISE_FEEDS_FILE"]))["long-csv"]
    ingest_recorded(db, feed=feed, payload=Payload.from_path(write_file(tmp_path, 1, others=0)),
                    evaluate=False)
    pids = forkserver.start(env, ["evaluate"], ["evaluate"])
    codes = forkserver.finish()
    outputs = [forkserver.output(pid) for pid in pids]
    assert codes == [0, 0], outputs
    assert sorted("reused" in o for o in outputs) == [False, True], outputs
    assert not behind(db) and partial_runs(db.engine) == 0
