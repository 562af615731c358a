"""What an indicator kind is: its parameters, the measures it reads, its builder.

A policy declares each indicator it uses as a *kind* applied to a *measure* with parameters
(``docs/rules.md``, "Indicators"). A :class:`Kind` says which parameters it takes
(:class:`Param`: type, bounds, default), which kinds of measure it accepts (``count``,
``level``, ``concentration``: :data:`STANDARD_MEASURES`, :func:`measure_kind`), where its
measures are read (districts, their parent areas, treatment plants), and its builder, a
function of the :class:`~server.services.district_data.DistrictData` and the resolved
:class:`Indicator`. :func:`from_named_builder` makes a kind of a name-based builder
(:data:`~server.services.district_indicators.BUILDERS`); :class:`Default` is a name of an
earlier release standing for a kind, measure and parameters.

The kinds tierwise ships are in :mod:`server.services.builtin_kinds`; the registry that holds
them and resolves declarations against them is :mod:`server.services.indicator_kinds`.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from dataclasses import dataclass, field, replace
from types import MappingProxyType
from typing import Literal

from rules import FieldError, IndicatorSeries, IndicatorSpec, Ruleset
from rules.model import ParamValue
from server.services.district_data import DistrictData, MeasureNeeds
from server.services.district_indicators import carry_forward

__all__ = [
    "STANDARD_MEASURES",
    "Builder",
    "Default",
    "Indicator",
    "Kind",
    "Level",
    "Param",
    "check_measure",
    "from_named_builder",
    "measure_kind",
]

Level = Literal["district", "area", "plant"]
MeasureKind = Literal["count", "level", "concentration"]

#: The measures tierwise knows by name, with their kind (DESIGN.md, "Data model"). Feeds and the
#: store may define more; :func:`~server.services.indicator_kinds.indicator_check` takes those
#: as ``measures``.
STANDARD_MEASURES: Mapping[str, str] = MappingProxyType({
    "cases": "count", "tests": "count", "positives": "count", "hosp_admissions": "count",
    "gp_ari": "count", "icu_occupied": "level", "icu_staffed": "level",
    "ww_concentration": "concentration", "ww_flow": "level", "ww_marker": "concentration",
})


@dataclass(frozen=True, kw_only=True)
class Param:
    """One parameter of a kind: its type, bounds and default.

    ``type`` is ``int``, ``float``, ``bool``, ``str`` (one of ``choices``) or ``"measure"``
    (a measure name, of one of ``measure_kinds``, read at the kind's level). ``minimum`` and
    ``maximum`` are inclusive; ``above`` an exclusive lower bound. A parameter with
    ``default=None`` may be left out and is then absent.
    """

    name: str
    type: type | str
    default: ParamValue | None
    help: str
    minimum: float | None = None
    maximum: float | None = None
    above: float | None = None
    choices: tuple[str, ...] = ()
    measure_kinds: tuple[str, ...] = ()

    def check(self, value: ParamValue, measures: Mapping[str, str]) -> ParamValue:
        """``value`` if it fits (ints are taken for floats); else :class:`FieldError`."""
        path = ("params", self.name)
        if self.type == "measure":
            if not isinstance(value, str):
                raise FieldError(path, f"expected a measure name, got {value!r}")
            check_measure(path, value, self.measure_kinds, measures)
            return value
        if self.type is bool:
            if not isinstance(value, bool):
                raise FieldError(path, f"expected true or false, got {value!r}")
            return value
        if self.type is str:
            if value not in self.choices:
                raise FieldError(path, f"expected one of {', '.join(self.choices)}, "
                                       f"got {value!r}")
            return value
        ok = not isinstance(value, bool) and (
            isinstance(value, int) if self.type is int else isinstance(value, int | float))
        if not ok:
            what = "an integer" if self.type is int else "a number"
            raise FieldError(path, f"expected {what}, got {value!r}")
        number = float(value)  # type: ignore[arg-type]
        if self.minimum is not None and number < self.minimum:
            raise FieldError(path, f"{value!r} is below the minimum {self.minimum:g}")
        if self.maximum is not None and number > self.maximum:
            raise FieldError(path, f"{value!r} is above the maximum {self.maximum:g}")
        if self.above is not None and number <= self.above:
            raise FieldError(path, f"expected a number above {self.above:g}, got {value!r}")
        return value if self.type is int else float(number)


@dataclass(frozen=True, kw_only=True)
class Indicator:
    """A declared indicator resolved against the registry: kind, measure, every parameter."""

    name: str
    kind: Kind
    measure: str
    params: Mapping[str, ParamValue]
    #: The ruleset that declares it (None outside one: ``tierwise estimate``).
    ruleset: Ruleset | None = field(default=None, compare=False, repr=False)

    def measures(self) -> tuple[str, ...]:
        """Every measure it reads: the measure, then the measure parameters."""
        extra = tuple(str(self.params[p.name]) for p in self.kind.params
                      if p.type == "measure" and p.name in self.params)
        return (self.measure, *extra)


Builder = Callable[[DistrictData, Indicator], IndicatorSeries]


@dataclass(frozen=True, kw_only=True)
class Kind:
    """An indicator kind: what it accepts and how it is built.

    ``measure_kinds`` are the kinds of measure the ``measure`` may be; ``level`` where its
    measures are stored (``district``; ``area``: the district's parent area, e.g. ICU beds;
    ``plant``: wastewater treatment plants, weighted by the people of each district they
    serve). ``on_samples``: the values exist on sample days only (not carried forward; prepare
    signals count samples); ``carry``: the newest value is held on days without one (unless
    ``on_samples``). ``builder`` computes it for every district. ``reads``: measures read
    whatever the declaration names (for builders that read fixed measures);
    ``open_params``: parameters the kind does not list pass unchecked (its builder checks them).
    ``history``: its value on a day needs the calendar dates of its days or more history than
    the as-known replay's trailing window (past seasons, a year's baseline): the replay
    computes it each morning from everything known that morning
    (:class:`server.services.as_known_replay._History`).
    """

    name: str
    help: str
    default_measure: str
    measure_kinds: tuple[str, ...]
    builder: Builder
    params: tuple[Param, ...] = ()
    level: Level = "district"
    on_samples: bool = False
    #: Checks between parameters (given all of them); raises FieldError.
    check: Callable[[Mapping[str, ParamValue]], None] | None = None
    carry: bool = True
    reads: MeasureNeeds | None = None
    open_params: bool = False
    #: ``tierwise estimate`` offers it (a builder that needs its ruleset cannot run there).
    in_estimate: bool = True
    #: A parameter that names the measure (a name-based builder's own ``params: {measure:}``):
    #: given there, it is the measure the declaration reads.
    measure_param: str | None = None
    history: bool = False

    def param(self, name: str) -> Param:
        for p in self.params:
            if p.name == name:
                return p
        raise KeyError(name)

    def build(self, data: DistrictData, ind: Indicator) -> IndicatorSeries:
        """The series for every district (the newest value held while none is new, unless
        ``on_samples``; :func:`~server.services.district_indicators.carry_forward`)."""
        series = self.builder(data, ind)
        return series if self.on_samples or not self.carry else carry_forward(series)


def measure_kind(name: str, measures: Mapping[str, str]) -> str | None:
    """The kind of measure ``name`` (None: unknown). A qualified name (``cases.influenza``: the
    measure ``cases`` of one pathogen or stream) not itself listed has its base's kind."""
    if name in measures:
        return measures[name]
    base = name.split(".", 1)[0]
    return measures.get(base) if base != name else None


