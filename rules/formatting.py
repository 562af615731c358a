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

__all__ = ["CATEGORIES", "INTENSITY_LEVEL_NAMES", "MISSING", "NO_INTERVAL", "category_label",
           "interval_text", "level_names",
           "number_text", "reading_text", "change_text", "value_text", "with_unit"]

#: A value that is not known (None or not finite upstream).
MISSING = "n/a"
#: An interval with a missing bound.
NO_INTERVAL = "—"
#: Names of the values 0..4 of a seasonal intensity indicator (moving epidemic method).
INTENSITY_LEVEL_NAMES = ("below threshold", "low", "medium", "high", "very high")
#: Indicators whose values are category codes 0, 1, ...: the word for each code, by indicator
#: kind (the ``kind`` parameter, else the indicator's name). Values and thresholds are written as
#: the word and the code, "medium (2)", "growing (3)". ``wave_phase``:
#: :data:`server.indicators.phase.PHASE_LABELS` (a test keeps the two equal).
CATEGORIES: dict[str, tuple[str, ...]] = {
    "seasonal_intensity": INTENSITY_LEVEL_NAMES,
    "wave_phase": ("declining", "past its turning point", "slowing", "growing"),
}


def level_names(spec: IndicatorSpec) -> tuple[str, ...] | None:
    """Names of the values of a category indicator (by its ``kind`` parameter or its name);
    None for an ordinary number."""
    kind = spec.params.get("kind", spec.name)
    return CATEGORIES.get(kind) if isinstance(kind, str) else None


def category_label(spec: IndicatorSpec, value: float | None) -> str | None:
    """The word for ``value`` when ``spec`` is a category indicator and ``value`` one of its
    codes; None otherwise."""
    names = level_names(spec)
    if names is None or value is None or not float(value).is_integer() \
            or not 0 <= value < len(names):
        return None
    return names[int(value)]


def number_text(spec: IndicatorSpec, value: float | None) -> str:
    """``value`` with the spec's decimals, no unit; :data:`MISSING` for None; the word of a
    category code (:data:`CATEGORIES`)."""
    if value is None:
        return MISSING
    label = category_label(spec, value)
    if label is not None:
        return f"{label} ({int(value)})"  # "medium (2)"
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


def change_text(ratio: float) -> str:
    """A factor as the change it makes, in whole per cent: 1.6 -> "rose 60%", 0.7 -> "fell
    30%" (a change under 0.5 % reads "rose 0%")."""
    pct = (ratio - 1.0) * 100.0
    return f"rose {pct:.0f}%" if pct >= 0 else f"fell {-pct:.0f}%"
