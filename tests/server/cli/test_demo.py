"""``tierwise demo --no-serve``: the printed morning is read from the seeded database."""

from __future__ import annotations

from pathlib import Path

import pytest
from typer.testing import CliRunner

from server.cli import app

pytestmark = pytest.mark.slow


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
