"""Read model: the analyst's morning overview of every district.

For each district: the official (published) tier, the newest recommended tier (a pending change
stands out), active prepare signals, the key indicators with their intervals and a 14-day series
for a sparkline; the freshness of each feed; and what changed since the previous day. This
module filters, sorts and pages the lines and assembles the parts, each kept per worker under a
key of what invalidates it (:class:`server.readmodels.cache.BoundedCache`):

* :mod:`server.readmodels.district_lines`: the lines as the engine left them, once per run;
* :mod:`server.readmodels.review_state`: official tiers and pending changes merged in, once per
  state of the decisions (one query per request tells);
* :mod:`server.readmodels.day_changes`: what changed since the previous morning;
* :mod:`server.readmodels.feed_freshness`: each feed's verdict, once per minute and vintage;
* :mod:`server.readmodels.overview`: the data on hand, once per newest vintage.

The lines are the lead policy's; with several active policies, :attr:`MorningOverview.policies`
holds every policy's tier per district (:mod:`server.readmodels.policy_columns`).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import UTC, date, datetime, timedelta
from typing import Literal

from sqlalchemy.orm import Session

from server.feeds.definition import FeedCatalogue
from server.readmodels.day_changes import Change
from server.readmodels.district_lines import DistrictLine, KeyIndicator, district_base
from server.readmodels.feed_freshness import FeedFreshness, feed_freshness
from server.readmodels.overview import DataOverview, MeasureLabel, data_on_hand, measure_label
from server.readmodels.policy_columns import PolicyColumn, policy_columns
from server.readmodels.review_state import review_state
from server.services.assessments import newest_run_of
from server.services.errors import ServiceError
from server.services.ruleset_cache import parsed
from server.services.rulesets import active_ruleset, active_rulesets

__all__ = [
    "Change",
    "DistrictLine",
    "FeedFreshness",
    "KeyIndicator",
    "MeasureLabel",
    "MorningOverview",
    "SortKey",
    "SortKeyError",
    "measure_label",
    "morning_overview",
]

SortKey = Literal["name", "tier", "recommended", "pending", "code"]
SORT_KEYS: tuple[str, ...] = ("pending", "name", "code", "tier", "recommended")


class SortKeyError(ServiceError, ValueError):
    """The overview was asked to sort by a key it does not know (the page answers 422)."""

    def __init__(self, sort: str) -> None:
        self.sort = sort
        super().__init__(f"sort must be one of {', '.join(SORT_KEYS)}, got {sort!r}")


@dataclass(frozen=True, kw_only=True)
class MorningOverview:
    ruleset: str | None
    data_cutoff: datetime | None
    day: date | None
    lines: tuple[DistrictLine, ...]
    total: int
    page: int
    pages: int
    pending: int
    tier_counts: Mapping[int, int]
    tier_names: tuple[str, ...]
    feeds: tuple[FeedFreshness, ...]
    changes: tuple[Change, ...]
    every: tuple[DistrictLine, ...]
    data_on_hand: DataOverview
    #: label of each measure of ``data_on_hand`` (same order)
    measures: tuple[MeasureLabel, ...] = ()
    #: districts with a decision taken but not yet published
    decided: int = 0
    #: changes exactly when ``data_on_hand`` does (the newest vintage id): a key for caching
    #: anything rendered from it
    data_on_hand_key: int = 0
    #: every active policy, the lead first, when more than one is active (else empty)
    policies: tuple[PolicyColumn, ...] = ()


def _sort(lines: list[DistrictLine], key: str) -> list[DistrictLine]:
    def tier(v: int | None) -> int:
        return -99 if v is None else v

    if key == "code":
        return sorted(lines, key=lambda x: x.code)
    if key == "tier":
        return sorted(lines, key=lambda x: (-tier(x.official_tier), x.name))
    if key == "recommended":
        return sorted(lines, key=lambda x: (-tier(x.recommended_tier), x.name))
    if key == "pending":
        return sorted(lines, key=lambda x: (not x.pending, not x.prepare, x.name))
    return sorted(lines, key=lambda x: x.name)


def morning_overview(
    *, session: Session, sort: str = "pending", query: str = "", tier: int | None = None,
    pending_only: bool = False, page: int = 1, per_page: int = 100,
    now: datetime | None = None, catalogue: FeedCatalogue | None = None,
    time_zone: str = "UTC",
) -> MorningOverview:
    """Every district's official and recommended tier, signals, indicators; filtered, sorted and
    paged (``page`` counts from 1); the feeds of ``catalogue`` judged as on the Feeds page
    (without a catalogue only the sources that delivered, unjudged)."""
    if sort not in SORT_KEYS:
        raise SortKeyError(sort)
    if page < 1 or per_page < 1:
        raise ValueError(f"page and per_page must be >= 1, got {page} and {per_page}")
    now = now or datetime.now(UTC)
    row = active_ruleset(session=session)
    feeds = feed_freshness(session, now, catalogue, time_zone)
    on_hand_key, on_hand, measures = data_on_hand(session=session)
    if row is None:
        return MorningOverview(
            ruleset=None, data_cutoff=None, day=None, lines=(), total=0, page=1, pages=1,
            pending=0, tier_counts={}, tier_names=(), feeds=feeds, changes=(), every=(),
            data_on_hand=on_hand, data_on_hand_key=on_hand_key, measures=measures,
        )
    run = newest_run_of(session=session, ruleset_id=row.id)
    cutoff = run.data_cutoff if run is not None else None
    ruleset = parsed(row)
    key, base = district_base(session, row, run, ruleset)
    # publications since the previous morning's data count as changes too
    review = review_state(session, key, base, cutoff - timedelta(days=1) if cutoff else None,
                          ruleset, row.name)
    several = len(active_rulesets(session=session)) > 1
    columns = policy_columns(session=session) if several else ()
    lines = review.lines
    # "pending only": a change awaits review under any active policy
    waiting = {code for c in columns for code, cell in c.cells.items() if cell.pending}
    chosen = [
        line for line in lines
        if (not query or query.lower() in line.name.lower() or query.lower() in line.code.lower())
        and (tier is None or line.recommended_tier == tier or line.official_tier == tier)
        and (not pending_only or line.pending or line.code in waiting)
    ]
    chosen = _sort(chosen, sort)
    pages = max(1, math.ceil(len(chosen) / per_page))
    page = min(page, pages)
    return MorningOverview(
        ruleset=f"{row.name} {row.version}", data_cutoff=cutoff, day=base.day,
        lines=tuple(chosen[(page - 1) * per_page: page * per_page]), total=len(chosen),
        page=page, pages=pages, pending=review.pending, decided=review.decided,
        tier_counts=review.tier_counts,
        tier_names=tuple(t.name for t in ruleset.tiers), feeds=feeds,
        changes=base.changes + review.published,
        every=tuple(lines), data_on_hand=on_hand, data_on_hand_key=on_hand_key,
        measures=measures, policies=columns,
    )
