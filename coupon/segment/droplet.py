"""Droplet test, one frame: find the drop, map its pH, split zones, find rust, radial profile.

Pipeline of :func:`analyse_frame` (pure: arrays in, a frozen result out)
=======================================================================
1. **Find** the drop on a reduced copy of the frame (longest side about
   ``FIND_SIDE_PX``; means of whole k x k blocks for frames at least twice
   that size): indicator solution is coloured, bare steel is grey, so
   the colour saturation (max - min of sRGB, lightly smoothed) separates them.
   The threshold comes from the bare metal's own spread (the frame border,
   median + 8 robust sigma, at least 0.03).  Closing and hole filling absorb
   glare spots and rust flecks inside the drop; the largest blob is the drop.
   A blob counts as a drop only if it is large enough (``min_area_mm2``) and a
   fair share of it reads as indicator colour (``min_coverage_pct``): a dried
   spot or a rust ring left on the metal is reported as *no drop*, not as an
   error.
2. **Refine** on a crop around the drop at a working resolution (the drop
   about ``work_diameter_px`` across, never enlarged; averaging with
   ``cv2.INTER_AREA``), which keeps a 4-megapixel frame cheap without losing
   area accuracy.  The outline gives area, equivalent diameter, centre and the
   moment ellipse (same second moments as the mask).
3. **pH**: ``IndicatorModel.map_rgb`` on the colour-corrected drop pixels.
   Pixels farther from the indicator path than the model's ``max_distance``
   are NaN (glare, rust, metal showing through).
4. **Rust** is opaque orange-brown precipitate.  On hue alone it lies close to
   the acid end of a universal indicator seen over steel (orange over grey
   reads brown), so hue is only a gate: a rust pixel must also be much darker
   than the indicator colour at the nearest pH on the calibrated path
   (``rust_darker_l`` in CIELAB L*, unweighted, whereas the path distance
   weights L* by half) and have some chroma.  The test is made on the pixel's
   8-bit colour (as the pH mapping is).  Rust pixels never count in a pH
   zone.
5. **Zones**: acidic (pH < ``acidic_below``), basic (pH > ``basic_above``),
   neutral (valid pH between), each in mm2 and percent of the drop area.
6. **Radial profile**: median pH in rings of normalised radius of the
   moment ellipse (0 centre, 1 edge).

Speed (a series of 4-megapixel frames: about twice the frame's decode time)
------------------------------------------------------------------------
- Everything made from the indicator model alone is made once per model and
  process (:func:`path_tables`, keyed by the model's content, so process-pool
  workers keep it too): the copy at ``max_distance = inf`` whose colour -> pH
  table (``IndicatorModel.map_rgb``) fills as frames come in, the path's L*
  against pH, and a table of the rust verdict per 8-bit colour (the verdict
  depends on the colour only), so later frames compute CIELAB only for colours
  not seen before.
- The full frame is read once (the reduced copy for finding); everything else
  works on the drop's crop at the working resolution, morphology on the
  mask's bounding box (:func:`_clean_blob`), ring medians from one sort
  (:func:`group_medians`).

References
----------
Moment ellipse: the ellipse with the same second central moments as the
region, as in ``skimage.measure.regionprops``.
"""

from __future__ import annotations

import dataclasses
import hashlib
from dataclasses import dataclass, field

import cv2
import numpy as np

from coupon.calibrate import colourspace as cs
from coupon.calibrate.colour import ColourCorrection, apply_correction
from coupon.calibrate.indicator import IndicatorModel
from coupon.calibrate.scale import check_px_per_mm
from coupon.errors import AnalysisError
from coupon.io.images import float01

FIND_SIDE_PX = 512
#: Radius limits of the centre and rim readings (normalised radius), as the issue defines them.
CENTRE_R, RIM_R = 0.2, 0.8


