"""Pits on a cleaned coupon: region, illumination flattening, segmentation, measurement.

Pipeline of :func:`analyse_pits` (each step a function of its own):

1. :func:`check_exposure` refuses blank, under- and overexposed pictures.
2. :func:`find_coupon` separates the coupon from the background (Otsu on a
   reduced copy, the class that does not surround the frame, refined at full
   resolution); or the whole frame when asked.  :func:`analysed_region`
   leaves out the edge band (Euclidean distance to the region border).
3. :func:`flatten` divides the grey level by a large-scale background estimate
   (a median over ``flatten_mm``, larger than any pit, computed on a reduced
   copy), so gradients of light and brushing read as contrast near 0 and pits
   as negative contrast ("dark" pits) or rims as positive ("bright-rim").
4. :func:`segment_pits` thresholds the contrast (at least ``min_contrast`` and
   5 noise sigmas), keeps each object's pixels darker than half its own
   median contrast (so the outline sits half-way down the pit's edge, whatever
   the pit's darkness), drops objects below the minimum size, splits touching
   pits (distance transform, h-maxima markers, watershed) and drops objects cut
   by the border of the analysed region.
5. :func:`measure_pits` gives centroid, area, equivalent diameter, axes and,
   with a height map, the maximum depth below a robust reference surface
   (:func:`surface_reference`).

Arrays: ``rgb`` (M, N, 3) float32 sRGB in [0, 1]; masks (M, N) bool; labels
(M, N) int32 with 0 for background; ``height_mm`` (M, N) float32 in mm, NaN for
missing data, registered pixel for pixel to the image.  Positions in mm are
measured from the image's top-left pixel corner: x along columns, y down rows.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import cv2
import numpy as np
import pandas as pd
from scipy import ndimage as ndi
from skimage.filters import threshold_otsu
from skimage.morphology import h_maxima
from skimage.segmentation import watershed

from coupon.calibrate.scale import check_px_per_mm
from coupon.errors import AnalysisError

#: How pits look: dark openings, or openings outlined by a bright lip (low-angle or ring light).
PIT_LOOKS = ("dark", "bright-rim")
#: Default smallest pit, in pixels of area: below about 16 px (a disc 4.5 px across) the area
#: and shape of an object are dominated by pixel sampling, blur and JPEG blocks.
MIN_PIT_PX = 16.0
#: Columns of the per-pit table, in order (units in the names).
PIT_COLUMNS = ["pit_id", "x_mm", "y_mm", "area_mm2", "eq_diameter_mm", "major_mm", "minor_mm", "aspect_ratio",
               "depth_mm"]

_REDUCED_SIDE_PX = 800  # working size for the coupon search
_CLIPPED = 0.995  # a channel at or above this is clipped at white


def default_min_pit_mm2(px_per_mm: float) -> float:
    """Default smallest pit counted: :data:`MIN_PIT_PX` pixels of area, in mm2.

    At 10 px/mm that is 0.16 mm2 (0.45 mm across), at 40 px/mm (about 1000 dpi)
    0.01 mm2.  The smallest ASTM G46 size chart, B-1, is 0.5 mm2.
    """
    s = check_px_per_mm(px_per_mm)
    return MIN_PIT_PX / (s * s)


@dataclass(frozen=True)
class PitSettings:
    """What changes the pit numbers (recorded in every result).

    Attributes
    ----------
    px_per_mm : float
        Scale of the image (a square-on scan or photo).
    edge_mm : float
        Band along the region border left out of the analysis.
    min_pit_mm2 : float or None
        Smallest pit counted; None for :func:`default_min_pit_mm2`.
    look : {'dark', 'bright-rim'}
    whole_frame : bool
        Analyse the whole frame (a close-up inside the coupon) instead of finding the coupon.
    min_contrast : float
        Smallest relative darkness (or brightness of a rim) against the flattened surface
        that can belong to a pit; 0.12 means 12 % darker than the surface around.
    flatten_mm : float
        Size of the background window; must exceed about twice the largest pit opening.
    split_touching : bool
        Split touching pits by watershed.
    """

    px_per_mm: float
    edge_mm: float = 2.0
    min_pit_mm2: float | None = None
    look: str = "dark"
    whole_frame: bool = False
    min_contrast: float = 0.12
    flatten_mm: float = 12.0
    split_touching: bool = True

    def __post_init__(self):
        check_px_per_mm(self.px_per_mm)
        if not (np.isfinite(self.edge_mm) and self.edge_mm >= 0):
            raise ValueError(f"edge band must be finite and not negative, got {self.edge_mm!r} mm")
        if self.min_pit_mm2 is not None and not (np.isfinite(self.min_pit_mm2) and self.min_pit_mm2 > 0):
            raise ValueError(f"smallest pit area must be positive, got {self.min_pit_mm2!r} mm2")
        if self.look not in PIT_LOOKS:
            raise ValueError(f"{self.look!r} pit look is invalid, it must be one of {PIT_LOOKS}")
        if not (0 < self.min_contrast < 1):
            raise ValueError(f"minimum contrast must be between 0 and 1, got {self.min_contrast!r}")
        if not (self.flatten_mm > 0):
            raise ValueError(f"flattening window must be positive, got {self.flatten_mm!r} mm")

    @property
    def min_area_mm2(self) -> float:
        return self.min_pit_mm2 if self.min_pit_mm2 is not None else default_min_pit_mm2(self.px_per_mm)

    def to_dict(self) -> dict:
        d = dict(self.__dict__)
        d["min_pit_mm2_used"] = self.min_area_mm2
        return d


@dataclass(frozen=True)
class PitAnalysis:
    """Result of :func:`analyse_pits` for one image.

    Attributes
    ----------
    pits : DataFrame
        One row per counted pit, columns :data:`PIT_COLUMNS` (depth NaN without a height map).
    labels : (M, N) ndarray of int32
        Pit ``pit_id`` per pixel, 0 elsewhere.
    coupon : (M, N) ndarray of bool
        The coupon region.
    analysed : (M, N) ndarray of bool
        The coupon minus the edge band.
    analysed_area_mm2, perimeter_mm : float
        Area and border length of the analysed region.
    details : dict
        Thresholds, noise, counts of dropped objects, reference surface fit, notes.
    """

    pits: pd.DataFrame
    labels: np.ndarray = field(repr=False)
    coupon: np.ndarray = field(repr=False)
    analysed: np.ndarray = field(repr=False)
    analysed_area_mm2: float
    perimeter_mm: float
    details: dict


# -- 1. exposure -----------------------------------------------------------------

def grey_level(rgb: np.ndarray) -> np.ndarray:
    """Luma of an sRGB image (Rec. 601 weights, OpenCV), float32 in [0, 1]."""
    return cv2.cvtColor(np.asarray(rgb, dtype=np.float32), cv2.COLOR_RGB2GRAY)


def check_exposure(rgb: np.ndarray, grey: np.ndarray) -> None:
    """Refuse pictures that cannot show pits.

    Raises
    ------
    AnalysisError
        Blank (one grey level), nearly black, or more than a quarter clipped at white.
    """
    step = max(1, int(np.sqrt(grey.size / 1e6)))  # a million pixels decide this
    g = grey[::step, ::step]
    spread = float(np.percentile(g, 99) - np.percentile(g, 1))
    if spread < 0.02:
        raise AnalysisError(f"image is blank (grey levels span only {spread:.3f} of the range); "
                            "expected a photo or scan of a coupon")
    if float(np.percentile(g, 95)) < 0.05:
        raise AnalysisError("image is underexposed (95 % of pixels below 5 % of full scale); "
                            "increase the exposure or the light")
    clipped = float((rgb[::step, ::step] >= _CLIPPED).any(axis=2).mean())
    if clipped > 0.25:
        raise AnalysisError(f"image is overexposed ({100 * clipped:.0f} % of pixels clipped at white); "
                            "reduce the exposure so the metal is not saturated")


# -- 2. region ------------------------------------------------------------------

def _reduce(img: np.ndarray, factor: float) -> np.ndarray:
    h, w = img.shape[:2]
    return cv2.resize(img, (max(1, int(round(w / factor))), max(1, int(round(h / factor)))),
                      interpolation=cv2.INTER_AREA)


def _largest(mask: np.ndarray) -> np.ndarray:
    n, lab, stats, _ = cv2.connectedComponentsWithStats(mask.astype(np.uint8), connectivity=8)
    if n <= 1:
        return np.zeros_like(mask, bool)
    k = 1 + int(np.argmax(stats[1:, cv2.CC_STAT_AREA]))
    return lab == k


def _frame_contact(mask: np.ndarray) -> float:
    border = np.concatenate([mask[0], mask[-1], mask[:, 0], mask[:, -1]])
    return float(border.mean())


def _signed_distance(mask: np.ndarray) -> np.ndarray:
    """Distance to the mask's outline in pixels, positive inside; the frame counts as outline."""
    m = np.pad(mask.astype(np.uint8), 1)
    inside = cv2.distanceTransform(m, cv2.DIST_L2, cv2.DIST_MASK_PRECISE)
    outside = cv2.distanceTransform(1 - m, cv2.DIST_L2, cv2.DIST_MASK_PRECISE)
    # OpenCV measures to the nearest pixel centre outside; the outline is half a pixel nearer
    sd = np.where(m > 0, inside - 0.5, 0.5 - outside)
    return sd[1:-1, 1:-1].astype(np.float32)


