"""Bulk writes: one ingestion batch becomes one vintage, appended in one transaction.

Query functions take ``session`` keyword-only and never commit; the caller owns the transaction. The
append runs inside a SAVEPOINT, so a failure leaves nothing of the batch behind even when the caller
goes on using the session. Observations go in with PostgreSQL's binary ``COPY`` (built from numpy
arrays, no text formatting) or one SQLite ``executemany``.
"""

from __future__ import annotations

import hashlib
import itertools
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from datetime import datetime

import numpy as np
import pandas as pd
from sqlalchemy import insert, select
from sqlalchemy.orm import Session

from server.store.errors import DuplicateKeyError, UnknownCodeError
from server.store.models import Measure, Region, RejectedRow, Vintage

OBSERVATION_COLUMNS = ("region", "measure", "ref_date", "value")


@dataclass(frozen=True, kw_only=True)
class Rejection:
    """A row that a feed sent and that was not accepted."""

    line: int
    raw: str
    reason: str
    message: str = ""


def checksum_of(content: bytes) -> str:
    """SHA-256 hex digest of a batch's raw content (re-sent identical content is recognised)."""
    return hashlib.sha256(content).hexdigest()


def code_maps(*, session: Session) -> tuple[dict[str, int], dict[str, int]]:
    """Region code -> id and measure name -> id."""
    regions = dict(session.execute(select(Region.code, Region.id)).all())
    measures = dict(session.execute(select(Measure.name, Measure.id)).all())
    return regions, measures


def _resolve(frame: pd.DataFrame, column: str, mapping: Mapping[str, int], kind: str) -> np.ndarray:
    ids = frame[column].map(mapping)
    missing = frame.loc[ids.isna(), column].drop_duplicates().astype(str).tolist()
    if missing:
        raise UnknownCodeError(kind, missing)
    return ids.to_numpy(dtype=np.int64)


def _prepare(
    rows: pd.DataFrame, regions: Mapping[str, int], measures: Mapping[str, int]
) -> pd.DataFrame:
    missing = [c for c in OBSERVATION_COLUMNS if c not in rows.columns]
    if missing:
        raise ValueError(
            f"observation rows lack column(s) {missing}; expected {OBSERVATION_COLUMNS}"
        )
    values = pd.to_numeric(rows["value"], errors="raise").to_numpy(dtype=np.float64)
    if not np.isfinite(values).all():
        raise ValueError("observation values must be finite numbers (missing data is no row)")
    frame = pd.DataFrame(
        {
            "region_id": _resolve(rows, "region", regions, "region"),
            "measure_id": _resolve(rows, "measure", measures, "measure"),
            "ref_date": pd.to_datetime(rows["ref_date"]).dt.date,
            "value": values,
        }
    )
    dup = frame.duplicated(["region_id", "measure_id", "ref_date"], keep=False)
    if dup.any():
        keys = rows.loc[dup, ["region", "measure", "ref_date"]].astype(str)
        raise DuplicateKeyError([tuple(k) for k in keys.drop_duplicates().itertuples(index=False)])
    return frame


def append_vintage(
    *,
    session: Session,
    feed: str,
    received_at: datetime,
    rows: pd.DataFrame,
    checksum: str,
    source: str = "",
    rejections: Iterable[Rejection] = (),
    code_lookup: tuple[Mapping[str, int], Mapping[str, int]] | None = None,
) -> Vintage:
    """Append ``rows`` (columns region, measure, ref_date, value) as one new vintage.

    Rows are written with one bulk statement (COPY on PostgreSQL, executemany on SQLite). Unknown
    codes or duplicate keys raise before anything is written; any failure rolls back to the
    savepoint, so no partial vintage remains. ``code_lookup`` lets a caller appending many
    vintages resolve the catalogue once.
    """
    regions, measures = code_lookup if code_lookup is not None else code_maps(session=session)
    frame = _prepare(rows, regions, measures)
    rejected = list(rejections)
    with session.begin_nested():
        vintage = Vintage(
            feed=feed,
            source=source,
            received_at=received_at,
            checksum=checksum,
            rows_accepted=len(frame),
            rows_rejected=len(rejected),
        )
        session.add(vintage)
        session.flush()
        _bulk_insert_observations(session, vintage.id, frame)
        insert_rejections(session=session, vintage_id=vintage.id, rejections=rejected)
    return vintage


def _bulk_insert_observations(session: Session, vintage_id: int, frame: pd.DataFrame) -> None:
    days = pd.to_datetime(frame["ref_date"]).to_numpy().astype("datetime64[D]").astype(np.int64)
    insert_observation_arrays(
        session=session, vintage_id=vintage_id,
        region_id=frame["region_id"].to_numpy(np.int64),
        measure_id=frame["measure_id"].to_numpy(np.int64),
        day=days, value=frame["value"].to_numpy(np.float64),
    )


def find_vintage_by_checksum(*, session: Session, feed: str, checksum: str) -> Vintage | None:
    """The earliest vintage of ``feed`` with this content checksum, if any."""
    return session.scalars(
        select(Vintage)
        .where(Vintage.feed == feed, Vintage.checksum == checksum)
        .order_by(Vintage.id)
        .limit(1)
    ).first()



