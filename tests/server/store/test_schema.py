"""Migrations and models agree, on SQLite and PostgreSQL."""

from __future__ import annotations

from datetime import UTC, date, datetime, timedelta
from pathlib import Path

from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext
from sqlalchemy import Engine, func, insert, select

from server.store import current_revision, head_revision, scratch_engine, upgrade
from server.store.models import Assessment, Base, EvaluationRun, Region
from server.store.models import Ruleset as RulesetRow


def test_upgrade_reaches_head(migrated_engine: Engine) -> None:
    assert current_revision(migrated_engine) == head_revision(migrated_engine)


def test_migrations_match_models(migrated_engine: Engine) -> None:
    with migrated_engine.connect() as connection:
        context = MigrationContext.configure(connection, opts={"compare_type": True})
        diff = compare_metadata(context, Base.metadata)
    assert diff == []


def test_0003_rebuilds_the_runs_of_assessments_stored_before_it(
    migrated_engine: Engine, tmp_path: Path
) -> None:
    url = (f"sqlite:///{tmp_path / 'old.db'}" if migrated_engine.dialect.name == "sqlite"
           else migrated_engine.url.render_as_string(hide_password=False))
    at = datetime(2030, 3, 2, 5, 0, tzinfo=UTC)
    with scratch_engine(url, prefix="tw_mig") as engine:
        upgrade(engine, "0002")
        with engine.begin() as connection:
            connection.execute(insert(RulesetRow.__table__).values(
                id=1, name="invented", version="1", yaml_text="", sha256="0" * 64, author="",
                created_at=at, status="active"))
            connection.execute(insert(Region.__table__).values(
                id=1, code="X1", name="Invented district", level="district", population=1,
                attributes={}))
            for k, cutoff in enumerate((at, at, at, at + timedelta(days=1))):
                connection.execute(insert(Assessment.__table__).values(
                    ruleset_id=1, region_id=1, ref_date=date(2030, 3, 1) - timedelta(days=k % 3),
                    data_cutoff=cutoff, recommended_tier=0, previous_tier=0, criteria={},
                    prepare_signals={}, explanation={}, created_at=cutoff))
        upgrade(engine)
        with engine.connect() as connection:
            runs = connection.execute(
                select(EvaluationRun.data_cutoff, EvaluationRun.first_day,
                       EvaluationRun.last_day, EvaluationRun.rows_written)
                .order_by(EvaluationRun.data_cutoff)
            ).all()
            hashes = connection.scalar(select(func.count(Assessment.content_sha256)))
    assert [tuple(r) for r in runs] == [
        (at, date(2030, 2, 27), date(2030, 3, 1), 3),
        (at + timedelta(days=1), date(2030, 3, 1), date(2030, 3, 1), 1),
    ]
    assert hashes == 0  # rows stored before 0003 carry no hash (treated as changed once)
