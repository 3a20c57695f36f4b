"""Colour correction: a fitted matrix removes a known cast; white balance neutralises a grey."""

from __future__ import annotations

import numpy as np
import pytest

from coupon.calibrate import colourspace as cs
from coupon.calibrate.colour import (
    ColourCorrection, apply_correction, box_pixels, fit_colour_matrix, robust_colour, white_balance_gains,
)
from coupon.calibrate.scale import scale_from_checkerboard
from coupon.calibrate.target import TargetLayout, sample_white_patch
from coupon.errors import CalibrationError
from coupon.synth.indicator import patch_chart_scene
from coupon.synth.target import target_scene


def _measure(img, table):
    return np.array([robust_colour(box_pixels(img, r)) for r in table[["x_px", "y_px", "w_px", "h_px"]].to_numpy()])


@pytest.mark.parametrize("kind", ["affine", "linear"])
def test_matrix_from_cast_patches_brings_mean_de00_below_2(kind):
    img, table = patch_chart_scene(seed=11, cast=(1.15, 1.0, 0.78))
    measured = _measure(img, table)
    ref = table[["L", "a", "b"]].to_numpy()
    before = cs.delta_e_2000(cs.srgb_to_lab(measured), ref).mean()
    assert before > 4  # the cast is real: the check below can fail
    corr = fit_colour_matrix(measured, ref, kind=kind, names=list(table["name"]))
    # issue 2 acceptance: mean CIEDE2000 below 2 after correction
    assert corr.mean_de00 < 2.0
    # and the correction applied to the image agrees with the reported residuals
    fixed = apply_correction(img, corr)
    after = cs.delta_e_2000(cs.srgb_to_lab(_measure(fixed, table)), ref)
    assert after.mean() < 2.0
    assert set(corr.residual_de00) == set(table["name"])


def test_white_balance_from_target_grey_patch_neutralises_cast():
    cast = (1.10, 1.0, 0.80)
    img, truth = target_scene(seed=21, tilt_x_deg=10, cast=cast, light=0.0)
    layout = TargetLayout()
    sc = scale_from_checkerboard(img, layout.squares, layout.square_mm)
    patch = sample_white_patch(img, sc.homography, layout)
    lab_before = cs.srgb_to_lab(patch)
    assert np.hypot(lab_before[1], lab_before[2]) > 3  # visibly tinted
    corr = ColourCorrection(gains=white_balance_gains(patch))
    fixed = apply_correction(img, corr)
    lab_after = cs.srgb_to_lab(sample_white_patch(fixed, sc.homography, layout))
    assert np.hypot(lab_after[1], lab_after[2]) < 1.0  # neutral within 1 unit of chroma
    # the gains undo the cast (up to one common factor)
    g = corr.gains * np.asarray(cast)
    assert np.ptp(g / g.mean()) < 0.03


def test_too_few_patches_and_grey_only_refused():
    img, table = patch_chart_scene(seed=1)
    m = _measure(img, table)
    ref = table[["L", "a", "b"]].to_numpy()
    with pytest.raises(CalibrationError, match="at least 5 patches"):
        fit_colour_matrix(m[:4], ref[:4], kind="affine")
    greys = [0, 1, 2, 3, 0, 1]
    with pytest.raises(CalibrationError, match="span"):
        fit_colour_matrix(m[greys] * [1, 1, 1], ref[greys], kind="affine")
    with pytest.raises(CalibrationError, match="invalid"):
        fit_colour_matrix(m, ref, kind="cubic")


def test_box_outside_image_is_refused():
    with pytest.raises(CalibrationError, match="not inside"):
        box_pixels(np.zeros((10, 10, 3)), (5, 5, 20, 20))


def test_identity_correction_returns_input_unchanged():
    rgb = np.random.default_rng(0).random((8, 8, 3)).astype(np.float32)
    assert apply_correction(rgb, None) is rgb
    assert apply_correction(rgb, ColourCorrection()) is rgb