COPY_SLICE = 250_000
PG_EPOCH_DAYS = 10_957  # 2000-01-01, day zero of PostgreSQL's binary dates, after 1970-01-01
COPY_HEADER = b"PGCOPY\n\xff\r\n\x00" + b"\x00" * 8  # signature, flags, no header extension
COPY_TRAILER = b"\xff\xff"
# One tuple of COPY ... (FORMAT binary): field count, then length and big-endian value per field.
COPY_ROW = np.dtype([
    ("fields", ">i2"),
    ("n_vintage", ">i4"), ("vintage", ">i8"),
    ("n_region", ">i4"), ("region", ">i4"),
    ("n_measure", ">i4"), ("measure", ">i4"),
    ("n_date", ">i4"), ("date", ">i4"),
    ("n_value", ">i4"), ("value", ">f8"),
])


def copy_rows(
    vintage_id: int, region_id: np.ndarray, measure_id: np.ndarray, day: np.ndarray,
    value: np.ndarray,
) -> bytes:
    """Tuples of PostgreSQL's binary COPY format for ``observation`` (no header, no trailer).

    Columns in the order (vintage_id bigint, region_id integer, measure_id integer, ref_date date,
    value double precision); ``day`` is days since 1970-01-01.
    """
    rows = np.empty(np.asarray(day).size, dtype=COPY_ROW)
    rows["fields"] = 5
    for name, size in (("n_vintage", 8), ("n_region", 4), ("n_measure", 4), ("n_date", 4),
                       ("n_value", 8)):
        rows[name] = size
    rows["vintage"] = vintage_id
    rows["region"] = region_id
    rows["measure"] = measure_id
    rows["date"] = np.asarray(day, dtype=np.int64) - PG_EPOCH_DAYS
    rows["value"] = value
    return rows.tobytes()


def _iso_dates(day: np.ndarray) -> list[str]:
    """``YYYY-MM-DD`` of each day number, formatting each distinct day once."""
    low, high = int(day.min()), int(day.max())
    if high - low > 4 * day.size:  # sparse days: format them one by one
        return day.astype("datetime64[D]").astype(str).tolist()  # type: ignore[no-any-return]
    table = np.arange(low, high + 1).astype("datetime64[D]").astype(str).astype(object)
    return table[day - low].tolist()  # type: ignore[no-any-return]


def insert_observation_arrays(
    *,
    session: Session,
    vintage_id: int,
    region_id: np.ndarray,
    measure_id: np.ndarray,
    day: np.ndarray,
    value: np.ndarray,
) -> int:
    """Bulk-insert resolved observations of one (already flushed) vintage; returns the count.

    ``day`` is days since 1970-01-01. The arrays are not checked again: the caller has checked
    them (codes resolved, keys unique, values finite). On PostgreSQL one binary ``COPY``, fed in
    slices of :data:`COPY_SLICE` rows; on SQLite one ``executemany`` on the driver connection,
    in primary-key order.
    Both run inside the session's transaction.
    """
    n = int(np.asarray(day).size)
    if n == 0:
        return 0
    connection = session.connection()
    raw = connection.connection.driver_connection
    if connection.dialect.name == "postgresql":
        with raw.cursor() as cursor:  # type: ignore[union-attr]
            with cursor.copy(
                "COPY observation (vintage_id, region_id, measure_id, ref_date, value) "
                "FROM STDIN WITH (FORMAT binary)"
            ) as copy:
                copy.write(COPY_HEADER)
                for start in range(0, n, COPY_SLICE):
                    part = slice(start, start + COPY_SLICE)
                    copy.write(copy_rows(vintage_id, region_id[part], measure_id[part],
                                         day[part], value[part]))
                copy.write(COPY_TRAILER)
        return n
    # In key order (measure, region, day): the WITHOUT ROWID table's B-tree then grows by
    # appending instead of splitting pages all over (the insert alone of 2 M rows that came in
    # date order: 5.0 -> 3.1 s, measured twice on a shared 2-core machine).
    order = np.lexsort((np.asarray(day), np.asarray(region_id), np.asarray(measure_id)))
    region_id, measure_id = np.asarray(region_id)[order], np.asarray(measure_id)[order]
    day, value = np.asarray(day)[order], np.asarray(value)[order]
    dates = _iso_dates(np.asarray(day, dtype=np.int64))
    cursor = raw.cursor()  # type: ignore[union-attr]
    try:
        cursor.execute("PRAGMA cache_size=-262144")  # 256 MiB of page cache for index builds
        cursor.executemany(
            "INSERT INTO observation (vintage_id, region_id, measure_id, ref_date, value) "
            "VALUES (?, ?, ?, ?, ?)",
            zip(
                itertools.repeat(vintage_id, n), np.asarray(region_id).tolist(),
                np.asarray(measure_id).tolist(), dates,
                np.asarray(value, dtype=np.float64).tolist(), strict=True,
            ),
        )
    finally:
        cursor.close()
    return n


def insert_rejections(
    *, session: Session, vintage_id: int, rejections: Iterable[Rejection]
) -> int:
    """Bulk-insert rejected rows of one vintage; returns the count."""
    rows = [
        {"vintage_id": vintage_id, "line": r.line, "raw": r.raw, "reason": r.reason,
         "message": r.message}
        for r in rejections
    ]
    if rows:
        session.execute(insert(RejectedRow), rows)
    return len(rows)
