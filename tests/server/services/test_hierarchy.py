"""Aggregation up the hierarchy: sums, completeness, nested levels."""

from __future__ import annotations

import numpy as np
from numpy.testing import assert_array_equal

from server.services.hierarchy import membership, sum_up

PARENT_OF = {"A1": "R1", "A2": "R1", "B1": "R2", "R1": "C", "R2": "C", "C": None}


def test_membership_includes_grandparents() -> None:
    m = membership(["A1", "A2", "B1"], PARENT_OF, ["R1", "R2", "C"])
    assert_array_equal(m, [[1, 1, 0], [0, 0, 1], [1, 1, 1]])


def test_sum_up_adds_children() -> None:
    values = np.array([[1.0, 2.0], [3.0, 4.0], [10.0, 20.0]])
    m = membership(["A1", "A2", "B1"], PARENT_OF, ["R1", "R2", "C"])
    agg = sum_up(values, m, ["R1", "R2", "C"])
    # Checked against numpy's own sums of the same rows.
    assert_array_equal(agg.values, [values[:2].sum(0), values[2], values.sum(0)])


def test_sum_up_missing_child_makes_parent_missing() -> None:
    values = np.array([[1.0, 2.0], [np.nan, 4.0], [10.0, 20.0]])
    m = membership(["A1", "A2", "B1"], PARENT_OF, ["R1", "R2", "C"])
    agg = sum_up(values, m, ["R1", "R2", "C"])
    assert np.isnan(agg.values[0, 0]) and agg.values[0, 1] == 6.0
    assert_array_equal(agg.reporting[:, 0], [1, 1, 2])


def test_sum_up_parent_without_children_is_missing() -> None:
    m = membership(["A1"], PARENT_OF, ["R2"])
    agg = sum_up(np.array([[5.0]]), m, ["R2"])
    assert np.isnan(agg.values[0, 0])
