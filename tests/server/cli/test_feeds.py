"""``tierwise ingest`` and ``tierwise feeds status``; a killed ingest leaves no partial vintage."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest
from sqlalchemy import func, select
from typer.testing import CliRunner

from server.cli import app
from server.services.database import Database
from server.services.observations import MeasureRecord, define_measures
from server.services.regions import RegionRecord, store_regions
from server.store import make_engine, make_sessionmaker
from server.store.models import FeedState, Observation, RejectedRow, Vintage

ROOT = Path(__file__).resolve().parents[3]
FEEDS = "feeds:\n  - name: long-csv\n    source: {kind: push}\n    measures: [cases]\n"
runner = CliRunner()


@pytest.fixture
def env(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> str:
    url = f"sqlite:///{tmp_path / 'cli.db'}"
    (tmp_path / "feeds.yaml").write_text(FEEDS)
    monkeypatch.setenv("TIERWISE_DATABASE_URL", url)
    monkeypatch.setenv("TIERWISE_FEEDS_FILE", str(tmp_path / "feeds.yaml"))
    engine = make_engine(url)
    db = Database(engine=engine, sessions=make_sessionmaker(engine))
    db.upgrade()
    with db.transaction() as session:
        store_regions(session=session, actor="t", source="t", records=[
            RegionRecord(code=f"R{i:04d}", name=f"Area {i}", level="district", parent=None,
                         population=100) for i in range(300)])
        define_measures(session=session, measures=[
            MeasureRecord(name="cases", unit="n", kind="count", aggregation="sum")])
    db.dispose()
    return url


def counts(url: str) -> tuple[int, int, int]:
    engine = make_engine(url)
    with engine.connect() as c:
        out = tuple(int(c.scalar(select(func.count()).select_from(t)) or 0)
                    for t in (Vintage, Observation, RejectedRow))
    engine.dispose()
    return out  # type: ignore[return-value]


def test_ingest_prints_reasons_with_line_numbers(env: str, tmp_path: Path) -> None:
    path = tmp_path / "m.csv"
    path.write_text("region,date,measure,value\nR0001,2026-01-01,cases,3\n"
                    "R9999,2026-01-01,cases,1\nR0001,2026-01-02,cases,-1\n")
    result = runner.invoke(app, ["ingest", str(path), "--feed", "long-csv"])
    assert result.exit_code == 0, result.output
    assert "unknown_region" in result.output and "negative_count" in result.output
    assert counts(env) == (1, 1, 2)


def test_ingest_twice_changes_nothing(env: str, tmp_path: Path) -> None:
    path = tmp_path / "m.csv"
    path.write_text("region,date,measure,value\nR0001,2026-01-01,cases,3\n")
    runner.invoke(app, ["ingest", str(path), "--feed", "long-csv"])
    result = runner.invoke(app, ["ingest", str(path), "--feed", "long-csv"])
    assert "nothing changed" in result.output
    assert counts(env) == (1, 1, 0)


def test_ingest_all_rows_rejected_exits_1(env: str, tmp_path: Path) -> None:
    path = tmp_path / "m.csv"
    path.write_text("region,date,measure,value\nR9999,2026-01-01,cases,3\n")
    result = runner.invoke(app, ["ingest", str(path), "--feed", "long-csv"])
    assert result.exit_code == 1


def test_ingest_bad_header_one_line_and_exit_1(env: str, tmp_path: Path) -> None:
    path = tmp_path / "m.csv"
    path.write_text("region;date;measure\n")
    result = runner.invoke(app, ["ingest", str(path), "--feed", "long-csv"])
    assert result.exit_code == 1
    assert "header lacks column(s) ['value']" in result.output
    assert "Traceback" not in result.output


def test_ingest_dry_run_stores_nothing(env: str, tmp_path: Path) -> None:
    path = tmp_path / "m.csv"
    path.write_text("region,date,measure,value\nR0001,2026-01-01,cases,3\n")
    result = runner.invoke(app, ["ingest", str(path), "--feed", "long-csv", "--dry-run"])
    assert "dry run" in result.output
    assert counts(env) == (0, 0, 0)


def test_feeds_status_lists_feed(env: str) -> None:
    result = runner.invoke(app, ["feeds", "status"])
    assert result.exit_code == 0 and "long-csv" in result.output


@pytest.mark.slow
def test_ingest_killed_midway_leaves_no_partial_vintage(env: str, tmp_path: Path) -> None:
    # 1.8 million rows (300 regions x 6000 days from 2000-01-01, none repeated): large enough
    # that the ingest is still running when it is killed, even on an idle machine.
    path = tmp_path / "big.csv"
    days = np.arange(np.datetime64("2000-01-01"), np.datetime64("2000-01-01") + 6000).astype(str)
    with path.open("w") as out:
        out.write("region,date,measure,value\n")
        for d in days:
            out.write("".join(f"R{r:04d},{d},cases,{r}\n" for r in range(300)))
    environ = {**os.environ, "TIERWISE_DATABASE_URL": env,
               "TIERWISE_FEEDS_FILE": str(tmp_path / "feeds.yaml")}
    command = [sys.executable, "-c", "from server.cli import main; main()",
               "ingest", str(path), "--feed", "long-csv"]
    process = subprocess.Popen(command, cwd=ROOT, env=environ, stdout=subprocess.DEVNULL,
                               stderr=subprocess.DEVNULL)
    time.sleep(2.5)
    assert process.poll() is None, "the ingest finished before it could be killed"
    process.send_signal(signal.SIGKILL)
    process.wait()
    assert counts(env) == (0, 0, 0)
    rerun = subprocess.run(command, cwd=ROOT, env=environ, capture_output=True, text=True,
                           timeout=300)
    assert rerun.returncode == 0, rerun.stderr
    assert counts(env) == (1, 300 * 6000, 0)


def _feed_state(url: str) -> tuple[object, str, int]:
    engine = make_engine(url)
    with engine.connect() as c:
        row = c.execute(select(FeedState.last_success_at, FeedState.last_error,
                               FeedState.failures).where(FeedState.feed == "long-csv")).one()
    engine.dispose()
    return row[0], row[1], row[2]


def test_ingest_records_the_feed_state_like_every_way_in(env: str, tmp_path: Path) -> None:
    path = tmp_path / "one.csv"
    path.write_text("region,date,measure,value\nR0001,2026-03-01,cases,3\n")
    result = runner.invoke(app, ["ingest", str(path), "--feed", "long-csv"])
    assert result.exit_code == 0, result.output
    assert "1 row accepted, 0 rejected" in result.output
    success, error, failures = _feed_state(env)
    assert success is not None and (error, failures) == ("", 0)
    path.write_text("region,date,measure,value\n")
    result = runner.invoke(app, ["ingest", str(path), "--feed", "long-csv"])
    assert result.exit_code == 1 and "no data rows" in result.output
    _, error, failures = _feed_state(env)
    assert "no data rows" in error and failures == 1
