"""The droplet analysis's fast paths checked against the plain computation they replace, and against
reference libraries (matplotlib for the colour map, scipy.ndimage for medians and hole filling)."""

from __future__ import annotations

import dataclasses
import pickle

import cv2
import matplotlib.colors as mcolors
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp
from scipy import ndimage as ndi

from coupon.report import droplet_figures as dfig
from coupon.report.figures import NO_DATA_GREY, ph_colormap
from coupon.segment import droplet as core
from coupon.synth.droplet import common_practice_spec, render_frame
from tests.droplet_support import calibrated_model


@pytest.fixture(scope="module")
def model():
    return calibrated_model()


@settings(max_examples=40, deadline=None)
@given(hnp.arrays(np.float32, (7, 9), elements=st.floats(-2, 16, width=32) | st.just(np.float32("nan"))))
def test_colourise_matches_matplotlib(ph):
    # reference library: matplotlib's own Normalize + colour map (bad = grey) give the same colours
    lo, hi = 3.0, 11.0
    ref = ph_colormap()(mcolors.Normalize(lo, hi)(np.ma.masked_invalid(ph)))[..., :3]
    ours = dfig.colourise_ph(ph, (lo, hi))
    assert ours.dtype == np.uint8
    assert np.array_equal(ours, np.round(255 * ref).astype(np.uint8))
    assert (ours[np.isnan(ph)] == np.round(255 * np.array(NO_DATA_GREY))).all()


