"""Find coated test panels in a tray photo and rectify each to a millimetre grid.

Pipeline (array in, small results out):

1. :func:`find_panels` works on a copy downscaled to about 1000 px: CIELAB
   distance from the tray's colour, which is modelled as a smooth quadratic
   field so that a lighting gradient across the tray does not leak into the
   foreground; cleaned mask; one quadrilateral per connected component.
2. Each quadrilateral is refined at full resolution: along every side the
   colour is sampled across the edge and the sub-pixel point where it passes
   half-way between tray and panel is found; a robust line is fitted per side
   and the corners are the intersections of neighbouring lines.
3. :func:`rectify_panel` maps the quadrilateral to the nominal panel size with
   :func:`coupon.calibrate.scale.scale_from_rectangle` and warps the photo,
   decoded to *linear* light (so that interpolation keeps area integrals), to
   a fixed grid in px/mm with :func:`coupon.calibrate.scale.warp_to_mm_grid`.

Coordinates: corners are OpenCV (x, y) in full-resolution pixels (``*_xy``).
"""

from __future__ import annotations

from dataclasses import dataclass

import cv2
import numpy as np

from coupon.calibrate import colourspace as cs
from coupon.calibrate.scale import (
    ScaleCalibration,
    check_px_per_mm,
    quad_area_px2,
    scale_from_rectangle,
    warp_to_mm_grid,
)
from coupon.errors import AnalysisError
from coupon.io.images import float01
from coupon.io.threads import thread_pool
from coupon.segment.panels.rust import _sample_idx, lstsq_quadratic, quadratic_design

_LUT_LEVELS = 4096
_DECODE_LUT = cs.srgb_to_linear(np.linspace(0.0, 1.0, _LUT_LEVELS)).astype(np.float32)


#: Linear light of every 8-bit sRGB level (IEC 61966-2-1 decoding), float32.
_DECODE_LUT_U8 = cs.srgb_to_linear(np.arange(256) / 255.0).astype(np.float32)


def linearize(rgb: np.ndarray) -> np.ndarray:
    """sRGB-encoded [0, 1] to linear light [0, 1] through a 4096-level table (float32).

    8-bit pixels (uint8, 0-255) go through the exact table of their 256 levels instead.
    """
    if rgb.dtype == np.uint8:
        # OpenCV's table look-up into a numpy-allocated array: 0.8 ms against 5.5 ms for numpy's
        # fancy indexing on a 1.4 MP panel crop (the same values)
        return cv2.LUT(rgb, _DECODE_LUT_U8, dst=np.empty(rgb.shape, np.float32))
    # one float32 temporary, rounded and clipped in place, then a uint16 index into the table
    t = np.multiply(rgb, np.float32(_LUT_LEVELS - 1), dtype=np.float32)
    np.rint(t, out=t)
    np.clip(t, 0, _LUT_LEVELS - 1, out=t)
    return _DECODE_LUT[t.astype(np.uint16)]


@dataclass(frozen=True)
class PanelQuad:
    """One panel found in a photo.

    Attributes
    ----------
    corners_xy : (4, 2) ndarray
        Top-left, top-right, bottom-right, bottom-left corner, full-resolution px.
    touches : str or None
        Which frame edge the panel's region touches ("left", "right", "top",
        "bottom"), None when it lies wholly inside the frame.
    fill_ratio : float
        Area of the found region over the area of its quadrilateral (about 1 for a panel).
    position : (int, int)
        Row and column in the tray, counted from 1 at the top left.
    """

    corners_xy: np.ndarray
    touches: str | None
    fill_ratio: float
    position: tuple[int, int] = (0, 0)

    @property
    def centre_xy(self) -> np.ndarray:
        """Intersection of the diagonals (the projected centre of a rectangle)."""
        p = self.corners_xy
        return _intersect(_line_through(p[0], p[2]), _line_through(p[1], p[3]))

    @property
    def area_px2(self) -> float:
        return quad_area_px2(self.corners_xy)

    def sides_px(self) -> tuple[float, float]:
        """Mean lengths of the (top/bottom, left/right) side pairs."""
        p = self.corners_xy
        d = lambda a, b: float(np.linalg.norm(p[a] - p[b]))  # noqa: E731
        return (d(0, 1) + d(3, 2)) / 2, (d(0, 3) + d(1, 2)) / 2


def _line_through(a, b) -> np.ndarray:
    return np.cross(np.append(a, 1.0), np.append(b, 1.0))