@dataclass(frozen=True)
class DropletSettings:
    """Settings that change the numbers (recorded in every output).

    Attributes
    ----------
    acidic_below, basic_above : float
        pH thresholds of the acidic (anodic) and basic (cathodic) zones.
    rings : int
        Number of rings of the radial profile.
    work_diameter_px : int
        The drop is analysed at about this diameter (reduced, never enlarged).
    min_area_mm2 : float
        Smaller coloured blobs are not a drop.
    min_coverage_pct : float
        A blob with less indicator colour than this (percent of its pixels) is not a drop.
    rust_darker_l : float
        A rust pixel is at least this much darker (CIELAB L*) than the indicator at its nearest pH.
    rust_hue_deg : (float, float)
        CIELAB hue angle range of rust (orange to brown).
    rust_min_chroma : float
        Minimum CIELAB chroma of rust (grey metal and dark glare edges are not rust).
    """

    acidic_below: float = 6.0
    basic_above: float = 8.0
    rings: int = 20
    work_diameter_px: int = 320
    min_area_mm2: float = 0.5
    min_coverage_pct: float = 25.0
    rust_darker_l: float = 9.0
    rust_hue_deg: tuple[float, float] = (20.0, 85.0)
    rust_min_chroma: float = 8.0

    def __post_init__(self):
        if not self.acidic_below < self.basic_above:
            raise AnalysisError(
                f"the acidic threshold must lie below the basic one, got --acidic-below {self.acidic_below:g} "
                f"and --basic-above {self.basic_above:g}")
        if self.rings < 2:
            raise AnalysisError(f"the radial profile needs at least 2 rings, got {self.rings}")

    def to_dict(self) -> dict:
        return dataclasses.asdict(self)


@dataclass(frozen=True)
class DropletFrame:
    """What one frame says.  Lengths in mm, areas in mm2, positions of the full frame.

    ``measures`` holds the scalar results (the CSV columns); ``ring_*`` the radial
    profile; ``ph_map``, ``drop_mask`` and ``rust_mask`` cover the drop's bounding box
    and a margin of about 3 % of its size at the working resolution
    (``work_px_per_mm``), whose top-left corner lies at ``crop_origin_mm`` of the
    frame; None when there is no drop.
    """

    drop_found: bool
    note: str
    measures: dict
    ring_r_norm: np.ndarray
    ring_ph_median: np.ndarray
    ring_n_px: np.ndarray
    ph_map: np.ndarray | None = field(default=None, repr=False)
    drop_mask: np.ndarray | None = field(default=None, repr=False)
    rust_mask: np.ndarray | None = field(default=None, repr=False)
    work_px_per_mm: float = float("nan")
    crop_origin_mm: tuple[float, float] = (0.0, 0.0)


#: Scalar measures of a frame, in CSV order (NaN when there is no drop).
MEASURES = [
    "drop_area_mm2", "drop_diameter_mm", "centre_x_mm", "centre_y_mm", "ellipse_major_mm", "ellipse_minor_mm",
    "ellipse_angle_deg", "ph_median", "ph_p05", "ph_p95", "ph_centre", "ph_rim",
    "acidic_area_mm2", "acidic_area_pct", "neutral_area_mm2", "neutral_area_pct", "basic_area_mm2",
    "basic_area_pct", "rust_area_mm2", "rust_area_pct", "rust_r_norm", "rust_r_mm", "acidic_r_norm",
    "basic_r_norm", "indicator_coverage_pct",
]


def saturation(rgb: np.ndarray, sigma_px: float = 1.0) -> np.ndarray:
    """Colour saturation max(R, G, B) - min(R, G, B) of sRGB [0, 1], Gaussian-smoothed, float32.

    Computed as S x V of OpenCV's HSV conversion (V = max, S = (max - min) / max),
    one pass in C; equal to max - min within float32 rounding (about 1e-7).
    """
    rgb = np.ascontiguousarray(rgb, np.float32)
    hsv = cv2.cvtColor(rgb, cv2.COLOR_RGB2HSV)
    sat = cv2.multiply(hsv[..., 1], hsv[..., 2])
    return cv2.GaussianBlur(sat, (0, 0), sigma_px) if sigma_px > 0 else sat


def _resize(rgb: np.ndarray, factor: float) -> tuple[np.ndarray, float, float]:
    """Reduce by ``factor`` (<= 1) with area averaging; returns image and the exact (fx, fy)."""
    if factor >= 1.0:
        return rgb, 1.0, 1.0
    h, w = rgb.shape[:2]
    nw, nh = max(1, int(round(w * factor))), max(1, int(round(h * factor)))
    out = cv2.resize(rgb, (nw, nh), interpolation=cv2.INTER_AREA)
    return out, nw / w, nh / h


