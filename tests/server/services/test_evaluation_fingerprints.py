"""Runs that build only the region-days whose fingerprint changed store exactly what full runs do.

The oracle is the same policy text under a second ruleset row evaluated with fingerprints off
(``run_fingerprints.ENABLED = False``): every run of it builds, hashes and compares every
region-day, as every run did before fingerprints. After each new vintage (a late revision of
old days, a new day, provisional counts of the last days revised upward, which moves the
nowcast window, no new data at all) and a replay of a past cutoff, both rulesets' runs must
write the same region-days with the same content and ``content_sha256``. The requirement is
the project's own (as-of reproducibility, DEVELOPERS.md "How state is kept"); no outside source.
"""

from __future__ import annotations

from collections.abc import Iterator
from datetime import UTC, date, datetime, time, timedelta
from typing import Any

import numpy as np
import pandas as pd
import pytest
from sqlalchemy import select
from sqlalchemy.orm import Session

from rules.evaluation import Evaluation
from server.services import run_fingerprints
from server.services.evaluation import evaluate_districts
from server.services.observations import MeasureRecord, define_measures
from server.services.regions import RegionRecord, store_regions
from server.services.ruleset_activation import store_ruleset
from server.services.rulesets import active_ruleset, default_ruleset_path
from server.store.models import Assessment, EvaluationRun
from server.store.models import Ruleset as RulesetRow
from server.store.vintages import append_vintage

A = Assessment
ROW = (A.region_id, A.ref_date, A.recommended_tier, A.previous_tier, A.criteria,
       A.prepare_signals, A.explanation, A.content_sha256)
MEASURES = ("cases", "tests", "positives", "hosp_admissions", "gp_ari")
LAMBDAS = (40, 800, 60, 3, 50)
END = date(2030, 6, 30)
DAYS = 60
N = 4


def _arrival(day: date) -> datetime:
    return datetime.combine(day + timedelta(days=1), time(5), UTC)


def _counts(rng: np.random.Generator, day: date, j: int, scale: float = 1.0) -> pd.DataFrame:
    codes = [f"F{i}" for i in range(N)]
    return pd.concat([
        pd.DataFrame({"region": codes, "measure": m, "ref_date": day,
                      "value": (scale * rng.poisson(lam * (1 + 2 * j / DAYS), N)).round()})
        for m, lam in zip(MEASURES, LAMBDAS, strict=True)])


@pytest.fixture
def store(session: Session) -> Session:
    """Four invented districts of one invented county, 60 days of daily counts, the county
    policy active and evaluated."""
    records = [RegionRecord(code="FC", name="Fingercounty", level="county", parent=None,
                            population=400_000)]
    records += [RegionRecord(code=f"F{i}", name=f"Fingerdistrict {i}", level="district",
                             parent="FC", population=100_000) for i in range(N)]
    define_measures(session=session, measures=[
        MeasureRecord(name=m, unit="count", kind="count", aggregation="sum")
        for m in (*MEASURES, "icu_occupied", "icu_staffed", "ww_concentration", "ww_flow")])
    store_regions(session=session, records=records, actor="test", source="test")
    rng = np.random.default_rng(5)
    for j in range(DAYS):
        day = END - timedelta(days=DAYS - 1 - j)
        append_vintage(session=session, feed="daily", received_at=_arrival(day),
                       checksum=f"daily-{day}", rows=_counts(rng, day, j))
    store_ruleset(session=session, path=default_ruleset_path(None), author="test",
                  activate=True)
    return session


@pytest.fixture
def explained(monkeypatch: pytest.MonkeyPatch) -> Iterator[list[int]]:
    """Counts the explanations built (one item per call of ``Evaluation.explain``)."""
    calls: list[int] = []
    original = Evaluation.explain

    def counting(self: Evaluation, region_index: int, day_index: int) -> Any:
        calls.append(1)
        return original(self, region_index, day_index)

    monkeypatch.setattr(Evaluation, "explain", counting)
    yield calls


def _written(session: Session, ruleset_id: int, cutoff: datetime) -> dict[Any, Any]:
    rows = session.execute(select(*ROW).where(A.ruleset_id == ruleset_id,
                                              A.data_cutoff == cutoff))
    return {(r[0], r[1]): tuple(r[2:]) for r in rows}


def _twin(session: Session, row: RulesetRow) -> RulesetRow:
    twin = RulesetRow(name=f"{row.name}-full", version=f"{row.version}-full",
                      yaml_text=row.yaml_text, sha256=row.sha256, author="test",
                      created_at=datetime(2030, 7, 1, tzinfo=UTC), status="draft")
    session.add(twin)
    session.flush()
    return twin


def _both(session: Session, monkeypatch: pytest.MonkeyPatch, calls: list[int],
          row: RulesetRow, twin: RulesetRow, cutoff: datetime) -> tuple[int, int]:
    """Evaluate the active row (fingerprints on) and its twin (off) at ``cutoff``; assert they
    write the same rows; returns the explanations each built."""
    calls.clear()
    fast = evaluate_districts(session=session, ruleset_row=row, cutoff=cutoff)
    built = len(calls)
    calls.clear()
    with monkeypatch.context() as patch:
        patch.setattr(run_fingerprints, "ENABLED", False)
        full = evaluate_districts(session=session, ruleset_row=twin, cutoff=cutoff)
    assert fast is not None and full is not None and not fast.reused and not full.reused
    assert (fast.start, fast.end) == (full.start, full.end)
    assert len(calls) == N * ((full.end - full.start).days + 1)  # the oracle builds every row
    mine, oracle = _written(session, row.id, cutoff), _written(session, twin.id, cutoff)
    assert mine == oracle
    assert fast.written == full.written == len(mine)
    return built, len(calls)


