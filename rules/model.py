"""Typed building blocks of a ruleset: tiers, indicators, criteria, gates, timing, signals.

Every class is a frozen, keyword-only dataclass that checks its own invariants on construction and
raises :class:`~rules.errors.FieldError` naming the offending field (relative path) and value. The
loader maps that path back to the YAML node to report file, line and column.

Threshold lists are indexed by tier: ``enter[0]`` is the threshold for tier 1, ``enter[k - 1]`` for
tier ``k``. ``None`` at the end marks tiers the criterion cannot reach; ``None`` at the start means
the criterion jumps straight to its first reachable tier.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Literal

from rules.errors import FieldError

__all__ = [
    "COMPARISONS",
    "Combination",
    "Condition",
    "Criterion",
    "CriterionPatch",
    "Gate",
    "IndicatorSpec",
    "Override",
    "PrepareSignal",
    "Scenario",
    "TestingHold",
    "Thresholds",
    "Tier",
    "TierText",
    "Timing",
]

Direction = Literal["rising", "falling"]
Statistic = Literal["estimate", "bounds"]
SignalStatistic = Literal["estimate", "lower", "upper"]
Comparison = Literal["above", "at_least", "below", "at_most"]
COMPARISONS: tuple[str, ...] = ("above", "at_least", "below", "at_most")
ParamValue = int | float | str | bool
_LANGUAGE = re.compile(r"[a-z]{2,3}(-[A-Za-z0-9]{2,8})*")

#: Parameters the services layer is known to read, with their checks.
_KNOWN_PARAMS: dict[str, tuple[type, float]] = {
    "window": (int, 1),
    "serial_interval_mean": (float, 0.0),
    "serial_interval_sd": (float, 0.0),
    "samples": (int, 1),
    "per": (float, 0.0),
    "start_week": (int, 1),  # seasonal_intensity (ranges checked by the services layer)
    "end_week": (int, 1),
    "seasons": (int, 1),
    "min_seasons": (int, 1),
    "horizon": (int, 1),
    "share": (float, 0.0),
}
#: Longest forecast horizon, in days, a projected indicator may ask for.
MAX_HORIZON = 21
#: The levels of the region tree a policy may apply to (``level:``; default ``districts``):
#: the districts, the areas above them, or the county (the top of the tree).
POLICY_LEVELS = ("districts", "areas", "county")


def _finite(path: tuple[str | int, ...], value: float) -> None:
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        raise FieldError(path, f"expected a finite number, got {value!r}")


def _nonneg_int(path: tuple[str | int, ...], value: int, minimum: int = 0) -> None:
    if isinstance(value, bool) or not isinstance(value, int) or value < minimum:
        raise FieldError(path, f"expected an integer >= {minimum}, got {value!r}")


def _identifier(path: tuple[str | int, ...], value: str) -> None:
    if not isinstance(value, str) or not value.replace("_", "a").replace("-", "a").isalnum():
        raise FieldError(path, f"expected a name of letters, digits, '_' or '-', got {value!r}")


def _measure_name(path: tuple[str | int, ...], value: str) -> None:
    """A measure name: an identifier, optionally qualified by dots (``cases.influenza``)."""
    if not isinstance(value, str) or not all(
        part and part.replace("_", "a").replace("-", "a").isalnum() for part in value.split(".")
    ):
        raise FieldError(path, f"expected a measure name (letters, digits, '_', '-', '.'), "
                               f"got {value!r}")


@dataclass(frozen=True, kw_only=True)
class Tier:
    """One ordered level: number, name, staff description and plain-language public text.

    ``measures`` lists, in plain words, what applies to residents at this tier and ``advice`` is
    the office's advice for people at higher risk; both are written by the office and shown on
    the public pages. ``translations`` pairs a language code (``de``, ``fr-CH``) with the tier's
    name and texts in that language, for the public pages; a language or text not listed falls
    back to the tier's own.
    """

    level: int
    name: str
    staff: str
    public: str
    measures: tuple[str, ...] = ()
    advice: str = ""
    translations: tuple[tuple[str, TierText], ...] = ()

    def __post_init__(self) -> None:
        _nonneg_int(("level",), self.level)
        if not self.name.strip():
            raise FieldError(("name",), "a tier needs a non-empty name")
        for lang, _text in self.translations:
            if not _LANGUAGE.fullmatch(lang):
                raise FieldError(("translations", lang),
                                 f"{lang!r} is not a language code (such as de or fr-CH)")

    def _text(self, lang: str | None) -> TierText | None:
        return next((t for code, t in self.translations if code == lang), None)

    def name_in(self, lang: str | None) -> str:
        """The tier's name in ``lang`` (its own name when there is no translation)."""
        text = self._text(lang)
        return text.name if text is not None else self.name

    def public_in(self, lang: str | None) -> str:
        """The public text in ``lang`` (the default text when there is no translation)."""
        text = self._text(lang)
        return text.public if text is not None and text.public else self.public

    def measures_in(self, lang: str | None) -> tuple[str, ...]:
        """What applies at this tier, in ``lang`` (the default list without a translation)."""
        text = self._text(lang)
        return text.measures if text is not None and text.measures else self.measures

    def advice_in(self, lang: str | None) -> str:
        """Advice for people at higher risk in ``lang`` (the default without a translation)."""
        text = self._text(lang)
        return text.advice if text is not None and text.advice else self.advice

    def staff_in(self, lang: str | None) -> str:
        """The staff guidance in ``lang`` (the default text without a translation)."""
        text = self._text(lang)
        return text.staff if text is not None and text.staff else self.staff


