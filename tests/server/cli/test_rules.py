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


def test_rules_check_reports_indicator_kind_measure_and_parameter(tmp_path: Path) -> None:
    text = (POLICIES / "county.yaml").read_text().replace(
        "  gp_aberration:\n", "  adm_growth:\n    label: admissions growth\n    kind: growth_rate\n"
        "    measure: icu_staffed\n    params: {window: 10, day_of_week: maybe}\n"
        "  gp_aberration:\n")
    bad = tmp_path / "bad.yaml"
    bad.write_text(text)
    line = text.splitlines().index("    measure: icu_staffed") + 1
    result = run("rules", "check", str(bad))
    assert result.exit_code == 1
    # one problem per indicator: the first the registry finds (here the measure)
    assert f"{bad}:{line}:14: indicators.adm_growth.measure: 'icu_staffed' is a level measure; " \
           "this kind takes count measures" in result.output.replace("\n", "")


def test_rules_check_accepts_a_kind_on_another_measure(tmp_path: Path) -> None:
    text = (POLICIES / "county.yaml").read_text().replace(
        "  gp_aberration:\n", "  adm_growth:\n    label: admissions growth\n    kind: growth_rate\n"
        "    measure: hosp_admissions\n    params: {window: 21}\n  gp_aberration:\n")
    good = tmp_path / "good.yaml"
    good.write_text(text)
    result = run("rules", "check", str(good))
    assert result.exit_code == 0, result.output


def test_rules_kinds_lists_every_kind_with_its_parameters() -> None:
    result = run("rules", "kinds")
    assert result.exit_code == 0
    for kind in ("incidence", "positivity", "testing_rate", "growth_rate", "rt",
                 "occupancy_share", "wastewater_trend", "wastewater_level", "aberration"):
        assert f"\n{kind}: " in "\n" + result.output
    assert "  serial_interval_mean (float, > 1, <= 60; default 4.7)" in result.output


def test_rules_check_refuses_a_pathogen_the_feeds_do_not_list(tmp_path: Path) -> None:
    text = (POLICIES / "county.yaml").read_text().replace(
        "  gp_aberration:\n", "  flu_ww:\n    label: influenza wastewater\n"
        "    kind: wastewater_trend\n    measure: ww_concentration.measles\n"
        "  gp_aberration:\n")
    bad = tmp_path / "bad.yaml"
    bad.write_text(text)
    line = text.splitlines().index("    measure: ww_concentration.measles") + 1
    result = run("rules", "check", str(bad))
    assert result.exit_code == 1
    assert (f"{bad}:{line}:14: indicators.flu_ww.measure: unknown pathogen 'measles' in "
            "'ww_concentration.measles' (configured: sars-cov-2, influenza, rsv)"
            in result.output.replace("\n", ""))
    good = tmp_path / "good.yaml"
    good.write_text(text.replace(".measles", ".influenza"))
    assert run("rules", "check", str(good)).exit_code == 0


@pytest.mark.slow
def test_backtest_as_known_prints_and_writes_the_forecast_record(
    demo_path: Path, monkeypatch: pytest.MonkeyPatch, tmp_path: Path
) -> None:
    import csv

    monkeypatch.setenv("TIERWISE_DATABASE_URL", f"sqlite:///{demo_path}")
    result = run("backtest", "--rules", str(POLICIES / "county.yaml"), "--as-known",
                 "--no-nowcast-accuracy", "--output", str(tmp_path))
    assert result.exit_code == 0, result.output
    assert "Forecast record" in result.output and "hosp_admissions, trend, 14 d:" in (
        result.output)
    with (tmp_path / "forecast_record.csv").open() as fh:
        rows = list(csv.DictReader(fh))
    pooled = [r for r in rows if r["region"] == "" and r["target"] == "hosp_admissions"]
    assert [int(r["horizon"]) for r in pooled] == list(range(1, 22))
    by_region = [r for r in rows if r["region"] and r["target"] == "hosp_admissions"
                 and r["horizon"] == "14"]
    # the pooled row adds up the districts' rows
    assert sum(int(r["inside_90"]) for r in by_region) == int(pooled[13]["inside_90"])
    # the capacity prepare signal's leads: one printed line per row of capacity_leads.csv
    from datetime import date

    with (tmp_path / "capacity_leads.csv").open() as fh:
        leads = list(csv.DictReader(fh))
    printed = [ln for ln in result.output.splitlines() if ln.startswith("  icu-capacity, ")]
    assert len(printed) == len(leads)
    for row, line in zip(leads, printed, strict=True):
        assert row["signal"] == "icu-capacity" and row["share"] == "85"
        assert f"({row['area']}): reached 85 % on {row['crossed']}" in line
        if row["fired"]:
            lead = (date.fromisoformat(row["crossed"]) - date.fromisoformat(row["fired"])).days
            assert int(row["lead_days"]) == lead and f"{lead} days ahead" in line
    latest = run("backtest", "--rules", str(POLICIES / "county.yaml"), "--no-nowcast-accuracy")
    assert latest.exit_code == 0 and "Forecast record" not in latest.output
