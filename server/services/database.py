"""The application's database handle: engine and sessionmaker built from settings."""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass

from sqlalchemy import Engine, text
from sqlalchemy.orm import Session, sessionmaker

from server.config import Settings
from server.services.errors import NotADemoDatabaseError, SchemaOutOfDateError
from server.store import (
    check_connection,
    current_revision,
    head_revision,
    make_engine,
    make_sessionmaker,
    upgrade,
)


@dataclass(frozen=True)
class Database:
    """An engine and its sessionmaker; built in entry points and handed down."""

    engine: Engine
    sessions: sessionmaker[Session]

    @classmethod
    def from_settings(cls, settings: Settings) -> Database:
        engine = make_engine(settings.database_url, echo=settings.sql_echo)
        return cls(engine=engine, sessions=make_sessionmaker(engine))

    @contextmanager
    def transaction(self) -> Iterator[Session]:
        """A session whose work is committed at the end, or rolled back on error."""
        with self.sessions.begin() as session:
            yield session

    def ping(self) -> None:
        """Run ``SELECT 1`` in a short session; raises the driver's error when the database does
        not answer (liveness for ``/healthz``)."""
        with self.sessions() as session:
            session.execute(text("SELECT 1"))

    def check(self) -> None:
        """Fail with one clear line when the database does not answer or is not migrated."""
        check_connection(self.engine)
        current, head = current_revision(self.engine), head_revision(self.engine)
        if current != head:
            raise SchemaOutOfDateError(current, head)

    def upgrade(self) -> str | None:
        """Apply pending migrations; returns the revision reached."""
        check_connection(self.engine)
        upgrade(self.engine)
        return current_revision(self.engine)

    def dispose(self) -> None:
        self.engine.dispose()


DEMO_MARK = "demo.seed"


def recreate_demo_schema(db: Database) -> None:
    """Drop and recreate every table, but only in an empty database or one the demo seeded."""
    from sqlalchemy import inspect, select, text

    from server.store.models import AuditEntry, Base, Region

    check_connection(db.engine)
    tables = set(inspect(db.engine).get_table_names())
    if "region" in tables:
        with db.sessions() as session:
            has_regions = session.scalar(select(Region.id).limit(1)) is not None
            seeded = "audit" in tables and (
                session.scalar(select(AuditEntry.id).where(AuditEntry.action == DEMO_MARK).limit(1))
                is not None
            )
        if has_regions and not seeded:
            raise NotADemoDatabaseError(db.engine.url.render_as_string(hide_password=True))
    Base.metadata.drop_all(db.engine)
    with db.engine.begin() as connection:
        connection.execute(text("DROP TABLE IF EXISTS alembic_version"))
    db.upgrade()
