"""Use case: staff accounts with hashed passwords (scrypt from the standard library)."""

from __future__ import annotations

import base64
import hashlib
import hmac
import secrets
from datetime import UTC, datetime

from sqlalchemy import select
from sqlalchemy.orm import Session

from server.services.audit import record
from server.services.errors import DuplicateUserError, UnknownRoleError
from server.store.models import User

ROLES = ("viewer", "analyst", "approver", "admin")
_N, _R, _P = 2**14, 8, 1


def hash_password(password: str, *, salt: bytes | None = None) -> str:
    """``scrypt$N$r$p$salt$hash`` (RFC 7914 parameters), both parts base64."""
    salt = salt or secrets.token_bytes(16)
    digest = hashlib.scrypt(password.encode(), salt=salt, n=_N, r=_R, p=_P, dklen=32)
    enc = base64.b64encode
    return f"scrypt${_N}${_R}${_P}${enc(salt).decode()}${enc(digest).decode()}"


def verify_password(password: str, stored: str) -> bool:
    try:
        scheme, n, r, p, salt, digest = stored.split("$")
    except ValueError:
        return False
    if scheme != "scrypt":
        return False
    candidate = hashlib.scrypt(
        password.encode(), salt=base64.b64decode(salt), n=int(n), r=int(r), p=int(p), dklen=32
    )
    return hmac.compare_digest(candidate, base64.b64decode(digest))


def add_user(*, session: Session, name: str, role: str, password: str, actor: str = "cli") -> User:
    """Create an account; the password is stored only as a hash and never logged."""
    if role not in ROLES:
        raise UnknownRoleError(role, ROLES)
    if session.scalar(select(User).where(User.name == name)) is not None:
        raise DuplicateUserError(name)
    user = User(
        name=name, role=role, password_hash=hash_password(password), active=True,
        created_at=datetime.now(UTC),
    )
    session.add(user)
    session.flush()
    record(session=session, actor=actor, action="users.add", subject=name, details={"role": role})
    return user
