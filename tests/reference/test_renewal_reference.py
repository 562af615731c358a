"""Cori et al. (2013) posterior, equality with EpiEstim 2.2, Wallinga & Lipsitch (2007) r-R."""

from __future__ import annotations

import csv
import datetime as dt
import io
import math
import warnings
from pathlib import Path

import numpy as np
import pytest
import statsmodels.api as sm
from numpy.testing import assert_allclose
from scipy import stats
from statsmodels.tools.sm_exceptions import DomainWarning
from typer.testing import CliRunner

from server.cli import app
from server.indicators.renewal import infectiousness, reproduction_number
from server.indicators.serial_interval import (
    discrete_serial_interval,
    gamma_serial_interval,
    growth_to_reproduction,
    growth_to_reproduction_discrete,
)


def test_cori_posterior_closed_form_hand_example() -> None:
    si = discrete_serial_interval([0.0, 0.25, 0.5, 0.25])
    incidence = np.array([[10.0, 12.0, 9.0, 14.0, 16.0, 20.0]])
    result = reproduction_number(incidence, si, window=3, prior_mean=2.0, prior_sd=1.0)
    # By hand, Cori et al. (2013) eq. 2 and Web Appendix 1 (posterior gamma):
    # prior shape (2/1)^2 = 4, scale 1/2, so prior rate 2.
    # Lambda_3 = .25*9 + .5*12 + .25*10 = 10.75; Lambda_4 = .25*14 + .5*9 + .25*12 = 11.0;
    # Lambda_5 = .25*16 + .5*14 + .25*9 = 13.25.
    # Window 3..5: shape 4 + 14 + 16 + 20 = 54; rate 2 + 10.75 + 11 + 13.25 = 37.
    assert_allclose(result.shape[0, 5], 54.0)
    assert_allclose(result.rate[0, 5], 37.0)
    assert_allclose(result.estimate[0, 5], 54 / 37)
    assert_allclose(result.cv[0, 5], 1 / np.sqrt(54))
    # Quantiles of gamma(54, scale 1/37), scipy.stats.gamma.ppf.
    assert_allclose(result.lower[0, 5], stats.gamma.ppf(0.025, 54, scale=1 / 37))
    assert_allclose(result.upper[0, 5], stats.gamma.ppf(0.975, 54, scale=1 / 37))
    # EpiEstim's rule (estimate_R: t_start >= 2, t_end > mean SI = 2): the first window ends on
    # day 3 (0-based); its value uses Lambda_1 = .25*10 and Lambda_2 = .25*12 + .5*10 = 8:
    # shape 4 + 12 + 9 + 14 = 39, rate 2 + 2.5 + 8 + 10.75 = 23.25.
    assert np.isnan(result.estimate[0, :3]).all()
    assert_allclose(result.shape[0, 3], 39.0)
    assert_allclose(result.rate[0, 3], 23.25)


@pytest.mark.parametrize("r", [0.1, -0.05, 0.02], ids=["grow", "decline", "slow"])
def test_cori_estimate_on_exponential_series_converges_to_wallinga_lipsitch(r: float) -> None:
    si = gamma_serial_interval(4.7, 2.9)
    t = np.arange(90, dtype=np.float64)
    incidence = 1e9 * np.exp(r * t)[np.newaxis, :]
    result = reproduction_number(incidence, si)
    # Discrete analogue of Wallinga & Lipsitch (2007) eq. 2.7: R = 1 / sum_k w_k exp(-r k),
    # with the same discretised serial interval; with I_0 = 1e9 the prior's pull is < 1e-7.
    expected = 1.0 / np.sum(si.pmf * np.exp(-r * np.arange(si.pmf.size)))
    assert_allclose(result.estimate[0, -30:], expected, rtol=1e-6)
    assert_allclose(growth_to_reproduction_discrete(r, si), expected)


@pytest.mark.parametrize(
    ("r", "expected"),
    # Gamma generation interval, mean 4.7, sd 2.9 (Nishiura et al. 2020 [memory of which fit]):
    # R = (1 + r * scale)^shape, Wallinga & Lipsitch (2007); values from REFERENCES.md.
    [(0.1, 1.5409), (-0.05, 0.7818)],
    ids=["r0.1", "r-0.05"],
)
def test_growth_to_reproduction_gamma_formula(r: float, expected: float) -> None:
    assert_allclose(np.round(growth_to_reproduction(r, 4.7, 2.9), 4), expected)


