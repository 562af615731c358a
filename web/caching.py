"""Conditional GET for the public pages: ETag and Last-Modified from the publication stamp.

A public page is a pure function of (path, language, stamp), where the stamp
(:func:`server.readmodels.pages.public_stamp`) changes whenever something is published, new data
arrive or another ruleset is activated. Two per-worker caches keep the public pages cheap:

* :class:`StampMemo` keeps the stamp for :data:`STAMP_TTL` seconds, so that a page served from
  the cache touches no database at all. A change made through this worker (any POST, PUT, PATCH
  or DELETE it answers, see :class:`StampInvalidator`) is seen by the next request; a change made
  elsewhere (another worker, the scheduler, the CLI) within :data:`STAMP_TTL` seconds. That is
  far below the ``max-age`` browsers and proxies may already keep a page for.
* :class:`PageCache` keeps rendered bodies under the key; the ETag is a hash of the key, so a
  browser or proxy that sends ``If-None-Match`` gets ``304 Not Modified`` before any page is
  looked up or built.
"""

from __future__ import annotations

import hashlib
import threading
import time
from collections.abc import Awaitable, Callable, MutableMapping
from datetime import datetime
from email.utils import format_datetime
from typing import Any

from fastapi import Request, Response
from starlette.concurrency import run_in_threadpool

from server.readmodels.cache import BoundedCache
from server.readmodels.pages import PublicStamp, public_stamp
from server.services.database import Database

__all__ = ["MAX_AGE", "STAMP_TTL", "PageCache", "StampInvalidator", "StampMemo", "conditional"]

MAX_AGE = 60
#: Seconds a worker reuses the publication stamp before reading it again (common practice for
#: micro-caching, no source; well under MAX_AGE).
STAMP_TTL = 1.0
_SAFE = frozenset({"GET", "HEAD", "OPTIONS"})


#: A rendered public page: ``(body, content type, status)``.
Page = tuple[bytes, str, int]
#: Rendered public pages by key, least recently used dropped first (``PageCache(size=4096)``).
PageCache = BoundedCache[str, Page]


class StampMemo:
    """The publication stamp of this worker, reused for ``ttl`` seconds.

    :meth:`invalidate` forgets it at once. A read that started before an invalidation does not
    store its (possibly older) answer, so a change committed by this worker is never hidden by a
    concurrent request.
    """

    def __init__(
        self, *, ttl: float = STAMP_TTL, clock: Callable[[], float] = time.monotonic
    ) -> None:
        if ttl < 0:
            raise ValueError(f"ttl must be >= 0, got {ttl}")
        self.ttl = ttl
        self._clock = clock
        self._lock = threading.Lock()
        self._stamp: PublicStamp | None = None
        self._until = float("-inf")
        self._generation = 0

    def fresh(self) -> PublicStamp | None:
        """The kept stamp while it is fresh, else None."""
        with self._lock:
            return self._stamp if self._clock() < self._until else None

    def read(self, load: Callable[[], PublicStamp]) -> PublicStamp:
        """The kept stamp, or ``load()`` (blocking: call it off the event loop) kept anew."""
        with self._lock:
            if self._clock() < self._until and self._stamp is not None:
                return self._stamp
            generation = self._generation
        stamp = load()
        with self._lock:
            if generation == self._generation:
                self._stamp, self._until = stamp, self._clock() + self.ttl
        return stamp

    def invalidate(self) -> None:
        with self._lock:
            self._stamp, self._until = None, float("-inf")
            self._generation += 1


Scope = MutableMapping[str, Any]
ASGIApp = Callable[[Scope, Any, Any], Awaitable[None]]


class StampInvalidator:
    """Forgets the worker's stamp (``app.state.public_stamps``) after every request that may
    have changed data (pure ASGI). Runs after the whole request, once its transaction is
    committed."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Any, send: Any) -> None:
        if scope["type"] != "http" or scope["method"] in _SAFE:
            await self.app(scope, receive, send)
            return
        try:
            await self.app(scope, receive, send)
        finally:
            scope["app"].state.public_stamps.invalidate()


def _etag(key: str) -> str:
    return 'W/"' + hashlib.sha256(key.encode()).hexdigest()[:20] + '"'


def _validators(etag: str, last_modified: datetime | None) -> dict[str, str]:
    headers = {
        "ETag": etag, "Cache-Control": f"public, max-age={MAX_AGE}",
        "Vary": "Accept-Language, Cookie",
    }
    if last_modified is not None:
        headers["Last-Modified"] = format_datetime(last_modified, usegmt=True)
    return headers


async def conditional(
    request: Request, stamp: Callable[[], PublicStamp], build: Callable[[], Response]
) -> Response:
    """Answer 304 when the client has this version, else the (cached) page with validators.

    ``stamp`` reads the publication stamp and ``build`` renders the page; both block (database,
    templates) and run in the thread pool, and only when the worker's caches cannot answer.
    """
    memo: StampMemo = request.app.state.public_stamps
    current = memo.fresh()
    if current is None:
        current = await run_in_threadpool(memo.read, stamp)
    lang = getattr(request.state, "lang", "en")
    key = f"{request.url.path}?{request.url.query}|{lang}|{current.key}"
    etag = _etag(key)
    headers = _validators(etag, current.last_modified)
    wanted = request.headers.get("if-none-match")
    if wanted and etag in [t.strip() for t in wanted.split(",")]:
        return Response(status_code=304, headers=headers)
    cache: PageCache = request.app.state.page_cache
    hit = cache.get(key)
    if hit is None:
        response = await run_in_threadpool(build)
        body = bytes(response.body)
        hit = (body, response.headers.get("content-type", "text/html"), response.status_code)
        if response.status_code == 200:
            cache.put(key, hit)
    body, media, status = hit
    headers["content-type"] = media
    return Response(content=body, status_code=status, headers=headers)


def stamp_reader(db: Database) -> Callable[[], PublicStamp]:
    """Read the publication stamp in a transaction of its own (for :func:`conditional`)."""

    def read() -> PublicStamp:
        with db.transaction() as session:
            return public_stamp(session=session)

    return read


def page_language(request: Request) -> str:
    """The page's language (chosen by the i18n middleware; the cache is keyed by it too)."""
    return str(getattr(request.state, "lang", "en"))