def _later_rows_equal(session: Session, row: RulesetRow, twin: RulesetRow) -> None:
    """Every cutoff holds the same rows under both (copies kept for later runs included)."""
    cutoffs = session.scalars(select(EvaluationRun.data_cutoff).where(
        EvaluationRun.ruleset_id == row.id)).all()
    for cutoff in cutoffs:
        assert _written(session, row.id, cutoff) == _written(session, twin.id, cutoff)


def test_incremental_runs_write_exactly_what_full_runs_write(
    store: Session, explained: list[int], monkeypatch: pytest.MonkeyPatch,
) -> None:
    row = active_ruleset(session=store)
    assert row is not None
    first = _arrival(END)
    twin = _twin(store, row)
    with monkeypatch.context() as patch:
        patch.setattr(run_fingerprints, "ENABLED", False)
        evaluate_districts(session=store, ruleset_row=twin, cutoff=first)
    assert _written(store, row.id, first) == _written(store, twin.id, first)
    rng = np.random.default_rng(9)
    cutoffs, built = [], []

    # a late revision of old days: F1's cases of five days three weeks back (invented)
    at = first + timedelta(hours=2)
    old = [END - timedelta(days=21 - k) for k in range(5)]
    append_vintage(session=store, feed="correction", received_at=at, checksum="late", rows=(
        pd.DataFrame({"region": "F1", "measure": "cases", "ref_date": old,
                      "value": [700.0] * 5})))
    cutoffs.append(at)
    built.append(_both(store, monkeypatch, explained, row, twin, at))

    # a new day for every district
    new_day = END + timedelta(days=1)
    at = _arrival(new_day)
    append_vintage(session=store, feed="daily", received_at=at, checksum="new-day",
                   rows=_counts(rng, new_day, DAYS))
    cutoffs.append(at)
    built.append(_both(store, monkeypatch, explained, row, twin, at))

    # provisional counts of the last three days revised upward (the nowcast window moves)
    at = at + timedelta(hours=3)
    recent = pd.concat([_counts(rng, new_day - timedelta(days=k), DAYS - k, 1.3)
                        for k in range(3)])
    append_vintage(session=store, feed="daily", received_at=at, checksum="provisional",
                   rows=recent)
    cutoffs.append(at)
    built.append(_both(store, monkeypatch, explained, row, twin, at))

    # nothing new: a scheduled run builds nothing and writes nothing
    at = at + timedelta(hours=3)
    cutoffs.append(at)
    built.append(_both(store, monkeypatch, explained, row, twin, at))
    assert built[-1][0] == 0

    # each incremental run built fewer rows than the full one, some of them more than none
    assert all(fast < full for fast, full in built), built
    assert any(fast > 0 for fast, _full in built)
    # only the newest run keeps fingerprints; the oracle's runs keep none
    kept = dict(store.execute(select(EvaluationRun.data_cutoff, EvaluationRun.fingerprints)
                              .where(EvaluationRun.ruleset_id == row.id)).all())
    assert [c for c, blob in kept.items() if blob is not None] == [cutoffs[-1]]
    assert store.scalar(select(EvaluationRun.id).where(
        EvaluationRun.ruleset_id == twin.id, EvaluationRun.fingerprints.is_not(None))) is None

    # a replay of a past cutoff (between the late revision and the new day) builds every row
    # and keeps the later runs' readings exactly as the oracle's replay does
    replay = cutoffs[0] + timedelta(hours=1)
    fast, full = _both(store, monkeypatch, explained, row, twin, replay)
    assert fast == full
    _later_rows_equal(store, row, twin)
    # ... and the next morning still compares with the newest run's fingerprints
    final_day = new_day + timedelta(days=1)
    at = _arrival(final_day)
    append_vintage(session=store, feed="daily", received_at=at, checksum="final",
                   rows=_counts(rng, final_day, DAYS + 1))
    fast, full = _both(store, monkeypatch, explained, row, twin, at)
    assert 0 < fast < full
    _later_rows_equal(store, row, twin)


def test_packed_fingerprints_read_back_and_align_by_region_and_day() -> None:
    values = np.arange(12, dtype=np.uint64).reshape(3, 4) * np.uint64(7919)
    blob = run_fingerprints.pack(("B", "A", "C"), date(2030, 1, 2), values)
    codes, first, back = run_fingerprints.unpack(blob) or ((), date.min, values[:0])
    assert codes == ("B", "A", "C") and first == date(2030, 1, 2)
    assert np.array_equal(back, values)
    assert run_fingerprints.unpack(b"not a blob") is None
    # now: regions A, D, B from one day later, one day longer
    now = np.zeros((3, 4), dtype=np.uint64)
    now[0, :3] = values[1, 1:]  # A unchanged on the days both know
    now[2, :3] = values[0, 1:]
    now[2, 1] += np.uint64(1)  # B changed on its second day
    differs = run_fingerprints._differs(now, ("A", "D", "B"), date(2030, 1, 3),
                                        (codes, first, back))
    assert differs.tolist() == [[False, False, False, True],
                                [True, True, True, True],
                                [False, True, False, True]]
