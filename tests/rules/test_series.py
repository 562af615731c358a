"""The evaluator's input contract (rules/series.py): shapes, dtypes, and errors naming the field."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_array_equal

from rules import EvaluationInputError, IndicatorSeries


def test_indicator_series_converts_to_float_arrays() -> None:
    s = IndicatorSeries(estimate=[[1, 2, 3]], count=[[4, 5, 6]])  # type: ignore[arg-type]
    assert s.estimate.dtype == np.float64 and s.count is not None
    assert_array_equal(s.count, [[4.0, 5.0, 6.0]])
    assert s.shape == (1, 3)


def test_indicator_series_keeps_nan_as_missing() -> None:
    s = IndicatorSeries(estimate=np.array([[np.nan, 1.0]]))
    assert np.isnan(s.estimate[0, 0])


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        pytest.param({"estimate": np.ones(3)},
                     r"^estimate: expected shape \(regions, days\), got 1", id="one-dimensional"),
        pytest.param({"estimate": np.array([[1.0, np.inf]])}, r"^estimate: contains infinite",
                     id="infinite"),
        pytest.param({"estimate": np.ones((2, 3)), "lower": np.ones((2, 2))},
                     r"^lower: shape \(2, 2\) differs from estimate's \(2, 3\)", id="lower-shape"),
        pytest.param({"estimate": np.ones((1, 2)), "age_days": np.array([[1.0, -np.inf]])},
                     r"^age_days: contains infinite", id="age-infinite"),
        pytest.param({"estimate": np.ones((1, 2)), "stale": np.array([[0, 1]])},
                     r"^stale: expected booleans, got dtype int", id="stale-not-bool"),
        pytest.param({"estimate": np.ones((1, 2)), "nowcast": np.array([[True]])},
                     r"^nowcast: shape \(1, 1\) differs", id="nowcast-shape"),
    ],
)
def test_indicator_series_bad_input_names_the_field(kwargs: dict[str, object], match: str) -> None:
    with pytest.raises(EvaluationInputError, match=match):
        IndicatorSeries(**kwargs)  # type: ignore[arg-type]