# --------------------------------------------------------------------------- EpiEstim 2.2
# EpiEstim cannot run here (no R). The reference below follows its published definitions line by
# line, independently of server.indicators, with plain loops and scipy:
# - discr_si: Cori et al. (2013) Web Appendix 11 (the formula in EpiEstim's discr_si help page),
#   with scipy.stats.gamma CDFs, w_k for k = 0 .. T-1, clipped at 0, not renormalised;
# - overall_infectivity: lambda_t = sum_{k=1}^{t-1} I_{t-k} w_k (days counted from 1), NA on day 1;
# - estimate_R defaults: windows t_start = 2 .. T-6, t_end = t_start + 6 (make_config); a window
#   is estimated only when t_end > the mean of that discr_si (posterior_from_si_distr);
# - posterior gamma(shape a + sum I, scale 1 / (1/b + sum lambda)), prior mean 5, sd 5;
#   quantiles by scipy.stats.gamma.ppf (EpiEstim uses qgamma).


def _discr_si(k: np.ndarray, mu: float, sigma: float) -> np.ndarray:
    a, b = ((mu - 1) / sigma) ** 2, sigma**2 / (mu - 1)

    def cdf(x: np.ndarray, shape: float) -> np.ndarray:
        return stats.gamma.cdf(x, shape, scale=b)  # 0 for x <= 0, as R's pgamma

    w = (
        k * cdf(k, a) + (k - 2) * cdf(k - 2, a) - 2 * (k - 1) * cdf(k - 1, a)
        + a * b * (2 * cdf(k - 1, a + 1) - cdf(k - 2, a + 1) - cdf(k, a + 1))
    )
    return np.maximum(w, 0.0)


def _epiestim_parametric(incid: np.ndarray, mu: float, sigma: float) -> dict[int, tuple]:
    """0-based end day -> (mean, q0.025, q0.975) for each window EpiEstim estimates."""
    big_t = incid.size
    w = _discr_si(np.arange(big_t, dtype=float), mu, sigma)
    mean_si = float(np.sum(w * np.arange(big_t)))
    lam = [math.nan] + [
        sum(w[k] * incid[t - k] for k in range(1, t + 1)) for t in range(1, big_t)
    ]  # lam[t] here is 0-based day t
    a_prior, b_prior = (5 / 5) ** 2, 5**2 / 5
    out = {}
    for t_start in range(2, big_t - 6 + 1):  # 1-based, as make_config
        t_end = t_start + 6
        if not t_end > mean_si:
            continue
        days = range(t_start - 1, t_end)  # 0-based
        shape = a_prior + sum(incid[d] for d in days)
        scale = 1 / (1 / b_prior + sum(lam[d] for d in days))
        out[t_end - 1] = (
            shape * scale,
            stats.gamma.ppf(0.025, shape, scale=scale),
            stats.gamma.ppf(0.975, shape, scale=scale),
        )
    return out


def _invented_incidence(seed: int, days: int, generation: np.ndarray) -> np.ndarray:
    """A seeded renewal-process epidemic (invented): R falls from 1.6 to 0.8."""
    rng = np.random.default_rng(seed)
    incid = np.zeros(days)
    incid[0] = 12.0
    r = np.linspace(1.6, 0.8, days)
    for t in range(1, days):
        lam = sum(generation[k] * incid[t - k] for k in range(1, min(t, generation.size - 1) + 1))
        incid[t] = rng.poisson(r[t] * lam)
    return incid


@pytest.mark.parametrize(
    ("mu", "sigma", "days", "first_end"),
    # mu 5.2: the first estimate ends on day 8 (0-based 7, t_start = 2); mu 15.3: t_end > 15.3,
    # so day 16 (0-based 15). The sd 2.8 beside mu 5.2 is invented for the test. On a 25-day
    # series EpiEstim's mean SI is that of discr_si(0:24), 10.62, so estimates start on day 11.
    [(5.2, 2.8, 60, 7), (15.3, 9.1, 92, 15), (15.3, 9.1, 25, 10)],
    ids=["mu5.2", "mu15.3-sd9.1", "mu15.3-short-series"],
)
def test_cori_rt_equals_epiestim_parametric_si(
    mu: float, sigma: float, days: int, first_end: int
) -> None:
    si = gamma_serial_interval(mu, sigma)
    incid = _invented_incidence(2013, days, _discr_si(np.arange(80.0), mu, sigma))
    reference = _epiestim_parametric(incid, mu, sigma)
    assert min(reference) == first_end
    result = reproduction_number(incid, si, 7)
    estimated = np.flatnonzero(np.isfinite(result.estimate[0]))
    assert estimated.tolist() == sorted(reference)  # the same windows, from the same first day
    ref = np.array([reference[e] for e in estimated])
    # The issue asks for 1e-4 relative; the two agree to rounding (measured below 1e-11).
    assert_allclose(result.estimate[0, estimated], ref[:, 0], rtol=1e-9)
    assert_allclose(result.lower[0, estimated], ref[:, 1], rtol=1e-9)
    assert_allclose(result.upper[0, estimated], ref[:, 2], rtol=1e-9)