def _reduce_for_find(rgb: np.ndarray) -> tuple[np.ndarray, float, float]:
    """The reduced copy the drop is found on: longest side about ``FIND_SIDE_PX``.

    An integer factor (the frame trimmed by under a block at its right and
    bottom edges) when the frame is at least twice that size: OpenCV's area
    averaging over whole k x k blocks is its fast path, and each small pixel is
    exactly the mean of k x k frame pixels.  Smaller frames: fractional area
    averaging (never enlarged).
    """
    h, w = rgb.shape[:2]
    k = max(h, w) // FIND_SIDE_PX
    if k < 2:
        return _resize(rgb, FIND_SIDE_PX / max(h, w))
    nh, nw = h // k, w // k
    small = cv2.resize(rgb[:nh * k, :nw * k], (nw, nh), interpolation=cv2.INTER_AREA)
    return small, 1.0 / k, 1.0 / k


def _border_band(shape_rc, frac: float = 0.06) -> np.ndarray:
    h, w = shape_rc
    b = np.zeros(shape_rc, bool)
    dh, dw = max(1, int(frac * h)), max(1, int(frac * w))
    b[:dh], b[-dh:], b[:, :dw], b[:, -dw:] = True, True, True, True
    return b


def drop_threshold(sat: np.ndarray) -> tuple[float, float]:
    """Saturation threshold between bare metal and drop (see the module notes).

    The bare metal is sampled in the frame's border band (a drop is placed in
    the middle of the view): median + max(8 robust sigma, 0.03).  Otsu's
    threshold is not used because a developed drop has two populations of its
    own (saturated centre, paler rim) and Otsu splits those instead.
    """
    h, w = sat.shape
    dh, dw = max(1, int(0.06 * h)), max(1, int(0.06 * w))
    # the pixels of _border_band, gathered strip by strip (cheaper than a boolean mask)
    band = np.concatenate([sat[:dh].ravel(), sat[h - dh:].ravel(), sat[dh:h - dh, :dw].ravel(),
                           sat[dh:h - dh, w - dw:].ravel()])
    med = float(np.median(band))
    sigma = 1.4826 * float(np.median(np.abs(band - med)))
    return med + max(8.0 * sigma, 0.03), med


def _disk(radius_px: int) -> np.ndarray:
    r = max(1, int(radius_px))
    return cv2.getStructuringElement(cv2.MORPH_ELLIPSE, (2 * r + 1, 2 * r + 1))


def _fill_holes(mask: np.ndarray) -> np.ndarray:
    """Fill holes: flood the background from a one-pixel frame around the mask (OpenCV, fast)."""
    h, w = mask.shape
    padded = np.zeros((h + 2, w + 2), np.uint8)
    padded[1:-1, 1:-1] = mask.astype(np.uint8)
    flood = padded.copy()
    cv2.floodFill(flood, np.zeros((h + 4, w + 4), np.uint8), (0, 0), 2)
    return (flood[1:-1, 1:-1] != 2)


def _clean_blob(mask: np.ndarray, scale_px: float) -> np.ndarray:
    """Close gaps, fill holes (glare, rust flecks), open off specks; keep the largest blob.

    Works on the bounding box of the mask grown by twice the closing radius
    (clipped to the image), which gives exactly the full-image result: closing
    and opening reach at most that far, the box's rim stays background (so hole
    filling floods the same background), and every blob lies inside it.
    """
    r_close = max(1, round(0.02 * scale_px))
    r_open = max(1, round(0.01 * scale_px))
    m8 = mask.view(np.uint8) if mask.dtype == bool else mask.astype(np.uint8)
    x, y, bw, bh = cv2.boundingRect(m8)
    out = np.zeros(mask.shape, bool)
    if bw == 0 or bh == 0:
        return out
    g = 2 * r_close + 2
    r0, r1 = max(0, y - g), min(mask.shape[0], y + bh + g)
    c0, c1 = max(0, x - g), min(mask.shape[1], x + bw + g)
    m = cv2.morphologyEx(m8[r0:r1, c0:c1], cv2.MORPH_CLOSE, _disk(r_close))
    m = _fill_holes(m)
    m = cv2.morphologyEx(m.view(np.uint8), cv2.MORPH_OPEN, _disk(r_open))
    # the labels' areas by bincount: OpenCV's statistics pass is single-threaded and slower on the crop
    n, labels = cv2.connectedComponents(m, connectivity=8, ltype=cv2.CV_32S)
    if n <= 1:
        return out
    k = 1 + int(np.argmax(np.bincount(labels.ravel(), minlength=n)[1:]))
    out[r0:r1, c0:c1] = labels == k
    return out


