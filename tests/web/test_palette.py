"""Tier colours: sequential, and readable to WCAG 2.1 AA (contrast computed, not eyeballed)."""

from __future__ import annotations

import pytest
from numpy.testing import assert_allclose

from web.palette import (
    INK,
    NO_TIER,
    OUTLINE,
    PAPER,
    contrast_ratio,
    relative_luminance,
    tier_colours,
)

TIER_COUNTS = [pytest.param(n, id=f"{n}-tiers") for n in range(2, 9)]


@pytest.mark.parametrize(
    ("colour", "expected"),
    [
        # WCAG 2.1, definition of relative luminance: white is 1 and black is 0.
        pytest.param("#ffffff", 1.0, id="white"),
        pytest.param("#000000", 0.0, id="black"),
        # Pure sRGB primaries have luminance equal to their coefficient (WCAG 2.1 formula).
        pytest.param("#ff0000", 0.2126, id="red"),
        pytest.param("#00ff00", 0.7152, id="green"),
    ],
)
def test_relative_luminance_matches_wcag_definition(colour: str, expected: float) -> None:
    assert_allclose(relative_luminance(colour), expected, atol=1e-12)


def test_contrast_ratio_black_on_white_is_21() -> None:
    # WCAG 2.1 "contrast ratio": (1 + 0.05) / (0 + 0.05) = 21.
    assert_allclose(contrast_ratio("#000000", "#ffffff"), 21.0)


def test_contrast_ratio_grey_777_just_fails_aa() -> None:
    # #777777 on white is the usual "just under 4.5:1" example (about 4.48) [memory].
    assert_allclose(contrast_ratio("#777777", "#ffffff"), 4.48, atol=0.01)


@pytest.mark.parametrize("n", TIER_COUNTS)
def test_tier_colours_text_meets_aa(n: int) -> None:
    for c in tier_colours(n):
        # WCAG 2.1 SC 1.4.3: 4.5:1 for normal text.
        assert contrast_ratio(c.fill, c.text) >= 4.5, c


@pytest.mark.parametrize("n", TIER_COUNTS)
def test_tier_colours_are_sequential(n: int) -> None:
    lum = [relative_luminance(c.fill) for c in tier_colours(n)]
    assert all(a > b for a, b in zip(lum, lum[1:], strict=False)), lum


@pytest.mark.parametrize("n", TIER_COUNTS)
def test_tier_colours_are_not_traffic_lights(n: int) -> None:
    for c in tier_colours(n):
        r, g, b = (int(c.fill[i:i + 2], 16) for i in (1, 3, 5))
        # Never a saturated red, amber or green: green never dominates, red never far above both.
        assert not (g > r + 30 and g > b + 30), c
        assert not (r > g + 90 and r > b + 90), c


def test_outline_of_swatches_meets_non_text_contrast() -> None:
    # WCAG 2.1 SC 1.4.11: 3:1 for the boundary of graphical objects against the page.
    assert contrast_ratio(OUTLINE, PAPER) >= 3.0


def test_page_ink_and_no_tier_grey_are_readable() -> None:
    assert contrast_ratio(INK, PAPER) >= 4.5
    assert contrast_ratio(INK, NO_TIER) >= 4.5


def test_tier_colours_refuses_zero_tiers() -> None:
    with pytest.raises(ValueError, match="n_tiers must be >= 1, got 0"):
        tier_colours(0)