@dataclass(frozen=True, kw_only=True)
class TierText:
    """A tier's name, public texts and staff guidance in one language."""

    name: str
    public: str = ""
    measures: tuple[str, ...] = ()
    advice: str = ""
    staff: str = ""

    def __post_init__(self) -> None:
        if not self.name.strip():
            raise FieldError(("name",), "a translated tier needs a non-empty name")


@dataclass(frozen=True, kw_only=True)
class IndicatorSpec:
    """An indicator the services layer provides, with display hints and typed parameters.

    ``kind`` names the method from the services' registry of indicator kinds and ``measure`` the
    measure it is applied to (``docs/rules.md``, "Indicators"); both ``None`` for a name the
    services know by itself (``incidence_7d``, ...). The kind, the measure and the parameters are
    checked against the registry by the check the loader is given; here only their form.
    ``max_age_days`` marks data older than that many days as stale (unknown).
    """

    name: str
    label: str
    unit: str = ""
    decimals: int = 1
    max_age_days: float | None = None
    params: Mapping[str, ParamValue] = field(default_factory=dict)
    kind: str | None = None
    measure: str | None = None
    #: the label in other languages: (language code, label) pairs, for the pages
    translations: tuple[tuple[str, str], ...] = ()

    def label_in(self, lang: str | None) -> str:
        """The label in ``lang`` (the policy's own label when there is no translation)."""
        return next((t for code, t in self.translations if code == lang), self.label)

    def __post_init__(self) -> None:
        _identifier(("name",), self.name)
        for lang, label in self.translations:
            if not _LANGUAGE.fullmatch(lang):
                raise FieldError(("translations", lang),
                                 f"{lang!r} is not a language code (such as de or fr-CH)")
            if not label.strip():
                raise FieldError(("translations", lang), "a translated label may not be empty")
        if self.kind is not None:
            _identifier(("kind",), self.kind)
        if self.measure is not None:
            _measure_name(("measure",), self.measure)
        if self.measure is not None and self.kind is None:
            raise FieldError(("measure",), f"measure {self.measure!r} given without a kind")
        _nonneg_int(("decimals",), self.decimals)
        if self.max_age_days is not None:
            _finite(("max_age_days",), self.max_age_days)
            if self.max_age_days < 0:
                raise FieldError(("max_age_days",), f"must be >= 0, got {self.max_age_days}")
        for key, value in self.params.items():
            if not isinstance(value, int | float | str | bool):
                raise FieldError(("params", key), f"expected a scalar, got {value!r}")
            if key in _KNOWN_PARAMS:
                kind, minimum = _KNOWN_PARAMS[key]
                ok = not isinstance(value, bool) and (
                    isinstance(value, int) if kind is int else isinstance(value, int | float)
                )
                if not ok or value < minimum or (kind is float and value <= minimum):  # type: ignore[operator]
                    raise FieldError(
                        ("params", key), f"expected a positive {kind.__name__}, got {value!r}"
                    )
        object.__setattr__(self, "params", MappingProxyType(dict(self.params)))

    def format(self, value: float) -> str:
        """Format a value with the indicator's decimals and unit (``8.1%``, ``162 per 100 000``)."""
        text = f"{value:.{self.decimals}f}"
        if not self.unit:
            return text
        return text + self.unit if self.unit.startswith("%") else f"{text} {self.unit}"