@settings(max_examples=60, deadline=None)
@given(st.integers(2, 25), st.integers(0, 400), st.integers(0, 2**31 - 1))
def test_group_medians_match_scipy(n, size, seed):
    # reference library: scipy.ndimage.median over labelled regions (label 0 ignored)
    rng = np.random.default_rng(seed)
    values = rng.normal(7, 2, size).astype(np.float32)
    if size:
        values[rng.integers(0, size, size // 3)] = 5.0  # ties
    labels = rng.integers(0, n + 1, size)
    ours = core.group_medians(values, labels, n)
    counts = np.bincount(labels, minlength=n + 1)[1:]
    ref = np.full(n, np.nan)
    if (counts > 0).any():
        ref[counts > 0] = ndi.median(values, labels=labels, index=np.arange(1, n + 1)[counts > 0])
    assert np.array_equal(np.isnan(ours), counts == 0)
    # scipy averages the two middle values in float32, the fast path in float64
    np.testing.assert_allclose(ours[counts > 0], ref[counts > 0], rtol=0, atol=1e-6)


def _clean_blob_full_frame(mask, scale_px):
    """The plain computation on the whole image: close, fill holes (scipy), open, largest blob."""
    r_close, r_open = max(1, round(0.02 * scale_px)), max(1, round(0.01 * scale_px))
    m = cv2.morphologyEx(mask.astype(np.uint8), cv2.MORPH_CLOSE, core._disk(r_close))
    m = ndi.binary_fill_holes(m)
    m = cv2.morphologyEx(m.astype(np.uint8), cv2.MORPH_OPEN, core._disk(r_open))
    n, labels, stats, _ = cv2.connectedComponentsWithStats(m, connectivity=8)
    if n <= 1:
        return np.zeros(mask.shape, bool)
    return labels == 1 + int(np.argmax(stats[1:, cv2.CC_STAT_AREA]))


@pytest.mark.parametrize("seed", range(12))
def test_clean_blob_on_its_box_equals_full_frame(seed):
    # the bounding-box shortcut must give exactly the whole-image result, also for blobs at the border,
    # rings with holes and scattered specks
    rng = np.random.default_rng(seed)
    h, w = 150 + 10 * seed, 200
    yy, xx = np.mgrid[0:h, 0:w]
    cy, cx = rng.uniform(-10, h + 10), rng.uniform(-10, w + 10)
    r = np.hypot(yy - cy, xx - cx)
    mask = (r < rng.uniform(20, 60)) & (r > rng.uniform(0, 15))
    mask |= rng.random((h, w)) < 0.002 * (seed % 3)
    mask &= rng.random((h, w)) > 0.05
    for scale in (100.0, 320.0):
        assert np.array_equal(core._clean_blob(mask, scale), _clean_blob_full_frame(mask, scale))
    assert not core._clean_blob(np.zeros((40, 50), bool), 100.0).any()


def test_saturation_is_max_minus_min():
    rgb = np.random.default_rng(0).random((60, 70, 3), dtype=np.float32)
    r, g, b = rgb[..., 0], rgb[..., 1], rgb[..., 2]
    ref = np.maximum(np.maximum(r, g), b) - np.minimum(np.minimum(r, g), b)
    np.testing.assert_allclose(core.saturation(rgb, 0), ref, atol=1e-6)


def test_path_tables_kept_per_model_content(model):
    a = core.path_tables(model)
    # a process-pool worker gets an unpickled copy of the model with every frame: same tables
    assert core.path_tables(pickle.loads(pickle.dumps(model))) is a
    assert a.nearest.max_distance == np.inf and model.max_distance < np.inf
    other = dataclasses.replace(model, l_weight=1.0)
    assert core.path_tables(other) is not a
    # the rust test's L* of the path is the model's own
    np.testing.assert_allclose(a.grid_l, model.colour_at(a.grid_ph)[:, 0])


def test_rust_lookup_equals_direct_test(model):
    # the per-colour table gives what the direct test gives on the 8-bit colours, cold and warm
    spec = common_practice_spec()
    rgb, _ = render_frame(spec, spec.n_frames - 1, seed=7)
    pix = rgb[::3, ::3].reshape(-1, 3)
    s = core.DropletSettings()
    tables = core.path_tables(model)
    tables.rust.clear()
    q = np.round(pix * 255) / 255
    ph_near, _ = tables.nearest.map_rgb(q[None])
    direct = core.rust_colours(q, ph_near[0], tables, s)
    assert direct.any() and not direct.all()
    assert np.array_equal(core._rust_verdict(tables, pix, s), direct)
    assert np.array_equal(core._rust_verdict(tables, pix, s), direct)


def test_frame_picture_shows_map_colour_bar_and_outlines(model, tmp_path):
    spec = common_practice_spec()
    rgb, _ = render_frame(spec, spec.n_frames - 1, seed=7)
    res = core.analyse_frame(rgb, model, spec.px_per_mm)
    kw = {"title": "a very long file name " * 10, "px_per_mm": res.work_px_per_mm, "acidic_below": 6.0,
          "basic_above": 8.0, "ph_range": (3.0, 11.0)}
    path = dfig.frame_figure(res.ph_map, res.drop_mask, res.rust_mask, tmp_path / "f_ph.png", **kw)
    img = cv2.cvtColor(cv2.imread(str(path)), cv2.COLOR_BGR2RGB)
    assert np.array_equal(img, dfig.frame_picture(res.ph_map, res.drop_mask, res.rust_mask, **kw))
    assert img.shape[0] >= res.ph_map.shape[0] and img.shape[1] > res.ph_map.shape[1]
    colours = {tuple(c) for c in img.reshape(-1, 3)}
    lut = dfig.ph_lut_u8()
    assert tuple(lut[0]) in colours and tuple(lut[-1]) in colours  # the colour bar's ends
    assert tuple(np.round(255 * np.array(NO_DATA_GREY)).astype(int)) in colours  # no reading
    for zone in ("drop", "acidic", "basic", "rust"):
        assert dfig._rgb255(dfig.ZONE_COLOURS[zone]) in colours, zone


@settings(max_examples=30, deadline=None)
@given(hnp.arrays(np.float32, (23, 31), elements=st.floats(2, 12, width=32) | st.just(np.float32("nan"))),
       hnp.arrays(bool, (23, 31)))
def test_zone_masks_one_blur_matches_one_blur_per_zone(ph, drop):
    # the plain computation: each zone's mask blurred on its own (OpenCV's GaussianBlur, one channel)
    ours = dfig.zone_masks(ph, drop, 6.0, 8.0)
    for name, m in (("acidic", ph < 6.0), ("basic", ph > 8.0)):
        ref = cv2.GaussianBlur((m & drop).astype(np.float32), (0, 0), 1.5) > 0.5
        assert np.array_equal(ours[name], ref), name


def test_colour_bar_pieces_are_cached_read_only_and_match_the_colour_map():
    strip = dfig._colour_strip(50, 7, 3.0, 11.0)
    assert strip is dfig._colour_strip(50, 7, 3.0, 11.0) and not strip.flags.writeable
    direct = dfig.colourise_ph(np.linspace(11.0, 3.0, 50)[:, None].repeat(7, axis=1), (3.0, 11.0))
    assert np.array_equal(strip, direct)
    assert not dfig._bar_label().flags.writeable


def test_frame_figure_drawn_on_writer_thread_from_its_own_copies(model, tmp_path):
    # the picture is drawn later on the writer thread: changing the caller's arrays after the call must not
    # change it.  The writer is held busy until the arrays have been overwritten, so the order is certain.
    import threading

    from coupon.io.atomic import BackgroundWrites

    spec = common_practice_spec()
    rgb, _ = render_frame(spec, spec.n_frames - 1, seed=7)
    res = core.analyse_frame(rgb, model, spec.px_per_mm)
    kw = {"title": "frame 9", "px_per_mm": res.work_px_per_mm, "acidic_below": 6.0, "basic_above": 8.0,
          "ph_range": (3.0, 11.0)}
    ph, drop, rust = res.ph_map.copy(), res.drop_mask.copy(), res.rust_mask.copy()
    expected = dfig.frame_picture(ph, drop, rust, **kw)
    release = threading.Event()
    with BackgroundWrites() as w:
        w.submit("hold", release.wait, 30)
        path = dfig.frame_figure(ph, drop, rust, tmp_path / "f_ph.png", **kw)
        assert not path.exists()  # not drawn yet
        ph[:] = 7.0
        drop[:] = False
        rust[:] = True
        release.set()
    assert not w.errors
    img = cv2.cvtColor(cv2.imread(str(path)), cv2.COLOR_BGR2RGB)
    assert np.array_equal(img, expected)
