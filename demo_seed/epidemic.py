"""Stochastic metapopulation SEIR model: the ground truth of the demo scenario.

All names, places and numbers are invented for the demo.

One step is one day. Every district is an SEIR compartment set coupled to its neighbours
through a row-stochastic mixing matrix. Transitions are binomial (chain-binomial model) with
seeded :class:`numpy.random.Generator`; with ``rng=None`` the same equations run on expected
values (the deterministic mean), which the tests compare with the final-size equation.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from demo_seed.errors import ScenarioArgumentError

__all__ = [
    "SeirResult",
    "generation_interval_pmf",
    "mixing_matrix",
    "simulate_seir",
]


@dataclass(frozen=True)
class SeirResult:
    """Trajectory of :func:`simulate_seir`; arrays shaped ``(districts, days)``.

    Attributes
    ----------
    infections : numpy.ndarray
        New infections of each day (local transmission plus importations).
    importations : numpy.ndarray
        Infections imported from outside the county on each day.
    susceptible, exposed, infectious, recovered : numpy.ndarray
        Compartments at the end of each day.
    rt : numpy.ndarray
        Instantaneous reproduction number
        :math:`R_{i,t} = \\beta_{i,t} \\, S_{i,t^-}/N_i \\, D` with :math:`S_{i,t^-}` the
        susceptibles at the start of day *t* and :math:`D = 1/p_r` the mean number of days
        infectious.
    generation_interval : numpy.ndarray
        Discrete generation-interval pmf implied by the step order; index 0 = lag 1 day.
    """

    infections: np.ndarray
    importations: np.ndarray
    susceptible: np.ndarray
    exposed: np.ndarray
    infectious: np.ndarray
    recovered: np.ndarray
    rt: np.ndarray
    generation_interval: np.ndarray


def _probability(mean_days: float, name: str) -> float:
    if not mean_days >= 1.0:
        raise ScenarioArgumentError(name, mean_days, "must be at least 1 day")
    return 1.0 / mean_days


def generation_interval_pmf(latent_mean: float, infectious_mean: float,
                            max_lag: int = 60) -> np.ndarray:
    """Generation-interval pmf of the discrete-time SEIR of :func:`simulate_seir`.

    Parameters
    ----------
    latent_mean, infectious_mean : float
        Mean days in E and in I (geometric sojourns, ``p_e = 1/latent_mean``,
        ``p_r = 1/infectious_mean``).
    max_lag : int
        Longest lag kept; the tail is renormalised into the pmf.

    Returns
    -------
    numpy.ndarray
        ``w[s - 1]`` = share of an infector's onward infections made ``s`` days after their
        own infection, ``s = 1..max_lag`` (``w[0] = 0``: nobody is infectious the next day).

    Notes
    -----
    Someone infected on day *t* leaves E during day *t + l* with probability
    :math:`(1-p_e)^{l-1} p_e` and is then infectious on days *t + l + 1* onwards, leaving I
    with probability :math:`p_r` per day. Hence

    .. math:: w_s \\propto \\sum_{l=1}^{s-1} (1-p_e)^{l-1} p_e \\, (1-p_r)^{s-l-1},

    the infectiousness profile of the renewal equation
    :math:`I_t = R_t \\sum_s w_s I_{t-s}` [1]_.

    References
    ----------
    .. [1] Fraser, C. (2007). Estimating individual and household reproduction numbers in an
       emerging epidemic. PLoS ONE 2(8), e758.
    """
    p_e = _probability(latent_mean, "latent_mean")
    p_r = _probability(infectious_mean, "infectious_mean")
    s = np.arange(1, max_lag + 1)
    latent = (1.0 - p_e) ** (s - 1) * p_e                 # P(L = s), s >= 1
    stay = (1.0 - p_r) ** (s - 1)                          # P(K >= s)
    w = np.zeros(max_lag)
    w[1:] = np.convolve(latent, stay)[: max_lag - 1]       # sum_l P(L=l) P(K >= s-l)
    return w / w.sum()


def mixing_matrix(adjacency: np.ndarray, population: np.ndarray,
                  coupling: np.ndarray | float) -> np.ndarray:
    """Row-stochastic contact matrix: a share ``coupling`` of contacts with neighbours.

    Notes
    -----
    :math:`M_{ii} = 1 - c_i`, :math:`M_{ij} = c_i N_j A_{ij} / \\sum_k A_{ik} N_k`: residents
    of *i* spend a share :math:`c_i` of their contacts in neighbouring districts, split in
    proportion to the neighbours' populations (a gravity-type rule) [1]_.

    References
    ----------
    .. [1] Keeling, M. J. and Rohani, P. (2008). Modeling Infectious Diseases in Humans and
       Animals, ch. 7. Princeton University Press.
    """
    adj = np.asarray(adjacency, dtype=bool)
    pop = np.asarray(population, dtype=float)
    n = pop.shape[0]
    if adj.shape != (n, n):
        raise ScenarioArgumentError("adjacency", adj.shape, f"must be ({n}, {n})")
    c = np.broadcast_to(np.asarray(coupling, dtype=float), (n,))
    if np.any((c < 0) | (c >= 1)):
        raise ScenarioArgumentError("coupling", c.tolist(), "must lie in [0, 1)")
    weights = adj * pop[None, :]
    total = weights.sum(axis=1, keepdims=True)
    share = np.divide(weights, total, out=np.zeros_like(weights), where=total > 0)
    c_eff = np.where(total[:, 0] > 0, c, 0.0)
    return np.diag(1.0 - c_eff) + c_eff[:, None] * share


def _validate(population: np.ndarray, mixing: np.ndarray, beta: np.ndarray,
              initial_exposed: np.ndarray) -> None:
    n = population.shape[0]
    if population.ndim != 1 or np.any(population <= 0):
        raise ScenarioArgumentError("population", population.tolist(), "must be positive (n,)")
    if mixing.shape != (n, n) or not np.allclose(mixing.sum(axis=1), 1.0):
        raise ScenarioArgumentError("mixing", mixing.shape, f"must be ({n}, {n}), rows sum 1")
    if beta.ndim != 2 or beta.shape[0] != n or np.any(beta < 0):
        raise ScenarioArgumentError("beta", beta.shape, f"must be ({n}, days), non-negative")
    if initial_exposed.shape != (n,) or np.any(initial_exposed > population):
        raise ScenarioArgumentError("initial_exposed", initial_exposed.tolist(),
                                    "must be (n,) and at most the population")


def simulate_seir(*, population: np.ndarray, mixing: np.ndarray, beta: np.ndarray,
                  latent_mean: float, infectious_mean: float, initial_exposed: np.ndarray,
                  importation_rate: np.ndarray | float = 0.0, waning_days: float | None = None,
                  awareness_scale: float | None = None, awareness_lag: int = 5,
                  rng: np.random.Generator | None = None,
                  target_rt: Callable[[int, np.ndarray], np.ndarray] | None = None,
                  ) -> SeirResult:
    """Run the chain-binomial metapopulation SEIR model.

    Parameters
    ----------
    population : numpy.ndarray
        District populations :math:`N_i`, shape ``(n,)``.
    mixing : numpy.ndarray
        Row-stochastic contact matrix :math:`M`, shape ``(n, n)``.
    beta : numpy.ndarray
        Transmission rate per day :math:`\\beta_{i,t}`, shape ``(n, days)``.
    latent_mean, infectious_mean : float
        Mean days in E and in I.
    initial_exposed : numpy.ndarray
        Exposed people at the start, shape ``(n,)``.
    importation_rate : float or numpy.ndarray
        Expected imported infections per day per district, scalar, ``(n,)`` or ``(n, days)``.
    waning_days : float, optional
        Mean duration of immunity (R -> S); ``None`` for lifelong immunity.
    awareness_scale : float, optional
        Weekly infections per 100 000 at which transmission is halved by behaviour (see
        Notes); ``None`` disables the behavioural response.
    awareness_lag : int
        Days between infections and the public's awareness of them.
    rng : numpy.random.Generator, optional
        Random source; ``None`` runs the deterministic mean of the same equations.
    target_rt : callable, optional
        ``target_rt(t, infections)`` with the new infections of days ``0..t-1`` (shape
        ``(n, t)``) returns the reproduction number each district should have on day *t*,
        shape ``(n,)``; NaN leaves a district to ``beta`` (see Notes).

    Returns
    -------
    SeirResult

    Notes
    -----
    Day *t*, with the compartments at the start of the day:

    .. math::
        \\lambda_{i} = \\beta_{i,t} \\sum_j M_{ij} I_j / N_j, \\quad
        \\Delta_{SE} \\sim \\mathrm{Bin}(S_i, 1 - e^{-\\lambda_i}), \\quad
        \\Delta_{EI} \\sim \\mathrm{Bin}(E_i, p_e), \\quad
        \\Delta_{IR} \\sim \\mathrm{Bin}(I_i, p_r)

    plus Poisson importations into E and binomial waning R -> S. With ``awareness_scale``
    :math:`h`, contacts fall with the district's 7-day infections per 100 000 seen
    ``awareness_lag`` days late, :math:`x_{i,t}`:
    :math:`\\beta^{eff}_{i,t} = \\beta_{i,t} / (1 + (x_{i,t}/h)^2)`, an awareness-driven
    response that flattens peaks into plateaus [3]_. Where ``target_rt`` gives
    :math:`R^*_{i,t}`, the day's rate is set so that the district's own infectious people
    would cause :math:`R^*` infections each, whatever its neighbours' prevalence:
    :math:`\\beta^{eff}_{i,t} = R^*_{i,t} \\, p_r \\, (I_i/N_i) / (\\sum_j M_{ij} I_j/N_j)
    \\cdot N_i / S_i` (a scripted course, replacing ``beta`` and the behavioural response
    there). Without waning and
    importations, one district, and the deterministic mean, the final size obeys
    :math:`z = 1 - e^{-R_0 z}` with :math:`R_0 = \\beta / p_r` exactly, because
    :math:`\\log(S_\\infty/S_0) = -\\beta \\sum_t I_t / N` and :math:`\\sum_t I_t = z N / p_r`
    [1]_ [2]_.

    References
    ----------
    .. [1] Kermack, W. O. and McKendrick, A. G. (1927). A contribution to the mathematical
       theory of epidemics. Proc. R. Soc. Lond. A 115, 700-721.
    .. [2] Bailey, N. T. J. (1975). The Mathematical Theory of Infectious Diseases and its
       Applications, 2nd ed., ch. 14 (chain-binomial models). Griffin.
    .. [3] Weitz, J. S., Park, S. W., Eksin, C. and Dushoff, J. (2020). Awareness-driven
       behavior changes can shift the shape of epidemics away from peaks and toward
       plateaus, shoulders, and oscillations. PNAS 117(51), 32764-32771.
    """
    pop = np.asarray(population, dtype=float)
    mix = np.asarray(mixing, dtype=float)
    b = np.asarray(beta, dtype=float)
    e0 = np.asarray(initial_exposed, dtype=float)
    _validate(pop, mix, b, e0)
    p_e = _probability(latent_mean, "latent_mean")
    p_r = _probability(infectious_mean, "infectious_mean")
    p_w = 0.0 if waning_days is None else _probability(waning_days, "waning_days")
    n, days = b.shape
    rate_arr = np.asarray(importation_rate, dtype=float)
    imp = np.broadcast_to(rate_arr[:, None] if rate_arr.ndim == 1 else rate_arr, (n, days))

    def draw(count: np.ndarray, p: np.ndarray | float) -> np.ndarray:
        if rng is None:
            return count * p
        return rng.binomial(count.astype(np.int64), p).astype(float)

    s, e = pop - e0, e0.copy()
    i_, r = np.zeros(n), np.zeros(n)
    out = {k: np.zeros((n, days)) for k in ("inf", "imp", "s", "e", "i", "r", "rt")}
    for t in range(days):
        b_t = b[:, t]
        if awareness_scale is not None and t > awareness_lag:
            seen = out["inf"][:, max(0, t - awareness_lag - 7): t - awareness_lag].sum(axis=1)
            b_t = b_t / (1.0 + (seen / pop * 1e5 / awareness_scale) ** 2)
        if target_rt is not None:
            wanted = np.asarray(target_rt(t, out["inf"][:, :t]), dtype=float)
            pressure = mix @ (i_ / pop)
            scripted = np.isfinite(wanted) & (s > 0) & (pressure > 0)
            own = np.divide(i_ / pop, pressure, out=np.ones(n), where=pressure > 0)
            b_t = np.where(scripted, wanted * p_r * own * pop / np.maximum(s, 1.0), b_t)
        lam = b_t * (mix @ (i_ / pop))
        out["rt"][:, t] = b_t * s / pop / p_r
        new_inf = draw(s, -np.expm1(-lam))
        rate = imp[:, t]
        imported = rate.copy() if rng is None else rng.poisson(rate).astype(float)
        imported = np.minimum(imported, s - new_inf)
        new_ei, new_ir, new_rs = draw(e, p_e), draw(i_, p_r), draw(r, p_w)
        s = s - new_inf - imported + new_rs
        e = e + new_inf + imported - new_ei
        i_ = i_ + new_ei - new_ir
        r = r + new_ir - new_rs
        out["inf"][:, t] = new_inf + imported
        out["imp"][:, t] = imported
        out["s"][:, t], out["e"][:, t], out["i"][:, t], out["r"][:, t] = s, e, i_, r
    return SeirResult(infections=out["inf"], importations=out["imp"], susceptible=out["s"],
                      exposed=out["e"], infectious=out["i"], recovered=out["r"], rt=out["rt"],
                      generation_interval=generation_interval_pmf(latent_mean, infectious_mean))
