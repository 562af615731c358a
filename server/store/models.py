"""SQLAlchemy 2 typed models of the bitemporal, append-only data model (DESIGN.md).

Observations are never updated in place: every ingestion batch is a :class:`Vintage`, and the
"current" value of a key is the one in its latest vintage. Rulesets are stored with their YAML text
and SHA-256 and are never edited; decisions and the audit log are append-only.
"""

from __future__ import annotations

from datetime import date, datetime
from typing import Any

from sqlalchemy import (
    JSON,
    BigInteger,
    Boolean,
    Date,
    Float,
    ForeignKey,
    Index,
    Integer,
    LargeBinary,
    String,
    Text,
    Unicode,
    UniqueConstraint,
)
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column, relationship

from server.store.types import UTCDateTime

# SQLite only autoincrements INTEGER PRIMARY KEY; PostgreSQL gets a BIGINT identity.
BigId = BigInteger().with_variant(Integer(), "sqlite")


class Base(DeclarativeBase):
    """Declarative base of every tierwise table."""

    type_annotation_map = {dict[str, Any]: JSON}


class Region(Base):
    """A district, region, county or wastewater plant; ``parent`` makes the hierarchy."""

    __tablename__ = "region"

    id: Mapped[int] = mapped_column(primary_key=True)
    code: Mapped[str] = mapped_column(String(64), unique=True)
    name: Mapped[str] = mapped_column(String(200))
    level: Mapped[str] = mapped_column(String(32), index=True)
    parent_id: Mapped[int | None] = mapped_column(ForeignKey("region.id"), index=True)
    population: Mapped[int] = mapped_column(BigInteger)
    geometry: Mapped[dict[str, Any] | None] = mapped_column(JSON)
    attributes: Mapped[dict[str, Any]] = mapped_column(JSON, default=dict)

    parent: Mapped[Region | None] = relationship(remote_side=[id])


class Catchment(Base):
    """Share of a district's population served by a wastewater plant (plants are regions)."""

    __tablename__ = "catchment"

    plant_id: Mapped[int] = mapped_column(ForeignKey("region.id"), primary_key=True)
    district_id: Mapped[int] = mapped_column(ForeignKey("region.id"), primary_key=True)
    share: Mapped[float] = mapped_column(Float)


class Measure(Base):
    """Catalogue entry for something a feed reports (``cases``, ``icu_occupied``, ...)."""

    __tablename__ = "measure"

    id: Mapped[int] = mapped_column(primary_key=True)
    name: Mapped[str] = mapped_column(String(64), unique=True)
    unit: Mapped[str] = mapped_column(String(64))
    kind: Mapped[str] = mapped_column(String(32))  # count | level | concentration
    aggregation: Mapped[str] = mapped_column(String(16))  # sum | mean | none
    description: Mapped[str] = mapped_column(Text, default="")
    # The measure this one qualifies (``cases`` for ``cases.influenza``; else the name itself)
    # and the pathogen or surveillance stream it concerns (None: unqualified). Revision 0007.
    # (:func:`server.store.catalogue.upsert_measures` sets it.)
    base: Mapped[str] = mapped_column(String(64), index=True, server_default="")
    pathogen: Mapped[str | None] = mapped_column(String(40), default=None)


class Vintage(Base):
    """One ingestion batch: everything one feed said at one time."""

    __tablename__ = "vintage"

    id: Mapped[int] = mapped_column(BigId, primary_key=True)
    feed: Mapped[str] = mapped_column(String(100), index=True)
    source: Mapped[str] = mapped_column(String(500), default="")
    received_at: Mapped[datetime] = mapped_column(UTCDateTime(), index=True)
    checksum: Mapped[str] = mapped_column(String(64), index=True)
    rows_accepted: Mapped[int] = mapped_column(Integer, default=0)
    rows_rejected: Mapped[int] = mapped_column(Integer, default=0)


