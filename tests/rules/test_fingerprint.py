"""Equal fingerprints mean equal assessments (:mod:`rules.fingerprint`).

The property (hypothesis over random small engine states): two evaluations of the same policy,
the second on inputs revised in a few region-days (late revisions, a changed nowcast window) and
possibly starting a day or two later, give, at every region and date where their fingerprints
are equal, the same row: tier, previous tier, criteria levels and known flags, prepare signals
and the whole explanation (data and sentence). The policy is the demo's ``county.yaml`` (bounds,
minimum counts, nowcasts, a condition, a gate, an override by level, prepare signals with a
``{reading}``, the testing hold) with short timings so that tiers move within a few weeks. The
property is the project's own requirement (as-of reproducibility); no outside source.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import rules
from rules import Evaluation, IndicatorSeries, evaluate, parse_ruleset
from rules import fingerprint as fp_module
from rules.fingerprint import fingerprints

COUNTY = (Path(rules.__file__).with_name("policies") / "county.yaml").read_text(encoding="utf-8")
REGIONS = ("R1", "R2", "R3", "R4")
LEVELS = ("district", "small_district", "district", "small_district")
DAYS = 40
FIRST = np.datetime64("2031-01-01")


def _policy(delay: int) -> rules.Ruleset:
    timing = ("timing:\n  confirm_days: 2\n  release_days: 3\n  min_days_in_tier: 3\n"
              f"  max_steps_down: 1\n  effective_delay_days: {delay}\n")
    text = re.sub(r"timing:.*?\n(?=testing_hold:)", timing, COUNTY, flags=re.S)
    assert f"effective_delay_days: {delay}" in text
    return parse_ruleset(text)


def _pick(rng: np.random.Generator, grid: list[float], shape: tuple[int, ...]) -> np.ndarray:
    return rng.choice(np.array(grid, dtype=float), size=shape)


def _inputs(rng: np.random.Generator) -> dict[str, dict[str, Any]]:
    """Invented indicator values on grids straddling the policy's thresholds."""
    shape = (len(REGIONS), DAYS)

    def bounds(est: np.ndarray) -> dict[str, Any]:
        return {"estimate": est, "lower": est * 0.85, "upper": est * 1.15}

    inc = _pick(rng, [20, 60, 80, 120, 160, 240, 320], shape)
    adm = _pick(rng, [3, 5, 7, 11, 15, 22], shape)
    missing = rng.random(shape) < 0.05
    inc[missing] = np.nan
    change = np.arange(DAYS, dtype=float)[None, :] - rng.integers(0, DAYS, (len(REGIONS), 1))
    since = np.where(change >= 1, change, np.nan)
    size = np.where(np.isnan(since), np.nan, 1.6)
    ww = _pick(rng, [-1.0, 0.5, 2.0], shape)
    rt = _pick(rng, [0.8, 1.1, 1.3], shape)
    return {
        "incidence_7d": {**bounds(inc), "count": _pick(rng, [5, 15, 30], shape),
                         "nowcast": rng.random(shape) < 0.15,
                         "nowcast_days": _pick(rng, [1, 2, 3], shape),
                         "nowcast_basis": tuple(f"reporting delays pooled over A{k % 2}"
                                                for k in range(len(REGIONS)))},
        "positivity_7d": {"estimate": _pick(rng, [2, 5, 8, 12, 16], shape),
                          "age_days": _pick(rng, [0, 1, 2, 5], shape)},
        "admissions_7d": {**bounds(adm), "count": _pick(rng, [3, 6, 10], shape),
                          "nowcast": rng.random(shape) < 0.1},
        "icu_share": {"estimate": _pick(rng, [10, 25, 33, 40, 50], shape)},
        "tests_7d": {"estimate": _pick(rng, [100, 200, 300, 400], shape)},
        "ww_trend": {"estimate": ww, "lower": ww - 1.0},
        "rt": {"estimate": rt, "lower": rt - 0.15, "upper": rt + 0.15},
        "icu_days_to_share": {"estimate": _pick(rng, [5, 10, 22], shape)},
        "gp_aberration": {"estimate": _pick(rng, [0, 1], shape)},
        "testing_change": {"estimate": since, "size": size, "lower": size * 0.9,
                           "upper": size * 1.1},
    }


def _revise(rng: np.random.Generator, base: dict[str, dict[str, Any]], cells: int
            ) -> dict[str, dict[str, Any]]:
    """A copy with ``cells`` region-days of some indicator redrawn (regions after the first),
    and the last days' nowcast flags of one region changed."""
    out = {name: {k: (v.copy() if isinstance(v, np.ndarray) else v) for k, v in fields.items()}
           for name, fields in base.items()}
    names = sorted(out)
    for _ in range(cells):
        name = names[int(rng.integers(len(names)))]
        r, d = int(rng.integers(1, len(REGIONS))), int(rng.integers(DAYS))
        for key in ("estimate", "lower", "upper"):
            if key in out[name]:
                out[name][key][r, d] *= float(rng.choice([0.5, 1.0, 2.0]))
    r = int(rng.integers(1, len(REGIONS)))
    out["incidence_7d"]["nowcast"][r, -3:] = rng.random(3) < 0.5
    return out


