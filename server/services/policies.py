"""Use case: the policies pages: the active ruleset shown readably, versions, diffs, drafts.

A draft is validated by the rules engine's loader, whose errors name the line, column and key
path (``draft.yaml:23:7: criteria[1].enter[2]: ...``); a valid draft is stored as a ruleset
version with status ``draft``; an admin activates it (the active version of the same policy
name is retired; other policies stay active).
"""

from __future__ import annotations

import difflib
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta

from sqlalchemy import select
from sqlalchemy.orm import Session

from rules import IndicatorSpec, Ruleset, RulesetError, parse_ruleset
from server.services.audit import record
from server.services.district_data import store_measures
from server.services.errors import ServiceError
from server.services.indicator_kinds import indicator_check
from server.services.notify import NotifyConfig
from server.services.ruleset_activation import activate_ruleset, retire_ruleset
from server.services.ruleset_cache import parsed
from server.services.rulesets import active_ruleset
from server.store.models import Ruleset as RulesetRow

__all__ = [
    "DraftCheck",
    "DraftRefusedError",
    "PolicyView",
    "ThresholdRow",
    "ComparisonLine",
    "PolicyComparison",
    "policy_comparison",
    "UnknownPolicyError",
    "VersionLine",
    "activate_version",
    "check_draft",
    "parsed",
    "policy_diff",
    "policy_view",
    "store_draft",
    "versions",
]

class UnknownPolicyError(ServiceError, LookupError):
    def __init__(self, ruleset_id: int) -> None:
        super().__init__(f"no ruleset version with id {ruleset_id}")


@dataclass(frozen=True, kw_only=True)
class VersionLine:
    id: int
    name: str
    version: str
    status: str
    sha256: str
    author: str
    created_at: datetime


@dataclass(frozen=True, kw_only=True)
class ThresholdRow:
    criterion: str
    indicator: str
    statistic: str
    direction: str
    cells: tuple[str, ...]
    note: str
    unit: str = ""


@dataclass(frozen=True, kw_only=True)
class PolicyView:
    version: VersionLine
    description: str
    tiers: tuple[tuple[int, str, str, str], ...]
    thresholds: tuple[ThresholdRow, ...]
    timing: tuple[tuple[str, str], ...]
    gates: tuple[str, ...]
    prepare: tuple[str, ...]
    combination: str
    yaml_text: str


def _line(row: RulesetRow) -> VersionLine:
    return VersionLine(id=row.id, name=row.name, version=row.version, status=row.status,
                       sha256=row.sha256, author=row.author, created_at=row.created_at)


def versions(*, session: Session) -> list[VersionLine]:
    rows = session.scalars(select(RulesetRow).order_by(RulesetRow.name, RulesetRow.id.desc()))
    return [_line(r) for r in rows]


def _cell(enter: float | None, exit_: float | None, rising: bool, spec: IndicatorSpec) -> str:
    """``>= 75 per 100 000 (leave < 35 per 100 000)``, in the indicator's decimals and unit."""
    if enter is None:
        return "—"
    op, rel = ("≥", "<") if rising else ("≤", ">")
    text = f"{op} {spec.format(enter)}"
    if exit_ == enter or exit_ is None:
        return text
    return f"{text} (leave {rel} {spec.format(exit_)})"


def _row(rs: Ruleset, cid: str, th: object, note: str) -> ThresholdRow:
    crit = rs.criterion(cid)
    spec = rs.indicator(crit.indicator)
    thresholds = th if th is not None else crit.thresholds
    rising = thresholds.direction == "rising"  # type: ignore[attr-defined]
    cells = tuple(
        _cell(e, x, rising, spec)
        for e, x in zip(thresholds.enter, thresholds.exit, strict=True)  # type: ignore[attr-defined]
    )
    return ThresholdRow(
        criterion=crit.label or spec.label, indicator=crit.indicator,
        statistic=crit.statistic, direction=crit.direction, cells=cells, note=note,
        unit=spec.unit,
    )


