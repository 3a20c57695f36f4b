"""One droplet frame: drop outline, pH zones, rust, radial profile, checked against the synthetic truth
and against reference libraries (scikit-image, OpenCV)."""

from __future__ import annotations

import dataclasses

import cv2
import numpy as np
import pytest
from skimage import measure

from coupon.segment.droplet import (DropletSettings, analyse_frame, moment_ellipse, normalised_radius,
                                    series_events)
from coupon.synth.droplet import DropletSeriesSpec, _Static, common_practice_spec, render_frame
from tests.droplet_support import calibrated_model

SPEC = DropletSeriesSpec()


@pytest.fixture(scope="module")
def model():
    return calibrated_model()


@pytest.fixture(scope="module")
def frames(model):
    st = _Static(SPEC, 1)
    out = []
    for i in (0, 1, 3, 6, 9):
        rgb, truth = render_frame(SPEC, i, seed=1, static=st)
        out.append((truth, analyse_frame(rgb, model, SPEC.px_per_mm)))
    return out


def test_drop_area_within_3_percent(frames):
    # issue 4 check value: drop area within 3 % of the synthetic truth
    for truth, res in frames:
        assert res.drop_found
        assert res.measures["drop_area_mm2"] == pytest.approx(truth["drop_area_mm2"], rel=0.03)
        assert res.measures["drop_diameter_mm"] == pytest.approx(truth["drop_diameter_mm"], rel=0.015)
        cx, cy = truth["centre_xy_mm"]
        assert abs(res.measures["centre_x_mm"] - cx) < 0.05 and abs(res.measures["centre_y_mm"] - cy) < 0.05


def test_zone_areas_within_5_points(frames):
    # issue 4 check value: zone areas within 5 percentage points of the drop area
    for truth, res in frames:
        m = res.measures
        assert abs(m["acidic_area_pct"] - truth["acidic_pct"]) <= 5.0
        assert abs(m["basic_area_pct"] - truth["basic_pct"]) <= 5.0
        assert abs(m["neutral_area_pct"] - truth["neutral_pct"]) <= 5.0
        assert abs(m["rust_area_pct"] - truth["rust_pct"]) <= 5.0


def test_centre_and_rim_ph_within_half_a_unit(frames):
    # issue 4 check value: centre (r < 0.2) and rim (0.8 < r < 1) pH within 0.5 of the truth
    for truth, res in frames:
        assert abs(res.measures["ph_centre"] - truth["ph_centre"]) <= 0.5
        assert abs(res.measures["ph_rim"] - truth["ph_rim"]) <= 0.5


def test_area_agrees_with_skimage_and_opencv(frames):
    # reference libraries: scikit-image regionprops and OpenCV contour area of the same mask
    truth, res = frames[-1]
    mask = res.drop_mask
    px_mm2 = 1.0 / res.work_px_per_mm ** 2
    props = measure.regionprops(mask.astype(np.uint8))[0]
    assert res.measures["drop_area_mm2"] == pytest.approx(props.area * px_mm2, rel=1e-6)
    contours, _ = cv2.findContours(mask.astype(np.uint8), cv2.RETR_EXTERNAL, cv2.CHAIN_APPROX_NONE)
    cv_area = max(cv2.contourArea(c) for c in contours)
    # OpenCV's polygon through pixel centres misses half a pixel along the outline
    assert res.measures["drop_area_mm2"] == pytest.approx(cv_area * px_mm2, rel=0.01)
    # moment ellipse agrees with scikit-image's (same second moments)
    _, _, a, b, _ = moment_ellipse(mask)
    assert 2 * a == pytest.approx(props.axis_major_length, rel=1e-3)
    assert 2 * b == pytest.approx(props.axis_minor_length, rel=1e-3)


def test_zone_areas_are_direct_pixel_counts(frames):
    # reference: count the pixels of the returned pH map directly
    s = DropletSettings()
    for _, res in frames:
        ph, drop = res.ph_map, res.drop_mask
        n = drop.sum()
        with np.errstate(invalid="ignore"):
            assert res.measures["acidic_area_pct"] == pytest.approx(100 * np.sum(ph < s.acidic_below) / n, abs=1e-9)
            assert res.measures["basic_area_pct"] == pytest.approx(100 * np.sum(ph > s.basic_above) / n, abs=1e-9)
        assert res.measures["indicator_coverage_pct"] == pytest.approx(100 * np.isfinite(ph[drop]).mean(), abs=1e-9)
        assert res.measures["rust_area_pct"] == pytest.approx(100 * res.rust_mask.sum() / n, abs=1e-9)


