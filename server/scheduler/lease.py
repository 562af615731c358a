"""The scheduler's leader lease: exactly one scheduler instance runs the jobs at a time."""

from __future__ import annotations

import hashlib
from datetime import UTC, datetime, timedelta

from sqlalchemy import delete, text, update
from sqlalchemy.exc import IntegrityError

from server.services.database import Database
from server.store.models import SchedulerLease


class LeaderLease:
    """Exactly one scheduler instance holds the lease; the others wait and take over.

    On PostgreSQL a session-level advisory lock (``pg_try_advisory_lock``) held on a dedicated
    connection: it goes when the holder's connection does, so a dead holder frees it at once. On
    SQLite a ``scheduler_lease`` row with an expiry that the holder renews; another instance takes
    the row once it has expired.
    """

    def __init__(self, db: Database, *, name: str, holder: str, ttl_seconds: float = 30.0) -> None:
        if ttl_seconds <= 0:
            raise ValueError(f"ttl_seconds must be positive, got {ttl_seconds}")
        self.db = db
        self.name = name
        self.holder = holder
        self.ttl = ttl_seconds
        self._pg = db.engine.dialect.name == "postgresql"
        self._connection = None  # type: ignore[var-annotated]
        self.key = int.from_bytes(hashlib.sha256(name.encode()).digest()[:8], "big", signed=True)

    def acquire(self, now: datetime | None = None) -> bool:
        """Take or renew the lease; True while this instance is the leader."""
        return self._acquire_pg() if self._pg else self._acquire_row(now or datetime.now(UTC))

    def release(self) -> None:
        if self._pg:
            if self._connection is not None:
                try:
                    self._connection.execute(
                        text("SELECT pg_advisory_unlock(:k)"), {"k": self.key}
                    )
                finally:
                    self._connection.close()
                    self._connection = None
            return
        with self.db.transaction() as session:
            session.execute(
                delete(SchedulerLease).where(
                    SchedulerLease.name == self.name, SchedulerLease.holder == self.holder
                )
            )

    def abandon(self) -> None:
        """Drop the lease as a crashed holder would: close the lock's connection, no unlock
        (PostgreSQL frees the lock); on SQLite the row is left to expire."""
        if self._connection is not None:
            self._connection.connection.dbapi_connection.close()  # type: ignore[union-attr]
            self._connection.invalidate()
            self._connection = None

    def _acquire_pg(self) -> bool:
        if self._connection is not None:
            try:
                self._connection.execute(text("SELECT 1"))
                return True
            except Exception:  # the connection died: leadership is gone with it
                self._connection = None
                return False
        connection = self.db.engine.connect().execution_options(isolation_level="AUTOCOMMIT")
        got = bool(connection.execute(
            text("SELECT pg_try_advisory_lock(:k)"), {"k": self.key}
        ).scalar())
        if got:
            self._connection = connection
        else:
            connection.close()
        return got

    def _acquire_row(self, now: datetime) -> bool:
        expires = now + timedelta(seconds=self.ttl)
        with self.db.transaction() as session:
            taken = session.execute(
                update(SchedulerLease)
                .where(
                    SchedulerLease.name == self.name,
                    (SchedulerLease.holder == self.holder) | (SchedulerLease.expires_at < now),
                )
                .values(holder=self.holder, expires_at=expires)
            ).rowcount
            if taken:
                return True
            if session.get(SchedulerLease, self.name) is not None:
                return False
            try:
                with session.begin_nested():
                    session.add(SchedulerLease(name=self.name, holder=self.holder,
                                               expires_at=expires))
            except IntegrityError:
                return False
            return True
