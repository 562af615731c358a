"""Migrations and models agree, on SQLite and PostgreSQL."""

from __future__ import annotations

from datetime import UTC, date, datetime, timedelta
from pathlib import Path

import pytest
from alembic import command
from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext
from sqlalchemy import Connection, Engine, func, insert, select, text
from sqlalchemy.orm import Session

from server.store import current_revision, head_revision, read_dense, scratch_engine, upgrade
from server.store.models import (
    Assessment,
    Base,
    EvaluationRun,
    Measure,
    Observation,
    Region,
    Vintage,
)
from server.store.models import Ruleset as RulesetRow
from server.store.schema import alembic_config


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


def _observation_sql(connection: Connection) -> str:
    return connection.exec_driver_sql(
        "SELECT sql FROM sqlite_master WHERE type = 'table' AND name = 'observation'"
    ).scalar_one()


def test_observation_is_without_rowid_on_sqlite(migrated_engine: Engine) -> None:
    if migrated_engine.dialect.name != "sqlite":
        pytest.skip("rowid tables exist only on SQLite")
    with migrated_engine.connect() as connection:
        assert "WITHOUT ROWID" in _observation_sql(connection).upper()
        # The key is the table's own B-tree: no separate automatic index for it.
        indexes = connection.exec_driver_sql("PRAGMA index_list(observation)").all()
    assert [(row.name, row.origin) for row in indexes] == [("sqlite_autoindex_observation_1", "pk")]


def _observations_and_reads(engine: Engine, cutoffs: list[datetime]) -> tuple[list, list]:
    with engine.connect() as connection:
        rows = [tuple(r) for r in connection.execute(
            select(Observation.measure_id, Observation.region_id, Observation.ref_date,
                   Observation.vintage_id, Observation.value)
            .order_by(Observation.measure_id, Observation.region_id, Observation.ref_date,
                      Observation.vintage_id)
        )]
    reads = []
    with Session(engine) as session:
        for as_of in [*cutoffs, None]:
            dense = read_dense(session=session, measures=["cases", "positivity"],
                               start=date(2030, 3, 1), end=date(2030, 3, 6), as_of=as_of)
            reads.append((dense.regions, dense.dates.tolist(),
                          {k: [None if v != v else v for v in values.ravel().tolist()]
                           for k, values in dense.values.items()}))  # NaN (no value) as None
    return rows, reads


def test_0005_keeps_every_observation_and_as_of_read(
    migrated_engine: Engine, tmp_path: Path
) -> None:
    url = (f"sqlite:///{tmp_path / 'old.db'}" if migrated_engine.dialect.name == "sqlite"
           else migrated_engine.url.render_as_string(hide_password=False))
    at = datetime(2030, 3, 7, 5, 0, tzinfo=UTC)
    cutoffs = [at + timedelta(hours=h) for h in (-1, 0, 12, 24, 48)]
    with scratch_engine(url, prefix="tw_mig") as engine:
        upgrade(engine, "0004")
        with engine.begin() as connection:
            connection.execute(insert(Region.__table__), [
                {"id": k, "code": f"D{k:02d}", "name": f"Invented district {k}",
                 "level": "district", "population": 1000 * k, "attributes": {}}
                for k in (1, 2, 3)])
            connection.execute(insert(Measure.__table__), [
                {"id": 1, "name": "cases", "unit": "n", "kind": "count", "aggregation": "sum",
                 "description": ""},
                {"id": 2, "name": "positivity", "unit": "%", "kind": "level",
                 "aggregation": "mean", "description": ""}])
            rows = []
            for vintage in (1, 2, 3):  # later vintages revise some keys and add new days
                connection.execute(insert(Vintage.__table__).values(
                    id=vintage, feed="invented", source="", received_at=at
                    + timedelta(days=vintage - 1), checksum=f"{vintage:064d}",
                    rows_accepted=0, rows_rejected=0))
                for measure in (1, 2):
                    for region in (1, 2, 3):
                        for day in range(1, 4 + vintage):
                            if (region + day + vintage) % 3 or vintage == 1:
                                rows.append({"measure_id": measure, "region_id": region,
                                             "ref_date": date(2030, 3, day),
                                             "vintage_id": vintage,
                                             "value": 10.0 * vintage + region + day / 8})
            connection.execute(insert(Observation.__table__), rows)
        before = _observations_and_reads(engine, cutoffs)
        upgrade(engine)
        after = _observations_and_reads(engine, cutoffs)
        if engine.dialect.name == "sqlite":
            with engine.connect() as connection:
                assert "WITHOUT ROWID" in _observation_sql(connection).upper()
        config = alembic_config(engine)
        with engine.begin() as connection:
            config.attributes["connection"] = connection
            command.downgrade(config, "0004")
        down = _observations_and_reads(engine, cutoffs)
        if engine.dialect.name == "sqlite":
            with engine.connect() as connection:
                assert "WITHOUT ROWID" not in _observation_sql(connection).upper()
    assert len(before[0]) == len(rows)
    assert len({str(r) for r in before[1]}) > 2  # the as-of reads differ between cutoffs
    assert after == before
    assert down == before


