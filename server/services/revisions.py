"""What a payload would revise: stored values it changes, which feed sent them, precedence.

Every payload is a new vintage and nothing is overwritten, but the *current* value of a region,
measure and day is the one of its newest vintage, whatever the feed (``server/store/reads.py``).
So a row whose value differs from the current one revises it. Before landing, the ingest
(:func:`server.services.ingest.ingest_payload`) compares every accepted row with the current
value and lists each revision: region, measure, day, old value -> new value, and the feed and
vintage that sent the old one.

Two rules act on revisions of values another feed sent:

- *precedence* (``docs/feeds.md``, per measure in the feed file): a row whose old value came from
  a feed ranked higher for the measure is not taken in (reason ``outranked``);
- *confirmation*: an ingest that asks for it (the staff upload form) stores nothing while it
  would revise values of other feeds that the person has not confirmed, and raises
  :class:`UnconfirmedRevisionsError` with the list; confirming sends back its
  :attr:`RevisionCheck.digest`, which changes whenever the list does.
"""

from __future__ import annotations

import hashlib
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import date, timedelta

import numpy as np
from numpy.typing import NDArray
from sqlalchemy import select
from sqlalchemy.orm import Session

from server.feeds.validation import EPOCH, Accepted, Catalogue
from server.services.errors import ServiceError
from server.store.models import Vintage
from server.store.reads import newest_values

#: Revisions listed one by one in a receipt (all are counted).
KEPT_REVISIONS = 1000
#: Two values closer than this (relative) are the same value, not a revision.
SAME_VALUE_RTOL = 1e-12

#: measure name -> feed name -> rank (``FeedCatalogue.precedence``)
Precedence = Mapping[str, Mapping[str, int]]


@dataclass(frozen=True, kw_only=True)
class RevisedValue:
    """One stored value a payload revises (or, when ``outranked``, would have revised)."""

    region: str
    measure: str
    day: date
    old: float
    new: float
    old_feed: str
    old_vintage_id: int
    line: int
    #: the feed of the payload that revises it
    feed: str = ""

    @property
    def other_feed(self) -> bool:
        """Whether the old value came from another feed than the payload's."""
        return self.old_feed != self.feed


@dataclass(frozen=True, kw_only=True)
class RevisionCheck:
    """The revisions of one payload's accepted rows against the store."""

    #: revisions the payload makes (outranked rows excluded), first :data:`KEPT_REVISIONS`
    revisions: tuple[RevisedValue, ...]
    revised: int
    revised_other_feeds: int
    #: positions (into the accepted rows) of rows outranked by a feed of higher precedence
    outranked: NDArray[np.int64]
    outranked_messages: tuple[str, ...]
    #: SHA-256 over every revision of another feed's value (empty when there is none)
    digest: str


class UnconfirmedRevisionsError(ServiceError, ValueError):
    """An upload would revise values another feed sent; nothing was stored.

    ``receipt`` is what the upload would do (rows accepted and rejected, the revisions);
    ``digest`` is what a confirmation sends back.
    """

    def __init__(self, receipt: object, check: RevisionCheck, feed: str) -> None:
        self.receipt = receipt
        self.check = check
        self.digest = check.digest
        super().__init__(
            f"upload to {feed!r} would revise {check.revised_other_feeds} value(s) sent by "
            "another feed; nothing was stored: confirm to take it in"
        )


def _empty(feed: str) -> RevisionCheck:
    return RevisionCheck(revisions=(), revised=0, revised_other_feeds=0,
                         outranked=np.zeros(0, dtype=np.int64), outranked_messages=(),
                         digest="")


