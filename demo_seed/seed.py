"""Fill a database with the invented demo scenario, through the services layer.

Every name, place and number written here is invented for the demonstration. The data arrive as the
vintages they would have arrived as: one per feed and day (through the demo feeds of
:mod:`demo_seed.feeds`), each holding that day's new values and the revisions of earlier days,
so as-of reads see the county as it was known on any morning, and the Feeds page judges real
deliveries (one feed is late on purpose).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from contextlib import AbstractContextManager, nullcontext
from dataclasses import dataclass
from datetime import UTC, date, datetime, timedelta
from pathlib import Path
from zoneinfo import ZoneInfo

import pandas as pd

from demo_seed.feeds import (
    ARRIVAL,
    DEMO_TIME_ZONE,
    FEED_OF_MEASURE,
    LATE_DAYS,
    LATE_FEED,
    SOURCES,
    configure_demo_feeds,
    demo_limits,
    last_complete_day,
)
from demo_seed.history import defer_newest_change, official_history
from demo_seed.scenario import MEASURES, PATHOGEN_MEASURES, Scenario, build_scenario
from demo_seed.standin import wastewater_csv
from server.services.audit import record
from server.services.database import DEMO_MARK, Database, recreate_demo_schema
from server.services.evaluation import EvaluationRun
from server.services.feed_state import record_feed_state
from server.services.forecast_store import store_forecasts_as_known
from server.services.observations import MeasureRecord, VintageWriter, define_measures
from server.services.official_history import import_official_history
from server.services.regions import RegionRecord, store_catchments, store_regions
from server.services.ruleset_activation import activate_ruleset, store_ruleset
from server.services.rulesets import default_ruleset_path, policies_dir
from server.services.users import add_user

#: The policies the demo runs at once, the lead first (``county.yaml``, from
#: :func:`default_ruleset_path`); the others are activated when the rules folder holds them.
DEMO_POLICIES = ("influenza.yaml", "rsv.yaml", "hospital.yaml")

#: Past mornings whose forecasts the demo stores (60 scored at 21 days, 7 settling).
RECORD_MORNINGS = 90

ProgressFactory = Callable[[str, int], AbstractContextManager[Callable[[int], None]]]

# Invented demo accounts; the demo prints them. Never use these outside the demo.
DEMO_USERS = (
    ("ada.analyst", "analyst", "demo-analyst"),
    ("otto.approver", "approver", "demo-approver"),
    ("ines.admin", "admin", "demo-admin"),
    ("vic.viewer", "viewer", "demo-viewer"),
)


@dataclass(frozen=True, kw_only=True)
class SeedSummary:
    start: date
    end: date
    districts: int
    vintages: int
    observations: int
    users: tuple[tuple[str, str, str], ...]
    ruleset: str
    assessments: int
    push_tokens: dict[str, str]
    decisions: int = 0
    #: Every policy the demo activated (name, assessments written), the lead first.
    policies: tuple[tuple[str, int], ...] = ()
    wastewater_csv: bytes = b""  # what the stand-in water authority serves (demo_seed.standin)


def _no_progress(_n: int = 1) -> None:
    return None


def received_at(day: date, feed: str = "long-csv") -> datetime:
    """When ``feed``'s vintage of ``day`` arrived: the next morning at the feed's hour (data of
    a day are known after it)."""
    return datetime.combine(day + timedelta(days=1), ARRIVAL[feed], tzinfo=UTC)


def _vintages(
    observations: pd.DataFrame, end: date,
) -> Iterator[tuple[str, date, pd.DataFrame]]:
    """(feed, day known, rows) of every delivery, by day and feed; the late feed's last
    :data:`~demo_seed.feeds.LATE_DAYS` deliveries never came."""
    feeds = observations["measure"].map(FEED_OF_MEASURE)
    if feeds.isna().any():
        missing = sorted(set(observations.loc[feeds.isna(), "measure"]))
        raise ValueError(f"no demo feed delivers {', '.join(missing)}")
    last_late = end - timedelta(days=LATE_DAYS)
    frame = observations.assign(feed=feeds)
    for (known_on, feed), group in frame.groupby(["known_on", "feed"], sort=True):
        day = pd.Timestamp(known_on).date()
        if feed == LATE_FEED and day > last_late:
            continue
        yield str(feed), day, group[["region", "measure", "ref_date", "value"]]


def seed_demo(
    db: Database, *, seed: int = 7, days: int = 548, end: date | None = None,
    rules_dir: Path | None = None, progress: ProgressFactory | None = None,
    history: bool = False, policies: tuple[str, ...] = DEMO_POLICIES,
) -> SeedSummary:
    """Wipe the demo database, fill it with a freshly simulated scenario, and evaluate the
    demo county's policies over the whole history (assessments as of the newest vintage): the
    lead ``county.yaml`` and the files named in ``policies`` (default :data:`DEMO_POLICIES`;
    ``()`` for the lead policy alone), all active at once.

    With ``history``, the invented office's past official decisions are recorded and published
    too (:mod:`demo_seed.history`), leaving the newest changes for the demo's approver."""
    if end is None:
        end = last_complete_day(datetime.now(UTC))
    scenario = build_scenario(seed=seed, end=end, days=days)
    recreate_demo_schema(db)
    with db.transaction() as session:
        define_measures(
            session=session,
            measures=[
                MeasureRecord(
                    name=name, unit=spec["unit"], kind=spec["kind"],
                    aggregation=spec["aggregation"], description=spec.get("description", ""),
                    pathogen=spec.get("pathogen"),
                )
                for name, spec in {**MEASURES, **PATHOGEN_MEASURES}.items()
            ],
        )
        store_regions(
            session=session, records=_region_records(scenario), actor="demo", source="demo_seed"
        )
        store_catchments(
            session=session, shares=[(c.plant, c.district, c.share) for c in scenario.catchments]
        )
        for name, role, password in DEMO_USERS:
            add_user(session=session, name=name, role=role, password=password, actor="demo")
    batches = list(_vintages(pd.concat([scenario.observations, scenario.pathogen_observations]),
                             scenario.end))
    bar = (
        progress("seeding daily vintages", len(batches))
        if progress
        else nullcontext(_no_progress)
    )
    with bar as advance, db.transaction() as session:
        writers = {feed: VintageWriter(session=session, feed=feed, source=source)
                   for feed, source in SOURCES.items()}
        last: dict[str, datetime] = {}
        for feed, day, rows in batches:
            last[feed] = received_at(day, feed)
            writers[feed].append(rows, received_at=last[feed])
            advance(1)
        for feed, at in last.items():
            record_feed_state(session, feed=feed, at=at)
        record(
            session=session, actor="demo", action=DEMO_MARK, subject=f"seed={seed}",
            details={"start": scenario.start.isoformat(), "end": scenario.end.isoformat()},
        )
    paths = [default_ruleset_path(rules_dir)] + [
        path for path in (policies_dir(rules_dir) / name for name in policies)
        if path.is_file()]
    runs: list[EvaluationRun] = []
    with db.transaction() as session:
        for path in paths:  # the lead policy first: activated first, it stays the lead
            row = store_ruleset(session=session, path=path, author="demo")
            if path == paths[0]:
                ruleset = row
            policy_run = activate_ruleset(session=session, row=row, actor="demo",
                                          stale_after=demo_limits())
            if policy_run is not None:
                runs.append(policy_run)
    run = runs[0] if runs and runs[0].ruleset_id == ruleset.id else None
    with db.transaction() as session:  # the record of the last 90 mornings, each as known then
        store_forecasts_as_known(session=session, time_zone=ZoneInfo(DEMO_TIME_ZONE),
                                 start=scenario.end - timedelta(days=RECORD_MORNINGS - 1))
    decisions = 0
    if history:
        decisions = sum(_record_history(db, scenario, r) for r in runs)
    tokens = configure_demo_feeds(db)
    districts = sum(1 for r in scenario.regions if r.level == "district")
    return SeedSummary(
        start=scenario.start, end=scenario.end, districts=districts, vintages=len(batches),
        observations=len(scenario.observations), users=DEMO_USERS,
        ruleset=f"{ruleset.name} {ruleset.version}", assessments=run.written if run else 0,
        policies=tuple((r.ruleset_name, r.written) for r in runs),
        push_tokens=tokens, decisions=decisions,
        wastewater_csv=wastewater_csv(scenario.observations),
    )


def _record_history(db: Database, scenario: Scenario, run: EvaluationRun) -> int:
    evaluation = run.evaluation
    if evaluation is None:  # a reused run: the history was recorded with it
        return 0
    population = {r.code: r.population for r in scenario.regions}
    records = official_history(
        regions=evaluation.regions, populations=[population[c] for c in evaluation.regions],
        dates=evaluation.dates, tier=evaluation.tier, tier_name=evaluation.ruleset.tier_name,
    )
    records = defer_newest_change(
        records, final=evaluation.tier[:, -1], regions=evaluation.regions,
        tier_name=evaluation.ruleset.tier_name, newest=scenario.end,
    )
    with db.transaction() as session:
        result = import_official_history(
            session=session, records=records, source="demo_seed history", actor="demo",
            policy=run.ruleset_name,
        )
    return result.stored


def _region_records(scenario: Scenario) -> list[RegionRecord]:
    return [
        RegionRecord(
            code=r.code, name=r.name, level=r.level, parent=r.parent, population=r.population,
            geometry=r.geometry, attributes=dict(r.attributes),
        )
        for r in scenario.regions
    ]
