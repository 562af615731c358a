"""The vendored plotly.js bundle: same plotly.js version as the Python package, served cached."""

from __future__ import annotations

import re
from pathlib import Path

import plotly
from fastapi.testclient import TestClient

from web.assets import PLOTLY_JS

FULL = Path(plotly.__file__).parent / "package_data" / "plotly.min.js"
VERSION = re.compile(r"plotly\.js(?: \([^)]*\))? v(\d+\.\d+\.\d+)")


def _version(path: Path) -> str:
    match = VERSION.search(path.read_text(encoding="utf-8")[:400])
    assert match, path
    return match.group(1)


def test_assets_basic_bundle_matches_the_python_package_version() -> None:
    assert _version(PLOTLY_JS) == _version(FULL)


def test_assets_basic_bundle_is_a_quarter_of_the_full_one() -> None:
    assert PLOTLY_JS.stat().st_size < FULL.stat().st_size / 3


def test_assets_bundle_served_with_cache_header(demo_app_client: TestClient) -> None:
    answer = demo_app_client.get("/static/vendor/plotly-basic.min.js")
    assert answer.status_code == 200
    assert "max-age" in answer.headers["cache-control"]
    assert answer.headers["content-type"].startswith("text/javascript")