@dataclass(frozen=True)
class Region:
    """Where to look for pits.

    Attributes
    ----------
    coupon : (M, N) ndarray of bool
        The coupon (or the whole frame).
    analysed : (M, N) ndarray of bool
        The coupon minus the edge band.
    method : str
        "whole frame" or "coupon found against the background".
    """

    coupon: np.ndarray = field(repr=False)
    analysed: np.ndarray = field(repr=False)
    method: str


def find_region(grey: np.ndarray, edge_px: float, whole_frame: bool = False) -> Region:
    """The coupon's pixels and the analysed part (the coupon minus ``edge_px`` along its outline).

    The grey level of a reduced copy is split in two by Otsu's threshold; the
    coupon is the largest object of the class that touches the frame least (the
    background surrounds the coupon), taken as its convex hull (coupons are
    rectangles or discs; pits at the very edge would otherwise notch it).  The
    signed distance to its outline, computed on the reduced copy and
    interpolated to full size, gives both masks (outline accurate to about half
    a reduced pixel, well inside the edge band).

    Raises
    ------
    AnalysisError
        No class separates from the other, or the object found is too small or
        fills the frame (then the picture is a close-up: use the whole frame).
    """
    h, w = grey.shape
    if whole_frame:
        rows = np.minimum(np.arange(h) + 0.5, h - np.arange(h) - 0.5)
        cols = np.minimum(np.arange(w) + 0.5, w - np.arange(w) - 0.5)
        analysed = (rows[:, None] > edge_px) & (cols[None, :] > edge_px)
        return Region(np.ones((h, w), bool), analysed, "whole frame")
    factor = max(1.0, max(h, w) / _REDUCED_SIDE_PX)
    small = cv2.GaussianBlur(_reduce(grey, factor), (0, 0), 1.5)
    t = float(threshold_otsu(small))
    lo, hi = small[small <= t], small[small > t]
    if lo.size == 0 or hi.size == 0:
        raise AnalysisError("no coupon found: the picture has one grey level; pass --whole-frame for a close-up")
    sep = (hi.mean() - lo.mean()) / (np.sqrt(0.5 * (lo.var() + hi.var())) + 1e-6)
    kernel = cv2.getStructuringElement(cv2.MORPH_ELLIPSE, (5, 5))
    cands = []
    for bright in (True, False):
        m = small > t if bright else small <= t
        m = cv2.morphologyEx(m.astype(np.uint8), cv2.MORPH_OPEN, kernel).astype(bool)
        m = fill_holes(_largest(m))
        cands.append((_frame_contact(m), -m.mean(), m))
    contact, neg_frac, small_mask = min(cands, key=lambda c: (c[0], c[1]))
    frac = -neg_frac
    if sep < 3.0 or frac < 0.03 or frac > 0.97 or contact > 0.5:
        raise AnalysisError(
            f"no coupon found against the background (coupon/background separation {sep:.1f}, "
            f"object {100 * frac:.0f} % of the frame); photograph the coupon on a contrasting background "
            "or pass --whole-frame for a close-up inside the coupon")
    contours, _ = cv2.findContours(small_mask.astype(np.uint8), cv2.RETR_EXTERNAL, cv2.CHAIN_APPROX_SIMPLE)
    hull = cv2.convexHull(np.concatenate(contours))
    small_mask = cv2.fillPoly(np.zeros(small_mask.shape, np.uint8), [hull], 1).astype(bool)
    scale = 0.5 * (w / small.shape[1] + h / small.shape[0])  # full-size px per reduced px
    sd = cv2.resize(_signed_distance(small_mask) * np.float32(scale), (w, h), interpolation=cv2.INTER_LINEAR)
    return Region(sd > 0, sd > max(edge_px, 0.5), "coupon found against the background")