def test_gamma_serial_interval_equals_discr_si_untruncated() -> None:
    # Web Appendix 11 weights by scipy CDFs (above), k = 0..199, against the kept lags; the lags
    # left out hold less than 1e-12 of mass and nothing is renormalised.
    si = gamma_serial_interval(15.3, 9.1)
    reference = _discr_si(np.arange(200.0), 15.3, 9.1)
    assert_allclose(si.pmf, reference[: si.pmf.size], rtol=0, atol=1e-13)
    assert reference[si.pmf.size :].sum() < 1e-12


def test_cli_estimate_rt_equals_epiestim_parametric_si(tmp_path: Path) -> None:
    # `tierwise estimate rt --si-mean 15.3 --si-sd 9.1` against the EpiEstim reference above,
    # from the first window EpiEstim estimates (day 16) to the last.
    incid = _invented_incidence(91, 92, _discr_si(np.arange(80.0), 15.3, 9.1))
    start = dt.date(2031, 3, 1)
    path = tmp_path / "cases.csv"
    path.write_text("date,cases\n" + "".join(
        f"{start + dt.timedelta(days=i)},{int(c)}\n" for i, c in enumerate(incid)
    ))
    result = CliRunner().invoke(
        app, ["estimate", "rt", "--input", str(path), "--si-mean", "15.3", "--si-sd", "9.1"]
    )
    assert result.exit_code == 0, result.output
    rows = list(csv.DictReader(io.StringIO(result.stdout)))
    reference = _epiestim_parametric(incid, 15.3, 9.1)
    written = [i for i, row in enumerate(rows) if row["r_mean"]]
    assert written == sorted(reference) and written[0] == 15
    for i in written:
        mean, lower, upper = reference[i]
        assert_allclose(
            [float(rows[i]["r_mean"]), float(rows[i]["r_lower"]), float(rows[i]["r_upper"])],
            [mean, lower, upper], rtol=1e-4,
        )


def test_quasi_poisson_dispersion_equals_statsmodels_pearson_scale() -> None:
    # Reference: statsmodels Poisson GLM, identity link, no intercept (mu_s = R Lambda_s), fitted
    # on the window's days; its Pearson scale X^2 / (n - 1) (McCullagh & Nelder 1989, ch. 9)
    # floored at 1 is phi, and the posterior is gamma(a + sum I / phi, 1/b + sum Lambda / phi).
    rng = np.random.default_rng(1989)
    si = gamma_serial_interval(4.7, 2.9)
    incid = rng.negative_binomial(5, 5 / (5 + 80.0 * np.exp(0.02 * np.arange(60)))).astype(float)
    result = reproduction_number(incid, si, 7, overdispersion="quasi-poisson")
    lam = infectiousness(incid, si)[0]
    checked = 0
    for end in (20, 35, 59):
        days = slice(end - 6, end + 1)
        with warnings.catch_warnings():  # identity link: statsmodels warns about the domain
            warnings.simplefilter("ignore", DomainWarning)
            family = sm.families.Poisson(sm.families.links.Identity())
            fit = sm.GLM(incid[days], lam[days], family=family).fit(scale="X2")
        phi = max(1.0, float(fit.scale))
        checked += phi > 1.0
        assert_allclose(result.dispersion[0, end], phi, rtol=1e-8)
        assert_allclose(result.shape[0, end], 1.0 + incid[days].sum() / phi, rtol=1e-10)
        assert_allclose(result.rate[0, end], 0.2 + lam[days].sum() / phi, rtol=1e-10)
    assert checked >= 2  # the negative-binomial series is overdispersed


def test_quasi_poisson_widens_the_interval_of_overdispersed_counts() -> None:
    rng = np.random.default_rng(2)
    incid = rng.negative_binomial(3, 3 / (3 + 200.0), size=(2, 70)).astype(float)
    si = gamma_serial_interval(4.7, 2.9)
    plain = reproduction_number(incid, si)
    quasi = reproduction_number(incid, si, overdispersion="quasi-poisson")
    ok = np.isfinite(plain.estimate)
    assert np.mean(quasi.dispersion[ok] > 1.0) > 0.9  # negative binomial, size 3: very dispersed
    assert np.all(quasi.upper[ok] - quasi.lower[ok] >= plain.upper[ok] - plain.lower[ok] - 1e-12)
    assert np.all(plain.dispersion[np.isfinite(plain.estimate)] == 1.0)
