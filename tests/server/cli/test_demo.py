"""``tierwise demo``: the printed morning is read from the seeded database; it serves in the
invented office's time zone."""

from __future__ import annotations

import importlib
import shutil
from collections.abc import Callable
from datetime import datetime
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo

import pytest
from fastapi.testclient import TestClient
from typer.testing import CliRunner

import demo_seed.seed as seed_module
from demo_seed.feeds import DEMO_TIME_ZONE
from server.cli import app
from server.config import Settings
from web.app import create_app

cli_main = importlib.import_module("server.cli.main")  # the module; server.cli.main is a function

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def seeded_files() -> dict[str, tuple[Path, seed_module.SeedSummary]]:
    """The demo databases this module's commands seeded, by the seeding's arguments."""
    return {}


@pytest.fixture(autouse=True)
def seed_once(seeded_files: dict[str, tuple[Path, seed_module.SeedSummary]],
              tmp_path_factory: pytest.TempPathFactory, monkeypatch: pytest.MonkeyPatch) -> None:
    """``tierwise demo`` seeds the same demo (seed 7, 150 days to yesterday, history) for each
    test here; the first seeding is real, the others copy its file into the command's database
    and hand back its summary (what seeding would have written, up to the random push tokens
    and password salts), so the module seeds once instead of three times."""
    real: Callable[..., seed_module.SeedSummary] = seed_module.seed_demo

    def seed_demo(db: Any, **kwargs: Any) -> seed_module.SeedSummary:
        key = repr(sorted((k, v) for k, v in kwargs.items() if k != "progress"))
        path = Path(db.engine.url.database)
        if key not in seeded_files:
            summary = real(db, **kwargs)
            db.dispose()  # the last connection closed: the file holds everything
            saved = tmp_path_factory.mktemp("demo-seeded") / "demo.db"
            shutil.copyfile(path, saved)
            seeded_files[key] = (saved, summary)
            return summary
        saved, summary = seeded_files[key]
        db.dispose()
        for stale in (path, path.with_name(path.name + "-wal"), path.with_name(path.name + "-shm")):
            stale.unlink(missing_ok=True)
        shutil.copyfile(saved, path)
        return summary

    monkeypatch.setattr(seed_module, "seed_demo", seed_demo)


def test_demo_prints_the_morning_it_seeded(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("TIERWISE_DATABASE_URL", f"sqlite:///{tmp_path / 'demo.db'}")
    monkeypatch.delenv("TIERWISE_FEEDS_FILE", raising=False)
    result = CliRunner().invoke(app, ["demo", "--no-serve", "--days", "150"])
    assert result.exit_code == 0, result.output
    out = result.output
    # the invented story of the newest morning (demo_seed.storyline.SCRIPT, demo_seed.feeds)
    assert "await review (sign in as the approver):" in out
    assert "step up" in out and "step down" in out
    assert "Prepare signals showing:" in out
    assert "Feeds on time: long-csv, lab-drop, wastewater-http; needing attention: gp-sentinel" \
        in out
    assert "the newest changes await review" not in out  # no fixed claim any more
    # the demo runs three policies; the others are summed up after the lead's story
    assert "Evaluated policy county-influenza as well:" in out
    assert "Policy county-rsv: official " in out


@pytest.mark.parametrize(("env", "expected"), [(None, DEMO_TIME_ZONE), ("Pacific/Auckland",
                                                                         "Pacific/Auckland")])
def test_demo_serves_in_the_office_time_zone(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, env: str | None, expected: str
) -> None:
    monkeypatch.setenv("TIERWISE_DATABASE_URL", f"sqlite:///{tmp_path / 'demo.db'}")
    monkeypatch.delenv("TIERWISE_FEEDS_FILE", raising=False)
    if env is None:
        monkeypatch.delenv("TIERWISE_TIME_ZONE", raising=False)
    else:
        monkeypatch.setenv("TIERWISE_TIME_ZONE", env)
    served: list[Settings] = []
    monkeypatch.setattr(cli_main, "_run_server",
                        lambda settings, **_kw: served.append(settings))
    result = CliRunner().invoke(app, ["demo", "--days", "150", "--port", "8999"])
    assert result.exit_code == 0, result.output
    assert [s.time_zone for s in served] == [expected]
    assert f"Office time zone: {expected}" in result.output
    # what the public page then shows: its publication time in that zone, with the zone's name
    with TestClient(create_app(served[0])) as client:
        page = client.get("/").text
    day, clock, name = page.split("Last published: ")[1].split(".")[0].split(" ")
    shown = datetime.fromisoformat(f"{day}T{clock}").replace(tzinfo=ZoneInfo(expected))
    assert name == shown.tzname() != "UTC"
