"""Two approvers deciding the same change at the same moment, on SQLite and PostgreSQL.

Each approver works in its own thread, its own session and its own transaction (as two web
workers would); a barrier releases both calls to :func:`server.services.review.decide` together.
Exactly one decision may be stored; the other call gets :class:`DecisionConflictError` naming
the decision that won. The database is a fresh one per back end with two invented districts
whose 7-day incidence is far over the single threshold of an invented two-tier policy, so both
are pending at "T1" with no official tier.
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Iterator
from datetime import UTC, date, datetime, time, timedelta
from pathlib import Path
from typing import Any

import pandas as pd
import pytest
from sqlalchemy import func, select

from server.services.database import Database
from server.services.observations import MeasureRecord, define_measures
from server.services.regions import RegionRecord, store_regions
from server.services.review import (
    DecisionConflictError,
    decide,
    pending_changes,
    publish,
)
from server.services.ruleset_activation import store_ruleset
from server.services.users import add_user
from server.store import make_sessionmaker, scratch_engine, upgrade
from server.store.models import Decision as DecisionRow
from server.store.models import Region
from server.store.vintages import append_vintage
from tests.conftest import BACKENDS, POSTGRES_URL
from tests.server.conftest import STALE_RULES

pytestmark = pytest.mark.slow
APPROVERS = ("ada.approver", "bo.approver")  # invented accounts
END = date(2031, 3, 31)
DAYS = 21
ROUNDS = 5


def _seed(db: Database, rules: Path) -> None:
    """Two districts with 40 cases a day per 100 000 (7-day incidence 280, over the 50 of
    ``STALE_RULES``), the policy active, two approvers."""
    with db.transaction() as s:
        define_measures(session=s, measures=[
            MeasureRecord(name=m, unit="count", kind="count", aggregation="sum")
            for m in ("cases", "tests", "positives", "hosp_admissions", "gp_ari", "icu_occupied",
                      "icu_staffed", "ww_concentration", "ww_flow")])
        store_regions(session=s, records=[
            RegionRecord(code="RC", name="Racecounty", level="county", parent=None,
                         population=200_000),
            *[RegionRecord(code=f"R{i}", name=f"Racedistrict {i}", level="district",
                           parent="RC", population=100_000) for i in range(ROUNDS + 3)],
        ], actor="test", source="test")
        for name in APPROVERS:
            add_user(session=s, name=name, role="approver", password="race-pass-1234")
        days = [END - timedelta(days=k) for k in range(DAYS - 1, -1, -1)]
        append_vintage(session=s, feed="daily", checksum="race",
                       received_at=datetime.combine(END + timedelta(days=1), time(5), UTC),
                       rows=pd.DataFrame({
                           "region": [f"R{i}" for i in range(ROUNDS + 3) for _ in days],
                           "measure": "cases",
                           "ref_date": [d for _ in range(ROUNDS + 3) for d in days],
                           "value": 40.0}))
        store_ruleset(session=s, path=rules, author="test", activate=True)


@pytest.fixture(scope="module", params=BACKENDS)
def db(request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory
       ) -> Iterator[Database]:
    folder = tmp_path_factory.mktemp("race")
    rules = folder / "stale.yaml"
    rules.write_text(STALE_RULES, encoding="utf-8")
    if request.param == "sqlite":
        url = f"sqlite:///{folder / 'race.db'}"
    else:
        assert POSTGRES_URL is not None
        url = POSTGRES_URL
    with scratch_engine(url, prefix="tw_race") as engine:
        upgrade(engine)
        database = Database(engine=engine, sessions=make_sessionmaker(engine))
        _seed(database, rules)
        yield database


def _together(*calls: Callable[[], Any]) -> list[Any]:
    """Run the calls in threads released by one barrier; each result or raised exception."""
    barrier = threading.Barrier(len(calls))
    results: list[Any] = [None] * len(calls)

    def run(k: int) -> None:
        barrier.wait()
        try:
            results[k] = calls[k]()
        except Exception as exc:  # noqa: BLE001 - the test inspects what was raised
            results[k] = exc

    threads = [threading.Thread(target=run, args=(k,)) for k in range(len(calls))]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=60)
    assert not any(t.is_alive() for t in threads), "a decision hung"
    return results


def _decider(db: Database, user: str, aid: int, accept: bool, reason: str) -> Callable[[], Any]:
    def call() -> Any:
        with db.transaction() as s:
            return decide(session=s, assessment_id=aid, user=user, accept=accept,
                          tier=None if accept else 0, reason=reason,
                          official_tier=None, official_decision_id=None)
    return call


@pytest.mark.parametrize("round_", range(ROUNDS), ids=[f"R{i}" for i in range(ROUNDS)])
def test_decide_confirm_and_override_at_once_store_exactly_one(
    db: Database, round_: int
) -> None:
    code = f"R{round_}"
    with db.sessions() as s:
        change = next(p for p in pending_changes(session=s) if p.region == code)
    assert (change.official_tier, change.official_decision_id) == (None, None)
    results = _together(
        _decider(db, APPROVERS[0], change.assessment_id, True, "confirm: agreed"),
        _decider(db, APPROVERS[1], change.assessment_id, False, "override: cluster contained"),
    )
    refused = [r for r in results if isinstance(r, DecisionConflictError)]
    stored = [r for r in results if not isinstance(r, Exception)]
    assert len(stored) == 1 and len(refused) == 1, results
    with db.sessions() as s:
        count = s.scalar(select(func.count()).select_from(DecisionRow).join(
            Region, Region.id == DecisionRow.region_id).where(Region.code == code))
    assert count == 1
    assert refused[0].region == code and refused[0].decision_id == stored[0].id
    assert refused[0].tier == stored[0].tier and refused[0].by in APPROVERS


def test_decide_from_a_stale_form_is_refused(db: Database) -> None:
    """A form opened before someone else's decision names what it saw; that is old now, even
    when the decision kept the tier the form saw (here: none, then an override)."""
    code = f"R{ROUNDS}"  # a district the rounds above leave alone
    with db.sessions() as s:
        change = next(p for p in pending_changes(session=s) if p.region == code)
    made = _decider(db, APPROVERS[0], change.assessment_id, False, "override first")()
    with pytest.raises(DecisionConflictError, match="someone decided meanwhile") as caught:
        _decider(db, APPROVERS[1], change.assessment_id, True, "from the old form")()
    assert caught.value.decision_id == made.id and caught.value.by == APPROVERS[0]
    assert caught.value.seen_decision_id is None


def _publisher(db: Database, user: str) -> Callable[[], Any]:
    def call() -> Any:
        with db.transaction() as s:
            return publish(session=s, user=user)
    return call


def test_publish_twice_at_once_starts_each_district_once(db: Database) -> None:
    """The rounds above leave districts never decided; two first publications at once."""
    with db.sessions() as s:
        never = s.scalar(select(func.count()).select_from(Region).where(
            Region.level == "district", ~Region.id.in_(select(DecisionRow.region_id))))
    assert never
    results = _together(_publisher(db, APPROVERS[0]), _publisher(db, APPROVERS[1]))
    assert not any(isinstance(r, Exception) for r in results), results
    assert sorted(len(r.initial) for r in results) == [0, never]
    with db.sessions() as s:
        per_district = s.execute(select(DecisionRow.region_id, func.count())
                                 .group_by(DecisionRow.region_id)).all()
    assert {n for _rid, n in per_district} == {1}
