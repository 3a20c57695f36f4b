"""The fast per-pixel paths of the panel rating against reference libraries.

The rating fuses passes (one 3 x 3 colour transform, OpenCV arithmetic in float32,
sparse statistics, look-up tables, small normal-equation solves); these tests pin
each shortcut to an independent computation: scipy's non-negative least squares
(distance from the neutral wedge), scipy.ndimage labelling (rust sites),
colour-science's sRGB encoding (overlay pictures) and numpy's SVD least squares.
"""

from __future__ import annotations

import colour
import numpy as np
import pytest
from scipy import ndimage as ndi
from scipy.optimize import nnls

from coupon.report.panel_figures import encode_srgb_u8
from coupon.segment.panels.rust import (
    NEUTRAL_PLANE_MIN_TINT,
    ColourModel,
    RustSettings,
    _grow_candidates,
    _neutral_residual,
    _sites,
    lstsq_quadratic,
    measure_rust,
)


def _model_geometry(c):
    grey = np.ones(3) / np.sqrt(3)
    u1 = c / np.linalg.norm(c)
    g_perp = grey - (grey @ u1) * u1
    plane = [u1] + ([g_perp / np.linalg.norm(g_perp)] if np.linalg.norm(g_perp) > NEUTRAL_PLANE_MIN_TINT else [])
    _, _, vt = np.linalg.svd(np.array(plane))
    return u1, vt[len(plane):], plane


@pytest.mark.parametrize("coating", [(0.55, 0.35, 0.20), (0.20, 0.45, 0.25), (0.40, 0.40, 0.40)])
def test_neutral_distance_matches_nnls(coating):
    # squared distance from the cone alpha c + gamma grey (alpha, gamma >= 0), or from the ray through
    # c on a grey coating, by scipy.optimize.nnls (an independent solver of the same cone problem)
    c = np.array(coating)
    u1, normals, plane = _model_geometry(c)
    rng = np.random.default_rng(3)
    px = c * rng.uniform(0.6, 1.4, (400, 1)) + rng.normal(0, 0.04, (400, 3))
    along, perp2 = _neutral_residual(px.astype(np.float32).reshape(20, 20, 3), u1, normals, plane)
    assert along.dtype == np.float32 and perp2.dtype == np.float32  # no float64 upcast of the maps
    basis = np.column_stack([c, np.ones(3)]) if len(plane) > 1 else c[:, None]
    ref = np.array([nnls(basis, p)[1] ** 2 for p in px])
    np.testing.assert_allclose(perp2.ravel(), ref, rtol=2e-4, atol=2e-7)
    np.testing.assert_allclose(along.ravel(), px @ u1, rtol=1e-5, atol=1e-6)


def _blob_model(seed=5, shape=(300, 200)):
    rng = np.random.default_rng(seed)
    score = np.zeros(shape, np.float32)
    fraction = rng.normal(0, 0.01, shape).astype(np.float32)
    for _ in range(60):
        r, c = rng.integers(5, shape[0] - 5), rng.integers(5, shape[1] - 5)
        rad = rng.integers(0, 4)
        score[r - rad:r + rad + 1, c - rad:c + rad + 1] = rng.uniform(1.0, 12.0)
        fraction[r - rad:r + rad + 1, c - rad:c + rad + 1] = rng.uniform(0.02, 0.9)
    wins = score > 0
    return ColourModel(np.array([0.5, 0.5, 0.5]), score, fraction, fraction.copy(), np.ones(shape, np.float32), wins,
                       0.01)


def test_rust_sites_match_scipy_labelling_and_the_dense_path():
    model = _blob_model()
    rated = np.zeros(model.score.shape, bool)
    rated[4:-4, 4:-4] = True
    rust = measure_rust(model, rated, 10.0, RustSettings())
    assert rust.sites > 5
    # site count and membership against scipy.ndimage labelling (8-connected) of the same site mask
    lab, n = ndi.label(rust.site_mask, structure=np.ones((3, 3)))
    assert n == rust.sites
    pairs = {(a, b) for a, b in zip(lab[lab > 0], rust.site_labels[lab > 0])}
    assert len(pairs) == n  # one to one
    # the shared sparse grow region gives what a fresh full-image pass gives, at every threshold
    for k in (0.5, 1.0, 2.0):
        low, high = 2.0 * k, 5.0 * k
        cand = _grow_candidates(model, rated, 1.0)
        dense = _sites(model, rated, 10.0, low, high, 0.02)
        sparse = _sites(model, rated, 10.0, low, high, 0.02, cand)
        np.testing.assert_array_equal(dense[0], sparse[0])
        np.testing.assert_allclose(dense[1], sparse[1])
        areas_only = _sites(model, rated, 10.0, low, high, 0.02, cand, geometry=False)
        np.testing.assert_allclose(areas_only[1], dense[1])


