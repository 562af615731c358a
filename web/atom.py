"""Atom feeds (RFC 4287) of published tier changes, for residents and newsrooms to follow.

:func:`atom_feed` is a pure builder from :class:`~server.readmodels.public_data.PublishedChange`
records to an Atom document. Identifiers are ``urn:uuid`` values derived (UUID version 5,
RFC 4122 section 4.3) from the site's public address and the decision, so an entry keeps its id
across rebuilds and readers do not show it twice.
"""

from __future__ import annotations

import uuid
from collections.abc import Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from xml.etree import ElementTree as ET

from server.readmodels.public_data import PublishedChange

__all__ = ["ATOM_NS", "AtomText", "atom_feed"]

ATOM_NS = "http://www.w3.org/2005/Atom"
ATOM_TYPE = "application/atom+xml"


@dataclass(frozen=True, kw_only=True)
class AtomText:
    """The words of one feed (already in the reader's language)."""

    title: str
    author: str
    entry_title: str  # "{name}: {tier}" with str.format fields name, tier, number
    entry_summary: str  # with fields name, tier, number, day, previous
    #: put before the title and summary of each entry when the feed holds changes of several
    #: policies, with the field ``policy`` ("" keeps entries as they are)
    entry_policy: str = ""


def _id(base: str, *parts: object) -> str:
    return uuid.uuid5(uuid.NAMESPACE_URL, "/".join([base.rstrip("/"), *map(str, parts)])).urn


def _stamp(when: datetime) -> str:
    if when.tzinfo is None:
        when = when.replace(tzinfo=UTC)
    return when.astimezone(UTC).isoformat().replace("+00:00", "Z")


def atom_feed(
    changes: Sequence[PublishedChange], *, base_url: str, self_path: str, page_path: str,
    text: AtomText, feed_key: str, fallback_updated: datetime,
) -> bytes:
    """An Atom document with one entry per published change, newest first.

    ``base_url`` is the public address of the site (``https://example.org``); ``self_path`` the
    feed's own path and ``page_path`` the page it follows. ``fallback_updated`` is the feed's
    ``updated`` when it has no entry.
    """
    ET.register_namespace("", ATOM_NS)

    def sub(parent: ET.Element, tag: str, value: str | None = None, **attrs: str) -> ET.Element:
        el = ET.SubElement(parent, f"{{{ATOM_NS}}}{tag}", attrs)
        if value is not None:
            el.text = value
        return el

    base = base_url.rstrip("/")
    feed = ET.Element(f"{{{ATOM_NS}}}feed")
    sub(feed, "id", _id(base, "atom", feed_key))
    sub(feed, "title", text.title)
    updated = max((c.published_at for c in changes), default=fallback_updated)
    sub(feed, "updated", _stamp(updated))
    author = sub(feed, "author")
    sub(author, "name", text.author)
    sub(feed, "link", rel="self", type=ATOM_TYPE, href=base + self_path)
    sub(feed, "link", rel="alternate", type="text/html", href=base + page_path)
    several = len({c.policy for c in changes}) > 1
    for c in changes:
        fields = {"name": c.name, "tier": c.tier_name, "number": c.tier,
                  "day": c.effective_date.isoformat(), "previous": c.previous_name or "—"}
        policy = text.entry_policy.format(policy=c.policy) if several else ""
        entry = sub(feed, "entry")
        sub(entry, "id", _id(base, "decision", c.decision_id))
        sub(entry, "title", policy + text.entry_title.format(**fields))
        sub(entry, "updated", _stamp(c.published_at))
        sub(entry, "published", _stamp(c.published_at))
        sub(entry, "link", rel="alternate", type="text/html", href=f"{base}/district/{c.code}")
        if several:  # RFC 4287 section 4.2.2: a category names the policy
            sub(entry, "category", term=c.policy, label=c.policy)
        sub(entry, "summary", policy + text.entry_summary.format(**fields))
    body: bytes = ET.tostring(feed, encoding="utf-8", xml_declaration=True)
    return body
