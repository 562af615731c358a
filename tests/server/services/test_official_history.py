"""Importing a district's official tiers from before tierwise (server.services.official_history).

Runs on the seeded 150-day demo county (invented; no decisions yet) so districts, the active
ruleset and the demo staff accounts exist.
"""

from __future__ import annotations

from datetime import UTC, date, datetime
from pathlib import Path

import pytest
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from server.services.errors import InputFileError
from server.services.official_history import (
    KIND,
    import_official_history,
    read_official_history,
)
from server.services.review import decision_history, official_tiers, pending_changes
from server.store.models import AuditEntry, Decision, Region

pytestmark = pytest.mark.slow

GOOD = (
    "region,effective_date,tier,reason,decided_by,decided_at\n"
    "D01,2026-08-01,1,Weekly review: step up agreed,Otto.Approver,2026-07-31T14:00:00+00:00\n"
    "D01,2026-09-01,2,\"Weekly review: step up, agreed by phone\",,\n"
    "D02,2026-08-15,0,Baseline since the spring,,2026-08-14T09:30:00Z\n"
)


def _write(tmp_path: Path, text: str, name: str = "history.csv") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def _count(session: Session) -> int:
    return int(session.scalar(select(func.count()).select_from(Decision)) or 0)


def test_reads_required_and_optional_columns(tmp_path: Path) -> None:
    records = read_official_history(_write(tmp_path, GOOD))
    assert [(r.line, r.region, r.effective_date, r.tier) for r in records] == [
        (2, "D01", date(2026, 8, 1), 1), (3, "D01", date(2026, 9, 1), 2),
        (4, "D02", date(2026, 8, 15), 0),
    ]
    assert records[0].decided_by == "Otto.Approver"  # matched in any case on import
    assert records[1].decided_by is None
    assert records[1].reason == "Weekly review: step up, agreed by phone"
    # no decided_at: midnight UTC of the effective date; "Z" is read as UTC
    assert records[1].decided_at == datetime(2026, 9, 1, tzinfo=UTC)
    assert records[2].decided_at == datetime(2026, 8, 14, 9, 30, tzinfo=UTC)


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("region,date,tier\nD01,2026-08-01,1\n",
         r"history.csv: line 1: expected columns region, effective_date, tier, reason .*found "
         r"region, date, tier; unknown date"),
        ("region,effective_date,tier,reason\nD01,2026-13-01,1,x\n",
         r"history.csv: line 2, effective_date: '2026-13-01' is not a date"),
        ("region,effective_date,tier,reason\nD01,2026-08-01,high,x\n",
         r"history.csv: line 2, tier: 'high' is not a whole number"),
        ("region,effective_date,tier,reason\nD01,2026-08-01,1,\n",
         r"history.csv: line 2, reason: missing"),
        ("region,effective_date,tier,reason\nD01,2026-08-01,1\n",
         r"history.csv: line 2: 3 fields, header has 4"),
        ("region,effective_date,tier,reason\nD01,2026-08-01,1,a\nD01,2026-08-01,2,b\n",
         r"history.csv: line 3, effective_date: D01 already has a decision effective "
         r"2026-08-01 \(line 2\)"),
        ("region,effective_date,tier,reason,decided_at\nD01,2026-08-01,1,a,2026-07-31T14:00\n",
         r"history.csv: line 2, decided_at: '2026-07-31T14:00' has no UTC offset"),
    ],
)
def test_bad_files_name_line_and_field(tmp_path: Path, text: str, message: str) -> None:
    with pytest.raises(InputFileError, match=message):
        read_official_history(_write(tmp_path, text))


def test_not_utf8_names_the_byte(tmp_path: Path) -> None:
    path = tmp_path / "history.csv"
    path.write_bytes("region,effective_date,tier,reason\nD01,2026-08-01,1,Überprüft\n"
                     .encode("latin-1"))
    # 34 bytes of header and 17 of "D01,2026-08-01,1," come before the Latin-1 "Ü"
    with pytest.raises(InputFileError, match=r"history.csv: byte 51: not UTF-8"):
        read_official_history(path)


