"""Use case: take in one feed file — validate every row, land the good ones as one vintage.

One payload (a file, an HTTP body, a push) becomes at most one vintage, written in one transaction
inside a SAVEPOINT: either every accepted row and every rejected row is stored, or nothing is (a
killed process leaves no partial vintage). Content identical to an earlier vintage of the same
feed (same SHA-256) is a no-op. Rows are read in blocks, so memory stays bounded by the compact
arrays of accepted rows (about 40 bytes a row) rather than by the file's text.

A vintage taken in without an explicit time is stamped (``received_at``) at the end of its
transaction, in commit order: on SQLite the transaction holds the database's write lock from its
first row on; on PostgreSQL the stamp is taken under an advisory lock held until commit. So a
vintage committed after an evaluation always has a later ``received_at`` than that evaluation's
cutoff, and the check for unevaluated data (:func:`server.services.evaluation.evaluate_if_behind`)
cannot miss it.

After a payload is committed (landed, or identical to a stored vintage),
:func:`ingest_and_evaluate` runs :func:`~server.services.evaluation.evaluate_if_behind` in its own
transaction: re-running an ingest whose process was killed after its commit evaluates what the
killed run did not.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from datetime import UTC, date, datetime, timedelta
from typing import BinaryIO

import numpy as np
from sqlalchemy import func, select, text, type_coerce
from sqlalchemy.orm import Session

from server.feeds.definition import FeedDefinition
from server.feeds.errors import EmptyFileError
from server.feeds.file_checks import FileCheck, check_file, check_stored_pairs, unpaired
from server.feeds.parser import read_chunks, read_raw_records
from server.feeds.sources import Payload
from server.feeds.validation import EPOCH, Accepted, Catalogue, validate_chunk
from server.services.audit import record
from server.services.database import Database
from server.services.evaluation import EvaluationRun, evaluate_if_behind
from server.services.notify import NotifyConfig
from server.services.revisions import (
    Precedence,
    RevisedValue,
    RevisionCheck,
    UnconfirmedRevisionsError,
    check_revisions,
)
from server.store.models import Measure, Region, Vintage
from server.store.reads import newest_values
from server.store.types import UTCDateTime
from server.store.vintages import (
    Rejection,
    find_vintage_by_checksum,
    insert_observation_arrays,
    insert_rejections,
)

KEPT_REJECTIONS = 1000
#: Key of the PostgreSQL advisory lock under which a vintage is stamped (held until commit).
STAMP_LOCK_KEY = int.from_bytes(
    hashlib.sha256(b"tierwise-vintage-stamp").digest()[:8], "big", signed=True
)
NO_DATA_ROWS = "no data rows: the file holds a header (or an empty list) and no rows to take in"
Progress = Callable[[int], None]


@dataclass(frozen=True, kw_only=True)
class ReasonCount:
    """How many rows were rejected for one reason, with the first few line numbers."""

    reason: str
    count: int
    first_lines: tuple[int, ...]
    example: str


@dataclass(frozen=True, kw_only=True)
class IngestReceipt:
    """What happened to one payload (the push API answers with it; the CLI prints it)."""

    feed: str
    source: str
    checksum: str
    received_at: datetime
    vintage_id: int | None
    unchanged: bool
    dry_run: bool
    rows_accepted: int
    rows_rejected: int
    reasons: tuple[ReasonCount, ...]
    rejections: tuple[Rejection, ...]  # the first KEPT_REJECTIONS, in line order
    # ``line`` (CSV) or ``record`` (JSON: position in the list): what ``Rejection.line`` counts
    unit: str = "line"
    #: stored values this payload revises (old -> new, and the feed that sent the old one), the
    #: first KEPT_REVISIONS; ``revised`` counts all, ``revised_other_feeds`` those another feed
    #: sent (``server/services/revisions.py``)
    revisions: tuple[RevisedValue, ...] = ()
    revised: int = 0
    revised_other_feeds: int = 0
    #: what a confirmation of those revisions sends back (empty: nothing to confirm)
    revisions_digest: str = ""

    @property
    def identical_to(self) -> int | None:
        """The stored vintage this payload is identical to (None: it was taken in).

        An unchanged receipt counts nothing (0 accepted, 0 rejected, no reasons): this payload
        added no rows; the identical vintage's own counts are on the feeds page.
        """
        return self.vintage_id if self.unchanged else None

    @property
    def whole_file_rejected(self) -> bool:
        return not self.unchanged and self.rows_accepted == 0 and self.rows_rejected > 0


def catalogue_of(*, session: Session) -> Catalogue:
    """The region and measure codes the store knows, and which measures are counts."""
    regions = dict(session.execute(select(Region.code, Region.id)).all())
    measures = session.execute(select(Measure.name, Measure.id, Measure.kind)).all()
    return Catalogue(
        regions=regions, measures={name: mid for name, mid, _ in measures},
        counts=frozenset(name for name, _, kind in measures if kind == "count"),
    )


class _Counting:
    """A binary stream that reports bytes read (for progress bars)."""

    def __init__(self, stream: BinaryIO, progress: Progress) -> None:
        self._stream = stream
        self._progress = progress

    def read(self, n: int = -1) -> bytes:
        data = self._stream.read(n)
        self._progress(len(data))
        return data


class _Tally:
    def __init__(self) -> None:
        self.count: dict[str, int] = {}
        self.lines: dict[str, list[int]] = {}
        self.example: dict[str, str] = {}
        self.kept: list[Rejection] = []
        self.total = 0

    def add(self, rejections: list[Rejection]) -> None:
        for r in rejections:
            self.count[r.reason] = self.count.get(r.reason, 0) + 1
            lines = self.lines.setdefault(r.reason, [])
            if len(lines) < 5:
                lines.append(r.line)
                self.example.setdefault(r.reason, r.message)
        self.total += len(rejections)
        room = KEPT_REJECTIONS - len(self.kept)
        if room > 0:
            self.kept.extend(rejections[:room])

    def reasons(self) -> tuple[ReasonCount, ...]:
        return tuple(
            ReasonCount(reason=k, count=v, first_lines=tuple(sorted(self.lines[k])),
                        example=self.example[k])
            for k, v in sorted(self.count.items(), key=lambda kv: (-kv[1], kv[0]))
        )


def stamp_in_commit_order(*, session: Session) -> datetime:
    """A ``received_at`` later than every committed vintage's, taken so that it stays the latest
    until this transaction commits (module docstring).

    PostgreSQL: under ``pg_advisory_xact_lock`` (:data:`STAMP_LOCK_KEY`), held until the
    transaction ends, so the next stamp is taken after this vintage is committed or gone.
    SQLite: the ingest transaction already holds the write lock. The stamp is the clock, or one
    microsecond past the newest stored stamp when the clock is not ahead of it.
    """
    if session.get_bind().dialect.name == "postgresql":
        session.execute(text("SELECT pg_advisory_xact_lock(:k)"), {"k": STAMP_LOCK_KEY})
    now = datetime.now(UTC)
    newest = session.scalar(select(type_coerce(func.max(Vintage.received_at), UTCDateTime())))
    return now if newest is None or now > newest else newest + timedelta(microseconds=1)


def ingest_payload(
    *, session: Session, feed: FeedDefinition, payload: Payload, received_at: datetime,
    today: date, dry_run: bool = False, progress: Progress | None = None,
    stamp: bool = False, precedence: Precedence | None = None,
    confirm_other_feeds: bool = False, confirmed: str = "",
) -> IngestReceipt:
    """Validate ``payload`` against ``feed`` and land it as one vintage (never commits).

    With ``stamp``, the vintage's ``received_at`` is set at the end, in commit order
    (:func:`stamp_in_commit_order`); ``received_at`` is then only the provisional value.

    Accepted rows are compared with the current stored values (:mod:`server.services.revisions`):
    the receipt lists the values revised; rows outranked by a feed of higher ``precedence``
    (measure -> feed -> rank) are rejected (``outranked``). With ``confirm_other_feeds``, a
    payload that would revise values sent by another feed is landed only when ``confirmed`` is
    the digest of exactly those revisions; otherwise nothing is written and
    :class:`~server.services.revisions.UnconfirmedRevisionsError` carries the would-be receipt.

    Raises :class:`~server.feeds.errors.FeedFileError` (and nothing is written) when the file is
    rejected whole: undecodable bytes, a header without the required columns, no bytes at all,
    or no data rows (:class:`~server.feeds.errors.EmptyFileError`).
    """
    known = find_vintage_by_checksum(session=session, feed=feed.name, checksum=payload.checksum)
    if known is not None:
        return IngestReceipt(
            feed=feed.name, source=payload.label, checksum=payload.checksum,
            received_at=known.received_at, vintage_id=known.id, unchanged=True, dry_run=dry_run,
            rows_accepted=0, rows_rejected=0, reasons=(), rejections=(),
            unit=record_unit(feed),
        )
    catalogue = catalogue_of(session=session)
    with session.begin_nested():
        vintage = Vintage(
            feed=feed.name, source=payload.label[:500], received_at=received_at,
            checksum=payload.checksum, rows_accepted=0, rows_rejected=0,
        )
        if not dry_run:
            session.add(vintage)
            session.flush()
        tally = _Tally()
        parts: list[Accepted] = []
        with payload.opener() as raw_stream:
            stream = _Counting(raw_stream, progress) if progress else raw_stream
            for chunk in read_chunks(stream, feed, label=payload.label):  # type: ignore[arg-type]
                result = validate_chunk(chunk, feed, catalogue, today=today)
                parts.append(result.accepted)
                tally.add(result.rejections)
                if not dry_run:
                    insert_rejections(
                        session=session, vintage_id=vintage.id, rejections=result.rejections
                    )
        accepted = Accepted.concat(parts)
        del parts
        if not len(accepted) and not tally.total:
            # rolls the savepoint back: no vintage for a file without data
            raise EmptyFileError(payload.label, "", NO_DATA_ROWS)
        positives, tests = catalogue.measures.get("positives"), catalogue.measures.get("tests")
        unit = record_unit(feed)
        check = check_file(accepted, positives=positives, tests=tests, unit=unit)
        checks = [check]
        if positives is not None and tests is not None:
            checks.append(_check_against_store(session, accepted, check.keep, positives, tests,
                                               unit))
        lines = np.concatenate([c.lines for c in checks])
        if lines.size:
            late = _late_rejections(
                feed, payload, lines, tuple(r for c in checks for r in c.reasons),
                tuple(m for c in checks for m in c.messages),
            )
            tally.add(late)
            if not dry_run:
                insert_rejections(session=session, vintage_id=vintage.id, rejections=late)
        kept = accepted.take(check.keep)
        del accepted
        # Index order (measure, region, date): B-tree inserts then append instead of splitting.
        kept = kept.take(np.lexsort((kept.day, kept.region_id, kept.measure_id)))
        revised = check_revisions(session=session, rows=kept, catalogue=catalogue,
                                  feed=feed.name, precedence=precedence)
        if revised.outranked.size:
            outranked = _late_rejections(
                feed, payload, kept.line[revised.outranked],
                ("outranked",) * revised.outranked.size, revised.outranked_messages,
            )
            tally.add(outranked)
            if not dry_run:
                insert_rejections(session=session, vintage_id=vintage.id, rejections=outranked)
            mask = np.ones(len(kept), dtype=bool)
            mask[revised.outranked] = False
            kept = kept.take(mask)
        if (not dry_run and confirm_other_feeds and revised.revised_other_feeds
                and confirmed != revised.digest):
            preview = _receipt(feed, payload, received_at, None, True, kept, tally, revised)
            raise UnconfirmedRevisionsError(preview, revised, feed.name)  # undoes the savepoint
        if not dry_run:
            insert_observation_arrays(
                session=session, vintage_id=vintage.id, region_id=kept.region_id,
                measure_id=kept.measure_id, day=kept.day, value=kept.value,
            )
            vintage.rows_accepted = len(kept)
            vintage.rows_rejected = tally.total
            if stamp:
                vintage.received_at = received_at = stamp_in_commit_order(session=session)
            record(
                session=session, actor="feeds", action="feed.ingest", subject=feed.name,
                details={"vintage": vintage.id, "source": payload.label[:200],
                         "accepted": len(kept), "rejected": tally.total,
                         "revised": revised.revised,
                         "revised_other_feeds": revised.revised_other_feeds,
                         **({"confirmed_revisions": revised.digest}
                            if confirm_other_feeds and revised.digest else {})},
            )
            session.flush()
    return _receipt(feed, payload, received_at, None if dry_run else vintage.id, dry_run, kept,
                    tally, revised)


def _receipt(
    feed: FeedDefinition, payload: Payload, received_at: datetime, vintage_id: int | None,
    dry_run: bool, kept: Accepted, tally: _Tally, revised: RevisionCheck,
) -> IngestReceipt:
    return IngestReceipt(
        feed=feed.name, source=payload.label, checksum=payload.checksum, received_at=received_at,
        vintage_id=vintage_id, unchanged=False, dry_run=dry_run,
        rows_accepted=len(kept), rows_rejected=tally.total, reasons=tally.reasons(),
        rejections=tuple(sorted(tally.kept, key=lambda r: (r.line, r.reason))),
        unit=record_unit(feed), revisions=revised.revisions, revised=revised.revised,
        revised_other_feeds=revised.revised_other_feeds, revisions_digest=revised.digest,
    )


def record_unit(feed: FeedDefinition) -> str:
    """What a rejection's number counts: ``record`` (position in a JSON list) or ``line``."""
    return "record" if feed.format == "json" else "line"