@dataclass(frozen=True, kw_only=True)
class Thresholds:
    """Enter and exit thresholds of one criterion for tiers 1..N.

    For ``direction="rising"`` a value *meets* threshold ``t`` when ``value >= t`` (``> t`` when the
    matching ``*_strict`` flag is set); for ``"falling"`` when ``value <= t`` (``< t``). Enter
    thresholds must be monotone in the tier, and each exit threshold must lie on the release side of
    its enter threshold (below it when rising), which makes the band ``exit..enter`` the hysteresis.
    """

    direction: Direction
    enter: tuple[float | None, ...]
    exit: tuple[float | None, ...]
    enter_strict: tuple[bool, ...]
    exit_strict: tuple[bool, ...]

    def __post_init__(self) -> None:
        if self.direction not in ("rising", "falling"):
            raise FieldError(
                ("direction",), f"expected 'rising' or 'falling', got {self.direction!r}"
            )
        n = len(self.enter)
        for name in ("exit", "enter_strict", "exit_strict"):
            if len(getattr(self, name)) != n:
                raise FieldError((name,), f"has {len(getattr(self, name))} entries, enter has {n}")
        if all(t is None for t in self.enter):
            raise FieldError(("enter",), "needs at least one threshold")
        sign = 1.0 if self.direction == "rising" else -1.0
        better = "below" if sign > 0 else "above"
        first = next(k for k, t in enumerate(self.enter) if t is not None)
        last: int | None = None
        for k in range(n):
            ent, ext = self.enter[k], self.exit[k]
            if ent is None:
                if ext is not None:
                    raise FieldError(("exit", k), f"{ext} given for a tier without enter threshold")
                continue
            if k > first and self.enter[k - 1] is None:
                raise FieldError(("enter", k), f"{ent} follows an unreachable (null) tier")
            _finite(("enter", k), ent)
            if ext is None:
                raise FieldError(("exit", k), "missing while the enter threshold is set")
            _finite(("exit", k), ext)
            if sign * (ent - ext) < 0:
                raise FieldError(("enter", k), f"{ent:g} is {better} the exit threshold {ext:g}")
            if last is not None:
                prev_e, prev_x = self.enter[last], self.exit[last]
                assert prev_e is not None and prev_x is not None
                if sign * (ent - prev_e) < 0:
                    raise FieldError(
                        ("enter", k),
                        f"{ent:g} is {better} the tier-{last + 1} enter threshold {prev_e:g}",
                    )
                if sign * (ext - prev_x) < 0:
                    raise FieldError(
                        ("exit", k),
                        f"{ext:g} is {better} the tier-{last + 1} exit threshold {prev_x:g}",
                    )
            last = k

    @property
    def filled(self) -> tuple[tuple[float | None, ...], tuple[float | None, ...]]:
        """(enter, exit) with leading nulls filled by the first threshold.

        A criterion whose first thresholds are null jumps straight to its first reachable tier.
        """
        first = next(k for k, t in enumerate(self.enter) if t is not None)
        enter = (self.enter[first],) * first + self.enter[first:]
        exit_ = (self.exit[first],) * first + self.exit[first:]
        return enter, exit_

    @property
    def max_level(self) -> int:
        """The highest tier this criterion can reach."""
        return max(k + 1 for k, t in enumerate(self.enter) if t is not None)