def test_import_stores_published_decisions_and_is_idempotent(
    demo_session: Session, tmp_path: Path
) -> None:
    records = read_official_history(_write(tmp_path, GOOD))
    result = import_official_history(
        session=demo_session, records=records, source="history.csv", actor="ines.admin"
    )
    assert (result.stored, result.skipped, result.regions) == (3, 0, ("D01", "D02"))
    assert (result.first, result.last) == (date(2026, 8, 1), date(2026, 9, 1))
    tiers = official_tiers(session=demo_session)  # published only
    assert (tiers["D01"].tier, tiers["D01"].since) == (2, date(2026, 9, 1))
    assert tiers["D02"].tier == 0
    history = decision_history(session=demo_session, region="D01")
    assert [(d.kind, d.user, d.tier) for d in history] == [(KIND, "", 2),
                                                            (KIND, "otto.approver", 1)]
    audit = demo_session.scalars(
        select(AuditEntry).where(AuditEntry.action == "decision.import")
    ).all()
    assert len(audit) == 1 and audit[0].details["stored"] == 3
    again = import_official_history(
        session=demo_session, records=records, source="history.csv", actor="ines.admin"
    )
    assert (again.stored, again.skipped) == (0, 3)
    assert _count(demo_session) == 3


def test_import_unpublished_stays_off_the_public_tiers(
    demo_session: Session, tmp_path: Path
) -> None:
    records = read_official_history(_write(tmp_path, GOOD))
    import_official_history(session=demo_session, records=records, source="history.csv",
                            actor="ines.admin", published=False)
    assert official_tiers(session=demo_session) == {}
    assert set(official_tiers(session=demo_session, published_only=False)) == {"D01", "D02"}


def test_imported_tier_settles_a_district_whose_recommendation_matches(
    demo_session: Session, tmp_path: Path
) -> None:
    pending = {p.region: p for p in pending_changes(session=demo_session)}
    target = pending["D03"]
    text = ("region,effective_date,tier,reason\n"
            f"D03,{target.since.isoformat()},{target.recommended_tier},already decided on paper\n")
    records = read_official_history(_write(tmp_path, text))
    import_official_history(session=demo_session, records=records, source="history.csv",
                            actor="ines.admin")
    assert "D03" not in {p.region for p in pending_changes(session=demo_session)}


@pytest.mark.parametrize(
    ("row", "message"),
    [
        ("Z99,2026-08-01,1,x", r"history.csv: line 3, region: 'Z99' is not a district"),
        ("R1,2026-08-01,1,x", r"history.csv: line 3, region: 'R1' is not a district"),
        ("D02,2026-08-01,4,x", r"history.csv: line 3, tier: 4 is not a tier \(0..3\)"),
        ("D02,2026-08-01,-1,x", r"history.csv: line 3, tier: -1 is not a tier"),
        ("D02,2026-08-01,1,x,nobody", r"line 3, decided_by: 'nobody' is not an active staff"),
    ],
)
def test_one_bad_row_stores_nothing(
    demo_session: Session, tmp_path: Path, row: str, message: str
) -> None:
    text = f"region,effective_date,tier,reason,decided_by\nD01,2026-08-01,1,fine,\n{row}\n"
    if row.count(",") == 3:
        text = text.replace(f"{row}\n", f"{row},\n")
    records = read_official_history(_write(tmp_path, text))
    with pytest.raises(InputFileError, match=message):
        import_official_history(session=demo_session, records=records, source="history.csv",
                                actor="ines.admin")
    assert _count(demo_session) == 0


def test_an_area_level_policy_takes_the_official_tiers_of_its_areas(
    demo_session: Session, tmp_path: Path
) -> None:
    """A policy set for the areas (the demo's hospital-pressure policy) records its history
    under the area codes; a district code is refused with file, line and field."""
    from server.services.ruleset_activation import store_ruleset

    hospital = Path(__file__).resolve().parents[3] / "rules" / "policies" / "hospital.yaml"
    store_ruleset(session=demo_session, path=hospital, author="test", activate=True)
    areas = sorted(demo_session.scalars(select(Region.code).where(
        Region.id.in_(select(Region.parent_id).where(Region.level == "district")))))
    text = ("region,effective_date,tier,reason\n"
            f"{areas[0]},2026-08-01,1,Weekly review: wards busy\n")
    result = import_official_history(
        session=demo_session, records=read_official_history(_write(tmp_path, text)),
        source="history.csv", actor="ines.admin", policy="hospital-demo")
    assert (result.stored, result.regions) == (1, (areas[0],))
    stored = demo_session.scalars(select(Decision).where(Decision.policy == "hospital-demo"))
    assert [(d.tier, d.effective_date) for d in stored] == [(1, date(2026, 8, 1))]
    bad = read_official_history(_write(tmp_path, "region,effective_date,tier,reason\n"
                                                 "D01,2026-08-01,1,x\n"))
    with pytest.raises(InputFileError, match=r"history.csv: line 2, region: 'D01' is not one "
                                             r"of the areas the policy hospital-demo"):
        import_official_history(session=demo_session, records=bad, source="history.csv",
                                actor="ines.admin", policy="hospital-demo")
