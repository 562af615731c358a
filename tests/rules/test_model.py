"""Self-validating ruleset building blocks (rules/model.py): each refusal names field and value."""

from __future__ import annotations

import pytest

from rules.errors import FieldError
from rules.model import (
    Combination,
    Condition,
    CriterionPatch,
    Gate,
    IndicatorSpec,
    Override,
    PrepareSignal,
    Thresholds,
    Tier,
    TierText,
    Timing,
)


def _thr(enter: list[float | None], exit_: list[float | None], direction: str = "rising"):  # type: ignore[no-untyped-def]
    n = len(enter)
    return Thresholds(
        direction=direction,  # type: ignore[arg-type]
        enter=tuple(enter),
        exit=tuple(exit_),
        enter_strict=(False,) * n,
        exit_strict=(False,) * n,
    )


@pytest.mark.parametrize(
    ("enter", "exit_", "direction", "field", "match"),
    [
        pytest.param([50, 150], [55, 120], "rising", ("enter", 0),
                     "50 is below the exit threshold 55", id="exit-above-enter"),
        pytest.param([20, 10], [15, 14], "falling", ("enter", 0),
                     "20 is above the exit threshold 15", id="falling-exit-below-enter"),
        pytest.param([150, 50], [120, 40], "rising", ("enter", 1),
                     "50 is below the tier-1 enter threshold 150", id="enter-not-monotone"),
        pytest.param([50, 150], [40, 30], "rising", ("exit", 1),
                     "30 is below the tier-1 exit threshold 40", id="exit-not-monotone"),
        pytest.param([50, None, 150], [40, None, 120], "rising", ("enter", 2),
                     "150 follows an unreachable", id="gap"),
        pytest.param([None, None], [None, None], "rising", ("enter",),
                     "needs at least one threshold", id="no-threshold"),
        pytest.param([50], [None], "rising", ("exit", 0), "missing while", id="missing-exit"),
        pytest.param([None, 50], [10, 40], "rising", ("exit", 0),
                     "10 given for a tier without enter", id="exit-without-enter"),
        pytest.param([float("nan")], [1], "rising", ("enter", 0), "finite", id="nan"),
        pytest.param([5], [1], "up", ("direction",), "'rising' or 'falling'", id="direction"),
    ],
)
def test_thresholds_refuse_bad_lists(
    enter: list[float | None], exit_: list[float | None], direction: str,
    field: tuple[str | int, ...], match: str,
) -> None:
    with pytest.raises(FieldError, match=match) as info:
        _thr(enter, exit_, direction)
    assert info.value.field == field


def test_thresholds_lengths_must_agree() -> None:
    with pytest.raises(FieldError, match="has 1 entries, enter has 2") as info:
        Thresholds(direction="rising", enter=(1, 2), exit=(1,), enter_strict=(False, False),
                   exit_strict=(False, False))
    assert info.value.field == ("exit",)


def test_thresholds_filled_and_max_level() -> None:
    th = _thr([None, 30, 45, None], [None, 22, 35, None])
    assert th.filled == ((30, 30, 45, None), (22, 22, 35, None))
    assert th.max_level == 3


def test_tier_translation_falls_back_to_default() -> None:
    tier = Tier(level=1, name="Busy", staff="s", public="Take care.",
                translations=(("de", TierText(name="Erhöht")),))
    assert (tier.name_in("de"), tier.public_in("de")) == ("Erhöht", "Take care.")
    assert (tier.name_in("fr"), tier.name_in(None)) == ("Busy", "Busy")


def test_tier_refuses_a_bad_language_code() -> None:
    with pytest.raises(FieldError, match="'deutsch' is not a language code"):
        Tier(level=1, name="Busy", staff="s", public="p",
             translations=(("deutsch", TierText(name="x")),))


