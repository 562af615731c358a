"""What the seeded demo shows on its newest morning, read back from the database.

The demo command prints these facts after seeding (never a fixed text), and the demo's tests
check them: the tiers in force and recommended, the changes that await review, the prepare
signals showing, and each demo feed's health. Everything it reads is invented demo data.

The demo runs several policies at once (``demo_seed.seed.DEMO_POLICIES``): the fields of
:class:`DemoMorning` tell the lead policy's story, :attr:`DemoMorning.policies` every policy's.
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass
from datetime import date, datetime
from typing import Any

from demo_seed.feeds import demo_catalogue
from server.services.database import Database
from server.services.feed_health import feed_statuses
from server.services.review import PendingChange, current_run, official_tiers, pending_changes
from server.services.rulesets import active_rulesets

__all__ = ["DemoMorning", "FeedHealth", "Pending", "PolicyMorning", "demo_morning",
           "morning_lines"]


@dataclass(frozen=True, kw_only=True)
class Pending:
    """A change that awaits review: district name, official and recommended tier names."""

    name: str
    official: str
    recommended: str
    up: bool
    since: date


@dataclass(frozen=True, kw_only=True)
class PolicyMorning:
    """One active policy on the newest morning: its tiers in force and recommended (tier name
    -> districts), the districts it assessed and its changes awaiting review."""

    name: str
    official: dict[str, int]
    recommended: dict[str, int]
    assessed: int
    pending: tuple[Pending, ...]


@dataclass(frozen=True, kw_only=True)
class FeedHealth:
    name: str
    health: str
    newest: date | None


@dataclass(frozen=True, kw_only=True)
class DemoMorning:
    """The newest morning of the demo database."""

    last_day: date
    official: dict[str, int]       # tier name -> districts, in tier order
    recommended: dict[str, int]
    official_levels: frozenset[int]
    recommended_levels: frozenset[int]
    pending: tuple[Pending, ...]
    signals: tuple[tuple[str, tuple[str, ...]], ...]  # (district name, signal ids)
    feeds: tuple[FeedHealth, ...]
    policies: tuple[PolicyMorning, ...] = ()

    @property
    def late_feeds(self) -> tuple[FeedHealth, ...]:
        return tuple(f for f in self.feeds if f.health != "ok")


def demo_morning(db: Database, *, now: datetime, time_zone: str = "UTC") -> DemoMorning:
    """Read the demo's newest morning from ``db`` (feed health judged at ``now``).

    Raises
    ------
    LookupError
        If the database holds no evaluation yet.
    """
    policies = []
    with db.sessions() as session:
        run = current_run(session=session)
        if run is None:
            raise LookupError("the demo database holds no evaluation")
        official = official_tiers(session=session, published_only=True)
        pending = pending_changes(session=session, policy=run.ruleset_row.name)
        for row in active_rulesets(session=session):
            other = current_run(session=session, policy=row.name)
            if other is None:
                continue
            in_force = official_tiers(session=session, published_only=True, policy=row.name)
            policies.append(PolicyMorning(
                name=row.name, official=_by_name(other.ruleset, [o.tier for o in
                                                                  in_force.values()]),
                recommended=_by_name(other.ruleset, [i.assessment.recommended_tier
                                                     for i in other.items]),
                assessed=len(other.items),
                pending=_pending(pending_changes(session=session, policy=row.name)),
            ))
        statuses = feed_statuses(session=session, catalogue=demo_catalogue(), now=now,
                                 time_zone=time_zone)
    off = Counter(o.tier for o in official.values())
    rec = Counter(i.assessment.recommended_tier for i in run.items)
    return DemoMorning(
        last_day=run.last_day,
        official=_by_name(run.ruleset, list(off.elements())),
        recommended=_by_name(run.ruleset, list(rec.elements())),
        official_levels=frozenset(off), recommended_levels=frozenset(rec) - {-1},
        pending=_pending(pending),
        policies=tuple(policies),
        signals=tuple(
            (i.name, tuple(k for k, v in i.assessment.prepare_signals.items() if v))
            for i in run.items if any(i.assessment.prepare_signals.values())
        ),
        feeds=tuple(FeedHealth(name=s.name, health=s.health, newest=s.newest_ref_date)
                    for s in statuses),
    )


def _by_name(ruleset: Any, tiers: list[int]) -> dict[str, int]:
    """Districts per tier name, in tier order (insufficient data left out)."""
    count = Counter(tiers)
    return {ruleset.tier_name(k): count[k] for k in range(len(ruleset.tiers)) if count[k]}


def _pending(changes: list[PendingChange]) -> tuple[Pending, ...]:
    return tuple(
        Pending(name=p.name, official=p.official_name or "none", recommended=p.recommended_name,
                up=p.official_tier is None or p.recommended_tier > p.official_tier,
                since=p.since)
        for p in changes
    )


def _counts(tiers: dict[str, int]) -> str:
    return ", ".join(f"{name} {n}" for name, n in tiers.items())


def morning_lines(morning: DemoMorning) -> list[str]:
    """The demo command's summary of ``morning``, one line each."""
    lines = [
        f"Newest data: {morning.last_day}. Official tiers: {_counts(morning.official)}; "
        f"recommended: {_counts(morning.recommended)}",
    ]
    if morning.pending:
        lines.append(f"{len(morning.pending)} "
                     f"{'change awaits' if len(morning.pending) == 1 else 'changes await'} "
                     "review (sign in as the approver):")
        lines += [f"  {p.name}: {p.official} -> {p.recommended} "
                  f"(step {'up' if p.up else 'down'}, recommended since {p.since})"
                  for p in morning.pending]
    else:
        lines.append("No change awaits review")
    if morning.signals:
        shown = "; ".join(f"{name} ({', '.join(ids)})" for name, ids in morning.signals)
        lines.append(f"Prepare signals showing: {shown}")
    else:
        lines.append("No prepare signal is showing")
    for policy in morning.policies[1:]:
        lines.append(f"Policy {policy.name}: official {_counts(policy.official) or 'none'}; "
                     f"recommended {_counts(policy.recommended) or 'none'}; "
                     f"{len(policy.pending)} awaiting review")
    fresh = [f.name for f in morning.feeds if f.health == "ok"]
    late = [f"{f.name} ({f.health}, newest data {f.newest or 'none'})"
            for f in morning.late_feeds]
    lines.append(f"Feeds on time: {', '.join(fresh) or 'none'}"
                 + (f"; needing attention: {', '.join(late)}" if late else ""))
    return lines
