"""Aggregation up the hierarchy (server/indicators/aggregate.py).

References: pandas ``groupby`` on the same data in long format (an independent implementation
of grouped sums and weighted means), and hand-worked cases written out below. The ratio estimate
of a partly reported total is Cochran (1977), "Sampling Techniques", ch. 6 (recalled from
memory): total = reported sum x population of all members / population of reporting members.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from numpy.testing import assert_allclose, assert_array_equal

from server.indicators.aggregate import membership, sum_counts, weighted_mean
from server.indicators.wilson import positivity

PARENT_OF = {"d1": "A", "d2": "A", "d3": "B", "d4": "B", "d5": "B", "A": "C", "B": "C",
             "C": None}
DISTRICTS = ["d1", "d2", "d3", "d4", "d5"]


def _long(values: np.ndarray, members: list[str], parent: dict[str, str]) -> pd.DataFrame:
    days = values.shape[1]
    return pd.DataFrame({
        "member": np.repeat(members, days),
        "group": np.repeat([parent[m] for m in members], days),
        "day": np.tile(np.arange(days), len(members)),
        "value": values.ravel(),
    })


def _random_tree(rng: np.random.Generator) -> tuple[list[str], dict[str, str], list[str]]:
    n_groups = int(rng.integers(2, 9))
    n_members = int(rng.integers(n_groups, 60))
    groups = [f"g{i}" for i in range(n_groups)]
    members = [f"m{j}" for j in range(n_members)]
    # every group gets at least one member, the rest at random
    owner = np.concatenate([np.arange(n_groups), rng.integers(0, n_groups, n_members - n_groups)])
    rng.shuffle(owner)
    return members, {m: groups[o] for m, o in zip(members, owner, strict=True)}, groups


@pytest.mark.parametrize("seed", range(12))
def test_strict_sums_equal_pandas_groupby(seed: int) -> None:
    rng = np.random.default_rng(1000 + seed)
    members, parent, groups = _random_tree(rng)
    days = int(rng.integers(1, 40))
    values = rng.poisson(rng.uniform(0, 50), (len(members), days)).astype(float)
    values[rng.random(values.shape) < rng.uniform(0, 0.3)] = np.nan
    agg = sum_counts(values, membership(members, parent, groups))
    frame = _long(values, members, parent)
    expected = (frame.groupby(["group", "day"])["value"]
                .agg(lambda s: s.sum() if s.notna().all() else np.nan)
                .unstack("day").reindex(index=groups, columns=range(days)))
    assert_array_equal(agg.values, expected.to_numpy())
    counted = frame.groupby(["group", "day"])["value"].count().unstack("day").reindex(groups)
    assert_array_equal(agg.reporting, counted.to_numpy())


@pytest.mark.parametrize("seed", range(12))
def test_partial_coverage_equals_pandas_ratio_estimate(seed: int) -> None:
    rng = np.random.default_rng(2000 + seed)
    members, parent, groups = _random_tree(rng)
    days = int(rng.integers(1, 40))
    population = rng.integers(1_000, 200_000, len(members)).astype(float)
    values = rng.poisson(rng.uniform(0, 80), (len(members), days)).astype(float)
    values[rng.random(values.shape) < 0.15] = np.nan
    limit = float(rng.uniform(0.0, 0.6))
    agg = sum_counts(values, membership(members, parent, groups), population=population,
                     max_missing=limit, whole=True)
    frame = _long(values, members, parent)
    frame["pop"] = np.repeat(population, days)
    frame["pop_reporting"] = np.where(frame["value"].notna(), frame["pop"], 0.0)
    g = frame.groupby(["group", "day"]).agg(total=("value", "sum"), pop=("pop", "sum"),
                                            rep=("pop_reporting", "sum"))
    missing_share = 1 - g["rep"] / g["pop"]
    est = np.where(missing_share == 0, g["total"],
                   np.rint(g["total"] * g["pop"] / g["rep"].where(g["rep"] > 0)))
    est = np.where(missing_share <= limit + 1e-9, est, np.nan)
    expected = (pd.Series(est, index=g.index).unstack("day")
                .reindex(index=groups, columns=range(days)).to_numpy())
    assert_array_equal(agg.values, expected)
    cov = (g["rep"] / g["pop"]).unstack("day").reindex(index=groups, columns=range(days))
    assert_allclose(agg.coverage, cov.to_numpy())


def test_hand_worked_partial_coverage() -> None:
    # Area A: d1 (10 000 people) reports 30, d2 (2 000 people) is missing: 1/6 of A missing.
    # Allowed 20 %: 30 * 12 000 / 10 000 = 36. Allowed 10 %: missing.
    values = np.array([[30.0], [np.nan], [5.0], [7.0], [1.0]])
    pop = np.array([10_000.0, 2_000.0, 40_000.0, 50_000.0, 10_000.0])
    m = membership(DISTRICTS, PARENT_OF, ["A", "B", "C"])
    loose = sum_counts(values, m, population=pop, max_missing=0.2)
    assert loose.values[0, 0] == 36.0
    assert loose.values[1, 0] == 13.0  # B complete: an exact sum
    # C: 2 000 of 112 000 missing (1.8 %): (30 + 13) * 112 000 / 110 000 = 43.78
    assert_allclose(loose.values[2, 0], 43 * 112_000 / 110_000)
    assert_allclose(loose.coverage[:, 0], [10 / 12, 1.0, 110 / 112])
    strict = sum_counts(values, m, population=pop, max_missing=0.1)
    assert np.isnan(strict.values[0, 0]) and strict.values[1, 0] == 13.0
    assert np.isnan(sum_counts(values, m).values[2, 0])  # default: any missing member


def test_rates_from_summed_counts_are_not_averages() -> None:
    # d1: 1 positive of 10 tests (10 %), d2: 90 of 100 (90 %). The area's positivity is
    # 91 / 110 = 82.7 %, not the mean 50 % of the districts' rates.
    pos = np.array([[1.0], [90.0]])
    tests = np.array([[10.0], [100.0]])
    m = membership(["d1", "d2"], PARENT_OF, ["A"])
    share = positivity(sum_counts(pos, m).values, sum_counts(tests, m).values, 1).estimate
    assert_allclose(share[0, 0], 91 / 110)


def test_hand_worked_weighted_means() -> None:
    # Two plants; area A is served 30 000 people by p1 and 10 000 by p2; area B only by p2.
    # Day 0: p1 = 100, p2 = 500 -> A = (30 000 * 100 + 10 000 * 500) / 40 000 = 200; B = 500.
    # Day 1: p2 missing -> A over p1 alone = 100 when 25 % may be missing, missing at 20 %;
    #        B has nothing -> missing.
    values = np.array([[100.0, 100.0], [500.0, np.nan]])
    weights = np.array([[30_000.0, 10_000.0], [0.0, 25_000.0]])
    loose = weighted_mean(values, weights, max_missing=0.25)
    assert_allclose(loose.values, [[200.0, 100.0], [500.0, np.nan]])
    assert_allclose(loose.coverage, [[1.0, 0.75], [1.0, 0.0]])
    assert np.isnan(weighted_mean(values, weights, max_missing=0.2).values[0, 1])


@pytest.mark.parametrize("seed", range(8))
def test_weighted_means_equal_pandas(seed: int) -> None:
    rng = np.random.default_rng(3000 + seed)
    groups, members = int(rng.integers(1, 8)), int(rng.integers(1, 15))
    days = int(rng.integers(1, 30))
    weights = rng.uniform(0, 1e5, (groups, members)) * (rng.random((groups, members)) < 0.6)
    values = rng.lognormal(3, 1, (members, days))
    values[rng.random(values.shape) < 0.3] = np.nan
    got = weighted_mean(values, weights, max_missing=0.999).values
    frame = pd.DataFrame([
        {"g": g, "day": t, "wv": weights[g, p] * values[p, t], "w": weights[g, p]}
        for g in range(groups) for p in range(members) for t in range(days)
        if weights[g, p] > 0 and np.isfinite(values[p, t])
    ], columns=["g", "day", "wv", "w"])
    sums = frame.groupby(["g", "day"]).sum()
    expected = (sums["wv"] / sums["w"]).unstack("day").reindex(
        index=range(groups), columns=range(days)).to_numpy()
    assert_allclose(got, expected, rtol=1e-12)


def test_bad_arguments_are_refused() -> None:
    m = membership(["d1"], PARENT_OF, ["A"])
    with pytest.raises(ValueError, match="max_missing"):
        sum_counts(np.ones((1, 2)), m, max_missing=1.0)
    with pytest.raises(ValueError, match="matrix"):
        sum_counts(np.ones((2, 2)), m)
    with pytest.raises(ValueError, match="weights"):
        weighted_mean(np.ones((1, 2)), -m)
