"""Agreement of breaks between streams: hand-worked cases and argument errors."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.testing import assert_array_equal

from server.indicators.stream_agreement import stream_agreement


def test_stream_agreement_aligns_then_compares_by_hand() -> None:
    # case breaks 50 and 120; admissions (alignment +3) at 56 and 200:
    # 56 - 3 - 50 = 3 (agrees within 7), nearest to 120 is 56 (|56 - 3 - 120| = 67) -> no
    res = stream_agreement([[50, 120]], [[56, 200]], alignment=3, tolerance=7)
    assert_array_equal(res.agrees, [[True, False]])
    assert_array_equal(res.offset, [[3.0, -67.0]])
    assert_array_equal(res.nearest, [[56, 56]])


def test_stream_agreement_leading_stream_and_padding() -> None:
    # wastewater leads by 4: a break at 40 matches a case break at 45 (offset -1); -1 pads
    res = stream_agreement([[45, -1], [30, -1]], [[40, -1], [-1, -1]], alignment=-4,
                           tolerance=2)
    assert_array_equal(res.agrees, [[True, False], [False, False]])
    assert res.offset[0, 0] == -1.0
    assert np.isnan(res.offset[0, 1]) and np.isnan(res.offset[1, 0])
    assert_array_equal(res.nearest, [[40, -1], [-1, -1]])


def test_stream_agreement_with_no_breaks_of_the_other_stream() -> None:
    res = stream_agreement([[10]], np.zeros((1, 0), dtype=int), alignment=0)
    assert_array_equal(res.agrees, [[False]])


def test_stream_agreement_refuses_mismatched_regions() -> None:
    with pytest.raises(ValueError, match="other_breaks"):
        stream_agreement([[1], [2]], [[1]], alignment=0)
    with pytest.raises(ValueError, match="tolerance"):
        stream_agreement([[1]], [[1]], alignment=0, tolerance=-1)


def test_stream_agreement_with_changes_needs_the_same_direction() -> None:
    # case growth turns down at 50; admissions turn up at 52 and down at 60 (alignment +3):
    # by date alone 52 is nearest (offset -1), with directions only 60 counts (offset 7)
    res = stream_agreement([[50]], [[52, 60]], alignment=3, tolerance=7,
                           case_change=[[-0.05]], other_change=[[0.02, -0.04]])
    assert_array_equal(res.agrees, [[True]])
    assert_array_equal(res.nearest, [[60]])
    assert res.offset[0, 0] == 7.0
    res = stream_agreement([[50]], [[52]], alignment=3, case_change=[[-0.05]],
                           other_change=[[0.02]])
    assert_array_equal(res.agrees, [[False]])
    assert_array_equal(res.nearest, [[-1]])
