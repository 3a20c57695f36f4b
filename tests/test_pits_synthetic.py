"""Pit analysis on synthetic coupons with known pits (ground truth from coupon.synth.pits)."""

from __future__ import annotations

import numpy as np
import pytest

from coupon.errors import AnalysisError
from coupon.ratings.pitting import summarise_pits
from coupon.ratings.scales import ASTM_G46_DENSITY
from coupon.segment.pits import PitSettings, analyse_pits, default_min_pit_mm2
from coupon.synth.pits import pitted_coupon_scene

CASES = {
    "brushed-20px": dict(seed=1),
    "ground-20px": dict(seed=2, texture="ground"),
    "brushed-10px": dict(seed=4, px_per_mm=10.0, radius_mm=(0.4, 1.5)),
    "bright-rim": dict(seed=3, look="bright-rim"),
}
_cache: dict = {}


def _run(name):
    if name not in _cache:
        rgb, height, truth = pitted_coupon_scene(**CASES[name])
        res = analyse_pits(rgb, PitSettings(px_per_mm=truth["px_per_mm"], look=truth["look"]), height)
        _cache[name] = (res, truth)
    return _cache[name]


@pytest.mark.parametrize("name", list(CASES))
def test_count_density_sizes_depth_against_truth(name):
    res, truth = _run(name)
    t = truth["counted"]
    p = res.pits
    # the scene holds touching pairs, pits in and across the edge band, a light gradient, noise and JPEG
    assert t["touching_pairs"] >= 4
    assert sum(q["kind"] in ("in_band", "across_band") for q in truth["pits"]) >= 4
    assert abs(len(p) - t["count"]) <= 0.05 * t["count"]
    assert res.analysed_area_mm2 == pytest.approx(truth["analysed_area_mm2"], rel=0.005)
    s, _, _ = summarise_pits(p, res.analysed_area_mm2, res.perimeter_mm)
    assert s["g46_density"] == ASTM_G46_DENSITY.rate(t["density_per_m2"])
    for stat in ("mean_area_mm2", "median_area_mm2", "max_area_mm2"):
        assert s[stat] == pytest.approx(t[stat], rel=0.10), stat
    assert s["max_depth_mm"] == pytest.approx(t["max_depth_mm"], rel=0.10)


def test_pits_found_where_they_are():
    # every counted true pit has a detection within a quarter of its radius (or 0.1 mm); none are invented
    res, truth = _run("brushed-20px")
    from scipy.spatial import cKDTree

    true = [q for q in truth["pits"] if q["counted"]]
    tree = cKDTree([[q["x_mm"], q["y_mm"]] for q in true])
    d, i = tree.query(res.pits[["x_mm", "y_mm"]].to_numpy())
    tol = np.array([max(0.1, 0.25 * true[k]["radius_mm"]) for k in i])
    assert (d <= tol).mean() >= 0.97
    assert len(set(i[d <= tol])) == (d <= tol).sum()  # no true pit claimed twice
    # no pit of the edge band is counted
    band = [q for q in truth["pits"] if q["kind"] == "in_band"]
    if band:
        db, _ = cKDTree(res.pits[["x_mm", "y_mm"]].to_numpy()).query([[q["x_mm"], q["y_mm"]] for q in band])
        assert (db > 0.3).all()


def test_touching_pits_are_split():
    res, truth = _run("brushed-20px")
    assert res.details["split_added"] >= truth["counted"]["touching_pairs"] - 2


def test_scale_invariance_mm2():
    # same pits at 10 and 20 px/mm: counts equal within 2, mean area in mm2 within 5 %
    out = []
    for s in (10.0, 20.0):
        rgb, h, truth = pitted_coupon_scene(seed=11, px_per_mm=s, radius_mm=(0.45, 1.2), n_pits=50)
        out.append(analyse_pits(rgb, PitSettings(px_per_mm=s)).pits)
    assert abs(len(out[0]) - len(out[1])) <= 2
    assert out[0]["area_mm2"].mean() == pytest.approx(out[1]["area_mm2"].mean(), rel=0.05)


def test_whole_frame_close_up():
    # a crop inside the coupon: no background to find, the frame border is the region border
    rgb, h, truth = pitted_coupon_scene(seed=5, n_pits=60)
    x0, y0, w, hh = truth["coupon_box_mm"]
    s = truth["px_per_mm"]
    crop = rgb[int((y0 + 5) * s):int((y0 + hh - 5) * s), int((x0 + 5) * s):int((x0 + w - 5) * s)]
    with pytest.raises(AnalysisError, match="no coupon found"):
        analyse_pits(crop, PitSettings(px_per_mm=s))
    res = analyse_pits(crop, PitSettings(px_per_mm=s, whole_frame=True, edge_mm=0.5))
    exp_area = (crop.shape[0] / s - 1.0) * (crop.shape[1] / s - 1.0)
    assert res.analysed_area_mm2 == pytest.approx(exp_area, rel=0.01)
    assert len(res.pits) > 30


def test_no_pits_on_a_clean_coupon():
    rgb, h, truth = pitted_coupon_scene(seed=6, n_pits=0, touching_pairs=0, near_edge=0, texture="ground")
    res = analyse_pits(rgb, PitSettings(px_per_mm=truth["px_per_mm"]), h)
    assert len(res.pits) == 0
    assert list(res.pits.columns)[:3] == ["pit_id", "x_mm", "y_mm"]


def test_default_min_pit_from_resolution():
    # 16 px of area: 0.16 mm2 at 10 px/mm, 0.04 mm2 at 20 px/mm, 0.01 at 40 px/mm
    assert default_min_pit_mm2(10) == pytest.approx(0.16)
    assert default_min_pit_mm2(40) == pytest.approx(0.01)
    assert PitSettings(px_per_mm=20).min_area_mm2 == pytest.approx(0.04)


@pytest.mark.parametrize("bad,match", [
    (np.full((400, 600, 3), 0.5, np.float32), "blank"),
    (np.full((400, 600, 3), 1.0, np.float32), "blank"),
    (np.zeros((400, 600, 3), np.float32) + np.linspace(0, 0.03, 600, dtype=np.float32)[None, :, None], "underexposed"),
])
def test_bad_pictures_refused(bad, match):
    with pytest.raises(AnalysisError, match=match):
        analyse_pits(bad, PitSettings(px_per_mm=10))


def test_overexposed_coupon_refused():
    rgb, _, truth = pitted_coupon_scene(seed=8, n_pits=20, coupon_mm=(40, 30))
    hot = np.clip(rgb * 2.5, 0, 1)
    with pytest.raises(AnalysisError, match="overexposed"):
        analyse_pits(hot, PitSettings(px_per_mm=truth["px_per_mm"]))


def test_height_map_of_wrong_size_refused():
    rgb, h, truth = pitted_coupon_scene(seed=8, n_pits=20, coupon_mm=(40, 30))
    with pytest.raises(AnalysisError, match="registered pixel for pixel"):
        analyse_pits(rgb, PitSettings(px_per_mm=truth["px_per_mm"]), h[:-3])