def policy_view(*, session: Session, ruleset_id: int | None = None) -> PolicyView | None:
    """The chosen version (default: the lead active policy's) as tiers, a thresholds table and
    timing."""
    if ruleset_id is None:
        row = active_ruleset(session=session)
        if row is None:
            return None
    else:
        row = session.get(RulesetRow, ruleset_id)
        if row is None:
            raise UnknownPolicyError(ruleset_id)
    rs = parsed(row)
    rows = [_row(rs, c.id, None, f"inactive below {c.min_count:g} events" if c.min_count else "")
            for c in rs.criteria]
    for cond in rs.conditions:
        if cond.patch.thresholds is not None:
            rows.append(_row(rs, cond.patch.criterion, cond.patch.thresholds,
                             f"while {cond.source} is at tier {cond.level_at_least} or above"))
    for ov in rs.overrides:
        for p in ov.patches:
            if p.thresholds is not None:
                rows.append(_row(rs, p.criterion, p.thresholds, f"override {ov.id}"))
    t = rs.timing
    timing = (
        ("Days to confirm a rise", str(t.confirm_days)),
        ("Days to confirm a fall", str(t.release_days)),
        ("Minimum days in a tier", str(t.min_days_in_tier)),
        ("Most tiers down at once",
         "no limit" if t.max_steps_down is None else str(t.max_steps_down)),
        ("Days until a decision takes effect", str(t.effective_delay_days)),
    )
    gates = tuple(
        f"{g.id}: {rs.indicator(g.indicator).label} {g.op.replace('_', ' ')} {g.value:g}"
        if g.indicator and g.op and g.value is not None
        else f"{g.id}: {', '.join(g.known)} must be known"
        for g in rs.gates
    )
    prepare = tuple(f"{s.id}: {s.message or s.indicator}" for s in rs.prepare)
    comb = rs.combination
    combination = {"highest": "the highest criterion level",
                   "at_least": f"the highest tier at least {comb.m} criteria reach",
                   "score": "a weighted score of criterion levels"}[comb.method]
    return PolicyView(
        version=_line(row), description=rs.description.strip(),
        tiers=tuple((tr.level, tr.name, tr.staff.strip(), tr.public.strip()) for tr in rs.tiers),
        thresholds=tuple(rows), timing=timing, gates=gates, prepare=prepare,
        combination=combination, yaml_text=row.yaml_text,
    )


def policy_diff(*, session: Session, old_id: int, new_id: int) -> list[str]:
    """Unified diff of two versions' YAML texts."""
    old, new = session.get(RulesetRow, old_id), session.get(RulesetRow, new_id)
    if old is None:
        raise UnknownPolicyError(old_id)
    if new is None:
        raise UnknownPolicyError(new_id)
    return list(difflib.unified_diff(
        old.yaml_text.splitlines(), new.yaml_text.splitlines(),
        fromfile=f"{old.name} {old.version}", tofile=f"{new.name} {new.version}", lineterm="",
    ))


@dataclass(frozen=True, kw_only=True)
class ComparisonLine:
    """One item of a policy as two versions state it (``None``: not in that version)."""

    section: str
    item: str
    old: str | None
    new: str | None

    @property
    def changed(self) -> bool:
        return self.old != self.new


@dataclass(frozen=True, kw_only=True)
class PolicyComparison:
    old: VersionLine
    new: VersionLine
    lines: tuple[ComparisonLine, ...]

    @property
    def changed(self) -> tuple[ComparisonLine, ...]:
        return tuple(c for c in self.lines if c.changed)


def _items(view: PolicyView) -> dict[tuple[str, str], str]:
    """A policy's statements keyed by (section, item), for comparing versions."""
    out: dict[tuple[str, str], str] = {}
    names = {level: name for level, name, _s, _p in view.tiers}
    for level, name, staff, public in view.tiers:
        out[("Tiers", f"Tier {level}")] = name
        out[("Tiers", f"Tier {level}: staff guidance")] = staff
        out[("Tiers", f"Tier {level}: public text")] = public
    for r in view.thresholds:
        key = r.criterion + (f" ({r.note})" if r.note else "")
        out[("Thresholds", f"{key}: compared on")] = (
            "interval bounds" if r.statistic == "bounds" else "estimate")
        for k, cell in enumerate(r.cells, start=1):
            out[("Thresholds", f"{key}: {names.get(k, f'tier {k}')} ({k})")] = cell
    for label, value in view.timing:
        out[("Timing", label)] = value
    out[("Combination", "Criteria combine by")] = view.combination
    for g in view.gates:
        gid, _sep, text = g.partition(": ")
        out[("Gates", gid)] = text
    for p in view.prepare:
        pid, _sep, text = p.partition(": ")
        out[("Prepare signals", pid)] = text
    return out