def _measures(engine: Engine) -> list[tuple]:
    with engine.connect() as connection:
        return [tuple(r) for r in connection.execute(
            select(Measure.id, Measure.name, Measure.unit, Measure.kind, Measure.aggregation,
                   Measure.description).order_by(Measure.id))]


def test_0007_pathogen_keeps_every_row_and_as_of_read_and_fills_the_base_measure(
    migrated_engine: Engine, tmp_path: Path
) -> None:
    url = (f"sqlite:///{tmp_path / 'old.db'}" if migrated_engine.dialect.name == "sqlite"
           else migrated_engine.url.render_as_string(hide_password=False))
    at = datetime(2030, 3, 7, 5, 0, tzinfo=UTC)
    cutoffs = [at + timedelta(hours=h) for h in (-1, 0, 12, 24, 48)]
    with scratch_engine(url, prefix="tw_mig") as engine:
        upgrade(engine, "0007")
        with engine.begin() as connection:
            connection.execute(insert(Region.__table__), [
                {"id": k, "code": f"D{k:02d}", "name": f"Invented district {k}",
                 "level": "district", "population": 1000 * k, "attributes": {}}
                for k in (1, 2)])
            # the table before 0007_pathogen: no base, no pathogen
            connection.execute(text(
                "INSERT INTO measure (id, name, unit, kind, aggregation, description) VALUES "
                "(1, 'cases', 'n', 'count', 'sum', ''), "
                "(2, 'positivity', '%', 'level', 'mean', 'invented'), "
                "(3, 'cases.influenza', 'n', 'count', 'sum', '')"))
            rows = []
            for vintage in (1, 2, 3):
                connection.execute(insert(Vintage.__table__).values(
                    id=vintage, feed="invented", source="", received_at=at
                    + timedelta(days=vintage - 1), checksum=f"{vintage:064d}",
                    rows_accepted=0, rows_rejected=0))
                for measure in (1, 2, 3):
                    for region in (1, 2):
                        for day in range(1, 4 + vintage):
                            if (region + day + vintage) % 3 or vintage == 1:
                                rows.append({"measure_id": measure, "region_id": region,
                                             "ref_date": date(2030, 3, day),
                                             "vintage_id": vintage,
                                             "value": 10.0 * vintage + region + day / 8})
            connection.execute(insert(Observation.__table__), rows)
        before = _observations_and_reads(engine, cutoffs), _measures(engine)
        upgrade(engine)
        after = _observations_and_reads(engine, cutoffs), _measures(engine)
        with engine.connect() as connection:
            filled = connection.execute(
                select(Measure.name, Measure.base, Measure.pathogen).order_by(Measure.id)).all()
        config = alembic_config(engine)
        with engine.begin() as connection:
            config.attributes["connection"] = connection
            command.downgrade(config, "0007")
        down = _observations_and_reads(engine, cutoffs), _measures(engine)
    assert len(before[0][0]) == len(rows)
    assert len({str(r) for r in before[0][1]}) > 2  # the as-of reads differ between cutoffs
    assert after == before
    assert down == before
    # an unqualified measure is its own base; one stored before 0007 under a qualified name
    # stays unqualified (its pathogen was never recorded)
    assert [tuple(r) for r in filled] == [("cases", "cases", None),
                                          ("positivity", "positivity", None),
                                          ("cases.influenza", "cases.influenza", None)]