def test_overlay_encoding_matches_colour_science():
    # colour-science's IEC 61966-2-1 sRGB encoding, rounded to 8 bits: the table is within one level
    rng = np.random.default_rng(0)
    lin = np.concatenate([rng.random(20000) ** 3, [-0.1, 0.0, 1.0, 1.2]]).astype(np.float32)
    ref = np.rint(np.clip(colour.cctf_encoding(np.clip(lin.astype(np.float64), 0, 1), function="sRGB"), 0, 1) * 255)
    got = encode_srgb_u8(lin)
    assert got.dtype == np.uint8
    diff = np.abs(got.astype(int) - ref.astype(int))
    assert diff.max() <= 1 and (diff > 0).mean() < 0.01


def test_quadratic_least_squares_matches_numpy_lstsq():
    rng = np.random.default_rng(1)
    x, y = rng.uniform(-0.5, 0.5, (2, 5000))
    a = np.column_stack([np.ones_like(x), x, y, x * x, x * y, y * y])
    b = rng.normal(size=(5000, 3))
    np.testing.assert_allclose(lstsq_quadratic(a, b), np.linalg.lstsq(a, b, rcond=None)[0], rtol=1e-9, atol=1e-12)


def test_eight_bit_tray_gives_the_float_detection_and_rectification():
    # ``coupon panels`` works an 8-bit photo from its decoded pixels; the reference is the float path on the
    # same pixels (x / 255): corners, rectified linear light (the exact 256-level sRGB decoding, IEC
    # 61966-2-1, against the 4096-level table) and QR reading must agree
    from coupon.segment.panels.detect import find_panels, linearize, read_qr_codes, rectify_panel
    from coupon.synth.panels import PanelSpec, TraySettings, tray_scene

    specs = [PanelSpec("white", ("general",), qr_text="BW-2-C"), PanelSpec("grey", ("spots",), scribe="line",
                                                                          creep_mm=1.5)]
    img, truth = tray_scene(specs, seed=21, settings=TraySettings(image_wh=(1400, 1200), cols=2, tilt_x_deg=8,
                                                                  tilt_y_deg=-5))
    u8 = np.clip(np.rint(img * 255), 0, 255).astype(np.uint8)
    f32 = u8.astype(np.float32) / np.float32(255)
    np.testing.assert_allclose(linearize(u8), colour.models.eotf_sRGB(u8 / 255.0), atol=1e-6)  # colour-science
    qa, qb = find_panels(f32), find_panels(u8)
    assert len(qa) == len(qb) == 2
    for a, b in zip(qa, qb):
        assert a.position == b.position
        # the edge profiles are sampled from rounded 8-bit values (OpenCV's 8-bit remap): a corner may move
        # by a few hundredths of a pixel (0.07 px on a 500 px side is 0.01 % of the panel's area)
        np.testing.assert_allclose(b.corners_xy, a.corners_xy, atol=0.1)  # px
        pa = rectify_panel(f32, a.corners_xy, (75, 150), 10.0)
        pb = rectify_panel(u8, a.corners_xy, (75, 150), 10.0)
        assert pb.linear.shape == pa.linear.shape
        # the float path's 4096-level table errs by up to half a step (1/8190) times the slope of the sRGB
        # decoding (2.4 / 1.055 = 2.27 at white): 2.8e-4
        np.testing.assert_allclose(pb.linear, pa.linear, atol=2.8e-4)
    codes_a = {k: v[0] for k, v in read_qr_codes(f32, qa).items()}
    codes_b = {k: v[0] for k, v in read_qr_codes(u8, qb).items()}
    assert codes_b == codes_a == {0: "BW-2-C"}