def policy_comparison(*, session: Session, old_id: int, new_id: int) -> PolicyComparison:
    """Two versions compared item by item (tiers, thresholds with units, timing, gates,
    prepare signals), in the order of the newer version, then items only the older one has."""
    old_view = policy_view(session=session, ruleset_id=old_id)
    new_view = policy_view(session=session, ruleset_id=new_id)
    assert old_view is not None and new_view is not None
    old, new = _items(old_view), _items(new_view)
    keys = list(new) + [k for k in old if k not in new]
    lines = tuple(ComparisonLine(section=k[0], item=k[1], old=old.get(k), new=new.get(k))
                  for k in keys)
    return PolicyComparison(old=old_view.version, new=new_view.version, lines=lines)


@dataclass(frozen=True, kw_only=True)
class DraftCheck:
    ok: bool
    message: str
    name: str | None = None
    version: str | None = None


def check_draft(
    text: str, *, filename: str = "draft.yaml", session: Session | None = None
) -> DraftCheck:
    """Validate a draft's YAML text; the message names line, column and key of any problem.

    Its indicators are checked against the registry of indicator kinds, on the standard
    measures and (given ``session``) the store's."""
    measures = store_measures(session=session) if session is not None else None
    try:
        rs = parse_ruleset(text, source=filename, indicators=indicator_check(measures))
    except RulesetError as exc:
        return DraftCheck(ok=False, message=str(exc))
    return DraftCheck(ok=True, message=f"{rs.name} {rs.version} is valid", name=rs.name,
                      version=str(rs.version))


class DraftRefusedError(ServiceError, ValueError):
    def __init__(self, message: str) -> None:
        super().__init__(message)


def store_draft(*, session: Session, text: str, author: str, filename: str = "draft.yaml") -> int:
    """Store a valid draft as a new version (status draft); returns its id."""
    try:
        rs = parse_ruleset(text, source=filename,
                           indicators=indicator_check(store_measures(session=session)))
    except RulesetError as exc:
        raise DraftRefusedError(str(exc)) from exc
    same = session.scalar(select(RulesetRow).where(RulesetRow.sha256 == rs.sha256))
    if same is not None:
        return same.id
    clash = session.scalar(select(RulesetRow).where(
        RulesetRow.name == rs.name, RulesetRow.version == str(rs.version)))
    if clash is not None:
        raise DraftRefusedError(
            f"{filename}: version {rs.version} of {rs.name} exists already; raise the version")
    row = RulesetRow(name=rs.name, version=str(rs.version), yaml_text=text, sha256=rs.sha256,
                     author=author, created_at=datetime.now(UTC), status="draft")
    session.add(row)
    session.flush()
    record(session=session, actor=author, action="ruleset.draft",
           subject=f"{rs.name} {rs.version}", details={"sha256": rs.sha256})
    return row.id


def activate_version(
    *, session: Session, ruleset_id: int, actor: str, notify: NotifyConfig | None = None,
    stale_after: Mapping[str, timedelta] | None = None,
) -> None:
    """Make a version active (the active version of its name is retired; other policies stay
    active) and evaluate it on the newest
    data (:func:`server.services.ruleset_activation.activate_ruleset`; ``stale_after``: the feeds'
    staleness limits)."""
    row = session.get(RulesetRow, ruleset_id)
    if row is None:
        raise UnknownPolicyError(ruleset_id)
    activate_ruleset(session=session, row=row, actor=actor, notify=notify,
                     stale_after=stale_after)


def retire_version(*, session: Session, ruleset_id: int, actor: str) -> None:
    """Stop running an active policy version
    (:func:`server.services.ruleset_activation.retire_ruleset`); the other active policies go
    on."""
    row = session.get(RulesetRow, ruleset_id)
    if row is None:
        raise UnknownPolicyError(ruleset_id)
    retire_ruleset(session=session, row=row, actor=actor)
