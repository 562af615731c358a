"""Chart builders: only the thresholds that matter today, readable under wide intervals."""

from __future__ import annotations

from datetime import date, timedelta

import pytest

from server.readmodels.dossier import CriterionSeries
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


def test_marks_are_vertical_lines_with_labels_inside_the_period_only() -> None:
    from server.readmodels.district_marks import BreakMark, DistrictMarks, TestingMark
    from server.services.testing_reviews import Verdict
    from web.charts import add_marks

    day = date(2026, 3, 3)
    marks = DistrictMarks(
        breaks=(BreakMark(day=day, lower=day, upper=day, growth_change=(0.02, 0.01, 0.03)),
                BreakMark(day=date(2026, 2, 1), lower=day, upper=day,
                          growth_change=(0.02, 0.01, 0.03))),  # before the period: not drawn
        breaks_known=True, events=(_event("ready", 1),),
        testing=(TestingMark(day=date(2026, 3, 4), detected_on=date(2026, 3, 5),
                             tests_ratio=(1.6, 1.4, 1.8), odds_ratio=0.7,
                             verdict=Verdict(change_day=date(2026, 3, 4), verdict="dismissed",
                                             note="n", by="ada", office_day=day)),))
    fig = add_marks(criterion_figure(_series(), NAMES, 0), marks, date(2026, 3, 1),
                    date(2026, 3, 5))
    lines = [(s.x0, s.line.dash) for s in fig.layout.shapes]
    assert lines == [("2026-03-02", "solid"), ("2026-03-03", "dot"), ("2026-03-04", "dash")]
    assert [a.text for a in fig.layout.annotations] == [
        "other", "break", "testing change (dismissed)"]  # the invented event is of kind other
    assert all(s.yref == "paper" and (s.y0, s.y1) == (0, 1) for s in fig.layout.shapes)
