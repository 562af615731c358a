"""The registry of indicator kinds: which kinds exist, and what a policy's declaration means.

A policy declares each indicator it uses as a *kind* applied to a *measure* with parameters
(``docs/rules.md``, "Indicators")::

    indicators:
      admissions_incidence:
        kind: incidence
        measure: hosp_admissions
        params: {window: 14}
        label: 14-day admissions

:data:`KINDS` is the registry: the kinds tierwise ships
(:data:`~server.services.builtin_kinds.BUILTIN_KINDS`, in their order, from this module's import
on) and any :func:`register` adds (what a kind is: :mod:`server.services.kind_model`).
:func:`check_indicator` validates a declaration against it (the loader reports its errors with
line and key), :func:`resolve` turns a declaration into an
:class:`~server.services.kind_model.Indicator`, :func:`measure_needs` lists the measures a
ruleset's indicators read, and :func:`compute` builds every indicator a ruleset uses.

The names tierwise knew before kinds existed are default declarations (:data:`DEFAULTS`): a
policy that declares one of them without ``kind`` gets that kind, measure and parameters, and
its own ``params`` override the defaults. A name without ``kind`` that is neither a default nor
in :data:`~server.services.district_indicators.BUILDERS` (name-based builders) cannot be
computed.
"""

from __future__ import annotations

from collections.abc import Callable, Collection, Iterable, Mapping, Sequence
from types import MappingProxyType

from rules import FieldError, IndicatorSeries, IndicatorSpec, Ruleset
from rules.model import ParamValue
from server.services.builtin_kinds import BUILTIN_DEFAULTS, BUILTIN_KINDS
from server.services.district_data import (
    AREA_MEASURES,
    DISTRICT_MEASURES,
    PLANT_MEASURES,
    DistrictData,
    MeasureNeeds,
)
from server.services.district_indicators import BUILDERS
from server.services.errors import ServiceError
from server.services.kind_model import (
    STANDARD_MEASURES,
    Default,
    Indicator,
    Kind,
    check_measure,
)

__all__ = [
    "DEFAULTS",
    "KINDS",
    "IndicatorDeclarationError",
    "UnknownIndicatorError",
    "check_indicator",
    "compute",
    "describe",
    "history_indicators",
    "indicator_check",
    "known_measures",
    "measure_needs",
    "register",
    "resolve",
    "sample_indicators",
]

#: Every kind a declaration may name, by name (the built-in kinds first, in their order).
KINDS: dict[str, Kind] = {k.name: k for k in BUILTIN_KINDS}

#: Names that are a declaration by default (:data:`~server.services.builtin_kinds.
#: BUILTIN_DEFAULTS`; :func:`register` adds the names of kinds registered with ``default``).
DEFAULTS: dict[str, Default] = dict(BUILTIN_DEFAULTS)


def register(kind: Kind, *, replace: bool = False, default: bool = False) -> Kind:
    """Add ``kind`` to :data:`KINDS` (a second kind of the same name needs ``replace``); with
    ``default`` a declaration named as the kind needs no ``kind:`` (:data:`DEFAULTS`)."""
    if kind.name in KINDS and not replace:
        raise ValueError(f"indicator kind {kind.name!r} is registered already")
    KINDS[kind.name] = kind
    if default:
        DEFAULTS[kind.name] = Default(kind=kind.name, measure=kind.default_measure)
    return kind


class UnknownIndicatorError(ServiceError, ValueError):
    def __init__(self, names: list[str]) -> None:
        super().__init__(
            f"the ruleset uses indicator(s) {', '.join(names)} that tierwise does not compute; "
            f"declare a kind (known kinds: {', '.join(sorted(KINDS))}) or use a known name "
            f"({', '.join(sorted({*DEFAULTS, *BUILDERS}))})"
        )


class IndicatorDeclarationError(ServiceError, ValueError):
    """A stored ruleset declares an indicator the registry refuses (``rules check`` says where)."""

    def __init__(self, name: str, problem: FieldError) -> None:
        super().__init__(f"indicator {name!r}: {problem}")


