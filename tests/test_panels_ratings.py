"""Rating tables at and around every class boundary, and the distribution letter."""

from __future__ import annotations

import numpy as np
import pytest

from coupon.ratings.panel_ratings import (
    MIX_MIN_SHARE,
    PINPOINT_MAX_MM2,
    SPOT_MAX_CELL_SHARE,
    SPOT_MAX_CLUSTERS,
    SPOT_MIN_SHARE,
    distribution_letter,
    pinpoint_share,
    rust_grade,
    written_grade,
)
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
    assert rust_grade(0.0) == "10"  # ASTM D610-08 Table 1: grade 10 is up to 0.01 %, no rust included
    assert rust_grade(50.01) == "0"  # ASTM D610-08 Table 1: grade 0 is more than 50 %
    assert rust_grade(100.0) == "0"


@pytest.mark.parametrize("rating,upper", D1654)
def test_astm_d1654_boundaries(rating, upper):
    # ASTM D1654 Table 1 (body from memory): "more than X to Y" mm of mean creepage
    assert rate("astm-d1654", upper) == rating
    assert rate("astm-d1654", upper + 0.01) == str(int(rating) - 1)
    assert rate("astm-d1654", upper - 0.01) == rating


def test_astm_d1654_ends():
    assert rate("astm-d1654", 0.0) == "10"  # ASTM D1654: no creepage (secondary)
    assert rate("astm-d1654", 0.01) == "9"  # ASTM D1654: 9 is more than 0 to 0.5 mm (secondary)
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
    assert rate("iso-4628-3", g) == ri_lo  # the cut-off itself belongs to the lower degree, as in D610
    assert rate("iso-4628-3", g * 0.99) == ri_lo
    assert rate("iso-4628-3", g * 1.01) == ri_hi


def test_iso_4628_3_ri_0_up_to_one_hundredth_of_a_percent():
    # Ri 0 (no rust) up to 0.01 %, the smallest area the ASTM D610-08 scale resolves (its grade 10): coupon's
    # documented cut-off between Ri 0 (0 %) and Ri 1 (0.05 %, ISO 4628-3 picture value, secondary source)
    assert rate("iso-4628-3", 0.0099) == "Ri 0"
    assert rate("iso-4628-3", 0.01) == "Ri 0"
    assert rate("iso-4628-3", 0.0101) == "Ri 1"


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
    pa, pc = _grid_sites(100, 0.4, 6.0, (9, 12))
    assert distribution_letter(np.r_[areas, pa], np.r_[cent, pc], RATED, 10.0, "5") == "H"


def test_no_letter_for_grade_10_or_no_sites():
    assert distribution_letter(np.array([0.05]), np.array([[5.0, 5.0]]), RATED, 10.0, "10") == ""
    assert distribution_letter(np.zeros(0), np.zeros((0, 2)), RATED, 10.0, "9") == ""
    assert distribution_letter(np.array([5.0]), np.array([[30.0, 60.0]]), RATED, 10.0, "0") == ""


# The letter rule is coupon's own (ASTM D610 defines the letters in words and pictures only):
# pinpoint site <= PINPOINT_MAX_MM2; H when pinpoint and larger sites each carry >= MIX_MIN_SHARE
# of the rusted area; P when the larger sites carry less; S/G from the larger sites otherwise.


def _pin_and_spread(pin_mm2, big_mm2, pin_site_mm2=0.1):
    """Pinpoint specks spread on a 6 mm grid plus larger spots spread on a 12 mm grid (areas in mm2)."""
    n_pin = int(round(pin_mm2 / pin_site_mm2))
    pa, pc = _grid_sites(n_pin, pin_site_mm2, 6.0, (8, 9)) if n_pin else (np.zeros(0), np.zeros((0, 2)))
    n_big = 20
    ba, bc = _grid_sites(n_big, big_mm2 / n_big, 12.0, (11, 13)) if big_mm2 else (np.zeros(0), np.zeros((0, 2)))
    return np.r_[pa, ba], np.r_[pc, bc]


@pytest.mark.parametrize("pin_pct, letter", [(69.0, "H"), (70.0, "H"), (71.0, "P"), (100.0, "P"),
                                             (31.0, "H"), (30.0, "H"), (29.0, "G"), (0.0, "G")])
def test_mix_share_threshold(pin_pct, letter):
    # larger spots spread over the panel (G) mixed with pinpoint specks: H exactly when each part
    # carries at least 30 % of the rusted area (the 30 % boundary itself reads H)
    assert MIX_MIN_SHARE == 0.30  # coupon's documented rule (panel_ratings); the cases below are built on it
    areas, cent = _pin_and_spread(pin_pct, 100.0 - pin_pct)
    assert pinpoint_share(areas) == pytest.approx(pin_pct / 100, abs=1e-9)
    assert distribution_letter(areas, cent, RATED, 10.0, "5") == letter


