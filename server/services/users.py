"""Use case: staff accounts with hashed passwords (scrypt from the standard library).

User names are unique regardless of case: ``Tess.Trainee`` cannot be added beside
``tess.trainee``, and login and the admin pages find an account whatever the case typed. Names
are compared by Unicode case folding (:meth:`str.casefold`) in Python rather than with SQL
``lower()``, which SQLite applies to ASCII only; staff tables are small, so a scan is cheap. The
exact spelling is stored and shown as it was entered.
"""

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
# What each action needs: that role or one ranked above it. The one place that says who may do
# what; routes (``web.deps.allowed``), templates (``user.may("decide")``) and services ask it.
PERMISSIONS: dict[str, str] = {
    "read": "viewer",  # staff pages, explanations, briefings
    "upload": "analyst",  # hand uploads to a feed
    "draft_policy": "analyst",  # store and check a draft ruleset
    "backtest": "analyst",  # start and read backtests
    "record_event": "analyst",  # record a dated event (measure, holidays, testing change)
    "decide": "approver",  # confirm or override a recommended tier
    "publish": "approver",  # publish decided tiers to the public view
    "activate_policy": "admin",  # make a ruleset version the active one
    "manage_users": "admin",  # accounts, roles, passwords
}
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


def name_key(name: str) -> str:
    """The form of a user name that uniqueness and lookups compare (stripped, case-folded)."""
    return name.strip().casefold()


def find_user(*, session: Session, name: str) -> User | None:
    """The account called ``name`` in any case, or None.

    An exact match wins (one indexed lookup); otherwise the one account whose name folds to the
    same key. Should a database made before names were case-insensitive hold two accounts that
    differ only in case, neither matches a third spelling (None), so nobody is signed in to the
    wrong account.
    """
    exact = session.scalar(select(User).where(User.name == name.strip()))
    if exact is not None:
        return exact
    key = name_key(name)
    matches = [u for u in session.scalars(select(User)) if name_key(u.name) == key]
    return matches[0] if len(matches) == 1 else None


def add_user(*, session: Session, name: str, role: str, password: str, actor: str = "cli") -> User:
    """Create an account; the password is stored only as a hash and never logged."""
    if role not in ROLES:
        raise UnknownRoleError(role, ROLES)
    key = name_key(name)
    if any(name_key(existing) == key for existing in session.scalars(select(User.name))):
        raise DuplicateUserError(name)
    user = User(
        name=name, role=role, password_hash=hash_password(password), active=True,
        created_at=datetime.now(UTC),
    )
    session.add(user)
    session.flush()
    record(session=session, actor=actor, action="users.add", subject=name, details={"role": role})
    return user


def may(role: str, action: str) -> bool:
    """True when ``role`` may do ``action`` (a key of :data:`PERMISSIONS`)."""
    if action not in PERMISSIONS:
        raise KeyError(f"unknown action {action!r}; known: {', '.join(PERMISSIONS)}")
    needed = PERMISSIONS[action]
    return role in ROLES and ROLES.index(role) >= ROLES.index(needed)


def permitted_account(*, session: Session, name: str, action: str) -> User | None:
    """The active account named exactly ``name`` when its role may do ``action`` (a key of
    :data:`PERMISSIONS`); None when there is no such account, it is inactive or its role falls
    short (the caller refuses with its own message)."""
    account = session.scalar(select(User).where(User.name == name))
    if account is None or not account.active or not may(account.role, action):
        return None
    return account