def _check_against_store(
    session: Session, accepted: Accepted, keep: np.ndarray, positives: int, tests: int,
    unit: str = "line",
) -> FileCheck:
    """Positives above tests where the other measure of the pair is only in the store."""
    stored = {}
    for mine, other in ((positives, tests), (tests, positives)):
        rows = unpaired(accepted, keep, measure=mine, other=other)
        regions = np.unique(accepted.region_id[rows]).tolist()
        days = accepted.day[rows]
        stored[other] = newest_values(
            session=session, measure_id=other, region_ids=regions,
            start=EPOCH + timedelta(days=int(days.min())) if days.size else EPOCH,
            end=EPOCH + timedelta(days=int(days.max())) if days.size else EPOCH,
        )
    return check_stored_pairs(
        accepted, keep, positives=positives, tests=tests, stored_positives=stored[positives],
        stored_tests=stored[tests], unit=unit,
    )


def _late_rejections(
    feed: FeedDefinition, payload: Payload, lines: np.ndarray, reasons: tuple[str, ...],
    messages: tuple[str, ...],
) -> list[Rejection]:
    """Rejections found by the whole-file checks; a second pass fetches those lines' raw text."""
    with payload.opener() as stream:
        raw = read_raw_records(stream, feed, label=payload.label, lines=lines)  # type: ignore[arg-type]
    raw = {line: text[:2000] for line, text in raw.items()}
    return [
        Rejection(line=int(ln), raw=raw.get(int(ln), ""), reason=why, message=text)
        for ln, why, text in zip(lines.tolist(), reasons, messages, strict=True)
    ]


