"""Which ruleset versions are active, and the policies shipped with tierwise.

Several policies are active at once (one per pathogen, one for hospital pressure, ...). A policy
is a ruleset ``name``; its versions replace each other, so each policy has at most one active
version (:mod:`server.services.ruleset_activation` stores, activates and retires them).
:func:`active_rulesets` lists the active ones in a stable order: by the first time each policy
name was stored (the lowest ruleset id of the name), so the policy the office adopted first comes
first and is the *lead* policy (:func:`active_ruleset` without a name), which pages that show one
policy show by default and which imported decisions belong to unless told otherwise.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

from sqlalchemy import func, select
from sqlalchemy.orm import Session

import rules
from server.services.errors import ServiceError
from server.store.models import Ruleset as RulesetRow

__all__ = [
    "PACKAGED_POLICIES",
    "InactivePolicyError",
    "active_ruleset",
    "active_rulesets",
    "default_ruleset_path",
    "policies_dir",
    "require_policy",
]


def active_rulesets(*, session: Session) -> list[RulesetRow]:
    """Every active ruleset (one per policy name), the lead policy first.

    The order is stable: by the first time each policy's name was stored (lowest ruleset id of
    the name), so a new version of a policy keeps its place."""
    rows = list(session.scalars(select(RulesetRow).where(RulesetRow.status == "active")))
    if len(rows) < 2:
        return rows
    first = dict(session.execute(
        select(RulesetRow.name, func.min(RulesetRow.id))
        .where(RulesetRow.name.in_(sorted({r.name for r in rows})))
        .group_by(RulesetRow.name)
    ).all())
    return sorted(rows, key=lambda r: (first[r.name], r.id))


def active_ruleset(*, session: Session, policy: str | None = None) -> RulesetRow | None:
    """The active ruleset of ``policy`` (a ruleset name), or the lead policy's when None
    (the first of :func:`active_rulesets`); None when there is none."""
    if policy is not None:
        return session.scalar(
            select(RulesetRow).where(RulesetRow.status == "active", RulesetRow.name == policy)
            .order_by(RulesetRow.id.desc()).limit(1)
        )
    rows = active_rulesets(session=session)
    return rows[0] if rows else None


class InactivePolicyError(ServiceError, LookupError):
    """A policy name that is not the name of an active ruleset (pages answer 404)."""

    def __init__(self, policy: str, active: Sequence[str]) -> None:
        self.policy = policy
        choices = ", ".join(active) or "none is active"
        super().__init__(f"policy: {policy!r} is not an active policy (active: {choices})")


def require_policy(*, session: Session, policy: str | None) -> RulesetRow | None:
    """The active ruleset of ``policy`` (the lead's when None; None when nothing is active).

    Raises :class:`InactivePolicyError` for a name that is not active."""
    row = active_ruleset(session=session, policy=policy)
    if row is None and policy is not None:
        raise InactivePolicyError(policy, [r.name for r in active_rulesets(session=session)])
    return row


PACKAGED_POLICIES = Path(rules.__file__).with_name("policies")


def policies_dir(configured: Path | None) -> Path:
    """The configured rules folder, or the policies shipped with tierwise."""
    return configured if configured is not None else PACKAGED_POLICIES


def default_ruleset_path(configured: Path | None) -> Path:
    """The policy the demo and a fresh installation start with."""
    return policies_dir(configured) / "county.yaml"
