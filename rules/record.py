"""A stored explanation read back as one typed record.

:func:`rules.explanation.explain` writes a JSON-ready ``data`` dict and a ``sentence``; the store
keeps them together as ``{"sentence": ..., "data": {...}}`` (an assessment's ``explanation``).
:func:`read_explanation` turns that back into a frozen :class:`ExplanationRecord`, so pages and
cards read fields instead of chains of ``.get()`` on stored JSON. Keys that rows written by older
versions lack take the defaults named here, and only here; a row without its date or a criterion
without its ``id``/``indicator`` is refused with :class:`~rules.errors.StoredExplanationError`
naming the key. The shape has a version, :data:`SCHEMA_VERSION`: rows without ``data.schema``
are version 1 (every release so far); a row of a newer version is refused rather than misread.
:meth:`ExplanationRecord.to_json` writes a record back in the stored shape and
:meth:`ExplanationRecord.from_json` reads it (the two round-trip).

The sentence of a day on which a move takes effect (or is decided to take effect later)
describes the criteria *as they stood on the day the move was decided*
(:attr:`ExplanationRecord.basis_day`, which is ``decided_on`` when there is one, else the day
itself). A page that shows the sentence beside a table of criteria shows that day's criteria, as
known at the same cutoff, so the two cannot disagree.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import asdict, dataclass
from datetime import date
from typing import Any

from rules.errors import StoredExplanationError

#: The version of the stored explanation shape this release reads and writes.
SCHEMA_VERSION = 1

__all__ = [
    "SCHEMA_VERSION",
    "CriterionState",
    "Counters",
    "ExplanationRecord",
    "GateState",
    "SignalState",
    "TestingChangeNote",
    "read_criteria",
    "read_explanation",
    "stored_criteria",
    "stored_sentence",
]


@dataclass(frozen=True, kw_only=True)
class CriterionState:
    """One criterion on one day, as the engine saw it (see ``_criterion_item`` of
    :mod:`rules.explanation` for the meaning of each field)."""

    id: str
    indicator: str
    label: str
    direction: str
    statistic: str
    value: float | None
    lower: float | None
    upper: float | None
    count: float | None
    age_days: float | None
    level: int
    enter_level: int
    known: bool
    status: str
    above_days: int
    below_days: int
    #: thresholds per tier 1..N (None where the policy names none)
    enter: tuple[float | None, ...]
    exit: tuple[float | None, ...]
    min_count: float | None
    conditioned_by: str | None


@dataclass(frozen=True, kw_only=True)
class Counters:
    """The hysteresis counters of the day."""

    up: int
    confirm_days: int
    down: int
    release_days: int
    since_change: int
    min_days_in_tier: int


@dataclass(frozen=True, kw_only=True)
class GateState:
    id: str
    passed: bool
    message: str


@dataclass(frozen=True, kw_only=True)
class SignalState:
    id: str
    active: bool
    message: str


@dataclass(frozen=True, kw_only=True)
class TestingChangeNote:
    """The testing change known on the day, within the policy's ``testing_hold`` days."""

    __test__ = False  # not a pytest class despite its name

    date: date
    days_since: int
    tests_ratio: float | None
    tests_ratio_lower: float | None
    tests_ratio_upper: float | None
    #: the hold took an escalation away that day
    held: bool


@dataclass(frozen=True, kw_only=True)
class ExplanationRecord:
    """Why a region has its tier on a day, as stored with its assessment."""

    day: date
    #: the tier in force on the day (-1: insufficient data)
    tier: int
    previous: int
    #: the tier decided on the day (differs from ``tier`` while a move waits to take effect)
    decided: int
    #: "raised", "lowered", "decided", "held", "unchanged" or "insufficient"
    action: str
    decided_on: date | None
    effective_date: date | None
    candidate: int
    criteria: tuple[CriterionState, ...]
    counters: Counters
    gates: tuple[GateState, ...]
    prepare: tuple[SignalState, ...]
    held_by: tuple[str, ...]
    sentence: str
    #: None in rows written before testing changes were explained (and on other days)
    testing_change: TestingChangeNote | None = None

    def to_json(self) -> dict[str, Any]:
        """The record in the stored shape (``{"sentence": ..., "data": {...}}``, JSON-ready,
        with ``data.schema``); :meth:`from_json` reads it back to an equal record."""
        data = asdict(self)
        sentence = data.pop("sentence")
        for key in ("day", "decided_on", "effective_date"):
            data[key] = None if data[key] is None else data[key].isoformat()
        data["date"] = data.pop("day")
        for key in ("criteria", "gates", "prepare", "held_by"):
            data[key] = [dict(x) if isinstance(x, dict) else x for x in data[key]]
        for item in data["criteria"]:
            item["enter"], item["exit"] = list(item["enter"]), list(item["exit"])
        if data["testing_change"] is not None:
            data["testing_change"]["date"] = data["testing_change"]["date"].isoformat()
        data["schema"] = SCHEMA_VERSION
        return {"sentence": sentence, "data": data}

    @classmethod
    def from_json(cls, stored: Mapping[str, Any], *, tier: int | None = None
                  ) -> ExplanationRecord:
        """The record of a stored explanation (:func:`read_explanation`)."""
        return read_explanation(stored, tier=tier)

    @property
    def basis_day(self) -> date:
        """The day whose criteria the sentence describes: the day a move was decided, when the
        sentence is about a move, else the day itself."""
        return self.decided_on if self.decided_on is not None else self.day


