"""Load a ruleset from YAML text, keeping line and column of every node.

``parse_ruleset(text, source=...)`` composes the YAML with the safe loader, reads each section with
a :class:`~rules.nodes.NodeReader` and builds the frozen objects of :mod:`rules.model` and
:class:`~rules.ruleset.Ruleset`. All problems found are raised together as one
:class:`~rules.errors.RulesetError` (``exc.errors`` lists them). The schema is documented in
``docs/rules.md``.
"""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path as FsPath
from typing import Any

import yaml

from rules.errors import RulesetError
from rules.model import (
    COMPARISONS,
    POLICY_LEVELS,
    Combination,
    Condition,
    Criterion,
    CriterionPatch,
    Gate,
    IndicatorSpec,
    Override,
    PrepareSignal,
    Scenario,
    TestingHold,
    Thresholds,
    Tier,
    TierText,
    Timing,
)
from rules.nodes import MISSING, NodeReader, Path
from rules.ruleset import Ruleset

__all__ = ["IndicatorCheck", "load_ruleset", "parse_ruleset"]

#: Checks one declared indicator (raises :class:`~rules.errors.FieldError`); see
#: :func:`parse_ruleset`.
IndicatorCheck = Callable[[IndicatorSpec], None]

_TOP_REQUIRED = ("name", "version", "tiers", "indicators", "criteria")
_TOP_OPTIONAL = (
    "description",
    "translations",
    "gates",
    "combination",
    "conditions",
    "timing",
    "freshness",
    "overrides",
    "prepare",
    "scenarios",
    "level",
    "testing_hold",
)
_THRESHOLD_KEYS = ("enter", "exit", "strict", "enter_strict", "exit_strict")


def load_ruleset(path: str | FsPath, *, indicators: IndicatorCheck | None = None) -> Ruleset:
    """Read and parse the ruleset file at ``path`` (UTF-8); errors name the file."""
    p = FsPath(path)
    try:
        text = p.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise RulesetError(str(path), 0, 0, "", f"cannot read the file: {exc}") from exc
    return parse_ruleset(text, source=str(path), indicators=indicators)


def parse_ruleset(
    text: str, *, source: str = "<string>", indicators: IndicatorCheck | None = None
) -> Ruleset:
    """Parse ruleset YAML ``text``; ``source`` names it in error messages.

    ``indicators``, when given, checks each declared indicator against what the caller can
    compute (the services pass their registry of indicator kinds): it raises
    :class:`~rules.errors.FieldError` with a path relative to the declaration (``("params",
    "window")``), reported at that key's line like every other problem.

    Raises
    ------
    RulesetError
        Listing every problem found, each with file, line, column and key path.
    """
    try:
        root = yaml.compose(text, Loader=yaml.SafeLoader)
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        line, col = (mark.line + 1, mark.column + 1) if mark is not None else (0, 0)
        raise RulesetError(source, line, col, "", f"invalid YAML: {exc.problem}") from None
    except (yaml.YAMLError, ValueError) as exc:
        raise RulesetError(source, 0, 0, "", f"invalid YAML: {exc}") from None
    if root is None:
        raise RulesetError(source, 1, 1, "", "the file is empty")
    reader = NodeReader(source)
    result = _read_root(reader, root, text, source, indicators)
    if reader.errors or result is None:
        first, *rest = reader.errors or [RulesetError(source, 1, 1, "", "invalid ruleset")]
        raise RulesetError(first.file, first.line, first.column, first.path, first.message, rest)
    return result


