"""User names are unique and matched regardless of case; the login limits per name and address."""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

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
from server.services.database import Database
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


def test_login_matches_the_name_in_any_case(session: Session, attempts: Database) -> None:
    add_user(session=session, name="Rena.Case", role="analyst", password=PASSWORD)
    user = authenticate(session=session, name="rena.CASE", password=PASSWORD,
                        limiter=LoginLimiter(attempts), client="test")
    assert user.name == "Rena.Case"
    with pytest.raises(LoginRefusedError):
        authenticate(session=session, name="RENA.case", password="wrong-password",
                     limiter=LoginLimiter(attempts), client="test")


def test_admin_pages_find_the_account_in_any_case(session: Session) -> None:
    add_user(session=session, name="Ivo.Role", role="viewer", password=PASSWORD)
    change_role(session=session, name="ivo.role", role="analyst", actor="someone.admin")
    found = find_user(session=session, name="IVO.ROLE")
    assert found is not None and found.role == "analyst"


class Clock:
    """A hand-moved clock for the limiter (seconds after an invented start)."""

    def __init__(self) -> None:
        self.t = 0.0

    def __call__(self) -> datetime:
        return datetime(2031, 1, 6, 9, 0, tzinfo=UTC) + timedelta(seconds=self.t)


def _end(limiter: LoginLimiter, name: str, client: str, ok: bool = False) -> None:
    attempt = limiter.begin(name=name, client=client)
    with limiter.database.transaction() as s:
        limiter.finish(attempt, ok=ok, session=s)


def _fail(limiter: LoginLimiter, name: str, client: str) -> None:
    _end(limiter, name, client)


def test_per_name_limit_counts_every_spelling_of_the_name(attempts: Database) -> None:
    limiter = LoginLimiter(attempts, attempts=2, window=60.0, clock=Clock())
    for spelling in ("Ada", "ada"):
        _fail(limiter, spelling, "10.0.0.1")
    with pytest.raises(TooManyAttemptsError, match="for this user name from your address"):
        limiter.begin(name="ADA", client="10.0.0.1")


def test_limit_says_when_to_try_again_and_frees_after_the_window(attempts: Database) -> None:
    clock = Clock()
    limiter = LoginLimiter(attempts, attempts=3, window=60.0, clock=clock)
    for t in (0.0, 1.0, 2.0):
        clock.t = t
        _fail(limiter, "ada", "10.0.0.1")
    with pytest.raises(TooManyAttemptsError,
                       match=r"try again in 58 s \(at 09:01:00 UTC\)") as caught:
        limiter.begin(name="ada", client="10.0.0.1")
    assert caught.value.retry_after == 58.0 and caught.value.scope == "name"
    clock.t = 60.5  # the oldest failure has left the window
    _end(limiter, "ada", "10.0.0.1", ok=True)


def test_refused_attempts_do_not_extend_the_lockout(attempts: Database) -> None:
    clock = Clock()
    limiter = LoginLimiter(attempts, attempts=2, window=60.0, clock=clock)
    _fail(limiter, "ada", "10.0.0.1")
    _fail(limiter, "ada", "10.0.0.1")
    for t in range(1, 60, 5):
        clock.t = float(t)
        with pytest.raises(TooManyAttemptsError):
            limiter.begin(name="ada", client="10.0.0.1")
    clock.t = 60.0
    limiter.begin(name="ada", client="10.0.0.1")


def test_success_forgives_the_failures_of_its_name_and_address(attempts: Database) -> None:
    limiter = LoginLimiter(attempts, attempts=3, window=300.0, clock=Clock())
    _fail(limiter, "ada", "10.0.0.1")
    _fail(limiter, "ada", "10.0.0.1")
    _end(limiter, "ada", "10.0.0.1", ok=True)
    _fail(limiter, "ada", "10.0.0.1")
    _fail(limiter, "ada", "10.0.0.1")
    limiter.begin(name="ada", client="10.0.0.1")  # 2 failures since the success, not 4


def test_a_stranger_cannot_lock_the_owner_out(attempts: Database) -> None:
    limiter = LoginLimiter(attempts, attempts=5, window=300.0, clock=Clock())
    for _ in range(5):
        _fail(limiter, "ines.admin", "203.0.113.66")
    with pytest.raises(TooManyAttemptsError):
        limiter.begin(name="ines.admin", client="203.0.113.66")
    limiter.begin(name="ines.admin", client="10.0.0.7")  # the owner's own address


def test_address_limit_is_much_looser_than_the_name_limit(
    session: Session, attempts: Database
) -> None:
    """Five people behind one office address mistyping their passwords do not lock out a sixth."""
    limiter = LoginLimiter(attempts)
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


def test_address_limit_still_stops_one_address_trying_many_names(attempts: Database) -> None:
    limiter = LoginLimiter(attempts, attempts=5, client_attempts=8, window=300.0, clock=Clock())
    for i in range(8):
        _fail(limiter, f"name.{i}", "10.0.0.9")
    with pytest.raises(TooManyAttemptsError, match="from your address; try again"):
        limiter.begin(name="someone", client="10.0.0.9")
    limiter.begin(name="someone", client="10.0.0.10")  # addresses are counted on their own


def test_client_limit_below_name_limit_is_refused(attempts: Database) -> None:
    with pytest.raises(ValueError, match="client_attempts"):
        LoginLimiter(attempts, attempts=5, client_attempts=3)