def _date(value: Any, path: str) -> date:
    if not isinstance(value, str):
        raise StoredExplanationError(path, f"expected a date as YYYY-MM-DD, got {value!r}")
    try:
        return date.fromisoformat(value)
    except ValueError:
        raise StoredExplanationError(path, f"expected a date as YYYY-MM-DD, got {value!r}") \
            from None


def _float(value: Any) -> float | None:
    return None if value is None else float(value)


def _thresholds(values: Any) -> tuple[float | None, ...]:
    return tuple(_float(v) for v in values or ())


def read_criteria(items: Sequence[Mapping[str, Any]], *, path: str = "criteria"
                  ) -> tuple[CriterionState, ...]:
    """The stored criterion items (``data["criteria"]``) as records."""
    out = []
    for k, item in enumerate(items):
        where = f"{path}[{k}]"
        for key in ("id", "indicator"):
            if key not in item:
                raise StoredExplanationError(f"{where}.{key}", "missing")
        level = int(item.get("level", 0))
        out.append(CriterionState(
            id=str(item["id"]), indicator=str(item["indicator"]),
            label=str(item.get("label") or item["id"]),
            direction=str(item.get("direction", "rising")),
            statistic=str(item.get("statistic", "estimate")),
            value=_float(item.get("value")), lower=_float(item.get("lower")),
            upper=_float(item.get("upper")), count=_float(item.get("count")),
            age_days=_float(item.get("age_days")), level=level,
            enter_level=int(item.get("enter_level", level)),
            known=bool(item.get("known", True)), status=str(item.get("status", "")),
            above_days=int(item.get("above_days", 0)), below_days=int(item.get("below_days", 0)),
            enter=_thresholds(item.get("enter")), exit=_thresholds(item.get("exit")),
            min_count=_float(item.get("min_count")),
            conditioned_by=item.get("conditioned_by") or None,
        ))
    return tuple(out)


def stored_criteria(stored: Mapping[str, Any] | None) -> tuple[CriterionState, ...]:
    """The criteria of a stored explanation (``{"sentence": ..., "data": {"criteria": [...]}}``)
    as records; none when the row carries no data (rows of the first releases)."""
    data = (stored or {}).get("data")
    if not isinstance(data, Mapping):
        return ()
    return read_criteria(data.get("criteria") or (), path="data.criteria")


def stored_sentence(stored: Mapping[str, Any] | None) -> str:
    """The sentence of a stored explanation ("" when none was stored)."""
    stored = stored or {}
    data = stored.get("data")
    inner = data.get("sentence", "") if isinstance(data, Mapping) else ""
    return str(stored.get("sentence", inner) or "")


def read_explanation(stored: Mapping[str, Any], *, tier: int | None = None
                     ) -> ExplanationRecord:
    """The stored ``{"sentence": ..., "data": {...}}`` of an assessment as a record.

    ``tier`` (the assessment's recommended tier) stands in for a missing ``data["tier"]``.
    """
    data = stored.get("data")
    if not isinstance(data, Mapping):
        raise StoredExplanationError("data", "missing")
    schema = data.get("schema", 1)
    if not isinstance(schema, int) or not 1 <= schema <= SCHEMA_VERSION:
        raise StoredExplanationError(
            "data.schema", f"version {schema!r} is not one this release reads (1 to "
                           f"{SCHEMA_VERSION}); was it written by a newer release?")
    day = _date(data.get("date"), "data.date")
    if "tier" in data:
        tier = int(data["tier"])
    if tier is None:
        raise StoredExplanationError("data.tier", "missing")
    c = data.get("counters") or {}
    tc = data.get("testing_change")
    decided_on = data.get("decided_on")
    effective = data.get("effective_date")
    return ExplanationRecord(
        day=day, tier=tier, previous=int(data.get("previous", tier)),
        decided=int(data.get("decided", tier)), action=str(data.get("action", "")),
        decided_on=None if decided_on is None else _date(decided_on, "data.decided_on"),
        effective_date=None if effective is None else _date(effective, "data.effective_date"),
        candidate=int(data.get("candidate", tier)),
        criteria=read_criteria(data.get("criteria") or (), path="data.criteria"),
        counters=Counters(
            up=int(c.get("up", 0)), confirm_days=int(c.get("confirm_days", 0)),
            down=int(c.get("down", 0)), release_days=int(c.get("release_days", 0)),
            since_change=int(c.get("since_change", 0)),
            min_days_in_tier=int(c.get("min_days_in_tier", 0)),
        ),
        gates=tuple(GateState(id=str(g["id"]), passed=bool(g["passed"]),
                              message=str(g.get("message") or ""))
                    for g in data.get("gates") or ()),
        prepare=tuple(SignalState(id=str(s["id"]), active=bool(s["active"]),
                                  message=str(s.get("message") or ""))
                      for s in data.get("prepare") or ()),
        held_by=tuple(str(h) for h in data.get("held_by") or ()),
        sentence=str(stored.get("sentence", data.get("sentence", ""))),
        testing_change=None if not tc else TestingChangeNote(
            date=_date(tc.get("date"), "data.testing_change.date"),
            days_since=int(tc.get("days_since", 0)),
            tests_ratio=_float(tc.get("tests_ratio")),
            tests_ratio_lower=_float(tc.get("tests_ratio_lower")),
            tests_ratio_upper=_float(tc.get("tests_ratio_upper")),
            held=bool(tc.get("held", False)),
        ),
    )