def _read_root(
    r: NodeReader, root: yaml.Node, text: str, source: str, check: IndicatorCheck | None
) -> Ruleset | None:
    top = r.mapping(root, (), required=_TOP_REQUIRED, optional=_TOP_OPTIONAL)
    if top is None:
        return None
    name = r.text(top["name"], ("name",)) if "name" in top else None
    version = r.text(top["version"], ("version",)) if "version" in top else None
    desc = r.text(top["description"], ("description",)) if "description" in top else ""
    level = r.choice(top["level"], ("level",), POLICY_LEVELS) if "level" in top else "districts"
    desc_translations: tuple[tuple[str, str], ...] | None = ()
    if "translations" in top:  # {de: {description: ...}}: the policy's own words per language
        tm = r.mapping(top["translations"], ("translations",), free_keys=True) or {}
        items = []
        for lang, node in tm.items():
            t = r.mapping(node, ("translations", lang), optional=("description",)) or {}
            if "description" in t:
                items.append((lang, r.text(t["description"], ("translations", lang,
                                                              "description")) or ""))
        desc_translations = tuple(items)
    tiers = _read_tiers(r, top["tiers"]) if "tiers" in top else None
    default_age = None
    if "freshness" in top:
        fresh = r.mapping(top["freshness"], ("freshness",), optional=("max_age_days",))
        if fresh and "max_age_days" in fresh:
            default_age = _num(r, fresh["max_age_days"], ("freshness", "max_age_days"))
    indicators = (
        _read_indicators(r, top["indicators"], default_age, check)
        if "indicators" in top else None
    )
    criteria = _read_list(r, top, "criteria", _read_criterion)
    directions: dict[str, str] | None = (
        {c.id: c.direction for c in criteria} if criteria is not None else None
    )
    gates = _read_list(r, top, "gates", _read_gate)
    conditions = _read_list(
        r, top, "conditions", lambda r_, n, p: _read_condition(r_, n, p, directions)
    )
    overrides = _read_list(
        r, top, "overrides", lambda r_, n, p: _read_override(r_, n, p, directions)
    )
    prepare = _read_list(r, top, "prepare", _read_signal)
    scenarios = _read_list(r, top, "scenarios", _read_scenario)
    combination = (
        _read_combination(r, top["combination"]) if "combination" in top else Combination()
    )
    timing = _read_timing(r, top["timing"]) if "timing" in top else Timing()
    hold = _read_testing_hold(r, top["testing_hold"]) if "testing_hold" in top else False
    parts = (
        name,
        version,
        desc,
        tiers,
        indicators,
        criteria,
        gates,
        conditions,
        overrides,
        prepare,
        scenarios,
        combination,
        timing,
        level,
        hold,
    )
    if r.errors or any(p is None for p in parts):
        return None
    return r.build(
        root,
        (),
        Ruleset,
        name=name,
        version=version,
        description=desc,
        description_translations=desc_translations,
        tiers=tiers,
        indicators=indicators,
        criteria=criteria,
        gates=gates,
        combination=combination,
        conditions=conditions,
        timing=timing,
        overrides=overrides,
        prepare=prepare,
        scenarios=scenarios,
        level=level,
        testing_hold=hold or None,
        text=text,
        source=source,
    )


def _num(r: NodeReader, node: yaml.Node, path: Path) -> float | None:
    value = r.number(node, path)
    return None if value is MISSING else value


def _read_list(
    r: NodeReader, top: dict[str, yaml.Node], key: str, item: Any
) -> tuple[Any, ...] | None:
    if key not in top:
        return ()
    items = r.sequence(top[key], (key,))
    if items is None:
        return None
    out = tuple(item(r, node, (key, i)) for i, node in enumerate(items))
    return None if any(o is None for o in out) else out


def _read_tiers(r: NodeReader, node: yaml.Node) -> tuple[Tier, ...] | None:
    items = r.sequence(node, ("tiers",))
    if items is None:
        return None
    tiers: list[Tier | None] = []
    for i, item in enumerate(items):
        path: Path = ("tiers", i)
        m = r.mapping(item, path, required=("name", "staff", "public"),
                      optional=("level", "translations", "measures", "advice"))
        if m is None or not all(k in m for k in ("name", "staff", "public")):
            tiers.append(None)
            continue
        level = r.integer(m["level"], path + ("level",)) if "level" in m else i
        fields = {k: r.text(m[k], path + (k,)) for k in ("name", "staff", "public")}
        extra = _read_public_texts(r, m, path)
        translations = (
            _read_tier_texts(r, m["translations"], path + ("translations",))
            if "translations" in m else ()
        )
        if (level is None or translations is None or extra is None
                or any(v is None for v in fields.values())):
            tiers.append(None)
            continue
        tiers.append(r.build(item, path, Tier, level=level, translations=translations,
                             **fields, **extra))
    return None if any(t is None for t in tiers) else tuple(t for t in tiers if t is not None)


def _read_public_texts(
    r: NodeReader, m: dict[str, yaml.Node], path: Path
) -> dict[str, Any] | None:
    """A tier's optional ``measures`` (list of texts) and ``advice`` (text); None on error."""
    out: dict[str, Any] = {}
    if "measures" in m:
        out["measures"] = r.text_list(m["measures"], path + ("measures",))
    if "advice" in m:
        out["advice"] = r.text(m["advice"], path + ("advice",))
    return None if any(v is None for v in out.values()) else out