@dataclass(frozen=True, kw_only=True)
class Criterion:
    """One indicator compared with per-tier thresholds.

    ``statistic="bounds"`` escalates only when the lower bound meets the enter threshold and
    releases only when the upper bound no longer meets the exit threshold (mirrored for falling).
    Where the event count is below ``min_count`` the criterion is inactive (known, level 0). Days
    flagged as nowcasts are unknown unless ``use_nowcast``.
    """

    id: str
    indicator: str
    thresholds: Thresholds
    statistic: Statistic = "estimate"
    min_count: float | None = None
    use_nowcast: bool = True
    label: str | None = None

    def __post_init__(self) -> None:
        _identifier(("id",), self.id)
        _identifier(("indicator",), self.indicator)
        if self.statistic not in ("estimate", "bounds"):
            raise FieldError(
                ("statistic",), f"expected 'estimate' or 'bounds', got {self.statistic!r}"
            )
        if self.min_count is not None:
            _finite(("min_count",), self.min_count)
            if self.min_count < 0:
                raise FieldError(("min_count",), f"must be >= 0, got {self.min_count}")

    @property
    def direction(self) -> Direction:
        return self.thresholds.direction


@dataclass(frozen=True, kw_only=True)
class CriterionPatch:
    """What an override or a condition changes in one criterion (``None`` keeps the base value)."""

    criterion: str
    thresholds: Thresholds | None = None
    min_count: float | None = None

    def __post_init__(self) -> None:
        _identifier(("criterion",), self.criterion)
        if self.min_count is not None:
            _finite(("min_count",), self.min_count)


@dataclass(frozen=True, kw_only=True)
class Condition:
    """Conditional thresholds: while ``source`` is at ``level_at_least`` or above, use ``patch``."""

    source: str
    level_at_least: int
    patch: CriterionPatch

    def __post_init__(self) -> None:
        _identifier(("source",), self.source)
        _nonneg_int(("level_at_least",), self.level_at_least, 1)
        if self.patch.criterion == self.source:
            raise FieldError(("then", "criterion"), f"{self.source!r} cannot condition itself")


@dataclass(frozen=True, kw_only=True)
class Gate:
    """A precondition; when it fails the district's tier is *insufficient data*.

    Either an indicator comparison (the gate passes while ``indicator`` is ``op`` ``value``; a
    missing value fails it) or a list of criteria that must be known.
    """

    id: str
    indicator: str | None = None
    op: Comparison | None = None
    value: float | None = None
    known: tuple[str, ...] = ()
    message: str = ""

    def __post_init__(self) -> None:
        _identifier(("id",), self.id)
        if self.indicator is None and not self.known:
            raise FieldError((), f"gate {self.id!r} needs an indicator comparison or 'known'")
        if self.indicator is not None:
            if self.op not in COMPARISONS or self.value is None:
                raise FieldError((), f"gate {self.id!r} needs one of {', '.join(COMPARISONS)}")
            _finite((self.op,), self.value)


@dataclass(frozen=True, kw_only=True)
class Combination:
    """How criterion levels combine into a candidate tier.

    ``highest``: the maximum level. ``at_least``: the highest k that at least ``m`` criteria reach.
    ``score``: ``sum_c weights[c] * level_c``, compared with ``cutoffs`` (score >= cutoffs[k-1]
    gives tier k).
    """

    method: Literal["highest", "at_least", "score"] = "highest"
    m: int | None = None
    weights: Mapping[str, float] = field(default_factory=dict)
    cutoffs: tuple[float, ...] = ()

    def __post_init__(self) -> None:
        if self.method not in ("highest", "at_least", "score"):
            raise FieldError(
                ("method",), f"expected highest, at_least or score, got {self.method!r}"
            )
        if self.method == "at_least":
            if self.m is None:
                raise FieldError(("m",), "at_least needs m")
            _nonneg_int(("m",), self.m, 1)
        if self.method == "score":
            if not self.weights:
                raise FieldError(("weights",), "score needs weights")
            for key, w in self.weights.items():
                _finite(("weights", key), w)
                if w < 0:
                    raise FieldError(("weights", key), f"must be >= 0, got {w}")
            for k, c in enumerate(self.cutoffs):
                _finite(("cutoffs", k), c)
                if k and c < self.cutoffs[k - 1]:
                    raise FieldError(
                        ("cutoffs", k),
                        f"{c:g} is below the previous cut-off {self.cutoffs[k - 1]:g}",
                    )
        object.__setattr__(self, "weights", MappingProxyType(dict(self.weights)))


