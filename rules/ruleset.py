"""The :class:`Ruleset`: a complete, self-validating tier policy and its identity.

A ruleset's identity is its name, version, the YAML text it was read from and the SHA-256 of that
text (hex digest of the UTF-8 bytes), so a stored assessment can name exactly the rules it used.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field

from rules.errors import FieldError
from rules.model import (
    MAX_HORIZON,
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
    Timing,
)

__all__ = ["INSUFFICIENT_DATA", "Ruleset"]

#: Tier code of a district whose gate failed ("insufficient data").
INSUFFICIENT_DATA = -1


@dataclass(frozen=True, kw_only=True)
class Ruleset:
    """A tier policy: tiers, indicators, criteria, gates, combination, timing, overrides, signals.

    Cross-references are checked on construction: every criterion, gate and signal names a
    declared indicator; threshold lists have one entry per tier above 0; conditions, weights and
    overrides name declared criteria. A criterion changed by a condition may not itself condition
    another criterion (so one pass in declaration order evaluates them).
    """

    name: str
    version: str
    tiers: tuple[Tier, ...]
    indicators: tuple[IndicatorSpec, ...]
    criteria: tuple[Criterion, ...]
    description: str = ""
    #: the description in other languages: (language code, text) pairs, for the staff pages
    description_translations: tuple[tuple[str, str], ...] = ()
    gates: tuple[Gate, ...] = ()
    combination: Combination = field(default_factory=Combination)
    conditions: tuple[Condition, ...] = ()
    timing: Timing = field(default_factory=Timing)
    overrides: tuple[Override, ...] = ()
    prepare: tuple[PrepareSignal, ...] = ()
    scenarios: tuple[Scenario, ...] = ()
    #: The regions it assigns tiers to (:data:`~rules.model.POLICY_LEVELS`): their indicators
    #: are computed from counts summed over each region's districts.
    level: str = "districts"
    testing_hold: TestingHold | None = None
    text: str = ""
    source: str = "<string>"
    sha256: str = field(init=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "sha256", hashlib.sha256(self.text.encode("utf-8")).hexdigest())
        if not self.name.strip():
            raise FieldError(("name",), "a ruleset needs a non-empty name")
        if self.level not in POLICY_LEVELS:
            raise FieldError(("level",), f"expected one of {', '.join(POLICY_LEVELS)}, "
                                         f"got {self.level!r}")
        if len(self.tiers) < 2:
            raise FieldError(("tiers",), f"needs at least 2 tiers, got {len(self.tiers)}")
        for i, tier in enumerate(self.tiers):
            if tier.level != i:
                raise FieldError(("tiers", i, "level"), f"expected level {i}, got {tier.level}")
        names = [ind.name for ind in self.indicators]
        _unique(names, "indicators")
        ids = [c.id for c in self.criteria]
        if not ids:
            raise FieldError(("criteria",), "needs at least one criterion")
        _unique_seq(ids, "criteria")
        n = self.n_tiers - 1
        for i, crit in enumerate(self.criteria):
            if crit.indicator not in names:
                raise FieldError(
                    ("criteria", i, "indicator"), f"{crit.indicator!r} is not a declared indicator"
                )
            _check_length(crit.thresholds, n, ("criteria", i))
        for i, gate in enumerate(self.gates):
            if gate.indicator is not None and gate.indicator not in names:
                raise FieldError(
                    ("gates", i, "indicator"), f"{gate.indicator!r} is not a declared indicator"
                )
            for j, cid in enumerate(gate.known):
                if cid not in ids:
                    raise FieldError(("gates", i, "known", j), f"{cid!r} is not a criterion")
        self._check_combination(ids, n)
        targets = {c.patch.criterion for c in self.conditions}
        for i, cond in enumerate(self.conditions):
            if cond.source not in ids:
                raise FieldError(
                    ("conditions", i, "when", "criterion"), f"{cond.source!r} is not a criterion"
                )
            if cond.source in targets:
                raise FieldError(
                    ("conditions", i, "when", "criterion"),
                    f"{cond.source!r} is itself changed by a condition (chains are not allowed)",
                )
            if cond.level_at_least > n:
                raise FieldError(
                    ("conditions", i, "when", "level_at_least"),
                    f"{cond.level_at_least} is above the top tier {n}",
                )
            self._check_patch(cond.patch, ids, ("conditions", i, "then"))
        for i, ov in enumerate(self.overrides):
            for j, patch in enumerate(ov.patches):
                self._check_patch(patch, ids, ("overrides", i, "criteria", patch.criterion))
                del j
        for i, sig in enumerate(self.prepare):
            if sig.indicator not in names:
                raise FieldError(
                    ("prepare", i, "indicator"), f"{sig.indicator!r} is not a declared indicator"
                )
            if sig.below_tier is not None and sig.below_tier > n:
                raise FieldError(
                    ("prepare", i, "below_tier"), f"{sig.below_tier} is above the top tier {n}"
                )
        _unique_seq([s.id for s in self.prepare], "prepare")
        self._check_scenarios()
        self._check_testing_hold(names, ids)
        _unique_seq([g.id for g in self.gates], "gates")

    def _check_scenarios(self) -> None:
        names = [s.name for s in self.scenarios]
        for i, name in enumerate(names):
            if name in names[:i]:
                raise FieldError(("scenarios", i, "name"), f"scenario {name!r} is declared twice")
        for ind in self.indicators:
            wanted = ind.params.get("scenario")
            if wanted is not None and wanted not in names:
                known = ", ".join(names) or "none declared"
                raise FieldError(("indicators", ind.name, "params", "scenario"),
                                 f"{wanted!r} is not a declared scenario ({known})")
            horizon = ind.params.get("horizon")
            if isinstance(horizon, int) and horizon > MAX_HORIZON:
                raise FieldError(("indicators", ind.name, "params", "horizon"),
                                 f"{horizon} days is beyond the longest horizon of {MAX_HORIZON}")

    def _check_testing_hold(self, names: list[str], ids: list[str]) -> None:
        hold = self.testing_hold
        if hold is None:
            return
        if hold.indicator not in names:
            raise FieldError(("testing_hold", "indicator"),
                             f"{hold.indicator!r} is not a declared indicator")
        for key in ("criteria", "unless"):
            for i, cid in enumerate(getattr(hold, key)):
                if cid not in ids:
                    raise FieldError(("testing_hold", key, i), f"{cid!r} is not a criterion")

    def scenario(self, name: str) -> Scenario:
        """The declared scenario called ``name``."""
        for sc in self.scenarios:
            if sc.name == name:
                return sc
        raise KeyError(name)

    def _check_combination(self, ids: list[str], n: int) -> None:
        comb = self.combination
        if comb.method == "at_least" and comb.m is not None and comb.m > len(ids):
            raise FieldError(("combination", "m"), f"{comb.m} is more than the {len(ids)} criteria")
        if comb.method == "score":
            for key in comb.weights:
                if key not in ids:
                    raise FieldError(("combination", "weights", key), f"{key!r} is not a criterion")
            if len(comb.cutoffs) != n:
                raise FieldError(
                    ("combination", "cutoffs"),
                    f"has {len(comb.cutoffs)} cut-offs, expected {n} (one per tier above 0)",
                )

    def _check_patch(
        self, patch: CriterionPatch, ids: list[str], path: tuple[str | int, ...]
    ) -> None:
        if patch.criterion not in ids:
            raise FieldError(path + ("criterion",), f"{patch.criterion!r} is not a criterion")
        base = self.criterion(patch.criterion)
        if patch.thresholds is not None:
            if patch.thresholds.direction != base.direction:
                raise FieldError(path, f"direction differs from criterion {base.id!r}")
            _check_length(patch.thresholds, self.n_tiers - 1, path)

    # -- lookups --------------------------------------------------------------------------------
    @property
    def n_tiers(self) -> int:
        """Number of tiers, including tier 0."""
        return len(self.tiers)

    @property
    def top_tier(self) -> int:
        return len(self.tiers) - 1

    def indicator(self, name: str) -> IndicatorSpec:
        """The declared indicator called ``name``."""
        for ind in self.indicators:
            if ind.name == name:
                return ind
        raise KeyError(name)

    def criterion(self, cid: str) -> Criterion:
        """The criterion with id ``cid``."""
        for crit in self.criteria:
            if crit.id == cid:
                return crit
        raise KeyError(cid)

    def description_in(self, lang: str | None) -> str:
        """The description in ``lang`` (the policy's own without a translation)."""
        return next((t for code, t in self.description_translations if code == lang),
                    self.description)

    def tier_name(self, level: int) -> str:
        """Name of tier ``level``; ``"insufficient data"`` for :data:`INSUFFICIENT_DATA`."""
        if level == INSUFFICIENT_DATA:
            return "insufficient data"
        return self.tiers[level].name

    def used_indicators(self) -> tuple[str, ...]:
        """Indicators that criteria, gates or signals read, in declaration order."""
        used = {c.indicator for c in self.criteria}
        used |= {g.indicator for g in self.gates if g.indicator is not None}
        used |= {s.indicator for s in self.prepare}
        if self.testing_hold is not None:
            used.add(self.testing_hold.indicator)
        return tuple(ind.name for ind in self.indicators if ind.name in used)


def _check_length(th: Thresholds, n: int, path: tuple[str | int, ...]) -> None:
    if len(th.enter) != n:
        raise FieldError(
            path + ("enter",),
            f"has {len(th.enter)} thresholds, expected {n} (one per tier above 0)",
        )


def _unique(names: list[str], where: str) -> None:
    seen: set[str] = set()
    for name in names:
        if name in seen:
            raise FieldError((where, name), f"{name!r} is declared twice")
        seen.add(name)


def _unique_seq(names: list[str], where: str) -> None:
    seen: set[str] = set()
    for i, name in enumerate(names):
        if name in seen:
            raise FieldError((where, i, "id"), f"id {name!r} is used twice")
        seen.add(name)