class Observation(Base):
    """A value of a measure for a region and reference date, as told by one vintage.

    The largest table, written in bulk: its primary key (measure, region, ref_date, vintage) is the
    "one value per key and vintage" rule and the access path of as-of reads; there is no surrogate
    id. ``region_id``, ``measure_id`` and ``vintage_id`` carry no foreign-key constraints, each of
    which costs a lookup per row in a bulk load (on PostgreSQL they tripled the time of a COPY):
    every writer resolves codes against the catalogue first
    (:func:`server.store.vintages.code_maps`) and writes the vintage row in the same transaction,
    and no row of region, measure or vintage is ever deleted.

    On SQLite the table is ``WITHOUT ROWID`` (revision 0005): the primary key is the table's own
    B-tree, so a bulk insert writes one B-tree instead of a rowid table plus the key's index.
    """

    __tablename__ = "observation"
    __table_args__ = {"sqlite_with_rowid": False}

    measure_id: Mapped[int] = mapped_column(Integer, primary_key=True)
    region_id: Mapped[int] = mapped_column(Integer, primary_key=True)
    ref_date: Mapped[date] = mapped_column(Date, primary_key=True)
    vintage_id: Mapped[int] = mapped_column(BigId, primary_key=True)
    value: Mapped[float] = mapped_column(Float)


class RejectedRow(Base):
    """A row a feed sent that was not accepted, with the reason a clerk can act on."""

    __tablename__ = "rejected_row"

    id: Mapped[int] = mapped_column(BigId, primary_key=True)
    vintage_id: Mapped[int] = mapped_column(
        ForeignKey("vintage.id", ondelete="CASCADE"), index=True
    )
    line: Mapped[int] = mapped_column(Integer)
    raw: Mapped[str] = mapped_column(Text)
    reason: Mapped[str] = mapped_column(String(64))
    message: Mapped[str] = mapped_column(Text, default="")


class Ruleset(Base):
    """A tier policy version; the YAML text and its SHA-256 are never edited."""

    __tablename__ = "ruleset"
    __table_args__ = (UniqueConstraint("name", "version"),)

    id: Mapped[int] = mapped_column(primary_key=True)
    name: Mapped[str] = mapped_column(String(100))
    version: Mapped[str] = mapped_column(String(32))
    yaml_text: Mapped[str] = mapped_column(Text)
    sha256: Mapped[str] = mapped_column(String(64), index=True)
    author: Mapped[str] = mapped_column(String(100), default="")
    created_at: Mapped[datetime] = mapped_column(UTCDateTime())
    status: Mapped[str] = mapped_column(String(16), default="draft")  # draft | active | retired


class Assessment(Base):
    """The engine's recommendation for one region and day, reproducible from its data cutoff."""

    __tablename__ = "assessment"
    __table_args__ = (
        UniqueConstraint("ruleset_id", "region_id", "ref_date", "data_cutoff"),
        Index("ix_assessment_ruleset_day", "ruleset_id", "ref_date", "region_id", "data_cutoff"),
    )

    id: Mapped[int] = mapped_column(BigId, primary_key=True)
    ruleset_id: Mapped[int] = mapped_column(ForeignKey("ruleset.id"))
    region_id: Mapped[int] = mapped_column(ForeignKey("region.id"), index=True)
    ref_date: Mapped[date] = mapped_column(Date, index=True)
    data_cutoff: Mapped[datetime] = mapped_column(UTCDateTime())
    recommended_tier: Mapped[int] = mapped_column(Integer)
    previous_tier: Mapped[int | None] = mapped_column(Integer)
    criteria: Mapped[dict[str, Any]] = mapped_column(JSON, default=dict)
    prepare_signals: Mapped[dict[str, Any]] = mapped_column(JSON, default=dict)
    explanation: Mapped[dict[str, Any]] = mapped_column(JSON, default=dict)
    # SHA-256 of everything above but the cutoff; None on rows stored before revision 0003.
    content_sha256: Mapped[str | None] = mapped_column(String(64))
    created_at: Mapped[datetime] = mapped_column(UTCDateTime())


