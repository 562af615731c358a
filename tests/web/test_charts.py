"""Chart builders: only the thresholds that matter today, readable under wide intervals."""

from __future__ import annotations

from datetime import date, timedelta

import pytest

from server.services.dossier import CriterionSeries
from server.services.event_effects import EventEffect
from web.charts import criterion_figure, effects_figure

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


def _event(status: str, k: int) -> EventEffect:
    nan3 = (float("nan"),) * 3
    ready = status == "ready"
    day = date(2026, 3, 1) + timedelta(days=k)
    return EventEffect(
        day=day, region=f"Q{k}", region_name=f"Invented {k}", level="district",
        kind="other", note="n", recorded_by="", status=status, ready_on=day,
        before=(day, day), after=(day, day), r_before=nan3, r_after=nan3, r_change=nan3,
        rt_before=(1.2, 1.1, 1.4) if ready else nan3, rt_after=(0.9, 0.8, 1.05) if ready else nan3,
        rt_ratio=nan3, breaks=(), breaks_known=False)


def test_effects_figure_draws_one_panel_per_ready_event_with_its_interval() -> None:
    events = [_event("ready", 0), _event("too_early", 1), _event("ready", 2)]
    fig = effects_figure(events)
    assert fig is not None and len(fig.data) == 2
    trace = fig.data[0]
    assert list(trace.y) == [1.2, 0.9]
    assert list(trace.error_y.array) == pytest.approx([0.2, 0.15])
    assert list(trace.error_y.arrayminus) == pytest.approx([0.1, 0.1])
    assert [a.text for a in fig.layout.annotations] == ["Invented 0 2026-03-01",
                                                        "Invented 2 2026-03-03"]
    assert effects_figure([_event("too_early", 1)]) is None