def _declared(spec: IndicatorSpec) -> tuple[str, str, dict[str, ParamValue]] | None:
    """(kind, measure, params before defaults) of a declaration; None: not a kind at all."""
    if spec.kind is not None:
        kind = KINDS.get(spec.kind)
        if kind is None:
            raise FieldError(("kind",), f"unknown indicator kind {spec.kind!r} (known: "
                                        f"{', '.join(sorted(KINDS))})")
        return spec.kind, spec.measure or kind.default_measure, dict(spec.params)
    default = DEFAULTS.get(spec.name)
    if default is None:
        return None
    return default.kind, default.measure, {**default.params, **spec.params}


def resolve(
    spec: IndicatorSpec, measures: Mapping[str, str] = STANDARD_MEASURES,
    ruleset: Ruleset | None = None,
) -> Indicator | None:
    """The declaration ``spec`` checked against the registry and ``measures`` (name -> kind of
    measure); None for a name that is no kind (a name-based builder, or unknown).

    Raises :class:`~rules.errors.FieldError` with the path inside the declaration
    (``("kind",)``, ``("measure",)``, ``("params", name)``).
    """
    declared = _declared(spec)
    if declared is None:
        return None
    kind_name, measure, given = declared
    kind = KINDS[kind_name]
    named = given.get(kind.measure_param) if kind.measure_param else None
    if isinstance(named, str) and (spec.kind is None or spec.measure is None):
        measure = named   # params: {measure: gp_ari.rsv} names what it reads
        check_measure(("params", str(kind.measure_param)), measure, kind.measure_kinds, measures)
    check_measure(("measure",), measure, kind.measure_kinds, measures)
    known = {p.name for p in kind.params}
    params: dict[str, ParamValue] = {}
    for key, value in given.items():
        if key not in known and (spec.kind is None or kind.open_params):
            if kind.open_params:
                params[key] = value  # the builder checks its own parameters
            continue  # an old name's free parameters were never read, and still are not
        if key not in known:
            raise FieldError(("params", key), f"unknown parameter {key!r} of kind "
                                              f"{kind.name!r} (expected one of: "
                                              f"{', '.join(sorted(known)) or 'none'})")
        params[key] = kind.param(key).check(value, measures)
    for p in kind.params:
        if p.name not in params and p.default is not None:
            params[p.name] = p.default
    if kind.check is not None:
        kind.check(params)
    return Indicator(name=spec.name, kind=kind, measure=measure,
                     params=MappingProxyType(params), ruleset=ruleset)


def check_indicator(
    spec: IndicatorSpec, measures: Mapping[str, str] = STANDARD_MEASURES
) -> None:
    """Raise :class:`~rules.errors.FieldError` if the registry cannot compute ``spec``.

    A name without ``kind`` must be a default declaration (:data:`DEFAULTS`) or have a
    name-based builder (:data:`~server.services.district_indicators.BUILDERS`)... or no check
    at all: policies written for other tools (``rules/policies/eu-2020-1475.yaml``) declare
    names tierwise does not compute, and only evaluating them fails
    (:class:`UnknownIndicatorError`).
    """
    resolve(spec, measures)


def known_measures(measures: Mapping[str, str] | None = None) -> dict[str, str]:
    """The standard measures and ``measures`` (name -> kind, e.g. the store's catalogue); a
    standard name keeps its standard kind."""
    return {**(measures or {}), **STANDARD_MEASURES}


def indicator_check(
    measures: Mapping[str, str] | None = None, *, pathogens: Sequence[str] | None = None,
) -> Callable[[IndicatorSpec], None]:
    """The check :func:`rules.parse_ruleset` takes, over :func:`known_measures`; with
    ``pathogens`` (the feeds file's list) a qualified measure's pathogen must be one of them."""
    known = known_measures(measures)

    def check(spec: IndicatorSpec) -> None:
        ind = resolve(spec, known)
        if ind is None or pathogens is None:
            return
        roles = [("measure",)] + [("params", p.name) for p in ind.kind.params
                                  if p.type == "measure" and p.name in ind.params]
        for role, name in zip(roles, ind.measures(), strict=True):
            base, dot, pathogen = name.partition(".")
            if dot and name not in known and pathogen not in pathogens:
                raise FieldError(role, f"unknown pathogen {pathogen!r} in {name!r} "
                                       f"(configured: {', '.join(pathogens) or 'none'})")

    return check