class EvaluationRun(Base):
    """One evaluation of a ruleset at a data cutoff; it stores only the assessments that changed.

    The assessment of a region and day as of a run is the row with the greatest ``data_cutoff``
    not after the run's cutoff.
    """

    __tablename__ = "evaluation_run"
    __table_args__ = (UniqueConstraint("ruleset_id", "data_cutoff"),)

    id: Mapped[int] = mapped_column(BigId, primary_key=True)
    ruleset_id: Mapped[int] = mapped_column(ForeignKey("ruleset.id"))
    data_cutoff: Mapped[datetime] = mapped_column(UTCDateTime())
    first_day: Mapped[date] = mapped_column(Date)
    last_day: Mapped[date] = mapped_column(Date)
    rows_written: Mapped[int] = mapped_column(Integer)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime())
    #: the newest run's packed fingerprints (``server/services/run_fingerprints.py``), read
    #: only by the next run; None on every other run
    fingerprints: Mapped[bytes | None] = mapped_column(LargeBinary, deferred=True)


class User(Base):
    """A staff account; roles are viewer, analyst, approver and admin."""

    __tablename__ = "app_user"

    id: Mapped[int] = mapped_column(primary_key=True)
    name: Mapped[str] = mapped_column(String(100), unique=True)
    role: Mapped[str] = mapped_column(String(16))
    password_hash: Mapped[str] = mapped_column(String(200))
    active: Mapped[bool] = mapped_column(Boolean, default=True)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime())
    # Signed into every session token; bumped on logout, role change, enabling or disabling and
    # password change, which refuses every session issued before (server/services/auth.py).
    session_generation: Mapped[int] = mapped_column(Integer, default=0, server_default="0")


class Decision(Base):
    """The official tier of a region from an effective date, confirmed or overridden by a person."""

    __tablename__ = "decision"
    __table_args__ = (
        Index("ix_decision_policy_region_day", "policy", "region_id", "effective_date"),
    )

    id: Mapped[int] = mapped_column(BigId, primary_key=True)
    #: The policy (ruleset name) the decision belongs to: each policy has its own official tiers
    #: (revision 0010_decision_policy).
    policy: Mapped[str] = mapped_column(String(100))
    region_id: Mapped[int] = mapped_column(ForeignKey("region.id"), index=True)
    assessment_id: Mapped[int | None] = mapped_column(ForeignKey("assessment.id"))
    effective_date: Mapped[date] = mapped_column(Date)
    tier: Mapped[int] = mapped_column(Integer)
    kind: Mapped[str] = mapped_column(String(16))  # confirmed | overridden
    reason: Mapped[str] = mapped_column(Text)
    decided_by: Mapped[int | None] = mapped_column(ForeignKey("app_user.id"))
    decided_at: Mapped[datetime] = mapped_column(UTCDateTime())
    published_at: Mapped[datetime | None] = mapped_column(UTCDateTime())


class RecordedEvent(Base):
    """A dated fact about a region recorded by staff (a measure starts or ends, school holidays,
    a change of testing criteria), for before/after estimates. Published tier changes are read
    from ``decision`` and never copied here. Append-only, like the audit log."""

    __tablename__ = "recorded_event"

    id: Mapped[int] = mapped_column(BigId, primary_key=True)
    region_id: Mapped[int] = mapped_column(ForeignKey("region.id"), index=True)
    day: Mapped[date] = mapped_column(Date, index=True)
    kind: Mapped[str] = mapped_column(String(32))
    note: Mapped[str] = mapped_column(Text)
    recorded_by: Mapped[int | None] = mapped_column(ForeignKey("app_user.id"))
    recorded_at: Mapped[datetime] = mapped_column(UTCDateTime())


