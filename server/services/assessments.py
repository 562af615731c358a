"""The stored assessments: storing only the changed rows of a run, and the row in force at a run.

An evaluation (:mod:`server.services.evaluation`) stores an assessment (recommended tier,
criteria, prepare signals, explanation) under its cutoff only for the region and day pairs
whose result differs from the newest row stored at an earlier cutoff, or that have none
(:func:`store_assessments`): a new morning's data usually change the last weeks, not the whole
history. The rows are compared in bulk by ``content_sha256``, a hash of everything but the
cutoff and creation time. Only the region-days whose engine state changed since the newest
earlier run are built and hashed at all (:mod:`server.services.run_fingerprints`); the others
equal the row in force.

The assessment of a district and day *as of run C* is therefore the row with the greatest
``data_cutoff`` not after C (:func:`assessments_as_of`); the newest run is the newest
``evaluation_run`` of the active ruleset (:func:`newest_run`). A run stored at a cutoff older
than an existing run (a replay of a past morning) keeps the later run's reading unchanged: where
it writes a row that the later run had read from before its cutoff, it copies that older row to
the later run's cutoff.
"""

from __future__ import annotations

import hashlib
import json
from dataclasses import dataclass
from datetime import UTC, date, datetime
from typing import Any

import numpy as np
from numpy.typing import NDArray
from sqlalchemy import Select, and_, func, insert, select
from sqlalchemy.orm import Session

from rules import Evaluation, Ruleset
from server.services import run_fingerprints
from server.services.rulesets import active_ruleset
from server.store.models import Assessment, Region
from server.store.models import EvaluationRun as RunRow
from server.store.models import Ruleset as RulesetRow

__all__ = [
    "LatestItem",
    "LatestRun",
    "assessments_as_of",
    "content_sha256",
    "current_assessment_id",
    "newest_run",
    "newest_run_of",
    "store_assessments",
]


def assessments_as_of(
    query: Select[Any], *, ruleset_id: int, cutoff: datetime, before: bool = False,
    region_id: int | None = None, start: date | None = None, end: date | None = None,
) -> Select[Any]:
    """Restrict ``query`` (which selects from :class:`Assessment`) to the rows in force at a run.

    For each region and day, the row of ``ruleset_id`` with the greatest ``data_cutoff`` not
    after ``cutoff`` (strictly before it with ``before``), optionally for one region and a range
    of days. One grouped subquery joined back on the unique key (ruleset, region, day, cutoff);
    the key's index (and ``ix_assessment_ruleset_day`` for one day across regions) serves both.
    """
    a = Assessment
    where = [a.ruleset_id == ruleset_id,
             a.data_cutoff < cutoff if before else a.data_cutoff <= cutoff]
    if region_id is not None:
        where.append(a.region_id == region_id)
    if start is not None:
        where.append(a.ref_date >= start)
    if end is not None:
        where.append(a.ref_date <= end)
    newest = (
        select(a.region_id, a.ref_date, func.max(a.data_cutoff).label("data_cutoff"))
        .where(*where)
        .group_by(a.region_id, a.ref_date)
        .subquery("newest")
    )
    return query.join(newest, and_(
        a.region_id == newest.c.region_id, a.ref_date == newest.c.ref_date,
        a.data_cutoff == newest.c.data_cutoff,
    )).where(a.ruleset_id == ruleset_id)


def content_sha256(row: dict[str, Any]) -> str:
    """SHA-256 of what an assessment says: tiers, criteria, prepare signals and explanation.

    The cutoff, creation time and the region and day (the row's key) are left out, so two runs
    that reach the same result for a district and day give the same hash.
    """
    payload = json.dumps(
        [row["recommended_tier"], row["previous_tier"], row["criteria"],
         row["prepare_signals"], row["explanation"]],
        sort_keys=True, separators=(",", ":"),
    )
    return hashlib.sha256(payload.encode("utf-8")).hexdigest()


def _assessment_rows(
    session: Session, ruleset_id: int, cutoff: datetime, result: Evaluation,
    build: NDArray[np.bool_] | None = None,
) -> list[dict[str, Any]]:
    """The rows of the region-days in ``build`` ``(regions, days)`` (None: every one), in
    region then day order."""
    region_ids = dict(session.execute(select(Region.code, Region.id)).all())
    criteria = [c.id for c in result.ruleset.criteria]
    signals = [s.id for s in result.ruleset.prepare]
    now = datetime.now(UTC)
    rows = []
    wanted = None if build is None else build.tolist()
    for r, code in enumerate(result.regions):
        for d in range(result.dates.size):
            if wanted is not None and not wanted[r][d]:
                continue
            explanation = result.explain(r, d)
            row: dict[str, Any] = {
                "ruleset_id": ruleset_id,
                "region_id": region_ids[code],
                "ref_date": result.dates[d].astype(date),
                "data_cutoff": cutoff,
                "recommended_tier": int(result.tier[r, d]),
                "previous_tier": (
                    int(result.tier[r, d - 1]) if d else int(result.start_in_force[r])
                ),
                "criteria": {
                    cid: {
                        "level": int(result.levels[k, r, d]),
                        "known": bool(result.known[k, r, d]),
                    }
                    for k, cid in enumerate(criteria)
                },
                "prepare_signals": {
                    sid: bool(result.prepare[k, r, d]) for k, sid in enumerate(signals)
                },
                "explanation": {"sentence": explanation.sentence, "data": explanation.data},
                "created_at": now,
            }
            row["content_sha256"] = content_sha256(row)
            rows.append(row)
    return rows


_CHUNK = 500  # ids per IN list (well under SQLite's bound-parameter limit)


