"""Chart builders: only the thresholds that matter today, readable under wide intervals."""

from __future__ import annotations

from datetime import date, timedelta

import pytest

from server.services.dossier import CriterionSeries
from web.charts import criterion_figure

NAMES = ("Baseline", "Heightened", "High", "Severe")


def _series(upper: float = 130.0) -> CriterionSeries:
    days = tuple(date(2026, 3, 1) + timedelta(days=i) for i in range(5))
    return CriterionSeries(
        id="incidence", label="7-day incidence", unit="per 100 000", decimals=0, dates=days,
        value=(100.0,) * 5, lower=(80.0,) * 5, upper=(upper,) * 5,
        enter=((75.0,) * 5, (150.0,) * 5, (300.0,) * 5),
        exit=((35.0,) * 5, (110.0,) * 5, (230.0,) * 5),
    )


def _names(fig) -> list[str]:  # type: ignore[no-untyped-def]
    return [t.name for t in fig.data if t.showlegend is not False]


@pytest.mark.parametrize(("tier", "expected"), [
    (None, ["Heightened from"]),
    (0, ["Heightened from"]),
    (2, ["leave High below", "Severe from"]),
    (3, ["leave Severe below"]),
], ids=["none", "baseline", "high", "top"])
def test_criterion_figure_draws_the_current_exit_and_next_enter(tier, expected) -> None:  # type: ignore[no-untyped-def]
    fig = criterion_figure(_series(), NAMES, tier)
    assert [n for n in _names(fig) if n not in ("95% interval", "estimate")] == expected


def test_criterion_figure_keeps_thresholds_readable_under_a_wide_interval() -> None:
    fig = criterion_figure(_series(upper=5000.0), NAMES, 2)
    low, high = fig.layout.yaxis.range
    assert low == 0 and high == pytest.approx(300 * 1.2)  # the Severe enter threshold, not 5000


def test_criterion_figure_clamps_a_tier_beyond_the_policy() -> None:
    fig = criterion_figure(_series(), NAMES, 7)  # official tier from an older, larger policy
    assert "leave Severe below" in _names(fig)