def _read_tier_texts(
    r: NodeReader, node: yaml.Node, path: Path
) -> tuple[tuple[str, TierText], ...] | None:
    """``translations: {de: {name, public, measures: [...], advice, staff}, ...}``."""
    m = r.mapping(node, path, free_keys=True)
    if m is None:
        return None
    out: list[tuple[str, TierText] | None] = []
    for lang, item in m.items():
        t = r.mapping(item, path + (lang,), required=("name",),
                      optional=("public", "measures", "advice", "staff"))
        if t is None or "name" not in t:
            out.append(None)
            continue
        name = r.text(t["name"], path + (lang, "name"))
        public = r.text(t["public"], path + (lang, "public")) if "public" in t else ""
        if "staff" in t:
            extra_staff = r.text(t["staff"], path + (lang, "staff"))
            if extra_staff is None:
                out.append(None)
                continue
        else:
            extra_staff = ""
        extra = _read_public_texts(r, t, path + (lang,))
        if name is None or public is None or extra is None:
            out.append(None)
            continue
        text = r.build(item, path + (lang,), TierText, name=name, public=public,
                       staff=extra_staff, **extra)
        out.append(None if text is None else (lang, text))
    return None if any(o is None for o in out) else tuple(o for o in out if o is not None)


def _checked(*, check: IndicatorCheck, spec: IndicatorSpec) -> bool:
    check(spec)
    return True


def _read_indicators(
    r: NodeReader, node: yaml.Node, default_age: float | None, check: IndicatorCheck | None
) -> tuple[IndicatorSpec, ...] | None:
    m = r.mapping(node, ("indicators",), free_keys=True)
    if m is None:
        return None
    out: list[IndicatorSpec | None] = []
    for name, item in m.items():
        path: Path = ("indicators", name)
        spec = r.mapping(
            item,
            path,
            required=("label",),
            optional=("kind", "measure", "unit", "decimals", "max_age_days", "params",
                      "translations"),
        )
        if spec is None or "label" not in spec:
            out.append(None)
            continue
        kwargs: dict[str, Any] = {"name": name, "label": r.text(spec["label"], path + ("label",))}
        for key in ("kind", "measure", "unit"):
            if key in spec:
                kwargs[key] = r.text(spec[key], path + (key,))
        if "decimals" in spec:
            kwargs["decimals"] = r.integer(spec["decimals"], path + ("decimals",), minimum=0)
        if "translations" in spec:  # {de: "7-Tage-Inzidenz", ...}: the label per language
            tm = r.mapping(spec["translations"], path + ("translations",), free_keys=True) or {}
            kwargs["translations"] = tuple(
                (lang, r.text(v, path + ("translations", lang)) or "") for lang, v in tm.items())
        age_node = spec.get("max_age_days")
        kwargs["max_age_days"] = (
            _num(r, age_node, path + ("max_age_days",)) if age_node is not None else default_age
        )
        if "params" in spec:
            pm = r.mapping(spec["params"], path + ("params",), free_keys=True)
            kwargs["params"] = (
                {k: r.scalar_value(v, path + ("params", k)) for k, v in pm.items()} if pm else None
            )
            if kwargs["params"] is not None and any(v is None for v in kwargs["params"].values()):
                kwargs["params"] = None
        if any(v is None for k, v in kwargs.items() if k != "max_age_days") or (
            age_node is not None and kwargs["max_age_days"] is None
        ):
            out.append(None)
            continue
        built = r.build(item, path, IndicatorSpec, **kwargs)
        if built is not None and check is not None and r.build(
            item, path, _checked, check=check, spec=built
        ) is None:
            built = None
        out.append(built)
    return None if any(o is None for o in out) else tuple(o for o in out if o is not None)


def _flags(r: NodeReader, node: yaml.Node, path: Path, n: int) -> tuple[bool, ...] | None:
    if isinstance(node, yaml.SequenceNode):
        vals = [r.boolean(x, path + (i,)) for i, x in enumerate(node.value)]
        return None if any(v is None for v in vals) else tuple(bool(v) for v in vals)
    flag = r.boolean(node, path)
    return None if flag is None else (flag,) * n


