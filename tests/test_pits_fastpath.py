"""Pit analysis: the fast paths of the per-image job agree with plain library computations.

Reference routines: numpy (``any``, ``linalg.lstsq``, ``nanpercentile``), OpenCV drawing of the
test pictures. Scenes are invented (synthetic ground truth).
"""

from __future__ import annotations

import cv2
import numpy as np
import pandas as pd
import pytest

from coupon.io.atomic import write_float_tiff
from coupon.io.heightmap import load_height_map
from coupon.ratings.scales import ASTM_G46_SIZE
from coupon.report.pit_figures import PIT_PALETTE, overlay_image, size_class
from coupon.segment.pits import (_CLIPPED, _percentiles, clipped_fraction, exposure_sample, label_components,
                                 measure_pits, surface_reference)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_exposure_sample_and_clipped_fraction_match_numpy(seed):
    # reference: numpy slicing (the centre pixel of each block) and any() over the channels
    rng = np.random.default_rng(seed)
    rgb = rng.uniform(0.9, 1.0, (1230, 770, 3)).astype(np.float32)
    grey = cv2.cvtColor(rgb, cv2.COLOR_RGB2GRAY)
    g, bright = exposure_sample(rgb, grey, samples=20_000)
    k = int(np.sqrt(rgb.shape[0] * rgb.shape[1] / 20_000))
    hb, wb = rgb.shape[0] // k, rgb.shape[1] // k
    assert np.array_equal(g, grey[k // 2::k, k // 2::k][:hb, :wb])
    assert np.array_equal(bright, rgb[k // 2::k, k // 2::k][:hb, :wb].max(axis=2))
    where = rng.random(bright.shape) < 0.6
    sub = rgb[k // 2::k, k // 2::k][:hb, :wb]
    ref = float((sub[where] >= _CLIPPED).any(axis=1).mean())
    assert clipped_fraction(bright, where) == pytest.approx(ref, abs=1e-12)
    assert clipped_fraction(bright, np.zeros(bright.shape, bool)) == 0.0
    u8 = np.clip(np.rint(rgb * 255), 0, 255).astype(np.uint8)
    _, b8 = exposure_sample(u8, cv2.cvtColor(u8, cv2.COLOR_RGB2GRAY), samples=20_000)
    assert np.array_equal(b8, u8[k // 2::k, k // 2::k][:hb, :wb].max(axis=2))


def test_percentiles_of_eight_bit_values_match_numpy():
    # reference: numpy.percentile (linear interpolation), from the histogram without sorting
    rng = np.random.default_rng(5)
    for n in (1, 2, 7, 1000, 250_001):
        v = rng.integers(0, 256, n).astype(np.uint8)
        qs = [0, 1, 37.5, 95, 99, 100]
        np.testing.assert_allclose(_percentiles(v, qs), np.percentile(v.astype(np.float64) / 255.0, qs),
                                   rtol=0, atol=1e-12)


def test_reference_surface_matches_lstsq_on_a_clean_quadratic():
    # reference: numpy.linalg.lstsq (SVD) on the same design matrix; the normal equations must agree
    h, w = 600, 900
    rr, cc = np.mgrid[0:h, 0:w]
    y, x = rr / w, cc / w
    true = np.array([2.5, 0.03, -0.02, 0.011, -0.007, 0.004])
    z = (true[0] + true[1] * x + true[2] * y + true[3] * x * x + true[4] * x * y + true[5] * y * y).astype(np.float64)
    coef, info = surface_reference(z, np.ones((h, w), bool))
    np.testing.assert_allclose(coef, true, rtol=0, atol=1e-9)
    assert info["residual_sigma_mm"] < 1e-9 and info["kept_fraction"] == 1.0


def test_depth_in_float32_matches_a_float64_computation():
    # reference: the deepest point below the fitted reference, computed in float64 with numpy
    rng = np.random.default_rng(4)
    h, w = 400, 500
    rr, cc = np.mgrid[0:h, 0:w]
    height = (10.0 + 2e-4 * cc - 1e-4 * rr + 0.001 * rng.standard_normal((h, w))).astype(np.float32)
    labels = np.zeros((h, w), np.int32)
    for k, (r, c, rad, depth) in enumerate([(100, 100, 12, 0.2), (250, 300, 20, 0.45), (320, 120, 8, 0.05)], 1):
        disc = (rr - r) ** 2 + (cc - c) ** 2 <= rad**2
        labels[disc] = k
        height[disc] -= np.float32(depth * (1 - ((rr[disc] - r) ** 2 + (cc[disc] - c) ** 2) / rad**2))
    table, _, details = measure_pits(labels.copy(), 10.0, height, np.ones((h, w), bool))
    scale = float(max(h, w))
    c6, _ = surface_reference(height, np.ones((h, w), bool), exclude=labels)
    for pid_row in table.itertuples():
        # measure_pits renumbers in reading order: find the original label under the centroid
        k = labels[int(pid_row.y_mm * 10), int(pid_row.x_mm * 10)]
        m = labels == k
        yy, xx = rr[m] / scale, cc[m] / scale
        ref = c6[0] + c6[1] * xx + c6[2] * yy + c6[3] * xx * xx + c6[4] * xx * yy + c6[5] * yy * yy
        expect = float(np.max(ref - height[m].astype(np.float64)))
        assert pid_row.depth_mm == pytest.approx(expect, abs=2e-6)
    assert details["scale_px"] == scale and table["depth_mm"].max() == pytest.approx(0.45, abs=0.01)


@pytest.mark.parametrize("shape", [(2401, 3601), (2402, 4800), (3000, 4503)])
def test_reduced_overlay_puts_outlines_on_the_pits(shape):
    # a big picture is sampled at the centre pixel of each k x k block; outlines must land on the pits
    h, w = shape
    rgb = np.full((h, w, 3), 0.6, np.float32)
    labels = np.zeros((h, w), np.int32)
    centres = [(500, 700, 60), (1500, 2200, 90), (2000, 3300, 40)]
    for k, (r, c, rad) in enumerate(centres, 1):
        cv2.circle(labels, (c, r), rad, k, -1)
        cv2.circle(rgb, (c, r), rad, (0.2, 0.2, 0.2), -1)
    analysed = np.zeros((h, w), bool)
    analysed[100:-100, 100:-100] = True
    s = 10.0
    pits = pd.DataFrame({"pit_id": [1, 2, 3], "x_mm": [c / s for _, c, _ in centres],
                         "y_mm": [r / s for r, _, _ in centres],
                         "area_mm2": [np.pi * (rad / s) ** 2 for *_, rad in centres],
                         "eq_diameter_mm": [2 * rad / s for *_, rad in centres]})
    out = overlay_image(rgb, labels, analysed, pits, s)
    k = int(np.ceil(max(h, w) / 2400))
    n_r, n_c = len(range(k // 2, h, k)), len(range(k // 2, w, k))
    assert out.shape[1] == n_c and out.shape[0] > n_r  # the legend strip below
    for (r, c, rad), cls in zip(centres, size_class(pits["area_mm2"].to_numpy())):
        # the reduced pixel holding the top of the outline shows the pit's size-chart colour
        rs = next(i for i in range(n_r) if labels[k // 2 + i * k, c - (c - k // 2) % k] > 0)
        col = out[rs, (c - k // 2) // k].astype(int)
        np.testing.assert_array_equal(col, PIT_PALETTE[cls])
        # the pit's centre keeps the picture's grey (not dimmed: inside the analysed region)
        np.testing.assert_array_equal(out[(r - k // 2) // k, (c - k // 2) // k], [51, 51, 51])
    # outside the analysed region the picture is dimmed: 0.6 * 255 = 153 -> 0.45 x = 69 (rounded)
    np.testing.assert_array_equal(out[0, 0], [69, 69, 69])


def test_overlay_never_draws_on_the_callers_picture():
    rgb = np.full((300, 400, 3), 128, np.uint8)
    labels = np.zeros((300, 400), np.int32)
    cv2.circle(labels, (200, 150), 20, 1, -1)
    analysed = np.zeros((300, 400), bool)
    analysed[20:-20, 20:-20] = True
    pits = pd.DataFrame({"pit_id": [1], "x_mm": [20.0], "y_mm": [15.0], "area_mm2": [12.6], "eq_diameter_mm": [4.0]})
    before = rgb.copy()
    overlay_image(rgb, labels, analysed, pits, 10.0, max_side_px=400)
    np.testing.assert_array_equal(rgb, before)


def test_label_components_reads_bool_and_uint8_alike():
    rng = np.random.default_rng(9)
    mask = cv2.GaussianBlur(rng.random((90, 110)), (0, 0), 2) > 0.52
    n1, l1 = label_components(mask)
    n2, l2 = label_components(mask.astype(np.uint8))
    n3, l3 = label_components(mask[:, ::2])  # not contiguous: copied
    assert n1 == n2 and np.array_equal(l1, l2)
    assert n3 == label_components(np.ascontiguousarray(mask[:, ::2]))[0]


def test_height_map_spread_check_matches_nanpercentile(tmp_path):
    # reference: numpy.nanpercentile over every value (the loader samples a quarter of a million)
    rng = np.random.default_rng(5)
    z_um = rng.normal(0, 8, (1200, 1100)).astype(np.float32)
    z_um[rng.random(z_um.shape) < 0.1] = np.nan
    z_um[0, :5] = np.inf
    write_float_tiff(tmp_path / "h.tiff", z_um)
    mm = load_height_map(tmp_path / "h.tiff", "um", shape_rc=z_um.shape)
    assert mm.dtype == np.float32 and np.isnan(mm[0, :5]).all()
    lo, hi = np.nanpercentile(np.where(np.isfinite(z_um), z_um, np.nan) / 1000, [1, 99])
    # the spread the loader checks; sampled on a grid it stays within a few percent of the full one
    step = max(1, int(np.sqrt(mm.size / 2.5e5)))
    sub = mm[::step, ::step]
    slo, shi = np.percentile(sub[np.isfinite(sub)], [1, 99])
    assert (shi - slo) == pytest.approx(hi - lo, rel=0.03)
    np.testing.assert_allclose(mm[np.isfinite(mm)], z_um[np.isfinite(z_um)] / 1000, rtol=1e-6)


def test_size_class_matches_the_scale_one_by_one():
    # reference: ASTM_G46_SIZE.rate (ASTM G46 size charts, values from memory), applied value by value
    rng = np.random.default_rng(2)
    areas = np.concatenate([10 ** rng.uniform(-3, 2.5, 500), [0.0, -1.0, np.nan, np.inf],
                            ASTM_G46_SIZE.boundaries(), [v for _, v in ASTM_G46_SIZE.charts]])
    expect = [ASTM_G46_SIZE.rate(a) if np.isfinite(a) and a > 0 else None for a in areas]
    assert size_class(areas) == [e or "B-1" for e in expect]


@pytest.mark.parametrize("seed", [3, 4])
def test_eight_bit_pixels_give_the_float_analysis(seed):
    # ``coupon pits`` analyses an 8-bit scan from its decoded pixels (no float copy); the reference is the
    # float path on the same pixels (OpenCV's float luma), so pit for pit the results must agree: the 8-bit
    # luma is rounded to 1/255, which may move an outline pixel here and there, nothing more
    from coupon.segment.pits import PitSettings, analyse_pits, grey_level
    from coupon.synth.pits import pitted_coupon_scene

    rgb, _, truth = pitted_coupon_scene(seed=seed, coupon_mm=(40, 30), margin_mm=4, px_per_mm=20.0, n_pits=80,
                                        touching_pairs=10, near_edge=4)
    u8 = np.clip(np.rint(rgb * 255), 0, 255).astype(np.uint8)
    f32 = u8.astype(np.float32) / np.float32(255)
    np.testing.assert_allclose(grey_level(u8), grey_level(f32), atol=0.5 / 255 + 1e-6)
    st = PitSettings(px_per_mm=20.0)
    a, b = analyse_pits(f32, st), analyse_pits(u8, st)
    assert len(b.pits) == len(a.pits) > 50
    np.testing.assert_allclose(b.pits["area_mm2"], a.pits["area_mm2"], rtol=0.03, atol=2 / 400)
    np.testing.assert_allclose(b.pits[["x_mm", "y_mm"]], a.pits[["x_mm", "y_mm"]], atol=0.02)
    # the region's outline may move by a pixel where the rounded luma tips the threshold
    assert np.count_nonzero(a.analysed != b.analysed) <= 2e-3 * np.count_nonzero(a.analysed)
    assert b.analysed_area_mm2 == pytest.approx(a.analysed_area_mm2, rel=2e-3)
    assert b.details["clipped_pct"] == pytest.approx(a.details["clipped_pct"], abs=0.01)
    # the overlay drawn from the 8-bit pixels is the one drawn from the float copy
    assert np.array_equal(overlay_image(u8, b.labels, b.analysed, b.pits, 20.0),
                          overlay_image(f32, b.labels, b.analysed, b.pits, 20.0))


def test_clipped_fraction_on_eight_bit_pixels():
    # 254 is the first 8-bit level at or above the float clip level (254 / 255 = 0.9961 >= 0.995 > 253 / 255)
    u8 = np.array([[[253, 0, 0], [254, 0, 0], [0, 0, 255], [10, 20, 30]]], np.uint8)
    where = np.ones((1, 4), bool)
    for px in (u8, u8.astype(np.float32) / np.float32(255)):
        _, bright = exposure_sample(px, cv2.cvtColor(px, cv2.COLOR_RGB2GRAY))
        assert clipped_fraction(bright, where) == pytest.approx(0.5)


def test_overlay_from_a_background_made_ahead_is_the_same_overlay():
    # the pits command draws the overlay's background while the pits are found (analyse_pits's
    # on_region hook); the overlay drawn on it must be the one drawn in one go
    from coupon.report.pit_figures import overlay_background
    from coupon.segment.pits import PitSettings, analyse_pits
    from coupon.synth.pits import pitted_coupon_scene

    rgb, _, _ = pitted_coupon_scene(seed=44, coupon_mm=(52, 20), margin_mm=2, px_per_mm=45.0, n_pits=25)
    u8 = np.clip(np.rint(rgb * 255), 0, 255).astype(np.uint8)
    seen = []
    res = analyse_pits(u8, PitSettings(px_per_mm=45.0), on_region=lambda pic, an: seen.append((pic, an.copy())))
    assert len(seen) == 1 and seen[0][0] is u8
    np.testing.assert_array_equal(seen[0][1], res.analysed)
    assert max(u8.shape[:2]) > 2400 and len(res.pits) > 10  # the reduced path (k > 1), with pits drawn
    bg = overlay_background(seen[0][0], seen[0][1])
    ahead = overlay_image(u8, res.labels, res.analysed, res.pits, 45.0, background=bg)
    np.testing.assert_array_equal(ahead, overlay_image(u8, res.labels, res.analysed, res.pits, 45.0))
