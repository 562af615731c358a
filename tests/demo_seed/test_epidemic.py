"""Tests for the SEIR model (demo_seed.epidemic) against published closed forms."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy.optimize import brentq

from demo_seed.epidemic import generation_interval_pmf, mixing_matrix, simulate_seir
from demo_seed.errors import ScenarioArgumentError

LATENT, INFECTIOUS = 3.0, 4.0


def _single(r0: float, days: int, population: float, rng: np.random.Generator | None = None,
            exposed: float = 10.0):
    beta = np.full((1, days), r0 / INFECTIOUS)
    return simulate_seir(population=np.array([population]), mixing=np.ones((1, 1)), beta=beta,
                         latent_mean=LATENT, infectious_mean=INFECTIOUS,
                         initial_exposed=np.array([exposed]), rng=rng)


@pytest.mark.parametrize("r0", [1.5, 2.0, 3.0], ids=["r1.5", "r2", "r3"])
def test_simulate_seir_final_size_matches_kermack_mckendrick(r0: float) -> None:
    res = _single(r0, days=1500, population=1e7)
    z_model = 1.0 - res.susceptible[0, -1] / 1e7
    # Kermack & McKendrick 1927: final size z solves z = 1 - exp(-R0 z)
    z_ref = brentq(lambda z: z - 1.0 + np.exp(-r0 * z), 1e-6, 1.0)
    assert_allclose(z_model, z_ref, atol=1e-4)


def test_simulate_seir_growth_rate_matches_wallinga_lipsitch() -> None:
    r0 = 1.8
    res = _single(r0, days=130, population=1e9)
    t = np.arange(70, 130)
    r = np.polyfit(t, np.log(res.infections[0, t]), 1)[0]
    w = res.generation_interval
    s = np.arange(1, w.shape[0] + 1)
    # Wallinga & Lipsitch 2007 (Proc R Soc B 274:599), Euler-Lotka: 1/R = sum_s w_s e^{-r s}
    assert_allclose(1.0 / np.sum(w * np.exp(-r * s)), r0, rtol=1e-3)


def test_generation_interval_mean_is_sum_of_sojourn_means() -> None:
    w = generation_interval_pmf(LATENT, INFECTIOUS, max_lag=200)
    s = np.arange(1, 201)
    # geometric sojourns: mean latent 1/p_e plus the infectiousness-weighted mean position
    # within a geometric infectious period, (E[K^2] + E[K]) / (2 E[K]) = 1/p_r
    # (moments of the geometric distribution, textbook)
    assert_allclose(np.sum(s * w), LATENT + INFECTIOUS, rtol=1e-9)


def test_generation_interval_nobody_infectious_next_day() -> None:
    assert generation_interval_pmf(LATENT, INFECTIOUS)[0] == 0.0


def test_simulate_seir_rt_starts_at_r0() -> None:
    res = _single(2.0, days=5, population=1e6, exposed=0.0 + 1.0)
    assert_allclose(res.rt[0, 0], 2.0 * (1e6 - 1.0) / 1e6)


def test_simulate_seir_stochastic_mean_near_deterministic() -> None:
    det = _single(2.0, days=200, population=1e6, exposed=500.0)
    sto = _single(2.0, days=200, population=1e6, exposed=500.0,
                  rng=np.random.default_rng(42))
    # law of large numbers: the chain-binomial final size is close to its mean path
    assert_allclose(sto.infections.sum(), det.infections.sum(), rtol=0.02)


def test_simulate_seir_compartments_conserve_population() -> None:
    res = _single(2.5, days=120, population=5e5, rng=np.random.default_rng(1))
    total = res.susceptible + res.exposed + res.infectious + res.recovered
    assert_allclose(total, 5e5)


def test_mixing_matrix_rows_sum_to_one() -> None:
    adj = np.array([[0, 1, 0], [1, 0, 1], [0, 1, 0]], dtype=bool)
    mix = mixing_matrix(adj, np.array([1e5, 2e5, 3e4]), 0.1)
    assert_allclose(mix.sum(axis=1), 1.0)
    assert_allclose(np.diag(mix), 0.9)


def test_mixing_matrix_isolated_district_keeps_all_contacts() -> None:
    adj = np.zeros((2, 2), dtype=bool)
    assert_allclose(mixing_matrix(adj, np.array([1e4, 1e4]), 0.2), np.eye(2))


def test_mixing_matrix_bad_coupling_raises() -> None:
    adj = np.zeros((2, 2), dtype=bool)
    with pytest.raises(ScenarioArgumentError, match="coupling"):
        mixing_matrix(adj, np.array([1e4, 1e4]), 1.5)


def test_simulate_seir_negative_beta_raises() -> None:
    with pytest.raises(ScenarioArgumentError, match="beta"):
        simulate_seir(population=np.array([100.0]), mixing=np.ones((1, 1)),
                      beta=-np.ones((1, 3)), latent_mean=3.0, infectious_mean=4.0,
                      initial_exposed=np.array([1.0]))


def test_simulate_seir_short_latent_period_raises() -> None:
    with pytest.raises(ScenarioArgumentError, match="latent_mean=0.5"):
        generation_interval_pmf(0.5, 4.0)


def test_simulate_seir_awareness_caps_incidence_at_plateau() -> None:
    r0, h, n, days = 2.0, 500.0, 1e9, 300
    res = simulate_seir(population=np.array([n]), mixing=np.ones((1, 1)),
                        beta=np.full((1, days), r0 / INFECTIOUS), latent_mean=LATENT,
                        infectious_mean=INFECTIOUS, initial_exposed=np.array([1000.0]),
                        awareness_scale=h, awareness_lag=1)
    weekly = np.convolve(res.infections[0], np.ones(7))[:days] / n * 1e5
    # Weitz et al. 2020 (PNAS 117:32764) [memory]: awareness-driven transmission
    # beta / (1 + (x/h)^k) plateaus where R0 / (1 + (x/h)^k) = 1, i.e. x = h (R0 - 1)^(1/k)
    assert_allclose(weekly.max(), h * np.sqrt(r0 - 1.0), rtol=0.1)


def test_simulate_seir_target_rt_sets_the_growth_of_a_scripted_district() -> None:
    # beta says R = 3; the script asks for R = 1.3 from day 20 on: the script wins
    days, wanted = 130, 1.3
    beta = np.full((1, days), 3.0 / INFECTIOUS)
    res = simulate_seir(
        population=np.array([1e9]), mixing=np.ones((1, 1)), beta=beta, latent_mean=LATENT,
        infectious_mean=INFECTIOUS, initial_exposed=np.array([10.0]),
        target_rt=lambda t, _inf: np.array([wanted if t >= 20 else np.nan]),
    )
    assert_allclose(res.rt[0, 20:], wanted, rtol=1e-6)
    assert_allclose(res.rt[0, :20], 3.0, rtol=1e-3)
    t = np.arange(80, 130)
    r = np.polyfit(t, np.log(res.infections[0, t]), 1)[0]
    w = res.generation_interval
    s = np.arange(1, w.shape[0] + 1)
    # Wallinga & Lipsitch 2007 (Proc R Soc B 274:599), Euler-Lotka: 1/R = sum_s w_s e^{-r s}
    assert_allclose(1.0 / np.sum(w * np.exp(-r * s)), wanted, rtol=1e-3)


def test_simulate_seir_target_rt_ignores_neighbours_prevalence() -> None:
    # two districts mixing half their contacts; the quiet one is scripted to R = 1.2 and its
    # infectious people cause 1.2 infections each although its neighbour is 100 times busier
    mix = np.array([[0.5, 0.5], [0.5, 0.5]])
    days = 60
    beta = np.full((2, days), 1.0 / INFECTIOUS)
    res = simulate_seir(
        population=np.array([1e8, 1e8]), mixing=mix, beta=beta, latent_mean=LATENT,
        infectious_mean=INFECTIOUS, initial_exposed=np.array([1000.0, 10.0]),
        target_rt=lambda t, _inf: np.array([np.nan, 1.2]),
    )
    pressure = mix @ (res.infectious[:, :-1] / 1e8)
    # force of infection in district 2 = R* p_r I_2/N_2 (its own infectious only)
    own = 1.2 / INFECTIOUS * res.infectious[1, :-1] / 1e8
    beta_eff = res.rt[1, 1:] / INFECTIOUS * 1e8 / res.susceptible[1, :-1]
    assert_allclose(beta_eff * pressure[1], own, rtol=1e-5)