def test_radial_profile_shape(frames):
    truth, res = frames[-1]
    assert len(res.ring_r_norm) == 20 and res.ring_r_norm[0] == pytest.approx(0.025)
    # acidic centre, basic rim as a measured curve
    assert res.ring_ph_median[0] < 5.0 and res.ring_ph_median[-1] > 9.0
    assert res.ring_n_px.sum() == np.isfinite(res.ph_map).sum()


def test_common_practice_scene(model):
    # Common practice (the droplet test's known outcome): a 10 mm drop on steel ends with its centre
    # near pH 4 and its rim near pH 10, with rust between them.
    spec = common_practice_spec()
    rgb, truth = render_frame(spec, spec.n_frames - 1, seed=7)
    res = analyse_frame(rgb, model, spec.px_per_mm)
    m = res.measures
    assert m["drop_diameter_mm"] == pytest.approx(truth["drop_diameter_mm"], rel=0.02)
    assert m["ph_centre"] < 6.0 and abs(m["ph_centre"] - 4.0) <= 0.5
    assert m["ph_rim"] > 8.0 and abs(m["ph_rim"] - 10.0) <= 0.5
    assert m["rust_area_pct"] > 0.5
    assert m["acidic_r_norm"] < m["rust_r_norm"] < m["basic_r_norm"]
    assert m["rust_r_mm"] == pytest.approx(spec.rust_r_mm, abs=0.2)


@pytest.mark.parametrize("ph", [3.5, 4.0, 4.5, 5.0])
def test_acidic_indicator_is_not_rust(model, ph):
    # orange-brown acid indicator over grey steel is close to rust in hue: it must not count as rust
    spec = DropletSeriesSpec(ph_start=ph, ph_centre_end=ph, ph_rim_end=ph, develop_min=0, rust_max_cover=0)
    rgb, truth = render_frame(spec, 4, seed=3)
    res = analyse_frame(rgb, model, spec.px_per_mm)
    assert res.measures["rust_area_pct"] < 0.2
    assert abs(res.measures["ph_median"] - ph) <= 0.5


def test_rust_in_a_neutral_drop_is_found_and_not_read_as_acid(model):
    spec = DropletSeriesSpec(ph_start=7.0, ph_centre_end=7.0, ph_rim_end=7.0, develop_min=0, rust_start_min=0,
                             rust_full_min=1)
    rgb, truth = render_frame(spec, 5, seed=4)
    res = analyse_frame(rgb, model, spec.px_per_mm)
    assert truth["rust_pct"] > 8
    assert res.measures["rust_area_pct"] == pytest.approx(truth["rust_pct"], abs=2.5)
    # without the rust test, rust would read as pH about 4-5 (acid end of the path)
    assert res.measures["acidic_area_pct"] < 1.0
    overlap = (res.rust_mask & res.drop_mask).sum() / max(1, res.rust_mask.sum())
    assert overlap == 1.0


def test_rust_would_read_as_acid_on_colour_alone(model):
    # the reason for the darkness test: rust pixels are within the path tolerance near the acid end
    from coupon.synth.droplet import RUST_SRGB

    ph, dist = model.map_rgb(np.array([[RUST_SRGB]], np.float32))
    assert np.isfinite(ph[0, 0]) and ph[0, 0] < 6.0


def test_dried_frame_is_no_drop_not_an_error(model):
    spec = dataclasses.replace(SPEC, dried_after_min=20.0)
    rgb, truth = render_frame(spec, 6, seed=1)
    assert not truth["drop_found"] and truth["rust_area_mm2"] > 1.0  # a rust ring is left on the metal
    res = analyse_frame(rgb, model, spec.px_per_mm)
    assert res.drop_found is False
    assert res.note.startswith("no drop")
    assert np.isnan(res.measures["drop_area_mm2"])


def test_bare_metal_is_no_drop(model):
    from coupon.synth import common

    rgb = common.metal_texture((400, 500), common.rng_for(0), base=0.62)
    rgb = common.sensor_noise(common.apply_light(rgb, common.lighting_field((400, 500), 0.15)), common.rng_for(1))
    res = analyse_frame(rgb, model, 30.0)
    assert not res.drop_found


