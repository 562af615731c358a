"""The one permission check of a named account (users.permitted_account), used by the services
that record events and testing-change verdicts."""

from __future__ import annotations

import pytest
from sqlalchemy.orm import Session

from server.services.users import add_user, may, permitted_account


@pytest.mark.parametrize(("role", "allowed"), [
    ("viewer", False), ("analyst", True), ("approver", True), ("admin", True),
], ids=["viewer", "analyst", "approver", "admin"])
def test_permitted_account_follows_the_permissions_table(
    session: Session, role: str, allowed: bool
) -> None:
    add_user(session=session, name=f"ida.{role}", role=role, password="long enough secret")
    found = permitted_account(session=session, name=f"ida.{role}", action="record_event")
    assert (found is not None) is allowed is may(role, "record_event")
    if found is not None:
        assert found.name == f"ida.{role}"


def test_permitted_account_refuses_an_inactive_account(session: Session) -> None:
    user = add_user(session=session, name="ivo.analyst", role="analyst",
                    password="long enough secret")
    assert permitted_account(session=session, name="ivo.analyst", action="record_event") is user
    user.active = False
    session.flush()
    assert permitted_account(session=session, name="ivo.analyst", action="record_event") is None


def test_permitted_account_refuses_an_unknown_or_differently_spelled_name(
    session: Session,
) -> None:
    add_user(session=session, name="ivo.analyst", role="analyst", password="long enough secret")
    assert permitted_account(session=session, name="nobody", action="record_event") is None
    # the services match the stored spelling exactly, as before the check was shared
    assert permitted_account(session=session, name="Ivo.Analyst", action="record_event") is None


def test_permitted_account_names_an_unknown_action(session: Session) -> None:
    add_user(session=session, name="ivo.analyst", role="analyst", password="long enough secret")
    with pytest.raises(KeyError, match="unknown action 'fly'"):
        permitted_account(session=session, name="ivo.analyst", action="fly")
