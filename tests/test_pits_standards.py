"""Pit ratings and mass-loss numbers against the published standards (ASTM G46, ASTM G1)."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from coupon.ratings import mass_loss as ml
from coupon.ratings.pitting import MassLoss, summarise_pits
from coupon.ratings.scales import ASTM_G46_DENSITY, ASTM_G46_DEPTH, ASTM_G46_SIZE

# ASTM G46 standard rating charts, chart values from memory (see shared reference standards.md):
G46_CHARTS = [
    (ASTM_G46_DENSITY, [("A-1", 2.5e3), ("A-2", 1e4), ("A-3", 5e4), ("A-4", 1e5), ("A-5", 5e5)]),  # pits/m2
    (ASTM_G46_SIZE, [("B-1", 0.5), ("B-2", 2.0), ("B-3", 8.0), ("B-4", 12.5), ("B-5", 24.5)]),  # mm2
    (ASTM_G46_DEPTH, [("C-1", 0.4), ("C-2", 0.8), ("C-3", 1.6), ("C-4", 3.2), ("C-5", 6.4)]),  # mm
]


@pytest.mark.parametrize("scale,charts", G46_CHARTS, ids=["density-A", "size-B", "depth-C"])
def test_g46_chart_values_and_class_boundaries(scale, charts):
    # ASTM G46 chart values (from memory): each chart value rates as its own chart
    for name, value in charts:
        assert scale.rate(value) == name
    # class boundaries: coupon's documented choice, the geometric mean of neighbouring chart values
    for (lo_name, lo), (hi_name, hi) in zip(charts, charts[1:]):
        b = math.sqrt(lo * hi)
        assert scale.rate(b * 0.999) == lo_name
        assert scale.rate(b * 1.001) == hi_name
        assert scale.rate(b) == lo_name  # a value on the boundary goes to the lower chart
    # beyond the ends: the end charts; no pits: no rating
    assert scale.rate(charts[0][1] / 100) == charts[0][0]
    assert scale.rate(charts[-1][1] * 100) == charts[-1][0]
    assert scale.rate(0.0) is None


def test_g1_worked_example_by_hand():
    # ASTM G1 corrosion rate CR = K W / (A T D); K = 8.76e4 for mm/y (secondary), 3.45e6 for mpy (from memory).
    # Worked by hand: W = 0.650 g, A = 28.5 cm2, T = 168 h, D = 7.86 g/cm3
    #   A T D = 28.5 x 168 x 7.86 = 4788 x 7.86 = 37633.68
    #   mm/y: 8.76e4 x 0.650 = 56940;   56940 / 37633.68 = 1.51301
    #   mpy:  3.45e6 x 0.650 = 2242500; 2242500 / 37633.68 = 59.5877
    atd = 28.5 * 168 * 7.86
    assert atd == pytest.approx(37633.68)
    assert ml.corrosion_rate(0.650, 28.5, 168, 7.86, "mm/y") == pytest.approx(56940 / 37633.68, rel=1e-12)
    assert ml.corrosion_rate(0.650, 28.5, 168, 7.86, "mm/y") == pytest.approx(1.5130, abs=5e-5)
    assert ml.corrosion_rate(0.650, 28.5, 168, 7.86, "mpy") == pytest.approx(59.59, abs=5e-3)
    # 1 mpy = 0.0254 mm/y (exact, 1 mil = 0.0254 mm): the two constants agree to their 3 figures
    mm_y = ml.corrosion_rate(0.650, 28.5, 168, 7.86, "mm/y")
    assert ml.corrosion_rate(0.650, 28.5, 168, 7.86, "mpy") * 0.0254 == pytest.approx(mm_y, rel=2e-3)


def test_average_penetration_is_rate_times_time():
    # 10 W / (A D) mm = CR(mm/y) x T / 8760 h (ASTM G1 formula rearranged)
    d = ml.average_penetration_mm(0.650, 28.5, 7.86)
    assert d == pytest.approx(10 * 0.650 / (28.5 * 7.86))
    assert d == pytest.approx(ml.corrosion_rate(0.650, 28.5, 168, 7.86) * 168 / 8760)


def test_pitting_factor_uniform_attack_is_one():
    # ASTM G46 (secondary): pitting factor P / d; 1 means uniform attack
    d = 0.029
    assert ml.pitting_factor(ml.deepest_penetration_mm(0.0, d), d) == pytest.approx(1.0)
    assert ml.pitting_factor(ml.deepest_penetration_mm(0.445, d), d) == pytest.approx((0.445 + d) / d)


def test_carbon_steel_density_default():
    # ASTM G1 appendix density of carbon steel, 7.86 g/cm3 (from memory)
    assert ml.CARBON_STEEL_DENSITY_G_CM3 == 7.86
    assert "G1" in ml.CARBON_STEEL_DENSITY_SOURCE


@pytest.mark.parametrize("args,word", [
    ((0.0, 28.5, 168, 7.86), "mass loss"), ((-0.1, 28.5, 168, 7.86), "mass loss"),
    ((0.65, 0.0, 168, 7.86), "area"), ((0.65, -2, 168, 7.86), "area"),
    ((0.65, 28.5, 0, 7.86), "time"), ((0.65, 28.5, 168, float("nan")), "density"),
])
def test_rate_refuses_non_positive_inputs(args, word):
    with pytest.raises(ValueError, match=word):
        ml.corrosion_rate(*args)


def test_summary_density_and_ratings_from_a_table():
    # 50 pits on 1000 mm2 = 1e-3 m2: 5e4 pits/m2 (the A-3 chart value), 5 per cm2
    rng = np.random.default_rng(0)
    pits = pd.DataFrame({"x_mm": rng.uniform(0, 40, 50), "y_mm": rng.uniform(0, 25, 50),
                         "area_mm2": np.full(50, 2.0), "depth_mm": np.linspace(0.1, 0.8, 50)})
    s, extra, _ = summarise_pits(pits, 1000.0, 130.0, MassLoss(650, 168, 7.86, 28.5))
    assert s["density_per_m2"] == pytest.approx(5e4)
    assert s["density_per_cm2"] == pytest.approx(5.0)
    assert s["g46_density"] == "A-3" and s["g46_size"] == "B-2"
    # depth rating on the mean of the ten deepest: 0.8 down to 0.8 - 9 x 0.7/49
    ten = np.linspace(0.1, 0.8, 50)[-10:].mean()
    assert extra["mean_depth_deepest_mm"] == pytest.approx(ten)
    # 0.736 mm lies between the C-2 (0.8 mm) and C-1 (0.4 mm) chart values, nearer C-2 on a log scale
    # (ASTM G46 chart C, values from memory; the geometric-mean cut-off 0.566 mm is coupon's choice)
    assert ten == pytest.approx(0.7357, abs=1e-4) and s["g46_depth"] == "C-2"
    assert s["pitted_area_pct"] == pytest.approx(10.0)
    # ASTM G1 CR = K W / (A T D), K = 8.76e4 mm/y (secondary): 8.76e4 x 0.650 / (28.5 x 168 x 7.86)
    assert s["corrosion_rate_mm_y"] == pytest.approx(1.5130, abs=5e-5)
    # average penetration 10 W / (A D) = 6.50 / 224.01 = 0.02902 mm; deepest penetration from the
    # original surface 0.8 + 0.02902 mm; pitting factor (ASTM G46, secondary) = 0.82902 / 0.02902 = 28.57
    assert s["average_penetration_mm"] == pytest.approx(0.029017, abs=1e-6)
    assert s["pitting_factor"] == pytest.approx(28.57, abs=0.01)


def test_summary_without_pits_keeps_every_field():
    empty = pd.DataFrame({c: pd.Series(dtype=float) for c in ("x_mm", "y_mm", "area_mm2", "depth_mm")})
    s, _, warnings = summarise_pits(empty, 500.0, 90.0)
    assert s["pit_count"] == 0 and s["density_per_m2"] == 0.0 and s["g46_density"] == ""
    assert math.isnan(s["mean_area_mm2"]) and math.isnan(s["clark_evans_r"])
    assert any("no pits" in w for w in warnings)
