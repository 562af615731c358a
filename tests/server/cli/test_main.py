"""The ``tierwise`` command: help texts, migrations, region import, users, clear failures."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from sqlalchemy import create_engine, func, select
from typer.testing import CliRunner

from server.cli import app
from server.store.models import Region, User
from server.store.schema import head_revision

SQUARE = [[[10.0, 50.0], [10.1, 50.0], [10.1, 50.1], [10.0, 50.1], [10.0, 50.0]]]


@pytest.fixture
def env(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> str:
    url = f"sqlite:///{tmp_path / 'cli.db'}"
    monkeypatch.setenv("TIERWISE_DATABASE_URL", url)
    monkeypatch.delenv("TIERWISE_SECRET_KEY", raising=False)
    return url


def run(*args: str, input: str | None = None):  # type: ignore[no-untyped-def]
    return CliRunner().invoke(app, list(args), input=input)


def count(url: str, model: type) -> int:
    engine = create_engine(url)
    with engine.connect() as conn:
        n = conn.execute(select(func.count()).select_from(model)).scalar_one()
    engine.dispose()
    return n


def geojson(path: Path, *features: dict) -> Path:
    path.write_text(json.dumps({"type": "FeatureCollection", "features": list(features)}))
    return path


def feature(code: str, population: object, parent: str | None = None, level: str = "district"):  # type: ignore[no-untyped-def]
    return {
        "type": "Feature",
        "properties": {
            "code": code,
            "name": code.title(),
            "population": population,
            "parent": parent,
            "level": level,
        },
        "geometry": {"type": "Polygon", "coordinates": SQUARE},
    }


@pytest.mark.parametrize(
    "args",
    [
        pytest.param(["--help"], id="root"),
        pytest.param(["demo", "--help"], id="demo"),
        pytest.param(["serve", "--help"], id="serve"),
        pytest.param(["db", "upgrade", "--help"], id="db-upgrade"),
        pytest.param(["regions", "import", "--help"], id="regions-import"),
        pytest.param(["users", "add", "--help"], id="users-add"),
    ],
)
def test_cli_help_is_available(args: list[str]) -> None:
    result = run(*args)
    assert result.exit_code == 0, result.output
    assert "Usage" in result.output


def test_cli_db_upgrade_reports_revision(env: str) -> None:
    result = run("db", "upgrade")
    assert result.exit_code == 0, result.output
    engine = create_engine(env)
    head = head_revision(engine)  # the newest migration script
    engine.dispose()
    assert head is not None and f"is at revision {head}" in result.output


def test_cli_regions_import_adds_regions(env: str, tmp_path: Path) -> None:
    run("db", "upgrade")
    path = geojson(
        tmp_path / "map.geojson", feature("C", 300, level="county"), feature("A", 100, "C")
    )
    result = run("regions", "import", str(path))
    assert result.exit_code == 0, result.output
    assert "2 regions added" in result.output
    assert count(env, Region) == 2


def test_cli_regions_import_broken_file_changes_nothing(env: str, tmp_path: Path) -> None:
    run("db", "upgrade")
    run(
        "regions",
        "import",
        str(geojson(tmp_path / "ok.geojson", feature("C", 300, level="county"))),
    )
    broken = geojson(tmp_path / "bad.geojson", feature("A", 100, "C"), feature("B", None, "C"))
    result = run("regions", "import", str(broken))
    assert result.exit_code == 1
    assert "bad.geojson: features[1] (B).properties.population" in result.output
    assert "Traceback" not in result.output
    assert count(env, Region) == 1


def test_cli_regions_import_unknown_parent_changes_nothing(env: str, tmp_path: Path) -> None:
    run("db", "upgrade")
    result = run("regions", "import", str(geojson(tmp_path / "m.geojson", feature("A", 5, "ZZ"))))
    assert result.exit_code == 1
    assert "unknown parent region 'ZZ'" in result.output
    assert count(env, Region) == 0


def test_cli_users_add_stores_hash_not_password(env: str) -> None:
    run("db", "upgrade")
    result = run("users", "add", "wren", "--role", "analyst", input="s3cret-pass\ns3cret-pass\n")
    assert result.exit_code == 0, result.output
    engine = create_engine(env)
    with engine.connect() as conn:
        stored = conn.execute(select(User.password_hash)).scalar_one()
    engine.dispose()
    assert stored.startswith("scrypt$") and "s3cret-pass" not in stored


def test_cli_users_add_unknown_role_is_refused(env: str) -> None:
    result = run("users", "add", "wren", "--role", "emperor", "--password", "x")
    assert result.exit_code == 1
    assert "unknown role 'emperor'" in result.output


def test_cli_database_not_answering_is_one_line(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv(
        "TIERWISE_DATABASE_URL", "postgresql+psycopg://nobody@127.0.0.1:1/none?connect_timeout=2"
    )
    result = run("db", "upgrade")
    assert result.exit_code == 1
    lines = [line for line in result.output.splitlines() if line.strip()]
    assert len(lines) == 1 and lines[0].startswith("error: cannot reach the database")


def test_cli_serve_refuses_default_secret(env: str) -> None:
    result = run("serve")
    assert result.exit_code == 1
    assert "TIERWISE_SECRET_KEY" in result.output


def test_cli_serve_unmigrated_database_says_upgrade(
    env: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("TIERWISE_SECRET_KEY", "k" * 32)
    result = run("serve")
    assert result.exit_code == 1
    assert "run `tierwise db upgrade`" in result.output


def test_cli_decisions_import_names_the_bad_line_and_stores_nothing(
    env: str, tmp_path: Path
) -> None:
    from server.store.models import Decision

    assert run("db", "upgrade").exit_code == 0
    path = tmp_path / "history.csv"
    path.write_text("region,effective_date,tier,reason\nD01,2026-08-01,1,agreed\n")
    result = run("decisions", "import", str(path))
    assert result.exit_code == 1
    assert result.output.strip().endswith("history.csv: line 2, region: 'D01' is not a district")
    assert count(env, Decision) == 0
