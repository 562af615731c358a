"""tierwise rules engine: YAML tier policies with hysteresis, evaluated on indicator arrays.

Pure: imports only the standard library, PyYAML and numpy.
"""

from rules.errors import EvaluationInputError, FieldError, RulesetError
from rules.evaluation import EngineState, Evaluation, evaluate
from rules.explanation import Explanation
from rules.loader import load_ruleset, parse_ruleset
from rules.model import (
    Combination,
    Condition,
    Criterion,
    CriterionPatch,
    Gate,
    IndicatorSpec,
    Override,
    PrepareSignal,
    Scenario,
    Thresholds,
    Tier,
    Timing,
)
from rules.ruleset import INSUFFICIENT_DATA, Ruleset
from rules.series import IndicatorSeries
from rules.summary import summary

__all__ = [
    "INSUFFICIENT_DATA",
    "Combination",
    "Condition",
    "Criterion",
    "CriterionPatch",
    "EngineState",
    "Evaluation",
    "EvaluationInputError",
    "Explanation",
    "FieldError",
    "Gate",
    "IndicatorSeries",
    "IndicatorSpec",
    "Override",
    "PrepareSignal",
    "Scenario",
    "Ruleset",
    "RulesetError",
    "Thresholds",
    "Tier",
    "Timing",
    "evaluate",
    "load_ruleset",
    "parse_ruleset",
    "summary",
]
