"""Shared fixtures for the service and CLI tests that need a seeded demo database.

The invented 150-day demo county (``demo_seed``) is seeded once per test session into a SQLite
file; every test that asks for it gets its own copy of that file, so no test sees another's
writes. The names differ from the store fixtures of ``tests/conftest.py`` (``session``,
``migrated_engine``), which the store tests keep using.
"""

from __future__ import annotations

import shutil
from collections.abc import Iterator
from datetime import date
from pathlib import Path

import pytest
from sqlalchemy.orm import Session

from server.config import Settings
from server.services.database import Database

#: A one-criterion invented ruleset for the feed-staleness tests (test_district_indicators.py,
#: test_feeds_state.py).
STALE_RULES = """\
name: stale
version: "1"
tiers:
  - {name: T0, staff: s, public: p}
  - {name: T1, staff: s, public: p}
indicators:
  incidence_7d: {label: 7-day incidence, unit: per 100 000, decimals: 0}
criteria:
  - {id: incidence, indicator: incidence_7d, enter: [50], exit: [35]}
timing: {confirm_days: 1, release_days: 1, min_days_in_tier: 0, effective_delay_days: 0}
"""


#: Days and last day of the seeded demo (the tests' expected values are for exactly these).
DEMO_DAYS = 150
DEMO_END = date(2026, 11, 30)


def demo_settings(path: Path) -> Settings:
    """Settings of a demo database file."""
    return Settings(database_url=f"sqlite:///{path}", demo_mode=True)


@pytest.fixture(scope="session")
def demo_source(lead_policy_demo_file: Path) -> Path:
    """The demo database file (DEMO_DAYS to DEMO_END, the lead policy alone), seeded once per
    test session and shared with the web tests (``tests/conftest.py``); never written to."""
    return lead_policy_demo_file


@pytest.fixture
def demo_path(demo_source: Path, tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A fresh copy of the seeded demo database for this test."""
    target = tmp_path_factory.mktemp("demo") / "demo.db"
    shutil.copyfile(demo_source, target)
    return target


@pytest.fixture
def demo_db(demo_path: Path) -> Iterator[Database]:
    """The services' database on this test's copy of the demo."""
    database = Database.from_settings(demo_settings(demo_path))
    yield database
    database.dispose()


@pytest.fixture
def demo_session(demo_db: Database) -> Iterator[Session]:
    """A session on this test's copy of the demo; its work is rolled back after the test."""
    with demo_db.sessions() as s:
        yield s
        s.rollback()


def seen(session: Session, assessment_id: int) -> dict[str, int | None]:
    """What a review form opened now shows of the district of ``assessment_id``: its official
    tier and the decision that set it (the arguments :func:`server.services.review.decide`
    compares), read straight from the decision table."""
    from sqlalchemy import select

    from server.store.models import Assessment, Decision

    assessment = session.get(Assessment, assessment_id)
    assert assessment is not None
    row = session.scalar(
        select(Decision).where(Decision.region_id == assessment.region_id)
        .order_by(Decision.effective_date.desc(), Decision.decided_at.desc(), Decision.id.desc())
        .limit(1)
    )
    return {"official_tier": None if row is None else row.tier,
            "official_decision_id": None if row is None else row.id}


@pytest.fixture(scope="session")
def attempts_db(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Database]:
    """A migrated SQLite file for login attempts, apart from the test's rolled-back session
    (a limiter commits each attempt in its own transaction, which SQLite would not let through
    while the test's session holds the write lock). :func:`authenticate` records outcomes in the
    test's session, so attempts made through it stay pending here, which counts the same."""
    from server.store import make_engine, make_sessionmaker, upgrade

    engine = make_engine(f"sqlite:///{tmp_path_factory.mktemp('attempts') / 'attempts.db'}")
    upgrade(engine)
    yield Database(engine=engine, sessions=make_sessionmaker(engine))
    engine.dispose()


@pytest.fixture
def attempts(attempts_db: Database) -> Database:
    """:func:`attempts_db` with no attempt stored yet."""
    from sqlalchemy import delete

    from server.store.models import LoginAttempt

    with attempts_db.transaction() as s:
        s.execute(delete(LoginAttempt))
    return attempts_db


#: One push feed for the small offices of the crash and concurrency tests.
SMALL_FEEDS = """\
feeds:
  - name: long-csv
    source: {kind: push}
    measures: [cases, tests, positives]
"""


def seed_small_office(db: Database, folder: Path, *, districts: int = 3) -> Path:
    """Invented districts ``S01``.., the measures the evaluation reads, :data:`STALE_RULES`
    active, and the feed file :data:`SMALL_FEEDS` (written to ``folder``, returned). No data."""
    from server.services.ruleset_activation import store_ruleset
    from server.store import MeasureRecord, RegionRecord, upsert_measures, upsert_regions

    (folder / "rules.yaml").write_text(STALE_RULES)
    feeds = folder / "feeds.yaml"
    feeds.write_text(SMALL_FEEDS)
    with db.transaction() as session:
        upsert_regions(session=session, records=[
            RegionRecord(code=f"S{k:02d}", name=f"Smallfield {k}", level="district",
                         parent=None, population=10_000) for k in range(1, districts + 1)])
        upsert_measures(session=session, records=[
            MeasureRecord(name=m, unit="n", kind="count", aggregation="sum")
            for m in ("cases", "tests", "positives", "hosp_admissions", "gp_ari",
                      "icu_occupied", "icu_staffed", "ww_concentration", "ww_flow")])
        store_ruleset(session=session, path=folder / "rules.yaml", activate=True)
    return feeds


def cases_csv(days: int, *, districts: int = 3, value: int = 5,
              end: date = date(2026, 3, 31)) -> bytes:
    """A long-layout CSV of daily cases for ``S01``.. over the ``days`` days up to ``end``."""
    from datetime import timedelta

    lines = ["region,date,measure,value"] + [
        f"S{k:02d},{end - timedelta(days=d)},cases,{value + k}"
        for d in range(days) for k in range(1, districts + 1)
    ]
    return ("\n".join(lines) + "\n").encode()