@dataclass(frozen=True, kw_only=True)
class Timing:
    """Confirmation, release, minimum stay, steps down and effective delay, all in days.

    A rise is decided on the day the candidate has been higher on ``confirm_days`` consecutive
    days; a fall when it has been lower on ``release_days`` consecutive days and at least
    ``min_days_in_tier`` days have passed since the last change, by at most ``max_steps_down``
    tiers (``None``: no limit). A decision takes effect ``effective_delay_days`` later.
    """

    confirm_days: int = 1
    release_days: int = 1
    min_days_in_tier: int = 0
    max_steps_down: int | None = None
    effective_delay_days: int = 0

    def __post_init__(self) -> None:
        _nonneg_int(("confirm_days",), self.confirm_days, 1)
        _nonneg_int(("release_days",), self.release_days, 1)
        _nonneg_int(("min_days_in_tier",), self.min_days_in_tier)
        _nonneg_int(("effective_delay_days",), self.effective_delay_days)
        if self.max_steps_down is not None:
            _nonneg_int(("max_steps_down",), self.max_steps_down, 1)


@dataclass(frozen=True, kw_only=True)
class Override:
    """Other criterion settings for regions of given levels or given codes (later overrides win)."""

    id: str
    levels: tuple[str, ...] = ()
    regions: tuple[str, ...] = ()
    patches: tuple[CriterionPatch, ...] = ()

    def __post_init__(self) -> None:
        _identifier(("id",), self.id)
        if not self.levels and not self.regions:
            raise FieldError(("match",), f"override {self.id!r} matches neither levels nor regions")

    def matches(self, region: str, level: str | None) -> bool:
        return region in self.regions or (level is not None and level in self.levels)


def _check_translations(translations: tuple[tuple[str, str], ...]) -> None:
    """A text's ``translations``: language codes, no empty text."""
    for lang, text in translations:
        if not _LANGUAGE.fullmatch(lang):
            raise FieldError(("translations", lang),
                             f"{lang!r} is not a language code (such as de or fr-CH)")
        if not text.strip():
            raise FieldError(("translations", lang), "a translated text may not be empty")


@dataclass(frozen=True, kw_only=True)
class PrepareSignal:
    """A condition on a leading indicator that fires with a message and clears after a quiet period.

    The condition ``statistic op value`` must hold on ``for_count`` consecutive days
    (``count_by="days"``, a missing day breaks the run) or consecutive reported samples
    (``count_by="samples"``, missing days are skipped). Once fired, the signal stays on until the
    condition has not held for ``clear_after_days`` days. With ``below_tier`` set it only shows
    while the tier in force is below that tier.
    """

    id: str
    indicator: str
    op: Comparison
    value: float
    statistic: SignalStatistic = "estimate"
    for_count: int = 1
    count_by: Literal["days", "samples"] = "days"
    clear_after_days: int = 7
    below_tier: int | None = None
    message: str = ""
    #: the message in other languages: (language code, message) pairs, for the pages
    translations: tuple[tuple[str, str], ...] = ()

    def message_in(self, lang: str | None) -> str:
        """The message in ``lang`` (the policy's own message when there is no translation)."""
        return next((t for code, t in self.translations if code == lang), self.message)

    def __post_init__(self) -> None:
        _identifier(("id",), self.id)
        _check_translations(self.translations)
        _identifier(("indicator",), self.indicator)
        if self.op not in COMPARISONS:
            raise FieldError((), f"signal {self.id!r} needs one of {', '.join(COMPARISONS)}")
        _finite((self.op,), self.value)
        if self.statistic not in ("estimate", "lower", "upper"):
            raise FieldError(
                ("statistic",), f"expected estimate, lower or upper, got {self.statistic!r}"
            )
        if self.count_by not in ("days", "samples"):
            raise FieldError(("count_by",), f"expected days or samples, got {self.count_by!r}")
        _nonneg_int(("for",), self.for_count, 1)
        _nonneg_int(("clear_after_days",), self.clear_after_days, 1)
        if self.below_tier is not None:
            _nonneg_int(("below_tier",), self.below_tier, 1)


