"""Where feed content comes from: payloads (bytes or files), file-drop folders, HTTP(S) pulls.

A :class:`Payload` can be opened more than once (a second pass fetches the raw text of lines the
whole-file checks reject) and knows its SHA-256, so identical content is recognised before any
row is read. HTTP pulls use a conditional GET (``If-None-Match`` / ``If-Modified-Since``): a 304
means the feed is unchanged and creates no vintage. Connection errors, timeouts and HTTP 5xx are
transient and retried with exponential backoff (tenacity); 4xx, a missing token and a body over the
size limit are permanent and are not retried.
"""

from __future__ import annotations

import hashlib
import io
import shutil
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import BinaryIO

import httpx
from tenacity import Retrying, retry_if_exception_type, stop_after_attempt, wait_exponential

from server.feeds.definition import FileSource, HttpSource
from server.feeds.errors import PermanentFetchError, TransientFetchError

READ_BYTES = 1 << 20


@dataclass(frozen=True, kw_only=True)
class Payload:
    """Content to ingest: a label (file name or URL), a re-openable byte stream, its SHA-256."""

    label: str
    opener: Callable[[], BinaryIO]
    checksum: str
    size: int

    @classmethod
    def from_bytes(cls, label: str, content: bytes) -> Payload:
        return cls(
            label=label, opener=lambda: io.BytesIO(content),
            checksum=hashlib.sha256(content).hexdigest(), size=len(content),
        )

    @classmethod
    def from_file(cls, label: str, handle: BinaryIO) -> Payload:
        """Content of an open, seekable file (an upload spooled to disk), read in blocks.

        Each opening reads ``handle`` from its start; leaving the ``with`` block does not close
        it (its owner does).
        """
        digest = hashlib.sha256()
        handle.seek(0)
        size = 0
        while block := handle.read(READ_BYTES):
            digest.update(block)
            size += len(block)
        return cls(label=label, opener=lambda: _Rewound(handle),  # type: ignore[arg-type,return-value]
                   checksum=digest.hexdigest(), size=size)

    @classmethod
    def from_path(cls, path: Path) -> Payload:
        digest = hashlib.sha256()
        with path.open("rb") as handle:
            while block := handle.read(READ_BYTES):
                digest.update(block)
        return cls(
            label=str(path), opener=lambda: path.open("rb"), checksum=digest.hexdigest(),
            size=path.stat().st_size,
        )


class _Rewound:
    """A shared file read from its start; ``with`` leaves it open (see Payload.from_file)."""

    def __init__(self, handle: BinaryIO) -> None:
        handle.seek(0)
        self.handle = handle

    def read(self, size: int = -1) -> bytes:
        return self.handle.read(size)

    def __enter__(self) -> _Rewound:
        return self

    def __exit__(self, *_exc: object) -> None:
        return None


def pending_files(source: FileSource) -> list[Path]:
    """Files waiting in the drop folder, oldest first (by modification time, then name)."""
    if not source.folder.is_dir():
        return []
    files = [p for p in source.folder.glob(source.glob) if p.is_file()]
    return sorted(files, key=lambda p: (p.stat().st_mtime, p.name))


def move_aside(path: Path, source: FileSource, *, outcome: str, now: datetime) -> Path:
    """Move a processed file into ``done/`` (or ``done/rejected/``); never deletes anything."""
    folder = source.done_folder / "rejected" if outcome == "rejected" else source.done_folder
    folder.mkdir(parents=True, exist_ok=True)
    target = folder / path.name
    if target.exists():
        stamp = now.astimezone(UTC).strftime("%Y%m%dT%H%M%S%fZ")
        target = folder / f"{path.stem}.{stamp}{path.suffix}"
    shutil.move(str(path), str(target))
    return target


@dataclass(frozen=True, kw_only=True)
class Fetched:
    """Result of one pull: 200 with content and validators, or 304 (``content`` is None)."""

    url: str
    status: int
    content: bytes | None
    etag: str | None
    last_modified: str | None
    attempts: int


@dataclass(frozen=True, kw_only=True)
class RetryPolicy:
    """How transient failures are retried: attempts and exponential wait bounds in seconds."""

    attempts: int = 4
    first_wait: float = 2.0
    max_wait: float = 60.0

    def __post_init__(self) -> None:
        if self.attempts < 1:
            raise ValueError(f"attempts must be at least 1, got {self.attempts}")
        if self.first_wait < 0 or self.max_wait < self.first_wait:
            raise ValueError(f"waits must satisfy 0 <= first_wait <= max_wait, got {self}")


def _request_headers(
    source: HttpSource, environ: Mapping[str, str], etag: str | None, last_modified: str | None
) -> dict[str, str]:
    headers = dict(source.headers)
    if source.token_env:
        token = environ.get(source.token_env)
        if not token:
            raise PermanentFetchError(
                source.url, f"environment variable {source.token_env} (the feed's token) is unset"
            )
        headers["Authorization"] = f"Bearer {token}"
    if etag:
        headers["If-None-Match"] = etag
    if last_modified:
        headers["If-Modified-Since"] = last_modified
    return headers


def _get_once(
    client: httpx.Client, source: HttpSource, headers: dict[str, str]
) -> tuple[int, bytes | None, httpx.Headers]:
    try:
        with client.stream("GET", source.url, headers=headers, timeout=source.timeout_s) as resp:
            if resp.status_code == 304:
                return 304, None, resp.headers
            if resp.status_code >= 500:
                raise TransientFetchError(source.url, f"HTTP {resp.status_code} from the server")
            if resp.status_code >= 400:
                raise PermanentFetchError(source.url, f"HTTP {resp.status_code}; not retried")
            declared = resp.headers.get("content-length")
            if declared and declared.isdigit() and int(declared) > source.max_bytes:
                raise PermanentFetchError(
                    source.url, f"body of {declared} bytes exceeds max_bytes {source.max_bytes}"
                )
            body = bytearray()
            for block in resp.iter_bytes():
                body += block
                if len(body) > source.max_bytes:
                    raise PermanentFetchError(
                        source.url, f"body exceeds max_bytes {source.max_bytes}; download stopped"
                    )
            return resp.status_code, bytes(body), resp.headers
    except httpx.TimeoutException as exc:
        raise TransientFetchError(source.url, f"timed out ({type(exc).__name__})") from None
    except httpx.TransportError as exc:
        raise TransientFetchError(source.url, f"connection failed ({exc})") from None


def fetch(
    source: HttpSource, *, etag: str | None = None, last_modified: str | None = None,
    environ: Mapping[str, str] | None = None, policy: RetryPolicy | None = None,
    client: httpx.Client | None = None,
) -> Fetched:
    """GET ``source.url`` conditionally, retrying transient failures per ``policy``."""
    policy = policy or RetryPolicy(attempts=source.retries)
    headers = _request_headers(source, environ or {}, etag, last_modified)
    own = client is None
    http = client or httpx.Client(follow_redirects=True)
    attempts = 0
    try:
        for attempt in Retrying(
            stop=stop_after_attempt(policy.attempts),
            wait=wait_exponential(multiplier=policy.first_wait, max=policy.max_wait),
            retry=retry_if_exception_type(TransientFetchError), reraise=True,
        ):
            with attempt:
                attempts += 1
                status, content, got = _get_once(http, source, headers)
    finally:
        if own:
            http.close()
    return Fetched(
        url=source.url, status=status, content=content, etag=got.get("etag") or etag,
        last_modified=got.get("last-modified") or last_modified, attempts=attempts,
    )
