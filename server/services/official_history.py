"""Use case: bring in the official tiers a district had before tierwise decided them.

An office that starts using tierwise already has a history of official tiers, decided on paper or
in another system. That history belongs in the decision table, so the district pages show the
official line against the recommendations from the first day, and the review queue asks only
about what changed since. The file is a CSV with one decision per row::

    region,effective_date,tier,reason,decided_by,decided_at
    D01,2026-03-12,2,"Weekly review: step down agreed",otto.approver,2026-03-11T15:00:00+00:00

``region``, ``effective_date`` (ISO 8601 date), ``tier`` (0 .. the active ruleset's top tier) and
``reason`` are required; ``decided_by`` (an existing staff account, else left empty) and
``decided_at`` (ISO 8601 with an offset; default: midnight UTC of the effective date) are optional.
Every row is checked before anything is stored; one bad row rejects the file, with the file, line
and field named. Imported rows are decisions of kind ``recorded`` with no assessment (tierwise did
not recommend them), published from their decision time unless asked otherwise, and audited.
Importing the same file again stores nothing: a row equal to a stored decision (district,
effective date, tier and reason) is skipped.
"""

from __future__ import annotations

import csv
import io
from collections.abc import Iterable
from dataclasses import dataclass
from datetime import UTC, date, datetime, time
from pathlib import Path

from sqlalchemy import select
from sqlalchemy.orm import Session

from server.services.audit import record
from server.services.errors import InputFileError
from server.services.hierarchy import hierarchy
from server.services.review_official import policy_condition
from server.services.ruleset_cache import parsed
from server.services.rulesets import require_policy
from server.services.users import name_key
from server.store.models import Decision, Region, User

__all__ = [
    "COLUMNS",
    "KIND",
    "ImportResult",
    "OfficialRecord",
    "import_official_history",
    "read_official_history",
]

#: Columns of the file: required first, then optional.
COLUMNS = ("region", "effective_date", "tier", "reason", "decided_by", "decided_at")
_REQUIRED = COLUMNS[:4]
#: Decision kind of an imported row.
KIND = "recorded"
_MAX_BYTES = 20 * 1024 * 1024


@dataclass(frozen=True, kw_only=True)
class OfficialRecord:
    """One official decision of the past, as read from the file."""

    line: int
    region: str
    effective_date: date
    tier: int
    reason: str
    decided_by: str | None
    decided_at: datetime


@dataclass(frozen=True, kw_only=True)
class ImportResult:
    """What an import stored (``stored``) and what it found already there (``skipped``)."""

    stored: int
    skipped: int
    regions: tuple[str, ...]
    first: date | None
    last: date | None


def _decided_at(text: str, effective: date, where: str, path: str) -> datetime:
    if not text:
        return datetime.combine(effective, time(0), tzinfo=UTC)
    try:
        value = datetime.fromisoformat(text)
    except ValueError:
        raise InputFileError(path, where, f"{text!r} is not an ISO 8601 date and time") from None
    if value.tzinfo is None:
        raise InputFileError(path, where, f"{text!r} has no UTC offset (add +00:00 or Z)")
    return value.astimezone(UTC)


def read_official_history(path: Path | str, text: str | None = None) -> list[OfficialRecord]:
    """Parse the CSV at ``path`` (or ``text``, named ``path`` in messages).

    Raises
    ------
    InputFileError
        Not UTF-8, a missing column, a bad value (naming line and column), or two rows for the
        same district and effective date.
    """
    name = str(path)
    if text is None:
        raw = Path(path).read_bytes()
        if len(raw) > _MAX_BYTES:
            raise InputFileError(name, "", f"larger than {_MAX_BYTES // (1024 * 1024)} MiB")
        try:
            text = raw.decode("utf-8-sig")
        except UnicodeDecodeError as exc:
            raise InputFileError(name, f"byte {exc.start}", "not UTF-8") from None
    reader = csv.reader(io.StringIO(text, newline=""))
    header = [h.strip() for h in next(reader, [])]
    missing = [c for c in _REQUIRED if c not in header]
    unknown = [h for h in header if h not in COLUMNS]
    if missing or unknown:
        raise InputFileError(
            name, "line 1",
            f"expected columns {', '.join(_REQUIRED)} (optional: decided_by, decided_at); "
            f"found {', '.join(header) or 'none'}"
            + (f"; unknown {', '.join(unknown)}" if unknown else ""),
        )
    col = {h: i for i, h in enumerate(header)}
    out: list[OfficialRecord] = []
    seen: dict[tuple[str, date], int] = {}
    for row in reader:
        line = reader.line_num
        if not any(cell.strip() for cell in row):
            continue
        if len(row) != len(header):
            raise InputFileError(name, f"line {line}", f"{len(row)} fields, header has "
                                 f"{len(header)}")
        cell = {h: row[i].strip() for h, i in col.items()}
        for field in _REQUIRED:
            if not cell[field]:
                raise InputFileError(name, f"line {line}, {field}", "missing")
        try:
            effective = date.fromisoformat(cell["effective_date"])
        except ValueError:
            raise InputFileError(name, f"line {line}, effective_date",
                                 f"{cell['effective_date']!r} is not a date (YYYY-MM-DD)") from None
        try:
            tier = int(cell["tier"])
        except ValueError:
            raise InputFileError(name, f"line {line}, tier",
                                 f"{cell['tier']!r} is not a whole number") from None
        key = (cell["region"], effective)
        if key in seen:
            raise InputFileError(
                name, f"line {line}, effective_date",
                f"{cell['region']} already has a decision effective {effective} (line "
                f"{seen[key]})",
            )
        seen[key] = line
        out.append(OfficialRecord(
            line=line, region=cell["region"], effective_date=effective, tier=tier,
            reason=cell["reason"], decided_by=cell.get("decided_by") or None,
            decided_at=_decided_at(cell.get("decided_at", ""), effective,
                                   f"line {line}, decided_at", name),
        ))
    return out


