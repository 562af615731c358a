"""Uploaded files held while the uploader confirms the values they would revise.

An upload that would revise values sent by another feed stores nothing in the database and asks
first (``server/services/revisions.py``). So that the person need not choose the file again,
the upload form's file is copied to a private folder under the system's temporary directory
with a random token; the confirmation posts the token back. A held file belongs to the account
and feed it was uploaded for, is read once and removed when taken in, and any held file older
than :data:`KEEP_FOR` is removed at the next hold. Web workers on one machine share the folder;
workers on several machines need the confirmation to reach the same one (a sticky session).
"""

from __future__ import annotations

import json
import os
import re
import secrets
import shutil
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path
from typing import BinaryIO

#: How long an unconfirmed upload is kept (seconds).
KEEP_FOR = 3600
TOKEN = re.compile(r"^[A-Za-z0-9_-]{32}$")


class HeldUploadError(ValueError):
    """A held upload that cannot be used (unknown, expired, another account's or feed's)."""


def folder() -> Path:
    """The private folder of held uploads (created with mode 0700)."""
    path = Path(tempfile.gettempdir()) / "tierwise-held-uploads"
    path.mkdir(mode=0o700, exist_ok=True)
    return path


@dataclass(frozen=True, kw_only=True)
class Held:
    """One held upload: its token, the file's name as uploaded, and where its bytes are."""

    token: str
    filename: str
    path: Path

    def open(self) -> BinaryIO:
        return self.path.open("rb")

    def discard(self) -> None:
        for p in (self.path, self.path.with_suffix(".json")):
            p.unlink(missing_ok=True)


def _expire(base: Path, now: float) -> None:
    for p in base.iterdir():
        try:
            if now - p.stat().st_mtime > KEEP_FOR:
                p.unlink(missing_ok=True)
        except OSError:
            continue


def hold(content: BinaryIO, *, filename: str, actor: str, feed: str) -> Held:
    """Copy ``content`` (read from its current position) to the held folder."""
    base = folder()
    _expire(base, time.time())
    token = secrets.token_urlsafe(24)  # 32 characters
    path = base / f"{token}.bin"
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
    with os.fdopen(fd, "wb") as out:
        shutil.copyfileobj(content, out, 1 << 20)
    path.with_suffix(".json").write_text(
        json.dumps({"filename": filename, "actor": actor, "feed": feed}), encoding="utf-8"
    )
    return Held(token=token, filename=filename, path=path)


def open_held(token: str, *, actor: str, feed: str) -> Held:
    """The upload held under ``token`` for ``actor`` and ``feed``.

    Raises
    ------
    HeldUploadError
        When the token is malformed, unknown or expired, or the upload was held for another
        account or feed.
    """
    if not TOKEN.match(token):
        raise HeldUploadError("the held upload's token is malformed; upload the file again")
    path = folder() / f"{token}.bin"
    try:
        meta = json.loads(path.with_suffix(".json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        raise HeldUploadError(
            "the upload waiting for confirmation is gone (kept one hour); upload the file again"
        ) from None
    if meta.get("actor") != actor or meta.get("feed") != feed or not path.exists():
        raise HeldUploadError(
            "the upload waiting for confirmation was made by another account or for another "
            "feed; upload the file again"
        )
    return Held(token=token, filename=str(meta.get("filename", "upload")), path=path)
