"""User names are unique and matched regardless of case; the login limits per name and address."""

from __future__ import annotations

import pytest
from sqlalchemy.orm import Session

from server.services.auth import (
    LoginLimiter,
    LoginRefusedError,
    TooManyAttemptsError,
    add_account,
    authenticate,
    change_role,
)
from server.services.errors import DuplicateUserError
from server.services.users import add_user, find_user

PASSWORD = "pass-word-1234"


def test_name_differing_only_in_case_is_refused(session: Session) -> None:
    add_account(session=session, name="tess.trainee", role="viewer", password=PASSWORD,
                actor="test")
    with pytest.raises(DuplicateUserError, match="Tess.Trainee"):
        add_account(session=session, name="Tess.Trainee", role="viewer", password=PASSWORD,
                    actor="test")
    with pytest.raises(DuplicateUserError):
        add_user(session=session, name="TESS.TRAINEE ", role="viewer", password=PASSWORD)


def test_non_ascii_names_fold_too(session: Session) -> None:
    # SQLite's lower() folds ASCII only; the check folds in Python (str.casefold).
    add_user(session=session, name="Ölaf.Ström", role="viewer", password=PASSWORD)
    with pytest.raises(DuplicateUserError):
        add_user(session=session, name="ölaf.ström", role="viewer", password=PASSWORD)


def test_login_matches_the_name_in_any_case(session: Session) -> None:
    add_user(session=session, name="Rena.Case", role="analyst", password=PASSWORD)
    user = authenticate(session=session, name="rena.CASE", password=PASSWORD,
                        limiter=LoginLimiter(), client="test")
    assert user.name == "Rena.Case"
    with pytest.raises(LoginRefusedError):
        authenticate(session=session, name="RENA.case", password="wrong-password",
                     limiter=LoginLimiter(), client="test")


def test_admin_pages_find_the_account_in_any_case(session: Session) -> None:
    add_user(session=session, name="Ivo.Role", role="viewer", password=PASSWORD)
    change_role(session=session, name="ivo.role", role="analyst", actor="someone.admin")
    found = find_user(session=session, name="IVO.ROLE")
    assert found is not None and found.role == "analyst"


def test_per_name_limit_counts_every_spelling_of_the_name() -> None:
    limiter = LoginLimiter(attempts=2, window=60.0)
    for spelling in ("Ada", "ada"):
        limiter.check(f"user:{spelling.casefold()}", now=0.0)
        limiter.failed(f"user:{spelling.casefold()}", now=0.0)
    with pytest.raises(TooManyAttemptsError):
        limiter.check("user:ada", now=1.0)


def test_address_limit_is_much_looser_than_the_name_limit(session: Session) -> None:
    """Five people behind one office address mistyping their passwords do not lock out a sixth."""
    limiter = LoginLimiter()
    assert limiter.client_attempts >= 10 * limiter.attempts
    names = [f"office.{i}" for i in range(6)]
    for name in names:
        add_user(session=session, name=name, role="viewer", password=PASSWORD)
    for name in names[:5]:
        with pytest.raises(LoginRefusedError):
            authenticate(session=session, name=name, password="typo-typo-typo",
                         limiter=limiter, client="10.0.0.1")
    assert authenticate(session=session, name=names[5], password=PASSWORD, limiter=limiter,
                        client="10.0.0.1").name == names[5]


def test_address_limit_still_stops_one_address_trying_many_names(session: Session) -> None:
    limiter = LoginLimiter(attempts=5, client_attempts=8, window=300.0)
    for i in range(8):
        limiter.failed("client:10.0.0.9", now=float(i))
    with pytest.raises(TooManyAttemptsError):
        limiter.check("client:10.0.0.9", now=9.0)
    limiter.check("user:someone", now=9.0)  # names are counted on their own


def test_client_limit_below_name_limit_is_refused() -> None:
    with pytest.raises(ValueError, match="client_attempts"):
        LoginLimiter(attempts=5, client_attempts=3)