def _intersect(l1, l2) -> np.ndarray:
    p = np.cross(l1, l2)
    if abs(p[2]) < 1e-12:
        raise AnalysisError("two panel sides are parallel; cannot place a corner")
    return p[:2] / p[2]


def _order_quad(q: np.ndarray) -> np.ndarray:
    c = q.mean(axis=0)
    ang = np.arctan2(q[:, 1] - c[1], q[:, 0] - c[0])
    q = q[np.argsort(ang)]
    return np.roll(q, -int(np.argmin(q.sum(axis=1))), axis=0)


def _poly_design(rows: int, cols: int, rr: np.ndarray, cc: np.ndarray) -> np.ndarray:
    return quadratic_design(cc / cols - 0.5, rr / rows - 0.5)


def _tray_distance(lab: np.ndarray, iterations: int = 3) -> np.ndarray:
    """Colour distance of every pixel from a smooth (quadratic) model of the tray's colour.

    The fit uses at most 40 000 sampled background pixels (float64, small); the model is
    evaluated separably in float32 (a row part plus column terms broadcast), so no coordinate
    grids or full-size float64 design matrices are built.
    """
    rows, cols = lab.shape[:2]
    weight = np.array([0.5, 1.0, 1.0]).astype(np.float32)  # lightness counts half: shading changes it most
    # the weighted channels as planes of one numpy-allocated array (huge pages; cv2.split made three
    # fresh arrays, 7 ms at 1000 x 750)
    planes = np.empty((3, rows, cols), np.float32)
    for k in range(3):
        np.multiply(lab[..., k], weight[k], out=planes[k])
    band = max(2, int(0.03 * min(rows, cols)))
    bg = np.zeros((rows, cols), np.uint8)
    bg[:band], bg[-band:], bg[:, :band], bg[:, -band:] = 1, 1, 1, 1
    # scipy's default 3x3 cross iterated n times: the same diamond as cv2.dilate with a cross
    cross = cv2.getStructuringElement(cv2.MORPH_CROSS, (3, 3))
    grow = max(2, int(0.01 * min(rows, cols)))
    yv = (np.arange(rows, dtype=np.float64) / rows - 0.5)[:, None]
    xv = (np.arange(cols, dtype=np.float64) / cols - 0.5).astype(np.float32)[None, :]
    dist = None
    # the model row_part + x (slope + x c3) and the squared difference one channel at a time, in two
    # numpy-allocated buffers reused by every iteration: 2-D broadcasts run along whole rows, while the
    # (rows, cols, 3) expression broadcast over an inner axis of 3 and made three fresh 9 MB temporaries
    # per iteration (about 15 ms an iteration, against 2 ms)
    buf = np.empty((rows, cols), np.float32)
    for _ in range(iterations):
        idx = _sample_idx(bg, 40000)  # flatnonzero(bg)[::count // 40000] without the full index list
        rr, cc = np.divmod(idx, cols)
        design = _poly_design(rows, cols, rr.astype(np.float64), cc.astype(np.float64))
        coef = _trimmed_fit(design, planes.reshape(3, -1)[:, idx].T.astype(np.float64))  # (6, 3)
        row_part = (coef[0] + yv * coef[2] + yv * yv * coef[5]).astype(np.float32)
        slope = (coef[1] + yv * coef[4]).astype(np.float32)
        c3 = coef[3].astype(np.float32)
        dist = np.zeros((rows, cols), np.float32)
        for k in range(3):
            np.add(slope[:, k:k + 1], xv * c3[k], out=buf)
            np.multiply(xv, buf, out=buf)
            np.add(row_part[:, k:k + 1], buf, out=buf)
            np.subtract(planes[k], buf, out=buf)
            np.multiply(buf, buf, out=buf)
            dist += buf
        np.sqrt(dist, out=dist)
        thr = max(10.0, _otsu(dist))
        fg = (dist > np.float32(thr)).astype(np.uint8)
        bg = 1 - cv2.dilate(fg, cross, iterations=grow)
        if np.count_nonzero(bg) < 100:
            break
    return dist.astype(np.float32, copy=False)


#: Rounds of the trimmed fit of the tray's colour model, and its cut (times the median residual).
TRAY_FIT_ROUNDS = 4
TRAY_FIT_CUT = 3.0