class TestingChangeReview(Base):
    """An analyst's verdict on a detected testing change of a district: ``confirmed`` or
    ``dismissed``. Append-only; the newest verdict on a change counts from ``office_day`` (the
    office's day it was given) on, never for the days before (as known)."""

    __tablename__ = "testing_change_review"
    __test__ = False  # not a pytest class despite its name

    id: Mapped[int] = mapped_column(BigId, primary_key=True)
    region_id: Mapped[int] = mapped_column(ForeignKey("region.id"), index=True)
    change_day: Mapped[date] = mapped_column(Date)
    verdict: Mapped[str] = mapped_column(String(16))
    note: Mapped[str] = mapped_column(Text)
    office_day: Mapped[date] = mapped_column(Date)
    reviewed_by: Mapped[int | None] = mapped_column(ForeignKey("app_user.id"))
    reviewed_at: Mapped[datetime] = mapped_column(UTCDateTime(), index=True)


class AuditEntry(Base):
    """Append-only log of who did what."""

    __tablename__ = "audit"

    id: Mapped[int] = mapped_column(BigId, primary_key=True)
    at: Mapped[datetime] = mapped_column(UTCDateTime(), index=True)
    actor: Mapped[str] = mapped_column(String(100))
    action: Mapped[str] = mapped_column(String(64))
    subject: Mapped[str] = mapped_column(String(200), default="")
    details: Mapped[dict[str, Any]] = mapped_column(JSON, default=dict)


class FeedState(Base):
    """What a feed's source last said about itself (ETag, Last-Modified) and how its runs went."""

    __tablename__ = "feed_state"

    feed: Mapped[str] = mapped_column(String(100), primary_key=True)
    etag: Mapped[str | None] = mapped_column(String(500))
    last_modified: Mapped[str | None] = mapped_column(String(100))
    last_attempt_at: Mapped[datetime | None] = mapped_column(UTCDateTime())
    last_success_at: Mapped[datetime | None] = mapped_column(UTCDateTime())
    last_error: Mapped[str] = mapped_column(Text, default="")
    failures: Mapped[int] = mapped_column(Integer, default=0)
    last_vintage_id: Mapped[int | None] = mapped_column(
        ForeignKey("vintage.id", ondelete="SET NULL")
    )


class FeedToken(Base):
    """The bearer token of a push feed, stored only as its SHA-256 (the token is random)."""

    __tablename__ = "feed_token"

    feed: Mapped[str] = mapped_column(String(100), primary_key=True)
    token_sha256: Mapped[str] = mapped_column(String(64))
    created_at: Mapped[datetime] = mapped_column(UTCDateTime())
    created_by: Mapped[str] = mapped_column(String(100), default="")


class SchedulerLease(Base):
    """Leader lease of the scheduler on SQLite (PostgreSQL uses an advisory lock instead)."""

    __tablename__ = "scheduler_lease"

    name: Mapped[str] = mapped_column(String(100), primary_key=True)
    holder: Mapped[str] = mapped_column(String(200))
    expires_at: Mapped[datetime] = mapped_column(UTCDateTime())


class SchedulerJob(Base):
    """APScheduler 3.x SQLAlchemyJobStore's table, declared here so migrations own it."""

    __tablename__ = "apscheduler_jobs"

    id: Mapped[str] = mapped_column(Unicode(191), primary_key=True)
    next_run_time: Mapped[float | None] = mapped_column(Float(25), index=True)
    job_state: Mapped[bytes] = mapped_column(LargeBinary)