def _read_thresholds(
    r: NodeReader, m: dict[str, yaml.Node], node: yaml.Node, path: Path, direction: str
) -> Thresholds | None:
    items = r.sequence(m["enter"], path + ("enter",))
    if items is None:
        return None
    enter = tuple(r.number(x, path + ("enter", i), nullable=True) for i, x in enumerate(items))
    exit_: tuple[Any, ...] = enter
    if "exit" in m:
        xs = r.sequence(m["exit"], path + ("exit",))
        if xs is None:
            return None
        exit_ = tuple(r.number(x, path + ("exit", i), nullable=True) for i, x in enumerate(xs))
    n = len(enter)
    strict = (False,) * n
    if "strict" in m:
        strict = _flags(r, m["strict"], path + ("strict",), n) or strict
    e_strict = (
        _flags(r, m["enter_strict"], path + ("enter_strict",), n) if "enter_strict" in m else strict
    )
    x_strict = (
        _flags(r, m["exit_strict"], path + ("exit_strict",), n) if "exit_strict" in m else e_strict
    )
    if MISSING in enter or MISSING in exit_ or e_strict is None or x_strict is None:
        return None
    return r.build(
        node,
        path,
        Thresholds,
        direction=direction,
        enter=enter,
        exit=exit_,
        enter_strict=e_strict,
        exit_strict=x_strict,
    )


def _read_criterion(r: NodeReader, node: yaml.Node, path: Path) -> Criterion | None:
    m = r.mapping(
        node,
        path,
        required=("id", "indicator", "enter"),
        optional=("direction", "statistic", "min_count", "use_nowcast", "label") + _THRESHOLD_KEYS,
    )
    if m is None or not all(k in m for k in ("id", "indicator", "enter")):
        return None
    direction = (
        r.choice(m["direction"], path + ("direction",), ("rising", "falling"))
        if ("direction" in m)
        else "rising"
    )
    if direction is None:
        return None
    th = _read_thresholds(r, m, node, path, direction)
    kwargs: dict[str, Any] = {
        "id": r.text(m["id"], path + ("id",)),
        "indicator": r.text(m["indicator"], path + ("indicator",)),
        "thresholds": th,
    }
    if "statistic" in m:
        kwargs["statistic"] = r.choice(
            m["statistic"], path + ("statistic",), ("estimate", "bounds")
        )
    if "min_count" in m:
        kwargs["min_count"] = _num(r, m["min_count"], path + ("min_count",))
    if "use_nowcast" in m:
        kwargs["use_nowcast"] = r.boolean(m["use_nowcast"], path + ("use_nowcast",))
    if "label" in m:
        kwargs["label"] = r.text(m["label"], path + ("label",))
    if any(v is None for v in kwargs.values()):
        return None
    return r.build(node, path, Criterion, **kwargs)


def _read_comparison(
    r: NodeReader, m: dict[str, yaml.Node], node: yaml.Node, path: Path
) -> tuple[str, float] | None:
    ops = [k for k in COMPARISONS if k in m]
    if len(ops) != 1:
        r.error(node, path, f"needs exactly one of {', '.join(COMPARISONS)}, got {len(ops)}")
        return None
    value = _num(r, m[ops[0]], path + (ops[0],))
    return None if value is None else (ops[0], value)


def _read_gate(r: NodeReader, node: yaml.Node, path: Path) -> Gate | None:
    m = r.mapping(
        node, path, required=("id",), optional=("indicator", "known", "message") + COMPARISONS
    )
    if m is None or "id" not in m:
        return None
    kwargs: dict[str, Any] = {"id": r.text(m["id"], path + ("id",))}
    if "indicator" in m:
        kwargs["indicator"] = r.text(m["indicator"], path + ("indicator",))
        comp = _read_comparison(r, m, node, path)
        if comp is None:
            return None
        kwargs["op"], kwargs["value"] = comp
    if "known" in m:
        kwargs["known"] = r.text_list(m["known"], path + ("known",))
    if "message" in m:
        kwargs["message"] = r.text(m["message"], path + ("message",))
    if any(v is None for k, v in kwargs.items()):
        return None
    return r.build(node, path, Gate, **kwargs)


