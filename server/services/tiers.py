"""Tier names under the ruleset a tier was decided under.

A policy change is a supported operation: the office may activate a ruleset with fewer (or other)
tiers than the official tiers on record. An official tier keeps the name it had when it was
decided: "Severe (3)" under ``county-demo 2031.2`` stays "Severe (3)" after ``persistence-500``
(tiers 0-1) becomes active, and the review says how the new policy takes over.

Which ruleset a decision was made under:

- ``confirmed`` and ``overridden`` decisions answer an assessment; the assessment's ruleset.
- ``recorded`` decisions (``tierwise decisions import``, official tiers from before tierwise) have
  no assessment. They are named under the *first ruleset the office activated* of their policy
  (the oldest version of the decision's ``policy`` name that is not a draft; of any name when
  the policy has none): the history came before tierwise, and the import checks tiers
  against the policy active at the time, which is the first one in the usual order of setting
  up. When that ruleset has no such tier, the decision is shown by its number alone.

:func:`tier_name` never fails: a tier a ruleset does not have is named by its number.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

from sqlalchemy import select
from sqlalchemy.orm import Session

from rules import Ruleset
from server.services.ruleset_cache import parsed
from server.store.models import Assessment
from server.store.models import Decision as DecisionRow
from server.store.models import Ruleset as RulesetRow

__all__ = ["Scale", "decision_scales", "first_ruleset", "tier_label", "tier_name"]


def tier_name(ruleset: Ruleset | None, tier: int) -> str:
    """Name of ``tier`` in ``ruleset``; the number as text when the ruleset has no such tier
    (or there is no ruleset). -1 is "insufficient data" under any ruleset."""
    if ruleset is None or not -1 <= tier <= ruleset.top_tier:
        return "insufficient data" if tier == -1 else str(tier)
    return ruleset.tier_name(tier)


def tier_label(ruleset: Ruleset | None, tier: int | None) -> str:
    """A tier as people read it: "High (2)"; "insufficient data"; "none" for no tier."""
    if tier is None:
        return "none"
    name = tier_name(ruleset, tier)
    return name if tier < 0 or name == str(tier) else f"{name} ({tier})"


@dataclass(frozen=True, kw_only=True)
class Scale:
    """The ruleset a decision was made under (``ruleset`` None: not known)."""

    ruleset_id: int | None
    label: str
    ruleset: Ruleset | None

    def name(self, tier: int) -> str:
        return tier_name(self.ruleset, tier)

    def public(self, tier: int) -> str:
        """The ruleset's public text of ``tier``; empty when it has no such tier."""
        if self.ruleset is None or not 0 <= tier <= self.ruleset.top_tier:
            return ""
        return self.ruleset.tiers[tier].public.strip()


UNKNOWN = Scale(ruleset_id=None, label="", ruleset=None)


def _scale(row: RulesetRow | None) -> Scale:
    if row is None:
        return UNKNOWN
    return Scale(ruleset_id=row.id, label=f"{row.name} {row.version}", ruleset=parsed(row))


def first_ruleset(*, session: Session, policy: str | None = None) -> RulesetRow | None:
    """The first ruleset the office activated (oldest version that is not a draft), of
    ``policy`` (a ruleset name) when given and it has one, else of any name."""
    query = select(RulesetRow).where(RulesetRow.status != "draft").order_by(RulesetRow.id)
    found = None
    if policy:
        found = session.scalar(query.where(RulesetRow.name == policy).limit(1))
    return found if found is not None else session.scalar(query.limit(1))


def decision_scales(*, session: Session, rows: Iterable[DecisionRow]) -> dict[int, Scale]:
    """The :class:`Scale` of each decision in ``rows``, by decision id (two queries)."""
    rows = list(rows)
    answered = [r.assessment_id for r in rows if r.assessment_id is not None]
    of_assessment: dict[int, int] = {}
    if answered:
        of_assessment = dict(session.execute(
            select(Assessment.id, Assessment.ruleset_id).where(Assessment.id.in_(answered))
        ).all())
    wanted = set(of_assessment.values())
    scales = {
        r.id: _scale(r)
        for r in session.scalars(select(RulesetRow).where(RulesetRow.id.in_(wanted)))
    } if wanted else {}
    recorded: dict[str, Scale] = {}
    out: dict[int, Scale] = {}
    for row in rows:
        rid = of_assessment.get(row.assessment_id) if row.assessment_id is not None else None
        if rid is not None:
            out[row.id] = scales.get(rid, UNKNOWN)
            continue
        policy = row.policy or ""
        if policy not in recorded:
            recorded[policy] = _scale(first_ruleset(session=session, policy=policy))
        out[row.id] = recorded[policy]
    return out
