"""Use case: staff login, signed sessions, roles, login rate limiting and CSRF tokens.

Passwords are checked against :mod:`server.services.users` hashes and never logged. A session is
a signed, time-stamped token (``itsdangerous``) holding the user id, a random session id and the
user's *session generation* at login. Every request re-reads the user by primary key (one
indexed lookup) and refuses the token unless the account is active and its generation is still
the one signed in. The generation is bumped on logout, role change, enabling or disabling and
password change, so every session issued before (on any device, including a copied cookie) is
refused from then on; tokens also expire after :data:`SESSION_MAX_AGE`. The CSRF token of a form
is an HMAC of the session id under the secret key (the "synchronizer token" pattern bound to the
session), so it needs no server-side storage.

Roles are ordered: viewer < analyst < approver < admin; a page that needs ``analyst`` admits
approvers and admins too. User names match whatever their case
(:func:`server.services.users.find_user`).

Failed logins are limited per (user name, client address) together and, 20 times more loosely,
per client address (:class:`LoginLimiter`): by default 5 failures of one name from one address,
and 100 failures from one address, within 5 minutes. Counting a name per address means a
stranger who knows a user name cannot lock its owner out: the owner signs in from their own
address while the stranger's address is refused. The per-address limit is loose on purpose:
behind a reverse proxy, or from one office network, every member of staff shares an address,
and a tight limit there would let a few mistyped passwords lock the whole office out; it still
stops one address from trying many names quickly.

Every attempt is stored and committed (``login_attempt``, in its own transaction) *before* its
password is checked, and then counted; an attempt that finds the limit used up is refused
without checking the password. The slow hash therefore never runs for more attempts than the
limit allows, however many arrive at once and on however many web workers: each attempt counts
every attempt committed before it reads, so at most ``attempts`` of them find room.
"""

from __future__ import annotations

import hashlib
import hmac
import math
import secrets
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from functools import cache

from itsdangerous import BadSignature, URLSafeTimedSerializer
from sqlalchemy import delete, select, update
from sqlalchemy.orm import Session

from server.services.audit import record
from server.services.database import Database
from server.services.errors import ServiceError, UnknownRoleError
from server.services.users import (
    PERMISSIONS,
    ROLES,
    add_user,
    find_user,
    hash_password,
    may,
    name_key,
    verify_password,
)
from server.store.models import LoginAttempt, User

__all__ = [
    "PERMISSIONS",
    "ROLES",
    "AccountError",
    "LoginLimiter",
    "LoginRefusedError",
    "SessionSigner",
    "StaffUser",
    "TooManyAttemptsError",
    "add_account",
    "authenticate",
    "change_role",
    "csrf_token",
    "end_session",
    "has_role",
    "list_accounts",
    "load_user",
    "may",
    "session_user",
    "set_active",
    "set_password",
    "verify_csrf",
]

SESSION_MAX_AGE = 12 * 3600  # a working day
MIN_PASSWORD = 10


class LoginRefusedError(ServiceError, ValueError):
    """Wrong name or password, or a disabled account (the message never says which)."""

    def __init__(self) -> None:
        super().__init__("unknown user name or wrong password")


class TooManyAttemptsError(ServiceError, ValueError):
    """The login limit is used up; says for what (``name``: this name from this address,
    ``address``: this address) and when to try again."""

    def __init__(
        self, retry_after: float, *, scope: str = "name", until: datetime | None = None
    ) -> None:
        self.retry_after = retry_after
        self.scope = scope
        self.until = until
        what = ("for this user name from your address" if scope == "name"
                else "from your address")
        minutes, seconds = divmod(math.ceil(retry_after), 60)
        wait = f"{minutes} min {seconds} s" if minutes else f"{seconds} s"
        at = f" (at {until:%H:%M:%S} UTC)" if until is not None else ""
        super().__init__(f"too many failed logins {what}; try again in {wait}{at}")


class AccountError(ServiceError, ValueError):
    def __init__(self, name: str, problem: str) -> None:
        super().__init__(f"user {name!r}: {problem}")


@dataclass(frozen=True, kw_only=True)
class StaffUser:
    """The signed-in person, as the pages see them."""

    id: int
    name: str
    role: str
    active: bool = True
    generation: int = 0

    def may(self, action: str) -> bool:
        """May this person do ``action`` (a key of ``PERMISSIONS``)? Templates ask this."""
        return self.active and may(self.role, action)


def has_role(role: str, needed: str) -> bool:
    """True when ``role`` is ``needed`` or ranks above it."""
    if needed not in ROLES:
        raise UnknownRoleError(needed, ROLES)
    return role in ROLES and ROLES.index(role) >= ROLES.index(needed)