def _resolved(ruleset: Ruleset, measures: Mapping[str, str]) -> dict[str, Indicator | None]:
    out: dict[str, Indicator | None] = {}
    for name in ruleset.used_indicators():
        spec = ruleset.indicator(name)
        try:
            out[name] = resolve(spec, measures, ruleset)
        except FieldError as exc:
            raise IndicatorDeclarationError(name, exc) from None
    return out


def measure_needs(
    ruleset: Ruleset, measures: Mapping[str, str] | None = None
) -> MeasureNeeds:
    """The measures the indicators ``ruleset`` uses read, by where they are stored.

    A name-based builder (:data:`~server.services.district_indicators.BUILDERS`) reads the
    measures of earlier releases (``DISTRICT_MEASURES``, ...), so those are read with it.
    """
    found: dict[str, set[str]] = {"district": set(), "area": set(), "plant": set()}
    for name, ind in _resolved(ruleset, known_measures(measures)).items():
        if ind is None:
            if name in BUILDERS:
                found["district"] |= set(DISTRICT_MEASURES)
                found["area"] |= set(AREA_MEASURES)
                found["plant"] |= set(PLANT_MEASURES)
            continue
        found[ind.kind.level] |= set(ind.measures())
        if ind.kind.reads is not None:
            for level in ("district", "area", "plant"):
                found[level] |= set(getattr(ind.kind.reads, level))
    return MeasureNeeds(district=tuple(sorted(found["district"])),
                        area=tuple(sorted(found["area"])), plant=tuple(sorted(found["plant"])))


def _of_kinds(ruleset: Ruleset, attr: str) -> tuple[str, ...]:
    out = []
    for name in ruleset.used_indicators():
        try:
            declared = _declared(ruleset.indicator(name))
        except FieldError:
            continue
        if declared is not None and getattr(KINDS[declared[0]], attr):
            out.append(name)
    return tuple(out)


def sample_indicators(ruleset: Ruleset) -> tuple[str, ...]:
    """The indicators of ``ruleset`` that exist on sample days only (:attr:`Kind.on_samples`)."""
    return _of_kinds(ruleset, "on_samples")


def history_indicators(ruleset: Ruleset) -> tuple[str, ...]:
    """The indicators of ``ruleset`` that need their calendar and a long history
    (:attr:`Kind.history`)."""
    return _of_kinds(ruleset, "history")


def compute(
    data: DistrictData, ruleset: Ruleset, measures: Mapping[str, str] | None = None,
    names: Collection[str] | None = None,
) -> dict[str, IndicatorSeries]:
    """The indicator series ``ruleset`` uses (of ``names`` only, when given), computed for
    every district at once.

    Declarations are checked against :func:`known_measures` of ``measures`` (default: the
    store's catalogue as read into ``data``); the measures must have been read into ``data``
    (:func:`measure_needs`).
    """
    catalogue = data.measure_kinds if measures is None else measures
    resolved = _resolved(ruleset, known_measures(catalogue))
    if names is not None:
        resolved = {n: ind for n, ind in resolved.items() if n in names}
    unknown = [n for n, ind in resolved.items() if ind is None and n not in BUILDERS]
    if unknown:
        raise UnknownIndicatorError(sorted(unknown))
    return {
        name: ind.kind.build(data, ind) if ind is not None else BUILDERS[name](data, ruleset)
        for name, ind in sorted(resolved.items())
    }


def describe(kinds: Iterable[Kind] | None = None) -> list[str]:
    """One line per kind and parameter, for ``tierwise rules kinds`` and the docs."""
    lines = []
    for kind in kinds if kinds is not None else KINDS.values():
        lines.append(f"{kind.name}: {kind.help} (measure: {kind.default_measure}, "
                     f"{'/'.join(kind.measure_kinds)} at {kind.level} level)")
        for p in kind.params:
            bounds = "".join((
                f", >= {p.minimum:g}" if p.minimum is not None else "",
                f", > {p.above:g}" if p.above is not None else "",
                f", <= {p.maximum:g}" if p.maximum is not None else "",
                f", one of {'/'.join(p.choices)}" if p.choices else "",
            ))
            kind_name = p.type if isinstance(p.type, str) else p.type.__name__
            lines.append(f"  {p.name} ({kind_name}{bounds}; default {p.default!r}): {p.help}")
    return lines