@pytest.mark.parametrize(
    ("unit", "decimals", "value", "text"),
    [
        pytest.param("", 2, 1.005, "1.00", id="no-unit"),  # binary 1.005 is just under 1.005
        pytest.param("%", 1, 8.14, "8.1%", id="percent"),
        pytest.param("per 100 000", 0, 162.4, "162 per 100 000", id="words"),
    ],
)
def test_indicator_spec_format(unit: str, decimals: int, value: float, text: str) -> None:
    assert IndicatorSpec(name="x", label="x", unit=unit, decimals=decimals).format(value) == text


@pytest.mark.parametrize(
    ("params", "match"),
    [
        pytest.param({"window": 0}, "expected a positive int, got 0", id="window-zero"),
        pytest.param({"window": 7.5}, "expected a positive int, got 7.5", id="window-float"),
        pytest.param({"serial_interval_mean": 0}, "expected a positive float, got 0",
                     id="mean-zero"),
        pytest.param({"samples": True}, "expected a positive int, got True", id="bool"),
    ],
)
def test_indicator_spec_checks_known_params(params: dict[str, object], match: str) -> None:
    with pytest.raises(FieldError, match=match):
        IndicatorSpec(name="x", label="x", params=params)  # type: ignore[arg-type]


def test_indicator_spec_params_are_read_only() -> None:
    spec = IndicatorSpec(name="x", label="x", params={"window": 7, "own": "free"})
    with pytest.raises(TypeError):
        spec.params["window"] = 8  # type: ignore[index]


@pytest.mark.parametrize(
    ("build", "match"),
    [
        pytest.param(lambda: Combination(method="at_least"), "at_least needs m", id="no-m"),
        pytest.param(lambda: Combination(method="score"), "score needs weights", id="no-w"),
        pytest.param(lambda: Combination(method="score", weights={"a": 1}, cutoffs=(2, 1)),
                     "1 is below the previous cut-off 2", id="cutoffs"),
        pytest.param(lambda: Combination(method="score", weights={"a": -1}), "must be >= 0",
                     id="negative-weight"),
        pytest.param(lambda: Combination(method="vote"), "got 'vote'", id="method"),
        pytest.param(lambda: Timing(confirm_days=0), "expected an integer >= 1, got 0",
                     id="confirm-zero"),
        pytest.param(lambda: Timing(max_steps_down=0), "expected an integer >= 1, got 0",
                     id="steps-zero"),
        pytest.param(lambda: Timing(min_days_in_tier=-1), "expected an integer >= 0",
                     id="min-days-negative"),
        pytest.param(lambda: Gate(id="g"), "needs an indicator comparison or 'known'",
                     id="gate-empty"),
        pytest.param(lambda: Gate(id="g", indicator="tests", op="above"),
                     "needs one of above, at_least, below, at_most", id="gate-no-value"),
        pytest.param(lambda: Condition(source="a", level_at_least=1,
                                       patch=CriterionPatch(criterion="a")),
                     "'a' cannot condition itself", id="condition-self"),
        pytest.param(lambda: Override(id="o"), "matches neither levels nor regions",
                     id="override-empty"),
        pytest.param(lambda: PrepareSignal(id="s", indicator="x", op="over", value=1),  # type: ignore[arg-type]
                     "needs one of", id="signal-op"),
        pytest.param(lambda: PrepareSignal(id="s", indicator="x", op="above", value=1,
                                           count_by="weeks"),  # type: ignore[arg-type]
                     "expected days or samples", id="signal-count-by"),
        pytest.param(lambda: PrepareSignal(id="s", indicator="x", op="above", value=1,
                                           for_count=0),
                     "expected an integer >= 1, got 0", id="signal-for"),
    ],
)
def test_building_blocks_refuse_bad_values(build, match: str) -> None:  # type: ignore[no-untyped-def]
    with pytest.raises(FieldError, match=match):
        build()


def test_override_matches_by_region_or_level() -> None:
    ov = Override(id="o", levels=("small",), regions=("R9",))
    assert ov.matches("R9", None) and ov.matches("R1", "small")
    assert not ov.matches("R1", "district") and not ov.matches("R1", None)