class BacktestJob(Base):
    """A background backtest of the Policies page, so that every web worker can answer for it.

    ``worker`` names the process running it; it refreshes ``heartbeat_at`` while the job is
    queued or running, so a job whose process died shows as abandoned. ``results`` holds the
    figures of a finished job (zlib-compressed JSON, server/services/backtest_jobs.py).
    """

    __tablename__ = "backtest_job"

    id: Mapped[str] = mapped_column(String(32), primary_key=True)
    ruleset_id: Mapped[int] = mapped_column(ForeignKey("ruleset.id"))
    compare_id: Mapped[int | None] = mapped_column(ForeignKey("ruleset.id"))
    as_known: Mapped[bool] = mapped_column(Boolean)
    user_name: Mapped[str] = mapped_column(String(100))
    created_at: Mapped[datetime] = mapped_column(UTCDateTime(), index=True)
    state: Mapped[str] = mapped_column(String(16))  # queued | running | done | failed
    done: Mapped[int] = mapped_column(Integer, default=0)
    total: Mapped[int] = mapped_column(Integer)
    error: Mapped[str | None] = mapped_column(Text)
    worker: Mapped[str] = mapped_column(String(200))
    heartbeat_at: Mapped[datetime] = mapped_column(UTCDateTime())
    finished_at: Mapped[datetime | None] = mapped_column(UTCDateTime())
    results: Mapped[bytes | None] = mapped_column(LargeBinary)


class LoginAttempt(Base):
    """One login attempt, stored (and committed) before its password is checked.

    ``outcome`` is ``pending`` while the password is being checked, then ``failed``, ``ok``,
    ``limited`` (refused by the rate limit, password never checked) or ``cleared`` (a failure
    forgiven by a later successful login of the same name from the same address). Pending and
    failed attempts count against the limits (server/services/auth.py).
    """

    __tablename__ = "login_attempt"
    __table_args__ = (Index("ix_login_attempt_client_at", "client", "at"),)

    id: Mapped[int] = mapped_column(BigId, primary_key=True)
    at: Mapped[datetime] = mapped_column(UTCDateTime(), index=True)
    client: Mapped[str] = mapped_column(String(100))
    name_key: Mapped[str] = mapped_column(String(100))
    outcome: Mapped[str] = mapped_column(String(8))


class ForecastRun(Base):
    """One stored forecast: a target under a scenario, made at a data cutoff (revision 0007).

    ``horizons`` and ``levels`` are the forecast's days ahead of ``origin`` and its quantile
    levels (JSON lists); each region's quantiles are a :class:`ForecastQuantiles` row. A rerun
    at the same (target, scenario, cutoff) replaces the run and its rows
    (server/services/forecast_record.py), so there is one forecast per key.
    """

    __tablename__ = "forecast_run"
    __table_args__ = (
        UniqueConstraint("target", "scenario", "data_cutoff"),
        Index("ix_forecast_run_target_origin", "target", "scenario", "origin"),
    )

    id: Mapped[int] = mapped_column(BigId, primary_key=True)
    target: Mapped[str] = mapped_column(String(64))
    scenario: Mapped[str] = mapped_column(String(64))
    data_cutoff: Mapped[datetime] = mapped_column(UTCDateTime())
    origin: Mapped[date] = mapped_column(Date)
    forecaster: Mapped[str] = mapped_column(String(100))
    horizons: Mapped[list[int]] = mapped_column(JSON)
    levels: Mapped[list[float]] = mapped_column(JSON)
    created_at: Mapped[datetime] = mapped_column(UTCDateTime())


class ForecastQuantiles(Base):
    """One region's quantiles of a :class:`ForecastRun`, with the naive baseline.

    ``quantiles`` holds the (horizons x levels) values as little-endian float64, horizon-major
    (one row per region and run instead of one per horizon and level: 27 000 rows a morning for
    3 000 regions, 3 targets and 3 scenarios rather than 2.8 million). ``baseline`` is the mean
    of the target over the 7 days ending at the origin as known at the cutoff (NaN stored as
    NULL), the naive forecast the record compares with.
    """

    __tablename__ = "forecast_quantiles"
    __table_args__ = (Index("ix_forecast_quantiles_region", "region_id", "run_id"),)

    run_id: Mapped[int] = mapped_column(
        ForeignKey("forecast_run.id", ondelete="CASCADE"), primary_key=True
    )
    region_id: Mapped[int] = mapped_column(Integer, primary_key=True)
    baseline: Mapped[float | None] = mapped_column(Float)
    quantiles: Mapped[bytes] = mapped_column(LargeBinary)