def moment_ellipse(mask: np.ndarray) -> tuple[float, float, float, float, float]:
    """Centre (x, y), semi-axes (a >= b) and angle (rad, of a from +x toward +y) of a mask, in px."""
    mo = cv2.moments(mask.astype(np.uint8), binaryImage=True)
    m00 = mo["m00"]
    cx, cy = mo["m10"] / m00, mo["m01"] / m00
    cov = np.array([[mo["mu20"], mo["mu11"]], [mo["mu11"], mo["mu02"]]]) / m00
    evals, evecs = np.linalg.eigh(cov)
    b, a = 2.0 * np.sqrt(np.maximum(evals, 1e-12))
    angle = float(np.arctan2(evecs[1, 1], evecs[0, 1]))
    return float(cx), float(cy), float(a), float(b), angle


def normalised_radius(shape_rc, ellipse) -> np.ndarray:
    """Normalised radius of every pixel of a grid in the ellipse's frame (1 on the outline)."""
    cx, cy, a, b, ang = ellipse
    yy, xx = np.ogrid[0:shape_rc[0], 0:shape_rc[1]]
    dx, dy = xx - cx, yy - cy
    u = np.cos(ang) * dx + np.sin(ang) * dy
    v = -np.sin(ang) * dx + np.cos(ang) * dy
    return np.sqrt((u / a) ** 2 + (v / b) ** 2).astype(np.float32)


@dataclass(frozen=True)
class _PathTables:
    """What a series needs of one indicator model, made once per model and process.

    ``nearest`` is the model at ``max_distance = inf`` (the rust test needs the
    nearest path pH of every pixel); it is kept for the whole series because
    its colour -> pH lookup (``IndicatorModel.map_rgb``) grows as frames come in,
    so later frames project only colours not seen before.  ``grid_ph`` and
    ``grid_l`` are the path's L* against pH for the rust test.
    """

    nearest: IndicatorModel
    grid_ph: np.ndarray
    grid_l: np.ndarray
    rust: dict = field(default_factory=dict)


_TABLES: dict[bytes, _PathTables] = {}
#: Models kept per process (each holds colour lookup tables of about 128 MB once used).
_TABLES_KEEP = 2


def _model_key(model: IndicatorModel) -> bytes:
    # by content, not identity: a process-pool worker receives a fresh copy of the model with every frame
    h = hashlib.sha256()
    for part in (model.ph, model.lab, [model.l_weight]):
        h.update(np.ascontiguousarray(part, dtype=np.float64).tobytes())
    return h.digest()


def path_tables(model: IndicatorModel) -> _PathTables:
    """The series-lived helpers of ``model`` (cached per process by the model's path and L* weight)."""
    key = _model_key(model)
    got = _TABLES.get(key)
    if got is None:
        grid_ph = np.linspace(model.ph[0], model.ph[-1], 400)
        got = _PathTables(dataclasses.replace(model, max_distance=np.inf), grid_ph, model.colour_at(grid_ph)[:, 0])
        while len(_TABLES) >= _TABLES_KEEP:
            _TABLES.pop(next(iter(_TABLES)))
        _TABLES[key] = got
    return got


def colour_codes(rgb: np.ndarray) -> np.ndarray:
    """24-bit code of each sRGB [0, 1] colour quantised to 8 bits per channel (as ``map_rgb`` quantises)."""
    q = np.clip(np.rint(np.asarray(rgb, np.float32) * np.float32(255.0)), 0, 255).astype(np.uint32)
    return (q[..., 0] << 16) | (q[..., 1] << 8) | q[..., 2]


def rust_colours(rgb: np.ndarray, ph_near: np.ndarray, tables: _PathTables, s: DropletSettings) -> np.ndarray:
    """Rust test of colours (see the module notes): orange-brown hue, some chroma, and at least
    ``rust_darker_l`` darker in L* than the indicator at the colour's nearest pH on the path."""
    lab = cs.srgb_to_lab(rgb)
    hue = np.degrees(np.arctan2(lab[..., 2], lab[..., 1])) % 360.0
    chroma = np.hypot(lab[..., 1], lab[..., 2])
    l_expected = np.interp(ph_near, tables.grid_ph, tables.grid_l)
    return ((hue >= s.rust_hue_deg[0]) & (hue <= s.rust_hue_deg[1]) & (chroma >= s.rust_min_chroma)
            & (lab[..., 0] < l_expected - s.rust_darker_l))


