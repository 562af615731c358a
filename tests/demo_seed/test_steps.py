"""The clean step scenario: its truth is consistent with the simulator it drives."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose

from demo_seed.epidemic import generation_interval_pmf
from demo_seed.errors import ScenarioArgumentError
from demo_seed.steps import R_RANGE, growth_from_reproduction, simulate_steps


@pytest.fixture(scope="module")
def steps():  # type: ignore[no-untyped-def]
    return simulate_steps(4, regions=6, days=180)


def test_simulate_steps_ratios_match_reproduction(steps) -> None:  # type: ignore[no-untyped-def]
    for i in range(6):
        for day, ratio in zip(steps.change_day[i], steps.change_ratio[i], strict=True):
            if day < 0:
                continue
            before, after = steps.reproduction[i, day - 1], steps.reproduction[i, day]
            assert after / before == pytest.approx(ratio)
            # 10-70 %, or smaller where R stopped at the bound of its range
            assert 1.0 < max(ratio, 1 / ratio) <= 1.7 + 1e-9
            assert (1.1 - 1e-9 <= max(ratio, 1 / ratio)
                    or after == pytest.approx(R_RANGE[0]) or after == pytest.approx(R_RANGE[1]))
    assert np.all((steps.reproduction >= R_RANGE[0] - 1e-12)
                  & (steps.reproduction <= R_RANGE[1] + 1e-12))


def test_simulate_steps_keeps_susceptible_depletion_small() -> None:
    # a clean scenario: growth changes only at the steps, not by running out of susceptibles
    sc = simulate_steps(0, regions=20, days=240)
    assert np.max(sc.infections.sum(axis=1) / sc.population) < 0.05


def test_simulate_steps_testing_change_moves_tests_and_positivity(steps) -> None:  # type: ignore[no-untyped-def]
    changed = np.flatnonzero(steps.testing_day >= 0)
    assert changed.size > 0
    for i in changed:
        d = int(steps.testing_day[i])
        before, after = slice(d - 14, d), slice(d, d + 14)
        assert steps.tests[i, after].sum() > 2 * steps.tests[i, before].sum()
        assert (steps.positives[i, after].sum() / steps.tests[i, after].sum()
                < steps.positives[i, before].sum() / steps.tests[i, before].sum())
    assert np.all(steps.positives <= steps.tests)


def test_growth_from_reproduction_solves_euler_lotka() -> None:
    w = generation_interval_pmf(3.0, 4.0)
    big_r = np.array([0.7, 1.0, 1.3])
    r = growth_from_reproduction(big_r, w)
    lags = np.arange(1, w.size + 1)
    # Wallinga & Lipsitch (2007) eq. 2.7: R = 1 / sum_s w_s e^{-r s}
    assert_allclose(1.0 / (w[None, :] * np.exp(-r[:, None] * lags)).sum(axis=1), big_r,
                    rtol=1e-10)
    assert r[1] == pytest.approx(0.0, abs=1e-12)


def test_simulate_steps_refuses_a_negative_seed() -> None:
    with pytest.raises(ScenarioArgumentError, match="seed"):
        simulate_steps(-1)


def test_simulate_steps_admissions_and_wastewater_follow_infections(steps) -> None:  # type: ignore[no-untyped-def]
    # admissions: a share HOSPITALISED_SHARE of infections (demo_seed/observation.py), so over
    # the series their sum is that share of the infections ~10 days earlier (Poisson noise)
    from demo_seed.observation import HOSPITALISED_SHARE

    lag = int(round(steps.admission_shift))
    expected = HOSPITALISED_SHARE * steps.infections[:, : -lag].sum(axis=1)
    observed = steps.admissions[:, lag:].sum(axis=1)
    np.testing.assert_allclose(observed, expected, rtol=0.1)
    # wastewater: two or three samples a week; the log concentration over the marker moves
    # with log infections (correlation of weekly means)
    seen = np.isfinite(steps.wastewater).mean(axis=1)
    assert np.all((seen > 2 / 7 * 0.8) & (seen < 3 / 7 * 1.05))
    shift = int(round(steps.shedding_shift))
    for i in range(steps.infections.shape[0]):
        w = np.log(steps.wastewater[i, shift:])
        x = np.log(steps.infections[i, :-shift])
        ok = np.isfinite(w)
        assert np.corrcoef(w[ok], x[ok])[0, 1] > 0.5
