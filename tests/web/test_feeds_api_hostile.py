"""Hostile input through the push endpoint: the 1 000 generated files of
``tests/server/feeds/hostile_files.py`` (seed 2027) pushed with a valid token.

Every answer is 200, 201, 413 or 422 (never 5xx, never an exception out of the app or its
background evaluation); a 422 names the place; stored rows of earlier vintages never change and
nothing is stored for a file rejected whole or without a good row; the evaluation of the active
ruleset succeeds after every file.
"""

from __future__ import annotations

import logging
import time
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from server.config import Settings
from server.services.database import Database
from server.services.feed_push import issue_token
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
from web.app import create_app

SEED, COUNT = 2027, 1000
log = logging.getLogger(__name__)


@pytest.mark.slow
@pytest.mark.hostile
def test_hostile_files_through_the_push_endpoint(tmp_path: Path) -> None:
    (tmp_path / "feeds.yaml").write_text(FEEDS_YAML)
    settings = Settings(database_url=f"sqlite:///{tmp_path / 'push.db'}", secret_key="k" * 32,
                        feeds_file=tmp_path / "feeds.yaml")
    db = Database.from_settings(settings)
    prepare(db, tmp_path)
    with db.transaction() as session:
        tokens = {f: issue_token(session=session, feed=f, actor="t")
                  for f in ("long-csv", "long-json")}
    tally = Tally()
    started = time.monotonic()
    before, _n, newest = digest(db)
    with TestClient(create_app(settings, database=db)) as client:
        for file in hostile_files(SEED, COUNT):
            feed = feed_of(file)
            problem = None
            try:
                answer = client.post(
                    f"/api/feeds/{feed}/push", content=file.content,
                    headers={"Authorization": f"Bearer {tokens[feed]}",
                             "Content-Type": "application/json" if file.format == "json"
                             else "text/csv"})
                status = answer.status_code
                if status not in (200, 201, 413, 422):
                    problem = f"answered {status}: {answer.text[:300]}"
                elif status == 422 and ": " not in answer.json().get("detail", ""):
                    problem = f"422 without a place and a reason: {answer.text[:300]}"
            except Exception as exc:  # noqa: BLE001 - any failure is what the suite reports
                status, problem = 500, f"raised {type(exc).__name__}: {exc}"
            tally.tried += 1
            # one read of the table after the file: all rows, and those of earlier vintages
            (after, _n, newest_after), (earlier, _m, _v) = digests(db, up_to_vintage=newest)
            if earlier != before:
                tally.rows_changed += 1
                problem = problem or "stored rows of earlier vintages changed"
            if status in (413, 422) or (status == 201 and answer.json()["rows_accepted"] == 0):
                tally.rejected_whole += 1
                if after != before:
                    problem = problem or "a rejected file stored rows"
            elif after != before:
                tally.landed += 1
            try:
                tally.evaluations += evaluate_now(db)
            except Exception as exc:  # noqa: BLE001
                problem = problem or f"evaluation failed: {type(exc).__name__}: {exc}"
            if problem:
                tally.failures.append(f"{file.name}: {problem}")
            # the evaluation writes no observations: the next file starts from these rows
            before, newest = after, newest_after
    db.dispose()
    log.info("%s in %.0f s", tally.summary("push endpoint"), time.monotonic() - started)
    assert tally.failures == []
    assert tally.tried == COUNT and tally.evaluations == COUNT and tally.rows_changed == 0
    assert tally.landed > 50 and tally.rejected_whole > 100  # both outcomes were exercised
