"""Session tokens and session generations on both back ends."""

from __future__ import annotations

import pytest
from itsdangerous import URLSafeTimedSerializer
from sqlalchemy.orm import Session

from server.services.auth import (
    LoginLimiter,
    SessionSigner,
    authenticate,
    change_role,
    end_session,
    session_user,
    set_active,
    set_password,
)
from server.services.database import Database
from server.services.users import add_user

KEY = "s" * 40


@pytest.fixture
def limiter(attempts: Database) -> LoginLimiter:
    return LoginLimiter(attempts)


def _user(session: Session, limiter: LoginLimiter, name: str = "tess.token",
          role: str = "analyst"):
    add_user(session=session, name=name, role=role, password="pass-word-1234")
    return authenticate(session=session, name=name, password="pass-word-1234",
                        limiter=limiter, client="test")


def test_session_token_round_trip_carries_generation(
    session: Session, limiter: LoginLimiter
) -> None:
    user = _user(session, limiter)
    signer = SessionSigner(KEY)
    data = signer.read(signer.issue(user))
    assert data is not None
    assert (data.user_id, data.generation) == (user.id, 0)
    assert session_user(session=session, data=data) == user


def test_session_token_without_generation_is_refused() -> None:
    old = URLSafeTimedSerializer(KEY, salt="tierwise.session").dumps({"u": 1, "s": "x"})
    assert SessionSigner(KEY).read(old) is None


def test_session_token_with_other_key_is_refused(session: Session, limiter: LoginLimiter) -> None:
    token = SessionSigner("o" * 40).issue(_user(session, limiter))
    assert SessionSigner(KEY).read(token) is None


def test_end_session_refuses_earlier_tokens(session: Session, limiter: LoginLimiter) -> None:
    user = _user(session, limiter)
    signer = SessionSigner(KEY)
    data = signer.read(signer.issue(user))
    assert data is not None
    end_session(session=session, user=user)
    session.flush()
    assert session_user(session=session, data=data) is None


@pytest.mark.parametrize(
    "change",
    [
        lambda s: change_role(session=s, name="tess.token", role="viewer", actor="admin"),
        lambda s: set_active(session=s, name="tess.token", active=False, actor="admin"),
        lambda s: set_password(session=s, name="tess.token", password="new-pass-word-1",
                               actor="admin"),
    ],
    ids=["role", "disable", "password"],
)
def test_account_changes_refuse_earlier_tokens(
    session: Session, limiter: LoginLimiter, change: object
) -> None:
    user = _user(session, limiter)
    signer = SessionSigner(KEY)
    data = signer.read(signer.issue(user))
    assert data is not None
    change(session)  # type: ignore[operator]
    session.flush()
    assert session_user(session=session, data=data) is None


def test_unchanged_role_keeps_sessions(session: Session, limiter: LoginLimiter) -> None:
    user = _user(session, limiter)
    signer = SessionSigner(KEY)
    data = signer.read(signer.issue(user))
    assert data is not None
    change_role(session=session, name="tess.token", role="analyst", actor="admin")
    session.flush()
    assert session_user(session=session, data=data) is not None


def test_token_of_new_generation_is_accepted(session: Session, limiter: LoginLimiter) -> None:
    user = _user(session, limiter)
    end_session(session=session, user=user)
    session.flush()
    again = authenticate(session=session, name="tess.token", password="pass-word-1234",
                         limiter=limiter, client="test")
    assert again.generation == 1
    signer = SessionSigner(KEY)
    data = signer.read(signer.issue(again))
    assert data is not None
    assert session_user(session=session, data=data) == again