@dataclass(frozen=True, kw_only=True)
class IngestOutcome:
    """A committed ingestion and the evaluation after it (None when every vintage was already
    evaluated, or no ruleset is active)."""

    receipt: IngestReceipt
    evaluation: EvaluationRun | None


def office_today(received_at: datetime, zone_name: str) -> date:
    """The office's calendar date at ``received_at`` (future dates are judged against it)."""
    from zoneinfo import ZoneInfo

    return received_at.astimezone(ZoneInfo(zone_name)).date()


def ingest_and_evaluate(
    db: Database, *, feed: FeedDefinition, payload: Payload, time_zone: str = "UTC",
    received_at: datetime | None = None, dry_run: bool = False, progress: Progress | None = None,
    evaluate: bool = True,
    after_landing: Callable[[Session, IngestReceipt], None] | None = None,
    notify: NotifyConfig | None = None, stale_after: Mapping[str, timedelta] | None = None,
    precedence: Precedence | None = None, confirm_other_feeds: bool = False,
    confirmed: str = "",
) -> IngestOutcome:
    """Ingest ``payload`` in its own transaction; after commit, evaluate what is not evaluated.

    ``precedence``, ``confirm_other_feeds`` and ``confirmed``: as :func:`ingest_payload`.

    ``after_landing`` runs inside the ingest transaction (the feed state is recorded there, so
    ETag and vintage commit together). Without ``received_at`` the vintage is stamped in commit
    order (:func:`stamp_in_commit_order`). With ``evaluate``, every committed ingest (an
    identical payload too) ends with :func:`~server.services.evaluation.evaluate_if_behind`, which
    also catches up on data an earlier, killed run landed. ``stale_after`` (feed name ->
    staleness limit, from the feed catalogue) goes to the evaluation
    (:func:`~server.services.evaluation.evaluate_districts`).
    """
    now = received_at or datetime.now(UTC)
    with db.transaction() as session:
        receipt = ingest_payload(
            session=session, feed=feed, payload=payload, received_at=now,
            today=office_today(now, time_zone), dry_run=dry_run, progress=progress,
            stamp=received_at is None, precedence=precedence,
            confirm_other_feeds=confirm_other_feeds, confirmed=confirmed,
        )
        if after_landing is not None:
            after_landing(session, receipt)
    run = None
    if evaluate and not dry_run:
        run = evaluate_if_behind(db, notify=notify, stale_after=stale_after)
    return IngestOutcome(receipt=receipt, evaluation=run)
