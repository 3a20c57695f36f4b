"""Pits on a cleaned coupon: region, illumination flattening, segmentation, measurement.

Pipeline of :func:`analyse_pits` (each step a function of its own):

1. :func:`check_exposure` refuses blank, under- and overexposed pictures.
2. :func:`find_coupon` separates the coupon from the background (Otsu on a
   reduced copy, the class that does not surround the frame, refined at full
   resolution); or the whole frame when asked.  :func:`analysed_region`
   leaves out the edge band (Euclidean distance to the region border).
3. :func:`flatten` divides the grey level by a large-scale background estimate
   (:func:`background_map`: a median over ``flatten_mm``, larger than any pit,
   computed on a reduced copy), so gradients of light and brushing read as
   contrast near 0 and pits as negative contrast ("dark" pits) or rims as
   positive ("bright-rim").  The analysis itself does this strip by strip
   (:func:`candidate_pixels`) and keeps only the pixels that may be pits.
4. :func:`segment_pits` thresholds the contrast (at least ``min_contrast`` and
   5 noise sigmas), keeps each object's pixels darker than half its own
   median contrast (so the outline sits half-way down the pit's edge, whatever
   the pit's darkness), drops objects below the minimum size, splits touching
   pits (distance transform, h-maxima markers, watershed) and drops objects cut
   by the border of the analysed region.
5. :func:`measure_pits` gives centroid, area, equivalent diameter, axes and,
   with a height map, the maximum depth below a robust reference surface
   (:func:`surface_reference`).

Arrays: ``rgb`` (M, N, 3) float32 sRGB in [0, 1], or the 8-bit pixels as decoded (uint8, 0-255:
``coupon pits`` passes these; the analysis keeps their grey level in 8 bits and makes no
full-frame float array, see :data:`STRIP_ROWS`); masks (M, N) bool; labels
(M, N) int32 with 0 for background; ``height_mm`` (M, N) float32 in mm, NaN for
missing data, registered pixel for pixel to the image.  Positions in mm are
measured from the image's top-left pixel corner: x along columns, y down rows.
"""

from __future__ import annotations

import threading
from collections.abc import Callable
from dataclasses import dataclass, field

import cv2
import numpy as np
import pandas as pd
from scipy import ndimage as ndi
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components
from skimage.filters import threshold_otsu
from skimage.morphology import h_maxima
from skimage.segmentation import watershed

