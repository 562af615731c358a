"""The one value formatter (rules.formatting). The forms are the project's own (the sentences'
of rules.explanation, docs/rules.md); no outside source."""

from __future__ import annotations

import pytest

from rules.formatting import interval_text, reading_text, value_text
from rules.model import IndicatorSpec

INCIDENCE = IndicatorSpec(name="incidence_7d", label="7-day incidence", unit="per 100 000",
                          decimals=0)
POSITIVITY = IndicatorSpec(name="positivity_7d", label="positivity", unit="%", decimals=1)
BARE = IndicatorSpec(name="ww", label="wastewater", decimals=2)


@pytest.mark.parametrize(("spec", "args", "text"), [
    pytest.param(INCIDENCE, (162.4, 148.2, 177.0), "162 (148–177) per 100 000", id="unit-after"),
    pytest.param(POSITIVITY, (8.14, 6.0, 10.94), "8.1% (6.0–10.9)", id="percent-with-number"),
    pytest.param(BARE, (0.5, None, 0.7), "0.50", id="one-bound-missing"),
    pytest.param(INCIDENCE, (None, None, None), "n/a per 100 000", id="missing-as-sentences"),
])
def test_reading_text_forms(spec: IndicatorSpec, args: tuple[float | None, ...],
                            text: str) -> None:
    assert reading_text(spec, *args) == text


def test_value_and_interval_text_share_the_decimals() -> None:
    assert value_text(POSITIVITY, 8.14) == "8.1%"
    assert value_text(INCIDENCE, 162.5) == "162 per 100 000"  # round half to even, as f-strings
    assert value_text(INCIDENCE, None) == "n/a"
    assert interval_text(INCIDENCE, 148.2, 177.0) == "148–177"
    assert interval_text(INCIDENCE, None, 177.0) == "—"
