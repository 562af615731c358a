"""The first pages: public list at /, staff home at /staff/, /healthz, OpenAPI at /docs."""

from __future__ import annotations

from datetime import UTC, datetime
from pathlib import Path

import pandas as pd
import pytest
from fastapi.testclient import TestClient

from server.config import Settings
from server.services.database import Database
from server.services.observations import MeasureRecord, VintageWriter, define_measures
from server.services.regions import RegionRecord, store_regions
from web.app import create_app


@pytest.fixture(scope="module")
def client(tmp_path_factory: pytest.TempPathFactory) -> TestClient:
    path: Path = tmp_path_factory.mktemp("web") / "web.db"
    settings = Settings(database_url=f"sqlite:///{path}", secret_key="s" * 32)
    db = Database.from_settings(settings)
    db.upgrade()
    with db.transaction() as session:
        store_regions(
            session=session,
            actor="test",
            source="test",
            records=[
                RegionRecord(
                    code="K0", name="Kestrel County", level="county", parent=None, population=50000
                ),
                RegionRecord(
                    code="K1", name="Fernhollow", level="district", parent="K0", population=30000
                ),
                RegionRecord(
                    code="K2",
                    name="Saltmarsh <Upper>",
                    level="district",
                    parent="K0",
                    population=20000,
                ),
            ],
        )
        define_measures(
            session=session,
            measures=[
                MeasureRecord(name="cases", unit="persons", kind="count", aggregation="sum"),
            ],
        )
    with db.transaction() as session:
        VintageWriter(session=session, feed="t").append(
            pd.DataFrame(
                {"region": ["K1"], "measure": ["cases"], "ref_date": ["2026-02-03"], "value": [5.0]}
            ),
            received_at=datetime(2026, 2, 4, 5, tzinfo=UTC),
        )
    with TestClient(create_app(settings, database=db)) as c:
        yield c
    db.dispose()


def test_public_index_lists_districts_with_cautions(client: TestClient) -> None:
    page = client.get("/")
    assert page.status_code == 200
    assert "Fernhollow" in page.text
    assert "responsible health authority" in page.text
    assert "provisional" in page.text


def test_public_index_escapes_names(client: TestClient) -> None:
    page = client.get("/")
    assert "Saltmarsh &lt;Upper&gt;" in page.text
    assert "<Upper>" not in page.text


def test_public_index_omits_non_district_levels(client: TestClient) -> None:
    assert "Kestrel County</th>" not in client.get("/").text


def test_staff_home_needs_login(client: TestClient) -> None:
    page = client.get("/staff/", follow_redirects=False)
    assert page.status_code == 303
    assert page.headers["location"].startswith("/staff/login")


def test_healthz_answers_ok(client: TestClient) -> None:
    assert client.get("/healthz").json() == {"status": "ok"}


def test_openapi_docs_served(client: TestClient) -> None:
    assert client.get("/docs").status_code == 200
    assert "/healthz" in client.get("/openapi.json").json()["paths"]


def test_static_stylesheet_served_locally(client: TestClient) -> None:
    response = client.get("/static/tierwise.css")
    assert response.status_code == 200
    assert "text/css" in response.headers["content-type"]


def test_public_districts_json_has_no_staff_fields(client: TestClient) -> None:
    body = client.get("/api/public/districts").json()
    assert {tuple(sorted(d)) for d in body} == {
        ("area", "code", "name", "since", "tier", "tier_name")
    }


def test_api_docs_load_only_local_assets(client: TestClient) -> None:
    page = client.get("/docs")
    assert page.status_code == 200
    assert "/static/swagger/swagger-ui-bundle.js" in page.text
    assert "cdn" not in page.text.lower()
    assert "https://" not in page.text
    assert client.get("/static/swagger/swagger-ui-bundle.js").status_code == 200


def test_api_docs_policy_forbids_inline_script(client: TestClient) -> None:
    page = client.get("/docs")
    policy = page.headers["content-security-policy"]
    script = next(d for d in policy.split("; ") if d.startswith("script-src"))
    assert script == "script-src 'self'"
    assert "http" not in policy
    assert "<script>" not in page.text  # Swagger UI starts from /static/apidocs.js


def test_database_ping_raises_when_the_database_is_unreachable(tmp_path: Path) -> None:
    from sqlalchemy.exc import OperationalError

    # A folder is not a database file: SQLite cannot open it.
    db = Database.from_settings(Settings(database_url=f"sqlite:///{tmp_path}", secret_key="s" * 32))
    try:
        with pytest.raises(OperationalError, match="unable to open database file"):
            db.ping()
    finally:
        db.dispose()