class LoginLimiter:
    """Sliding-window limit of failed logins, shared by every web worker through the database.

    At most ``attempts`` pending or failed attempts of one (name, address) pair and
    ``client_attempts`` of one address within ``window`` seconds; further attempts are refused
    (and not counted) until enough of them leave the window. A successful login forgives the
    failures of its pair. ``clock`` gives the current time (tests move it).

    Each attempt runs :meth:`begin` before the password is checked: stored and committed in
    its own short transaction of ``database``, then counted in another. :meth:`finish` records
    the outcome in the caller's transaction (with the audit entry), so a request never holds
    two connections at once (40 logins at once on a pool of 15 would otherwise wait on each
    other); should that transaction roll back, the attempt stays pending and keeps counting.
    """

    def __init__(
        self, database: Database, *, attempts: int = 5, window: float = 300.0,
        client_attempts: int | None = None, clock: Callable[[], datetime] | None = None,
    ) -> None:
        if attempts < 1:
            raise ValueError(f"attempts must be >= 1, got {attempts}")
        if window <= 0:
            raise ValueError(f"window must be > 0, got {window}")
        client_attempts = 20 * attempts if client_attempts is None else client_attempts
        if client_attempts < attempts:
            raise ValueError(
                f"client_attempts ({client_attempts}) must be >= attempts ({attempts})"
            )
        self.database = database
        self.attempts = attempts
        self.client_attempts = client_attempts
        self.window = window
        self._clock = clock or (lambda: datetime.now(UTC))

    def begin(self, *, name: str, client: str) -> int:
        """Store an attempt of ``name`` from ``client`` and count it; its id.

        Raises
        ------
        TooManyAttemptsError
            When the pair or the address has used up its attempts (the attempt is kept as
            ``limited`` and does not count).
        """
        key, client = name_key(name)[:100], client[:100]
        now = self._clock()
        with self.database.transaction() as s:
            row = LoginAttempt(at=now, client=client, name_key=key, outcome="pending")
            s.add(row)
            # attempts older than a day are of no use to any limit
            s.execute(delete(LoginAttempt).where(LoginAttempt.at < now - timedelta(days=1)))
            s.flush()
            attempt = row.id
        # a new transaction: it sees every attempt committed so far, this one included
        since = now - timedelta(seconds=self.window)
        refused: TooManyAttemptsError | None = None
        with self.database.transaction() as s:
            counted = (
                select(LoginAttempt.at).where(
                    LoginAttempt.client == client, LoginAttempt.at > since,
                    LoginAttempt.outcome.in_(_COUNTED), LoginAttempt.id != attempt,
                ).order_by(LoginAttempt.at)
            )
            for query, limit, scope in (
                (counted.where(LoginAttempt.name_key == key), self.attempts, "name"),
                (counted, self.client_attempts, "address"),
            ):
                others = list(s.scalars(query))
                if len(others) < limit:
                    continue
                # room again once all but limit - 1 of the others have left the window
                free_at = others[len(others) - limit] + timedelta(seconds=self.window)
                refused = TooManyAttemptsError(max(1.0, (free_at - now).total_seconds()),
                                               scope=scope, until=free_at)
                s.execute(update(LoginAttempt).where(LoginAttempt.id == attempt)
                          .values(outcome="limited"))
                break
        if refused is not None:
            raise refused
        return attempt

    def finish(self, attempt: int, *, ok: bool, session: Session) -> None:
        """Record in ``session`` how ``attempt`` ended; a success forgives its pair's failures."""
        row = session.get(LoginAttempt, attempt)
        if row is None:
            return
        row.outcome = "ok" if ok else "failed"
        if ok:
            session.execute(update(LoginAttempt).where(
                LoginAttempt.client == row.client, LoginAttempt.name_key == row.name_key,
                LoginAttempt.outcome == "failed",
            ).values(outcome="cleared").execution_options(synchronize_session=False))
        session.flush()


#: Outcomes that count against the limits (in flight or failed).
_COUNTED = ("pending", "failed")


@cache
def _dummy_hash() -> str:
    """A fixed scrypt hash (same parameters as real ones) of a random, never-used password.

    Built on first use, not at import; every process then keeps the same one.
    """
    return hash_password(secrets.token_urlsafe(24))


def authenticate(
    *, session: Session, name: str, password: str, limiter: LoginLimiter, client: str
) -> StaffUser:
    """Check a login; attempts count per (name, ``client``) and per ``client`` (the name in any
    case, so ``Ines.Admin`` and ``ines.admin`` share one count).

    The attempt is stored and counted (:meth:`LoginLimiter.begin`, its own committed
    transaction) before the password is checked. The password is run through scrypt whether or
    not the user exists or is active (against a dummy hash when there is no such user), so the
    answer's timing does not tell which names exist. ``session`` (on the limiter's database)
    reads the user and records the outcome and the audit entry.
    """
    attempt = limiter.begin(name=name, client=client)
    user = find_user(session=session, name=name)
    stored = user.password_hash if user is not None else _dummy_hash()
    valid = verify_password(password, stored)
    ok = user is not None and user.active and valid
    limiter.finish(attempt, ok=ok, session=session)
    if not ok or user is None:
        record(session=session, actor=name.strip()[:100] or "?", action="auth.refused",
               subject=client)
        raise LoginRefusedError()
    record(session=session, actor=user.name, action="auth.login", subject=client)
    return _staff(user)


def _staff(user: User) -> StaffUser:
    return StaffUser(id=user.id, name=user.name, role=user.role, active=user.active,
                     generation=user.session_generation)


