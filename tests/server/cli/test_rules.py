"""``tierwise rules check``, ``tierwise backtest`` and ``tierwise evaluate``."""

from __future__ import annotations

from pathlib import Path
from zoneinfo import ZoneInfo

import pytest
from typer.testing import CliRunner

from server.cli import app

POLICIES = Path(__file__).resolve().parents[3] / "rules" / "policies"


def run(*args: str):  # type: ignore[no-untyped-def]
    return CliRunner().invoke(app, list(args))


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
    demo_path: Path, monkeypatch: pytest.MonkeyPatch, tmp_path: Path
) -> None:
    monkeypatch.setenv("TIERWISE_DATABASE_URL", f"sqlite:///{demo_path}")
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
    demo_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("TIERWISE_DATABASE_URL", f"sqlite:///{demo_path}")
    result = run("backtest", "--rules", str(POLICIES / "cdc-2021-transmission.yaml"))
    assert result.exit_code == 1 and "indicator(s) cases_7d" in result.output


@pytest.mark.slow
def test_evaluate_with_a_cutoff_then_reuses(
    demo_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("TIERWISE_DATABASE_URL", f"sqlite:///{demo_path}")
    first = run("evaluate", "--cutoff", "2026-10-01T12:00:00+00:00")
    second = run("evaluate", "--cutoff", "2026-10-01T12:00:00+00:00")
    assert first.exit_code == 0 and "stored assessments" in first.output
    assert "reused assessments" in second.output


def test_evaluate_refuses_a_naive_cutoff() -> None:
    result = run("evaluate", "--cutoff", "2026-10-01T12:00:00")
    assert result.exit_code == 1 and "needs a time zone" in result.output


@pytest.mark.slow
def test_backtest_as_known_uses_the_office_time_zone(
    demo_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    import server.services.backtest as backtest

    zones = []
    real = backtest.run_backtest

    def spy(**kwargs):  # type: ignore[no-untyped-def]
        zones.append(kwargs["time_zone"])
        return real(**kwargs)

    monkeypatch.setattr(backtest, "run_backtest", spy)
    monkeypatch.setenv("TIERWISE_DATABASE_URL", f"sqlite:///{demo_path}")
    monkeypatch.setenv("TIERWISE_TIME_ZONE", "Etc/GMT+8")
    result = run("backtest", "--rules", str(POLICIES / "county.yaml"), "--as-known")
    assert result.exit_code == 0, result.output
    assert zones == [ZoneInfo("Etc/GMT+8")] and "data as known each day" in result.output


@pytest.mark.slow
def test_backtest_as_known_prints_and_writes_the_forecast_record(
    demo_path: Path, monkeypatch: pytest.MonkeyPatch, tmp_path: Path
) -> None:
    import csv

    monkeypatch.setenv("TIERWISE_DATABASE_URL", f"sqlite:///{demo_path}")
    result = run("backtest", "--rules", str(POLICIES / "county.yaml"), "--as-known",
                 "--no-nowcast-accuracy", "--output", str(tmp_path))
    assert result.exit_code == 0, result.output
    assert "Forecast record" in result.output and "hosp_admissions, persistence, 14 d:" in (
        result.output)
    with (tmp_path / "forecast_record.csv").open() as fh:
        rows = list(csv.DictReader(fh))
    pooled = [r for r in rows if r["region"] == "" and r["target"] == "hosp_admissions"]
    assert [int(r["horizon"]) for r in pooled] == list(range(1, 22))
    by_region = [r for r in rows if r["region"] and r["target"] == "hosp_admissions"
                 and r["horizon"] == "14"]
    # the pooled row adds up the districts' rows
    assert sum(int(r["inside_90"]) for r in by_region) == int(pooled[13]["inside_90"])
    latest = run("backtest", "--rules", str(POLICIES / "county.yaml"), "--no-nowcast-accuracy")
    assert latest.exit_code == 0 and "Forecast record" not in latest.output
