"""``tierwise rules check``, ``tierwise backtest`` and ``tierwise evaluate``."""

from __future__ import annotations

import shutil
from datetime import date
from pathlib import Path

import pytest
from typer.testing import CliRunner

from demo_seed.seed import seed_demo
from server.cli import app
from server.config import Settings
from server.services.database import Database

POLICIES = Path(__file__).resolve().parents[3] / "rules" / "policies"


def run(*args: str):  # type: ignore[no-untyped-def]
    return CliRunner().invoke(app, list(args))


def seeded_copy(factory: pytest.TempPathFactory, name: str) -> Path:
    """A copy of a 150-day demo database, seeded once per test session."""
    source = factory.getbasetemp() / "rules-demo" / "demo.db"
    if not source.exists():
        source.parent.mkdir(parents=True, exist_ok=True)
        db = Database.from_settings(Settings(database_url=f"sqlite:///{source}", demo_mode=True))
        try:
            seed_demo(db, days=150, end=date(2026, 11, 30))
        finally:
            db.dispose()
    target = factory.mktemp(name) / "demo.db"
    shutil.copyfile(source, target)
    return target


def test_rules_check_prints_the_thresholds_table() -> None:
    result = run("rules", "check", str(POLICIES / "cdc-2021-transmission.yaml"))
    assert result.exit_code == 0
    assert "Ruleset cdc-2021-transmission" in result.output and "tier 3" in result.output


def test_rules_check_reports_file_line_column_and_key(tmp_path: Path) -> None:
    text = (POLICIES / "county.yaml").read_text().replace(
        "exit: [35, 110, 230]", "exit: [35, 160, 230]"
    )
    bad = tmp_path / "bad.yaml"
    bad.write_text(text + "bogus: 1\n")
    result = run("rules", "check", str(bad))
    assert result.exit_code == 1
    lines = result.output.splitlines()
    assert any(line.endswith("criteria[0].enter[1]: 150 is below the exit threshold 160")
               and line.startswith(f"{bad}:") for line in lines)
    assert any(": bogus: unknown key 'bogus'" in line for line in lines)


def test_rules_check_missing_file() -> None:
    result = run("rules", "check", "no-such-policy.yaml")
    assert result.exit_code == 1 and "no-such-policy.yaml: no such file" in result.output


@pytest.mark.slow
def test_backtest_compares_two_rulesets_and_writes_csv(
    tmp_path_factory: pytest.TempPathFactory, monkeypatch: pytest.MonkeyPatch, tmp_path: Path
) -> None:
    path = seeded_copy(tmp_path_factory, "cli-backtest")
    monkeypatch.setenv("TIERWISE_DATABASE_URL", f"sqlite:///{path}")
    draft = tmp_path / "draft.yaml"
    draft.write_text((POLICIES / "county.yaml").read_text().replace(
        'version: "2031.2"', 'version: "draft"').replace("release_days: 28", "release_days: 14"))
    result = run("backtest", "--rules", str(POLICIES / "county.yaml"), "--compare", str(draft),
                 "--from", "2026-09-01", "--output", str(tmp_path))
    assert result.exit_code == 0, result.output
    assert "county-demo 2031.2" in result.output and "county-demo draft" in result.output
    assert "escalations preceded by a prepare signal" in result.output
    assert (tmp_path / "county-demo-latest.csv").exists() and (tmp_path / "summary.csv").exists()
    assert (tmp_path / "county-demo-compare-latest.csv").exists()


@pytest.mark.slow
def test_backtest_names_an_indicator_tierwise_does_not_compute(
    tmp_path_factory: pytest.TempPathFactory, monkeypatch: pytest.MonkeyPatch
) -> None:
    path = seeded_copy(tmp_path_factory, "cli-backtest-unknown")
    monkeypatch.setenv("TIERWISE_DATABASE_URL", f"sqlite:///{path}")
    result = run("backtest", "--rules", str(POLICIES / "cdc-2021-transmission.yaml"))
    assert result.exit_code == 1 and "indicator(s) cases_7d" in result.output


@pytest.mark.slow
def test_evaluate_with_a_cutoff_then_reuses(
    tmp_path_factory: pytest.TempPathFactory, monkeypatch: pytest.MonkeyPatch
) -> None:
    path = seeded_copy(tmp_path_factory, "cli-evaluate")
    monkeypatch.setenv("TIERWISE_DATABASE_URL", f"sqlite:///{path}")
    first = run("evaluate", "--cutoff", "2026-10-01T12:00:00+00:00")
    second = run("evaluate", "--cutoff", "2026-10-01T12:00:00+00:00")
    assert first.exit_code == 0 and "stored assessments" in first.output
    assert "reused assessments" in second.output


def test_evaluate_refuses_a_naive_cutoff() -> None:
    result = run("evaluate", "--cutoff", "2026-10-01T12:00:00")
    assert result.exit_code == 1 and "needs a time zone" in result.output
