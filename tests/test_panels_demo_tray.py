"""Regression: the demo's 168 h campaign tray (the worst case of the full demo), every panel in tolerance.

Built exactly as ``coupon/demo_panels.py`` builds it (same systems, seed 301 and TraySettings).
It held the failures that were fixed: a thin scribe on grey (0.2 mm creep) that the line search
lost, so its rust counted as a 0.55 % false positive; and JPEG chroma blocks on a clean green panel
rated as pinpoint rust; and, in the landscape 2600 x 2000 frame of earlier demos (3.1 px/mm on the
panels), grey pinpoint rust under-measured by about half (R1C1: 0.0085 % against 0.036 % true, D610
grade 10 against 8), which the portrait frame of ``TRAY_WH`` (4.7 px/mm) cures.  Tolerances of issue 3:
rust area within max(0.1 percentage points, 15 % relative) of the truth; ASTM D610 grade within one
class; creep mean within 0.3 mm.
"""

from __future__ import annotations

import numpy as np
import pytest

from coupon.demo_panels import SYSTEMS, TRAY_WH
from coupon.ratings.panel_ratings import rust_grade
from coupon.segment.panels import PanelSettings, rate_panel
from coupon.segment.panels.detect import find_panels, rectify_panel
from coupon.synth.panels import (
    PanelSpec,
    TraySettings,
    tray_scene,
    truth_creep,
    truth_rust,
)

HOURS = 168
SEED = 301  # the demo's seed for its second tray (300 + index of 168 h in the schedule)


def _specs(hours: float) -> list[PanelSpec]:
    specs = []
    for _rep in range(3):
        for coat, kinds, rust_rate, creep_rate in SYSTEMS.values():
            amount = rust_rate * hours / 1000
            specs.append(PanelSpec(coat, kinds if amount > 0 else (), amount=max(amount, 0.01), scribe="line",
                                   creep_mm=creep_rate * hours / 1000))
    return specs


@pytest.fixture(scope="module")
def rated_demo_tray():
    img, truth = tray_scene(_specs(HOURS), seed=SEED,
                            settings=TraySettings(image_wh=TRAY_WH, cols=3, plane_px_per_mm=8.0))
    quads = find_panels(img)
    settings = PanelSettings()
    by_pos = {q.position: q for q in quads}
    out = []
    for p in truth["panels"]:
        q = by_pos[p["position"]]
        out.append((p, rate_panel(rectify_panel(img, q.corners_xy, settings.size_mm, settings.px_per_mm), settings)))
    return quads, out


POSITIONS = [(r, c) for r in (1, 2, 3) for c in (1, 2, 3)]


@pytest.mark.slow
@pytest.mark.parametrize("position", POSITIONS)
def test_demo_tray_every_panel_within_tolerance(rated_demo_tray, position):
    quads, rated = rated_demo_tray
    assert len(quads) == 9
    p, res = next((p, res) for p, res in rated if p["position"] == position)
    tr = truth_rust(p, edge_mm=5.0)["rust_area_pct"]
    where = (p["position"], p["spec"].coating, res["rust_area_pct"], tr)
    # issue 3 tolerance: max(0.1 percentage points, 15 % relative)
    assert abs(res["rust_area_pct"] - tr) <= max(0.1, 0.15 * tr), where
    # ASTM D610-08 Table 1 grades (via coupon.ratings.scales): within one class
    assert abs(int(res["rust_grade"]) - int(rust_grade(tr))) <= 1, where


@pytest.mark.slow
def test_demo_tray_thin_scribes_found_and_measured(rated_demo_tray):
    _, rated = rated_demo_tray
    for p, res in rated:
        tc = truth_creep(p)
        assert res["scribe_found"] and res["scribe_kind"] == "line", p["position"]
        assert np.isfinite(res["creep_mean_mm"])
        assert abs(res["creep_mean_mm"] - tc["creep_mean_mm"]) <= 0.3, (p["position"], res["creep_mean_mm"], tc)


# The known weakness below 4 px/mm, kept in view: the same 168 h tray in the landscape 2600 x 2000 frame of
# earlier demos puts the panels at about 3.1 px/mm, where pinpoint rust on grey reads a quarter to a half of
# the truth (R1C1: 0.0085 % against 0.036 % before the eleventh session, 0.0105 % since the rust colours
# between the listed ones are fitted too).  Within 0.1 percentage points, so the area passes the issue's
# tolerance.  The D610 grade read 10 against 8 and now 9 (0.0105 % lies just past the 0.01 % boundary of
# grade 9): no fix, so the strict xfail checks the area's relative error instead, which shows a real one.
@pytest.fixture(scope="module")
def grey_pinpoint_at_3_px_per_mm():
    img, truth = tray_scene(_specs(HOURS), seed=SEED,
                            settings=TraySettings(image_wh=(2600, 2000), cols=3, plane_px_per_mm=8.0))
    p = next(p for p in truth["panels"] if p["position"] == (1, 1))
    quads = find_panels(img)
    # the landscape frame shows beyond the tray at both sides (the scene's dark margin, like a bench in a real
    # photo): strips along the whole frame edge, not panels over it (EDGE_REGION_MAX_REL)
    assert [q.position for q in quads] == [(r, c) for r in (1, 2, 3) for c in (1, 2, 3)]
    assert all(q.touches is None for q in quads)
    q = quads[0]
    settings = PanelSettings()
    panel = rectify_panel(img, q.corners_xy, settings.size_mm, settings.px_per_mm)
    photo_px_per_mm = float(np.sqrt(q.area_px2 / (75 * 150)))
    return photo_px_per_mm, rate_panel(panel, settings), truth_rust(p, edge_mm=5.0)["rust_area_pct"]


@pytest.mark.slow
def test_grey_pinpoint_at_3_px_per_mm_area_within_tolerance(grey_pinpoint_at_3_px_per_mm):
    photo_px_per_mm, res, tr = grey_pinpoint_at_3_px_per_mm
    assert photo_px_per_mm < 4  # below the limit the command warns about (coupon.cli.panels.limit_warnings)
    assert abs(res["rust_area_pct"] - tr) <= max(0.1, 0.15 * tr), (res["rust_area_pct"], tr)


@pytest.mark.slow
@pytest.mark.xfail(strict=True, raises=AssertionError,
                   reason="grey pinpoint at 3.1 px/mm reads a quarter to a half of the truth")
def test_grey_pinpoint_at_3_px_per_mm_area_within_15_percent(grey_pinpoint_at_3_px_per_mm):
    _, res, tr = grey_pinpoint_at_3_px_per_mm
    # the relative part of issue 3's tolerance alone (the 0.1 percentage points cover this small area)
    assert abs(res["rust_area_pct"] / tr - 1) <= 0.15, (res["rust_area_pct"], tr)
