"""A decision form posted with a problem keeps what was typed (issue 16, item 2): a blank
reason, an override without a tier or with a tier the confirm button contradicts answer 422
with the review queue, the problem beside that district's form, the typed reason in its text
area and the chosen tier still selected; nothing is stored."""

from __future__ import annotations

import html
import re
import sqlite3
from collections.abc import Iterator
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from tests.web.conftest import copy_demo, csrf_of, login, seen_fields, settings_for
from web.app import create_app

pytestmark = pytest.mark.slow
APPROVER = "otto.approver"  # invented demo account (demo_seed.seed)


@pytest.fixture()
def review_client(demo_file: Path, tmp_path: Path) -> Iterator[tuple[TestClient, Path]]:
    path = copy_demo(demo_file, tmp_path / "demo.db")
    with TestClient(create_app(settings_for(path))) as client:
        login(client, APPROVER)
        yield client, path


def _post(client: TestClient, **fields: str):  # type: ignore[no-untyped-def]
    page = client.get("/staff/review").text
    found = re.search(r'<h3 id="p-(\d+)">', page)
    assert found is not None
    aid = found.group(1)
    data = {"csrf": csrf_of(page), **seen_fields(page, aid), **fields}
    return aid, client.post(f"/staff/review/{aid}", data=data, follow_redirects=False)


def _decisions(path: Path) -> int:
    with sqlite3.connect(path) as db:
        return int(db.execute("select count(*) from decision").fetchone()[0])


def _card(page: str, aid: str) -> str:
    start = page.index(f'id="a{aid}"')
    return page[start:page.index("</article>", start)]


def test_override_without_a_tier_keeps_the_reason(review_client) -> None:  # type: ignore[no-untyped-def]
    client, path = review_client
    aid, answer = _post(client, action="override", tier="",
                        reason="Care-home cluster <contained> since Monday")
    assert answer.status_code == 422
    card = _card(answer.text, aid)
    assert "an override needs a tier" in card
    assert 'role="alert"' in card
    assert (html.escape("Care-home cluster <contained> since Monday", quote=False)
            + "</textarea>") in card
    assert _decisions(path) == 0


def test_blank_reason_says_so_beside_the_form(review_client) -> None:  # type: ignore[no-untyped-def]
    client, path = review_client
    aid, answer = _post(client, action="override", tier="2", reason="   ")
    assert answer.status_code == 422
    card = _card(answer.text, aid)
    assert "a decision needs a reason" in card
    assert '<option value="2" selected>' in card  # the chosen tier is kept too
    assert _decisions(path) == 0


def test_confirm_with_another_tier_keeps_reason_and_tier(review_client) -> None:  # type: ignore[no-untyped-def]
    client, path = review_client
    page = client.get("/staff/review").text
    recommended = re.search(r"→ [^<(]+\((\d)\)</h3>", page)
    assert recommended is not None
    other = str((int(recommended.group(1)) + 1) % 4)
    aid, answer = _post(client, action="confirm", tier=other, reason="typed with care")
    assert answer.status_code == 422
    card = _card(answer.text, aid)
    assert "differs from the recommended" in card
    assert "typed with care</textarea>" in card
    assert f'<option value="{other}" selected>' in card
    assert _decisions(path) == 0


def test_a_valid_decision_after_a_refused_one_is_stored(review_client) -> None:  # type: ignore[no-untyped-def]
    client, path = review_client
    _post(client, action="override", tier="", reason="first try")
    _aid, answer = _post(client, action="override", tier="1", reason="second try")
    assert answer.status_code == 303
    assert _decisions(path) == 1
