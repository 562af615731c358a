"""Whole-file checks on the rows that passed: duplicates."""

from __future__ import annotations

import numpy as np

from server.feeds.file_checks import check_file
from server.feeds.validation import Accepted


def test_check_file_identical_duplicates_keep_first() -> None:
    a = Accepted(region_id=np.array([1, 1]), measure_id=np.array([1, 1]), day=np.array([5, 5]),
                 value=np.array([3.0, 3.0]), line=np.array([2, 3]))
    check = check_file(a, positives=None, tests=None)
    assert (check.keep.tolist(), check.reasons) == ([True, False], ("duplicate_row",))
