"""The morning overview on the seeded demo: feeds judged as on the Feeds page, decided districts."""

from __future__ import annotations

from collections import Counter
from collections.abc import Callable
from datetime import UTC, datetime, timedelta
from pathlib import Path
from typing import Any

import pytest
from sqlalchemy import update
from sqlalchemy.orm import Session

from server.feeds.definition import FeedCatalogue, load_feeds, parse_feeds
from server.readmodels import district_lines, feed_freshness, overview, review_state
from server.readmodels.morning import morning_overview
from server.services.feeds import feed_statuses
from server.services.review import current_run, decide, publish
from server.store.models import Decision
from tests.server.conftest import seen

pytestmark = pytest.mark.slow
APPROVER = "otto.approver"  # invented demo account (demo_seed.seed)
NOW = datetime(2026, 12, 1, 8, 0, tzinfo=UTC)
DEMO_FEEDS = Path(__file__).resolve().parents[3] / "demo_seed" / "feeds.yaml"


def test_overview_lists_every_configured_feed_with_the_feeds_page_verdict(
    demo_session: Session,
) -> None:
    catalogue = load_feeds(DEMO_FEEDS)
    view = morning_overview(session=demo_session, now=NOW, catalogue=catalogue)
    expected = {s.name: s.health for s in feed_statuses(
        session=demo_session, catalogue=catalogue, now=NOW)}
    shown = {f.feed: f.status for f in view.feeds if f.configured}
    assert shown == expected
    assert set(shown) == {f.name for f in catalogue}


def test_overview_says_no_delivery_yet_for_a_configured_feed_that_never_delivered(
    demo_session: Session,
) -> None:
    # the seeded demo delivers through every demo feed; add one that never delivered
    text = DEMO_FEEDS.read_text(encoding="utf-8") + (
        "  - name: never-delivered\n    source: {kind: push}\n    measures: [cases]\n")
    catalogue = parse_feeds(text, source="feeds.yaml", base=DEMO_FEEDS.parent)
    view = morning_overview(session=demo_session, now=NOW, catalogue=catalogue)
    never = [f for f in view.feeds if f.configured and f.received_at is None]
    assert [f.feed for f in never] == ["never-delivered"]
    assert all(f.status in ("no delivery yet", "overdue") and f.age_hours is None
               for f in never)


def test_overview_lists_a_source_without_definition_unjudged(demo_session: Session) -> None:
    demo = load_feeds(DEMO_FEEDS)
    catalogue = FeedCatalogue(path=demo.path, feeds={
        name: feed for name, feed in demo.feeds.items() if name != "gp-sentinel"})
    view = morning_overview(session=demo_session, now=NOW, catalogue=catalogue)
    other = {f.feed: f for f in view.feeds if not f.configured}
    assert "gp-sentinel" in other  # delivered, but no longer in the feed file
    assert other["gp-sentinel"].status == "not configured"
    assert not other["gp-sentinel"].late


def test_overview_counts_a_decided_unpublished_district_apart(demo_session: Session) -> None:
    publish(session=demo_session, user=APPROVER)
    latest = current_run(session=demo_session)
    assert latest is not None
    item = next(i for i in latest.items if i.code == "D01")
    other = (item.assessment.recommended_tier + 1) % 3
    decide(session=demo_session, assessment_id=item.assessment.id, user=APPROVER, accept=False,
           tier=other, reason="invented reason", **seen(demo_session, item.assessment.id))
    view = morning_overview(session=demo_session, now=NOW)
    line = next(x for x in view.every if x.code == "D01")
    assert (line.decided_tier, line.pending, view.decided) == (other, False, 1)
    assert line.official_tier == item.assessment.recommended_tier  # published one still in force


def test_publications_since_the_previous_morning_are_listed_as_changes(
    demo_session: Session,
) -> None:
    # the demo's data cutoff is 2026-12-01 05:30 UTC; publications after 2026-11-30 05:30 count
    assert not [c for c in morning_overview(session=demo_session, now=NOW).changes
                if "official tier" in c.what]
    publish(session=demo_session, user=APPROVER)  # first publication: every district
    first = [c for c in morning_overview(session=demo_session, now=NOW).changes
             if "official tier" in c.what]
    assert len(first) == 14 and all("first published" in c.what for c in first)
    # move that first publication before the previous morning: no longer a change
    demo_session.execute(update(Decision).values(
        published_at=datetime(2026, 11, 29, 14, 0, tzinfo=UTC)))
    assert not [c for c in morning_overview(session=demo_session, now=NOW).changes
                if "official tier" in c.what]
    row = current_run(session=demo_session)
    assert row is not None
    item = next(i for i in row.items if i.code == "D03")
    old = item.assessment.recommended_tier
    other = (old + 1) % 4
    decide(session=demo_session, assessment_id=item.assessment.id, user=APPROVER, accept=False,
           tier=other, reason="invented override for the test",
           **seen(demo_session, item.assessment.id))
    publish(session=demo_session, user=APPROVER)
    changes = {c.code: c.what for c in morning_overview(session=demo_session, now=NOW).changes
               if "official tier" in c.what}
    assert set(changes) == {"D03"}
    assert changes["D03"].startswith("official tier published: ")
    # the first publication started D03 from its recommendation; the override moved it
    assert f"({old}) to " in changes["D03"] and changes["D03"].endswith(f"({other})")


def test_overview_rebuilds_only_the_parts_whose_key_changed(
    demo_session: Session, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Each part is kept under a key of what invalidates it: nothing is rebuilt while nothing
    changed; a decision rebuilds the review state only; the next minute the feed verdicts."""
    built: Counter[str] = Counter()

    def counting(name: str, build: Callable[..., Any]) -> Callable[..., Any]:
        def wrapped(*args: Any, **kwargs: Any) -> Any:
            built[name] += 1
            return build(*args, **kwargs)
        return wrapped

    for module, attr in [(district_lines, "_build"), (review_state, "_build"),
                         (overview, "data_overview"), (feed_freshness, "feed_statuses")]:
        monkeypatch.setattr(module, attr, counting(module.__name__.rsplit(".", 1)[1],
                                                   getattr(module, attr)))
    for cache in (district_lines._BASES, review_state._STATES, overview._ON_HAND,
                  feed_freshness._STATUSES):
        cache.clear()  # other tests' demo copies share the keys
    catalogue = load_feeds(DEMO_FEEDS)
    first = morning_overview(session=demo_session, now=NOW, catalogue=catalogue)
    again = morning_overview(session=demo_session, now=NOW + timedelta(seconds=30),
                             catalogue=catalogue, sort="name")
    assert again.every == first.every
    assert [(f.feed, f.status) for f in again.feeds] == [(f.feed, f.status) for f in first.feeds]
    once = {"district_lines": 1, "review_state": 1, "overview": 1, "feed_freshness": 1}
    assert built == once
    latest = current_run(session=demo_session)
    assert latest is not None
    item = next(i for i in latest.items if i.code == "D01")
    decide(session=demo_session, assessment_id=item.assessment.id, user=APPROVER, accept=True,
           tier=None, reason="invented reason", **seen(demo_session, item.assessment.id))
    view = morning_overview(session=demo_session, now=NOW, catalogue=catalogue)
    assert next(x for x in view.every if x.code == "D01").decided_tier is not None
    assert built == {**once, "review_state": 2}
    morning_overview(session=demo_session, now=NOW + timedelta(minutes=1), catalogue=catalogue)
    assert built == {**once, "review_state": 2, "feed_freshness": 2}