def _rust_verdict(tables: _PathTables, pix: np.ndarray, s: DropletSettings) -> np.ndarray:
    """Rust test of (N, 3) pixels through a per-series table over the 2^24 8-bit colours (-1 = not yet known)."""
    key = (s.rust_hue_deg, s.rust_min_chroma, s.rust_darker_l)
    lut = tables.rust.get(key)
    if lut is None:
        tables.rust.clear()  # one rust setting per series; 16 MB each
        lut = tables.rust[key] = np.full(1 << 24, -1, np.int8)
    codes = colour_codes(pix)
    verdict = lut[codes]
    unknown = verdict < 0
    if unknown.any():
        new = np.unique(codes[unknown])
        new_rgb = np.column_stack([(new >> 16) & 255, (new >> 8) & 255, new & 255]).astype(np.float32) / 255.0
        ph_new, _ = tables.nearest.map_rgb(new_rgb[None])
        lut[new] = rust_colours(new_rgb, ph_new[0], tables, s)
        verdict = lut[codes]
    return verdict.astype(bool)


def group_medians(values: np.ndarray, labels: np.ndarray, n: int) -> np.ndarray:
    """Median of ``values`` per label 1..n (label 0 ignored; NaN for an empty label).

    Same definition as ``scipy.ndimage.median`` (mean of the two middle values
    for an even count), from one sort of ``label * span + value``: exact in
    float64 for float32 values.
    """
    values = np.asarray(values, np.float64)
    keep = labels > 0
    v, lab = values[keep], labels[keep]
    if v.size == 0:
        return np.full(n, np.nan)
    lo_v = float(v.min())
    span = float(v.max()) - lo_v + 1.0
    key = np.sort(lab * span + (v - lo_v))
    cnt = np.bincount(lab, minlength=n + 1)[1:n + 1]
    start = np.concatenate([[0], np.cumsum(cnt)[:-1]])
    out = np.full(n, np.nan)
    got = cnt > 0
    lo = key[start[got] + (cnt[got] - 1) // 2]
    hi = key[start[got] + cnt[got] // 2]
    out[got] = (lo + hi) / 2 - np.arange(1, n + 1)[got] * span + lo_v
    return out


def _ellipse_radius(xx: np.ndarray, yy: np.ndarray, ellipse) -> np.ndarray:
    """:func:`normalised_radius` at given pixels only (float32)."""
    cx, cy, a, b, ang = ellipse
    dx, dy = xx - cx, yy - cy
    u = np.cos(ang) * dx + np.sin(ang) * dy
    v = -np.sin(ang) * dx + np.cos(ang) * dy
    return np.sqrt((u / a) ** 2 + (v / b) ** 2).astype(np.float32)


def _no_drop(note: str, rings: int) -> DropletFrame:
    r = (np.arange(rings) + 0.5) / rings
    return DropletFrame(False, note, {k: float("nan") for k in MEASURES}, r, np.full(rings, np.nan),
                        np.zeros(rings, int))


def analyse_frame(rgb: np.ndarray, model: IndicatorModel, px_per_mm: float,
                  colour: ColourCorrection | None = None, settings: DropletSettings | None = None) -> DropletFrame:
    """Analyse one frame of a droplet test.

    Parameters
    ----------
    rgb : (M, N, 3) ndarray of float32 or uint8
        sRGB [0, 1], or 8-bit sRGB as decoded (colour correction is applied here).
    model : IndicatorModel
        Calibrated colour-to-pH path.
    px_per_mm : float
        Scale of the frame (finite, positive).
    colour : ColourCorrection or None
        The profile's colour correction.
    settings : DropletSettings

    Returns
    -------
    DropletFrame
        ``drop_found`` False (with a ``note``) when no drop is in the frame.
    """
    s = settings or DropletSettings()
    ppm = check_px_per_mm(px_per_mm)
    if rgb.ndim != 3 or rgb.shape[2] != 3:
        raise AnalysisError(f"expected an (rows, cols, 3) colour image, got shape {rgb.shape}")
    h, w = rgb.shape[:2]

    # 1. find the drop on a reduced copy
    small, fx, fy = _reduce_for_find(rgb)  # 8-bit pixels are reduced as they are (OpenCV rounds the means)
    small = apply_correction(float01(small), colour)
    sat = saturation(small, 1.0)
    thr, metal_sat = drop_threshold(sat)
    coarse = _clean_blob(sat > thr, max(small.shape[:2]))
    area_small_mm2 = coarse.sum() / (ppm * fx * ppm * fy)
    if not coarse.any() or area_small_mm2 < s.min_area_mm2:
        return _no_drop("no drop: no coloured area on the metal (dried out, or not in the frame)", s.rings)

    # 2. crop at the working resolution
    rr, cc = np.nonzero(coarse)
    pad = 0.08 * max(np.ptp(rr), np.ptp(cc)) + 3
    r0 = max(0, int((rr.min() - pad) / fy))
    r1 = min(h, int(np.ceil((rr.max() + 1 + pad) / fy)))
    c0 = max(0, int((cc.min() - pad) / fx))
    c1 = min(w, int(np.ceil((cc.max() + 1 + pad) / fx)))
    diam_px = 2.0 * np.sqrt(coarse.sum() / (np.pi * fx * fy))
    crop, gx, gy = _resize(float01(rgb[r0:r1, c0:c1]), s.work_diameter_px / diam_px)  # only the crop in float
    crop = apply_correction(crop, colour)
    sat_w = saturation(crop, 1.0)
    sr0, sc0 = int(r0 * fy), int(c0 * fx)
    sr1, sc1 = max(sr0 + 1, int(np.ceil(r1 * fy))), max(sc0 + 1, int(np.ceil(c1 * fx)))
    # where the drop may be: the coarse blob grown by 5 % of the diameter (grown on the small grid, where it is
    # cheap, then brought to the working grid)
    guide = cv2.dilate(coarse[sr0:sr1, sc0:sc1].astype(np.uint8), _disk(max(1, round(0.05 * diam_px * fx))))
    near = cv2.resize(guide, (sat_w.shape[1], sat_w.shape[0]), interpolation=cv2.INTER_NEAREST).astype(bool)
    drop = _clean_blob((sat_w > thr) & near, diam_px * gx)
    if drop.any():
        # half-way between metal and the drop's own rim: a fixed level would drift outward on a blurred
        # (JPEG chroma) edge as the rim grows more saturated
        # the rim band: between 1 and 2 x 3 % of the diameter inside the outline (Euclidean distance to the
        # metal, one distance transform instead of two erosions with a disk)
        r_band = max(2, round(0.03 * diam_px * gx))
        depth = cv2.distanceTransform(drop.view(np.uint8), cv2.DIST_L2, cv2.DIST_MASK_PRECISE)
        rim_band = (depth > r_band) & (depth <= 2 * r_band)
        if rim_band.any():
            thr_edge = metal_sat + 0.4 * (float(np.median(sat_w[rim_band])) - metal_sat)
            if thr_edge > thr:
                drop = _clean_blob((sat_w > thr_edge) & near, diam_px * gx)
    n_drop = int(drop.sum())
    wppm_x, wppm_y = ppm * gx, ppm * gy
    px_area_mm2 = 1.0 / (wppm_x * wppm_y)
    if n_drop * px_area_mm2 < s.min_area_mm2:
        return _no_drop("no drop: the coloured area is too small to be a drop", s.rings)

    # 3. pH of the drop pixels (nearest path pH kept for the rust test)
    pix = crop[drop]
    tables = path_tables(model)
    ph_near, dist = tables.nearest.map_rgb(pix[None])
    ph_near, dist = ph_near[0], dist[0]
    valid = dist <= model.max_distance

    # 4. rust: orange-brown, with chroma, and much darker than the indicator at its nearest pH.  The verdict
    # depends on the (8-bit) colour only, so it is looked up per colour and kept for the series.
    rust_px = _rust_verdict(tables, pix, s)
    rust = np.zeros(drop.shape, bool)
    rust[drop] = rust_px
    # single noisy pixels are not precipitate
    rust = cv2.morphologyEx(rust.astype(np.uint8), cv2.MORPH_OPEN, np.ones((2, 2), np.uint8)).astype(bool)
    rust_px = rust[drop]
    valid &= ~rust_px
    ph = np.where(valid, ph_near, np.nan).astype(np.float32)

    coverage_pct = 100.0 * valid.mean()
    if coverage_pct < s.min_coverage_pct:
        return _no_drop(f"no drop: the coloured area is not indicator colour ({coverage_pct:.0f} % of it reads "
                        f"as indicator, below {s.min_coverage_pct:g} %): dried residue or rust stain?", s.rings)

    # outline geometry
    ell = moment_ellipse(drop)
    cx, cy, a, b, ang = ell
    yy, xx = np.nonzero(drop)  # row-major, the order of crop[drop]
    r_norm = _ellipse_radius(xx, yy, ell)
    dist_mm = np.hypot((xx - cx) / wppm_x, (yy - cy) / wppm_y)

    # 5. zones
    acid = valid & (ph < s.acidic_below)
    basic = valid & (ph > s.basic_above)
    neutral = valid & ~acid & ~basic
    pct = lambda m: 100.0 * float(m.sum()) / n_drop
    vph = ph[valid]
    q05, q50, q95 = np.percentile(vph, [5, 50, 95]) if vph.size else (np.nan,) * 3
    centre = valid & (r_norm < CENTRE_R)
    rim = valid & (r_norm > RIM_R) & (r_norm <= 1.0)
    med = lambda m, v: float(np.median(v[m])) if m.any() else float("nan")

    # 6. radial profile
    edges = np.linspace(0.0, 1.0, s.rings + 1)
    ring = np.clip(np.digitize(r_norm, edges) - 1, 0, s.rings - 1)
    lab_valid = np.where(valid, ring + 1, 0)
    n_ring = np.bincount(lab_valid, minlength=s.rings + 1)[1:]
    ring_med = np.full(s.rings, np.nan)
    if valid.any():
        got = n_ring > 0
        ring_med[got] = group_medians(ph_near, lab_valid, s.rings)[got]

    # positions back in full-frame mm (pixel centres)
    centre_x_mm = (c0 + (cx + 0.5) / gx) / ppm
    centre_y_mm = (r0 + (cy + 0.5) / gy) / ppm
    semi_a_mm = a / np.sqrt(wppm_x * wppm_y)
    semi_b_mm = b / np.sqrt(wppm_x * wppm_y)
    area_mm2 = n_drop * px_area_mm2
    measures = {
        "drop_area_mm2": area_mm2,
        "drop_diameter_mm": 2.0 * np.sqrt(area_mm2 / np.pi),
        "centre_x_mm": centre_x_mm, "centre_y_mm": centre_y_mm,
        "ellipse_major_mm": 2 * semi_a_mm, "ellipse_minor_mm": 2 * semi_b_mm,
        "ellipse_angle_deg": float(np.degrees(ang) % 180.0),
        "ph_median": float(q50), "ph_p05": float(q05), "ph_p95": float(q95),
        "ph_centre": med(centre, ph), "ph_rim": med(rim, ph),
        "acidic_area_mm2": acid.sum() * px_area_mm2, "acidic_area_pct": pct(acid),
        "neutral_area_mm2": neutral.sum() * px_area_mm2, "neutral_area_pct": pct(neutral),
        "basic_area_mm2": basic.sum() * px_area_mm2, "basic_area_pct": pct(basic),
        "rust_area_mm2": rust_px.sum() * px_area_mm2, "rust_area_pct": pct(rust_px),
        "rust_r_norm": med(rust_px, r_norm), "rust_r_mm": med(rust_px, dist_mm),
        "acidic_r_norm": med(acid, r_norm), "basic_r_norm": med(basic, r_norm),
        "indicator_coverage_pct": coverage_pct,
    }
    # the maps for the TIFF and the picture: the drop's bounding box and a small margin of metal (every drop
    # pixel lies inside, so the window's row-major order of drop pixels is that of ``ph``)
    side = max(np.ptp(yy), np.ptp(xx)) + 1
    m = 4 + round(0.03 * float(side))
    y0, y1 = max(0, int(yy.min()) - m), min(drop.shape[0], int(yy.max()) + 1 + m)
    x0, x1 = max(0, int(xx.min()) - m), min(drop.shape[1], int(xx.max()) + 1 + m)
    drop_w = drop[y0:y1, x0:x1]
    ph_map = np.full(drop_w.shape, np.nan, np.float32)
    ph_map[drop_w] = ph
    return DropletFrame(
        True, "", {k: float(v) for k, v in measures.items()}, (edges[:-1] + edges[1:]) / 2, ring_med, n_ring,
        ph_map=ph_map, drop_mask=drop_w, rust_mask=rust[y0:y1, x0:x1],
        work_px_per_mm=float(np.sqrt(wppm_x * wppm_y)),
        crop_origin_mm=((c0 + x0 / gx) / ppm, (r0 + y0 / gy) / ppm),
    )


# ---------------------------------------------------------------------------
# the series


def _first_time(t: np.ndarray, values: np.ndarray, above: float) -> float | None:
    idx = np.flatnonzero(np.nan_to_num(values, nan=-np.inf) > above)
    return float(t[idx[0]]) if idx.size else None


def series_events(t_min, drop_found, area_mm2, acidic_pct, basic_pct, rust_pct, ph_centre, ph_rim,
                  settings: DropletSettings | None = None, acidic_event_pct: float = 1.0,
                  rust_event_pct: float = 0.5) -> dict:
    """Derived events of a time series of frames (arrays in time order; NaN where no drop).

    Returns
    -------
    dict
        ``t_acidic_first_min`` (first time the acidic zone exceeds ``acidic_event_pct``
        of the drop), ``t_rust_first_min`` (rust above ``rust_event_pct``),
        ``acidic_peak_pct`` and ``t_acidic_peak_min``, ``t_dried_min`` (first frame
        without a drop after one was seen), ``evaporation`` (least-squares line of
        drop area on time: ``rate_mm2_per_min`` = minus the slope, its standard
        error, r^2, frames used), ``final`` (the last frame's state and a plain
        ``pattern``).  Times are None when the event never happens.
    """
    from scipy import stats

    s = settings or DropletSettings()
    t = np.asarray(t_min, float)
    found = np.asarray(drop_found, bool)
    area = np.asarray(area_mm2, float)
    acid = np.asarray(acidic_pct, float)
    out: dict = {
        "acidic_event_pct": acidic_event_pct, "rust_event_pct": rust_event_pct,
        "t_acidic_first_min": _first_time(t, acid, acidic_event_pct),
        "t_rust_first_min": _first_time(t, np.asarray(rust_pct, float), rust_event_pct),
        "acidic_peak_pct": None, "t_acidic_peak_min": None, "t_dried_min": None,
    }
    if np.isfinite(acid).any():
        k = int(np.nanargmax(acid))
        out["acidic_peak_pct"], out["t_acidic_peak_min"] = float(acid[k]), float(t[k])
    seen = np.flatnonzero(found)
    if seen.size:
        later = np.flatnonzero(~found & (np.arange(len(found)) > seen[0]))
        if later.size:
            out["t_dried_min"] = float(t[later[0]])
    ok = found & np.isfinite(area) & np.isfinite(t)
    evap = {"rate_mm2_per_min": None, "stderr_mm2_per_min": None, "r_squared": None, "frames": int(ok.sum()),
            "method": "least-squares line of drop area on time (scipy.stats.linregress), rate = -slope"}
    if ok.sum() >= 2 and np.ptp(t[ok]) > 0:
        fit = stats.linregress(t[ok], area[ok])
        evap.update({"rate_mm2_per_min": float(-fit.slope),
                     "stderr_mm2_per_min": float(fit.stderr) if ok.sum() > 2 else None,
                     "r_squared": float(fit.rvalue ** 2) if ok.sum() > 2 else None,
                     "area_at_t0_mm2": float(fit.intercept)})
    out["evaporation"] = evap
    final: dict = {"t_min": None, "drop_found": None, "pattern": "no frames"}
    if len(t):
        j = len(t) - 1
        pc, pr = float(np.asarray(ph_centre, float)[j]), float(np.asarray(ph_rim, float)[j])
        final = {"t_min": float(t[j]), "drop_found": bool(found[j]), "drop_area_mm2": float(area[j]),
                 "ph_centre": pc, "ph_rim": pr, "acidic_area_pct": float(acid[j]),
                 "basic_area_pct": float(np.asarray(basic_pct, float)[j]),
                 "rust_area_pct": float(np.asarray(rust_pct, float)[j])}
        if not found[j]:
            final["pattern"] = "no drop in the last frame (dried out?)"
        else:
            centre = ("acidic" if pc < s.acidic_below else "basic" if pc > s.basic_above else "neutral")
            rim = ("acidic" if pr < s.acidic_below else "basic" if pr > s.basic_above else "neutral")
            final["pattern"] = f"{centre} centre, {rim} rim"
    out["final"] = final
    return out