def check_measure(
    path: tuple[str | int, ...], name: str, kinds: tuple[str, ...], measures: Mapping[str, str]
) -> None:
    """Raise :class:`FieldError` at ``path`` unless ``name`` is a known measure of one of
    ``kinds`` (any kind when empty)."""
    found = measure_kind(name, measures)
    if found is None:
        raise FieldError(path, f"{name!r} is not a known measure (known: "
                               f"{', '.join(sorted(measures))})")
    if kinds and found not in kinds:
        raise FieldError(path, f"{name!r} is a {found} measure; this kind takes "
                               f"{' or '.join(kinds)} measures")


@dataclass(frozen=True, kw_only=True)
class Default:
    """A name tierwise knew before kinds: the kind, measure and parameters it stands for."""

    kind: str
    measure: str
    params: Mapping[str, ParamValue] = field(default_factory=dict)


class _NamedView:
    """A ruleset as a name-based builder sees it: ``indicator(name)`` is the declaration being
    built (with its resolved parameters), whatever it is called; all else is the ruleset's."""

    def __init__(self, ruleset: Ruleset, name: str, ind: Indicator) -> None:
        self._ruleset, self._name, self._ind = ruleset, name, ind

    def indicator(self, name: str) -> IndicatorSpec:
        if name == self._name:
            return replace(self._ruleset.indicator(self._ind.name), name=self._name,
                           params=dict(self._ind.params))
        return self._ruleset.indicator(name)

    def used_indicators(self) -> tuple[str, ...]:
        return (*self._ruleset.used_indicators(), self._name)

    def __getattr__(self, attr: str) -> object:
        return getattr(self._ruleset, attr)


def from_named_builder(
    builder: Callable[[DistrictData, Ruleset], IndicatorSeries], *, name: str, help: str,
    default_measure: str, measure_kinds: tuple[str, ...], level: Level = "district",
    params: tuple[Param, ...] = (), carry: bool = True, on_samples: bool = False,
    reads: MeasureNeeds | None = None, measure_param: str | None = None, history: bool = False,
) -> Kind:
    """A kind from a :data:`~server.services.district_indicators.BUILDERS`-style function,
    which reads its parameters as ``ruleset.indicator(name).params``; it sees the declaration
    being built under ``name`` (so a policy may declare it under any name, with ``kind:``).

    ``params`` are checked; others pass to the builder unchecked. It reads ``reads`` (default:
    the measures of earlier releases) besides the declared measure; ``carry`` holds the newest
    value on days without one, as ``carry_forward`` in a BUILDERS line does. A builder that
    takes its measure from a parameter names it as ``measure_param``: the declared ``measure``
    is given there unless the parameter is set; ``history`` as :attr:`Kind.history`.
    """
    def build(d: DistrictData, ind: Indicator) -> IndicatorSeries:
        if ind.ruleset is None:
            raise ValueError(f"indicator kind {name!r} is computed within a ruleset only")
        if measure_param is not None and measure_param not in ind.params:
            ind = replace(ind, params={**ind.params, measure_param: ind.measure})
        return builder(d, _NamedView(ind.ruleset, name, ind))  # type: ignore[arg-type]

    return Kind(name=name, help=help, default_measure=default_measure,
                measure_kinds=measure_kinds, level=level, params=params, builder=build,
                carry=carry, on_samples=on_samples, reads=reads or MeasureNeeds(),
                open_params=True, in_estimate=False, measure_param=measure_param,
                history=history)
