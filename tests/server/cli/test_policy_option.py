"""``--policy`` of the CLI commands that evaluate or record decisions, with several active
policies (the invented demo county's three, ``several_policies_file``)."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest
from typer.testing import CliRunner

from server.cli import app

pytestmark = pytest.mark.slow
CUTOFF = "2026-10-01T12:00:00+00:00"


@pytest.fixture
def database(several_policies_file: Path, tmp_path: Path,
             monkeypatch: pytest.MonkeyPatch) -> Path:
    path = tmp_path / "demo.db"
    shutil.copyfile(several_policies_file, path)
    monkeypatch.setenv("TIERWISE_DATABASE_URL", f"sqlite:///{path}")
    return path


def run(*args: str):  # type: ignore[no-untyped-def]
    return CliRunner().invoke(app, list(args))


def _runs(output: str) -> list[str]:
    """The policy named by each line that reports a run ("NAME: stored|reused ...")."""
    return [line.split(":")[0] for line in output.splitlines() if "assessments" in line]


def test_evaluate_runs_every_active_policy_or_the_one_named(database: Path) -> None:
    one = run("evaluate", "--cutoff", CUTOFF, "--policy", "county-rsv")
    assert one.exit_code == 0, one.output
    assert _runs(one.output) == ["county-rsv"]
    every = run("evaluate", "--cutoff", CUTOFF)
    assert every.exit_code == 0, every.output
    lines = [line for line in every.output.splitlines() if "assessments" in line]
    assert _runs(every.output) == ["county-demo", "county-influenza", "county-rsv"]
    assert "reused assessments" in lines[2] and "stored assessments" in lines[0]


def test_an_unknown_policy_is_one_line_naming_the_active_ones(
    database: Path, tmp_path: Path
) -> None:
    result = run("evaluate", "--policy", "no-such-policy")
    assert result.exit_code == 1
    assert "'no-such-policy' is not an active policy" in result.output
    assert "county-demo, county-influenza, county-rsv" in result.output
    assert "Traceback" not in result.output
    past = tmp_path / "past.csv"
    past.write_text("region,effective_date,tier,reason\nD01,2026-03-12,1,invented\n")
    imported = run("decisions", "import", str(past), "--policy", "no-such-policy", "--dry-run")
    assert imported.exit_code == 1 and "is not an active policy" in imported.output
    checked = run("decisions", "import", str(past), "--policy", "county-rsv", "--dry-run")
    assert checked.exit_code == 0 and "would store 1 decisions" in checked.output