def _read_patch(
    r: NodeReader,
    node: yaml.Node,
    path: Path,
    cid: str | None,
    directions: dict[str, str] | None,
) -> CriterionPatch | None:
    keys = ("min_count",) + _THRESHOLD_KEYS
    m = r.mapping(
        node,
        path,
        optional=keys + (() if cid else ("criterion",)),
        required=() if cid else ("criterion",),
    )
    if m is None:
        return None
    if cid is None:
        cid = r.text(m["criterion"], path + ("criterion",)) if "criterion" in m else None
        if cid is None:
            return None
    if directions is None:  # the criteria had errors of their own; do not pile up more
        return None
    if cid not in directions:
        r.error(node, path, f"{cid!r} is not a criterion")
        return None
    kwargs: dict[str, Any] = {"criterion": cid}
    if "enter" in m:
        kwargs["thresholds"] = _read_thresholds(r, m, node, path, directions[cid])
    elif any(k in m for k in _THRESHOLD_KEYS):
        r.error(node, path, "thresholds need 'enter'")
        return None
    if "min_count" in m:
        kwargs["min_count"] = _num(r, m["min_count"], path + ("min_count",))
    if any(v is None for v in kwargs.values()):
        return None
    return r.build(node, path, CriterionPatch, **kwargs)


def _read_condition(
    r: NodeReader, node: yaml.Node, path: Path, directions: dict[str, str] | None
) -> Condition | None:
    m = r.mapping(node, path, required=("when", "then"))
    if m is None or len(m) < 2:
        return None
    w = r.mapping(m["when"], path + ("when",), required=("criterion", "level_at_least"))
    if w is None or len(w) < 2:
        return None
    source = r.text(w["criterion"], path + ("when", "criterion"))
    level = r.integer(w["level_at_least"], path + ("when", "level_at_least"), minimum=1)
    patch = _read_patch(r, m["then"], path + ("then",), None, directions)
    if source is None or level is None or patch is None:
        return None
    return r.build(node, path, Condition, source=source, level_at_least=level, patch=patch)


def _read_override(
    r: NodeReader, node: yaml.Node, path: Path, directions: dict[str, str] | None
) -> Override | None:
    m = r.mapping(node, path, required=("id", "match", "criteria"))
    if m is None or len(m) < 3:
        return None
    match = r.mapping(m["match"], path + ("match",), optional=("levels", "regions"))
    crits = r.mapping(m["criteria"], path + ("criteria",), free_keys=True)
    if match is None or crits is None:
        return None
    levels = r.text_list(match["levels"], path + ("match", "levels")) if "levels" in match else ()
    regions = (
        r.text_list(match["regions"], path + ("match", "regions")) if "regions" in match else ()
    )
    patches = tuple(
        _read_patch(r, v, path + ("criteria", k), k, directions) for k, v in crits.items()
    )
    oid = r.text(m["id"], path + ("id",))
    if oid is None or levels is None or regions is None or any(p is None for p in patches):
        return None
    return r.build(node, path, Override, id=oid, levels=levels, regions=regions, patches=patches)


def _read_signal(r: NodeReader, node: yaml.Node, path: Path) -> PrepareSignal | None:
    m = r.mapping(
        node,
        path,
        required=("id", "indicator"),
        optional=("statistic", "for", "count_by", "clear_after_days", "below_tier", "message",
                  "translations") + COMPARISONS,
    )
    if m is None or "id" not in m or "indicator" not in m:
        return None
    comp = _read_comparison(r, m, node, path)
    kwargs: dict[str, Any] = {
        "id": r.text(m["id"], path + ("id",)),
        "indicator": r.text(m["indicator"], path + ("indicator",)),
    }
    if "statistic" in m:
        kwargs["statistic"] = r.choice(
            m["statistic"], path + ("statistic",), ("estimate", "lower", "upper")
        )
    if "for" in m:
        kwargs["for_count"] = r.integer(m["for"], path + ("for",), minimum=1)
    if "count_by" in m:
        kwargs["count_by"] = r.choice(m["count_by"], path + ("count_by",), ("days", "samples"))
    if "clear_after_days" in m:
        kwargs["clear_after_days"] = r.integer(
            m["clear_after_days"], path + ("clear_after_days",), minimum=1
        )
    if "below_tier" in m:
        kwargs["below_tier"] = r.integer(m["below_tier"], path + ("below_tier",), minimum=1)
    if "message" in m:
        kwargs["message"] = r.text(m["message"], path + ("message",))
    if "translations" in m:  # {de: "...", ...}: the message per language
        kwargs["translations"] = _read_translations(r, m["translations"], path)
    if comp is None or any(v is None for v in kwargs.values()):
        return None
    kwargs["op"], kwargs["value"] = comp
    return r.build(node, path, PrepareSignal, **kwargs)


def _read_translations(r: NodeReader, node: yaml.Node, path: Path) -> tuple[tuple[str, str], ...]:
    """``translations: {de: "...", fr-CH: "..."}`` of one text (an empty text is kept for the
    model's check, which names the language)."""
    tm = r.mapping(node, path + ("translations",), free_keys=True) or {}
    return tuple((lang, r.text(v, path + ("translations", lang)) or "") for lang, v in tm.items())