ScenarioKind = Literal["trend", "growth_to", "change"]


@dataclass(frozen=True, kw_only=True)
class Scenario:
    """A named future for hospital forecasts, as a path of the admissions' daily growth rate.

    ``trend`` (YAML ``growth: current``): the current rate continues. ``growth_to`` (``growth:
    v`` with ``within_days: D``): the rate moves linearly from the current one to v per day over
    D days, then stays. ``change`` (``change: v`` with ``within_days: D``): admissions reach v
    times today's level by day D, then hold. ``label`` completes a sentence ("if the trend
    continues").
    """

    name: str
    label: str
    kind: ScenarioKind = "trend"
    value: float = 0.0
    within_days: int = 1
    #: the label in other languages: (language code, label) pairs, for the pages
    translations: tuple[tuple[str, str], ...] = ()

    def label_in(self, lang: str | None) -> str:
        """The label in ``lang`` (the policy's own label when there is no translation)."""
        return next((t for code, t in self.translations if code == lang), self.label)

    def __post_init__(self) -> None:
        _identifier(("name",), self.name)
        _check_translations(self.translations)
        if not self.label.strip():
            raise FieldError(("label",), "a scenario needs a non-empty label")
        if self.kind not in ("trend", "growth_to", "change"):
            raise FieldError(("kind",), f"expected trend, growth_to or change, got {self.kind!r}")
        _nonneg_int(("within_days",), self.within_days, 1)
        if self.within_days > MAX_HORIZON:
            raise FieldError(("within_days",), f"{self.within_days} is beyond the longest "
                             f"horizon of {MAX_HORIZON} days")
        if self.kind == "growth_to":
            _finite(("growth",), self.value)
            if not -0.5 <= self.value <= 0.5:
                raise FieldError(("growth",), f"{self.value} per day is outside -0.5..0.5 "
                                 "(a daily growth rate, not a percentage)")
        if self.kind == "change":
            _finite(("change",), self.value)
            if self.value <= 0:
                raise FieldError(("change",), f"expected a factor above 0, got {self.value}")


@dataclass(frozen=True, kw_only=True)
class TestingHold:
    """Hold case-based escalations for ``days`` days after a detected testing change.

    ``indicator`` gives, per region and day, the days since the first day of the latest testing
    change known that day (a ``testing_change`` indicator; missing: none). While it is below
    ``days``, the ``criteria`` (those that count cases, whose rise may only reflect more
    testing) cannot raise the tier above the one held, unless one of the ``unless`` criteria
    (indicators that do not depend on testing: positivity, admissions, wastewater) is itself
    above the tier held that day. Falls are never held.
    """

    __test__ = False  # not a pytest class despite its name

    indicator: str
    days: int
    criteria: tuple[str, ...]
    unless: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        _identifier(("indicator",), self.indicator)
        _nonneg_int(("days",), self.days, 1)
        if not self.criteria:
            raise FieldError(("criteria",), "names no criterion to hold")
        for key in ("criteria", "unless"):
            for i, cid in enumerate(getattr(self, key)):
                _identifier((key, i), cid)
        for i, cid in enumerate(self.unless):
            if cid in self.criteria:
                raise FieldError(("unless", i), f"{cid!r} is also a held criterion")
