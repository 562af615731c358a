"""The one formatter of indicator values: a value, its interval and its unit as text.

Driven by the ruleset's :class:`~rules.model.IndicatorSpec` (``decimals`` and ``unit``). The
sentences of :mod:`rules.explanation`, the explanation page, its "Revised since" section and the
review cards all write values through these functions, so the same number reads the same
everywhere: ``value_text`` gives "162 per 100 000" (a unit starting with "%" is written without a
space: "8.1%"), ``interval_text`` "148–177", and ``reading_text`` "162 (148–177) per 100 000" or
"8.1% (6.0–10.9)", the form the sentences use for a criterion compared on its interval bounds.
An indicator of ordered levels (the seasonal intensity) reads by level name: "medium (2)".
"""

from __future__ import annotations

from rules.model import IndicatorSpec

__all__ = ["INTENSITY_LEVEL_NAMES", "MISSING", "NO_INTERVAL", "interval_text", "level_names",
           "number_text", "reading_text", "value_text", "with_unit"]

#: A value that is not known (None or not finite upstream).
MISSING = "n/a"
#: An interval with a missing bound.
NO_INTERVAL = "—"
#: Names of the values 0..4 of a seasonal intensity indicator (moving epidemic method).
INTENSITY_LEVEL_NAMES = ("below threshold", "low", "medium", "high", "very high")
_LEVEL_KINDS = {"seasonal_intensity": INTENSITY_LEVEL_NAMES}


def level_names(spec: IndicatorSpec) -> tuple[str, ...] | None:
    """Names of the values of an indicator whose values are ordered levels (the seasonal
    intensity, by its name or its ``kind`` parameter); None for an ordinary number."""
    kind = spec.params.get("kind", spec.name)
    return _LEVEL_KINDS.get(kind) if isinstance(kind, str) else None


def number_text(spec: IndicatorSpec, value: float | None) -> str:
    """``value`` with the spec's decimals, no unit; :data:`MISSING` for None."""
    if value is None:
        return MISSING
    names = level_names(spec)
    if names is not None and float(value).is_integer() and 0 <= value < len(names):
        return f"{names[int(value)]} ({int(value)})"  # "medium (2)"
    return f"{value:.{spec.decimals}f}"


def with_unit(spec: IndicatorSpec, text: str) -> str:
    """``text`` followed by the spec's unit ("%" units attach without a space)."""
    if not spec.unit:
        return text
    return text + spec.unit if spec.unit.startswith("%") else f"{text} {spec.unit}"


def value_text(spec: IndicatorSpec, value: float | None) -> str:
    """A value with its unit: "162 per 100 000"; :data:`MISSING` (no unit) for None."""
    if value is None:
        return MISSING
    return with_unit(spec, number_text(spec, value))


def interval_text(spec: IndicatorSpec, lower: float | None, upper: float | None) -> str:
    """"148–177" (no unit); :data:`NO_INTERVAL` when a bound is missing."""
    if lower is None or upper is None:
        return NO_INTERVAL
    return f"{number_text(spec, lower)}–{number_text(spec, upper)}"


def reading_text(spec: IndicatorSpec, value: float | None, lower: float | None,
                 upper: float | None) -> str:
    """A value with its interval when both bounds are known: "162 (148–177) per 100 000",
    "8.1% (6.0–10.9)" (a "%" unit stays with the number). The unit follows whatever the number
    reads, "n/a" included, as the sentences have it."""
    text = number_text(spec, value)
    interval = f" ({interval_text(spec, lower, upper)})" if None not in (lower, upper) else ""
    if spec.unit.startswith("%"):
        return with_unit(spec, text) + interval
    return with_unit(spec, text + interval)
