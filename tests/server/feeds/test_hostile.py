"""Hostile input through ``tierwise ingest`` (in process, as ``tests/server/cli`` drives it).

1 000 generated files (``hostile_files``, seed 2026): no traceback, exit status 0 or 1 with one
line, stored rows of earlier vintages never changed, nothing stored for a file rejected whole or
without a good row, and the evaluation of the active ruleset succeeds after every file.
"""

from __future__ import annotations

import logging
import time
from pathlib import Path

import pytest
import typer
from typer.testing import CliRunner

from server.cli import app
from server.cli import feeds as cli_feeds
from server.services.database import Database
from server.store import make_engine, make_sessionmaker
from tests.server.feeds.hostile_files import (
    FEEDS_YAML,
    Tally,
    digest,
    digests,
    evaluate_now,
    feed_of,
    hostile_files,
    prepare,
)

SEED, COUNT = 2026, 1000
log = logging.getLogger(__name__)


class _KeptOpen(Database):
    """The test's database as the command sees it: its dispose leaves the pool open."""

    def dispose(self) -> None:
        pass


@pytest.mark.slow
@pytest.mark.hostile
def test_hostile_files_through_the_cli_ingest(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    url = f"sqlite:///{tmp_path / 'hostile.db'}"
    (tmp_path / "feeds.yaml").write_text(FEEDS_YAML)
    monkeypatch.setenv("TIERWISE_DATABASE_URL", url)
    monkeypatch.setenv("TIERWISE_FEEDS_FILE", str(tmp_path / "feeds.yaml"))
    engine = make_engine(url)
    db = Database(engine=engine, sessions=make_sessionmaker(engine))
    prepare(db, tmp_path)
    # The command runs in process on one engine: each invocation otherwise builds its own and
    # compiles every SQL statement afresh (a second of a 2-core machine per file).
    # It also keeps that engine's connection: the command disposes of its database when done,
    # and closing the file's last connection checkpoints it (a hundredth of a second per file).
    kept = _KeptOpen(engine=db.engine, sessions=db.sessions)
    monkeypatch.setattr(cli_feeds, "_database", lambda _settings: kept)
    # ... and typer builds the command tree from the functions' signatures on every invoke
    # (a tenth of a second per file): build it once, and invoke that same tree each time.
    command = typer.main.get_command(app)
    monkeypatch.setattr("typer.testing._get_command", lambda _app: command)
    runner = CliRunner()
    tally = Tally()
    started = time.monotonic()
    path = tmp_path / "in.bin"
    before, _n, newest = digest(db)
    try:
        for file in hostile_files(SEED, COUNT):
            path.write_bytes(file.content)
            result = runner.invoke(app, ["ingest", str(path), "--feed", feed_of(file)])
            tally.tried += 1
            problem = None
            if result.exception is not None and not isinstance(result.exception, SystemExit):
                problem = f"raised {type(result.exception).__name__}: {result.exception}"
            elif result.exit_code not in (0, 1) or "Traceback" in result.output:
                problem = f"exit {result.exit_code}: {result.output[-300:]}"
            # one read of the table after the file: all rows, and those of earlier vintages
            (after, _n, newest_after), (earlier, _m, _v) = digests(db, up_to_vintage=newest)
            if earlier != before:
                tally.rows_changed += 1
                problem = problem or "stored rows of earlier vintages changed"
            if result.exit_code == 1:
                tally.rejected_whole += 1
                if after != before:
                    problem = problem or "a file rejected whole stored rows"
            elif after != before:
                tally.landed += 1
            try:
                tally.evaluations += evaluate_now(db)
            except Exception as exc:  # noqa: BLE001 - any failure is what the suite reports
                problem = problem or f"evaluation failed: {type(exc).__name__}: {exc}"
            if problem:
                tally.failures.append(f"{file.name}: {problem}")
            # the evaluation writes no observations: the next file starts from these rows
            before, newest = after, newest_after
    finally:
        db.dispose()
    log.info("%s in %.0f s", tally.summary("cli ingest"), time.monotonic() - started)
    assert tally.failures == []
    assert tally.tried == COUNT and tally.evaluations == COUNT and tally.rows_changed == 0
    assert tally.landed > 50 and tally.rejected_whole > 100  # both outcomes were exercised