def load_user(*, session: Session, user_id: int) -> StaffUser | None:
    """The active user with ``user_id``, or None (unknown or disabled)."""
    user = session.get(User, user_id)
    if user is None or not user.active:
        return None
    return _staff(user)


@dataclass(frozen=True, kw_only=True)
class SessionData:
    user_id: int
    sid: str
    generation: int


def session_user(*, session: Session, data: SessionData) -> StaffUser | None:
    """The user of a session, or None when the account is unknown or disabled or the session
    was ended (its generation is no longer the account's)."""
    user = load_user(session=session, user_id=data.user_id)
    if user is None or user.generation != data.generation:
        return None
    return user


def _bump(user: User) -> None:
    """End every session of ``user`` (an atomic increment in the database)."""
    user.session_generation = User.session_generation + 1  # type: ignore[assignment]


def end_session(*, session: Session, user: StaffUser, client: str = "") -> None:
    """Log ``user`` out: this session and every other one of the account stop working."""
    row = session.get(User, user.id)
    if row is None:
        return
    _bump(row)
    record(session=session, actor=row.name, action="auth.logout", subject=client)


class SessionSigner:
    """Signs and reads session cookies; tokens expire after ``max_age`` seconds."""

    def __init__(self, secret_key: str, *, max_age: int = SESSION_MAX_AGE) -> None:
        self._serializer = URLSafeTimedSerializer(secret_key, salt="tierwise.session")
        self._csrf_key = hashlib.sha256(("csrf:" + secret_key).encode()).digest()
        self.max_age = max_age

    def issue(self, user: StaffUser) -> str:
        return self._serializer.dumps(
            {"u": user.id, "s": secrets.token_urlsafe(16), "g": user.generation}
        )

    def read(self, token: str | None) -> SessionData | None:
        if not token:
            return None
        try:
            data = self._serializer.loads(token, max_age=self.max_age)
        except BadSignature:
            return None
        if not isinstance(data, dict) or not isinstance(data.get("u"), int):
            return None
        if not isinstance(data.get("g"), int):  # issued before session generations: refused
            return None
        return SessionData(user_id=data["u"], sid=str(data.get("s", "")), generation=data["g"])

    def csrf_for(self, sid: str) -> str:
        return csrf_token(self._csrf_key, sid)

    def csrf_ok(self, sid: str, token: str | None) -> bool:
        return verify_csrf(self._csrf_key, sid, token)


def csrf_token(key: bytes, sid: str) -> str:
    """HMAC-SHA256 of the session id (hex)."""
    return hmac.new(key, sid.encode(), hashlib.sha256).hexdigest()


def verify_csrf(key: bytes, sid: str, token: str | None) -> bool:
    return bool(token) and hmac.compare_digest(csrf_token(key, sid), str(token))


# -- accounts (admin) -------------------------------------------------------------------------
@dataclass(frozen=True, kw_only=True)
class Account:
    name: str
    role: str
    active: bool
    created_at: datetime


def list_accounts(*, session: Session) -> list[Account]:
    return [
        Account(name=u.name, role=u.role, active=u.active, created_at=u.created_at)
        for u in session.scalars(select(User).order_by(User.name))
    ]


def add_account(*, session: Session, name: str, role: str, password: str, actor: str) -> Account:
    if len(name.strip()) < 2:
        raise AccountError(name, "a name needs at least 2 characters")
    if len(password) < MIN_PASSWORD:
        raise AccountError(name, f"the password needs at least {MIN_PASSWORD} characters")
    user = add_user(session=session, name=name.strip(), role=role, password=password, actor=actor)
    return Account(name=user.name, role=user.role, active=user.active, created_at=user.created_at)


def _user(session: Session, name: str) -> User:
    user = find_user(session=session, name=name)
    if user is None:
        raise AccountError(name, "no such user")
    return user


def change_role(*, session: Session, name: str, role: str, actor: str) -> None:
    if role not in ROLES:
        raise UnknownRoleError(role, ROLES)
    user = _user(session, name)
    if user.name.casefold() == actor.casefold() and role != "admin":
        raise AccountError(name, "admins cannot lower their own role")
    old, user.role = user.role, role
    if old != role:
        _bump(user)
    record(session=session, actor=actor, action="users.role", subject=user.name,
           details={"from": old, "to": role})


def set_active(*, session: Session, name: str, active: bool, actor: str) -> None:
    user = _user(session, name)
    if user.name.casefold() == actor.casefold() and not active:
        raise AccountError(name, "admins cannot disable themselves")
    if user.active != active:
        _bump(user)
    user.active = active
    record(session=session, actor=actor, action="users.enable" if active else "users.disable",
           subject=user.name, details={"at": datetime.now(UTC).isoformat()})


def set_password(*, session: Session, name: str, password: str, actor: str) -> None:
    """Give ``name`` a new password (stored as a hash only); their sessions end."""
    if len(password) < MIN_PASSWORD:
        raise AccountError(name, f"the password needs at least {MIN_PASSWORD} characters")
    user = _user(session, name)
    user.password_hash = hash_password(password)
    _bump(user)
    record(session=session, actor=actor, action="users.password", subject=user.name)