def _trimmed_fit(design: np.ndarray, values: np.ndarray) -> np.ndarray:
    """Quadratic colour model of the tray from sampled pixels that may include some panel pixels.

    Least squares, refitted on the samples within :data:`TRAY_FIT_CUT` times the median residual
    (at least 1 Lab unit) until the kept set settles.  The first samples are a band along the frame's
    edges; a panel standing over an edge put its pixels into that band, and a plain fit bent the tray's
    model towards the panel's colour so far that the tray itself stood out (every panel then lost).
    """
    keep = np.ones(len(values), bool)
    coef = lstsq_quadratic(design, values)
    for _ in range(TRAY_FIT_ROUNDS):
        res = np.sqrt(((design @ coef - values) ** 2).sum(axis=1))
        new = res <= max(TRAY_FIT_CUT * float(np.median(res[keep])), 1.0)
        if new.sum() < 50 or np.array_equal(new, keep):
            break
        keep = new
        coef = lstsq_quadratic(design[keep], values[keep])
    return coef


def _otsu(values: np.ndarray) -> float:
    from skimage.filters import threshold_otsu

    v = values[:: max(1, values.size // 200000)] if values.ndim == 1 else values.ravel()[:: max(1, values.size // 200000)]
    return float(threshold_otsu(np.clip(v, 0, 100)))


def clean_mask(mask: np.ndarray) -> np.ndarray:
    """Opening (3 x 3, once), closing (3 x 3, twice) and hole filling of the coarse panel mask.

    The same as ``ndi.binary_opening`` / ``ndi.binary_closing`` (border value 0) and
    ``ndi.binary_fill_holes`` (holes: background not 4-connected to the frame), by OpenCV on
    uint8: 2 ms instead of 36 ms on a 1000 x 750 mask (``tests/test_panels_fastpath.py``).
    """
    k3 = np.ones((3, 3), np.uint8)
    zero = {"borderType": cv2.BORDER_CONSTANT, "borderValue": 0}  # scipy's border_value=0, also for erosion
    m = cv2.erode(mask.astype(np.uint8), k3, **zero)
    m = cv2.dilate(m, k3, **zero)
    m = cv2.dilate(m, k3, iterations=2, **zero)
    m = cv2.erode(m, k3, iterations=2, **zero)
    # holes: flood the background from a one-pixel frame of background, 4-connected (scipy's cross)
    pad = cv2.copyMakeBorder(m, 1, 1, 1, 1, cv2.BORDER_CONSTANT, value=0)
    cv2.floodFill(pad, None, (0, 0), 2, flags=4)
    return pad[1:-1, 1:-1] != 2


def _coarse_quads(mask: np.ndarray, min_area_px: float) -> list[tuple[np.ndarray, str | None, float]]:
    rows, cols = mask.shape
    n, labels, stats, _ = cv2.connectedComponentsWithStats(mask.astype(np.uint8), connectivity=8)
    out = []
    for k in range(1, n):
        x, y, w, h, area = stats[k]
        if area < min_area_px:
            continue
        touches = None
        m = 3  # the morphological clean-up erodes a few pixels at the frame edge
        if x <= m:
            touches = "left"
        elif y <= m:
            touches = "top"
        elif x + w >= cols - m:
            touches = "right"
        elif y + h >= rows - m:
            touches = "bottom"
        comp = (labels[y:y + h, x:x + w] == k).astype(np.uint8)
        contours, _ = cv2.findContours(comp, cv2.RETR_EXTERNAL, cv2.CHAIN_APPROX_NONE)
        hull = cv2.convexHull(max(contours, key=cv2.contourArea))
        peri = cv2.arcLength(hull, True)
        quad = None
        for eps in np.linspace(0.01, 0.12, 23):
            approx = cv2.approxPolyDP(hull, eps * peri, True)
            if len(approx) == 4:
                quad = approx.reshape(4, 2).astype(np.float64)
                break
            if len(approx) < 4:
                break
        if quad is None:
            quad = cv2.boxPoints(cv2.minAreaRect(hull)).astype(np.float64)
        quad += (x, y)
        quad = _order_quad(quad)
        fill = float(area) / max(quad_area_px2(quad), 1.0)
        out.append((quad, touches, fill))
    return out


def _refine_quad(rgb: np.ndarray, quad_xy: np.ndarray, reach_px: float) -> np.ndarray:
    """Sub-pixel panel edges: half-way colour crossing across each side, robust line fits."""
    centre = quad_xy.mean(axis=0)
    offsets = np.arange(-reach_px, reach_px + 1e-9, 0.5, dtype=np.float32)
    lines = []
    for i in range(4):
        a, b = quad_xy[i], quad_xy[(i + 1) % 4]
        u = (b - a) / np.linalg.norm(b - a)
        nrm = np.array([-u[1], u[0]])
        if np.dot(nrm, (a + b) / 2 - centre) < 0:
            nrm = -nrm  # pointing out of the panel
        t = np.linspace(0.08, 0.92, 40)
        base = a[None, :] + t[:, None] * (b - a)[None, :]
        pts = base[:, None, :] + offsets[None, :, None] * nrm[None, None, :]  # inner (-) to outer (+)
        prof = float01(cv2.remap(rgb, pts[..., 0].astype(np.float32), pts[..., 1].astype(np.float32),
                                  cv2.INTER_LINEAR, borderMode=cv2.BORDER_REPLICATE))
        k = max(2, len(offsets) // 6)
        inner = np.median(prof[:, :k], axis=1)
        outer = np.median(prof[:, -k:], axis=1)
        diff = inner - outer
        denom = (diff * diff).sum(axis=1)
        ok = denom > 0.002
        frac = ((prof - outer[:, None, :]) * diff[:, None, :]).sum(axis=2) / np.maximum(denom, 1e-9)[:, None]
        # first crossing below one half coming from the panel side, on every profile at once
        below = frac < 0.5
        m = np.argmax(below, axis=1)
        use = np.flatnonzero(ok & (m > 0))  # m = 0: no crossing, or the profile starts below one half
        m = m[use]
        f0, f1 = frac[use, m - 1], frac[use, m]
        s = offsets[m - 1] + (0.5 - f0) / (f1 - f0) * (offsets[m] - offsets[m - 1])
        edge_pts = base[use] + s[:, None] * nrm[None, :]
        if len(edge_pts) >= 6:
            vx, vy, x0, y0 = cv2.fitLine(np.asarray(edge_pts, np.float32), cv2.DIST_HUBER, 0, 0.01, 0.01).ravel()
            lines.append(_line_through(np.array([x0, y0]), np.array([x0 + vx, y0 + vy])))
        else:
            lines.append(_line_through(a, b))
    corners = np.array([_intersect(lines[(i - 1) % 4], lines[i]) for i in range(4)])
    if np.max(np.linalg.norm(corners - quad_xy, axis=1)) > 3 * reach_px:
        return quad_xy  # the refinement went astray (a fold, a shadow); keep the coarse corners
    return corners


def _group_1d(values: np.ndarray, reach: float) -> np.ndarray:
    """Group numbers along a line: in ascending order, a value joins the current group when it lies
    within ``reach`` of the group's mean, else it starts the next one.  Returns each value's group
    number (0, 1, ...), in ascending order of the values."""
    order = np.argsort(values, kind="stable")
    group = np.empty(values.size, int)
    members: list[int] = []
    g = -1
    for i in order:
        if not members or values[i] - np.mean(values[members]) >= reach:
            g += 1
            members = []
        members.append(i)
        group[i] = g
    return group


def assign_positions(quads: list[PanelQuad]) -> list[PanelQuad]:
    """Row and column of each panel from its centre: rows top to bottom, columns left to right.

    Rows and columns are the tray's: the centres are turned by the panels' mean roll (the direction
    of their top and bottom sides), then grouped along each axis over the whole tray.  A column
    therefore keeps its number in a row where a slot is empty (the panels to the right of a gap are
    not moved left); only a column empty in every row cannot be seen.  When the columns do not make a
    grid (two panels of a row in one column, as with mixed portrait and landscape rows), each row is
    numbered on its own, left to right.
    """
    if not quads:
        return []
    centres = np.array([q.centre_xy for q in quads])
    widths = np.array([q.sides_px()[0] for q in quads])
    heights = np.array([q.sides_px()[1] for q in quads])
    axis = np.zeros(2)
    for q in quads:
        c = q.corners_xy
        for a, b in ((c[0], c[1]), (c[3], c[2])):  # TL -> TR, BL -> BR
            axis += (b - a) / max(np.linalg.norm(b - a), 1e-9)
    ang = float(np.arctan2(axis[1], axis[0]))
    cos, sin = np.cos(-ang), np.sin(-ang)
    x = centres[:, 0] * cos - centres[:, 1] * sin
    y = centres[:, 0] * sin + centres[:, 1] * cos
    rows = _group_1d(y, 0.5 * float(np.median(heights)))
    cols = _group_1d(x, 0.5 * float(np.median(widths)))
    # the tray's columns only when they make a grid: within each row, columns strictly increasing left to
    # right (so one panel per slot; mixed portrait and landscape panels shift the columns between rows and
    # put two panels of a row in one column); otherwise each row is numbered on its own
    in_row = [np.flatnonzero(rows == r) for r in range(int(rows.max()) + 1)]
    in_row = [m[np.argsort(x[m], kind="stable")] for m in in_row]
    if not all(np.all(np.diff(cols[m]) > 0) for m in in_row):
        cols = np.empty(len(quads), int)
        for m in in_row:
            cols[m] = np.arange(m.size)
    out = [PanelQuad(q.corners_xy, q.touches, q.fill_ratio, (int(rows[i]) + 1, int(cols[i]) + 1))
           for i, q in enumerate(quads)]
    return sorted(out, key=lambda q: q.position)


def find_panels(rgb: np.ndarray, max_side_px: int = 1000, min_area_frac: float = 0.004) -> list[PanelQuad]:
    """Find every panel in a tray photo.

    Parameters
    ----------
    rgb : (M, N, 3) ndarray of float32 (sRGB [0, 1]) or uint8 (as decoded)
        sRGB photo in [0, 1] (package convention).
    max_side_px : int
        Working size of the coarse search.
    min_area_frac : float
        Smallest region, as a fraction of the frame, that can be a panel.

    Returns
    -------
    list of PanelQuad
        In tray order (row by row from the top left); empty when nothing stands
        out from the tray.
    """
    rows, cols = rgb.shape[:2]
    f = min(1.0, max_side_px / max(rows, cols))
    small = cv2.resize(rgb, (max(1, int(round(cols * f))), max(1, int(round(rows * f)))),
                       interpolation=cv2.INTER_AREA) if f < 1 else rgb
    lab = cv2.cvtColor(np.ascontiguousarray(float01(small), dtype=np.float32), cv2.COLOR_RGB2Lab)
    dist = _tray_distance(lab)
    thr = max(10.0, _otsu(dist))
    mask = clean_mask(dist > thr)
    found = _coarse_quads(mask, min_area_frac * mask.size)
    quads = []
    for quad_small, touches, fill in found:
        quad = (quad_small + 0.5) / f - 0.5
        if touches is None:
            quad = _refine_quad(rgb, quad, reach_px=max(4.0, 2.5 / f))
        quads.append(PanelQuad(quad, touches, fill))
    return assign_positions(_drop_background_at_edges(quads))


#: A region at the frame's edge larger than this (times the whole panels' median longest side, or
#: their median area) is background beyond the tray (a bench, a cabinet wall), not a panel standing
#: over the edge.
EDGE_REGION_MAX_REL = 1.3


def _drop_background_at_edges(quads: list[PanelQuad]) -> list[PanelQuad]:
    """The regions touching the frame's edge that can be panels partly outside it.

    The part of a panel inside the frame is no longer and no larger than a whole panel; a strip of
    bench along the whole frame edge is.  Without any whole panel to compare with, every region is kept.
    """
    inside = [q for q in quads if q.touches is None]
    if not inside:
        return quads
    side = float(np.median([max(q.sides_px()) for q in inside]))
    area = float(np.median([q.area_px2 for q in inside]))
    keep = []
    for q in quads:
        if q.touches is not None:
            span = q.corners_xy.max(axis=0) - q.corners_xy.min(axis=0)
            if max(span) > EDGE_REGION_MAX_REL * side or q.area_px2 > EDGE_REGION_MAX_REL * area:
                continue
        keep.append(q)
    return keep


def check_panel_size(quad: PanelQuad, size_mm: tuple[float, float], px_per_mm: float | None = None,
                     median_area_px2: float | None = None, tolerance: float = 0.25) -> str | None:
    """Why a found quadrilateral is not a panel of the nominal size (None when it fits).

    With a scale (px/mm from a profile) the area is compared with the nominal
    area; without one, the side ratio with the nominal side ratio and the area
    with the median of the panels in the same photo.  ``tolerance`` is relative.
    """
    long_mm, short_mm = max(size_mm), min(size_mm)
    a, b = quad.sides_px()
    ratio = max(a, b) / max(min(a, b), 1e-9)
    nominal = long_mm / short_mm
    if abs(ratio / nominal - 1) > tolerance:
        return (f"panel sides are in ratio {ratio:.2f}, the nominal {long_mm:g}x{short_mm:g} mm panel has "
                f"{nominal:.2f}; check --panel-size or whether two panels touch")
    if px_per_mm:
        area_mm2 = quad.area_px2 / px_per_mm**2
        if abs(area_mm2 / (long_mm * short_mm) - 1) > tolerance * 2:
            side = np.sqrt(area_mm2 / nominal)
            return (f"panel measures about {side:.0f}x{side * nominal:.0f} mm at the profile's scale "
                    f"({px_per_mm:.2f} px/mm), not the nominal {short_mm:g}x{long_mm:g} mm; check --panel-size")
    elif median_area_px2:
        rel = quad.area_px2 / median_area_px2
        if abs(rel - 1) > tolerance * 2:
            return (f"panel area is {rel:.2f} times the median of the panels in this photo; "
                    "a panel of another size, or two panels touching? check --panel-size")
    return None


@dataclass(frozen=True)
class RectifiedPanel:
    """A panel warped to a millimetre grid.

    Attributes
    ----------
    linear : (R, C, 3) ndarray of float32
        Linear-light RGB on the grid; pixel (r, c) has its centre at
        ((c + 0.5) / px_per_mm, (r + 0.5) / px_per_mm) mm from the top-left corner.
    px_per_mm : float
        Grid resolution.
    size_mm : (width_mm, height_mm)
        Panel size as it lies in the photo (portrait or landscape).
    scale : ScaleCalibration
        The rectangle calibration (homography image px -> panel mm).
    """

    linear: np.ndarray
    px_per_mm: float
    size_mm: tuple[float, float]
    scale: ScaleCalibration


def rectify_panel(rgb: np.ndarray, corners_xy: np.ndarray, size_mm: tuple[float, float],
                  px_per_mm: float = 10.0) -> RectifiedPanel:
    """Warp one panel to the nominal size at ``px_per_mm`` in linear light.

    Only the panel's bounding box is decoded to linear light, so a large photo
    costs little more than the panels in it.
    """
    cal = scale_from_rectangle(corners_xy, size_mm[0], size_mm[1])
    w_mm, h_mm = cal.details["width_mm"], cal.details["height_mm"]
    rows, cols = rgb.shape[:2]
    x0 = int(max(0, np.floor(corners_xy[:, 0].min()) - 3))
    y0 = int(max(0, np.floor(corners_xy[:, 1].min()) - 3))
    x1 = int(min(cols, np.ceil(corners_xy[:, 0].max()) + 4))
    y1 = int(min(rows, np.ceil(corners_xy[:, 1].max()) + 4))
    crop = linearize(rgb[y0:y1, x0:x1])
    shift = np.array([[1, 0, x0], [0, 1, y0], [0, 0, 1]], dtype=np.float64)
    check_px_per_mm(px_per_mm)
    s = float(px_per_mm)
    lin = np.empty((int(round(h_mm * s)), int(round(w_mm * s)), 3), np.float32)
    warp_to_mm_grid(crop, cal.homography @ shift, (w_mm, h_mm), s, dst=lin)
    return RectifiedPanel(lin, float(px_per_mm), (w_mm, h_mm), cal)


#: Finder-pattern pre-check of the QR search: adaptive-threshold window (px) and offset (grey levels of
#: 255).  The offset lies well below the black-white contrast of a printed label (about 200 levels)
#: and well above camera noise and coating texture, whose speckle would otherwise give thousands
#: of contours.
QR_PRECHECK_BLOCK_PX = 31
QR_PRECHECK_OFFSET = 30
#: The decoder runs on a crop only when at least this many finder-pattern candidates are found
#: (a code has three; two leaves room for one lost to glare or blur, a false alarm costs only time).
QR_PRECHECK_MIN_FINDERS = 2


def qr_finder_count(u8: np.ndarray) -> int:
    """Number of QR finder-pattern candidates in a grey uint8 image.

    A finder pattern is a dark square ring around a light ring around a dark
    core (1:1:3:1:1 modules).  After a local (adaptive) threshold it is a dark
    contour whose hole holds a dark contour: a grandchild in the contour tree.
    Much cheaper than the decoder's own search, so a crop without a code costs
    little.  The outer contour must be at least 40 px2 (7 x 7 modules of about
    one pixel) and 2 to 20 times the area of the core (49 / 9 for a square view).
    """
    dark = cv2.adaptiveThreshold(u8, 1, cv2.ADAPTIVE_THRESH_MEAN_C, cv2.THRESH_BINARY_INV,
                                 QR_PRECHECK_BLOCK_PX, QR_PRECHECK_OFFSET)
    contours, hier = cv2.findContours(dark, cv2.RETR_TREE, cv2.CHAIN_APPROX_SIMPLE)
    if hier is None:
        return 0
    child = hier[0][:, 2]
    outer = np.flatnonzero(child >= 0)
    outer = outer[child[child[outer]] >= 0]
    n = 0
    for k in outer:  # few candidates: noise speckle has no grandchildren
        a_outer = cv2.contourArea(contours[k])
        a_core = cv2.contourArea(contours[child[child[k]]])
        if a_outer >= 40 and a_core > 0 and 2.0 <= a_outer / a_core <= 20.0:
            n += 1
    return n


def read_qr_codes(rgb: np.ndarray, quads: list[PanelQuad], grow: float = 0.25) -> dict[int, tuple[str, np.ndarray]]:
    """Decode QR codes on or beside each panel (OpenCV's QRCodeDetector).

    Each panel's region, grown by ``grow`` of its size to take in a holder
    label, is searched; returns panel index -> (text, QR corners xy in the photo).
    The decoder (the costly part) runs only on crops where :func:`qr_finder_count`
    finds at least ``QR_PRECHECK_MIN_FINDERS`` finder patterns.
    """
    out: dict[int, tuple[str, np.ndarray]] = {}
    scored: dict[int, tuple[float, str, np.ndarray]] = {}
    rows, cols = rgb.shape[:2]

    def crop(q):
        c = q.corners_xy
        span = c.max(axis=0) - c.min(axis=0)
        x0, y0 = np.maximum(0, np.floor(c.min(axis=0) - grow * span)).astype(int)
        x1, y1 = np.minimum([cols, rows], np.ceil(c.max(axis=0) + grow * span)).astype(int)
        grey = cv2.cvtColor(np.ascontiguousarray(rgb[y0:y1, x0:x1]), cv2.COLOR_RGB2GRAY)
        u8 = grey if grey.dtype == np.uint8 else np.clip(np.rint(grey * 255.0), 0, 255).astype(np.uint8)
        return x0, y0, u8, qr_finder_count(u8)

    # the pre-check of the crops on two threads (OpenCV's threshold and contour search release the GIL):
    # 60 ms for six panel crops of a 12 MP tray on one
    threads = min(2, cv2.getNumThreads(), len(quads))
    if threads > 1:
        with thread_pool(threads, "coupon-qr") as pool:
            crops = list(pool.map(crop, quads))
    else:
        crops = [crop(q) for q in quads]
    det = cv2.QRCodeDetector()
    for i, (q, (x0, y0, u8, finders)) in enumerate(zip(quads, crops)):
        c = q.corners_xy
        if finders < QR_PRECHECK_MIN_FINDERS:
            continue  # no code here: skip the decoder's search (about 0.05 s per panel crop)
        # QR modules can be only a few pixels in a tray photo: upsample small crops
        up = 2.0 if max(u8.shape) < 1500 else 1.0
        if up > 1:
            u8 = cv2.resize(u8, None, fx=up, fy=up, interpolation=cv2.INTER_CUBIC)
        try:
            ok, texts, pts, _ = det.detectAndDecodeMulti(u8)
        except cv2.error:
            ok = False
        if not ok:
            continue
        best = None
        for text, p in zip(texts, pts):
            if not text:
                continue
            p_xy = np.asarray(p, np.float64).reshape(4, 2) / up + (x0, y0)
            centre = p_xy.mean(axis=0)
            inside = cv2.pointPolygonTest(c.astype(np.float32).reshape(-1, 1, 2), tuple(map(float, centre)), True)
            if best is None or inside > best[0]:
                best = (inside, text, p_xy)
        if best is not None:
            scored[i] = best
    # a holder label between two panels belongs to the panel it is nearest to (or inside)
    for i, (score, text, p_xy) in scored.items():
        rivals = [j for j, b in scored.items() if b[1] == text and b[0] > score]
        if not rivals:
            out[i] = (text, p_xy)
    return out