def check_revisions(
    *, session: Session, rows: Accepted, catalogue: Catalogue, feed: str,
    precedence: Precedence | None = None,
) -> RevisionCheck:
    """Compare ``rows`` (accepted, one per key) with the current stored values (any feed).

    One as-of read per measure over the rows' regions and date range
    (:func:`server.store.reads.newest_values`), matched by key with numpy.
    """
    if not len(rows):
        return _empty(feed)
    measure_names = {mid: name for name, mid in catalogue.measures.items()}
    region_codes = {rid: code for code, rid in catalogue.regions.items()}
    idx_parts, old_parts, vintage_parts = [], [], []
    for mid in np.unique(rows.measure_id).tolist():
        mine = np.flatnonzero(rows.measure_id == mid)
        days = rows.day[mine]
        stored = newest_values(
            session=session, measure_id=int(mid),
            region_ids=np.unique(rows.region_id[mine]).tolist(),
            start=EPOCH + timedelta(days=int(days.min())),
            end=EPOCH + timedelta(days=int(days.max())),
        )
        if not stored.day.size:
            continue
        stored_key = stored.region_id * (1 << 32) + stored.day
        order = np.argsort(stored_key, kind="stable")
        stored_key = stored_key[order]
        key = rows.region_id[mine] * (1 << 32) + days
        pos = np.clip(np.searchsorted(stored_key, key), 0, stored_key.size - 1)
        hit = stored_key[pos] == key
        old = stored.value[order][pos]
        new = rows.value[mine]
        differs = hit & ~np.isclose(new, old, rtol=SAME_VALUE_RTOL, atol=0.0)
        idx_parts.append(mine[differs])
        old_parts.append(old[differs])
        vintage_parts.append(stored.vintage_id[order][pos][differs])
    if not idx_parts:
        return _empty(feed)
    idx = np.concatenate(idx_parts)
    old = np.concatenate(old_parts)
    vintages = np.concatenate(vintage_parts)
    if not idx.size:
        return _empty(feed)
    feed_of = dict(session.execute(
        select(Vintage.id, Vintage.feed).where(Vintage.id.in_(np.unique(vintages).tolist()))
    ).all())
    # per distinct vintage and measure, then spread back (the rows may be many)
    uv, v_inv = np.unique(vintages, return_inverse=True)
    v_feed = [feed_of.get(int(v), "") for v in uv.tolist()]
    measure_ids = rows.measure_id[idx]
    um, m_inv = np.unique(measure_ids, return_inverse=True)
    m_name = [measure_names.get(int(m), str(m)) for m in um.tolist()]
    ranks = precedence or {}

    def rank(measure: str, name: str) -> int:
        return int(ranks.get(measure, {}).get(name, 0))

    # rank of the old value's feed and of this feed, per (vintage, measure) pair
    old_rank = np.array([[rank(m, f) for m in m_name] for f in v_feed], dtype=np.int64)
    mine = np.array([rank(m, feed) for m in m_name], dtype=np.int64)
    is_other = np.array([f != feed for f in v_feed], dtype=bool)[v_inv]
    outranked = is_other & (old_rank[v_inv, m_inv] > mine[m_inv])
    days = rows.day[idx]
    regions = rows.region_id[idx]

    def where(i: int) -> tuple[str, str, str]:
        return (m_name[m_inv[i]], region_codes.get(int(regions[i]), "?"),
                (EPOCH + timedelta(days=int(days[i]))).isoformat())

    messages = []
    for i in np.flatnonzero(outranked).tolist():
        m, code, day = where(i)
        of = v_feed[v_inv[i]]
        messages.append(
            f"{m} for {code} on {day} was sent by feed {of!r} (vintage {int(vintages[i])}), "
            f"which takes precedence for {m} ({rank(m, of)} over {rank(m, feed)}); this row is "
            "not taken in")
    keep = ~outranked
    other = keep & is_other
    order = np.lexsort((days, regions, measure_ids))
    listed = order[keep[order]][:KEPT_REVISIONS].tolist()
    revisions = tuple(
        RevisedValue(
            region=region_codes.get(int(regions[i]), "?"), measure=m_name[m_inv[i]],
            day=EPOCH + timedelta(days=int(days[i])), old=float(old[i]),
            new=float(rows.value[idx[i]]), old_feed=v_feed[v_inv[i]],
            old_vintage_id=int(vintages[i]), line=int(rows.line[idx[i]]), feed=feed,
        )
        for i in listed
    )
    digest = ""
    if other.any():
        chosen = order[other[order]]
        h = hashlib.sha256()
        for part in (regions, measure_ids, days, old, rows.value[idx], vintages):
            h.update(np.ascontiguousarray(part[chosen]).tobytes())
        digest = h.hexdigest()
    return RevisionCheck(
        revisions=revisions, revised=int(keep.sum()), revised_other_feeds=int(other.sum()),
        outranked=idx[outranked].astype(np.int64), outranked_messages=tuple(messages),
        digest=digest,
    )
