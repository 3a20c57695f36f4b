"""Rating tables at and around every class boundary, and the distribution letter."""

from __future__ import annotations

import numpy as np
import pytest

from coupon.ratings.panel_ratings import distribution_letter, rust_grade, written_grade
from coupon.ratings.scales import rate

# ASTM D610-08 Table 1 (verified): grade -> upper bound of percent rusted (lower bound exclusive)
D610 = [("10", 0.01), ("9", 0.03), ("8", 0.1), ("7", 0.3), ("6", 1.0), ("5", 3.0), ("4", 10.0),
        ("3", 16.0), ("2", 33.0), ("1", 50.0)]
# ASTM D1654 Table 1, mean creepage mm (ends secondary, body from memory)
D1654 = [("9", 0.5), ("8", 1.0), ("7", 2.0), ("6", 3.0), ("5", 5.0), ("4", 7.0), ("3", 10.0),
         ("2", 13.0), ("1", 16.0)]


@pytest.mark.parametrize("grade,upper", D610)
def test_astm_d610_boundaries(grade, upper):
    # ASTM D610-08 Table 1: "more than X and up to Y": the upper bound belongs to the grade
    assert rust_grade(upper) == grade
    assert rust_grade(upper * 0.98) == grade
    below = str(int(grade) - 1)
    assert rust_grade(upper * 1.02) == below


def test_astm_d610_ends():
    assert rust_grade(0.0) == "10"  # ASTM D610-08 Table 1
    assert rust_grade(50.01) == "0"
    assert rust_grade(100.0) == "0"


@pytest.mark.parametrize("rating,upper", D1654)
def test_astm_d1654_boundaries(rating, upper):
    # ASTM D1654 Table 1 (body from memory): "more than X to Y" mm of mean creepage
    assert rate("astm-d1654", upper) == rating
    assert rate("astm-d1654", upper + 0.01) == str(int(rating) - 1)
    assert rate("astm-d1654", upper - 0.01) == rating


def test_astm_d1654_ends():
    assert rate("astm-d1654", 0.0) == "10"  # ASTM D1654: no creepage (secondary)
    assert rate("astm-d1654", 16.5) == "0"  # over 16 mm (secondary)


# ISO 4628-3 picture values (secondary): Ri 1 0.05 %, Ri 2 0.5 %, Ri 3 1 %, Ri 4 8 %, Ri 5 40-50 %
@pytest.mark.parametrize("pct,ri", [(0.0, "Ri 0"), (0.05, "Ri 1"), (0.5, "Ri 2"), (1.0, "Ri 3"), (8.0, "Ri 4"),
                                    (40.0, "Ri 5"), (50.0, "Ri 5")])
def test_iso_4628_3_picture_values(pct, ri):
    # each picture value rates as its own degree (ISO 4628-3, secondary source)
    assert rate("iso-4628-3", pct) == ri


@pytest.mark.parametrize("lo,hi,ri_lo,ri_hi", [(0.05, 0.5, "Ri 1", "Ri 2"), (0.5, 1.0, "Ri 2", "Ri 3"),
                                               (1.0, 8.0, "Ri 3", "Ri 4"), (8.0, 40.0, "Ri 4", "Ri 5")])
def test_iso_4628_3_cutoffs_between_pictures(lo, hi, ri_lo, ri_hi):
    # cut-offs are coupon's documented choice: geometric mean of neighbouring picture values
    g = float(np.sqrt(lo * hi))
    assert rate("iso-4628-3", g * 0.99) == ri_lo
    assert rate("iso-4628-3", g * 1.01) == ri_hi


def test_written_grade():
    # ASTM D610-08: grade and letter, e.g. 7-G; grades 10 and 0 carry no letter
    assert written_grade("7", "G") == "7-G"
    assert written_grade("10", "S") == "10"
    assert written_grade("0", "G") == "0"


def _grid_sites(n, area, spacing_mm, origin=(10, 10)):
    k = int(np.ceil(np.sqrt(n)))
    jj, ii = np.meshgrid(np.arange(k), np.arange(k))
    cent = np.column_stack([origin[0] + jj.ravel() * spacing_mm, origin[1] + ii.ravel() * spacing_mm])[:n]
    return np.full(n, area), cent


RATED = np.ones((1500, 750), bool)  # 75 x 150 mm at 10 px/mm


def test_letter_pinpoint_spread():
    areas, cent = _grid_sites(100, 0.05, 6.0)
    assert distribution_letter(areas, cent, RATED, 10.0, "7") == "P"


def test_letter_spot_concentrated():
    # two tight clusters of big spots: rust concentrated in a few localized areas (S)
    a1, c1 = _grid_sites(5, 3.0, 2.0, (20, 30))
    a2, c2 = _grid_sites(5, 3.0, 2.0, (50, 110))
    assert distribution_letter(np.r_[a1, a2], np.r_[c1, c2], RATED, 10.0, "6") == "S"


def test_letter_general_and_hybrid():
    areas, cent = _grid_sites(40, 2.0, 10.0, (8, 8))
    assert distribution_letter(areas, cent, RATED, 10.0, "5") == "G"
    # pinpoint specks carrying a third of the rust area beside the spots: a mix (H)
    pa, pc = _grid_sites(100, 0.2, 6.0, (9, 12))
    assert distribution_letter(np.r_[areas, pa], np.r_[cent, pc], RATED, 10.0, "5") == "H"


def test_no_letter_for_grade_10_or_no_sites():
    assert distribution_letter(np.array([0.05]), np.array([[5.0, 5.0]]), RATED, 10.0, "10") == ""
    assert distribution_letter(np.zeros(0), np.zeros((0, 2)), RATED, 10.0, "9") == ""


def test_masks_and_edge_band_reduce_rated_area():
    from coupon.segment.panels import base_mask

    # 75 x 150 mm at 10 px/mm, 5 mm edge band, a 20 x 30 mm label and a 10 mm hole (geometry, analytic)
    m = base_mask((1500, 750), 10.0, 5.0, (("rect", 10, 10, 20, 30), ("circle", 37.5, 20, 10)))
    expected_mm2 = 65 * 140 - 20 * 30 - np.pi * 25
    assert m.sum() / 100 == pytest.approx(expected_mm2, rel=0.005)