def import_official_history(
    *, session: Session, records: Iterable[OfficialRecord], source: str, actor: str,
    published: bool = True, policy: str | None = None,
) -> ImportResult:
    """Store ``records`` as decisions of kind :data:`KIND`; all of them or, on an error, none.

    Parameters
    ----------
    session : Session
        Open session inside the caller's transaction; nothing is flushed before every row has
        been checked.
    records : iterable of OfficialRecord
        From :func:`read_official_history` (or built by a program).
    source : str
        Name of the file, used in messages and in the audit entry.
    actor : str
        Who runs the import (audit).
    published : bool, default True
        Mark imported decisions published at their decision time (they were the public tiers).
    policy : str, optional
        The active policy (ruleset name) the decisions belong to; the lead policy when None.

    Raises
    ------
    InputFileError
        Unknown district, tier out of range, unknown or inactive staff account.
    InactivePolicyError
        ``policy`` is not an active policy.
    """
    items = list(records)
    ruleset_row = require_policy(session=session, policy=policy)
    name = "" if ruleset_row is None else ruleset_row.name
    top = None if ruleset_row is None else parsed(ruleset_row).top_tier
    level = "districts" if ruleset_row is None else parsed(ruleset_row).level
    regions = dict(session.execute(
        select(Region.code, Region.id).where(Region.level == "district")
    ).all())
    if level != "districts":  # the areas or the county above the districts
        above = set(hierarchy(session=session).regions(level, tuple(regions)))
        regions = dict(session.execute(
            select(Region.code, Region.id).where(Region.code.in_(sorted(above) or [""]))
        ).all())
    # staff names match in any case, as at login (server.services.users.name_key)
    users = {
        name_key(name): uid
        for name, uid in session.execute(select(User.name, User.id).where(User.active.is_(True)))
    }
    for item in items:
        if item.region not in regions:
            raise InputFileError(source, f"line {item.line}, region",
                                 f"{item.region!r} is not a district" if level == "districts"
                                 else f"{item.region!r} is not one of the {level} the policy "
                                      f"{name} assigns tiers to")
        if item.tier < 0 or (top is not None and item.tier > top):
            span = f"0..{top}" if top is not None else "0 or more"
            raise InputFileError(source, f"line {item.line}, tier",
                                 f"{item.tier} is not a tier ({span})")
        if item.decided_by is not None and name_key(item.decided_by) not in users:
            raise InputFileError(source, f"line {item.line}, decided_by",
                                 f"{item.decided_by!r} is not an active staff account")
        if not item.reason:
            raise InputFileError(source, f"line {item.line}, reason", "missing")
    stored_keys = {
        (rid, day, tier, reason)
        for rid, day, tier, reason in session.execute(
            select(Decision.region_id, Decision.effective_date, Decision.tier, Decision.reason)
            .where(Decision.region_id.in_([regions[i.region] for i in items] or [-1]),
                   policy_condition(session, name or None))
        )
    }
    new = [
        i for i in items
        if (regions[i.region], i.effective_date, i.tier, i.reason) not in stored_keys
    ]
    for item in new:
        session.add(Decision(
            policy=name, region_id=regions[item.region], assessment_id=None,
            effective_date=item.effective_date, tier=item.tier, kind=KIND, reason=item.reason,
            decided_by=users.get(name_key(item.decided_by)) if item.decided_by else None,
            decided_at=item.decided_at, published_at=item.decided_at if published else None,
        ))
    days = [i.effective_date for i in new]
    result = ImportResult(
        stored=len(new), skipped=len(items) - len(new),
        regions=tuple(sorted({i.region for i in new})),
        first=min(days) if days else None, last=max(days) if days else None,
    )
    if new:
        session.flush()
        record(
            session=session, actor=actor, action="decision.import", subject=source,
            details={
                "stored": result.stored, "skipped": result.skipped,
                "regions": list(result.regions), "published": published,
                "first": result.first.isoformat() if result.first else None,
                "last": result.last.isoformat() if result.last else None,
            },
        )
    return result