def test_scale_invariance(model):
    # the same scene at double resolution gives the same mm2 (within the 3 % tolerance)
    a = dataclasses.replace(SPEC, px_per_mm=25.0, image_wh=(400, 350))
    b = dataclasses.replace(SPEC, px_per_mm=50.0, image_wh=(800, 700))
    ra = analyse_frame(render_frame(a, 6, seed=2)[0], model, a.px_per_mm).measures
    rb = analyse_frame(render_frame(b, 6, seed=2)[0], model, b.px_per_mm).measures
    assert ra["drop_area_mm2"] == pytest.approx(rb["drop_area_mm2"], rel=0.03)
    assert ra["acidic_area_pct"] == pytest.approx(rb["acidic_area_pct"], abs=3.0)


def test_elliptic_drop(model):
    spec = dataclasses.replace(SPEC, aspect=0.7, angle_deg=30.0)
    rgb, truth = render_frame(spec, 6, seed=5)
    m = analyse_frame(rgb, model, spec.px_per_mm).measures
    assert m["drop_area_mm2"] == pytest.approx(truth["drop_area_mm2"], rel=0.03)
    assert m["ellipse_minor_mm"] / m["ellipse_major_mm"] == pytest.approx(0.7, abs=0.03)
    assert m["ellipse_angle_deg"] == pytest.approx(30.0, abs=3.0)


def test_normalised_radius_of_a_circle():
    mask = np.zeros((101, 101), bool)
    yy, xx = np.mgrid[0:101, 0:101]
    mask[np.hypot(xx - 50, yy - 50) <= 40] = True
    ell = moment_ellipse(mask)
    r = normalised_radius(mask.shape, ell)
    assert r[50, 50] == pytest.approx(0.0, abs=1e-6)
    assert r[50, 90] == pytest.approx(1.0, abs=0.03)


def test_settings_validation():
    from coupon.errors import AnalysisError

    with pytest.raises(AnalysisError, match="below the basic"):
        DropletSettings(acidic_below=8, basic_above=6)


def test_series_events_definitions():
    t = np.array([0, 5, 10, 15, 20.0])
    ev = series_events(t, [True, True, True, True, False], [80, 78, 76, 74, np.nan], [0, 0.5, 3, 2, np.nan],
                       [0, 1, 2, 3, np.nan], [0, 0.2, 0.6, 1.0, np.nan], [7, 6, 5, 4, np.nan],
                       [7, 8, 9, 10, np.nan])
    assert ev["t_acidic_first_min"] == 10 and ev["t_rust_first_min"] == 10
    assert ev["acidic_peak_pct"] == 3 and ev["t_acidic_peak_min"] == 10
    assert ev["t_dried_min"] == 20
    assert ev["evaporation"]["rate_mm2_per_min"] == pytest.approx(0.4)
    assert ev["final"]["pattern"].startswith("no drop")
    ev2 = series_events(t[:4], [True] * 4, [80, 78, 76, 74], [0, 0, 3, 2], [0] * 4, [0] * 4, [7, 6, 5, 4],
                        [7, 8, 9, 10])
    assert ev2["final"]["pattern"] == "acidic centre, basic rim"
    assert ev2["t_rust_first_min"] is None


def test_eight_bit_frame_gives_the_float_analysis(model):
    # ``coupon droplet`` passes an 8-bit frame as decoded; the reference is the float path on the same pixels
    # (x / 255): only the reduced copy the drop is found on is rounded (OpenCV's 8-bit area means), the
    # working crop is the float crop exactly, so every measure must agree closely and the truth still holds
    st = _Static(SPEC, 1)
    for i in (1, 6):
        rgb, truth = render_frame(SPEC, i, seed=1, static=st)
        u8 = np.clip(np.rint(rgb * 255), 0, 255).astype(np.uint8)
        a = analyse_frame(u8.astype(np.float32) / np.float32(255), model, SPEC.px_per_mm)
        b = analyse_frame(u8, model, SPEC.px_per_mm)
        assert a.drop_found and b.drop_found
        assert b.measures["drop_area_mm2"] == pytest.approx(a.measures["drop_area_mm2"], rel=0.005)
        assert b.measures["drop_area_mm2"] == pytest.approx(truth["drop_area_mm2"], rel=0.03)
        for k, v in a.measures.items():
            if k.endswith("_pct"):
                assert b.measures[k] == pytest.approx(v, abs=0.5), k  # percentage points
            elif k.startswith("ph_") and np.isfinite(v):
                assert b.measures[k] == pytest.approx(v, abs=0.05), k
