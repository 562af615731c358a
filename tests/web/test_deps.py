"""Bounded integer parameters (``web/deps.py``): every route's integers, walked from the OpenAPI
schema with values no column can hold, answer 4xx, never 5xx."""

from __future__ import annotations

import re
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from fastapi.testclient import TestClient

from demo_seed.feeds import DEMO_FEEDS_FILE
from tests.web.conftest import ROLE_USER, copy_demo, csrf_of, login, settings_for
from web.app import create_app
from web.deps import INT32_MAX, INT64_MAX
from web.policies import _row_id

HOSTILE = [10**23, INT64_MAX + 1, INT64_MAX, INT32_MAX + 1, INT32_MAX, -1, 0, -(10**23)]
SKIP = {"/staff/logout", "/staff/login"}  # would end the session the walk runs in


@pytest.fixture(scope="module")
def admin(demo_file: Path, tmp_path_factory: pytest.TempPathFactory) -> Iterator[TestClient]:
    path = copy_demo(demo_file, tmp_path_factory.mktemp("ints") / "demo.db")
    with TestClient(create_app(settings_for(path, feeds_file=DEMO_FEEDS_FILE))) as client:
        assert login(client, ROLE_USER["admin"]) == 303
        yield client


def integer_operations(schema: dict[str, Any]) -> Iterator[tuple[str, str, dict[str, Any]]]:
    """(method, path, operation) of every operation with an integer query or path parameter."""
    for path, ops in schema["paths"].items():
        for method, op in ops.items():
            if any("integer" in str(p["schema"]) for p in op.get("parameters", [])):
                yield method, path, op


def form_fields(schema: dict[str, Any], op: dict[str, Any], csrf: str) -> dict[str, str]:
    body = op.get("requestBody", {}).get("content", {})
    ref = next(iter(body.values()), {}).get("schema", {}).get("$ref")
    if ref is None:
        return {"csrf": csrf}
    props = schema["components"]["schemas"][ref.rsplit("/", 1)[1]]["properties"]
    # every text field gets a number no column can hold (the backtest's "compare" is one); the
    # CSRF field is read by a dependency, outside the schema
    return {name: str(10**23) for name in props} | {"csrf": csrf}


def test_every_integer_parameter_out_of_range_is_a_client_error(admin: TestClient) -> None:
    schema = admin.app.openapi()  # type: ignore[attr-defined]
    csrf = csrf_of(admin.get("/staff/policies").text)
    operations = [o for o in integer_operations(schema) if o[1] not in SKIP]
    assert {path for _m, path, _o in operations} >= {
        "/staff/policies", "/staff/policies/diff", "/staff/policies/{ruleset_id}/activate",
        "/staff/policies/{ruleset_id}/backtest", "/staff/review/{assessment_id}", "/staff/"}
    tried = 0
    for method, path, op in operations:
        params = op["parameters"]
        for target in (p for p in params if "integer" in str(p["schema"])):
            for value in HOSTILE:
                url = path
                query: dict[str, str] = {}
                for p in params:
                    given = str(value) if p is target else (
                        "1" if "integer" in str(p["schema"]) else "D01")
                    if p["in"] == "path":
                        url = url.replace("{" + p["name"] + "}", given)
                    elif p is target or p.get("required"):
                        query[p["name"]] = given
                form = form_fields(schema, op, csrf) if method == "post" else None
                answer = admin.request(method.upper(), url, params=query, data=form,
                                       headers={"X-CSRF-Token": csrf},  # JSON API posts
                                       follow_redirects=False)
                tried += 1
                assert answer.status_code < 500, (method, url, query, answer.status_code)
                if value > INT64_MAX or value < 1:
                    assert answer.status_code in (404, 422), (method, url, query)
    assert tried >= 7 * len(HOSTILE)


@pytest.mark.parametrize("url", [
    "/staff/policies?id=99999999999999999999999",
    "/staff/policies/diff?old=99999999999999999999999&new=1",
    "/staff/policies/diff?old=1&new=-5",
])
def test_policy_ids_out_of_range_are_422_with_the_parameter_named(
    admin: TestClient, url: str
) -> None:
    answer = admin.get(url)
    assert answer.status_code == 422
    assert re.search(r"(id|old|new)", answer.text)


def test_policy_id_in_range_but_unknown_is_404(admin: TestClient) -> None:
    assert admin.get(f"/staff/policies?id={INT32_MAX}").status_code == 404


@pytest.mark.parametrize(
    ("text", "expected"),
    [pytest.param("", None, id="empty"), pytest.param(" 7 ", 7, id="spaces"),
     pytest.param(str(10**23), None, id="huge"), pytest.param(str(INT32_MAX + 1), None, id="int32"),
     pytest.param("0", None, id="zero"), pytest.param("\u00b2", None, id="superscript-digit")],
)
def test_backtest_compare_field_is_a_ruleset_id_or_none(text: str, expected: int | None) -> None:
    assert _row_id(text) == expected
