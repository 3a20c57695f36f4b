"""Synthetic trays with known truth: detection, rectified area, rust area, grade, creep.

Tolerances are those of the issue: every panel found; rust area within
max(0.1 percentage points, 15 % relative); grade within one class; creep mean
within 0.3 mm; rectified area within 1 % of the nominal size.
"""

from __future__ import annotations

import functools

import cv2
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import ndimage as ndi

from coupon.calibrate.scale import quad_area_px2
from coupon.ratings.panel_ratings import rust_grade
from coupon.segment.panels import PanelSettings, rate_panel
from coupon.segment.panels.detect import find_panels, read_qr_codes, rectify_panel
from coupon.synth.panels import (
    PanelSpec,
    TraySettings,
    tray_scene,
    truth_creep,
    truth_rust,
)

TRAY_A = [
    PanelSpec("white", ("spots",), scribe="line", creep_mm=2.0, qr_text="BW-1-A"),
    PanelSpec("grey", ("general",), dirt=True, scribe="x", creep_mm=1.0),
    PanelSpec("dark", ("general",), scribe="line", creep_mm=3.0),
    PanelSpec("white", ("pinpoint",)),
    PanelSpec("grey", ("streaks",), glare=True),
    PanelSpec("green", ("general",), amount=0.5),
]
# perspective (tilts 12 and -8 degrees, roll 3), 25 % light gradient, noise, JPEG 92: the defaults
SCENE = TraySettings()


@pytest.fixture(scope="module")
def tray_a():
    img, truth = tray_scene(TRAY_A, seed=11, settings=SCENE)
    quads = find_panels(img)
    return img, truth, quads


@pytest.fixture(scope="module")
def rated_a(tray_a):
    img, truth, quads = tray_a
    settings = PanelSettings()
    qr = read_qr_codes(img, quads)
    out = []
    for i, (q, p) in enumerate(zip(quads, truth["panels"])):
        panel = rectify_panel(img, q.corners_xy, settings.size_mm, settings.px_per_mm)
        boxes = []
        if i in qr:
            mm = cv2.perspectiveTransform(qr[i][1].reshape(-1, 1, 2), panel.scale.homography).reshape(-1, 2)
            boxes.append((*(mm.min(axis=0) - 2), *(mm.max(axis=0) + 2)))
        out.append((p, rate_panel(panel, settings, None, boxes)))
    return out, qr


def _only_panel(img):
    """The one panel of a one-panel tray (every panel found, and nothing else)."""
    quads = find_panels(img)
    assert len(quads) == 1, len(quads)
    return quads[0]


def _rust_ok(measured_pct, truth_pct):
    # issue 3 tolerance: max(0.1 percentage points, 15 % relative)
    return abs(measured_pct - truth_pct) <= max(0.1, 0.15 * truth_pct)


@pytest.mark.slow
def test_every_panel_found_in_tray_order(tray_a):
    img, truth, quads = tray_a
    assert len(quads) == len(TRAY_A)
    for q, p in zip(quads, truth["panels"]):
        assert q.position == p["position"]
        assert q.touches is None
        assert np.max(np.linalg.norm(q.corners_xy - p["corners_img_xy"], axis=1)) < 1.5


@pytest.mark.slow
def test_an_empty_slot_keeps_the_other_panels_positions(tray_a):
    # a panel taken off the tray: the panels beside the gap keep their row and column (they used to be
    # numbered by rank within the row, so the panel right of the gap took the missing panel's ID)
    from coupon.segment.panels.detect import assign_positions

    img, truth, quads = tray_a
    for k in range(len(quads)):
        rest = [q for i, q in enumerate(quads) if i != k]
        assert [q.position for q in assign_positions(rest)] == [q.position for q in rest], k