def _evaluate(policy: rules.Ruleset, inputs: dict[str, dict[str, Any]], start: int
              ) -> Evaluation:
    series = {
        name: IndicatorSeries(**{k: (v[:, start:] if isinstance(v, np.ndarray) else v)
                                 for k, v in fields.items()})
        for name, fields in inputs.items()
    }
    return evaluate(policy, series, regions=list(REGIONS), region_levels=list(LEVELS),
                    dates=FIRST + np.arange(start, DAYS))


def _row(ev: Evaluation, r: int, d: int) -> tuple[Any, ...]:
    """What an assessment row holds (``server.services.assessments._assessment_rows``)."""
    explained = ev.explain(r, d)
    return (
        int(ev.tier[r, d]), int(ev.tier[r, d - 1]) if d else int(ev.start_in_force[r]),
        ev.levels[:, r, d].tolist(), ev.known[:, r, d].tolist(), ev.prepare[:, r, d].tolist(),
        explained.sentence, explained.data,
    )


def _check(delay: int, seed: int, cells: int, start: int) -> tuple[int, int]:
    """Assert the property for one example; returns (equal fingerprints, region-days)."""
    rng = np.random.default_rng(seed)
    policy = _policy(delay)
    base = _inputs(rng)
    old = _evaluate(policy, base, 0)
    new = _evaluate(policy, _revise(rng, base, cells), start)
    f_old, f_new = fingerprints(old, b"salt"), fingerprints(new, b"salt")
    equal = 0
    for r in range(len(REGIONS)):
        for d in range(DAYS - start):
            if f_new[r, d] == f_old[r, d + start]:
                equal += 1
                assert _row(new, r, d) == _row(old, r, d + start), (REGIONS[r], d)
    if start == 0:  # the first region's inputs are never revised: every fingerprint is equal
        assert np.array_equal(f_new[0], f_old[0])
    return equal, len(REGIONS) * (DAYS - start)


@settings(max_examples=40, deadline=None)
@given(delay=st.integers(0, 2), seed=st.integers(0, 2**32 - 1), cells=st.integers(0, 6),
       start=st.sampled_from([0, 0, 1, 2]))
def test_equal_fingerprints_mean_equal_rows(delay: int, seed: int, cells: int, start: int
                                           ) -> None:
    _check(delay, seed, cells, start)


def test_the_examples_exercise_the_explanations() -> None:
    """Not vacuous: over fixed seeds, many fingerprints are equal and many differ, and the
    evaluations move tiers (raised, lowered, decided, held) so the windowed parts are read."""
    equal = total = 0
    actions: set[str] = set()
    for seed in range(6):
        e, n = _check(1, seed, 4, 0)
        equal, total = equal + e, total + n
        ev = _evaluate(_policy(1), _inputs(np.random.default_rng(seed)), 0)
        actions |= {ev.explain(r, d).data["action"] for r in range(len(REGIONS))
                    for d in range(DAYS)}
    assert 0.2 * total < equal < total
    assert {"raised", "lowered", "decided", "held", "unchanged"} <= actions


def test_a_fingerprint_without_the_window_would_miss_a_change(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """The window matters: the day a move takes effect describes the criteria of the day it was
    decided (``effective_delay_days`` before). A revision of that day by 1 %, too small to move
    a level, changes the value written in the effective day's sentence; the real fingerprint
    sees it, one of the day alone (window 0) would not."""
    policy = _policy(2)
    seen = 0
    for seed in range(8):
        base = _inputs(np.random.default_rng(seed))
        old = _evaluate(policy, base, 0)
        moves = [(r, d) for r in range(len(REGIONS)) for d in range(2, DAYS)
                 if old.explain(r, d).data["action"] in ("raised", "lowered")]
        for r, d in moves[:2]:
            revised = _revise(np.random.default_rng(0), base, 0)
            revised["incidence_7d"]["nowcast"] = base["incidence_7d"]["nowcast"]
            for key in ("estimate", "lower", "upper"):
                revised["incidence_7d"][key][r, d - 2] *= 1.01
            new = _evaluate(policy, revised, 0)
            if not np.array_equal(new.levels, old.levels):
                continue  # the revision moved a level (the state of day d changes)
            if _row(new, r, d) == _row(old, r, d):
                continue  # incidence is not named in this move's sentence
            assert fingerprints(new)[r, d] != fingerprints(old)[r, d]
            with monkeypatch.context() as patch:
                patch.setattr(fp_module, "window_days", lambda ev: 0)
                assert fingerprints(new)[r, d] == fingerprints(old)[r, d]
            seen += 1
    assert seen >= 3


def test_the_salt_and_the_ruleset_change_every_fingerprint() -> None:
    rng = np.random.default_rng(3)
    inputs = _inputs(rng)
    a = fingerprints(_evaluate(_policy(1), inputs, 0), b"one")
    assert not np.any(a == fingerprints(_evaluate(_policy(1), inputs, 0), b"two"))
    assert not np.any(a == fingerprints(_evaluate(_policy(2), inputs, 0), b"one"))
    assert np.array_equal(a, fingerprints(_evaluate(_policy(1), inputs, 0), b"one"))
