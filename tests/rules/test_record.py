"""Stored explanations read back as typed records (rules.record), worked by hand.

The stored form is what server.services.evaluation writes: ``{"sentence": ..., "data": ...}``
from :func:`rules.explanation.explain`, through JSON.
"""

from __future__ import annotations

import json
from datetime import date

import numpy as np
import pytest

from rules import IndicatorSeries, evaluate, parse_ruleset
from rules.errors import StoredExplanationError
from rules.record import (
    SCHEMA_VERSION,
    ExplanationRecord,
    read_explanation,
    stored_criteria,
    stored_sentence,
)

RULES = """\
name: records
version: "1"
tiers:
  - {name: Baseline, staff: s, public: p}
  - {name: Heightened, staff: s, public: p}
  - {name: High, staff: s, public: p}
indicators:
  incidence_7d: {label: 7-day incidence, unit: per 100 000, decimals: 0}
criteria:
  - {id: incidence, indicator: incidence_7d, enter: [50, 150], exit: [35, 120]}
timing: {confirm_days: 2, release_days: 3, min_days_in_tier: 0, effective_delay_days: 1}
"""


def _stored(inc: list[float], d: int) -> dict[str, object]:
    rs = parse_ruleset(RULES)
    ev = evaluate(rs, {"incidence_7d": IndicatorSeries(estimate=np.array([inc], dtype=float))},
                  regions=["r"], dates=np.arange(len(inc)) + np.datetime64("2031-03-10"))
    e = ev.explain(0, d)
    return json.loads(json.dumps({"sentence": e.sentence, "data": e.data}))


def test_read_explanation_of_a_change_day_names_the_decision_day_as_basis() -> None:
    # 160, 170 over 150 on 2 days: decided on 03-12, High from 03-13 (effective delay 1 day)
    record = read_explanation(_stored([10, 160, 170, 170], 3))
    assert (record.day, record.tier, record.previous, record.action) == (
        date(2031, 3, 13), 2, 0, "raised")
    assert record.decided_on == date(2031, 3, 12)
    assert record.basis_day == date(2031, 3, 12)
    (c,) = record.criteria
    assert (c.id, c.label, c.value, c.level, c.enter, c.exit) == (
        "incidence", "7-day incidence", 170.0, 2, (50.0, 150.0), (35.0, 120.0))
    assert record.sentence.startswith("Raised from Baseline (0) to High (2) on 2031-03-13")


def test_read_explanation_of_a_quiet_day_is_its_own_basis() -> None:
    record = read_explanation(_stored([10, 20, 30], 2))
    assert record.action == "unchanged" and record.decided_on is None
    assert record.basis_day == record.day == date(2031, 3, 12)
    assert record.counters.confirm_days == 2 and record.counters.release_days == 3


def test_read_explanation_refuses_a_criterion_without_its_indicator() -> None:
    stored = _stored([10, 20, 30], 2)
    del stored["data"]["criteria"][0]["indicator"]  # type: ignore[index]
    with pytest.raises(StoredExplanationError,
                       match=r"data\.criteria\[0\]\.indicator: missing"):
        read_explanation(stored)


def test_read_explanation_refuses_a_bad_date() -> None:
    stored = _stored([10, 20, 30], 2)
    stored["data"]["date"] = "12.03.2031"  # type: ignore[index]
    with pytest.raises(StoredExplanationError, match=r"data\.date: expected a date .*'12\.03"):
        read_explanation(stored)


def test_stored_criteria_and_sentence_read_what_read_explanation_reads() -> None:
    stored = _stored([10, 160, 170, 170], 3)
    record = read_explanation(stored)
    assert stored_criteria(stored) == record.criteria
    assert stored_sentence(stored) == record.sentence


def test_stored_criteria_and_sentence_of_rows_without_data() -> None:
    # Rows written before explanations carried data (and a sentence kept under "data" only).
    assert stored_criteria({"sentence": "Baseline."}) == ()
    assert stored_criteria(None) == ()
    assert stored_sentence({"sentence": "Baseline."}) == "Baseline."
    assert stored_sentence({"data": {"sentence": "Held."}}) == "Held."
    assert stored_sentence({}) == ""


def test_record_round_trips_through_its_stored_shape() -> None:
    # engine-made explanations (a change day and a quiet day), through JSON and back
    for stored in (_stored([10, 160, 170, 170], 3), _stored([10, 20, 30], 2)):
        record = ExplanationRecord.from_json(stored)
        again = json.loads(json.dumps(record.to_json()))
        assert again["data"]["schema"] == SCHEMA_VERSION
        assert ExplanationRecord.from_json(again) == record


def test_read_explanation_refuses_a_newer_schema() -> None:
    stored = _stored([10, 20, 30], 2)
    stored["data"]["schema"] = SCHEMA_VERSION + 1  # type: ignore[index]
    with pytest.raises(StoredExplanationError, match=r"data\.schema: version 2 is not one"):
        read_explanation(stored)