@given(roll=st.floats(-12, 12), drop=st.sets(st.integers(0, 11), max_size=4), seed=st.integers(0, 99))
@settings(max_examples=60, deadline=None)
def test_positions_of_a_rolled_grid_with_empty_slots(roll, drop, seed):
    # synthetic ground truth: a 3 x 4 grid of 75 x 150 panels 25 mm apart (4 px/mm), rolled and jittered a
    # little; any slots may be empty as long as every row and every column keeps a panel
    from coupon.segment.panels.detect import PanelQuad, assign_positions

    keep = [i for i in range(12) if i not in drop]
    if {i // 4 for i in keep} != {0, 1, 2} or {i % 4 for i in keep} != {0, 1, 2, 3}:
        return
    rng = np.random.default_rng(seed)
    a = np.deg2rad(roll)
    rot = np.array([[np.cos(a), -np.sin(a)], [np.sin(a), np.cos(a)]])
    quads, want = [], []
    for i in keep:
        r, c = divmod(i, 4)
        x0, y0 = 25 + c * 100 + rng.uniform(-3, 3), 25 + r * 175 + rng.uniform(-3, 3)
        rect = np.array([[x0, y0], [x0 + 75, y0], [x0 + 75, y0 + 150], [x0, y0 + 150]])
        quads.append(PanelQuad((rect @ rot.T) * 4.0 + 1000, None, 1.0))
        want.append((r + 1, c + 1))
    got = {tuple(np.round(q.centre_xy, 6)): q.position for q in assign_positions(quads)}
    assert [got[tuple(np.round(q.centre_xy, 6))] for q in quads] == want


@pytest.mark.slow
def test_detected_corners_enclose_the_nominal_area(tray_a):
    img, truth, quads = tray_a
    for q, p in zip(quads, truth["panels"]):
        # detected corners taken to the panel plane by the true camera: nominal 75 x 150 mm
        mm = cv2.perspectiveTransform(q.corners_xy.reshape(-1, 1, 2), np.linalg.inv(p["hom_mm_to_img"]))
        assert quad_area_px2(mm.reshape(-1, 2)) == pytest.approx(75 * 150, rel=0.01)


@pytest.mark.slow
def test_rectified_area_within_one_percent_of_nominal(tray_a):
    # the rectifier's own homography (photo px -> panel mm) applied to the panel's true corners in the photo:
    # the area they enclose on the mm grid against the analytic area of the nominal rectangle, 75 x 150 mm
    # (shoelace formula in numpy, not the package's quad_area_px2)
    img, truth, quads = tray_a
    settings = PanelSettings()
    for q, p in zip(quads, truth["panels"]):
        panel = rectify_panel(img, q.corners_xy, settings.size_mm, settings.px_per_mm)
        true_px = p["corners_img_xy"].reshape(-1, 1, 2)
        mm = cv2.perspectiveTransform(true_px, panel.scale.homography).reshape(-1, 2)
        x, y = mm[:, 0], mm[:, 1]
        area = 0.5 * abs(np.dot(x, np.roll(y, -1)) - np.dot(y, np.roll(x, -1)))
        assert area == pytest.approx(75 * 150, rel=0.01), (p["position"], area)
        # each true corner lands on its corner of the grid (TL, TR, BR, BL; within 0.5 mm), the panel as it stands
        w, h = p["size_mm"]
        assert tuple(panel.size_mm) == pytest.approx((w, h))
        assert np.max(np.abs(mm - [[0, 0], [w, 0], [w, h], [0, h]])) < 0.5, (p["position"], mm)
        # and the grid holds the nominal size at the grid resolution (portrait: 75 mm across, 150 mm down)
        rows, cols = panel.linear.shape[:2]
        assert rows * cols / settings.px_per_mm ** 2 == pytest.approx(75 * 150, rel=0.01)
        assert sorted(panel.size_mm) == [75, 150]


@pytest.mark.slow
def test_quad_area_against_analytic_shoelace(tray_a):
    # reference: the analytic area of the projected true quadrilateral (shoelace in numpy)
    img, truth, quads = tray_a
    for q, p in zip(quads, truth["panels"]):
        x, y = p["corners_img_xy"][:, 0], p["corners_img_xy"][:, 1]
        analytic = 0.5 * abs(np.dot(x, np.roll(y, -1)) - np.dot(y, np.roll(x, -1)))
        assert q.area_px2 == pytest.approx(analytic, rel=0.01)


@pytest.mark.slow
def test_rust_area_grade_and_creep_within_tolerance(rated_a):
    rated, _ = rated_a
    for p, res in rated:
        tr = truth_rust(p, edge_mm=5.0)
        name = f"{p['spec'].coating} {p['spec'].rust}"
        assert _rust_ok(res["rust_area_pct"], tr["rust_area_pct"]), (name, res["rust_area_pct"], tr)
        true_grade = int(rust_grade(tr["rust_area_pct"]))
        assert abs(int(res["rust_grade"]) - true_grade) <= 1, name
        # stated, and not so wide that it says nothing against the tolerance
        assert 0 < res["rust_area_pct_unc"] <= 2 * max(0.1, 0.15 * tr["rust_area_pct"]), name
        tc = truth_creep(p)
        assert res["scribe_found"] == (tc is not None), name
        if tc is not None:
            assert res["scribe_kind"] == p["spec"].scribe
            assert abs(res["creep_mean_mm"] - tc["creep_mean_mm"]) <= 0.3, (name, res["creep_mean_mm"], tc)
            assert res["creep_min_mm"] <= res["creep_mean_mm"] <= res["creep_max_mm"]


@pytest.mark.slow
def test_qr_identity_read(rated_a):
    _, qr = rated_a
    assert {i: t for i, (t, _) in qr.items()} == {0: "BW-1-A"}


@pytest.mark.slow
def test_site_count_matches_scipy_label(rated_a):
    # reference library: scipy.ndimage.label (8-connectivity) of the same site mask
    rated, _ = rated_a
    for _, res in rated:
        mask = res["_rust"].site_mask
        _, n = ndi.label(mask, structure=np.ones((3, 3)))
        assert res["rust_sites"] == n


@pytest.mark.slow
def test_distribution_letters_of_clear_cases(rated_a):
    rated, _ = rated_a
    # the letter the synthetic panel was painted to show (truth "distribution"; coupon's rule for D610 letters)
    for p, res in rated:
        if p["distribution"] is not None:
            assert res["rust_distribution"] == p["distribution"], (p["spec"].coating, p["spec"].rust)


# Pinpoint, spot and general rust on white, grey and dark coatings at about 4.3 px/mm (JPEG 92, perspective,
# light gradient): each panel reads the distribution letter it was painted to show.  Before the area-weighted
# rule, pinpoint specks that JPEG spreads or that merge (sites of 0.3 to 0.8 mm2) made grey and dark read H.
@pytest.mark.slow
@pytest.mark.parametrize("coating, seed", [("white", 40), ("grey", 41), ("dark", 42)])
def test_distribution_letter_of_pinpoint_spots_general(coating, seed):
    specs = [PanelSpec(coating, (kind,)) for kind in ("pinpoint", "spots", "general")]
    img, truth = tray_scene(specs, seed=seed, settings=TraySettings(image_wh=(1650, 1000), cols=3))
    quads = find_panels(img)
    assert len(quads) == 3
    for q, p in zip(quads, truth["panels"]):
        res = rate_panel(rectify_panel(img, q.corners_xy, (75, 150)), PanelSettings())
        assert res["rust_distribution"] == p["distribution"], (coating, p["spec"].rust, res["rust_distribution"])
        assert res["rust_grade_written"] == f"{res['rust_grade']}-{p['distribution']}"


# Pinpoint rust on grey and dark coatings at about 4.3 px/mm in a JPEG photo: 4:2:0 chroma
# subsampling removes most of the colour of a 1-2 px speck.  On grey the lightness test (full
# resolution lightness, rust identity from pooled chroma) recovers it; on dark coatings the
# per-pixel colour test finds the bright specks, and the peak-fraction test of a site drops the
# JPEG ringing around them (dark, seed 14: 0.435 % vs truth 0.363 %; issue 3 tolerance).
@pytest.mark.slow
@pytest.mark.parametrize("coating, seed", [("grey", 12), ("grey", 14), ("dark", 12), ("dark", 14)])
def test_pinpoint_on_grey_and_dark_coatings(coating, seed):
    img, truth = tray_scene([PanelSpec(coating, ("pinpoint",))], seed=seed,
                            settings=TraySettings(image_wh=(700, 1000), cols=1))
    q = _only_panel(img)
    res = rate_panel(rectify_panel(img, q.corners_xy, (75, 150)), PanelSettings())
    tr = truth_rust(truth["panels"][0], 5.0)["rust_area_pct"]
    assert _rust_ok(res["rust_area_pct"], tr), (coating, seed, res["rust_area_pct"], tr)
    # pinpoint as painted (truth "distribution"), although JPEG spreads and merges the specks
    assert res["rust_distribution"] == truth["panels"][0]["distribution"] == "P"


# JPEG chroma sampling, 1 % pinpoint rust at about 7.5 px/mm (issue 3 tolerance): with 4:4:4 chroma the
# unmixing recovers it on grey and dark coatings; with 4:2:0 (most cameras) it reads high, 1.25 x on grey
# and 1.45 x on dark (coupon.segment.panels.rust.PINPOINT_MIN_PHOTO_PX_PER_MM's notes), beyond the
# tolerance: a known fault, kept here as a strict xfail so that a fix shows
_PINPOINT_420 = pytest.mark.xfail(strict=True, raises=AssertionError,
                                  reason="4:2:0 JPEG: pinpoint on grey and dark reads 1.25 to 1.45 x")


@pytest.mark.slow
@pytest.mark.parametrize("coating, chroma", [("grey", "4:4:4"), ("dark", "4:4:4"),
                                             pytest.param("grey", "4:2:0", marks=_PINPOINT_420),
                                             pytest.param("dark", "4:2:0", marks=_PINPOINT_420)])
def test_dense_pinpoint_at_7_px_per_mm_by_jpeg_chroma(coating, chroma):
    img, truth = tray_scene([PanelSpec(coating, ("pinpoint",), amount=3.0)], seed=3,
                            settings=TraySettings(image_wh=(1100, 1900), cols=1, plane_px_per_mm=24.0,
                                                  jpeg_chroma=chroma))
    q = _only_panel(img)
    res = rate_panel(rectify_panel(img, q.corners_xy, (75, 150)), PanelSettings())
    tr = truth_rust(truth["panels"][0], 5.0)["rust_area_pct"]
    assert tr > 0.9  # dense enough for the relative tolerance to apply (15 % of 0.9 % > 0.1 pp)
    assert _rust_ok(res["rust_area_pct"], tr), (coating, chroma, res["rust_area_pct"], tr)


# Spots, general rust and streaks at about 7.5 px/mm (issue 3 tolerance) on white, grey and dark coatings.  On
# the dark coating a dim rust pixel looks like a partly covered pixel of brighter rust; the large sites there
# take the cone's fraction (CONE_MIN_SITE_MM2's notes; with the segment's fraction alone dark spots and general
# read 0.77 to 0.89 of the truth and failed).  Whatever the coating, the stated uncertainty must cover the
# error (within 2 standard uncertainties of the truth) without being wider than twice the tolerance.
_AT_7_PX = [(c, k) for c in ("white", "grey", "dark") for k in ("spots", "general", "streaks")]


@functools.lru_cache(maxsize=None)
def _rated_at_7_px_per_mm(coating: str, kind: str) -> tuple[float, float, float]:
    img, truth = tray_scene([PanelSpec(coating, (kind,))], seed=4, settings=TraySettings(image_wh=(1100, 1900), cols=1))
    q = _only_panel(img)
    res = rate_panel(rectify_panel(img, q.corners_xy, (75, 150)), PanelSettings())
    return res["rust_area_pct"], res["rust_area_pct_unc"], truth_rust(truth["panels"][0], 5.0)["rust_area_pct"]


@pytest.mark.slow
@pytest.mark.parametrize("coating, kind", _AT_7_PX)
def test_spots_general_and_streaks_at_7_px_per_mm(coating, kind):
    measured, _, tr = _rated_at_7_px_per_mm(coating, kind)
    assert _rust_ok(measured, tr), (coating, kind, measured, tr)


@pytest.mark.slow
@pytest.mark.parametrize("coating, kind", _AT_7_PX)
def test_stated_rust_uncertainty_covers_the_error_at_7_px_per_mm(coating, kind):
    measured, unc, tr = _rated_at_7_px_per_mm(coating, kind)
    # coverage factor k = 2 (about 95 %; the usual expanded uncertainty of the GUM, common practice)
    assert abs(measured - tr) <= 2 * unc, (coating, kind, measured, unc, tr)
    # and informative: the standard uncertainty is at most twice the tolerance (a wider one would
    # cover any error and say nothing; today 0.3 to 0.7 of it on white and grey, 0.8 to 1.3 on dark)
    assert unc <= 2 * max(0.1, 0.15 * tr), (coating, kind, unc, tr)


def test_grey_dirt_is_not_rust_for_the_lightness_test():
    # dirt: darker and neutral (no chroma lean); the lightness test must not take it for rust
    # (ASTM D610-08: dirt is not rust)
    img, _ = tray_scene([PanelSpec("grey", (), dirt=True)], seed=16,
                        settings=TraySettings(image_wh=(700, 1000), cols=1))
    q = _only_panel(img)
    res = rate_panel(rectify_panel(img, q.corners_xy, (75, 150)), PanelSettings())
    assert res["rust_area_pct"] < 0.03, res["rust_area_pct"]


def test_pinpoint_without_jpeg_on_dark_coating():
    # without the codec the sub-pixel fractions recover pinpoint rust on a dark coating
    img, truth = tray_scene([PanelSpec("dark", ("pinpoint",))], seed=12,
                            settings=TraySettings(image_wh=(700, 1000), cols=1, jpeg_quality=None))
    q = _only_panel(img)
    res = rate_panel(rectify_panel(img, q.corners_xy, (75, 150)), PanelSettings())
    tr = truth_rust(truth["panels"][0], 5.0)
    assert _rust_ok(res["rust_area_pct"], tr["rust_area_pct"]), (res["rust_area_pct"], tr)
    # whole-pixel counting is far off on pinpoint rust: the reason for the unmixing
    assert res["rust_pixel_count_pct"] > 1.5 * tr["rust_area_pct"]


@pytest.mark.parametrize("seed", [1, 2, 3, 4, 5, 6, 13])
def test_clean_panel_with_dirt_and_glare_rates_within_one_class_of_10(seed):
    # seeds 2, 5 and 6 read 0.052, 0.073 and 0.039 % (D610 8) before dark-core sites far from the other
    # rust colours were left out (rust.LONE_CORE_NEAR_MM); now 0.000 to 0.023 % (grades 10 and 9)
    img, truth = tray_scene([PanelSpec("white", (), dirt=True, glare=True)], seed=seed,
                            settings=TraySettings(image_wh=(700, 1000), cols=1))
    q = _only_panel(img)
    res = rate_panel(rectify_panel(img, q.corners_xy, (75, 150)), PanelSettings())
    # dirt and glare are not rust (ASTM D610-08: rust staining, dirt and deposits are not rust); truth 0 %, grade
    # 10, and the issue allows one class
    assert res["rust_area_pct"] < 0.03
    assert int(res["rust_grade"]) >= 9
    assert not res["scribe_found"]


# Grades across the scale (tray A covers grades 5 and 6 only): very light pinpoint rust (true grades 9 and 8)
# and heavy general rust (4, and 2 on the edge of 3), one panel each at about 7.5 px/mm, issue 3 tolerances
# against ASTM D610-08 Table 1 (via coupon.ratings.scales).
@pytest.mark.slow
@pytest.mark.parametrize("coating, kind, amount, true_grade", [("white", "pinpoint", 0.04, "9"),
                                                               ("grey", "pinpoint", 0.1, "8"),
                                                               ("white", "general", 3.0, "4"),
                                                               ("green", "general", 10.0, "2")])
def test_grades_across_the_scale(coating, kind, amount, true_grade):
    img, truth = tray_scene([PanelSpec(coating, (kind,), amount=amount)], seed=21,
                            settings=TraySettings(image_wh=(1100, 1900), cols=1))
    q = _only_panel(img)
    res = rate_panel(rectify_panel(img, q.corners_xy, (75, 150)), PanelSettings())
    tr = truth_rust(truth["panels"][0], 5.0)["rust_area_pct"]
    assert rust_grade(tr) == true_grade  # the scene lies in the grade it was made for
    assert _rust_ok(res["rust_area_pct"], tr), (coating, kind, res["rust_area_pct"], tr)
    assert abs(int(res["rust_grade"]) - int(true_grade)) <= 1, (coating, kind, res["rust_grade"], true_grade)


@pytest.mark.slow
@pytest.mark.parametrize("seed", [1, 2])
def test_no_scribe_found_on_unscribed_panels(seed):
    # synthetic ground truth: no scribe painted.  On dark coatings the grid's border column (a little of the
    # bright tray) was taken for a scribe along the whole edge (SCRIBE_MARGIN_MM's notes)
    specs = [PanelSpec("dark", ()), PanelSpec("dark", ("spots",)), PanelSpec("white", ("general",))]
    img, truth = tray_scene(specs, seed=seed, settings=TraySettings(image_wh=(1400, 1200), cols=3))
    quads = find_panels(img)
    assert len(quads) == 3
    for q in quads:
        res = rate_panel(rectify_panel(img, q.corners_xy, (75, 150)), PanelSettings())
        assert not res["scribe_found"], (q.position, res["_scribe"].lines)


@pytest.mark.slow
@pytest.mark.parametrize("shift_mm", [50, 80])
def test_a_panel_far_over_the_frame_edge_is_reported(shift_mm):
    # synthetic ground truth: the white panel stands a quarter to a half of its width over the left edge.
    # It must come back as touching that edge (the command reports it), and the other two as whole panels;
    # the tray's colour model used to bend towards the white panel in its edge band and lose every panel
    specs = [PanelSpec("white", ("spots",)), PanelSpec("dark", ()), PanelSpec("grey", ("general",))]
    img, truth = tray_scene(specs, seed=4, settings=TraySettings(image_wh=(1400, 1000), cols=3,
                                                                 shift_mm=(-shift_mm, 0)))
    assert truth["panels"][0]["corners_img_xy"][:, 0].min() < 0 < truth["panels"][1]["corners_img_xy"][:, 0].min()
    quads = find_panels(img)
    assert [(q.position, q.touches) for q in quads] == [((1, 1), "left"), ((1, 2), None), ((1, 3), None)]
    for q, p in zip(quads[1:], truth["panels"][1:]):
        assert np.max(np.linalg.norm(q.corners_xy - p["corners_img_xy"], axis=1)) < 1.5


def test_mixed_portrait_and_landscape_rows_get_unique_positions():
    # synthetic ground truth: a row of 4 portrait panels over 2 rows of 3 landscape ones (x in mm, 4 px/mm);
    # their columns do not line up: every panel must still get a position of its own, in its row, numbered
    # left to right (the columns may skip a number where a column of another row lies between)
    from coupon.segment.panels.detect import PanelQuad, assign_positions

    quads, want = [], []
    for r, (w, h, n, y0) in enumerate([(75, 150, 4, 20), (150, 75, 3, 200), (150, 75, 3, 300)]):
        for c in range(n):
            x0 = 20 + c * (w + 25)
            rect = np.array([[x0, y0], [x0 + w, y0], [x0 + w, y0 + h], [x0, y0 + h]], float) * 4.0
            quads.append(PanelQuad(rect, None, 1.0))
            want.append((r + 1, c + 1))
    got = {tuple(np.round(q.centre_xy, 6)): q.position for q in assign_positions(quads)}
    pos = [got[tuple(np.round(q.centre_xy, 6))] for q in quads]
    assert len(set(pos)) == len(pos)
    assert [p[0] for p in pos] == [w[0] for w in want]
    for r in (1, 2, 3):
        cols = [p[1] for p in pos if p[0] == r]
        assert cols == sorted(cols)


@pytest.mark.slow
@pytest.mark.parametrize("coating", ["white", "dark"])
def test_a_mask_beside_the_scribe_leaves_its_stations_out_instead_of_cutting_the_zone(coating):
    # a masked label box 1.5 mm right of the cut, over 30 mm of a 100 mm line scribe with 3 mm creep: the
    # zone goes on beneath it, so those stations cannot be measured; cut at the mask they read 1.2 mm
    # (the mean fell to 2.5 mm).  Tolerance: issue 3, creep mean within 0.3 mm of the synthetic truth.
    img, truth = tray_scene([PanelSpec(coating, ("spots",), scribe="line", creep_mm=3.0)], seed=5,
                            settings=TraySettings(cols=1))
    q = _only_panel(img)
    tc = truth_creep(truth["panels"][0])
    settings = PanelSettings(masks_mm=(("rect", 39.0, 60.0, 10.0, 30.0),))  # the scribe runs at x = 37.5 mm
    res = rate_panel(rectify_panel(img, q.corners_xy, settings.size_mm, settings.px_per_mm), settings)
    assert res["scribe_found"]
    assert abs(res["creep_mean_mm"] - tc["creep_mean_mm"]) <= 0.3, (res["creep_mean_mm"], tc["creep_mean_mm"])
    st = res["_scribe"].stations
    # the zone (3 mm creep) reaches the mask's side all along it: no station there is kept
    assert not [x for x in st if 60.5 <= x["centre_xy_mm"][1] <= 89.5]
    assert 25 <= 81 - len(st) <= 35 and "left out" in res["scribe_note"]  # about the 30 stations beside it



@pytest.mark.slow
def test_a_mask_along_the_whole_scribe_still_leaves_the_corrosion_zone_out_of_the_rust_rating():
    # every station hidden (found in review: the corridor then shrank to w/2 + 1 mm and the 3 mm creep
    # zone was rated as 2.6 % rust, D610 5); the zone seen up to the mask still widens the corridor
    img, truth = tray_scene([PanelSpec("white", (), scribe="line", creep_mm=3.0)], seed=5, settings=TraySettings(cols=1))
    q = _only_panel(img)
    settings = PanelSettings(masks_mm=(("rect", 39.0, 15.0, 10.0, 120.0),))
    res = rate_panel(rectify_panel(img, q.corners_xy, settings.size_mm, settings.px_per_mm), settings)
    assert res["scribe_found"] and not res["_scribe"].stations and "no station could be measured" in res["scribe_note"]
    assert min(res["_scribe"].corridor_half_mm) > 3.0
    assert _rust_ok(res["rust_area_pct"], truth_rust(truth["panels"][0], 5.0)["rust_area_pct"])  # no rust painted


def _painted_disc_panel(rings: list[tuple[int, tuple]]) -> tuple[float, float]:
    """A white panel (no painted rust) with concentric discs (radius in photo px, sRGB colour) painted into
    the photo before JPEG q92; returns (measured rust %, painted disc area over the rated area in %)."""
    img, truth = tray_scene([PanelSpec("white", ())], seed=3, settings=TraySettings(image_wh=(700, 1000), cols=1))
    cx, cy = truth["panels"][0]["centre_img_xy"]
    for r, colour in rings:
        m = np.zeros(img.shape[:2], np.float32)
        cv2.circle(m, (int(cx), int(cy) - 150), r, 1.0, -1)
        m = cv2.GaussianBlur(m, (5, 5), 1.0)[..., None]
        img = img * (1 - m) + np.array(colour, np.float32) * m
    ok, buf = cv2.imencode(".jpg", cv2.cvtColor((np.clip(img, 0, 1) * 255).round().astype(np.uint8), cv2.COLOR_RGB2BGR),
                           [cv2.IMWRITE_JPEG_QUALITY, 92])
    img = cv2.cvtColor(cv2.imdecode(buf, cv2.IMREAD_COLOR), cv2.COLOR_BGR2RGB).astype(np.float32) / 255
    q = _only_panel(img)
    res = rate_panel(rectify_panel(img, q.corners_xy, (75, 150)), PanelSettings())
    ppm = np.sqrt(q.area_px2 / (75 * 150))
    return res["rust_area_pct"], 100 * np.pi * (max(r for r, _ in rings) / ppm) ** 2 / res["rated_area_mm2"]


@pytest.mark.slow
@pytest.mark.parametrize("rings", [[(20, (0.22, 0.10, 0.05))], [(9, (0.22, 0.10, 0.05))],
                                   [(24, (0.80, 0.45, 0.16)), (20, (0.22, 0.10, 0.05))]],
                         ids=["dark-disc-r20", "dark-disc-r9", "dark-core-orange-ring"])
def test_a_dark_rust_spot_on_its_own_is_rust(rings):
    # a dark rust spot (the darkest rust colour, 14 to 70 mm2), alone or ringed by orange-brown rust, is not
    # one of the small lone dark-core sites of a dirt smudge's edge (rust.LONE_CORE_MAX_MM2): found in review,
    # where the rule first read them as 0 % (grade 10).  Issue 3 tolerance against the painted disc area.
    measured, painted = _painted_disc_panel(rings)
    assert _rust_ok(measured, painted), (measured, painted)


@functools.lru_cache(maxsize=None)
def _rated_with_glare(coating: str, glare: bool, scribe: str):
    spec = PanelSpec(coating, ("general",), amount=1.5, scribe=scribe, creep_mm=2.0 if scribe != "none" else 0.0,
                     glare=glare)
    img, truth = tray_scene([spec], seed=7, settings=TraySettings(image_wh=(900, 1300), cols=1))
    q = _only_panel(img)
    return rate_panel(rectify_panel(img, q.corners_xy, (75, 150)), PanelSettings()), truth["panels"][0]


# Specular glare (a soft band of white light, 0.35 at its peak) over general rust, with and without an X scribe,
# on every coating.  Issue 3: "ignore ... specular glare"; tolerances as above (rust area, creep mean 0.3 mm).
# Before glare was taken off (coupon.segment.panels.glare), the black panel read 0.0 % with the X
# (its glare inflated the fraction noise 3 times and every site failed), the grey one 4.6 % (the X arm under
# the glare was lost and its zone rated as rust), and the green one without a scribe found a scribe in the glare
# (7.6 mm creep).
@pytest.mark.slow
@pytest.mark.parametrize("coating", ["white", "grey", "dark", "green"])
@pytest.mark.parametrize("scribe", ["none", "x"])
def test_glare_is_taken_off_before_rating(coating, scribe):
    res, p = _rated_with_glare(coating, True, scribe)
    tr = truth_rust(p, 5.0)["rust_area_pct"]
    assert _rust_ok(res["rust_area_pct"], tr), (coating, scribe, res["rust_area_pct"], tr)
    tc = truth_creep(p)
    assert res["scribe_found"] == (tc is not None), (coating, scribe, res["scribe_note"])
    if tc is not None:
        assert res["scribe_kind"] == "x"
        assert abs(res["creep_mean_mm"] - tc["creep_mean_mm"]) <= 0.3, (coating, res["creep_mean_mm"], tc)
    # the patch, not the panel; on white the highlight clips at the coating's own white and stays a plateau
    # (no peak to find), and there it washes out little (rust as above)
    assert 50 < res["glare_corrected_mm2"] < 2000 or coating == "white"
    assert res["glare_excluded_mm2"] <= res["glare_corrected_mm2"]


@pytest.mark.slow
@pytest.mark.parametrize("coating", ["white", "grey", "dark", "green"])
def test_no_glare_is_found_where_there_is_none(coating):
    # the same panels without glare, the X's wide corrosion zones included (once read as glare on white: the
    # light field, fitted with the rust in, sagged under the X)
    res, _ = _rated_with_glare(coating, False, "x")
    assert res["glare_excluded_mm2"] == res["glare_corrected_mm2"] == 0


@pytest.mark.slow
@pytest.mark.parametrize("spec", [PanelSpec("dark", (), scribe="x", creep_mm=0.0),
                                  PanelSpec("dark", (), scribe="line", creep_mm=0.5),
                                  PanelSpec("dark", ("spots",), dirt=True),
                                  PanelSpec("green", (), scribe="x", creep_mm=0.0)],
                         ids=["dark-fresh-x", "dark-line-0.5", "dark-dirt", "green-fresh-x"])
def test_bright_thin_or_flat_marks_are_not_glare(spec):
    # found in review: a scribe's bare-steel core (14 times as bright as a black coating) and lighter dirt
    # smudges on a dark panel were read as glare, and the scribe was then lost.  Glare is an even, peaked
    # patch (glare.GLARE_MAX_BLOCK_CV, GLARE_MIN_PEAKEDNESS)
    img, truth = tray_scene([spec], seed=3, settings=TraySettings(image_wh=(900, 1300), cols=1))
    q = _only_panel(img)
    res = rate_panel(rectify_panel(img, q.corners_xy, (75, 150)), PanelSettings())
    assert res["glare_corrected_mm2"] == res["glare_excluded_mm2"] == 0
    tc = truth_creep(truth["panels"][0])
    assert res["scribe_found"] == (tc is not None)
    if tc is not None:
        assert abs(res["creep_mean_mm"] - tc["creep_mean_mm"]) <= 0.3


def _study_scene(seed: int, k: int):
    """Scene ``k`` of ``tests/studies/random_trays.py --seed <seed>``: the image and its truth."""
    import importlib.util
    from pathlib import Path

    path = Path(__file__).parent / "studies" / "random_trays.py"
    spec = importlib.util.spec_from_file_location("random_trays", path)
    study = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(study)
    rng = np.random.default_rng(seed)
    for _ in range(k + 1):
        specs, scene_seed, st = study.random_scene(rng)
    return tray_scene(specs, seed=scene_seed, settings=st)


def _study_panels(img, truth, want):
    """(truth panel, rate_panel result) of every found panel whose spec passes ``want``."""
    centres = np.array([p["centre_img_xy"] for p in truth["panels"]])
    out = []
    for q in find_panels(img):
        p = truth["panels"][int(np.argmin(np.linalg.norm(centres - q.centre_xy, axis=1)))]
        if want(p["spec"]):
            out.append((p, rate_panel(rectify_panel(img, q.corners_xy, (75, 150)), PanelSettings())))
    return out


@pytest.mark.slow
@pytest.mark.parametrize("seed, k", [(2, 5), (3, 6)])
def test_rust_spots_under_glare_on_grey(seed, k):
    # grey panels with rust spots under a glare patch, from tests/studies/random_trays.py (seed 2 scene 5,
    # seed 3 scene 6).  Before the tenth session the glare's estimated light was blurred by a whole 2 mm
    # block, lost a fifth of its peak, and the rest washed the spots out (0.71 of the rust); on the second
    # panel a cluster of spots 3 mm past a line scribe's end carried the line over itself (0.37 of the
    # rust).  Tolerance: issue 3, rust within max(0.1 pp, 15 %) of the painted truth.
    img, truth = _study_scene(seed, k)
    rated = _study_panels(img, truth, lambda sp: sp.coating == "grey" and sp.glare and sp.rust == ("spots",))
    assert rated
    for p, res in rated:
        tr = truth_rust(p, 5.0)["rust_area_pct"]
        assert _rust_ok(res["rust_area_pct"], tr), (res["rust_area_pct"], tr)
        assert res["glare_corrected_mm2"] > 0  # the glare was found and its light taken off


@pytest.mark.slow
@pytest.mark.parametrize("seed, k, coating", [(6, 10, "green"), (6, 12, "dark"), (5, 1, "grey")])
def test_translucent_rust_streaks(seed, k, coating):
    # rust bleeding streaks (translucent, fading) from tests/studies/random_trays.py (seed 6 scenes 10 and 12,
    # seed 5 scene 1).  Before the eleventh session each pixel was unmixed against the listed rust colours
    # only; a streak whose colour lies between two of them read 0.81 (green), 1.22 (dark, through the cone)
    # and 0.85 (grey, with dirt) of its rust.  Tolerance: issue 3, rust within max(0.1 pp, 15 %) of the
    # painted truth.
    img, truth = _study_scene(seed, k)
    rated = _study_panels(img, truth, lambda sp: sp.coating == coating and sp.rust == ("streaks",))
    assert rated
    for p, res in rated:
        tr = truth_rust(p, 5.0)["rust_area_pct"]
        assert _rust_ok(res["rust_area_pct"], tr), (res["rust_area_pct"], tr)


@pytest.mark.slow
def test_an_x_arm_under_corrected_glare_is_not_cut_in_two():
    # scene 8 of tests/studies/random_trays.py --seed 1: the grey panel's X arm under the glare was lost after
    # the glare's light was taken off (the band there washed out, not hidden), and its corrosion zone was
    # rated as rust: 3.6 % for 0.42 %, D610 4 for 6.  The scribe's extent now runs on across corrected glare.
    img, truth = _study_scene(1, 8)
    rated = _study_panels(img, truth, lambda sp: sp.glare and sp.scribe == "x")
    for p, res in rated:
        tr = truth_rust(p, 5.0)["rust_area_pct"]
        assert _rust_ok(res["rust_area_pct"], tr), (res["rust_area_pct"], tr)
        assert res["scribe_kind"] == "x" and abs(res["creep_mean_mm"] - truth_creep(p)["creep_mean_mm"]) <= 0.3
    assert len(rated) == 2  # the grey panel and one more in this scene


# Heavy creep, where the D1654 rating matters most (8 to 12 mm: ratings 3 and 2 of ASTM D1654, via
# coupon.ratings.scales, whose body of the table is from memory).  Before the tenth session, a corroded zone of 15 to 25 mm along the scribe
# bent the light field (0 % rust on every coating from 7 mm creep on), a line was found across the wide
# zone at 10 degrees off with a chord of it as a second arm, an X's crossing stations merged the two
# zones (a corridor of 25 mm a side: rust 2.3 % for 1.1 %), and the zone past the measured stations
# was rated as rust.  Tolerances: issue 3 (creep mean within 0.3 mm, rust within max(0.1 pp, 15 %)).
@pytest.mark.slow
@pytest.mark.parametrize("coating", ["white", "grey", "dark", "green"])
@pytest.mark.parametrize("scribe, creep, kinds, seed", [("line", 8.0, ("general",), 5),
                                                        ("line", 12.0, ("general",), 5),
                                                        ("x", 8.0, ("general",), 5),
                                                        ("x", 10.0, ("spots",), 3)])
def test_heavy_creep(coating, scribe, creep, kinds, seed):
    from coupon.ratings.scales import rate

    img, truth = tray_scene([PanelSpec(coating, kinds, scribe=scribe, creep_mm=creep)], seed=seed,
                            settings=TraySettings(cols=1))
    q = _only_panel(img)
    settings = PanelSettings()
    res = rate_panel(rectify_panel(img, q.corners_xy, settings.size_mm, settings.px_per_mm), settings)
    tc, tr = truth_creep(truth["panels"][0]), truth_rust(truth["panels"][0], 5.0)
    assert res["scribe_kind"] == scribe, res["scribe_note"]
    assert abs(res["creep_mean_mm"] - tc["creep_mean_mm"]) <= 0.3, (res["creep_mean_mm"], tc["creep_mean_mm"])
    true_rating = int(rate("astm-d1654", tc["creep_mean_mm"]))
    assert abs(int(res["creep_rating"]) - true_rating) <= 1
    assert _rust_ok(res["rust_area_pct"], tr["rust_area_pct"]), (res["rust_area_pct"], tr["rust_area_pct"])
    # grade within one class (issue 3; ASTM D610-08 Table 1 via coupon.ratings.scales): the zone past the
    # corridor of an X with 10 mm creep read 0.063 % on a panel with no rust, grade 8 for 10 (review)
    assert abs(int(res["rust_grade"]) - int(rust_grade(tr["rust_area_pct"]))) <= 1


# The corridor left out of the rating follows the zone station by station.  Synthetic ground truth: the
# painted creep varies along the line (each side smoothly, 30 % about its mean); truth_rust leaves out, at
# each 1 mm station, the half width + that station's creep (at least its median, the larger of it and its
# neighbours') + 1 mm.  With one band a side as wide as that side's widest zone (the rule before, the same
# code with each side's profile held at its largest reach) the rated area of these panels came out 4.0 to
# 5.6 % short of the truth (0.2 to 0.4 % now), and rust beside the narrow stretches was not rated.
# Tolerance: issue 3 (areas within 1 % of the nominal after rectification; rust within max(0.1 pp, 15 %)).
@pytest.mark.slow
@pytest.mark.parametrize("coating, scribe, seed", [("white", "line", 3), ("grey", "x", 7), ("dark", "line", 9)])
def test_the_scribe_corridor_follows_the_zone_along_the_line(coating, scribe, seed):
    img, truth = tray_scene([PanelSpec(coating, ("spots",), scribe=scribe, creep_mm=3.0)], seed=seed,
                            settings=TraySettings(cols=1))
    q = _only_panel(img)
    settings = PanelSettings()
    res = rate_panel(rectify_panel(img, q.corners_xy, settings.size_mm, settings.px_per_mm), settings)
    p = truth["panels"][0]
    tr = truth_rust(p, 5.0)
    assert res["scribe_kind"] == scribe, res["scribe_note"]
    assert abs(res["rated_area_mm2"] - tr["rated_area_mm2"]) <= 0.01 * tr["rated_area_mm2"], (
        res["rated_area_mm2"], tr["rated_area_mm2"])
    assert _rust_ok(res["rust_area_pct"], tr["rust_area_pct"]), (res["rust_area_pct"], tr["rust_area_pct"])
    # the corridor narrows where the painted zone does (to the side's median): its reach spans at least half
    # the painted spread above the median
    spread = min(np.ptp(np.maximum(sc[side], np.median(sc[side])))
                 for sc in p["scribes"] for side in ("creep_left_mm", "creep_right_mm"))
    for pr in res["_scribe"].corridor_profiles:
        for side in ("neg_mm", "pos_mm"):
            reach = np.asarray(pr[side])[1:-1]
            assert np.ptp(reach) >= 0.5 * spread, (side, np.ptp(reach), spread)


# A cluster of rust spots 3 mm past a line scribe's end, in pieces parted by a 1 mm gap: the line's extent
# ran on over it (12 mm past the painted end), its corridor took the spots out of the rating and the panel
# read 1.10 % rust for 1.53 % (random-tray study, seed 6 scene 12).  Synthetic ground truth: the painted
# scribe ends and rust; tolerances of issue 3 (rust within max(0.1 pp, 15 %), creep mean within 0.3 mm).
@pytest.mark.slow
def test_a_spot_cluster_past_the_scribe_end_does_not_lengthen_the_line():
    img, truth = _study_scene(6, 12)
    rated = _study_panels(img, truth, lambda sp: sp.coating == "green" and sp.scribe == "line" and sp.dirt)
    assert len(rated) == 1
    p, res = rated[0]
    (a, b), = res["_scribe"].lines
    (sc,) = p["scribes"]
    ends_found = sorted([a[1], b[1]])
    ends_painted = sorted([sc["start_mm"][1], sc["end_mm"][1]])
    assert np.allclose(ends_found, ends_painted, atol=2.0), (ends_found, ends_painted)
    tr = truth_rust(p, 5.0)["rust_area_pct"]
    assert _rust_ok(res["rust_area_pct"], tr), (res["rust_area_pct"], tr)
    assert abs(res["creep_mean_mm"] - truth_creep(p)["creep_mean_mm"]) <= 0.3


@pytest.mark.parametrize("pattern, kept", [
    ("#" * 100 + "...###.#####", (0, 99)),      # the study's cluster: pieces of 3 and 5 behind a gap of 3
    ("#" * 100 + "..########", (0, 99)),         # one short piece behind a gap of 2 (the rule before)
    ("#" * 100 + ".####", (0, 104)),             # a gap of one cell joins
    ("#" * 100 + "..." + "#" * 20, (0, 122)),    # a long end piece behind a gap stays
    ("#" * 100 + "...#.#" + "#" * 14, (0, 119)),  # so do pieces parted by one cell, 17 cells in all
    ("#####..." + "#" * 100, (8, 107)),          # the same at the start
    ("#####.###..." + "#" * 100, (12, 111)),     # a group of pieces at the start
])
def test_end_pieces_behind_a_gap(pattern, kept):
    from coupon.segment.panels.scribe import _longest_run

    # one cell per character, 10 px/mm: an occupied cell holds 10 defect pixels (share 0.5 needs 5)
    occ = np.array([c == "#" for c in pattern])
    cells = np.repeat(np.arange(occ.size), np.where(occ, 10, 0))
    assert _longest_run(cells, 10.0) == kept


# The glare's light is estimated, and on a dark coating the rust area hangs on it: dark streaks under a
# strong glare read 0.92 % for 0.50 % (random-tray study, seed 6 scene 0), outside the tolerance
# and outside twice the stated uncertainty (0.18 %) before the glare term.  The panel is now rated again
# with the light taken off at 0.9 and 1.1 of the estimate, and half the spread joins the uncertainty:
# it must cover the error (coverage factor 2, the GUM's usual expanded uncertainty, common practice) and
# stay small where the rust does not hang on the glare (the green panel of the same scene, and light
# coatings).  Synthetic ground truth: truth_rust.
@pytest.mark.slow
def test_the_uncertainty_carries_the_glare_light_estimate():
    img, truth = _study_scene(6, 0)
    rated = {p["spec"].coating: (p, res) for p, res in _study_panels(img, truth, lambda sp: sp.glare)}
    p, res = rated["dark"]
    tr = truth_rust(p, 5.0)["rust_area_pct"]
    assert abs(res["rust_area_pct"] - tr) <= 2 * res["rust_area_pct_unc"], (res["rust_area_pct"], tr, res)
    assert res["rust_area_pct_unc_glare"] > 0.2
    p, res = rated["green"]
    tr = truth_rust(p, 5.0)["rust_area_pct"]
    assert _rust_ok(res["rust_area_pct"], tr) and res["rust_area_pct_unc_glare"] < 0.1 * max(0.1, 0.15 * tr)
