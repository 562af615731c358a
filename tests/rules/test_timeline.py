"""Timeline summaries: changes, escalations and prepare-signal leads, worked by hand."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

from rules import EvaluationInputError
from rules.timeline import summarise_timeline

# day:       0  1  2  3  4  5  6  7
TIER = [[-1, 0, 1, 1, 2, 2, 1, 1]]
SIGNAL = [[[0, 1, 1, 0, 0, 0, 0, 0]], [[0, 0, 0, 1, 1, 0, 0, 0]]]


def _summary(lookback: int = 42):  # type: ignore[no-untyped-def]
    return summarise_timeline(
        np.array(TIER), np.array(SIGNAL, dtype=bool), regions=["r"], n_tiers=3, lookback=lookback
    )


def test_timeline_counts_changes_between_known_tiers() -> None:
    # -1 -> 0 is not a change; 0->1 (day 2), 1->2 (day 4), 2->1 (day 6)
    assert _summary().regions[0].changes == 3


def test_timeline_leads_start_after_the_previous_change() -> None:
    # escalation day 2: onset day 1 -> lead 1; day 4: onset day 3 (after the change on day 2)
    assert _summary().regions[0].leads == (1, 1)


def test_timeline_lookback_limits_the_lead() -> None:
    # with a 1-day lookback only onsets on e-1 count: day 1 for e=2, day 3 for e=4
    assert _summary(lookback=1).preceded_share == 1.0


def test_timeline_days_in_tier_start_with_insufficient_data() -> None:
    assert _summary().regions[0].days_in_tier == (1, 1, 4, 2)


def test_timeline_changes_per_year_scales_by_days() -> None:
    assert_allclose(_summary().changes_per_year, 3 * 365.25 / 8)


def test_timeline_shape_mismatch_is_named() -> None:
    with pytest.raises(EvaluationInputError, match="prepare: shape"):
        summarise_timeline(np.zeros((1, 4)), np.zeros((1, 1, 3), dtype=bool), regions=["r"],
                           n_tiers=2)