def test_pinpoint_size_limit():
    # sites exactly at the limit are pinpoint; just above it they are larger sites
    assert PINPOINT_MAX_MM2 == 0.8  # coupon's documented rule (panel_ratings); the cases below are built on it
    areas, cent = _grid_sites(60, PINPOINT_MAX_MM2, 9.0, (8, 8))
    assert pinpoint_share(areas) == 1.0
    assert distribution_letter(areas, cent, RATED, 10.0, "5") == "P"
    areas_up = np.full(60, PINPOINT_MAX_MM2 * 1.01)
    assert pinpoint_share(areas_up) == 0.0
    assert distribution_letter(areas_up, cent, RATED, 10.0, "5") == "G"


def test_merged_specks_and_a_few_false_sites_stay_pinpoint():
    # the case that read H before: specks, many merged into sites of 0.3 to 0.8 mm2 (JPEG spreads them,
    # close specks join), plus a handful of tiny false sites; all pinpoint by area
    rng = np.random.default_rng(3)
    areas = np.r_[rng.uniform(0.05, 0.3, 80), rng.uniform(0.3, 0.8, 60), np.full(8, 0.02)]
    cent = np.column_stack([rng.uniform(6, 69, areas.size), rng.uniform(6, 144, areas.size)])
    assert distribution_letter(areas, cent, RATED, 10.0, "6") == "P"
    # one larger spot of 1.5 mm2 beside them carries about 3 % of the area: still P
    assert distribution_letter(np.r_[areas, 1.5], np.r_[cent, [[30.0, 70.0]]], RATED, 10.0, "6") == "P"


def test_spot_cluster_share_threshold():
    # three tight clusters of spots carry the share s of the larger rust; the rest is spread
    # thinly over the panel (one 1 mm2 site per 12 mm cell)
    assert (SPOT_MAX_CLUSTERS, SPOT_MIN_SHARE) == (3, 0.80)  # coupon's documented rule, the cases' basis
    spread_a, spread_c = _grid_sites(20, 1.0, 12.0, (11, 13))  # 20 mm2 spread (y 13 to 49 mm)
    clusters = [(30.0, 90.0), (55.0, 110.0), (25.0, 135.0)]  # more than CLUSTER_MM from every spread site

    def letter(share):
        each = 20.0 * share / (1 - share) / 3  # cluster area so that the clusters carry `share`
        a = np.r_[spread_a, np.full(3, each)]
        c = np.r_[spread_c, np.asarray(clusters)]
        return distribution_letter(a, c, RATED, 10.0, "5")

    # rust touches 23 of the 113 cells of 10 mm (<= 25 %), so the cluster share decides
    assert letter(0.81) == "S"
    assert letter(0.79) == "G"


def test_spot_needs_few_cells():
    # three large clusters carry 90 % but rust touches more than 25 % of the 10 mm cells: G
    assert SPOT_MAX_CELL_SHARE == 0.25  # coupon's documented rule (panel_ratings), the case's basis
    spread_a, spread_c = _grid_sites(36, 1.0, 10.5, (6, 6))  # 36 of the 113 cells touched (y 6 to 59 mm)
    a = np.r_[spread_a, np.full(3, 108.0)]
    c = np.r_[spread_c, [[30.0, 90.0], [55.0, 110.0], [25.0, 135.0]]]
    assert distribution_letter(a, c, RATED, 10.0, "4") == "G"
    assert distribution_letter(a[36:], c[36:], RATED, 10.0, "4") == "S"


def test_spot_and_general_read_general_not_hybrid():
    # a mix of spot clusters and spread spots is G (H is kept for pinpoint mixed with larger rust)
    a1, c1 = _grid_sites(5, 3.0, 2.0, (20, 30))
    a2, c2 = _grid_sites(40, 1.5, 10.0, (8, 8))
    assert distribution_letter(np.r_[a1, a2], np.r_[c1, c2], RATED, 10.0, "5") == "G"


def test_masks_and_edge_band_reduce_rated_area():
    from coupon.segment.panels import base_mask

    # 75 x 150 mm at 10 px/mm, 5 mm edge band, a 20 x 30 mm label and a 10 mm hole (geometry, analytic)
    m = base_mask((1500, 750), 10.0, 5.0, (("rect", 10, 10, 20, 30), ("circle", 37.5, 20, 10)))
    expected_mm2 = 65 * 140 - 20 * 30 - np.pi * 25
    assert m.sum() / 100 == pytest.approx(expected_mm2, rel=0.005)