def store_assessments(
    session: Session, ruleset_id: int, cutoff: datetime, result: Evaluation
) -> tuple[int, bytes | None]:
    """Store the rows that differ from the newest earlier ones; returns how many were stored
    and the fingerprints the run keeps.

    Only the region-days whose engine state differs from the newest earlier run's are built
    (:mod:`server.services.run_fingerprints`); the others equal the row in force before
    ``cutoff`` and would not be stored.
    """
    plan = run_fingerprints.plan(session, ruleset_id, cutoff, result)
    if plan.keep is not None:
        run_fingerprints.keep_only(session, ruleset_id, cutoff)
    rows = _assessment_rows(session, ruleset_id, cutoff, result, plan.build)
    if not rows:
        return 0, plan.keep
    start, end = result.dates[0].astype(date), result.dates[-1].astype(date)
    if plan.build is not None:  # only the rows built are compared: from the first day built
        start = result.dates[int(np.flatnonzero(plan.build.any(axis=0))[0])].astype(date)
    earlier = {
        (rid, day): (aid, sha)
        for aid, rid, day, sha in session.execute(assessments_as_of(
            select(Assessment.id, Assessment.region_id, Assessment.ref_date,
                   Assessment.content_sha256),
            ruleset_id=ruleset_id, cutoff=cutoff, before=True, start=start, end=end,
        ))
    }
    changed = []
    for row in rows:
        prev = earlier.get((row["region_id"], row["ref_date"]))
        # rows stored before revision 0003 carry no hash: treated as changed, stored once more
        if prev is None or prev[1] is None or prev[1] != row["content_sha256"]:
            changed.append(row)
    if changed:
        session.execute(insert(Assessment), changed)
        _keep_next_run(session, ruleset_id, cutoff, changed, earlier, start, end)
    return len(changed), plan.keep


def _keep_next_run(
    session: Session, ruleset_id: int, cutoff: datetime, changed: list[dict[str, Any]],
    earlier: dict[tuple[int, date], tuple[int, str | None]], start: date, end: date,
) -> None:
    """Keep what the next later run (if any) reads for the keys just written at ``cutoff``.

    That run read, for a key with no row between the two cutoffs, the row from before
    ``cutoff``; now it would read the new one. Copying the old row to the later run's cutoff
    restores its reading, and every run after it reads the copy or a newer row of its own.
    """
    later = session.scalar(
        select(RunRow).where(RunRow.ruleset_id == ruleset_id, RunRow.data_cutoff > cutoff)
        .order_by(RunRow.data_cutoff).limit(1)
    )
    if later is None:
        return
    a = Assessment
    covered = {(rid, day) for rid, day in session.execute(
        select(a.region_id, a.ref_date).where(
            a.ruleset_id == ruleset_id, a.data_cutoff > cutoff,
            a.data_cutoff <= later.data_cutoff, a.ref_date >= start, a.ref_date <= end,
        )
    )}
    ids = [
        earlier[key][0] for key in ((r["region_id"], r["ref_date"]) for r in changed)
        if key in earlier and key not in covered
    ]
    now = datetime.now(UTC)
    columns = ("ruleset_id", "region_id", "ref_date", "recommended_tier", "previous_tier",
               "criteria", "prepare_signals", "explanation", "content_sha256")
    for k in range(0, len(ids), _CHUNK):
        old = session.scalars(select(a).where(a.id.in_(ids[k:k + _CHUNK])))
        copies = [
            {**{c: getattr(o, c) for c in columns},
             "data_cutoff": later.data_cutoff, "created_at": now}
            for o in old
        ]
        session.execute(insert(Assessment), copies)
    later.rows_written += len(ids)
    session.flush()


def newest_run_of(*, session: Session, ruleset_id: int) -> RunRow | None:
    """The recorded evaluation run of ``ruleset_id`` with the newest data cutoff (None: none)."""
    return session.scalar(
        select(RunRow).where(RunRow.ruleset_id == ruleset_id)
        .order_by(RunRow.data_cutoff.desc()).limit(1)
    )


def newest_run(
    *, session: Session, policy: str | None = None
) -> tuple[RulesetRow, RunRow] | None:
    """The active ruleset of ``policy`` (the lead's when None) and its newest recorded
    evaluation run (None: none)."""
    row = active_ruleset(session=session, policy=policy)
    if row is None:
        return None
    run = newest_run_of(session=session, ruleset_id=row.id)
    return None if run is None else (row, run)


def _newest_run(
    session: Session, policy: str | None
) -> tuple[RulesetRow, datetime, date] | None:
    """The policy's active ruleset, the data cutoff of its newest run and that run's last day."""
    newest = newest_run(session=session, policy=policy)
    if newest is None:
        return None
    row, run = newest
    return row, run.data_cutoff, run.last_day


def current_assessment_id(
    *, session: Session, region_id: int, policy: str | None = None
) -> int | None:
    """Id of a district's current item in the review of ``policy`` (the lead's when None): its
    assessment of the last day of the newest run (the policy's active ruleset), as of that
    run's cutoff; None when there is none."""
    newest = _newest_run(session, policy)
    if newest is None:
        return None
    row, cutoff, last_day = newest
    return session.scalar(assessments_as_of(
        select(Assessment.id), ruleset_id=row.id, cutoff=cutoff, region_id=region_id,
        start=last_day, end=last_day,
    ))


@dataclass(frozen=True, kw_only=True, eq=False)
class LatestItem:
    """A district's newest stored assessment and the first day of its current recommendation."""

    region_id: int
    code: str
    name: str
    assessment: Assessment
    since: date


@dataclass(frozen=True, kw_only=True, eq=False)
class LatestRun:
    """The newest stored evaluation of the active ruleset: one item per district."""

    ruleset_row: RulesetRow
    ruleset: Ruleset
    data_cutoff: datetime
    last_day: date
    items: tuple[LatestItem, ...]
