"""Revision 0010_decision_policy: every decision kept, each filled with its policy.

A database made at the previous head (``0007_recorded_events``) with decisions of two policies
(one retired) and an imported decision without an assessment migrates on SQLite and, with
``TIERWISE_TEST_POSTGRES_URL``, PostgreSQL (the ``migrated_engine`` parametrisation).
"""

from __future__ import annotations

from datetime import UTC, date, datetime, timedelta
from pathlib import Path

from alembic import command
from sqlalchemy import Engine, insert, inspect, select, text

from server.store import scratch_engine, upgrade
from server.store.models import Assessment, Region
from server.store.models import Decision as DecisionRow
from server.store.models import Ruleset as RulesetRow
from server.store.schema import alembic_config

COLUMNS = ("id", "region_id", "assessment_id", "effective_date", "tier", "kind", "reason",
           "decided_by", "decided_at", "published_at")


def _decisions(engine: Engine) -> list[tuple]:
    with engine.connect() as connection:
        return [tuple(r) for r in connection.execute(
            text(f"SELECT {', '.join(COLUMNS)} FROM decision ORDER BY id"))]


def _old_database(engine: Engine, at: datetime, active: bool) -> None:
    upgrade(engine, "0007_recorded_events")
    with engine.begin() as connection:
        connection.execute(insert(RulesetRow.__table__), [
            {"id": 1, "name": "invented-old", "version": "1", "yaml_text": "",
             "sha256": "1" * 64, "author": "", "created_at": at, "status": "retired"},
            {"id": 2, "name": "invented-now", "version": "2", "yaml_text": "",
             "sha256": "2" * 64, "author": "", "created_at": at,
             "status": "active" if active else "retired"},
        ])
        connection.execute(insert(Region.__table__), [
            {"id": k, "code": f"D{k:02d}", "name": f"Invented district {k}", "level": "district",
             "population": 1000 * k, "attributes": {}} for k in (1, 2)])
        connection.execute(insert(Assessment.__table__), [
            {"id": k, "ruleset_id": ruleset, "region_id": region, "ref_date": date(2030, 3, 1),
             "data_cutoff": at, "recommended_tier": 1, "previous_tier": 0, "criteria": {},
             "prepare_signals": {}, "explanation": {}, "created_at": at}
            for k, ruleset, region in ((1, 1, 1), (2, 2, 1), (3, 2, 2))])
        connection.execute(insert(DecisionRow.__table__), [
            {"id": k, "region_id": region, "assessment_id": assessment,
             "effective_date": date(2030, 3, 2) + timedelta(days=k), "tier": k % 3,
             "kind": "recorded" if assessment is None else "confirmed",
             "reason": f"invented reason {k}", "decided_by": None,
             "decided_at": at + timedelta(hours=k),
             "published_at": None if k == 4 else at + timedelta(hours=k, minutes=5)}
            for k, region, assessment in ((1, 1, 1), (2, 1, 2), (3, 2, 3), (4, 2, None))
        ])


def _url(migrated_engine: Engine, tmp_path: Path) -> str:
    return (f"sqlite:///{tmp_path / 'old.db'}" if migrated_engine.dialect.name == "sqlite"
            else migrated_engine.url.render_as_string(hide_password=False))


def test_0010_keeps_every_decision_and_fills_its_policy(
    migrated_engine: Engine, tmp_path: Path
) -> None:
    at = datetime(2030, 3, 1, 5, 0, tzinfo=UTC)
    with scratch_engine(_url(migrated_engine, tmp_path), prefix="tw_mig") as engine:
        _old_database(engine, at, active=True)
        before = _decisions(engine)
        upgrade(engine)
        after = _decisions(engine)
        with engine.connect() as connection:
            policies = dict(connection.execute(text("SELECT id, policy FROM decision")).all())
            nullable = {c["name"]: c["nullable"] for c in inspect(connection).get_columns(
                "decision")}["policy"]
            indexes = {i["name"] for i in inspect(connection).get_indexes("decision")}
        config = alembic_config(engine)
        with engine.begin() as connection:
            config.attributes["connection"] = connection
            command.downgrade(config, "0007_recorded_events")
        down = _decisions(engine)
    assert len(before) == 4
    assert after == before
    assert down == before
    # from the assessment's ruleset (a retired one too); the imported one from the active
    assert policies == {1: "invented-old", 2: "invented-now", 3: "invented-now",
                        4: "invented-now"}
    assert nullable is False
    assert "ix_decision_policy_region_day" in indexes


def test_0010_fills_a_decision_without_assessment_from_the_newest_ruleset(
    migrated_engine: Engine, tmp_path: Path
) -> None:
    at = datetime(2030, 3, 1, 5, 0, tzinfo=UTC)
    with scratch_engine(_url(migrated_engine, tmp_path), prefix="tw_mig") as engine:
        _old_database(engine, at, active=False)
        upgrade(engine)
        with engine.connect() as connection:
            policy = connection.scalar(select(text("policy")).select_from(text("decision"))
                                       .where(text("id = 4")))
    assert policy == "invented-now"  # no ruleset active: the newest stored one (id 2)
