"""docker-compose.yml: services and environment match the settings (no Docker engine runs here)."""

from __future__ import annotations

from pathlib import Path

import yaml

from server.config import Settings

ROOT = Path(__file__).resolve().parents[1]


def compose() -> dict:
    return yaml.safe_load((ROOT / "docker-compose.yml").read_text())


def test_compose_has_app_and_postgres() -> None:
    services = compose()["services"]
    assert set(services) == {"app", "db"}
    assert services["db"]["image"].startswith("postgres:")
    assert services["app"]["depends_on"]["db"]["condition"] == "service_healthy"


def test_compose_app_environment_names_real_settings() -> None:
    env = compose()["services"]["app"]["environment"]
    fields = {f"TIERWISE_{name.upper()}" for name in Settings.model_fields}
    assert set(env) <= fields
    assert {"TIERWISE_DATABASE_URL", "TIERWISE_SECRET_KEY"} <= set(env)


def test_compose_database_url_points_at_db_service() -> None:
    services = compose()["services"]
    url = services["app"]["environment"]["TIERWISE_DATABASE_URL"]
    db_env = services["db"]["environment"]
    expected = (
        f"postgresql+psycopg://{db_env['POSTGRES_USER']}:{db_env['POSTGRES_PASSWORD']}"
        f"@db:5432/{db_env['POSTGRES_DB']}"
    )
    assert url == expected
    Settings(database_url=url, secret_key="x" * 32)  # the URL passes the settings' validation


def test_compose_secret_key_is_required_not_defaulted() -> None:
    secret = compose()["services"]["app"]["environment"]["TIERWISE_SECRET_KEY"]
    assert secret.startswith("${TIERWISE_SECRET_KEY:?")


def test_dockerfile_installs_every_package() -> None:
    text = (ROOT / "Dockerfile").read_text()
    for package in ("server", "web", "rules", "demo_seed"):
        assert f"COPY {package} ./{package}" in text
