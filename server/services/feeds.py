"""The feed catalogue: the configured feed file, parsed once per content, and its feeds by name.

The other feed use cases live beside it: ``feed_state`` (what every way in records),
``feed_runs`` (scheduled pulls), ``feed_push`` (push tokens, pushes and hand uploads),
``feed_health`` (freshness and each feed's health) and ``feeds_page`` (the staff feeds page);
the scheduler's leader lease is :mod:`server.scheduler.lease`.
"""

from __future__ import annotations

import hashlib
from datetime import timedelta
from functools import lru_cache
from pathlib import Path

from server.config import Settings
from server.feeds.definition import FeedCatalogue as FeedCatalogue  # for the demo's feed file
from server.feeds.definition import FeedDefinition as FeedDefinition  # for the web's push route
from server.feeds.definition import load_feeds
from server.feeds.errors import FeedConfigError as FeedConfigError  # for the web's handler
from server.feeds.errors import FeedFileError as FeedFileError  # for the web's routes
from server.services.district_indicators import feed_limits
from server.services.errors import ServiceError
from server.services.revisions import UnconfirmedRevisionsError as UnconfirmedRevisionsError


class UnknownFeedError(ServiceError, LookupError):
    def __init__(self, name: str, known: list[str]) -> None:
        self.name = name
        super().__init__(f"unknown feed {name!r}; configured feeds: {', '.join(known) or 'none'}")


def feeds_file(settings: Settings) -> Path | None:
    """The configured feed file (``TIERWISE_FEEDS_FILE``; the demo command sets the demo's)."""
    return settings.feeds_file


@lru_cache(maxsize=16)
def _parsed(path: Path, version: str) -> FeedCatalogue:
    """The catalogue of ``path`` whose content has SHA-256 ``version`` (the cache key; a file
    that does not parse raises and is not cached)."""
    return load_feeds(path)


def load_catalogue(settings: Settings) -> FeedCatalogue:
    """The configured feeds (an empty catalogue when no feed file is configured).

    Parsed once per content of the file (its SHA-256; reading a small file is cheap, parsing it
    is not): pages that show feed health call this on every request, and an edited file is
    picked up on the next one. A file that no longer parses raises
    :class:`~server.feeds.errors.FeedConfigError` each time.
    """
    path = feeds_file(settings)
    if path is None:
        return FeedCatalogue(path="", feeds={})
    try:
        version = hashlib.sha256(path.read_bytes()).hexdigest()
    except OSError:
        return load_feeds(path)  # reports the file as unreadable, with its name
    return _parsed(path, version)


def feed_named(catalogue: FeedCatalogue, name: str) -> FeedDefinition:
    if name not in catalogue:
        raise UnknownFeedError(name, sorted(catalogue.feeds))
    return catalogue[name]


def catalogue_limits(catalogue: FeedCatalogue) -> dict[str, timedelta]:
    """Feed name -> ``stale_after`` of every configured feed, for the evaluation
    (:func:`server.services.district_indicators.feed_limits`)."""
    return feed_limits(catalogue)


# Names older callers outside the feed modules import from here (the evaluation tests, the
# morning overview, the demo's story): the ingest that records the feed state and the feed health.
from server.services.feed_health import FeedStatus as FeedStatus  # noqa: E402
from server.services.feed_health import feed_statuses as feed_statuses  # noqa: E402
from server.services.feed_state import ingest_recorded as ingest_recorded  # noqa: E402
