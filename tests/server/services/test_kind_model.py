"""What an indicator kind is: a qualified measure's kind and a parameter's checks."""

from __future__ import annotations

import pytest

from server.services.kind_model import Param, measure_kind


def test_measure_kind_of_a_qualified_measure_is_its_base_kind() -> None:
    known = {"cases": "count", "ww_concentration": "concentration"}
    assert measure_kind("cases.influenza", known) == "count"
    assert measure_kind("ww_concentration.rsv", known) == "concentration"
    assert measure_kind("deaths.influenza", known) is None
    assert measure_kind("cases", known) == "count"


def test_param_refuses_booleans_for_numbers() -> None:
    p = Param(name="window", type=int, default=7, minimum=1, help="h")
    with pytest.raises(ValueError, match="expected an integer, got True"):
        p.check(True, {})
