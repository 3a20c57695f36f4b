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


# -- the strip-wise and batched paths against the plain whole-panel computations they replaced --


def _unmix_whole_panel(lin, valid, px_per_mm):
    """The rust model computed on whole-panel arrays with plain numpy and OpenCV (no strips, no sparse
    statistics, one cone search per colour), as :func:`unmix` computed it before the strip-wise pass.

    Returns (score, fraction, neutral_dev, light, rust_wins, noise_fraction, best rust colour per pixel:
    its index in RUST_ENDMEMBERS_SRGB at the rust pixels, -1 elsewhere; the rust colour's deviation from
    the coating at the per-pixel test's rust pixels, (R * C, 3), NaN elsewhere).
    """
    import cv2

    from coupon.segment.panels import rust as R

    lin = np.ascontiguousarray(lin, np.float32)
    flat = lin.reshape(-1, 3)
    idx = np.flatnonzero(valid)
    px = flat[idx[:: max(1, idx.size // R._SAMPLE_PX)]].astype(np.float64)
    c = np.median(px, axis=0)
    for _ in range(2):
        chroma = px / np.maximum(px.sum(axis=1, keepdims=True), 1e-6)
        d = np.abs(chroma - c / max(c.sum(), 1e-6)).sum(axis=1)
        keep = d <= max(np.median(d) * 3, 0.01)
        if keep.sum() > 50:
            c = np.median(px[keep], axis=0)
    c = np.maximum(c, 1e-5)
    rust = [R._lin(e) for e in R.RUST_ENDMEMBERS_SRGB]
    cn = float(np.sqrt(c @ c))
    u1, normals, plane = _model_geometry(c)
    along, perp2 = R._neutral_residual(lin, u1, normals, plane)
    a_n = along / np.float32(cn)
    light = R._smooth_light(a_n, valid, px_per_mm)
    dev = np.sqrt(perp2) / (np.float32(cn) * light)

    def robust(v):
        med = float(np.median(v))
        return med, float(1.4826 * np.median(np.abs(v - med)))

    def best(q, qq, best_res):  # q (n, 3): each colour, then each pair of neighbours; the first on a tie
        bf, bk = np.full(len(q), np.nan, np.float32), np.full(len(q), -1)
        bd = np.full((len(q), 3), np.nan, np.float32)  # the rust colour's deviation used (a pair's mix)
        devs = [(e - c).astype(np.float32) for e in rust]
        for k, d in enumerate(devs):
            qd = q @ d
            f = np.clip(qd / float(d @ d), 0.0, 1.0)
            res = qq - 2 * f * qd + f * f * float(d @ d)
            better = (f > 0) & (res < best_res)
            best_res, bf, bk = np.where(better, res, best_res), np.where(better, f, bf), np.where(better, k, bk)
            bd[better] = d
        for k in range(len(devs) - 1):
            m = np.column_stack([devs[k], devs[k + 1]]).astype(np.float64)  # (3, 2)
            ab = np.linalg.solve(m.T @ m, m.T @ q.T.astype(np.float64)).T  # (n, 2) unconstrained
            full = ab.sum(axis=1) > 1  # beyond full cover: the nearest colour on the segment, at f = 1
            dd = (devs[k + 1] - devs[k]).astype(np.float64)
            t = np.clip((q.astype(np.float64) - devs[k]) @ dd / (dd @ dd), 0, 1)
            ab[full] = np.column_stack([1 - t, t])[full]
            res = ((q - ab @ m.T) ** 2).sum(axis=1)
            better = (ab[:, 0] > 0) & (ab[:, 1] > 0) & (res < best_res)
            f = ab.sum(axis=1)
            best_res, bf = np.where(better, res, best_res), np.where(better, f, bf)
            bk = np.where(better, np.where(ab[:, 0] >= ab[:, 1], k, k + 1), bk)
            bd[better] = ((ab @ m.T) / f[:, None])[better]
        return bf, bk, bd

    vidx = idx[:: max(1, idx.size // R._SAMPLE_PX)]
    med, sigma = robust(dev.ravel()[vidx])
    floor = med + 3 * sigma
    neutral_dev = 1 - a_n / light
    fraction, score, wins = neutral_dev.copy(), np.zeros_like(a_n), np.zeros(a_n.shape, bool)
    cand = np.flatnonzero(dev.ravel() > floor)
    q = flat[cand] / light.ravel()[cand, None] - c.astype(np.float32)
    bf, bk0, bd0 = best(q, np.einsum("ij,ij->i", q, q), R.RUST_WINS_RATIO * perp2.ravel()[cand] / light.ravel()[cand] ** 2)
    won = np.isfinite(bf)
    kmap = np.full(a_n.shape, -1, np.int8)
    kmap.ravel()[cand[won]] = bk0[won]
    dmap = np.full((a_n.size, 3), np.nan, np.float32)  # the rust colour's deviation at the per-pixel test's pixels
    dmap[cand[won]] = bd0[won]
    wins.ravel()[cand[won]] = True
    fraction.ravel()[cand[won]] = bf[won]
    score.ravel()[cand[won]] = (dev.ravel()[cand[won]] - med) / max(sigma, 1e-4)
    y_c = float(c @ R._LUMA)
    dy = cv2.transform(lin, R._LUMA.astype(np.float32)[None, :]) / light - np.float32(y_c)
    y_med, y_sig = robust(dy.ravel()[vidx])
    k = 2 * int(round(R.CHROMA_POOL_MM / 2 * px_per_mm)) + 1
    if k >= 3 and y_sig > 0 and y_c > float(np.median([e @ R._LUMA for e in rust])):
        pb = cv2.boxFilter(lin / light[..., None], -1, (k, k), normalize=True)
        _, tb2 = R._neutral_residual(pb, u1, normals, plane)
        dev_b = np.sqrt(tb2) / np.float32(cn)
        b_med, b_sig = robust(dev_b.ravel()[vidx])
        cb = np.flatnonzero(((np.abs(dy - y_med) > 2 * y_sig) & (dev_b > b_med + 3 * b_sig) & ~wins).ravel())
        qv = pb.reshape(-1, 3)[cb] - c.astype(np.float32)
        bf, bk, bd = best(qv, np.einsum("ij,ij->i", qv, qv), R.RUST_WINS_RATIO * tb2.ravel()[cb])
        ok = np.isfinite(bf)
        ids, kk = cb[ok], bk[ok]
        d_y = (bd[ok] @ R._LUMA).astype(np.float32)  # the lightness of the rust colour used
        f_l = (dy.ravel()[ids] - y_med) / d_y
        good = (f_l > 0) & (np.abs(d_y) > 2 * y_sig)
        ids, f_l = ids[good], f_l[good]
        kmap.ravel()[ids] = kk[good]
        wins.ravel()[ids] = True
        fraction.ravel()[ids] = np.minimum(f_l, 1.0)
        score.ravel()[ids] = np.minimum(np.abs(dy.ravel()[ids] - y_med) / y_sig,
                                        (dev_b.ravel()[ids] - b_med) / b_sig)
    clean = np.flatnonzero(valid & ~wins & (dev <= floor))
    refs = fraction.ravel()[clean[:: max(1, clean.size // R._SAMPLE_PX)]]
    med_r = float(np.median(refs))  # the noise from the quieter side of the median (rust._robust_one_sided)
    noise = 1.4826 * min(float(np.median(med_r - refs[refs < med_r])), float(np.median(refs[refs > med_r] - med_r)))
    return score, fraction, neutral_dev, light, wins, noise, kmap, dmap


@pytest.fixture(scope="module")
def tray_panels():
    # one panel of each kind the model treats differently: light coatings (pinpoint, spots: the pooled
    # lightness test runs), grey (the neutral wedge), dark (no pooled test), green; JPEG 92 and tilt
    from coupon.segment.panels import base_mask
    from coupon.segment.panels.detect import find_panels, rectify_panel
    from coupon.synth.panels import PanelSpec, TraySettings, tray_scene

    specs = [PanelSpec("white", ("pinpoint",)), PanelSpec("grey", ("general",), dirt=True, scribe="x", creep_mm=1.0),
             PanelSpec("dark", ("spots",), scribe="line", creep_mm=2.0), PanelSpec("green", ("streaks",), glare=True)]
    img, _ = tray_scene(specs, seed=31, settings=TraySettings(image_wh=(2000, 1600), cols=2))
    out = []
    for q in find_panels(img):
        p = rectify_panel(img, q.corners_xy, (75, 150), 10.0)
        out.append((p, base_mask(p.linear.shape[:2], 10.0, 5.0)))
    assert len(out) == 4
    return out


def test_strip_unmix_matches_the_whole_panel_computation(tray_panels):
    # reference: the same model on whole-panel arrays (plain numpy and OpenCV, _unmix_whole_panel)
    from coupon.segment.panels import rust as R
    from coupon.segment.panels.rust import RustSettings, measure_rust, unmix

    for panel, valid in tray_panels:
        score, fraction, neutral_dev, light, wins, noise, kmap, dmap = _unmix_whole_panel(panel.linear, valid, 10.0)
        m = unmix(panel.linear, valid, 10.0)
        assert m.score.dtype == m.fraction.dtype == m.light.dtype == np.float32
        # float32 rounding of the same operations in another order: a pixel on a threshold may flip
        assert (m.rust_wins != wins).sum() <= max(2, 1e-5 * wins.size)
        np.testing.assert_allclose(m.light, light, rtol=1e-5)
        np.testing.assert_allclose(m.neutral_dev, neutral_dev, atol=1e-5)
        # a rust pixel on the threshold of the per-pixel test may also be found by the pooled test
        # instead (another fraction and score): with OpenCV 5.0, 1 pixel of 1.1 million on the white panel
        same = m.rust_wins == wins
        other_test = same & ~np.isclose(m.fraction, fraction, rtol=0, atol=1e-5)
        # ... and a pixel whose best fit is a near tie between a colour and a pair of colours may take the
        # other one (float32 here, float64 there): 5 to 22 of 38 000 to 125 000 rust pixels, fractions
        # within 0.031
        assert other_test.sum() <= max(2, 1e-5 * wins.size) + 5e-4 * wins.sum()
        assert np.abs(m.fraction - fraction)[other_test & wins].max(initial=0) < 0.05
        same &= ~other_test
        np.testing.assert_allclose(m.fraction[same], fraction[same], atol=1e-5)
        np.testing.assert_allclose(m.score[same], score[same], rtol=1e-4, atol=1e-3)
        assert m.noise_fraction == pytest.approx(noise, rel=1e-3)
        cone = None
        if m.coating_darker_than_rust:
            # the cone's fraction at every rust pixel (no pooled test on such coatings), whole-panel arrays;
            # with each pixel's own rust colour; _cone_fraction_along itself is checked against scipy in
            # tests/test_panels_unmix.py
            wi = np.flatnonzero(wins)
            pn = np.ascontiguousarray((panel.linear.reshape(-1, 3)[wi] / light.ravel()[wi, None]).T)
            e_pix = np.ascontiguousarray((dmap[wi] + m.coating_linear.astype(np.float32)).T)
            cone = (wi, R._cone_fraction_along(pn, m.coating_linear, e_pix))
        # the best rust colour of every rust pixel, as its lightness rank (0 the lightest rust colour)
        rust_y = np.array([R._lin(e) @ R._LUMA for e in R.RUST_ENDMEMBERS_SRGB])
        rank = np.argsort(np.argsort(-rust_y)).astype(np.int8)
        wi = np.flatnonzero(wins)
        ref_k = rank[kmap.ravel()[wi]]
        both = np.isin(wi, m.rust_idx[same.ravel()[m.rust_idx]])
        np.testing.assert_array_equal(m.rust_k[np.searchsorted(m.rust_idx, wi[both])], ref_k[both])
        ref = ColourModel(m.coating_linear, score, fraction, neutral_dev, light, wins, noise, wi,
                          coating_darker_than_rust=m.coating_darker_than_rust, cone_fraction=cone,
                          rust_k=ref_k, n_rust=len(rust_y))
        a, b = measure_rust(m, valid, 10.0, RustSettings()), measure_rust(ref, valid, 10.0, RustSettings())
        assert a.rust_area_mm2 == pytest.approx(b.rust_area_mm2, rel=1e-3, abs=1e-3)
        assert abs(a.sites - b.sites) <= 1


def test_sample_indices_match_every_kth_set_pixel():
    from coupon.segment.panels.rust import _sample_idx

    rng = np.random.default_rng(4)
    for shape, share in [((1500, 750), 0.9), ((1500, 750), 0.001), ((300, 401), 0.3), ((7, 9), 0.5), ((0, 5), 0.5)]:
        mask = rng.random(shape) < share
        for n in (20000, 7, 1):
            ref = np.flatnonzero(mask)
            np.testing.assert_array_equal(_sample_idx(mask, n), ref[:: max(1, ref.size // n)])


def test_coarse_mask_cleaning_matches_scipy_morphology():
    # scipy.ndimage: opening (3 x 3), closing (3 x 3, twice), hole filling, as find_panels did them
    from coupon.segment.panels.detect import clean_mask

    rng = np.random.default_rng(6)
    for t in range(12):
        m = ndi.uniform_filter(rng.random((300, 400)), 15) > 0.48 + 0.01 * (t % 5)
        m |= rng.random(m.shape) > 0.97
        m &= rng.random(m.shape) > 0.03
        m[:, :3] |= t % 2 == 0  # regions touching the frame
        s = np.ones((3, 3))
        ref = ndi.binary_fill_holes(ndi.binary_closing(ndi.binary_opening(m, s), s, iterations=2))
        np.testing.assert_array_equal(clean_mask(m), ref)


def test_projection_peaks_match_one_projection_per_angle():
    from coupon.segment.panels.scribe import _projection, _projection_peaks

    rng = np.random.default_rng(8)
    xy = np.concatenate([rng.uniform(0, 75, (300, 2)), np.column_stack([np.linspace(10, 60, 200), np.full(200, 40.0)])])
    thetas = np.deg2rad(np.arange(0.0, 180.0, 1.0))
    ref = [_projection(xy, np.ones(len(xy)), th, 0.5)[0].max() for th in thetas]
    np.testing.assert_array_equal(_projection_peaks(xy, thetas, 0.5), ref)


def test_rectified_panel_matches_warp_to_mm_grid():
    # rectify_panel warps into its own array; the reference is coupon.calibrate.scale.warp_to_mm_grid on
    # the numpy-decoded crop (the exact 256-level table by fancy indexing)
    from coupon.calibrate.scale import warp_to_mm_grid
    from coupon.segment.panels.detect import _DECODE_LUT_U8, rectify_panel
    from coupon.synth.panels import PanelSpec, TraySettings, tray_scene

    img, _ = tray_scene([PanelSpec("white", ("spots",))], seed=5, settings=TraySettings(image_wh=(900, 1200), cols=1))
    u8 = np.clip(np.rint(img * 255), 0, 255).astype(np.uint8)
    corners = np.array([[260.3, 210.7], [640.2, 215.1], [650.8, 990.4], [255.5, 985.9]])
    got = rectify_panel(u8, corners, (75, 150), 10.0)
    x0, y0 = int(np.floor(corners[:, 0].min()) - 3), int(np.floor(corners[:, 1].min()) - 3)
    x1, y1 = int(np.ceil(corners[:, 0].max()) + 4), int(np.ceil(corners[:, 1].max()) + 4)
    shift = np.array([[1, 0, x0], [0, 1, y0], [0, 0, 1]], dtype=np.float64)
    ref = warp_to_mm_grid(_DECODE_LUT_U8[u8[y0:y1, x0:x1]], got.scale.homography @ shift, got.size_mm, 10.0)
    np.testing.assert_array_equal(got.linear, ref)


def test_row_medians_match_numpy_median():
    # numpy's median (the one partition per row of _median_rows against np.median's three), ties and NaN
    from coupon.segment.panels.rust import _median_rows

    rng = np.random.default_rng(9)
    for n in (1, 2, 3, 50, 20000, 20001):
        for dtype in (np.float64, np.float32):
            a = rng.random((3, n)).astype(dtype)
            a[1] = np.round(a[1], 2)  # many ties
            got = _median_rows(a)
            assert got.dtype == np.median(a, axis=1).dtype
            np.testing.assert_array_equal(got, np.median(a, axis=1))
            a[2, n // 2] = np.nan
            np.testing.assert_array_equal(_median_rows(a), np.median(a, axis=1))


# -- the second round of shortcuts (bucket selection, cropped labelling, caches, OpenCV morphology) --


def _awkward_values(rng, n, dtype):
    # negatives, both infinities, signed zeros, subnormals, ties and a wide range of magnitudes
    big = 300 if dtype == np.float64 else 37
    tiny = 1e-310 if dtype == np.float64 else 1e-40
    v = np.concatenate([rng.normal(size=n) * 10.0 ** rng.integers(-big, big, n), np.round(rng.random(n), 2),
                        [np.inf, -np.inf, 0.0, -0.0, tiny, -tiny]])
    return rng.permutation(v).astype(dtype)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_order_statistics_match_numpy_sort(dtype):
    from coupon.segment.panels.rust import _order_stats

    rng = np.random.default_rng(12)
    for n in (1, 7, 1000, 30000):
        v = _awkward_values(rng, n, dtype)
        ranks = sorted({0, v.size // 2, v.size - 1, int(rng.integers(0, v.size))})
        np.testing.assert_array_equal(_order_stats(v, ranks), np.sort(v)[ranks])
    same = np.full(5000, 0.3, dtype)  # one bucket holds every value
    np.testing.assert_array_equal(_order_stats(same, [2499, 2500]), same[:2])


def test_bucket_row_medians_match_numpy_median():
    from coupon.segment.panels.rust import _BUCKET_MIN, _median_rows

    rng = np.random.default_rng(13)
    for n in (_BUCKET_MIN, _BUCKET_MIN + 1, 20000, 20001):
        for dtype in (np.float32, np.float64):
            a = np.stack([_awkward_values(rng, n // 2, dtype)[:n] for _ in range(3)])
            a[1] = np.abs(a[1])
            np.testing.assert_array_equal(_median_rows(a), np.median(a, axis=1))
            # float32 rows averaged in float64: the float64 medians of the same values
            np.testing.assert_array_equal(_median_rows(a, np.float64), np.median(a.astype(np.float64), axis=1))
            a[2, 5] = np.nan
            np.testing.assert_array_equal(_median_rows(a), np.median(a, axis=1))


def test_coating_colour_matches_float64_medians():
    # the plain computation: float64 samples, np.median, the chromaticity filter twice
    from coupon.segment.panels.rust import _sample_idx, coating_colour

    for panel, valid in _tray_panels_cache():
        lin = panel.linear
        idx = _sample_idx(valid)
        px = lin.reshape(-1, 3)[idx].astype(np.float64)
        c = np.median(px, axis=0)
        for _ in range(2):
            d = np.abs(px / np.maximum(px.sum(axis=1, keepdims=True), 1e-6) - c / max(c.sum(), 1e-6)).sum(axis=1)
            keep = d <= max(np.median(d) * 3, 0.01)
            if keep.sum() > 50:
                c = np.median(px[keep], axis=0)
        ref = np.maximum(c, 1e-5)
        np.testing.assert_allclose(coating_colour(lin, valid), ref, rtol=1e-14, atol=0)
        np.testing.assert_array_equal(coating_colour(lin, valid, idx, lin.reshape(-1, 3)[idx]),
                                      coating_colour(lin, valid))


_TRAY_PANELS = []


def _tray_panels_cache():
    # two synthetic panels (light with pinpoint rust, grey with an X scribe) for the tests below
    if not _TRAY_PANELS:
        from coupon.segment.panels import base_mask
        from coupon.segment.panels.detect import find_panels, rectify_panel
        from coupon.synth.panels import PanelSpec, TraySettings, tray_scene

        specs = [PanelSpec("white", ("pinpoint",)), PanelSpec("grey", ("general",), dirt=True, scribe="x", creep_mm=1.0)]
        img, _ = tray_scene(specs, seed=41, settings=TraySettings(image_wh=(1600, 1200), cols=2))
        for q in find_panels(img):
            p = rectify_panel(img, q.corners_xy, (75, 150), 10.0)
            _TRAY_PANELS.append((p, base_mask(p.linear.shape[:2], 10.0, 5.0)))
    return _TRAY_PANELS


@pytest.mark.parametrize("threads", [1, None])
def test_cropped_labelling_matches_opencv_on_the_whole_picture(threads):
    # OpenCV's labels of the whole picture, pixel for pixel (numbering included), from boxes that start
    # at odd and even rows and columns
    import cv2

    from coupon.segment.panels.rust import _label_pixels

    before = cv2.getNumThreads()
    try:
        if threads is not None:
            cv2.setNumThreads(threads)
        rng = np.random.default_rng(14)
        for t in range(30):
            shape = (int(rng.integers(20, 400)), int(rng.integers(20, 300)))
            img = (ndi.uniform_filter(rng.random(shape), 5) > 0.55 + 0.01 * (t % 4)).astype(np.uint8)
            img[: int(rng.integers(0, 7))] = 0
            img[:, : int(rng.integers(0, 7))] = 0
            if t % 3 == 0:
                img[rng.random(shape) > 0.98] = 1  # single pixels
            n_ref, lab_ref = cv2.connectedComponents(img, connectivity=8)
            idx = np.flatnonzero(img)
            n, lab = _label_pixels(idx, shape)
            assert n == n_ref
            np.testing.assert_array_equal(lab, lab_ref.ravel()[idx])
        assert _label_pixels(np.zeros(0, np.int64), (10, 10))[0] == 1
    finally:
        cv2.setNumThreads(before)


def test_cropped_halo_matches_the_whole_picture_dilation():
    import cv2

    from coupon.segment.panels.rust import _halo

    rng = np.random.default_rng(15)
    for t in range(20):
        shape = (int(rng.integers(10, 300)), int(rng.integers(10, 300)))
        lab_img = np.zeros(shape, np.uint16)
        sidx = np.unique(rng.integers(0, lab_img.size, int(rng.integers(1, 200))))
        if t % 2:
            sidx = np.unique(np.r_[sidx, 0, lab_img.size - 1])  # touching the picture's corners
        s_lab = rng.integers(1, 40, sidx.size)
        lab_img.ravel()[sidx] = s_lab
        rated = rng.random(shape) > 0.2
        # the whole-picture computation it replaced
        halo = cv2.dilate(lab_img, np.ones((3, 3), np.uint8))
        hidx = np.flatnonzero(halo.ravel() != 0)
        inner = lab_img.ravel()[hidx].astype(np.int32)
        hl = np.where(inner > 0, inner, halo.ravel()[hidx].astype(np.int32))
        inside = (inner > 0) | rated.ravel()[hidx]
        got = _halo(sidx, lab_img.ravel()[sidx], 41, rated.ravel(), shape)
        np.testing.assert_array_equal(got[0], hidx[inside])
        np.testing.assert_array_equal(got[1], hl[inside])


def test_site_caches_and_sparse_candidates_change_nothing():
    # the caches shared by measure_rust's three threshold pairs and the grow candidates taken from the
    # rust pixels give what fresh, whole-picture computations give
    from coupon.segment.panels.rust import unmix

    for panel, valid in _tray_panels_cache():
        m = unmix(panel.linear, valid, 10.0)
        assert m.rust_idx is not None
        np.testing.assert_array_equal(m.rust_idx, np.flatnonzero(m.rust_wins))
        plain = ColourModel(*[getattr(m, k) for k in ("coating_linear", "score", "fraction", "neutral_dev", "light",
                                                      "rust_wins", "noise_fraction")],
                            rust_k=m.rust_k, n_rust=m.n_rust)
        for low in (1.0, 2.0, 4.0):
            np.testing.assert_array_equal(_grow_candidates(m, valid, low), _grow_candidates(plain, valid, low))
        cache: dict = {}
        cand = _grow_candidates(plain, valid, 1.0)
        for k in (1.0, 0.5, 2.0, 1.0):
            a = _sites(m, valid, 10.0, 2.0 * k, 5.0 * k, 0.02, cand, cache=cache)
            b = _sites(plain, valid, 10.0, 2.0 * k, 5.0 * k, 0.02)
            np.testing.assert_array_equal(a[0], b[0])
            np.testing.assert_array_equal(a[1], b[1])
            np.testing.assert_array_equal(a[2], b[2])
            assert a[3] == b[3]


def test_defect_map_matches_the_whole_map_selection(tray_panels):
    from coupon.segment.panels.rust import unmix
    from coupon.segment.panels.scribe import defect_map, metal_scale

    sides = set()
    for panel, valid in tray_panels:
        m = unmix(panel.linear, valid, 10.0)
        side, scale = metal_scale(m.coating_linear)
        sides.add(side)
        ev = np.abs(m.neutral_dev) if side == 0 else side * m.neutral_dev
        metal = np.clip((ev / scale - 0.25) * 4.0, 0, 1)
        metal[m.rust_wins] = 0
        defect = np.where(m.rust_wins, np.clip(m.fraction, 0, 1), metal)
        got = defect_map(m)
        np.testing.assert_allclose(got[0], defect, atol=1e-6)
        np.testing.assert_allclose(got[1], metal, atol=1e-6)
    assert sides == {-1, 1}  # white and grey lighter than bare steel, dark and green darker


def test_light_field_from_the_two_channel_stack():
    # one two-channel INTER_AREA resize gives the block means of two single-channel resizes, and the
    # strip-wise stack is (brightness x mask, mask)
    import cv2

    from coupon.segment.panels import rust as R

    for panel, valid in _tray_panels_cache():
        lin = panel.linear
        w = np.array([0.5, 0.3, 0.2])
        alpha = cv2.transform(lin, w.astype(np.float32)[None, :])
        cleanf = valid.astype(np.float32)
        stack = R._light_stack(lin, w, valid)
        np.testing.assert_array_equal(stack[..., 0], alpha * cleanf)
        np.testing.assert_array_equal(stack[..., 1], cleanf)
        for size in [(38, 75), (37, 74), (150, 300)]:
            both = cv2.resize(stack, size, interpolation=cv2.INTER_AREA)
            np.testing.assert_array_equal(both[..., 0], cv2.resize(alpha * cleanf, size, interpolation=cv2.INTER_AREA))
            np.testing.assert_array_equal(both[..., 1], cv2.resize(cleanf, size, interpolation=cv2.INTER_AREA))
        np.testing.assert_array_equal(R._smooth_light(None, valid, 10.0, stack), R._smooth_light(alpha, valid, 10.0))


def test_row_closing_matches_scipy():
    from coupon.segment.panels.scribe import _close_rows

    rng = np.random.default_rng(16)
    for t in range(60):
        a = rng.random((int(rng.integers(1, 40)), int(rng.integers(1, 600)))) > rng.uniform(0.2, 0.95)
        for size in (1, 2, 3, 4, 11, 13):
            np.testing.assert_array_equal(_close_rows(a, size), ndi.binary_closing(a, structure=np.ones((1, size))))


def test_band_runs_match_a_walk_along_each_profile():
    # reference: the per-profile search the array version replaced (measure_scribe's loop), kept in
    # scribe.py for searches shorter than the window
    from coupon.segment.panels.scribe import _band_run_walk as walk
    from coupon.segment.panels.scribe import _band_runs

    rng = np.random.default_rng(17)
    for t in range(20):
        closed = rng.random((50, 101)) > rng.uniform(0.1, 0.9)
        closed[t % 50] = True  # a run over the whole profile
        closed[(t + 7) % 50] = False
        for win in (0, 3, 12, 50):
            assert _band_runs(closed, 50, win) == [walk(c, 50, win) for c in closed]


def test_station_maps_match_the_broadcast_sample_points():
    from coupon.segment.panels.scribe import _station_maps

    rng = np.random.default_rng(18)
    centres = rng.uniform(0, 150, (40, 2))
    u = np.array([0.6, 0.8])
    nrm = np.array([-0.8, 0.6])
    along, offs = np.linspace(-0.4, 0.4, 5), np.arange(-25, 25 + 1e-9, 0.1)
    pts = (centres[:, None, None, :] + (along[:, None, None] * u)[None]) + (offs[None, :, None] * nrm)[None]
    px = (pts * 10.0 - 0.5).astype(np.float32).reshape(-1, len(offs), 2)
    mx, my = _station_maps(centres, along, offs, u, nrm, 10.0)
    np.testing.assert_array_equal(mx, px[..., 0])
    np.testing.assert_array_equal(my, px[..., 1])


def test_projection_peak_search_matches_the_loop_over_angles():
    # the exclusion of angles within 30 degrees of a found line, as one array test per line
    thetas = np.deg2rad(np.arange(0.0, 180.0, 1.0))
    rng = np.random.default_rng(19)
    for t0 in np.r_[thetas[::7] + 0.1 * rng.integers(-15, 16, 26) * np.pi / 180, np.deg2rad([45.0, 15.0, 165.0])]:
        loop = np.array([abs(np.angle(np.exp(2j * (th - t0)))) < np.deg2rad(30) for th in thetas])
        np.testing.assert_array_equal(np.abs(np.angle(np.exp(2j * (thetas - t0)))) < np.deg2rad(30), loop)


def test_overlay_png_is_lossless(tmp_path):
    import cv2

    from coupon.report.panel_figures import panel_overlay, write_panel_overlay

    panel, valid = _tray_panels_cache()[0]
    sites = np.zeros(valid.shape, bool)
    sites[200:230, 300:340] = True
    want = panel_overlay(panel.linear, 10.0, valid, sites, None, "R1C1")
    dest = write_panel_overlay(tmp_path / "o.png", panel.linear, 10.0, valid, sites, None, "R1C1")
    got = cv2.cvtColor(cv2.imread(str(dest), cv2.IMREAD_COLOR), cv2.COLOR_BGR2RGB)
    np.testing.assert_array_equal(got, want)