def region_perimeter_px(mask: np.ndarray) -> float:
    """Length of the region's outer outline in px (OpenCV contours)."""
    contours, _ = cv2.findContours(mask.astype(np.uint8), cv2.RETR_EXTERNAL, cv2.CHAIN_APPROX_NONE)
    return float(sum(cv2.arcLength(c, True) for c in contours))


# -- 3. flattening ---------------------------------------------------------------

def background_level(grey: np.ndarray, region: np.ndarray, window_px: float) -> np.ndarray:
    """Large-scale surface level: a median over ``window_px``, blind to objects smaller than half of it.

    Computed on a copy reduced so the window is 31 pixels; outside the region the
    nearest inside value is copied so the background does not leak in.
    """
    factor = max(1.0, window_px / 31.0)
    g = _reduce(grey, factor)
    cover = _reduce(region.view(np.uint8), factor)  # 0/1 averaged: 1 means fully inside
    inside = cover >= 1
    if not inside.any():
        inside = cover > 0
    if not inside.all() and inside.any():
        idx = ndi.distance_transform_edt(~inside, return_distances=False, return_indices=True)
        g = g[idx[0], idx[1]]
    ksize = 31 if min(g.shape) > 31 else max(3, 2 * (min(g.shape) // 2) - 1)
    g8 = np.clip(np.rint(g * 255.0), 0, 255).astype(np.uint8)  # OpenCV's large medians are 8-bit only
    med = cv2.medianBlur(g8, ksize).astype(np.float32) / 255.0
    med = cv2.GaussianBlur(med, (0, 0), 2.0)
    h, w = grey.shape
    return cv2.resize(med, (w, h), interpolation=cv2.INTER_LINEAR)


def flatten(grey: np.ndarray, region: np.ndarray, window_px: float, smooth_px: float = 0.7) -> np.ndarray:
    """Relative contrast against the surface around: grey / background - 1 (0 outside the region)."""
    bg = background_level(grey, region, window_px)
    g = cv2.GaussianBlur(grey, (0, 0), smooth_px) if smooth_px > 0 else grey
    g = g.copy() if g is grey else g
    np.divide(g, np.maximum(bg, 1e-3, out=bg), out=g)
    g -= 1.0
    np.copyto(g, 0.0, where=~region)
    return g


# -- 4. segmentation -------------------------------------------------------------

def fill_holes(mask: np.ndarray) -> np.ndarray:
    """Fill the holes of a mask: background parts (4-connected) that do not reach the frame (OpenCV)."""
    n, lab = cv2.connectedComponents((~mask).astype(np.uint8), connectivity=4, ltype=cv2.CV_32S)
    outer = np.zeros(n, bool)
    outer[np.unique(np.concatenate([lab[0], lab[-1], lab[:, 0], lab[:, -1]]))] = True
    outer[0] = True  # label 0 is the mask itself
    return mask | ~outer[lab]


def label_components(mask: np.ndarray) -> tuple[int, np.ndarray]:
    """8-connected components (OpenCV); returns (count, labels int32)."""
    n, lab = cv2.connectedComponents(mask.astype(np.uint8), connectivity=8, ltype=cv2.CV_32S)
    return n - 1, lab


def _split_object(obj: np.ndarray, h_px: float) -> np.ndarray | None:
    """Watershed split of one object's mask; None when it holds one pit only."""
    dist = cv2.distanceTransform(np.pad(obj.astype(np.uint8), 1), cv2.DIST_L2, cv2.DIST_MASK_PRECISE)[1:-1, 1:-1]
    h = max(h_px, 0.08 * float(dist.max()))  # ridges of one elongated pit vary less than this
    peaks = h_maxima(dist, h)
    markers, n = ndi.label(peaks, structure=np.ones((3, 3)))
    if n <= 1:
        return None
    return watershed(-dist, markers, mask=obj)


def segment_pits(contrast: np.ndarray, coupon: np.ndarray, analysed: np.ndarray, settings: PitSettings,
                 noise_sigma: float) -> tuple[np.ndarray, dict]:
    """Label the counted pits (int32, ids not consecutive) and say what was dropped."""
    s = settings.px_per_mm
    t_low = max(settings.min_contrast, 5.0 * noise_sigma)
    min_px = settings.min_area_mm2 * s * s
    # pit-likeness: darkness for dark pits, brightness of the lip for bright-rimmed ones
    dark = settings.look == "dark"
    cand = (contrast <= -t_low) if dark else (contrast >= t_low)
    cand &= coupon
    n0, lab0 = label_components(cand)
    idx = np.flatnonzero(cand)
    vals, lv = contrast.ravel()[idx], lab0.ravel()[idx]
    if dark:
        vals = -vals
    vmax = np.zeros(n0 + 1, np.float32)
    np.maximum.at(vmax, lv, vals)
    vmean = np.bincount(lv, vals, minlength=n0 + 1) / np.maximum(np.bincount(lv, minlength=n0 + 1), 1)
    # the outline sits half-way between the surface (0) and the object's mean contrast: the middle
    # of its blurred edge, whatever the pit's darkness; objects never stronger than 1.5 x the
    # threshold are noise or texture
    level = np.maximum(0.5 * vmean, t_low)
    level[vmax < 1.5 * t_low] = np.inf
    kidx = idx[vals >= level[lv]]  # flat indices of the pixels kept
    keep = np.zeros(cand.shape, bool)
    keep.ravel()[kidx] = True
    del cand, lab0, idx, vals, lv
    if settings.look == "bright-rim":
        keep = fill_holes(keep) & coupon  # the pit is the lip and what it encloses
        kidx = np.flatnonzero(keep)
    n1, lab = cv2.connectedComponents(keep.view(np.uint8), connectivity=8, ltype=cv2.CV_32S)
    n1 = int(n1)
    # per-object stats from the pixel list (much faster than over the full frame)
    kl = lab.ravel()[kidx]
    kr, kc = np.divmod(kidx, lab.shape[1])
    area = np.bincount(kl, minlength=n1)
    rmin = np.full(n1, lab.shape[0], np.int64)
    cmin = np.full(n1, lab.shape[1], np.int64)
    rmax = np.zeros(n1, np.int64)
    cmax = np.zeros(n1, np.int64)
    np.minimum.at(rmin, kl, kr), np.minimum.at(cmin, kl, kc)
    np.maximum.at(rmax, kl, kr), np.maximum.at(cmax, kl, kc)
    big = area >= min_px
    big[0] = False
    too_small = int((~big[1:]).sum())
    split_made = 0
    next_id = n1
    new_parts: list[tuple[tuple[slice, slice], np.ndarray, int]] = []
    if settings.split_touching:
        bw, bh = cmax - cmin + 1, rmax - rmin + 1
        extent = area / np.maximum(bw * bh, 1)
        elong = np.maximum(bw, bh) / np.maximum(np.minimum(bw, bh), 1)
        # a single round pit fills about pi/4 of its box; pairs and chains fill less or stretch it
        for k in np.flatnonzero(big & ((extent < 0.72) | (elong > 1.3)) & (area >= 2 * min_px)):
            sl = (slice(rmin[k], rmax[k] + 1), slice(cmin[k], cmax[k] + 1))
            obj = lab[sl] == k
            parts = _split_object(obj, h_px=1.0)
            if parts is None:
                continue
            new_parts.append((sl, parts, next_id))
            next_id += int(parts.max()) - 1
            split_made += int(parts.max()) - 1
    lut = np.where(big, np.arange(n1), 0).astype(np.int32)
    lut = np.concatenate([lut, np.arange(n1, next_id, dtype=np.int32)])
    for sl, parts, first in new_parts:
        sub = lab[sl]
        for j in range(2, int(parts.max()) + 1):
            sub[parts == j] = first + j - 2
    sizes = np.bincount(lab.ravel()[kidx], minlength=next_id)
    lut[sizes < min_px] = 0
    # objects that reach outside the analysed region are cut by its border
    outside = np.unique(lab[keep & ~analysed])
    outside = outside[lut[outside] > 0]
    lut[outside] = 0
    lab = lut[lab]
    details = {
        "threshold_contrast": float(t_low), "noise_sigma": float(noise_sigma), "candidates": int(n0),
        "dropped_small": too_small, "split_added": int(split_made), "dropped_cut_by_border": int(outside.size),
        "min_pit_px": float(min_px),
    }
    return lab, details


# -- 5. measurement --------------------------------------------------------------

def surface_reference(height_mm: np.ndarray, surface: np.ndarray, exclude: np.ndarray | None = None,
                      max_samples: int = 60_000, rounds: int = 6) -> tuple[np.ndarray, dict]:
    """Robust reference surface: a quadratic in (row, col) fitted to the surface pixels.

    Points are taken on a regular grid (at most ``max_samples``) where ``surface``
    is True and ``exclude`` (pit labels) is 0.  Pits, walls and dirt are outliers:
    each round drops points more than 3 robust sigmas (1.4826 MAD) from the fit.
    Returns the 6 coefficients (coordinates divided by the larger image side) and
    a dict with the residual sigma and the fraction kept.
    """
    step = max(1, int(np.sqrt(surface.size / max_samples)))
    sub = surface[::step, ::step] & np.isfinite(height_mm[::step, ::step])
    if exclude is not None:
        sub &= exclude[::step, ::step] == 0
    rr, cc = np.nonzero(sub)
    if rr.size < 50:
        raise AnalysisError("height map has fewer than 50 valid surface points in the analysed region; "
                            "check that it covers the coupon and is registered to the image")
    z = height_mm[::step, ::step][rr, cc].astype(np.float64)
    rr, cc = rr * step, cc * step
    scale = float(max(height_mm.shape))
    y, x = rr / scale, cc / scale
    a = np.column_stack([np.ones_like(x), x, y, x * x, x * y, y * y])
    keep = np.ones(z.size, bool)
    coef = np.zeros(6)
    sigma = float("nan")
    for _ in range(rounds):
        coef, *_ = np.linalg.lstsq(a[keep], z[keep], rcond=None)
        res = z - a @ coef
        sigma = 1.4826 * float(np.median(np.abs(res[keep] - np.median(res[keep]))))
        new = np.abs(res) <= 3.0 * max(sigma, 1e-9)
        if new.sum() < 50 or np.array_equal(new, keep):
            break
        keep = new
    return coef, {"residual_sigma_mm": sigma, "kept_fraction": float(keep.mean()), "scale_px": scale,
                  "model": "quadratic in row and col, 3-sigma clipped"}


def _eval_reference(coef: np.ndarray, scale: float, rr: np.ndarray, cc: np.ndarray) -> np.ndarray:
    y, x = rr / scale, cc / scale
    return coef[0] + coef[1] * x + coef[2] * y + coef[3] * x * x + coef[4] * x * y + coef[5] * y * y


def object_moments(labels: np.ndarray) -> dict[str, np.ndarray]:
    """Area, centroid and axis lengths of every label 1..max (px), from pixel moments.

    Axis lengths follow scikit-image's ``regionprops`` definition: 4 sqrt of the
    eigenvalues of the covariance of the pixel coordinates.  Labels without
    pixels get area 0 and NaN elsewhere.
    """
    n = int(labels.max())
    idx = np.flatnonzero(labels)
    lab = labels.ravel()[idx]
    r, c = np.divmod(idx, labels.shape[1])
    r, c = r.astype(np.float64), c.astype(np.float64)
    m0 = np.bincount(lab, minlength=n + 1).astype(np.float64)
    with np.errstate(invalid="ignore", divide="ignore"):
        mr = np.bincount(lab, r, n + 1) / m0
        mc = np.bincount(lab, c, n + 1) / m0
        # centred before squaring: no loss of precision for objects far from the origin
        dr, dc = r - mr[lab], c - mc[lab]
        vrr = np.bincount(lab, dr * dr, n + 1) / m0
        vcc = np.bincount(lab, dc * dc, n + 1) / m0
        vrc = np.bincount(lab, dr * dc, n + 1) / m0
        half = 0.5 * (vrr + vcc)
        root = np.sqrt(np.maximum(0.25 * (vrr - vcc) ** 2 + vrc**2, 0))
        major = 4 * np.sqrt(half + root)
        minor = 4 * np.sqrt(np.maximum(half - root, 0))
    return {"area": m0, "row": mr, "col": mc, "major": major, "minor": minor, "_idx": idx, "_lab": lab}


def measure_pits(labels: np.ndarray, px_per_mm: float, height_mm: np.ndarray | None = None,
                 analysed: np.ndarray | None = None, band_mm: float = 5.0) -> tuple[pd.DataFrame, np.ndarray, dict]:
    """Per-pit geometry (and depth) in mm; pits renumbered 1..n in reading order.

    Reading order: bands ``band_mm`` tall from the top, left to right inside a band.

    Returns
    -------
    table : DataFrame with :data:`PIT_COLUMNS`
    labels : (M, N) int32 relabelled to the table's ``pit_id``
    details : dict (reference-surface fit when a height map was given)
    """
    s = check_px_per_mm(px_per_mm)
    details: dict = {}
    if height_mm is not None:
        surface = analysed if analysed is not None else np.ones(labels.shape, bool)
        coef, details = surface_reference(height_mm, surface, exclude=labels)
    mom = object_moments(labels)
    present = np.flatnonzero(mom["area"] > 0)
    present = present[present > 0]
    if present.size == 0:
        empty = pd.DataFrame({c: pd.Series(dtype=float) for c in PIT_COLUMNS}).astype({"pit_id": int})
        return empty, np.zeros_like(labels), details
    row, col = mom["row"][present], mom["col"][present]
    order = np.lexsort((col, np.floor(row / (band_mm * s))))
    old = present[order]
    lut = np.zeros(int(labels.max()) + 1, np.int32)
    lut[old] = np.arange(1, len(old) + 1, dtype=np.int32)
    new_labels = lut[labels]
    area = mom["area"][old] / s**2
    major, minor = mom["major"][old] / s, mom["minor"][old] / s
    depth = np.full(len(old), np.nan)
    if height_mm is not None:
        idx, lab = mom["_idx"], lut[mom["_lab"]]
        rr, cc = np.divmod(idx, labels.shape[1])
        dz = _eval_reference(coef, details["scale_px"], rr, cc) - height_mm.ravel()[idx]
        deepest = np.full(len(old) + 1, np.nan)
        np.fmax.at(deepest, lab, dz)  # fmax ignores NaN (missing height data)
        depth = np.maximum(deepest[1:], 0.0)  # a pit cannot stand above the surface; NaN stays NaN
    table = pd.DataFrame({
        "pit_id": np.arange(1, len(old) + 1),
        "x_mm": (mom["col"][old] + 0.5) / s,
        "y_mm": (mom["row"][old] + 0.5) / s,
        "area_mm2": area,
        "eq_diameter_mm": np.sqrt(4.0 * area / np.pi),
        "major_mm": major,
        "minor_mm": minor,
        "aspect_ratio": major / np.maximum(minor, 1.0 / s),
        "depth_mm": depth,
    })
    return table, new_labels, details


# -- all steps -------------------------------------------------------------------

def analyse_pits(rgb: np.ndarray, settings: PitSettings, height_mm: np.ndarray | None = None) -> PitAnalysis:
    """Find, split and measure the pits of one cleaned coupon image.

    Parameters
    ----------
    rgb : (M, N, 3) ndarray of float32
        sRGB in [0, 1].
    settings : PitSettings
    height_mm : (M, N) ndarray of float, optional
        Surface height in mm registered pixel for pixel (NaN where missing).

    Raises
    ------
    AnalysisError
        Blank or badly exposed picture, no coupon found, edge band larger than the
        coupon, height map of another size.
    """
    grey = grey_level(rgb)
    check_exposure(rgb, grey)
    if height_mm is not None and height_mm.shape != grey.shape:
        raise AnalysisError(
            f"height map is {height_mm.shape[1]}x{height_mm.shape[0]} px but the image is "
            f"{grey.shape[1]}x{grey.shape[0]} px (width x height); it must be registered pixel for pixel")
    s = settings.px_per_mm
    region = find_region(grey, settings.edge_mm * s, settings.whole_frame)
    coupon, analysed = region.coupon, region.analysed
    area_px = int(np.count_nonzero(analysed))
    if area_px < 100:
        raise AnalysisError(f"the edge band of {settings.edge_mm} mm leaves no area to analyse "
                            f"(coupon region {np.count_nonzero(coupon) / s**2:.1f} mm2); reduce --edge-mm")
    step = max(1, int(np.sqrt(grey.size / 1e6)))  # a million sample points estimate noise and clipping
    a_sub = analysed[::step, ::step]
    clipped = float((rgb[::step, ::step][a_sub] >= _CLIPPED).any(axis=1).mean()) if a_sub.any() else 0.0
    if clipped > 0.05:
        raise AnalysisError(f"coupon surface is overexposed ({100 * clipped:.0f} % of its pixels clipped at white); "
                            "reduce the exposure so the metal is not saturated")
    contrast = flatten(grey, coupon, settings.flatten_mm * s)
    del grey
    sample = contrast[::step, ::step][a_sub]
    noise = 1.4826 * float(np.median(np.abs(sample - np.median(sample)))) if sample.size else 0.0
    labels, details = segment_pits(contrast, coupon, analysed, settings, noise)
    del contrast
    # pit walls just outside the outlines are clipped as outliers by the reference fit
    table, labels, ref = measure_pits(labels, s, height_mm, analysed)
    if ref:
        details["reference_surface"] = ref
    details["clipped_pct"] = 100 * clipped
    details["region"] = region.method
    return PitAnalysis(
        pits=table, labels=labels, coupon=coupon, analysed=analysed,
        analysed_area_mm2=area_px / s**2, perimeter_mm=region_perimeter_px(analysed) / s, details=details,
    )
