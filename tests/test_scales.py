"""Rating tables shared by several jobs, at and around every class boundary."""

from __future__ import annotations

import pytest

from coupon.ratings.scales import ISO_10289, SCALES, rate

# ISO 10289 protection rating by defect area (percent): "more than X up to Y"; 10 = no defect.
# Bounds 10 to 5 verified in the standard's table; 4 to 0 from memory (shared reference, standards.md).
ISO_10289_TABLE = [
    ("9", 0.0, 0.1), ("8", 0.1, 0.25), ("7", 0.25, 0.5), ("6", 0.5, 1.0), ("5", 1.0, 2.5),
    ("4", 2.5, 5.0), ("3", 5.0, 10.0), ("2", 10.0, 25.0), ("1", 25.0, 50.0),
]


def test_iso_10289_no_defect_is_10():
    assert ISO_10289.rate(0.0) == "10"  # ISO 10289: 10 = no defect


@pytest.mark.parametrize("rating,low,high", ISO_10289_TABLE)
def test_iso_10289_boundaries(rating, low, high):
    # ISO 10289 table (10-5 verified, 4-0 from memory): lower bound exclusive, upper inclusive
    assert ISO_10289.rate(high) == rating
    assert ISO_10289.rate(high * 0.999) == rating
    assert ISO_10289.rate(low + 1e-9) == rating
    assert ISO_10289.bounds(rating) == (low, high)


def test_iso_10289_above_half_is_0():
    assert ISO_10289.rate(50.0001) == "0" and ISO_10289.rate(100.0) == "0"  # ISO 10289: A > 50 %


def test_iso_10289_table_disagrees_with_rounded_formula_inside_bins():
    # ISO 10289 (memory): R = 3 (2 - log10 A) gives 9, 6 and 3 exactly at A = 0.1, 1 and 10, but
    # its rounded value disagrees inside most bins; the table rules for integer ratings.
    # at A = 0.12 % the rounded formula gives round(8.76) = 9; the table's bin (0.1, 0.25] is 8
    assert ISO_10289.rate(0.12) == "8"


def test_registry_refuses_unknown_names_listing_the_valid_ones():
    with pytest.raises(KeyError, match="astm-d610"):
        rate("astm-d6100", 1.0)
    assert rate("iso-10289", 0.3) == "7"
    assert set(SCALES) >= {"astm-d610", "iso-4628-3", "astm-d1654", "iso-10289", "astm-g46-density"}


def test_negative_areas_are_refused():
    with pytest.raises(ValueError, match="cannot be negative"):
        ISO_10289.rate(-0.1)
