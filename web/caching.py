"""Conditional GET for the public pages: ETag and Last-Modified from the publication stamp.

A public page is a pure function of (path, language, stamp); its rendered body is kept in a small
per-process cache under that key, and its ETag is a hash of the key, so a browser or proxy that
sends ``If-None-Match`` gets ``304 Not Modified`` without the page being built again.
"""

from __future__ import annotations

import hashlib
import threading
from collections import OrderedDict
from collections.abc import Callable
from datetime import datetime
from email.utils import format_datetime

from fastapi import Request, Response

__all__ = ["PageCache", "conditional"]

MAX_AGE = 60


class PageCache:
    """Bounded LRU of rendered bodies by key."""

    def __init__(self, size: int = 4096) -> None:
        self.size = size
        self._items: OrderedDict[str, tuple[bytes, str, int]] = OrderedDict()
        self._lock = threading.Lock()

    def get(self, key: str) -> tuple[bytes, str, int] | None:
        with self._lock:
            hit = self._items.get(key)
            if hit is not None:
                self._items.move_to_end(key)
            return hit

    def put(self, key: str, value: tuple[bytes, str, int]) -> None:
        with self._lock:
            self._items[key] = value
            self._items.move_to_end(key)
            while len(self._items) > self.size:
                self._items.popitem(last=False)


def _etag(key: str) -> str:
    return 'W/"' + hashlib.sha256(key.encode()).hexdigest()[:20] + '"'


def conditional(
    request: Request, stamp: str, build: Callable[[], Response],
    last_modified: datetime | None = None,
) -> Response:
    """Answer 304 when the client has this version, else the (cached) page with validators."""
    lang = getattr(request.state, "lang", "en")
    key = f"{request.url.path}?{request.url.query}|{lang}|{stamp}"
    etag = _etag(key)
    headers = {
        "ETag": etag, "Cache-Control": f"public, max-age={MAX_AGE}",
        "Vary": "Accept-Language, Cookie",
    }
    if last_modified is not None:
        headers["Last-Modified"] = format_datetime(last_modified, usegmt=True)
    wanted = request.headers.get("if-none-match", "")
    if etag in [t.strip() for t in wanted.split(",")]:
        return Response(status_code=304, headers=headers)
    cache: PageCache = request.app.state.page_cache
    hit = cache.get(key)
    if hit is None:
        response = build()
        body = bytes(response.body)
        hit = (body, response.headers.get("content-type", "text/html"), response.status_code)
        if response.status_code == 200:
            cache.put(key, hit)
    body, media, status = hit
    return Response(content=body, status_code=status, media_type=None,
                    headers={**headers, "content-type": media})