from coupon.calibrate.scale import check_px_per_mm, warp_to_mm_grid
from coupon.errors import AnalysisError
from coupon.io.heightmap import PLAUSIBLE_SPREAD_MM
from coupon.io.images import float01
from coupon.io.threads import thread_pool

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
class PitLabels:
    """Pit ``pit_id`` per pixel, kept as the list of the pits' pixels.

    The (M, N) int32 map is ``np.asarray(labels)`` (or :meth:`full`): at 24 MP
    it is 96 MB, and the pits are a few per cent of the pixels, so the result
    keeps the list (the analysis never makes the map: :func:`label_runs`).  It is
    not an ndarray: compare or index the map (``np.asarray(labels) == k``), not
    this object.

    Attributes
    ----------
    shape : (M, N)
    idx : (K,) ndarray of int64
        Flat (row-major) indices of the pits' pixels, increasing.
    ids : (K,) ndarray of int32
        Their ``pit_id`` (1..n).
    """

    shape: tuple[int, int]
    idx: np.ndarray = field(repr=False)
    ids: np.ndarray = field(repr=False)

    ndim = 2
    dtype = np.dtype(np.int32)

    def full(self) -> np.ndarray:
        out = np.zeros(self.shape, np.int32)
        out.ravel()[self.idx] = self.ids
        return out

    def __array__(self, dtype=None, copy=None):
        if copy is False:
            raise ValueError("PitLabels keeps a pixel list: the label map is always a new array")
        out = self.full()
        return out if dtype is None else out.astype(dtype)

    def max(self) -> int:
        return int(self.ids.max()) if self.ids.size else 0

    def block_centres(self, k: int) -> np.ndarray:
        """``full()[k//2::k, k//2::k]`` cut to whole k x k blocks, from the pixel list."""
        h, w = self.shape
        return self.sampled(k, k // 2, (h // k, w // k))

    def sampled(self, k: int, offset: int = 0, shape: tuple[int, int] | None = None) -> np.ndarray:
        """``full()[offset::k, offset::k]`` from the pixel list (its first ``shape`` rows and columns)."""
        h, w = self.shape
        hb, wb = shape if shape is not None else (len(range(offset, h, k)), len(range(offset, w, k)))
        out = np.zeros((hb, wb), np.int32)
        # the pixels of the sampled rows are contiguous segments of the sorted list: found by binary
        # search, so only about 1 pixel in k is looked at (a division of every pixel took 12 ms at 24 MP)
        first = (np.arange(hb, dtype=np.int64) * k + offset) * w
        lo = np.searchsorted(self.idx, first)
        n = np.searchsorted(self.idx, first + min(w, wb * k + offset)) - lo
        if n.sum() == 0:
            return out
        pos = np.arange(int(n.sum())) + np.repeat(lo - np.concatenate([[0], np.cumsum(n)[:-1]]), n)
        row = np.repeat(np.arange(hb), n)
        col = self.idx[pos] - np.repeat(first, n)
        on = (col % k == offset % k) & (col >= offset)
        out.ravel()[row[on] * wb + (col[on] - offset) // k] = self.ids[pos[on]]
        return out


_SCRATCH = threading.local()


def _scratch(name: str, shape: tuple[int, ...], dtype) -> np.ndarray:
    """A scratch array of this name, shape and type, reused by later calls on the same thread.

    A batch analyses images of one size in turn; a fresh 24 MB grey level per
    image costs page faults on first touch (up to tens of ms on the test machine,
    depending on how fragmented its memory is), a reused one none.  Contents are
    whatever the last user left; they stay allocated until :func:`release_scratch`
    or the thread's end.
    """
    arrays = getattr(_SCRATCH, "arrays", None)
    if arrays is None:
        arrays = _SCRATCH.arrays = {}
    name = f"{name}:{np.dtype(dtype).str}"  # an 8-bit and a float grey level (a rectified view) do not evict each other
    a = arrays.get(name)
    if a is None or a.shape != tuple(shape) or a.dtype != np.dtype(dtype):
        arrays.pop(name, None)  # free the old one first: the peak is one array, not two
        a = arrays[name] = np.empty(shape, dtype)
    return a


def release_scratch() -> None:
    """Free this thread's scratch arrays (the 24 MB grey level after a 24 MP scan); the next analysis makes them again."""
    getattr(_SCRATCH, "arrays", {}).clear()


@dataclass(frozen=True)
class PitAnalysis:
    """Result of :func:`analyse_pits` for one image.

    Attributes
    ----------
    pits : DataFrame
        One row per counted pit, columns :data:`PIT_COLUMNS` (depth NaN without a height map).
    labels : PitLabels
        Pit ``pit_id`` per pixel, 0 elsewhere (``np.asarray(labels)`` is the (M, N) int32 map).
    coupon : (M, N) ndarray of bool
        The coupon region.
    analysed : (M, N) ndarray of bool
        The coupon minus the edge band.
    analysed_area_mm2, perimeter_mm : float
        Area and border length of the analysed region.
    details : dict
        Thresholds, noise, counts of dropped objects, reference surface fit, notes.
    rectified_rgb : (M', N', 3) ndarray of float32 or None
        The picture rectified to a mm grid when a homography was applied (labels,
        masks and positions refer to it: draw the overlay on it); None when the
        input picture was used as it is.
    """

    pits: pd.DataFrame
    labels: PitLabels = field(repr=False)
    coupon: np.ndarray = field(repr=False)
    analysed: np.ndarray = field(repr=False)
    analysed_area_mm2: float
    perimeter_mm: float
    details: dict
    rectified_rgb: np.ndarray | None = field(default=None, repr=False)


# -- 0. perspective ---------------------------------------------------------------

#: Below this anisotropy and spread of the local scale the view is square-on: no resampling.
SQUARE_ON_TOLERANCE = 0.01
#: Above this anisotropy of the local scale (1 / cos 35 degrees) an oblique view is refused:
#: the near wall of a pit hides part of its floor and the far wall shows, so the dark opening
#: no longer outlines the pit, whatever the rectification.
MAX_ANISOTROPY = 1.0 / np.cos(np.deg2rad(35.0))
#: Refuse a rectified grid this many times larger than the picture (a homography from another set-up).
MAX_GRID_GROWTH = 4.0


def view_geometry(homography_px_to_mm: np.ndarray, shape_rc: tuple[int, int]) -> dict:
    """Local scale of a px -> mm homography over the picture (7 x 7 points).

    Returns the anisotropy (ratio of the Jacobian's singular values; about 1 /
    cos(tilt) for a tilted plane): at the picture's centre (``anisotropy``, from
    which ``tilt_deg``) and its largest value (perspective makes it vary),
    and the range of the areal scale in px/mm.
    """
    hom = np.asarray(homography_px_to_mm, np.float64).reshape(3, 3)
    h, w = shape_rc
    xs, ys = np.meshgrid(np.linspace(0, w, 7), np.linspace(0, h, 7))
    p = np.column_stack([xs.ravel(), ys.ravel()])
    d = 1.0

    def f(q):
        return cv2.perspectiveTransform(q.reshape(-1, 1, 2), hom).reshape(-1, 2)

    jx, jy = (f(p + [d, 0]) - f(p - [d, 0])) / (2 * d), (f(p + [0, d]) - f(p - [0, d])) / (2 * d)
    jac = np.stack([jx, jy], axis=2)  # mm per px
    sv = np.linalg.svd(jac, compute_uv=False)
    if not np.all(np.isfinite(sv)) or sv.min() <= 0:
        raise AnalysisError("the profile's homography is degenerate over this picture (the picture "
                            "reaches the horizon of the calibrated plane); recalibrate the scale")
    ratio = sv[:, 0] / sv[:, 1]
    aniso = float(ratio[ratio.size // 2])  # the picture's centre: the tilt itself for a centred camera
    areal = 1.0 / np.sqrt(sv[:, 0] * sv[:, 1])  # px per mm
    return {"anisotropy": aniso, "anisotropy_max": float(ratio.max()),
            "tilt_deg": float(np.degrees(np.arccos(min(1.0, 1.0 / aniso)))),
            "px_per_mm_min": float(areal.min()), "px_per_mm_max": float(areal.max())}


def rectify_view(rgb: np.ndarray, homography_px_to_mm: np.ndarray, px_per_mm: float,
                 height_mm: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray | None, dict] | None:
    """Resample an oblique picture (and its height map) onto a mm grid at ``px_per_mm``.

    Returns None when the view is square-on within :data:`SQUARE_ON_TOLERANCE`
    (rotation and scale alone change no pit measurement); otherwise the
    rectified picture, height map and a dict with the geometry and the grid
    origin in plane mm (positions measured on the grid add it to get plane
    coordinates).

    Raises
    ------
    AnalysisError
        The view is more oblique than :data:`MAX_ANISOTROPY` (about 35 degrees), or
        the grid would be implausibly large.
    """
    geo = view_geometry(homography_px_to_mm, rgb.shape[:2])
    if geo["anisotropy"] > MAX_ANISOTROPY:
        raise AnalysisError(
            f"the profile's homography says the camera looks at the coupon about {geo['tilt_deg']:.0f} degrees "
            f"off square (more than {np.degrees(np.arccos(1 / MAX_ANISOTROPY)):.0f}); pit walls then hide pit floors "
            "and openings cannot be measured: photograph the coupon square-on (or scan it)")
    if (geo["anisotropy_max"] - 1 < SQUARE_ON_TOLERANCE
            and geo["px_per_mm_max"] / geo["px_per_mm_min"] - 1 < SQUARE_ON_TOLERANCE):
        return None
    h, w = rgb.shape[:2]
    corners = np.array([[0, 0], [w, 0], [w, h], [0, h]], np.float64).reshape(-1, 1, 2)
    mm = cv2.perspectiveTransform(corners, np.asarray(homography_px_to_mm, np.float64)).reshape(-1, 2)
    x0, y0 = mm.min(axis=0)
    size_mm = tuple(float(v) for v in mm.max(axis=0) - mm.min(axis=0))
    grid_px = size_mm[0] * size_mm[1] * px_per_mm**2
    if grid_px > MAX_GRID_GROWTH * h * w:
        raise AnalysisError(
            f"rectifying with the profile's homography would give a {grid_px / 1e6:.0f}-megapixel grid for a "
            f"{h * w / 1e6:.0f}-megapixel picture; the profile was calibrated for another camera set-up")
    out = warp_to_mm_grid(np.asarray(float01(rgb), np.float32), homography_px_to_mm, size_mm, px_per_mm, (x0, y0))
    hm = None
    if height_mm is not None:
        hm = warp_to_mm_grid(np.asarray(height_mm, np.float32), homography_px_to_mm, size_mm, px_per_mm, (x0, y0))
    geo |= {"origin_mm": [float(x0), float(y0)], "size_mm": list(size_mm), "grid_px_per_mm": float(px_per_mm),
            "note": "picture resampled to a mm grid with the profile's homography; positions are measured "
                    "from the grid's top-left corner (add origin_mm for the calibrated plane's coordinates)"}
    return out, hm, geo


# -- 1. exposure -----------------------------------------------------------------

def grey_level(rgb: np.ndarray) -> np.ndarray:
    """Luma of an sRGB image (Rec. 601 weights, OpenCV), float32 in [0, 1].

    From 8-bit pixels, OpenCV's 8-bit conversion (3 ms at 24 MP; a float copy of
    the picture first takes 35 to 45 ms and 288 MB) rounds the luma to steps of
    1/255: an error of 0.0011 standard deviation, far below the sensor and JPEG
    noise of a scan.  The float version of :func:`grey_pixels`.
    """
    return float01(grey_pixels(rgb))


def grey_pixels(rgb: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
    """Luma in the pixels' own type: uint8 (0-255) from 8-bit pixels, float32 in [0, 1] otherwise.

    The analysis keeps the full-size grey level of an 8-bit picture in 8 bits
    (24 MB at 24 MP instead of 96 MB) and converts to float only the strip
    or reduced copy it works on; :func:`grey_level` is the float version.
    """
    if out is None:
        out = np.empty(rgb.shape[:2], np.uint8 if rgb.dtype == np.uint8 else np.float32)
        # (numpy's array, not OpenCV's: numpy asks the kernel for huge pages for a large array, which
        # fault in far faster on first touch than the 4 kB pages of one OpenCV allocates itself)
    if rgb.dtype == np.uint8:
        return cv2.cvtColor(rgb, cv2.COLOR_RGB2GRAY, dst=out)
    return cv2.cvtColor(np.asarray(rgb, dtype=np.float32), cv2.COLOR_RGB2GRAY, dst=out)


def _clip_level(rgb: np.ndarray):
    """The clipping level :data:`_CLIPPED` in the pixels' own type (254 of 255 for 8-bit)."""
    return np.uint8(np.ceil(_CLIPPED * 255.0)) if rgb.dtype == np.uint8 else np.float32(_CLIPPED)


def clipped_fraction(bright: np.ndarray, where: np.ndarray | None = None) -> float:
    """Fraction of the pixels (``where`` True) whose brightest channel ``bright`` is clipped at white."""
    hit = bright >= _clip_level(bright)
    if where is None:
        return float(np.count_nonzero(hit)) / max(hit.size, 1)
    n = int(np.count_nonzero(where))
    return float(np.count_nonzero(hit & where)) / n if n else 0.0


def exposure_sample(rgb: np.ndarray, grey: np.ndarray, samples: float = 2.5e5) -> tuple[np.ndarray, np.ndarray]:
    """About ``samples`` pixels on a regular grid (the centre pixel of every k x k block, k from
    :func:`sample_step`; :func:`sample_grid` puts a mask on the same grid): their grey level (in the
    type of ``grey``) and brightest channel (in the type of ``rgb``).

    The colour picture is sampled with OpenCV's exact nearest-pixel reduction (1 ms at 24 MP; numpy's
    strided copy of 3-byte pixels took 4 to 5 ms).
    """
    h, w = grey.shape
    k = sample_step(grey.size, samples)
    hb, wb = max(1, h // k), max(1, w // k)
    if k == 1 or h < k or w < k:
        sub = np.ascontiguousarray(rgb)
        g = grey
    else:
        src = rgb[:hb * k, :wb * k]
        sub = cv2.resize(src if src.dtype in (np.uint8, np.float32) else src.astype(np.float32), (wb, hb),
                         interpolation=cv2.INTER_NEAREST_EXACT)
        g = grey[k // 2::k, k // 2::k][:hb, :wb]
    bright = cv2.reduce(np.ascontiguousarray(sub).reshape(-1, sub.shape[2]), 1, cv2.REDUCE_MAX).reshape(g.shape)
    return np.ascontiguousarray(g), bright


def sample_step(size: int, samples: float = 2.5e5) -> int:
    """Grid step that samples about ``samples`` of ``size`` pixels."""
    return max(1, int(np.sqrt(size / samples)))


def sample_grid(mask: np.ndarray, k: int) -> np.ndarray:
    """``mask`` on the grid of :func:`exposure_sample` (block centres)."""
    h, w = mask.shape
    if k == 1 or h < k or w < k:
        return mask
    return mask[k // 2::k, k // 2::k][:h // k, :w // k]


def _percentiles(values: np.ndarray, qs) -> list[float]:
    """``np.percentile(values, qs)`` (linear interpolation) as floats in [0, 1]; for 8-bit values from
    their histogram (exact, without sorting)."""
    if values.dtype != np.uint8:
        return [float(v) for v in np.percentile(values, qs)]
    cum = np.cumsum(np.bincount(values.ravel(), minlength=256))
    n = int(cum[-1])
    out = []
    for q in qs:
        pos = q / 100.0 * (n - 1)
        lo = int(np.floor(pos))
        v_lo = int(np.searchsorted(cum, lo, side="right"))
        v_hi = int(np.searchsorted(cum, min(lo + 1, n - 1), side="right"))
        out.append((v_lo + (pos - lo) * (v_hi - v_lo)) / 255.0)
    return out


def check_exposure(rgb: np.ndarray, grey: np.ndarray, sample: tuple[np.ndarray, np.ndarray] | None = None) -> None:
    """Refuse pictures that cannot show pits (decided on :func:`exposure_sample`, or ``sample``).

    Raises
    ------
    AnalysisError
        Blank (one grey level), nearly black, or more than a quarter clipped at white.
    """
    g, bright = exposure_sample(rgb, grey) if sample is None else sample
    p1, p95, p99 = _percentiles(g, [1, 95, 99])
    spread = float(p99 - p1)
    if spread < 0.02:
        raise AnalysisError(f"image is blank (grey levels span only {spread:.3f} of the range); "
                            "expected a photo or scan of a coupon")
    if float(p95) < 0.05:
        raise AnalysisError("image is underexposed (95 % of pixels below 5 % of full scale); "
                            "increase the exposure or the light")
    clipped = clipped_fraction(bright)
    if clipped > 0.25:
        raise AnalysisError(f"image is overexposed ({100 * clipped:.0f} % of pixels clipped at white); "
                            "reduce the exposure so the metal is not saturated")


# -- 2. region ------------------------------------------------------------------

def _reduce(img: np.ndarray, factor: int) -> np.ndarray:
    """Area-average reduction by an integer factor (OpenCV's fast path: a non-integer one is 4 x slower)."""
    k = max(1, int(factor))
    if k == 1:
        return img
    return cv2.resize(img, None, fx=1.0 / k, fy=1.0 / k, interpolation=cv2.INTER_AREA)


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


#: Rows per strip of the full-resolution passes (region masks, candidate pixels).  A strip's float
#: arrays (1.5 MB each at 6000 px wide) stay near a core's 1 MB L2 cache (256-row strips ran 40 %
#: slower), where full-frame float32 arrays (96 MB each at 24 MP) cost memory traffic and, on first
#: touch, page faults.
STRIP_ROWS = 64
#: A frame of at least twice this many strips has its candidate pass split over two threads.
PARALLEL_MIN_STRIPS = 8


def _threads() -> int:
    """Threads the analysis may use beside OpenCV's own: OpenCV's thread count.  Batch workers hold
    OpenCV to one thread each (``coupon.io.batch``), so ``--workers N`` keeps N cores busy, not 2 N."""
    return cv2.getNumThreads()


def _strips(h: int, rows: int = STRIP_ROWS):
    """(first, end) row ranges covering 0..h."""
    return [(r0, min(h, r0 + rows)) for r0 in range(0, h, rows)]


class RowUpsampler:
    """Bilinear enlargement of a reduced map to ``shape``, one strip of rows at a time.

    The sampling is OpenCV's ``resize`` with ``INTER_LINEAR`` (pixel centres
    aligned, the border replicated): the map is first enlarged along its rows
    (a reduced number of rows, full width), then each strip interpolates
    between two of those rows.  ``rows(r0, r1)`` equals rows r0..r1 of the
    full-size enlargement (tested against ``cv2.resize``) without making it.
    """

    def __init__(self, small: np.ndarray, shape: tuple[int, int]):
        h, w = shape
        small = np.ascontiguousarray(small, dtype=np.float32)
        n = small.shape[0]
        self.wide = (small if small.shape[1] == w
                     else cv2.resize(small, (w, n), interpolation=cv2.INTER_LINEAR))
        y = np.clip((np.arange(h) + 0.5) * (n / h) - 0.5, 0, n - 1)
        self.i0 = np.minimum(np.floor(y).astype(np.intp), max(n - 2, 0))
        self.i1 = np.minimum(self.i0 + 1, n - 1)
        self.a = (y - self.i0).astype(np.float32)[:, None]

    def rows(self, r0: int, r1: int, out: np.ndarray | None = None, cols: slice = slice(None)) -> np.ndarray:
        """Rows r0..r1 (and ``cols``) of the enlargement, into ``out`` (float32) when given."""
        # plain row indexing (numpy copies whole rows): several times faster than np.take with out=
        lo = self.wide[self.i0[r0:r1], cols]
        out = np.subtract(self.wide[self.i1[r0:r1], cols], lo, out=out)
        out *= self.a[r0:r1]
        out += lo
        return out

    def bounds(self, r0: int, r1: int) -> tuple[np.ndarray, np.ndarray]:
        """Per column, the smallest and largest value of rows r0..r1 (those of the wide rows they interpolate)."""
        block = self.wide[self.i0[r0]:self.i1[r1 - 1] + 1]
        return block.min(axis=0), block.max(axis=0)

    def greater(self, threshold: float, out: np.ndarray) -> np.ndarray:
        """``enlargement > threshold`` as a bool mask written into ``out``, computed only where it is in doubt.

        A strip's values lie between the smallest and largest of the wide rows it
        interpolates; columns where both are on one side of the threshold are filled
        at once, the others (about the outline) are interpolated.  Equal to
        thresholding the full enlargement.
        """
        t = np.float32(threshold)
        for r0, r1 in _strips(out.shape[0]):
            lo, hi = self.bounds(r0, r1)
            above = lo > t
            doubt = (hi > t) & ~above
            o = out[r0:r1]
            o[...] = above
            if doubt.any():
                edges = np.flatnonzero(np.diff(np.concatenate([[0], doubt.view(np.int8), [0]])))
                for c0, c1 in zip(edges[::2], edges[1::2]):
                    np.greater(self.rows(r0, r1, cols=slice(c0, c1)), t, out=o[:, c0:c1])
        return out


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
    factor = int(np.ceil(max(1.0, max(h, w) / _REDUCED_SIDE_PX) - 1e-9))
    small = cv2.GaussianBlur(float01(_reduce(grey, factor)), (0, 0), 1.5)
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
    up = RowUpsampler(_signed_distance(small_mask) * np.float32(scale), (h, w))
    # the full-size signed distance is interpolated only about the outlines, one strip at a time; the two
    # masks on two threads (numpy's array loops release the GIL)
    masks = lambda t: up.greater(t, np.empty((h, w), bool))  # noqa: E731
    if _threads() > 1:
        with thread_pool(2, "coupon-pits") as pool:
            coupon, analysed = pool.map(masks, (0.0, max(edge_px, 0.5)))
    else:
        coupon, analysed = masks(0.0), masks(max(edge_px, 0.5))
    return Region(coupon, analysed, "coupon found against the background")


def region_perimeter_px(mask: np.ndarray) -> float:
    """Length of the region's outer outline in px (OpenCV contours)."""
    contours, _ = cv2.findContours(mask.view(np.uint8) if mask.dtype == bool else mask.astype(np.uint8),
                                   cv2.RETR_EXTERNAL, cv2.CHAIN_APPROX_NONE)
    return float(sum(cv2.arcLength(c, True) for c in contours))


# -- 3. flattening ---------------------------------------------------------------

def background_factor(window_px: float) -> int:
    """The reduction factor of :func:`background_map` for a window of ``window_px``."""
    return max(1, int(window_px // 31))


def background_map(grey: np.ndarray, region: np.ndarray, window_px: float,
                   reduced: np.ndarray | None = None) -> np.ndarray:
    """Large-scale surface level on a reduced grid: a median over ``window_px``, blind to objects
    smaller than half of it (float32 in [0, 1], never below 1e-3).

    Computed on a copy reduced by an integer factor so the window is 31 to 61
    pixels (the odd size nearest to ``window_px`` over the factor); outside the
    region the nearest inside value is copied so the background does not leak in.
    :class:`RowUpsampler` (or :func:`background_level`) brings it to full size.  ``reduced``: the
    grey level already reduced by :func:`background_factor` (made while the region was found).
    """
    factor = background_factor(window_px)
    g = float01(_reduce(grey, factor) if reduced is None else reduced)
    cover = _reduce(region.view(np.uint8), factor)  # 0/1 averaged: 1 means fully inside
    inside = cover >= 1
    if not inside.any():
        inside = cover > 0
    if not inside.all() and inside.any():
        idx = ndi.distance_transform_edt(~inside, return_distances=False, return_indices=True)
        g = g[idx[0], idx[1]]
    ksize = max(3, 2 * int(round((window_px / factor - 1) / 2)) + 1)
    if ksize >= min(g.shape):
        ksize = max(3, 2 * (min(g.shape) // 2) - 1)
    g8 = np.clip(np.rint(g * 255.0), 0, 255).astype(np.uint8)  # OpenCV's large medians are 8-bit only
    med = cv2.medianBlur(g8, ksize).astype(np.float32) / 255.0
    return np.maximum(cv2.GaussianBlur(med, (0, 0), 2.0), 1e-3)


def background_level(grey: np.ndarray, region: np.ndarray, window_px: float) -> np.ndarray:
    """:func:`background_map` enlarged to the full size of ``grey`` (bilinear), float32."""
    h, w = grey.shape
    return cv2.resize(background_map(grey, region, window_px), (w, h), interpolation=cv2.INTER_LINEAR)


def smooth_grey(grey: np.ndarray, smooth_px: float = 0.7) -> np.ndarray:
    """Grey level with the sensor noise damped (Gaussian, 5 x 5 taps: the weights beyond are below 1e-4)."""
    return cv2.GaussianBlur(grey, (5, 5), smooth_px) if smooth_px > 0 else grey.copy()


def flatten(grey: np.ndarray, region: np.ndarray, window_px: float, smooth_px: float = 0.7) -> np.ndarray:
    """Relative contrast against the surface around: grey / background - 1 (0 outside the region).

    :func:`analyse_pits` does not form this full-frame array: it compares the
    smoothed grey level with the background times (1 - threshold) and computes
    the contrast on the candidate pixels only (:func:`segment_pits`).
    """
    g = smooth_grey(float01(grey), smooth_px)
    np.divide(g, background_level(grey, region, window_px), out=g)
    g -= 1.0
    np.copyto(g, 0.0, where=~region)
    return g


@dataclass(frozen=True)
class Candidates:
    """Pixels that may belong to a pit, from :func:`candidate_pixels`.

    Attributes
    ----------
    idx : (K,) ndarray of int64
        Flat indices (row-major, increasing) of the pixels whose pit-likeness is at least the threshold.
    strength : (K,) ndarray of float32
        Their pit-likeness: relative darkness ``1 - smooth / background`` for dark pits,
        relative brightness ``smooth / background - 1`` for bright-rimmed ones.
    noise_sigma : float
        Robust sigma (1.4826 MAD) of the contrast over a regular sample of the analysed region.
    shape : tuple
        (rows, cols) of the picture.
    """

    idx: np.ndarray = field(repr=False)
    strength: np.ndarray = field(repr=False)
    noise_sigma: float
    shape: tuple[int, int]

    def above(self, threshold: float) -> "Candidates":
        keep = self.strength >= np.float32(threshold)
        if keep.all():
            return self
        return Candidates(self.idx[keep], self.strength[keep], self.noise_sigma, self.shape)


def candidate_pixels(grey: np.ndarray, background: np.ndarray, coupon: np.ndarray, analysed: np.ndarray,
                     look: str, min_contrast: float, smooth_px: float = 0.7,
                     noise_samples: float = 2.5e5) -> Candidates:
    """The one full-resolution pass of the segmentation, strip by strip (:data:`STRIP_ROWS`).

    For each strip the grey level (``grey_pixels``: 8-bit or float) is
    smoothed (the Gaussian of :func:`smooth_grey`, with two rows of real
    neighbours above and below), divided by the enlarged ``background`` (a :func:`background_map`),
    and the pixels of the coupon whose pit-likeness reaches ``min_contrast``
    are listed with it; a regular sample of the analysed region's contrast (about
    ``noise_samples`` points, every n-th row and column of the frame) gives the
    noise.  No full-frame float array is made.
    """
    h, w = grey.shape
    dark = look == "dark"
    tmin = np.float32(min_contrast)
    # the threshold folded into the background (interpolation is linear): a pixel is a candidate when
    # smooth <= (1 - t) background (dark) or smooth >= (1 + t) background (bright rim); the contrast
    # itself is divided out at the candidates and the noise sample only
    gain = np.float32(1.0 - min_contrast if dark else 1.0 + min_contrast)
    up = RowUpsampler(np.asarray(background, np.float32) * gain, (h, w))
    nstep = sample_step(h * w, noise_samples)
    halo = 2  # the 5 x 5 Gaussian reads two rows either side
    # smooth_grey's Gaussian as one separable filter straight from the 8-bit grey level to float (the
    # 1/255 scaling folded into the row kernel): no float copy of the strip first
    kernel = cv2.getGaussianKernel(5, smooth_px, cv2.CV_32F) if smooth_px > 0 else np.array([[1.0]], np.float32)
    kx = kernel * np.float32(1.0 / 255.0) if grey.dtype == np.uint8 else kernel
    src = grey if grey.dtype == np.uint8 else np.asarray(grey, np.float32)
    test = np.less_equal if dark else np.greater_equal

    def run(strips):
        gbuf = np.empty((STRIP_ROWS + 2 * halo, w), np.float32)
        lbuf = np.empty((STRIP_ROWS, w), np.float32)
        mbuf = np.empty((STRIP_ROWS, w), bool)
        idx, vals, sample = [], [], []
        for r0, r1 in strips:
            a0, a1 = max(0, r0 - halo), min(h, r1 + halo)
            g = cv2.sepFilter2D(src[a0:a1], cv2.CV_32F, kx, kernel, dst=gbuf[:a1 - a0])[r0 - a0:r1 - a0]
            limit = up.rows(r0, r1, lbuf[:r1 - r0])
            # the noise sample: every nstep-th row and column of the frame inside the analysed region
            first = (-r0) % nstep
            on = analysed[r0:r1][first::nstep, ::nstep]
            sample.append(g[first::nstep, ::nstep][on] / limit[first::nstep, ::nstep][on])
            m = test(g, limit, out=mbuf[:r1 - r0])
            m &= coupon[r0:r1]
            k = np.flatnonzero(m)
            vals.append(g.ravel()[k] / limit.ravel()[k])
            k += r0 * w
            idx.append(k)
        return idx, vals, sample

    strips = _strips(h)
    if len(strips) >= 2 * PARALLEL_MIN_STRIPS and _threads() > 1:
        # the top and bottom halves on two threads (OpenCV and numpy's array loops release the GIL);
        # concatenated in order, so the result is the one-thread result
        half = len(strips) // 2
        with thread_pool(2, "coupon-pits") as pool:
            parts = list(pool.map(run, [strips[:half], strips[half:]]))
    else:
        parts = [run(strips)]
    idx = [a for p in parts for a in p[0]]
    vals = [a for p in parts for a in p[1]]
    sample = [a for p in parts for a in p[2]]
    # smooth / limit = (smooth / background) / gain: the pit-likeness and the contrast sample
    vals = np.concatenate(vals)
    vals *= -gain if dark else gain
    vals += np.float32(1.0) if dark else np.float32(-1.0)
    sample = np.concatenate(sample) * gain - np.float32(1.0)
    noise = 1.4826 * float(np.median(np.abs(sample - np.median(sample)))) if sample.size else 0.0
    # the candidates were found by a product, their strength by a quotient: keep the two consistent
    keep = vals >= tmin
    idx = np.concatenate(idx)
    if not keep.all():
        idx, vals = idx[keep], vals[keep]
    return Candidates(idx, vals, noise, (h, w))


# -- 4. segmentation -------------------------------------------------------------

def fill_holes(mask: np.ndarray) -> np.ndarray:
    """Fill the holes of a mask: background parts (4-connected) that do not reach the frame (OpenCV)."""
    n, lab = cv2.connectedComponents((~mask).astype(np.uint8), connectivity=4, ltype=cv2.CV_32S)
    outer = np.zeros(n, bool)
    outer[np.unique(np.concatenate([lab[0], lab[-1], lab[:, 0], lab[:, -1]]))] = True
    outer[0] = True  # label 0 is the mask itself
    return mask | ~outer[lab]


def label_components(mask: np.ndarray) -> tuple[int, np.ndarray]:
    """8-connected components of a mask: (count, labels int32), numbered as :func:`label_runs` numbers them.

    The analysis itself labels pixel lists (:func:`label_runs`) and never makes this map; this is the
    same labelling for a mask in hand.
    """
    m = np.asarray(mask, bool)
    idx = np.flatnonzero(m)
    runs = pixel_runs(idx, m.shape[1])
    n, run_lab = label_runs(runs, m.shape[1])
    lab = np.zeros(m.shape, np.int32)
    lab.ravel()[idx] = np.repeat(run_lab, runs.length)
    return n, lab


#: A basin of the distance transform is a pit of its own when its peak stands above the saddle to its
#: neighbour by at least this fraction of the lower of the two peaks (size-relative dynamics): a small pit
#: merged into a large one keeps its own marker, a bump on one pit's outline does not.
SPLIT_RELATIVE_DYNAMIC = 0.12


def _basin_saddles(basins: np.ndarray, dist: np.ndarray) -> dict[tuple[int, int], float]:
    """Highest pass of ``dist`` between every two 4-adjacent basins (labels > 0)."""
    keys, vals = [], []
    for a, b, da, db in ((basins[:, :-1], basins[:, 1:], dist[:, :-1], dist[:, 1:]),
                         (basins[:-1, :], basins[1:, :], dist[:-1, :], dist[1:, :])):
        m = (a != b) & (a > 0) & (b > 0)
        lo, hi = np.minimum(a[m], b[m]), np.maximum(a[m], b[m])
        keys.append(lo.astype(np.int64) * (int(basins.max()) + 1) + hi)
        vals.append(np.minimum(da[m], db[m]))
    keys, vals = np.concatenate(keys), np.concatenate(vals)
    if not keys.size:
        return {}
    uk, inv = np.unique(keys, return_inverse=True)
    best = np.full(uk.size, -np.inf)
    np.maximum.at(best, inv, vals)
    n1 = int(basins.max()) + 1
    return {(int(k // n1), int(k % n1)): float(v) for k, v in zip(uk, best)}


#: Above this many pixels :func:`h_maxima_small` hands over to scikit-image: the iterations of the
#: dilation grow with the object's width, their cost with its area.
SMALL_RECONSTRUCTION_PX = 40_000


def h_maxima_small(image: np.ndarray, h: float) -> np.ndarray:
    """The h-maxima of a small float image (bool), as scikit-image's ``h_maxima``.

    The reconstruction by dilation of ``image - h`` under ``image`` is done by
    iterated 3 x 3 dilation (OpenCV) until it no longer changes: on the few
    thousand pixels of one object this is 2 to 3 times faster than the sorting
    algorithm of ``skimage.morphology.reconstruction`` (tested equal to it).
    Like scikit-image, ``h`` is lowered by float rounding (2 float32 resolutions
    of each value), so a maximum exactly ``h`` high counts.
    """
    img = np.ascontiguousarray(image, dtype=np.float32)
    if img.size == 0 or h > float(img.max() - img.min()):
        return np.zeros(img.shape, bool)
    if img.size > SMALL_RECONSTRUCTION_PX:
        return h_maxima(img, h).astype(bool)
    rec = img - np.float32(h) - np.float32(2e-6) * np.abs(img)
    kernel = np.ones((3, 3), np.uint8)
    while True:
        nxt = np.minimum(cv2.dilate(rec, kernel), img)
        if np.array_equal(nxt, rec):
            break
        rec = nxt
    return (img - rec) >= np.float32(h)


def _merge_basins(peak: np.ndarray, saddle: dict[tuple[int, int], float], relative: float):
    """Merge neighbouring basins, weakest separation first, while the lower peak stands less than
    ``relative`` times its own height above their saddle; returns the root-of function."""
    parent: dict[int, int] = {}

    def root(i):
        while parent.get(i, i) != i:
            i = parent[i]
        return i

    while saddle:
        # the weakest separation first: lowest peak-above-saddle relative to the lower peak
        (i, j), sd = min(saddle.items(), key=lambda kv: (min(peak[kv[0][0]], peak[kv[0][1]]) - kv[1])
                         / max(min(peak[kv[0][0]], peak[kv[0][1]]), 1e-6))
        low = min(peak[i], peak[j])
        if low - sd >= relative * low:
            break
        keep, gone = (i, j) if peak[i] >= peak[j] else (j, i)
        parent[gone] = keep
        merged: dict[tuple[int, int], float] = {}
        for (a, b), v in saddle.items():
            a, b = root(a), root(b)
            if a != b:
                key = (min(a, b), max(a, b))
                merged[key] = max(merged.get(key, -np.inf), v)
        saddle = merged
    return root


def _mosaic(shapes: list[tuple[int, int]], gap: int = 1) -> tuple[list[tuple[int, int]], tuple[int, int]]:
    """Top-left corners of boxes of the given (rows, cols) laid out in shelves, at least ``gap`` px apart
    and from the mosaic's border, and the mosaic's shape."""
    total = sum((h + gap) * (w + gap) for h, w in shapes)
    width = max(max(w for _, w in shapes) + 2 * gap, int(np.sqrt(total) * 1.3))
    corners, x, y, shelf = [], gap, gap, 0
    for h, w in shapes:
        if x + w + gap > width:
            x, y, shelf = gap, y + shelf + gap, 0
        corners.append((y, x))
        x += w + gap
        shelf = max(shelf, h)
    return corners, (y + shelf + gap, width)


def _split_objects(objs: list[np.ndarray], h_px: float = 0.5,
                   relative: float = SPLIT_RELATIVE_DYNAMIC) -> list[np.ndarray | None]:
    """Watershed split of each object's mask (its bounding box, bool); None for one that holds one pit only.

    Markers are the h-maxima of the distance transform (``h_px`` removes pixel
    noise of the outline); neighbouring basins are then merged, lowest first,
    while the lower peak stands less than ``relative`` times its own height above
    the saddle between them.  The criterion is relative to each pit's own size, so
    a small pit merged into a much larger neighbour is kept apart, which a
    threshold relative to the largest pit of the object missed.  Returns, per
    object, its part labels (int32, 0 off the object, 1.. the parts).

    Speed: the objects are laid out side by side in one mosaic, at least one background pixel apart,
    so the distance transform, the marker labelling, the watershed and the saddle search run once
    for all of them instead of once per object (a few hundred small library calls per image).  The
    background between them keeps each object's result its own: the distance to the nearest
    background pixel lies inside the object's padded box, the watershed cannot flood across
    background, and no two basins of different objects touch (tested equal to one object at a time).
    The h-maxima stay per object (:func:`h_maxima_small` iterates as often as the object is wide).
    """
    out: list[np.ndarray | None] = [None] * len(objs)
    if not objs:
        return out
    corners, shape = _mosaic([o.shape for o in objs])
    mosaic = np.zeros(shape, np.uint8)
    boxes = [(slice(r0, r0 + o.shape[0]), slice(c0, c0 + o.shape[1])) for (r0, c0), o in zip(corners, objs)]
    for sl, o in zip(boxes, objs):
        mosaic[sl] = o
    dist = cv2.distanceTransform(mosaic, cv2.DIST_L2, cv2.DIST_MASK_PRECISE)
    peaks = np.zeros(shape, bool)
    for sl in boxes:
        peaks[sl] = h_maxima_small(dist[sl], h_px)
    markers, n = ndi.label(peaks, structure=np.ones((3, 3)))
    ids = [np.unique(markers[sl]) for sl in boxes]
    ids = [u[u > 0] for u in ids]
    multi = [k for k, u in enumerate(ids) if u.size > 1]
    if not multi:
        return out
    # flood only the objects with two markers or more
    flood = np.zeros(shape, bool)
    for k in multi:
        flood[boxes[k]] = objs[k]
    basins = watershed(-dist, markers, mask=flood)
    peak = np.zeros(n + 1, np.float32)  # the dtype of dist: numpy's fast ufunc.at path
    np.maximum.at(peak, basins[flood], dist[flood])
    owner = np.full(n + 1, -1, np.int64)
    for k in multi:
        owner[ids[k]] = k
    saddles: dict[int, dict[tuple[int, int], float]] = {}
    for (i, j), v in _basin_saddles(basins, dist).items():
        saddles.setdefault(int(owner[i]), {})[(i, j)] = v
    for k in multi:
        root = _merge_basins(peak, saddles.get(k, {}), relative)
        roots = np.array([0] + [root(int(i)) for i in ids[k]])
        _, dense = np.unique(roots, return_inverse=True)  # 0 stays 0 (the background)
        if dense.max() <= 1:
            continue
        lut = np.zeros(int(ids[k].max()) + 1, np.int32)
        lut[ids[k]] = dense[1:]
        out[k] = lut[basins[boxes[k]]]
    return out


def _split_object(obj: np.ndarray, h_px: float = 0.5, relative: float = SPLIT_RELATIVE_DYNAMIC) -> np.ndarray | None:
    """:func:`_split_objects` of one object's mask."""
    return _split_objects([np.asarray(obj, bool)], h_px, relative)[0]


#: A pit whose pixel moments are those of a disc: axis ratio at most this, and ...
SPLIT_MAX_ASPECT = 1.15
#: ... area at least this fraction of the ellipse with its moment axes (pi/4 major minor).  A pixel disc
#: of radius 3.5 px or more keeps within both (axis ratio at most 1.11, fill 0.997 or more); a tilted
#: ellipse or a pair of touching pits does not.  Moments miss a small pit on the side of a much larger
#: one (radius 3 px on 25 px changes them by 1 %): segment_pits offers those by their bounding box.
SPLIT_MIN_FILL = 0.985


def plain_disc(area: np.ndarray, major: np.ndarray, minor: np.ndarray) -> np.ndarray:
    """Objects whose pixel moments are those of one round pit (:data:`SPLIT_MAX_ASPECT`, :data:`SPLIT_MIN_FILL`)."""
    with np.errstate(invalid="ignore", divide="ignore"):
        fill = area / (0.25 * np.pi * major * minor)
        return (major <= SPLIT_MAX_ASPECT * minor) & (fill >= SPLIT_MIN_FILL)


def segment_pits(cands: Candidates, coupon: np.ndarray, analysed: np.ndarray, settings: PitSettings
                 ) -> tuple[PitLabels, dict, tuple[np.ndarray, ...], np.ndarray]:
    """Label the counted pits (ids not consecutive) and say what was dropped.

    From the candidate pixels (:func:`candidate_pixels`), those at least
    ``max(min_contrast, 5 noise sigmas)`` pit-like are labelled; each object
    keeps its pixels stronger than half its mean strength (the outline half-way
    down the pit's blurred edge) and is labelled again.  Objects whose bounding
    box or moments (:func:`plain_disc`) are not those of one round pit are
    offered to :func:`_split_object`, which decides.  All of it works on pixel lists and their runs
    (:func:`label_runs`): no full-frame array.  Returns the
    labels (a :class:`PitLabels` pixel list), the details, the pixel list of the labelled pixels (flat indices,
    label) and the raw pixel moments per label (:func:`_moment_sums`; zero for
    dropped labels).
    """
    s = settings.px_per_mm
    noise_sigma = cands.noise_sigma
    t_low = max(settings.min_contrast, 5.0 * noise_sigma)
    min_px = settings.min_area_mm2 * s * s
    c = cands.above(t_low)
    idx, vals = c.idx, c.strength
    h, w = c.shape
    # the objects from the candidates' runs (label_runs): no full-frame mask or label map; per-object
    # statistics over the runs (each run lies in one object)
    runs = pixel_runs(idx, w)
    n0, lv = label_runs(runs, w)
    vmax = np.zeros(n0 + 1, np.float32)
    np.maximum.at(vmax, lv, np.maximum.reduceat(vals, runs.start))
    vmean = np.bincount(lv, np.add.reduceat(vals, runs.start, dtype=np.float64), minlength=n0 + 1) / np.maximum(
        np.bincount(lv, runs.length, minlength=n0 + 1), 1)
    # the outline sits half-way between the surface (0) and the object's mean contrast: the middle
    # of its blurred edge, whatever the pit's darkness; objects never stronger than 1.5 x the
    # threshold are noise or texture
    level = np.maximum(0.5 * vmean, t_low)
    level[vmax < 1.5 * t_low] = np.inf
    kept = vals >= np.repeat(level[lv], runs.length)
    kidx = idx[kept]  # flat indices of the pixels kept
    del idx, vals, lv, kept, c, runs
    if settings.look == "bright-rim":
        mask = np.zeros((h, w), bool)
        mask.ravel()[kidx] = True
        keep = fill_holes(mask) & coupon  # the pit is the lip and what it encloses
        del mask
        kidx = np.flatnonzero(keep)
        del keep
    # the kept pixels labelled again: an object may have fallen apart
    runs = pixel_runs(kidx, w)
    n1, run_lab = label_runs(runs, w)
    n1 += 1  # with the background, as OpenCV counts
    kl = np.repeat(run_lab, runs.length)
    sums = runs.sums(run_lab, n1)
    area = sums[0]
    big = area >= min_px
    big[0] = False
    too_small = int((~big[1:]).sum())
    split_made = 0
    next_id = n1
    if settings.split_touching:
        # bounding boxes from the runs
        rmin = np.full(n1, h, np.int64)
        cmin = np.full(n1, w, np.int64)
        rmax = np.zeros(n1, np.int64)
        cmax = np.zeros(n1, np.int64)
        np.minimum.at(rmin, run_lab, runs.row), np.minimum.at(cmin, run_lab, runs.col0)
        np.maximum.at(rmax, run_lab, runs.row), np.maximum.at(cmax, run_lab, runs.col0 + runs.length - 1)
        bw, bh = cmax - cmin + 1, rmax - rmin + 1
        extent = area / np.maximum(bw * bh, 1)
        elong = np.maximum(bw, bh) / np.maximum(np.minimum(bw, bh), 1)
        # a single round pit fills about pi/4 (0.785) of its box; pairs and chains fill less or stretch
        # it, a small pit on the side of a larger one makes the box wider than the pit; tilted ellipses
        # and pairs also leave the moments of a disc (plain_disc)
        mom = _moments_from_sums(sums)
        boxy = (extent < 0.76) | (elong > 1.15)
        offered = big & (area >= 2 * min_px) & (boxy | ~plain_disc(area, mom["major"], mom["minor"]))
        split_ids, split_px = [], []
        if offered.any():
            ks = np.flatnonzero(offered)
            # each offered object's pixels (positions in kidx, grouped by object) drawn into its box
            on = np.flatnonzero(offered[kl])
            on = on[np.argsort(kl[on], kind="stable")]
            cut = np.searchsorted(kl[on], ks, "right")
            groups = np.split(on, cut[:-1])
            boxes = []
            for k, p in zip(ks, groups):
                r, cc = np.divmod(kidx[p], w)
                r -= rmin[k]
                cc -= cmin[k]
                obj = np.zeros((rmax[k] - rmin[k] + 1, cmax[k] - cmin[k] + 1), bool)
                obj[r, cc] = True
                boxes.append((obj, r, cc))
            for k, p, (obj, r, cc), parts in zip(ks, groups, boxes, _split_objects([b[0] for b in boxes])):
                if parts is None:
                    continue
                extra = int(parts.max()) - 1
                # part 1 keeps the object's id, parts 2.. get new ids
                ids = np.concatenate([[0, k], np.arange(next_id, next_id + extra)]).astype(np.int32)
                kl[p] = ids[parts[r, cc]]
                next_id += extra
                split_made += extra
                split_ids.append(k)
                split_px.append(p)
        if split_ids:
            # the split objects' pixels have their new labels (a run may now cross two parts): their
            # moments are recounted pixel by pixel
            ps = np.sort(np.concatenate(split_px))
            was_split = np.zeros(n1, bool)
            was_split[split_ids] = True
            redo = _moment_sums(kidx[ps], kl[ps], next_id, w)
            sums = np.concatenate([sums, np.zeros((sums.shape[0], next_id - n1))], axis=1)
            affected = np.concatenate([was_split, np.ones(next_id - n1, bool)])
            sums[:, affected] = redo[:, affected]
    lut = np.where(big, np.arange(n1), 0).astype(np.int32)
    lut = np.concatenate([lut, np.arange(n1, next_id, dtype=np.int32)])
    lut[sums[0] < min_px] = 0
    # objects that reach outside the analysed region are cut by its border
    reaches_out = np.zeros(lut.size, bool)
    reaches_out[kl[~analysed.ravel()[kidx]]] = True
    outside = np.flatnonzero(reaches_out & (lut > 0))
    lut[outside] = 0
    sums[:, lut == 0] = 0.0
    kl = lut[kl]
    on = kl > 0
    details = {
        "threshold_contrast": float(t_low), "noise_sigma": float(noise_sigma), "candidates": int(n0),
        "dropped_small": too_small, "split_added": int(split_made), "dropped_cut_by_border": int(outside.size),
        "min_pit_px": float(min_px),
    }
    pix, lab = kidx[on], kl[on]
    return PitLabels((h, w), pix, lab), details, (pix, lab), sums


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
    step = sample_step(surface.size, max_samples)
    sub = surface[::step, ::step] & np.isfinite(height_mm[::step, ::step])
    if exclude is not None:
        # a PitLabels pixel list is sampled from its list, without the full-frame map
        grid = exclude.sampled(step) if isinstance(exclude, PitLabels) else exclude[::step, ::step]
        sub &= grid == 0
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
        # normal equations (6 x 6): with coordinates scaled to [0, 1] they are well conditioned, and
        # several times faster than an SVD least-squares solve of the 60 000 x 6 system each round
        ak = a[keep]
        coef, *_ = np.linalg.lstsq(ak.T @ ak, ak.T @ z[keep], rcond=None)
        res = z - a @ coef
        sigma = 1.4826 * float(np.median(np.abs(res[keep] - np.median(res[keep]))))
        new = np.abs(res) <= 3.0 * max(sigma, 1e-9)
        if new.sum() < 50 or np.array_equal(new, keep):
            break
        keep = new
    lo, hi = np.percentile(res, [1, 99])
    return coef, {"residual_sigma_mm": sigma, "kept_fraction": float(keep.mean()), "scale_px": scale,
                  "surface_spread_mm": float(hi - lo),
                  "model": "quadratic in row and col, 3-sigma clipped"}


#: Largest spread (1st to 99th percentile) of a cleaned coupon's surface around its pits, relative
#: to its reference surface (tilt and bow removed), that a height map may show: more is a unit mix-up.
MAX_SURFACE_SPREAD_MM = 2.0


def check_height_relief(reference: dict, unit: str | None = None) -> None:
    """Refuse a height map whose coupon surface has implausible relief for its unit.

    The spread of the coupon surface around its reference surface (pits left
    out; the table or holder around the coupon plays no part, unlike the check
    on the whole scan in :func:`coupon.io.heightmap.load_height_map`) must lie
    between ``PLAUSIBLE_SPREAD_MM[0]`` (0.1 um: less cannot show pits) and
    :data:`MAX_SURFACE_SPREAD_MM`.

    Raises
    ------
    AnalysisError
        With a one-line message naming the likely unit mistake.
    """
    spread = reference.get("surface_spread_mm")
    if spread is None or not np.isfinite(spread):
        return
    if spread < PLAUSIBLE_SPREAD_MM[0]:
        hint = ("are the values in millimetres? use --height-unit mm" if unit == "um" else
                "check --height-unit" if unit is None else "check the height map")
        raise AnalysisError(f"height map: the coupon surface varies by only {spread * 1000:.3g} um around its "
                            f"reference surface (1st to 99th percentile), too flat to show pits; {hint}")
    if spread > MAX_SURFACE_SPREAD_MM:
        hint = ("are the values in micrometres? use --height-unit um" if unit == "mm" else
                "check --height-unit" if unit is None else "check the height map")
        raise AnalysisError(f"height map: the coupon surface varies by {spread:.4g} mm around its reference "
                            f"surface (1st to 99th percentile), more than the {MAX_SURFACE_SPREAD_MM:g} mm a cleaned "
                            f"coupon shows; {hint}")


def _eval_reference(coef: np.ndarray, scale: float, rr: np.ndarray, cc: np.ndarray) -> np.ndarray:
    y, x = rr / scale, cc / scale
    return coef[0] + coef[1] * x + coef[2] * y + coef[3] * x * x + coef[4] * x * y + coef[5] * y * y


def object_moments(labels: np.ndarray) -> dict[str, np.ndarray]:
    """Area, centroid and axis lengths of every label 1..max (px), from pixel moments.

    Axis lengths follow scikit-image's ``regionprops`` definition: 4 sqrt of the
    eigenvalues of the covariance of the pixel coordinates.  Labels without
    pixels get area 0 and NaN elsewhere.
    """
    idx = np.flatnonzero(labels)
    return _moments(idx, labels.ravel()[idx], int(labels.max()), labels.shape[1])


def _moment_sums(idx: np.ndarray, lab: np.ndarray, n: int, ncols: int) -> np.ndarray:
    """Raw pixel moments per label 0..n-1 from a pixel list: (6, n) float64 rows
    count, sum of rows, sum of cols, of rows squared, of cols squared, of rows times cols.

    Sums add up, so the moments of objects changed later (a watershed split) are
    recounted from their own pixels only.
    """
    r, c = np.divmod(idx, ncols)
    r, c = r.astype(np.float64), c.astype(np.float64)
    return np.stack([np.bincount(lab, minlength=n).astype(np.float64), np.bincount(lab, r, n),
                     np.bincount(lab, c, n), np.bincount(lab, r * r, n), np.bincount(lab, c * c, n),
                     np.bincount(lab, r * c, n)])


@dataclass(frozen=True)
class Runs:
    """Horizontal runs of a sorted pixel list: consecutive pixels of one row, from :func:`pixel_runs`.

    Every pixel of a run belongs to the same 8-connected (indeed 4-connected)
    object, so per-object sums over pixels are sums over runs: a pit of 40 px
    across is 40 runs instead of 1250 pixels.

    Attributes
    ----------
    start : (R,) ndarray of intp
        Position in the pixel list of each run's first pixel.
    length : (R,) ndarray of intp
    row, col0 : (R,) ndarray of int64
        Row and first column of each run.
    """

    start: np.ndarray
    length: np.ndarray
    row: np.ndarray
    col0: np.ndarray

    def sums(self, lab: np.ndarray, n: int) -> np.ndarray:
        """:func:`_moment_sums` of the pixels, ``lab`` the label of each run (exact: integer sums in float64)."""
        r, c0 = self.row.astype(np.float64), self.col0.astype(np.float64)
        m = self.length.astype(np.float64)
        c1 = c0 + m - 1.0
        sc = 0.5 * m * (c0 + c1)  # sum of the columns c0..c1
        scc = (c1 * (c1 + 1) * (2 * c1 + 1) - (c0 - 1) * c0 * (2 * c0 - 1)) / 6.0  # sum of their squares
        return np.stack([np.bincount(lab, m, n), np.bincount(lab, r * m, n), np.bincount(lab, sc, n),
                         np.bincount(lab, r * r * m, n), np.bincount(lab, scc, n), np.bincount(lab, r * sc, n)])


def pixel_runs(idx: np.ndarray, ncols: int, labels: np.ndarray | None = None) -> Runs:
    """The horizontal runs of ``idx`` (flat indices, strictly increasing); with ``labels`` (one per
    pixel) a run also ends where the label changes."""
    if idx.size == 0:
        z = np.zeros(0, np.intp)
        return Runs(z, z, z.astype(np.int64), z.astype(np.int64))
    brk = np.diff(idx) != 1
    if labels is not None:
        brk |= np.diff(labels) != 0
    # a new row starts a new run: the first pixel at or after each row's start (a binary search per
    # row, not a division per pixel)
    first = np.searchsorted(idx, np.arange(1, int(idx[-1]) // ncols + 1, dtype=idx.dtype) * ncols)
    brk[first[(first > 0) & (first < idx.size)] - 1] = True
    start = np.concatenate([[0], np.flatnonzero(brk) + 1])
    length = np.diff(np.concatenate([start, [idx.size]]))
    row, col0 = np.divmod(idx[start], ncols)
    return Runs(start, length, row, col0)


def label_runs(runs: Runs, ncols: int) -> tuple[int, np.ndarray]:
    """8-connected components of a pixel list from its horizontal runs (:func:`pixel_runs`).

    Two runs of neighbouring rows touch (8-connected) when their column spans,
    widened by one pixel, overlap; the runs that touch a run in the row above are
    a contiguous slice of the sorted run list, found by two binary searches per
    run, and the components of that graph are scipy's
    (``scipy.sparse.csgraph.connected_components``).  No full-frame array is made:
    on a 24 MP scan with a million candidate pixels in some 30 000 runs this takes
    about 5 ms where labelling the frame took 20 ms and its mask another 8.

    Returns (count, label of each run, 1..count).  Components are numbered by
    their first 2 x 2 pixel block in reading order (block rows of two pixel rows):
    the numbering of OpenCV's block-based ``connectedComponents`` (tested against it),
    so an object's label does not depend on which of the two labellings made it.
    """
    n = runs.start.size
    if n == 0:
        return 0, np.zeros(0, np.int32)
    # run keys on one line, rows ncols + 3 apart: a span widened by one column never reaches the next row
    wp = ncols + 3
    first = runs.row * wp + runs.col0
    last = first + (runs.length - 1)
    # runs of the row above that touch run j: end >= start_j - 1 and start <= end_j + 1
    lo = np.searchsorted(last, first - wp - 1, "left")
    hi = np.searchsorted(first, last - wp + 1, "right")
    cnt = np.maximum(hi - lo, 0)
    total = int(cnt.sum())
    j = np.repeat(np.arange(n), cnt)
    i = np.arange(total) - np.repeat(np.cumsum(cnt) - cnt - lo, cnt)
    graph = coo_matrix((np.ones(total, np.int8), (j, i)), shape=(n, n)).tocsr()
    count, comp = connected_components(graph, directed=False)
    # number the components by their first 2 x 2 block (a 2 x 2 block lies in one component)
    block = (runs.row // 2) * (ncols // 2 + 2) + runs.col0 // 2
    key = np.full(count, np.iinfo(np.int64).max, np.int64)
    np.minimum.at(key, comp, block)
    rank = np.empty(count, np.int32)
    rank[np.argsort(key)] = np.arange(1, count + 1, dtype=np.int32)
    return int(count), rank[comp]


def _moments_from_sums(sums: np.ndarray) -> dict[str, np.ndarray]:
    """Area, centroid and axis lengths (scikit-image's ``regionprops`` definition) from :func:`_moment_sums`."""
    m0 = sums[0]
    with np.errstate(invalid="ignore", divide="ignore"):
        mr, mc = sums[1] / m0, sums[2] / m0
        # raw second moments, centred per object afterwards (E[r^2] - E[r]^2): in float64 with
        # coordinates below 1e5 px the cancellation costs at most about 1e-6 px^2 of variance, and it
        # saves gathering the centroids back to every pixel
        vrr = np.maximum(sums[3] / m0 - mr * mr, 0)
        vcc = np.maximum(sums[4] / m0 - mc * mc, 0)
        vrc = sums[5] / m0 - mr * mc
        half = 0.5 * (vrr + vcc)
        root = np.sqrt(np.maximum(0.25 * (vrr - vcc) ** 2 + vrc**2, 0))
        major = 4 * np.sqrt(half + root)
        minor = 4 * np.sqrt(np.maximum(half - root, 0))
    return {"area": m0, "row": mr, "col": mc, "major": major, "minor": minor}


def _moments(idx: np.ndarray, lab: np.ndarray, n: int, ncols: int) -> dict[str, np.ndarray]:
    """:func:`object_moments` from a pixel list (flat indices, labels 1..n)."""
    return _moments_from_sums(_moment_sums(idx, lab, n + 1, ncols)) | {"_idx": idx, "_lab": lab}


def measure_pits(labels: np.ndarray, px_per_mm: float, height_mm: np.ndarray | None = None,
                 analysed: np.ndarray | None = None, band_mm: float = 5.0,
                 pixels: tuple[np.ndarray, ...] | None = None,
                 sums: np.ndarray | None = None) -> tuple[pd.DataFrame, np.ndarray, dict]:
    """Per-pit geometry (and depth) in mm; pits renumbered 1..n in reading order.

    Reading order: bands ``band_mm`` tall from the top, left to right inside a band.
    ``pixels`` (flat indices and labels of every labelled pixel, as returned by
    :func:`segment_pits`) saves two full-frame passes; ``labels`` is then renumbered in place.  ``sums`` (their moments per
    label, :func:`_moment_sums`) saves recounting them.

    Returns
    -------
    table : DataFrame with :data:`PIT_COLUMNS`
    labels : (M, N) int32 relabelled to the table's ``pit_id``
    details : dict (reference-surface fit when a height map was given)
    """
    in_place = pixels is not None
    if pixels is None:
        idx = np.flatnonzero(labels)
        pixels = (idx, labels.ravel()[idx])
    table, lut, details = _measure(labels, px_per_mm, height_mm, analysed, band_mm, pixels, sums)
    if in_place:
        labels.ravel()[pixels[0]] = lut[pixels[1]]
        return table, labels, details
    return table, lut[labels], details


def _measure(labels: np.ndarray, px_per_mm: float, height_mm: np.ndarray | None, analysed: np.ndarray | None,
             band_mm: float, pixels: tuple[np.ndarray, ...], sums: np.ndarray | None
             ) -> tuple[pd.DataFrame, np.ndarray, dict]:
    """:func:`measure_pits` on a pixel list; returns the table, the renumbering (old label -> pit_id,
    0 for none) and the details.  ``labels`` is read only (its shape, and which pixels are off pits
    for the reference surface)."""
    s = check_px_per_mm(px_per_mm)
    details: dict = {}
    if height_mm is not None:
        surface = analysed if analysed is not None else np.ones(labels.shape, bool)
        coef, details = surface_reference(height_mm, surface, exclude=labels)
    if sums is not None:
        mom = _moments_from_sums(sums) | {"_idx": pixels[0], "_lab": pixels[1]}
    else:
        mom = _moments(pixels[0], pixels[1], int(pixels[1].max()) if pixels[1].size else 0, labels.shape[1])
    present = np.flatnonzero(mom["area"] > 0)
    present = present[present > 0]
    lut = np.zeros(len(mom["area"]), np.int32)
    if present.size == 0:
        empty = pd.DataFrame({c: pd.Series(dtype=float) for c in PIT_COLUMNS}).astype({"pit_id": int})
        return empty, lut, details
    row, col = mom["row"][present], mom["col"][present]
    order = np.lexsort((col, np.floor(row / (band_mm * s))))
    old = present[order]
    lut[old] = np.arange(1, len(old) + 1, dtype=np.int32)
    area = mom["area"][old] / s**2
    major, minor = mom["major"][old] / s, mom["minor"][old] / s
    depth = np.full(len(old), np.nan)
    if height_mm is not None:
        idx, lab = mom["_idx"], lut[mom["_lab"]]
        # rows and columns from the runs of one pit (no division per pixel); the deepest point per run,
        # then per pit
        runs = pixel_runs(idx, labels.shape[1], lab)
        rr = np.repeat(runs.row.astype(np.float32), runs.length)
        cc = (np.arange(idx.size) - np.repeat(runs.start - runs.col0, runs.length)).astype(np.float32)
        # float32: heights of a few mm keep sub-nanometre resolution, and half the memory traffic
        dz = _eval_reference(coef.astype(np.float32), np.float32(details["scale_px"]), rr, cc)
        dz -= height_mm.ravel()[idx]
        deepest = np.full(len(old) + 1, np.nan, np.float32)  # the dtype of dz: ufunc.at is slow on a mix
        if idx.size:
            # fmax ignores NaN (missing height data)
            np.fmax.at(deepest, lab[runs.start], np.fmax.reduceat(dz, runs.start))
        depth = np.maximum(deepest[1:].astype(np.float64), 0.0)  # a pit cannot stand above the surface; NaN stays NaN
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
    return table, lut, details


# -- all steps -------------------------------------------------------------------

def analyse_pits(rgb: np.ndarray, settings: PitSettings, height_mm: np.ndarray | None = None, *,
                 homography_px_to_mm: np.ndarray | None = None, height_unit: str | None = None,
                 on_region: Callable[[np.ndarray, np.ndarray], None] | None = None) -> PitAnalysis:
    """Find, split and measure the pits of one cleaned coupon image.

    Parameters
    ----------
    rgb : (M, N, 3) ndarray of float32 or uint8
        sRGB in [0, 1], or 8-bit sRGB as decoded (0-255).
    settings : PitSettings
    height_mm : (M, N) ndarray of float, optional
        Surface height in mm registered pixel for pixel (NaN where missing).
    homography_px_to_mm : (3, 3) ndarray, optional
        The profile's homography (image px -> plane mm).  An oblique view is first
        rectified to a mm grid at ``settings.px_per_mm`` (:func:`rectify_view`); a
        square-on one is used as it is; one beyond 35 degrees is refused.
    height_unit : {'um', 'mm'}, optional
        The unit the height map was declared in, for the hint of the relief check.
    on_region : callable, optional
        Called as ``on_region(picture, analysed)`` as soon as the analysed region is known and
        checked, with the picture the pits are found in (the rectified one after a homography) and
        the analysed mask; neither may be changed.  The pits command starts drawing its overlay
        then, on another thread, while the pits are found.

    Raises
    ------
    AnalysisError
        Blank or badly exposed picture, no coupon found, edge band larger than the
        coupon, height map of another size.
    """
    # 8-bit for an 8-bit picture: no full-frame float array from here on
    grey = grey_pixels(rgb, _scratch("pit_grey", rgb.shape[:2], np.uint8 if rgb.dtype == np.uint8 else np.float32))
    sample = exposure_sample(rgb, grey)
    check_exposure(rgb, grey, sample)
    if height_mm is not None and height_mm.shape != grey.shape:
        raise AnalysisError(
            f"height map is {height_mm.shape[1]}x{height_mm.shape[0]} px but the image is "
            f"{grey.shape[1]}x{grey.shape[0]} px (width x height); it must be registered pixel for pixel")
    s = settings.px_per_mm
    rectified = None
    if homography_px_to_mm is not None:
        rect = rectify_view(rgb, homography_px_to_mm, s, height_mm)  # None when square-on: no float copy
        if rect is not None:
            rgb, height_mm, rectified = rect
            grey = grey_pixels(rgb, _scratch("pit_grey", rgb.shape[:2], np.float32))
            sample = exposure_sample(rgb, grey)
    # one helper thread for the steps that need no result of the main thread's current one
    pool = thread_pool(1, "coupon-pits") if _threads() > 1 else None
    try:
        return _analyse_region(rgb, grey, sample, settings, height_mm, rectified, homography_px_to_mm,
                               height_unit, on_region, pool)
    finally:
        if pool is not None:
            pool.shutdown(wait=True)


def _analyse_region(rgb, grey, sample, settings: PitSettings, height_mm, rectified, homography_px_to_mm,
                    height_unit, on_region, pool) -> PitAnalysis:
    """:func:`analyse_pits` from the region on; ``pool``: its helper thread, or None."""
    s = settings.px_per_mm
    window = settings.flatten_mm * s
    # the background's reduced grey level needs no region: made on the helper thread while the region is found
    reduced = pool.submit(_reduce, grey, background_factor(window)) if pool is not None else None
    region = find_region(grey, settings.edge_mm * s, settings.whole_frame)
    reduced = reduced.result() if reduced is not None else None
    coupon, analysed = region.coupon, region.analysed
    area_px = int(np.count_nonzero(analysed))
    if area_px < 100:
        raise AnalysisError(f"the edge band of {settings.edge_mm} mm leaves no area to analyse "
                            f"(coupon region {np.count_nonzero(coupon) / s**2:.1f} mm2); reduce --edge-mm")
    # a quarter of a million sample points estimate clipping (a 5 % limit: its standard error is 0.04 %)
    clipped = clipped_fraction(sample[1], sample_grid(analysed, sample_step(grey.size)))
    if clipped > 0.05:
        raise AnalysisError(f"coupon surface is overexposed ({100 * clipped:.0f} % of its pixels clipped at white); "
                            "reduce the exposure so the metal is not saturated")
    # the outline's length (a contour search over the full frame) on the helper thread, while the pits are found
    perimeter = pool.submit(region_perimeter_px, analysed) if pool is not None else None
    if on_region is not None:
        on_region(rgb, analysed)
    # a quarter of a million points estimate the noise (robust sigma: its standard error is about 0.2 %)
    cands = candidate_pixels(grey, background_map(grey, coupon, window, reduced), coupon, analysed,
                             settings.look, settings.min_contrast)
    del grey
    work, details, pixels, sums = segment_pits(cands, coupon, analysed, settings)
    del cands
    # pit walls just outside the outlines are clipped as outliers by the reference fit
    table, lut, ref = _measure(work, s, height_mm, analysed, 5.0, pixels, sums)
    ids = lut[pixels[1]]
    on = ids > 0
    labels = PitLabels(work.shape, pixels[0][on], ids[on])
    if ref:
        details["reference_surface"] = ref
        check_height_relief(ref, height_unit)
    details["clipped_pct"] = 100 * clipped
    details["region"] = region.method
    details["perspective"] = rectified if rectified is not None else (
        "no homography: the picture is taken as square-on" if homography_px_to_mm is None
        else "homography square-on within 1 %: picture used as it is")
    return PitAnalysis(
        pits=table, labels=labels, coupon=coupon, analysed=analysed,
        analysed_area_mm2=area_px / s**2, details=details,
        perimeter_mm=(perimeter.result() if perimeter is not None else region_perimeter_px(analysed)) / s,
        rectified_rgb=rgb if rectified is not None else None,
    )