def _read_scenario(r: NodeReader, node: yaml.Node, path: Path) -> Scenario | None:
    m = r.mapping(node, path, required=("name", "label"),
                  optional=("growth", "change", "within_days", "translations"))
    if m is None or "name" not in m or "label" not in m:
        return None
    kwargs: dict[str, Any] = {"name": r.text(m["name"], path + ("name",)),
                              "label": r.text(m["label"], path + ("label",))}
    if "translations" in m:  # {de: "bei gleichem Trend", ...}: the label per language
        kwargs["translations"] = _read_translations(r, m["translations"], path)
    if ("growth" in m) == ("change" in m):
        r.error(node, path, "a scenario needs exactly one of 'growth' (current, or a daily rate "
                "reached within_days) and 'change' (a factor reached within_days)")
        return None
    growth = m.get("growth")
    if isinstance(growth, yaml.ScalarNode) and growth.value == "current":
        kwargs["kind"] = "trend"
        if "within_days" in m:
            r.error(m["within_days"], path + ("within_days",),
                    "'growth: current' continues the trend; within_days does not apply")
            return None
    else:
        key = "growth" if "growth" in m else "change"
        kwargs["kind"] = "growth_to" if key == "growth" else "change"
        kwargs["value"] = _num(r, m[key], path + (key,))
        if "within_days" not in m:
            r.error(node, path, f"'{key}' needs 'within_days' (days until it is reached)")
            return None
        kwargs["within_days"] = r.integer(m["within_days"], path + ("within_days",), minimum=1)
    if any(v is None for v in kwargs.values()):
        return None
    return r.build(node, path, Scenario, **kwargs)


def _read_combination(r: NodeReader, node: yaml.Node) -> Combination | None:
    path: Path = ("combination",)
    m = r.mapping(node, path, required=("method",), optional=("m", "weights", "cutoffs"))
    if m is None or "method" not in m:
        return None
    kwargs: dict[str, Any] = {
        "method": r.choice(m["method"], path + ("method",), ("highest", "at_least", "score"))
    }
    if "m" in m:
        kwargs["m"] = r.integer(m["m"], path + ("m",), minimum=1)
    if "weights" in m:
        wm = r.mapping(m["weights"], path + ("weights",), free_keys=True)
        kwargs["weights"] = (
            {k: _num(r, v, path + ("weights", k)) for k, v in wm.items()}
            if wm is not None
            else None
        )
        if kwargs["weights"] is not None and None in kwargs["weights"].values():
            kwargs["weights"] = None
    if "cutoffs" in m:
        cs = r.sequence(m["cutoffs"], path + ("cutoffs",))
        vals = [_num(r, c, path + ("cutoffs", i)) for i, c in enumerate(cs or [])]
        kwargs["cutoffs"] = None if cs is None or None in vals else tuple(vals)
    if any(v is None for v in kwargs.values()):
        return None
    return r.build(node, path, Combination, **kwargs)


def _read_timing(r: NodeReader, node: yaml.Node) -> Timing | None:
    path: Path = ("timing",)
    keys = (
        "confirm_days",
        "release_days",
        "min_days_in_tier",
        "max_steps_down",
        "effective_delay_days",
    )
    m = r.mapping(node, path, optional=keys)
    if m is None:
        return None
    kwargs = {k: r.integer(v, path + (k,), minimum=0) for k, v in m.items()}
    if any(v is None for v in kwargs.values()):
        return None
    return r.build(node, path, Timing, **kwargs)


def _read_testing_hold(r: NodeReader, node: yaml.Node) -> TestingHold | None:
    path: Path = ("testing_hold",)
    m = r.mapping(node, path, required=("indicator", "days", "criteria"), optional=("unless",))
    if m is None or not {"indicator", "days", "criteria"} <= set(m):
        return None
    kwargs: dict[str, Any] = {
        "indicator": r.text(m["indicator"], path + ("indicator",)),
        "days": r.integer(m["days"], path + ("days",), minimum=1),
        "criteria": r.text_list(m["criteria"], path + ("criteria",)),
        "unless": r.text_list(m["unless"], path + ("unless",)) if "unless" in m else (),
    }
    if any(v is None for v in kwargs.values()):
        return None
    return r.build(node, path, TestingHold, **kwargs)
