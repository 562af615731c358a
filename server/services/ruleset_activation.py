"""Storing a ruleset file as a version, activating it (which evaluates it) and retiring it.

Activating a ruleset (:func:`activate_ruleset`, the one way every caller activates) retires the
other active versions of the same name (and, with ``replaces``, of another policy it takes over
from), writes the audit log and evaluates the new one
(:func:`server.services.evaluation.evaluate_districts`), so each policy has at most one active
version. Which versions are active, and in which order: :mod:`server.services.rulesets`.
"""

from __future__ import annotations

from collections.abc import Mapping
from datetime import UTC, datetime, timedelta
from pathlib import Path

from sqlalchemy import select, update
from sqlalchemy.orm import Session

from rules import parse_ruleset
from server.services.audit import record
from server.services.district_data import store_measures
from server.services.evaluation import EvaluationRun, evaluate_districts
from server.services.indicator_kinds import indicator_check
from server.services.notify import NotifyConfig
from server.store.models import Ruleset as RulesetRow

__all__ = ["activate_ruleset", "retire_ruleset", "store_ruleset"]


def store_ruleset(
    *, session: Session, path: Path, author: str = "", activate: bool = False,
    stale_after: Mapping[str, timedelta] | None = None, replaces: str | None = None,
) -> RulesetRow:
    """Store the ruleset file as a version (once per distinct text); optionally make it active.

    Activation is :func:`activate_ruleset` (the other versions of its name retired, and those of
    ``replaces``; audited, evaluated with ``stale_after`` as in
    :func:`~server.services.evaluation.evaluate_districts`).
    """
    text = path.read_text(encoding="utf-8")
    loaded = parse_ruleset(text, source=str(path),
                           indicators=indicator_check(store_measures(session=session)))
    row = session.scalar(select(RulesetRow).where(RulesetRow.sha256 == loaded.sha256))
    if row is None:
        row = RulesetRow(
            name=loaded.name, version=str(loaded.version), yaml_text=text, sha256=loaded.sha256,
            author=author, created_at=datetime.now(UTC), status="draft",
        )
        session.add(row)
        session.flush()
        record(session=session, actor=author or "system", action="ruleset.store",
               subject=f"{loaded.name} {loaded.version}", details={"sha256": loaded.sha256})
    session.flush()
    if activate and row.status != "active":
        activate_ruleset(session=session, row=row, actor=author or "system",
                         stale_after=stale_after, replaces=replaces)
    return row


def activate_ruleset(
    *, session: Session, row: RulesetRow, actor: str, notify: NotifyConfig | None = None,
    stale_after: Mapping[str, timedelta] | None = None, replaces: str | None = None,
) -> EvaluationRun | None:
    """Make ``row`` the active version of its policy, audit it, and evaluate it on the newest data.

    The other active versions of the same name are retired; other policies stay active, unless
    ``replaces`` names one this ruleset takes over from (its active version is retired too, and
    its decisions count for this policy: :func:`server.services.review_official.policy_owners`).
    Used by every way of activating (:func:`store_ruleset`, the policies page). Returns the
    evaluation (None when there are no data yet); ``notify`` and ``stale_after`` as in
    :func:`~server.services.evaluation.evaluate_districts`.
    """
    names = {row.name} | ({replaces} if replaces else set())
    session.execute(
        update(RulesetRow)
        .where(RulesetRow.status == "active", RulesetRow.id != row.id,
               RulesetRow.name.in_(sorted(names)))
        .values(status="retired")
    )
    row.status = "active"
    record(session=session, actor=actor, action="ruleset.activate",
           subject=f"{row.name} {row.version}",
           details={"sha256": row.sha256, "policy": row.name,
                    **({"replaces": replaces} if replaces else {})})
    session.flush()
    return evaluate_districts(session=session, ruleset_row=row, notify=notify,
                              stale_after=stale_after)


def retire_ruleset(*, session: Session, row: RulesetRow, actor: str) -> None:
    """Stop running an active policy: its version is retired (audited as ``ruleset.retire``);
    its assessments and decisions stay and count for no other policy
    (:func:`server.services.review_official.policy_owners`)."""
    if row.status != "active":
        return
    row.status = "retired"
    record(session=session, actor=actor, action="ruleset.retire",
           subject=f"{row.name} {row.version}", details={"sha256": row.sha256, "policy": row.name})
    session.flush()
