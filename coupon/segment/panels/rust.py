"""Rust on a rectified panel, relative to the coating's own colour, with sub-pixel area.

Colour model (linear light, per pixel ``p``)
============================================

A pixel partly covered by rust, under a light level ``L`` that varies slowly
across the tray, is ``p = L * ((1 - f) * c + f * k * r)`` with ``c`` the
coating's colour, ``r`` a rust colour of unknown brightness ``k`` and ``f``
the covered fraction.  So ``p`` lies in the cone spanned by ``c`` and ``r``:
``p = alpha * c + beta * r``.  We fit that cone for several rust colours and
a *neutral* cone (``c`` and grey, ``p = alpha * c + gamma * (1, 1, 1)``),
which explains grey dirt (darker or lighter neutral) and glare (white light
added).  A pixel counts as rust only where a rust cone explains it better
than the neutral cone.  Then

* ``score``: the distance from the neutral cone, relative to the local light
  level, in noise units; used to *detect* rust sites (hysteresis thresholds);
* ``fraction``: the share of the coating that is hidden.  Per pixel it is the
  position of ``p / L`` on the segment from ``c`` to the best rust colour (the
  rust taken as bright as that colour), which stays robust where JPEG has
  smeared a speck's colour; ``L`` is a smooth (quadratic) fit of the brightness
  over the coating pixels.  Summed over a site it is the rusted area, which is
  what makes 1 to 3 pixel specks count correctly.
* On a coating darker than the rust (black, dark grey) the coating adds almost
  nothing to a rust pixel, so the segment reads a dim rust pixel as a partly
  covered one.  There, on sites larger than :data:`CONE_MIN_SITE_MM2`, the
  fraction is the cone's ``1 - alpha``, which does not depend on the rust's
  brightness ``k`` (:func:`_cone_fraction`).

Sites smaller than ``min_speck_mm2`` are dropped.  The uncertainty of the
rusted area is the spread over perturbed thresholds, combined with the pixel
noise of the fractions summed.

Rust colours (sRGB, our own choice, spanning orange-brown to dark rust cores)
are :data:`RUST_ENDMEMBERS_SRGB`.
"""

from __future__ import annotations

from dataclasses import dataclass

import cv2
import numpy as np

from coupon.calibrate import colourspace as cs

#: Rust colours (sRGB) the unmixing knows: yellow-brown, orange-brown, red-brown, brown, dark core.
RUST_ENDMEMBERS_SRGB = (
    (0.78, 0.55, 0.25),
    (0.80, 0.45, 0.16),
    (0.60, 0.27, 0.12),
    (0.42, 0.20, 0.09),
    (0.22, 0.10, 0.05),
)


#: A rust colour wins when its residual is below this share of the neutral cone's residual.
RUST_WINS_RATIO = 0.7

#: Below this tint (norm of the grey direction's part perpendicular to the unit coating colour) the
#: neutral model is the line through the coating colour, not the wedge between coating and grey.
NEUTRAL_PLANE_MIN_TINT = 0.03

#: A site's largest hidden fraction must exceed this many noise sigmas of the fraction.
PEAK_FRACTION_SIGMA = 6.0

#: On coatings lighter than the rust, a site whose pixels are mostly explained by the darkest rust colour
#: (the dark core) counts only when a site of the other rust colours lies within this distance (mm,
#: centroid to centroid; coupon's choice).  Rust on steel shows its red-brown to orange-brown products
#: around a dark core (common practice); alone, "darker plus a little red" is what a dirt smudge's blurred
#: edge looks like after JPEG (its chroma off by about one JPEG level).  The brown next to the dark core
#: does not vouch for it: a smudge's false sites take one of the two darkest colours.  Synthetic trays at
#: 7.5 px/mm, JPEG q92 4:2:0 (ninth session's study): white panels with dirt and glare and no rust, seeds
#: 1 to 6, read 0.013 to 0.061 % before (dark-core sites 47 to 95 % of that) and 0.002 to 0.018 % after;
#: white, grey and green panels with pinpoint, spots, general rust and streaks at 4.3 and 7.5 px/mm read
#: the same within 0.002 percentage points (their dark-core sites lie beside the other rust colours).
#: The test scenes of ``tests/test_panels_synth.py::test_clean_panel_with_dirt_and_glare_rates_within_one_class_of_10``
#: (seven seeds) read up to 0.073 % before and 0.000 to 0.023 % after.
LONE_CORE_NEAR_MM = 3.0
#: ... and only a small site (rust area at most this, mm2) with few pixels of the lighter colours of its
#: own (under :data:`LONE_CORE_OWN_LIGHT`): the smudge edges' false sites held 0.001 to 2.1 mm2 and 0 to 28 %
#: such pixels; a larger dark rust spot, or one ringed by orange-brown rust, is rust wherever it lies.
LONE_CORE_MAX_MM2 = 3.0
LONE_CORE_OWN_LIGHT = 0.3

#: Relative standard uncertainty of the unmixed rust area from the colour model (coupon's estimate).
COLOUR_MODEL_REL_UNC = 0.10
#: The same on a coating darker than every rust colour but the darkest (the dark cores).  There a dim
#: rust pixel looks like a partly covered pixel of brighter rust (the coating adds almost nothing to
#: either).  The large sites take the cone's fraction, which does not assume the rust's brightness
#: (:data:`CONE_MIN_SITE_MM2`) but leans on the coating's faint share of each pixel: on synthetic trays
#: (rust painted in colours of its own, not the unmixing's) the dark coating's spots, general rust and
#: streaks read 0.86 to 1.11 of the truth at 4.3 to 10.4 px/mm, JPEG q92 4:2:0 and 4:4:4, seeds 4 and 5
#: (twelfth session, with the pairs of rust colours; 0.83 to 1.22 in the seventh, and with the segment's
#: fraction alone spots and general read 0.75 to 0.89), white, grey and green 0.98 to 1.11.
COLOUR_MODEL_REL_UNC_DARK = 0.20

#: On a coating darker than the rust, sites larger than this (rust area, mm2) sum the cone's fraction
#: ``1 - alpha`` instead of the segment's (coupon's choice: the distribution letter's pinpoint limit,
#: ``coupon.ratings.panel_ratings.PINPOINT_MAX_MM2``).  The cone needs the rust's own colour, which JPEG
#: keeps inside a larger site but smears over a speck of a few pixels (there the cone read dark 4:2:0
#: pinpoint 1.26 to 1.34 x with a 0.3 mm2 limit, against 1.18 to 1.25 x from the segment; at 0.8 and
#: 2.0 mm2 the other kinds read the same within 0.01).  Synthetic trays, seeds 4 and 5, dark coating
#: (seventh session's study; ratios to the true rust area, segment -> cone on the large sites):
#:
#: * spots: 0.75 to 0.84 -> 0.83 to 0.97 at 4.3, 7.5 and 10.4 px/mm, JPEG q92 4:2:0 and 4:4:4;
#: * general: 0.76 to 0.89 -> 0.92 to 1.01;
#: * translucent streaks: 0.84 to 1.11 -> 1.10 to 1.22 (within 0.1 percentage points of the truth);
#: * pinpoint: unchanged (its sites are smaller).
#:
#: With the pairs of neighbouring rust colours (``_best_rust``, ``_cone_fraction_along``; twelfth session,
#: same scenes): spots 0.86 to 0.96, general 0.92 to 1.00, streaks 1.04 to 1.11.
#:
#: On white, grey and green coatings the cone read 1.02 to 1.15 x where the segment reads 0.88 to 1.07 x,
#: so it is used on dark coatings only.
CONE_MIN_SITE_MM2 = 0.8

#: Limits of pinpoint rust (specks of 0.12 to 0.25 mm radius) found in synthetic trays; the panels
#: command warns when a photo is beyond them.  Measured over true rust area, synthetic trays, 2 to 3
#: seeds each (sixth session's study):
#:
#: * resolution of the panel in the photo (0.1 % pinpoint rust, JPEG q92 4:2:0): grey 0.19 at 2.4 px/mm,
#:   0.53 at 3.1, 0.92 at 4.2; dark 0.13, 0.37, 1.15; white 0.87, 0.96, 0.99.  Below
#:   :data:`PINPOINT_MIN_PHOTO_PX_PER_MM` the specks blur into the coating and read low;
#: * JPEG chroma subsampling (1 % pinpoint rust at 7.5 px/mm, q92): with 4:2:0 dark 1.43 to 1.48, grey
#:   1.25, white 1.03; the same photos as 4:4:4 JPEG 1.02, 1.09 to 1.10, 1.02; without JPEG 0.94, 0.95,
#:   1.00.  4:2:0 stores colour per 2 x 2 pixels: a speck's colour spreads to its neighbours, whose
#:   lightness stays the coating's, and on a dark coating a reddish pixel of the coating's own
#:   lightness is exactly what the darkest rust colour mixed in at about 60 % looks like.
PINPOINT_MIN_PHOTO_PX_PER_MM = 4.0


@dataclass(frozen=True)
class RustSettings:
    """Thresholds of the rust segmentation.

    ``score_low``/``score_high``: hysteresis thresholds on the rust score (a
    site needs one pixel above ``score_high``; it grows over pixels above
    ``score_low``); ``min_speck_mm2``: smallest site kept (rust area of the site).
    """

    score_low: float = 2.0
    score_high: float = 5.0
    min_speck_mm2: float = 0.02
    endmembers_srgb: tuple = RUST_ENDMEMBERS_SRGB

    def to_dict(self) -> dict:
        return {"score_low": self.score_low, "score_high": self.score_high, "min_speck_mm2": self.min_speck_mm2,
                "endmembers_srgb": [list(e) for e in self.endmembers_srgb]}


@dataclass(frozen=True)
class ColourModel:
    """Per-pixel unmixing of a rectified panel (all maps (R, C) float32).

    Attributes
    ----------
    coating_linear : (3,) ndarray
        The coating's colour, linear RGB (at the panel's median light level).
    score : ndarray
        How sure a pixel is rust (its distance from the neutral cone in noise units) where a rust
        colour wins, else 0.
    fraction : ndarray
        Hidden share of the coating: where rust wins, the position on the segment from the coating
        to the best rust colour; elsewhere the neutral cone's ``1 - alpha / L``; about 0 on clean coating.
    neutral_dev : ndarray
        ``1 - alpha / L`` of the neutral cone: dark (> 0) or light (< 0) neutral marks.
    light : ndarray
        The smooth light level ``L`` relative to the coating colour.
    rust_wins : ndarray of bool
    noise_fraction : float
        Robust standard deviation of ``fraction`` on clean coating.
    rust_idx : ndarray of int64 or None
        Flat indices of the ``rust_wins`` pixels, ascending, when the maker has them (:func:`unmix`);
        given, it also promises that ``score`` is 0 wherever rust does not win, so that
        :func:`_grow_candidates` may look at these pixels alone.
    coating_darker_than_rust : bool
        The coating is darker than every rust colour but the darkest (then :data:`COLOUR_MODEL_REL_UNC_DARK`
        applies).
    cone_fraction : (flat indices, fractions) or None
        On such a coating: the cone's ``1 - alpha`` at the rust pixels of the per-pixel test
        (:func:`_cone_fraction`; indices ascending), which :func:`measure_rust` uses on sites larger
        than :data:`CONE_MIN_SITE_MM2`.  None on other coatings.
    rust_k : ndarray of int8 or None
        Beside ``rust_idx``: each rust pixel's best rust colour, as its rank by lightness among the
        rust colours (0 the lightest, the last the dark core), for :data:`LONE_CORE_NEAR_MM`; None when
        not known (then that rule is off).
    n_rust : int
        The number of rust colours the ranks count.
    """

    coating_linear: np.ndarray
    score: np.ndarray
    fraction: np.ndarray
    neutral_dev: np.ndarray
    light: np.ndarray
    rust_wins: np.ndarray
    noise_fraction: float
    rust_idx: np.ndarray | None = None
    coating_darker_than_rust: bool = False
    cone_fraction: tuple | None = None
    rust_k: np.ndarray | None = None
    n_rust: int = 0

    @property
    def coating_srgb(self) -> np.ndarray:
        return cs.linear_to_srgb(self.coating_linear)

    def rust_pixels(self) -> np.ndarray:
        """Flat indices of the pixels where rust wins, ascending (``np.flatnonzero(rust_wins)``)."""
        return np.flatnonzero(self.rust_wins) if self.rust_idx is None else self.rust_idx


def _lin(srgb) -> np.ndarray:
    return cs.srgb_to_linear(np.asarray(srgb, dtype=np.float64))


#: Pixels sampled for robust statistics (medians); 20 000 give a median to well under 1 % of the noise.
_SAMPLE_PX = 20000

#: Luma weights (ITU-R BT.601, the weights JPEG's Y channel uses), applied here in linear light.
_LUMA = np.array([0.299, 0.587, 0.114])

#: Side of the neighbourhood (mm) over which chroma is pooled: about one JPEG 4:2:0 chroma sample
#: plus its upsampling smear in a tray photo at 3 to 5 px/mm.
CHROMA_POOL_MM = 0.6


#: Elements per chunk of :func:`_sample_idx` (the chunk's index array, 0.5 MB, stays in cache).
_SAMPLE_CHUNK = 1 << 16


def _sample_idx(mask: np.ndarray, n: int = _SAMPLE_PX) -> np.ndarray:
    """Every k-th set pixel of ``mask`` (flat indices), k = count // n: ``flatnonzero(mask)[::k]``.

    Chunk by chunk, so the full index list (8 MB of int64 for a 1.1 MP panel, 3 ms) is never made.
    """
    flat = mask.ravel()
    step = max(1, int(np.count_nonzero(flat)) // n)
    out, seen = [], 0
    for a in range(0, flat.size, _SAMPLE_CHUNK):
        idx = np.flatnonzero(flat[a:a + _SAMPLE_CHUNK])
        out.append(idx[(-seen) % step::step] + a)  # global ranks seen, seen + 1, ...: keep multiples of step
        seen += idx.size
    return np.concatenate(out) if out else np.zeros(0, np.int64)


def _median(values: np.ndarray) -> np.floating:
    """``np.median(values)`` of a 1-D float array (non-empty) through :func:`_median_rows`.

    A numpy scalar of the array's type, as np.median gives: a float32 median times a Python float
    stays float32 (NEP 50), which the noise estimates rely on to keep their values.
    """
    return _median_rows(values.reshape(1, -1))[0]


def _robust(values: np.ndarray) -> tuple[float, float]:
    """Median and MAD-based standard deviation."""
    if values.size == 0:
        return 0.0, 0.0
    med = float(_median(values))
    return med, float(1.4826 * _median(np.abs(values - med)))


def _robust_one_sided(values: np.ndarray) -> float:
    """MAD-based standard deviation from the quieter side of the median: ``1.4826`` times the smaller of the
    medians of ``med - v`` (values below) and ``v - med`` (above).

    Symmetric noise gives the same on both sides; marks of one sign (glare lightening a black coating over
    a wide soft area, dirt darkening a patch) widen one side only.  On a black panel with glare the two-sided
    MAD of the clean fraction came out 3 to 4 times the glare-free panel's (0.12 to 0.18 against 0.04),
    and every rust site then failed the fraction tests (ninth session).
    """
    if values.size == 0:
        return 0.0
    med = float(_median(values))
    lo, hi = values[values < med], values[values > med]
    sides = [float(_median(np.abs(v - med))) for v in (lo, hi) if v.size]
    return 1.4826 * min(sides) if sides else 0.0


#: Rows at least this long get their order statistics from :func:`_order_stats`, shorter ones from np.partition.
_BUCKET_MIN = 1024

#: Bits of the bucket index of :func:`_order_stats` (4 096 buckets).
_BUCKET_BITS = 12


def _order_stats(v: np.ndarray, ranks) -> np.ndarray:
    """Values of the given ranks (0-based, in ascending order) of a 1-D float32 or float64 array.

    The bit patterns of the floats map to unsigned integers in the same order (negative: every bit
    flipped; otherwise the sign bit set).  A histogram of their top :data:`_BUCKET_BITS` bits above
    the smallest finds the bucket that holds each rank, and np.partition runs on that bucket alone
    (a few hundred of 20 000 samples).  The values are those of ``np.partition(v, ranks)[ranks]``.
    numpy's introselect on the whole row costs 0.2 to 0.35 ms for 20 000 samples on this machine
    (its data-dependent branches mispredict), this about 0.06 ms.  A NaN sorts above every number,
    as in np.partition; callers test for NaN themselves.
    """
    size = v.dtype.itemsize
    utype, itype = (np.uint32, np.int32) if size == 4 else (np.uint64, np.int64)
    neg = (v.view(itype) >> (8 * size - 1)).view(utype)  # all ones where the sign bit is set
    key = v.view(utype) ^ (neg | utype(1 << (8 * size - 1)))
    k0 = key.min()
    drop = max(0, int(key.max() - k0).bit_length() - _BUCKET_BITS)
    bucket = ((key - k0) >> drop).astype(np.intp)
    cum = np.cumsum(np.bincount(bucket))
    out = np.empty(len(ranks), v.dtype)
    where = np.searchsorted(cum, ranks, side="right")  # the bucket of each rank
    for j in np.unique(where):
        sel = np.flatnonzero(where == j)
        below = int(cum[j - 1]) if j else 0
        local = [int(ranks[i]) - below for i in sel]
        out[sel] = np.partition(v[bucket == j], local)[local]
    return out


def _median_rows(a: np.ndarray, dtype=None) -> np.ndarray:
    """``np.median(a.astype(dtype), axis=1)`` of a 2-D float array, the same values (NaN for a row holding NaN).

    The middle order statistics come from :func:`_order_stats` (float32 and float64 rows of at least
    :data:`_BUCKET_MIN` values) or from one partition at the middle places (np.median also partitions
    at the last place, for its NaN test).  ``dtype`` (default ``a.dtype``): the type the middle
    values are averaged in.  The conversion from float32 to float64 is exact and keeps the order, so
    float32 rows give their float64 medians from the float32 values.
    """
    n = a.shape[1]
    dtype = a.dtype if dtype is None else np.dtype(dtype)
    if n == 0:
        return np.median(a.astype(dtype), axis=1)
    m = n // 2
    ranks = [m] if n % 2 else [m - 1, m]
    if n >= _BUCKET_MIN and a.dtype in (np.float32, np.float64):
        st = np.empty((a.shape[0], len(ranks)), a.dtype)
        for i in range(a.shape[0]):
            st[i] = _order_stats(np.ascontiguousarray(a[i]), ranks)
    else:
        st = np.partition(a, ranks, axis=1)[:, ranks]
    if n % 2:
        med = st[:, 0].astype(dtype)
    else:
        med = (st[:, 0].astype(dtype) + st[:, 1].astype(dtype)) / 2
    # a row holding NaN sums to NaN; so does one holding both infinities, which the exact max test sorts out
    with np.errstate(invalid="ignore"):
        has_nan = np.isnan(a.sum(axis=1)).any()
    if has_nan:
        return np.where(np.isnan(a.max(axis=1)), np.nan, med)
    return med


def coating_colour(lin: np.ndarray, valid: np.ndarray, idx: np.ndarray | None = None,
                   samples: np.ndarray | None = None) -> np.ndarray:
    """Robust coating colour: median of the valid pixels, then of those near it in chromaticity.

    ``idx``: the sampled valid pixels (``_sample_idx(valid)``) when the caller has them already;
    ``samples``: their colours, ``lin.reshape(-1, 3)[idx]`` (a gather of scattered pixels that costs
    0.8 ms on a 1.1 MP panel, so :func:`unmix` makes it once for this and its noise statistics).
    """
    flat = lin.reshape(-1, 3)
    idx = _sample_idx(valid) if idx is None else idx
    if idx.size >= 50:
        px_in = np.take(flat, idx, axis=0) if samples is None else samples.reshape(-1, 3)
    else:
        px_in = flat[:: max(1, flat.shape[0] // _SAMPLE_PX)]
    # planar (3, n): the same sums in channel order, on contiguous rows (an axis-1 sum over (n, 3) costs
    # 12 ns a pixel, 0.24 ms on 20 000 samples); the medians partition the samples in their own type
    # (float32 from a panel) and average in float64, which gives the float64 medians
    px_own = _planar(px_in)
    px = px_own.astype(np.float64)
    c = _median_rows(px_own, np.float64)
    for _ in range(2):
        chroma = px / np.maximum(px[0] + px[1] + px[2], 1e-6)
        c_chroma = c / max(c.sum(), 1e-6)
        dev = np.abs(chroma - c_chroma[:, None])
        d = dev[0] + dev[1] + dev[2]
        keep = d <= max(_median(d) * 3, 0.01)
        if keep.sum() > 50:
            c = _median_rows(px_own[:, keep], np.float64)
    return np.maximum(c, 1e-5)


def quadratic_design(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Design matrix (1, x, y, x2, xy, y2) of the panels' smooth quadratic fits (coordinates on [-0.5, 0.5])."""
    return np.column_stack([np.ones_like(x), x, y, x * x, x * y, y * y])


def lstsq_quadratic(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Least squares of a small quadratic design (float64 normal equations).

    The designs here have 6 well-conditioned columns (1, x, y, x2, xy, y2 on [-0.5, 0.5]); a 6 x 6
    solve costs far less than LAPACK's SVD-based ``lstsq`` and its thread start-up, and agrees with
    it to rounding.  Falls back to ``lstsq`` when the normal matrix is singular.
    """
    a = np.asarray(a, np.float64)
    b = np.asarray(b, np.float64)
    try:
        return np.linalg.solve(a.T @ a, a.T @ b)
    except np.linalg.LinAlgError:
        return np.linalg.lstsq(a, b, rcond=None)[0]


#: The light field's fit starts from the blocks whose brightness lies within this share of the coating's
#: own (1: the coating colour is the median of the coating's pixels); a lighting gradient wider than this
#: is taken in by the iterations that follow, as the first fit extrapolates it.
LIGHT_START_BAND = 0.3


def _near_coating(vals: np.ndarray) -> np.ndarray:
    """Blocks to start the light field's robust fit from: brightness within :data:`LIGHT_START_BAND` of 1.

    A least-squares start from every block is pulled far off by a wide corroded zone: along a scribe with
    7 to 10 mm creep (a band 15 to 25 mm wide, a fifth of the panel) the first fit bent towards the band,
    its residuals' MAD took the band's share in, and the trimming kept the band; the light field then
    swung by a factor of two, the clean coating's fraction noise rose from 0.04 to 0.19 and every rust
    spot failed its tests (0 % rust, tenth session).  Nor is the median block a safe start: under an X
    scribe with 10 mm creep the zone holds 60 % of the panel.  The coating colour is robust to that
    (a median over the pixels near the coating's chromaticity), so the coating's own brightness is 1.
    """
    keep = np.abs(vals - 1.0) <= LIGHT_START_BAND
    return keep if np.count_nonzero(keep) >= 12 else np.ones(vals.size, bool)


def _light_stack(lin: np.ndarray, weights: np.ndarray, clean: np.ndarray) -> np.ndarray:
    """(R, C, 2) float32: ``(lin @ weights) * clean`` and ``clean``, the input of :func:`_smooth_light`.

    Made strip by strip (the brightness and the mask as float exist only a strip at a time, in
    cache) straight into the two-channel array that :func:`_smooth_light` reduces in one resize.
    """
    rows, cols = clean.shape
    out = np.empty((rows, cols, 2), np.float32)
    w = np.asarray(weights, np.float32).reshape(1, 3)
    for r0, r1 in _strips(rows):
        cleanf = clean[r0:r1].astype(np.float32)
        alpha = _channels(cv2.transform(lin[r0:r1], w))[..., 0]
        np.multiply(alpha, cleanf, out=alpha)
        cv2.merge([alpha, cleanf], dst=out[r0:r1])
    return out


def _smooth_light(alpha: np.ndarray | None, clean: np.ndarray, px_per_mm: float,
                  stack: np.ndarray | None = None) -> np.ndarray:
    """Quadratic fit of ``alpha`` over clean coating pixels (robust, on 2 mm blocks).

    ``stack``: ``alpha * clean`` and ``clean`` as an (R, C, 2) float32 array (:func:`_light_stack`);
    then ``alpha`` may be None.  The block means of both come from one two-channel INTER_AREA
    resize: OpenCV's resize reduces each channel as it reduces a single-channel picture (the same
    values), and at a scale that is not a whole number it costs about as much per pixel for two
    channels as for one (2.6 ms against 2 x 2.45 ms on a 1.1 MP panel).
    """
    rows, cols = clean.shape
    f = min(1.0, 0.5 / px_per_mm)
    size = (max(4, int(round(cols * f))), max(4, int(round(rows * f))))
    if stack is None:
        cleanf = clean.astype(np.float32)
        stack = cv2.merge([np.multiply(alpha, cleanf), cleanf])
    small = cv2.resize(stack, size, interpolation=cv2.INTER_AREA)
    a_small, w_small = small[..., 0], small[..., 1]
    ok = w_small > 0.9
    vals = (a_small[ok] / w_small[ok]).astype(np.float64)
    rr, cc = np.nonzero(ok)
    rs, cs_ = size[1], size[0]
    if vals.size < 12:
        # alpha * 1 on the clean pixels is alpha itself
        level = float(np.median(stack[..., 0][clean])) if clean.any() else 1.0
        return np.full(clean.shape, level, np.float32)
    y, x = rr / rs - 0.5, cc / cs_ - 0.5
    a = quadratic_design(x, y)
    keep = _near_coating(vals)
    coef = None
    for _ in range(3):
        coef = lstsq_quadratic(a[keep], vals[keep])
        res = vals - a @ coef
        mad = _median(np.abs(res[keep])) * 1.4826 + 1e-6
        keep = np.abs(res) < 3 * mad
        if keep.sum() < 12:
            break
    # the quadratic evaluated separably (rows x columns broadcast): no coordinate grids
    yv = ((np.arange(rows, dtype=np.float64) + 0.5) * f / rs - 0.5)[:, None]
    xv = ((np.arange(cols, dtype=np.float64) + 0.5) * f / cs_ - 0.5)[None, :]
    row_part = (coef[0] + coef[2] * yv + coef[5] * yv * yv).astype(np.float32)
    slope = (coef[1] + coef[4] * yv).astype(np.float32)
    x32 = xv.astype(np.float32)
    x2_term = np.float32(coef[3]) * (xv * xv).astype(np.float32)
    # in place in one numpy-allocated map, strip by strip (the same float32 operations as the plain
    # expression row_part + slope * x + c3 * x2, without its full-size temporaries, and each strip's
    # four passes in cache)
    light = np.empty((rows, cols), np.float32)
    for r0, r1 in _strips(rows):
        ls = light[r0:r1]
        np.multiply(slope[r0:r1], x32, out=ls)
        np.add(row_part[r0:r1], ls, out=ls)
        np.add(ls, x2_term, out=ls)
        np.maximum(ls, np.float32(1e-3), out=ls)
    return light


def _best_rust(q: np.ndarray, qq: np.ndarray, best_res: np.ndarray, rust_dev: list[np.ndarray]):
    """Best rust colour per pixel: fraction, index, residual^2, and the rust colour's deviation used.

    ``q`` is planar, (3, n): the deviations from the coating, one row per channel; ``qq`` their squared
    norms.  ``rust_dev`` are the rust colours minus the coating, in the order of
    :data:`RUST_ENDMEMBERS_SRGB` (a curve from the lightest rust colour to the darkest): a pixel is fitted
    on every single colour (``f d_k``) and on every pair of neighbours (``a d_k + b d_k+1``, a, b > 0:
    a rust colour between the two, at cover ``f = a + b``; beyond full cover, the colour on the segment
    between them at f = 1).  A fit counts only with a positive fraction and a residual below ``best_res``
    (the first fit wins a tie); else the fraction is NaN and the index -1.  The index is the nearer
    endmember of a pair; the deviation (planar (3, n), NaN where nothing wins) is ``(a d_k + b d_k+1) / f``.

    Planar rows keep every operation on contiguous 1-D arrays: numpy on an (n, 3) or (n, 5) array (a
    reduction or broadcast over the short inner axis) runs 4 to 10 times slower per element, and a BLAS
    product costs its threads' start-up (up to 8 ms a call on this 2-core machine when the other core
    is busy).
    """
    n = q.shape[1]
    best_f = np.full(n, np.nan, np.float32)
    best_k = np.full(n, -1, np.int8)
    best_s = np.zeros(n, np.float32)  # share of the second colour of a pair (0: a single colour)
    best_lo = np.full(n, -1, np.int8)
    dots = [q[0] * d[0] + q[1] * d[1] + q[2] * d[2] for d in rust_dev]
    for k, d in enumerate(rust_dev):
        dd = float(d @ d)
        qd = dots[k]
        f = np.clip(qd / dd, 0.0, 1.0)
        res = qq - 2 * f * qd + f * f * dd
        better = (f > 0) & (res < best_res)
        best_res = np.where(better, res, best_res)
        best_f = np.where(better, f, best_f)
        best_k = np.where(better, np.int8(k), best_k)
        best_lo = np.where(better, np.int8(k), best_lo)
        best_s = np.where(better, np.float32(0), best_s)
    # the pairs in float64 and in the basis (d_k, d_k+1 - d_k), whose first coefficient is the cover f
    # itself: neighbouring colours can point nearly the same way from a light coating, and the float32
    # 2 x 2 solve in (d_k, d_k+1) lost up to 0.03 of a fraction to rounding
    q64 = q.astype(np.float64)
    for k in range(len(rust_dev) - 1):
        d1 = np.asarray(rust_dev[k], np.float64)
        dd = np.asarray(rust_dev[k + 1], np.float64) - d1
        g11, g12, g22 = float(d1 @ d1), float(d1 @ dd), float(dd @ dd)
        det = g11 * g22 - g12 * g12
        if det <= 1e-12 * g11 * g22:
            continue
        r1 = q64[0] * d1[0] + q64[1] * d1[1] + q64[2] * d1[2]
        r2 = q64[0] * dd[0] + q64[1] * dd[1] + q64[2] * dd[2]
        f = (g22 * r1 - g12 * r2) / det
        b = (g11 * r2 - g12 * r1) / det  # the share of the second colour, times f
        # beyond full cover: the nearest colour on the segment between the two, at f = 1
        full = f > 1
        if full.any():
            t = np.clip((r2 - g12) / g22, 0.0, 1.0)  # (q - d1) . dd / |dd|^2
            b = np.where(full, t, b)
            f = np.where(full, 1.0, f)
        a = f - b
        res = np.zeros(n, np.float64)
        for ch in range(3):
            e = q64[ch] - f * d1[ch] - b * dd[ch]
            res += e * e
        better = (a > 0) & (b > 0) & (res < best_res)
        best_res = np.where(better, res, best_res).astype(np.float32)
        best_f = np.where(better, f, best_f).astype(np.float32)
        best_k = np.where(better, np.where(a >= b, np.int8(k), np.int8(k + 1)), best_k)
        best_lo = np.where(better, np.int8(k), best_lo)
        best_s = np.where(better, b / np.maximum(f, 1e-12), best_s).astype(np.float32)
    dev = _mixed_dev(best_lo, best_s, rust_dev)
    return best_f.astype(np.float32), best_k, best_res, dev


def _mixed_dev(lo: np.ndarray, s: np.ndarray, rust_dev: list[np.ndarray]) -> np.ndarray:
    """Planar (3, n) rust deviations ``(1 - s) d_lo + s d_lo+1`` (NaN where ``lo`` is -1)."""
    table = np.vstack([np.asarray(rust_dev, np.float32), np.full((1, 3), np.nan, np.float32)])  # row -1: none
    nxt = np.vstack([table[1:-1], table[-2:-1], table[-1:]])  # the next colour (the last repeats itself)
    a, b = table[lo], nxt[lo]
    return np.ascontiguousarray((a + s[:, None] * (b - a)).T)


def _cone_fraction(pn: np.ndarray, c: np.ndarray, rust: list[np.ndarray]) -> np.ndarray:
    """Hidden share of the coating ``1 - alpha`` of planar (3, n) pixels ``pn`` (divided by the light level).

    Each pixel is fitted as ``alpha c + beta e`` with alpha, beta >= 0 (non-negative least squares on
    two columns, solved in closed form: the unconstrained 2 x 2 solution, or, where its alpha is
    negative, the fit on ``e`` alone) for every rust colour ``e``, whatever the rust's brightness; the
    colour with the smallest residual gives ``alpha``.  A pixel no colour fits with beta > 0 gets
    alpha 1 (fraction 0).  ``tests/test_panels_unmix.py`` checks it against scipy.optimize.nnls.
    """
    best_res = np.full(pn.shape[1], np.inf, np.float32)
    best_a = np.ones(pn.shape[1], np.float32)
    cc = float(c @ c)
    c32 = c.astype(np.float32)
    pc = pn[0] * c32[0] + pn[1] * c32[1] + pn[2] * c32[2]
    for e in rust:
        ee, ce = float(e @ e), float(c @ e)
        det = cc * ee - ce * ce
        e32 = e.astype(np.float32)
        pe = pn[0] * e32[0] + pn[1] * e32[1] + pn[2] * e32[2]
        a = (np.float32(ee / det) * pc - np.float32(ce / det) * pe)
        b = (np.float32(cc / det) * pe - np.float32(ce / det) * pc)
        # alpha < 0: the pixel lies beyond the rust colour; the fit on the rust colour alone
        a_neg = a < 0
        b = np.where(a_neg, pe / np.float32(ee), b)
        a = np.maximum(a, 0)
        # the residual from its parts (the expanded quadratic form cancels badly in float32)
        res = np.zeros(pn.shape[1], np.float32)
        for ch in range(3):
            d = pn[ch] - a * c32[ch] - b * e32[ch]
            res += d * d
        better = (b > 0) & (res < best_res)
        best_res = np.where(better, res, best_res)
        best_a = np.where(better, a, best_a)
    return np.clip(1 - best_a, 0.0, 1.0)


def _cone_fraction_along(pn: np.ndarray, c: np.ndarray, e: np.ndarray) -> np.ndarray:
    """:func:`_cone_fraction` with each pixel's own rust colour: planar (3, n) ``e`` (the colour on the
    rust colour curve that :func:`_best_rust` chose for the pixel) instead of a search over the endmembers.

    Each pixel is fitted as ``alpha c + beta e`` with alpha, beta >= 0 (the unconstrained 2 x 2 solution,
    or, where its alpha is negative, the fit on ``e`` alone); where beta is not positive, alpha 1
    (fraction 0), as in :func:`_cone_fraction`.
    ``tests/test_panels_unmix.py`` checks it against scipy.optimize.nnls.
    """
    c32 = c.astype(np.float32)
    cc = np.float32(c @ c)
    pc = pn[0] * c32[0] + pn[1] * c32[1] + pn[2] * c32[2]
    pe = pn[0] * e[0] + pn[1] * e[1] + pn[2] * e[2]
    ce = e[0] * c32[0] + e[1] * c32[1] + e[2] * c32[2]
    ee = e[0] * e[0] + e[1] * e[1] + e[2] * e[2]
    det = cc * ee - ce * ce
    safe = np.where(det > 0, det, np.float32(1))
    a = (ee * pc - ce * pe) / safe
    b = (cc * pe - ce * pc) / safe
    # alpha < 0: the pixel lies beyond the rust colour (fit on e alone, alpha 0); beta <= 0: no rust in it
    b = np.where(a < 0, pe, b)  # the fit on e alone: beta = pe / ee, of pe's sign
    a = np.where(a < 0, np.float32(0), a)
    a = np.where((b <= 0) | (det <= 0), np.float32(1), a)
    return np.clip(1 - a, 0.0, 1.0)


def _planar(px: np.ndarray) -> np.ndarray:
    """(n, 3) pixels as a contiguous (3, n) array, one row per channel."""
    return np.ascontiguousarray(px.T)


def _norm2(q: np.ndarray) -> np.ndarray:
    """Squared norm of each column of a planar (3, n) array (summed in channel order, as einsum does)."""
    return q[0] * q[0] + q[1] * q[1] + q[2] * q[2]


def _channels(a: np.ndarray) -> np.ndarray:
    # cv2.transform drops the channel axis when it gives one channel
    return a[..., None] if a.ndim == 2 else a


def _sparse_residual(px: np.ndarray, u1: np.ndarray, normals: np.ndarray, plane: list) -> np.ndarray:
    """Squared distance from the neutral wedge (or line) of (n, 3) pixels, (n,) float32 (n may be 0)."""
    if len(px) == 0:
        return np.zeros(0, np.float32)
    return _neutral_residual(px.reshape(-1, 1, 3), u1, normals, plane)[1].ravel()


def _neutral_residual(img: np.ndarray, u1: np.ndarray, normals: np.ndarray, plane: list) -> tuple[np.ndarray, np.ndarray]:
    """Component along the coating colour and squared distance from the neutral wedge (or line).

    Dirt (a grey mixed in) and glare (white added) give ``p = alpha c + gamma grey`` with alpha and
    gamma >= 0: a wedge, not the whole plane of ``c`` and grey.  On a nearly grey coating the plane
    holds the blue-yellow axis of its faint tint and so explains most of the colour of rust; the
    wedge there is only a few degrees wide.  The in-plane distance from the wedge is added to the
    distance from the plane.
    """
    # one 3 x 3 transform (OpenCV's fast path), then OpenCV arithmetic on single channels
    t = cv2.transform(np.ascontiguousarray(img, dtype=np.float32), np.vstack([u1, normals, *plane[1:]]).astype(np.float32))
    ch = cv2.split(t)
    along = ch[0]
    perp2 = cv2.multiply(ch[1], ch[1])
    if len(plane) > 1:
        grey = np.ones(3) / np.sqrt(3)
        gx, gy = float(grey @ u1), float(grey @ plane[1])
        y = ch[2]
        beyond = cv2.addWeighted(along, gy, y, -gx, 0.0)  # x gy - y gx < 0: past the grey edge of the wedge
        cv2.min(y, 0.0, dst=y)
        cv2.min(beyond, 0.0, dst=beyond)
        perp2 += cv2.multiply(y, y)
        perp2 += cv2.multiply(beyond, beyond)
    else:
        perp2 += cv2.multiply(ch[2], ch[2])
    return along, perp2


#: Rows per strip of :func:`unmix`'s full-resolution pass.  A strip's float arrays (64 x 750 x 3
#: float32 = 0.6 MB on a 75 mm panel at 10 px/mm) stay in a core's 1 MB L2 cache; the same steps on
#: whole-panel temporaries (13.5 MB each, fresh pages every time) took twice as long (six benchmark
#: panels: 0.29 s against 0.62 s with one strip the height of the panel; 128 rows: as fast as 64).
STRIP_ROWS = 64


def _strips(rows: int):
    for r0 in range(0, rows, STRIP_ROWS):
        yield r0, min(rows, r0 + STRIP_ROWS)


def unmix(lin: np.ndarray, valid: np.ndarray, px_per_mm: float,
          endmembers_srgb=RUST_ENDMEMBERS_SRGB, coating_linear: np.ndarray | None = None) -> ColourModel:
    """Unmix every pixel of a rectified panel into coating, rust and neutral marks.

    Parameters
    ----------
    lin : (R, C, 3) ndarray of float32
        Linear-light RGB (colour corrected) on the mm grid.
    valid : (R, C) ndarray of bool
        Pixels that may be used to estimate the coating colour and the light field.
    px_per_mm : float
        Grid resolution (for the block size of the light field).

    Notes
    -----
    A cheap pass over every pixel (one 3x3 colour transform) gives the
    brightness along the coating colour and the distance from the neutral
    plane; the rust cones are fitted only to the pixels that leave the neutral
    plane by more than the noise (a few per cent of a panel).

    Pinpoint rust after JPEG: 4:2:0 chroma subsampling keeps lightness per
    pixel but chroma only per 2 x 2 block, so a 1 to 2 px speck keeps its
    lightness contrast and loses most of its colour.  A second test therefore
    pools chroma over :data:`CHROMA_POOL_MM` (the pooled deviation still
    leans towards rust, while dirt stays neutral), picks the rust colour from
    it, and unmixes the *lightness* per pixel against that colour's lightness.

    Speed: the global statistics (noise of the neutral distance and of the lightness) come from
    the sampled pixels alone, so every per-pixel step after the light field runs in one pass of
    :data:`STRIP_ROWS`-row strips (small temporaries in cache); the full-size outputs are allocated
    once by numpy.  The result equals the whole-panel computation up to float32 rounding
    (``tests/test_panels_fastpath.py``).
    """
    lin = np.ascontiguousarray(lin, dtype=np.float32)
    shape = lin.shape[:2]
    rows, cols = shape
    vidx = _sample_idx(valid)
    flat = lin.reshape(-1, 3)
    # the sampled valid pixels: coating colour and noise statistics.  Rows of an (n, 3) array are gathered
    # by np.take: fancy indexing took 3.5 times as long (0.4 ms against 0.11 ms for these 20 000)
    px_v = np.take(flat, vidx, axis=0).reshape(-1, 1, 3)
    c = coating_colour(lin, valid, vidx, px_v) if coating_linear is None else np.asarray(coating_linear, np.float64)
    rust = [_lin(e) for e in endmembers_srgb]
    grey = np.ones(3) / np.sqrt(3)
    cn = float(np.sqrt(c @ c))
    cn32 = np.float32(cn)
    u1 = c / cn
    g_perp = grey - (grey @ u1) * u1
    plane = [u1] + ([g_perp / np.linalg.norm(g_perp)] if np.linalg.norm(g_perp) > NEUTRAL_PLANE_MIN_TINT else [])
    # normals of the neutral plane (one), or of the neutral line when the coating is grey (two)
    _, _, vt = np.linalg.svd(np.array(plane))
    normals = vt[len(plane):]
    # brightness relative to the coating (the light field is fitted to it), times the valid mask, beside
    # the mask itself: made in strips, so no full-size brightness map
    light = _smooth_light(None, valid, px_per_mm, _light_stack(lin, u1 / cn, valid))
    lflat = light.ravel()
    # global statistics from the sampled valid pixels only (the same per-pixel arithmetic)
    dev_v = np.sqrt(_sparse_residual(px_v, u1, normals, plane)) / (cn32 * lflat[vidx])
    med, sigma = _robust(dev_v)
    noise_floor = np.float32(med + 3 * sigma)
    s_inv = max(sigma, 1e-4)
    luma = _LUMA.astype(np.float32)[None, :]
    y_c = float(c @ _LUMA)
    dy_v = (_channels(cv2.transform(px_v, luma))[..., 0].ravel() if vidx.size else np.zeros(0, np.float32))
    dy_v = dy_v / lflat[vidx] - np.float32(y_c)
    y_med, y_sig = _robust(dy_v)
    k = 2 * int(round(CHROMA_POOL_MM / 2 * px_per_mm)) + 1
    rust_y = np.array([float(e @ _LUMA) for e in rust])
    # not on coatings darker than most rust colours (black, dark grey): there a speck's colour stays
    # large against the coating's noise even after subsampling and the per-pixel test finds it,
    # while the lightness test would add the JPEG ringing around the bright speck
    pooled = k >= 3 and y_sig > 0 and y_c > float(np.median(rust_y))
    # darker than every rust colour but the darkest (the dark cores): there the coating adds almost nothing
    # to a rust pixel, and rust brightness and cover cannot be told apart (COLOUR_MODEL_REL_UNC_DARK)
    darker = bool(y_c < np.sort(rust_y)[1]) if len(rust_y) > 1 else False
    half = k // 2
    neutral_dev = np.empty(shape, np.float32)
    fraction = np.empty(shape, np.float32)
    score = np.zeros(shape, np.float32)
    rust_wins = np.zeros(shape, bool)
    quiet = np.empty(shape, bool)  # distance from the neutral cone within the noise
    c32 = c.astype(np.float32)
    rust_dev = [(e - c).astype(np.float32) for e in rust]
    y_thr = np.float32(2 * y_sig)
    # the strips collect sparse candidates; the cone searches then run once per panel on contiguous
    # (planar) arrays: per strip they were some 50 small numpy calls each, whose call overhead
    # outweighed the arithmetic on a few thousand pixels
    c_idx, c_px, c_l, c_p2, c_dev = [], [], [], [], []  # per-pixel test: leaves the neutral cone
    b_idx, b_pb, b_dy = [], [], []  # pooled test: strong lightness deviation
    pb_v = np.empty((vidx.size, 3), np.float32)  # pooled colour at the sampled pixels (its noise)
    for r0, r1 in _strips(rows):
        s = lin[r0:r1]
        ls = light[r0:r1]
        along, perp2 = _neutral_residual(s, u1, normals, plane)
        a_s = along / cn32
        # distance from the neutral wedge (or line), relative to the local coating brightness
        dev = np.sqrt(perp2) / (cn32 * ls)
        nd = neutral_dev[r0:r1]
        np.divide(a_s, ls, out=nd)
        np.subtract(1, nd, out=nd)
        fraction[r0:r1] = nd
        np.less_equal(dev, noise_floor, out=quiet[r0:r1])
        base = r0 * cols
        cand = np.flatnonzero(~quiet[r0:r1])
        if cand.size:
            c_idx.append(cand + base)
            c_px.append(np.take(s.reshape(-1, 3), cand, axis=0))
            c_l.append(ls.ravel()[cand])
            c_p2.append(perp2.ravel()[cand])
            c_dev.append(dev.ravel()[cand])
        if not pooled:
            continue
        # -- lightness at full resolution, rust identity from pooled chroma (JPEG-proof specks) --
        h0, h1 = max(0, r0 - half), min(rows, r1 + half)
        # p / L by OpenCV on a three-channel copy of L (numpy's broadcast over the inner axis of 3 took
        # twice as long)
        ratio = cv2.divide(lin[h0:h1], cv2.merge([light[h0:h1]] * 3))
        pb = cv2.boxFilter(ratio, -1, (k, k), normalize=True)[r0 - h0:r1 - h0].reshape(-1, 3)
        dy = _channels(cv2.transform(s, luma))[..., 0] / ls - np.float32(y_c)  # lightness deviation
        sb = np.flatnonzero(cv2.absdiff(dy, float(y_med)) > y_thr)
        v0, v1 = np.searchsorted(vidx, [base, base + s.shape[0] * cols])
        pb_v[v0:v1] = np.take(pb, vidx[v0:v1] - base, axis=0)
        if sb.size:
            b_idx.append(sb + base)
            b_pb.append(np.take(pb, sb, axis=0))
            b_dy.append(dy.ravel()[sb])
    cone = None
    won_parts = []  # flat indices of the rust pixels of each test, ascending (the two tests are disjoint)
    k_parts = []  # the best rust colour of each of those pixels
    if c_idx:
        # with the light level known, unmix linearly: p / L = c + f (e - c) for each rust colour e;
        # a rust colour must explain the pixel clearly better than the neutral cone (dirt, glare)
        cand, lc = np.concatenate(c_idx), np.concatenate(c_l)
        q = _planar(np.concatenate(c_px)) / lc - c32[:, None]
        best_f, best_k, _, best_d = _best_rust(q, _norm2(q), RUST_WINS_RATIO * np.concatenate(c_p2) / lc ** 2, rust_dev)
        won = np.isfinite(best_f)
        idx = cand[won]
        k_parts.append(best_k[won])
        rust_wins.ravel()[idx] = True
        won_parts.append(idx)
        fraction.ravel()[idx] = best_f[won]
        if darker:
            cone = (idx, _cone_fraction_along(q[:, won] + c32[:, None], c, best_d[:, won] + c32[:, None]))
        # score: distance from the neutral cone in noise units (how sure this is rust)
        score.ravel()[idx] = (np.concatenate(c_dev)[won] - med) / s_inv
    if pooled and b_idx:
        # the pooled colour's distance from the neutral cone, only at the candidates and sampled pixels
        b_med, b_sig = _robust(np.sqrt(_sparse_residual(pb_v, u1, normals, plane)) / cn32)
        cand_b = np.concatenate(b_idx)
        free = ~rust_wins.ravel()[cand_b]  # not already rust by the per-pixel test
        cand_b, pbv, dyv = cand_b[free], np.concatenate(b_pb)[free], np.concatenate(b_dy)[free]
        tb2 = _sparse_residual(pbv, u1, normals, plane)
        dev_b = np.sqrt(tb2) / cn32
        lean = dev_b > b_med + 3 * b_sig
        cand_b, pbv, tb2, dyv, dev_b = cand_b[lean], pbv[lean], tb2[lean], dyv[lean], dev_b[lean]
        if cand_b.size and b_sig > 0:
            qv = _planar(pbv) - c32[:, None]  # deviation from the coating, only where it is needed
            bf, bk, _, bd = _best_rust(qv, _norm2(qv), RUST_WINS_RATIO * tb2, rust_dev)
            ok = np.isfinite(bf)
            ids, kk, dy_ok, dev_ok = cand_b[ok], bk[ok].astype(int), dyv[ok], dev_b[ok]
            bd = bd[:, ok]
            d_y = bd[0] * np.float32(_LUMA[0]) + bd[1] * np.float32(_LUMA[1]) + bd[2] * np.float32(_LUMA[2])
            f_l = (dy_ok - y_med) / d_y  # lightness unmixed against the chosen rust colour
            good = (f_l > 0) & (np.abs(d_y) > 2 * y_sig)
            ids, f_l, d_y, dy_ok, dev_ok = ids[good], f_l[good], d_y[good], dy_ok[good], dev_ok[good]
            k_parts.append(kk[good].astype(np.int8))
            rust_wins.ravel()[ids] = True
            won_parts.append(ids)
            fraction.ravel()[ids] = np.minimum(f_l, 1.0)
            s_l = np.abs(dy_ok - y_med) / y_sig
            s_b = (dev_ok - b_med) / b_sig
            score.ravel()[ids] = np.minimum(s_l, s_b)
    clean = quiet
    clean &= valid
    clean &= ~rust_wins
    refs = fraction.ravel()[_sample_idx(clean)]
    noise = _robust_one_sided(refs)
    # two ascending runs: the stable sort (a merge for integers) costs about 0.1 ms, a flatnonzero of
    # the map about 1 ms for each of its users
    if won_parts:
        rust_idx = np.concatenate(won_parts)
        order = np.argsort(rust_idx, kind="stable")
        rust_idx, rust_k = rust_idx[order], np.concatenate(k_parts)[order]
    else:
        rust_idx, rust_k = np.zeros(0, np.int64), np.zeros(0, np.int8)
    # the rust colours from the lightest: the dark-core rule needs to know which is which
    rank = np.argsort(np.argsort(-rust_y)).astype(np.int8)
    return ColourModel(c, score, fraction, neutral_dev, light, rust_wins, noise, rust_idx, darker, cone,
                       rank[rust_k] if rust_k.size else rust_k, len(rust))


@dataclass(frozen=True)
class RustMeasure:
    """Rust found in the rated area of one panel.

    Attributes
    ----------
    site_labels : (R, C) ndarray of int32
        0 background, 1..n rust sites (8-connected), within the rated area.
    site_area_mm2 : (n,) ndarray
        Rust area of each site (sum of its pixel fractions).
    site_centroid_mm : (n, 2) ndarray
        (x_mm, y_mm) of each site.
    rust_area_mm2, rated_area_mm2, rust_area_pct, rust_area_pct_unc : float
    """

    site_labels: np.ndarray
    site_area_mm2: np.ndarray
    site_centroid_mm: np.ndarray
    rust_area_mm2: float
    rated_area_mm2: float
    rust_area_pct: float
    rust_area_pct_unc: float
    pixel_count_pct: float

    @property
    def sites(self) -> int:
        return int(self.site_area_mm2.size)

    @property
    def site_mask(self) -> np.ndarray:
        return self.site_labels > 0


def _grow_candidates(model: ColourModel, rated: np.ndarray, low: float) -> np.ndarray:
    """Flat indices of the pixels that can grow a site at score threshold ``low`` (sparse)."""
    sf = max(model.noise_fraction, 0.005)
    f_min = np.float32(max(0.02, 1.5 * sf))
    if model.rust_idx is not None and low >= 0:
        # the score is 0 where rust does not win (ColourModel.rust_idx): test the rust pixels only
        r = model.rust_idx
        sel = model.score.ravel()[r] > np.float32(low)
        sel &= model.fraction.ravel()[r] > f_min
        sel &= rated.ravel()[r]
        return r[sel]
    grow = (model.score > np.float32(low)) & (model.fraction > f_min)
    grow &= rated
    return np.flatnonzero(grow)


def _bounding_box(idx: np.ndarray, cols: int) -> tuple[int, int, int, int]:
    """First and last row, first and last column of the pixels ``idx`` (flat, ascending, not empty)."""
    c = idx % cols
    return int(idx[0]) // cols, int(idx[-1]) // cols, int(c.min()), int(c.max())


def _label_pixels(idx: np.ndarray, shape, cache: dict | None = None) -> tuple[int, np.ndarray]:
    """8-connected components of the pixels ``idx`` (flat, ascending): count (with background) and label of each.

    OpenCV labels the bounding box of the pixels only, from an even row and column: its block-based
    scan (2 x 2 blocks, labels numbered in the order the blocks are met) then meets the same blocks
    in the same order as on the whole panel, so the labels are the same
    (``tests/test_panels_fastpath.py``); a panel's rust mostly leaves out the 5 mm edge band at
    least.  ``cache`` (a dict shared by calls on the same panel) holds the results by pixel set:
    the threshold perturbations of :func:`measure_rust` often grow the same region.
    """
    if cache is not None:
        hit = cache.get(("grow", idx.size))
        if hit is not None and np.array_equal(hit[0], idx):
            return hit[1], hit[2]
    if idx.size == 0:
        n, lab = 1, np.zeros(0, np.int32)
    else:
        cols = shape[1]
        r_lo, r_hi, c_lo, c_hi = _bounding_box(idx, cols)
        r_lo, c_lo = r_lo - r_lo % 2, c_lo - c_lo % 2
        w = c_hi + 1 - c_lo
        r, c = np.divmod(idx, cols)
        local = (r - r_lo) * w + (c - c_lo)
        img = np.zeros((r_hi + 1 - r_lo, w), np.uint8)
        img.ravel()[local] = 1
        n, labels = cv2.connectedComponents(img, connectivity=8)
        lab = labels.ravel()[local]
    if cache is not None:
        cache[("grow", idx.size)] = (idx, n, lab)
    return n, lab


def _halo(sidx: np.ndarray, s_lab: np.ndarray, n: int, rated_f: np.ndarray, shape,
          cache: dict | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Site pixels and their 1 px rim within the rated area: flat indices (ascending) and site labels.

    A rim pixel takes the largest label next to it (a 3 x 3 dilation of the label picture), on the
    bounding box of the sites plus one pixel only.  ``cache`` as in :func:`_label_pixels`.
    """
    key = ("halo", sidx.size)
    if cache is not None:
        hit = cache.get(key)
        if hit is not None and np.array_equal(hit[0], sidx) and np.array_equal(hit[1], s_lab):
            return hit[2], hit[3]
    rows, cols = shape
    r_lo, r_hi, c_lo, c_hi = _bounding_box(sidx, cols)
    r_lo, r_hi, c_lo, c_hi = max(0, r_lo - 1), min(rows - 1, r_hi + 1), max(0, c_lo - 1), min(cols - 1, c_hi + 1)
    w = c_hi + 1 - c_lo
    r, c = np.divmod(sidx, cols)
    lab_img = np.zeros((r_hi + 1 - r_lo, w), np.uint16 if n < 65535 else np.float32)
    lab_img.ravel()[(r - r_lo) * w + (c - c_lo)] = s_lab
    halo = cv2.dilate(lab_img, np.ones((3, 3), np.uint8))
    local = np.flatnonzero(halo.ravel() != 0)  # on a bool map: 1.4 ms instead of 2.2 ms on the uint16 labels
    inner = lab_img.ravel()[local].astype(np.int32)
    hl = np.where(inner > 0, inner, halo.ravel()[local].astype(np.int32))
    lr, lc = np.divmod(local, w)
    hidx = (lr + r_lo) * cols + (lc + c_lo)  # row-major in the box is row-major on the panel: still ascending
    inside = (inner > 0) | rated_f[hidx]
    hidx, hl = hidx[inside], hl[inside]
    if cache is not None:
        cache[key] = (sidx, s_lab, hidx, hl)
    return hidx, hl


def _lone_cores(model: ColourModel, gidx: np.ndarray, lab: np.ndarray, n: int, keep: np.ndarray, cols: int,
                px_per_mm: float) -> np.ndarray:
    """Per label (0..n-1): a kept site whose pixels are mostly dark core, small (:data:`LONE_CORE_MAX_MM2`,
    from the fractions of its pixels), with few pixels of the lighter rust colours (all but the two darkest;
    :data:`LONE_CORE_OWN_LIGHT`), and no kept site mostly of those colours within :data:`LONE_CORE_NEAR_MM`
    (centroids).

    The brown beside the dark core does not vouch for it: the false sites of a dirt smudge's edge take
    either of the two darkest colours (97 to 100 % of their area on synthetic trays).
    """
    ri, rk = model.rust_pixels(), model.rust_k
    pos = np.minimum(np.searchsorted(ri, gidx), max(ri.size - 1, 0))
    k = np.where(ri[pos] == gidx, rk[pos], -1) if ri.size else np.full(gidx.size, -1)
    count = np.maximum(np.bincount(lab, minlength=n), 1)
    lighter = np.bincount(lab, weights=(k >= 0) & (k < model.n_rust - 2), minlength=n)
    area = np.bincount(lab, weights=np.clip(model.fraction.ravel()[gidx], 0, 1), minlength=n) / px_per_mm**2
    core = (keep & (np.bincount(lab, weights=k == model.n_rust - 1, minlength=n) > 0.5 * count)
            & (area <= LONE_CORE_MAX_MM2) & (lighter < LONE_CORE_OWN_LIGHT * count))
    if not core.any():
        return core
    bright = keep & (lighter > 0.5 * count)
    rr, cc = np.divmod(gidx, cols)
    cy = np.bincount(lab, weights=rr, minlength=n) / count
    cx = np.bincount(lab, weights=cc, minlength=n) / count
    lone = core.copy()
    other = np.flatnonzero(bright)
    if other.size:
        ci = np.flatnonzero(core)
        d2 = (cy[ci, None] - cy[None, other]) ** 2 + (cx[ci, None] - cx[None, other]) ** 2
        lone[ci] = d2.min(axis=1) > (LONE_CORE_NEAR_MM * px_per_mm) ** 2
    return lone


def _sites(model: ColourModel, rated: np.ndarray, px_per_mm: float, low: float, high: float,
           min_speck_mm2: float, cand: np.ndarray | None = None, geometry: bool = True,
           cache: dict | None = None):
    """Rust sites: labels, areas (mm2), centroids (mm) and halo pixel count.

    ``cand`` (flat indices of the grow region at a threshold <= ``low``, from
    :func:`_grow_candidates`) lets the threshold perturbations share one full-image
    pass; every later step works on the sparse pixels of the grow region and its halo.
    With ``geometry`` False only the areas are computed (labels and centroids are None).
    ``cache``: a dict shared by the calls on one panel (same model and rated area), see
    :func:`_label_pixels`.
    """
    # a site needs evidence in both senses: colour leaves the coating towards rust (score,
    # in noise units) and part of the coating is hidden (fraction).  The fraction test
    # keeps out the faint colour smear that JPEG's coarse chroma spreads around specks.
    sf = max(model.noise_fraction, 0.005)
    score_f, frac_f, rated_f = model.score.ravel(), model.fraction.ravel(), rated.ravel()
    if cand is None:
        cand = _grow_candidates(model, rated, low)
    gidx = cand[score_f[cand] > np.float32(low)]  # the grow region is sparse: statistics on its pixels only
    n, lab = _label_pixels(gidx, rated.shape, cache)
    # keep a component when its colour evidence peaks above ``high`` and its summed
    # fraction stands out of the noise (a matched filter: sum > 5 sigma sqrt(n))
    order = np.argsort(lab, kind="stable")
    peak = np.zeros(n, np.float32)
    peak_f = np.zeros(n, np.float32)
    g_frac = frac_f[gidx]
    if gidx.size:
        sl = lab[order]
        starts = np.flatnonzero(np.r_[True, sl[1:] != sl[:-1]])
        peak[sl[starts]] = np.maximum.reduceat(score_f[gidx][order], starts)
        peak_f[sl[starts]] = np.maximum.reduceat(g_frac[order], starts)
    total = np.bincount(lab, weights=g_frac, minlength=n)
    count = np.bincount(lab, minlength=n)
    # the hidden fraction must also peak clearly out of its own noise: JPEG's blocky chroma errors
    # reach high colour scores (the chroma noise is tiny between them) with no real cover behind them
    keep = (peak > high) & (total > 5 * sf * np.sqrt(count)) & (peak_f > PEAK_FRACTION_SIGMA * sf)
    keep[0] = False
    if model.rust_k is not None and model.n_rust >= 3 and not model.coating_darker_than_rust and gidx.size:
        keep &= ~_lone_cores(model, gidx, lab, n, keep, rated.shape[1], px_per_mm)
    relabel = np.zeros(n, np.int32)
    relabel[keep] = np.arange(1, int(keep.sum()) + 1)
    n = int(keep.sum()) + 1
    if n <= 1:
        return (np.zeros(rated.shape, np.int32) if geometry else None), np.zeros(0), np.zeros((0, 2)), 0.0
    # relabel only the grow pixels (every other pixel is background)
    g_lab = relabel[lab]
    on = g_lab > 0
    sidx, s_lab = gidx[on], g_lab[on]
    # halo: the faint rim of a speck (1 px) carries part of its area
    hidx, hl = _halo(sidx, s_lab, n, rated_f, rated.shape, cache)
    # unclipped below (noise averages out); a fraction cannot exceed 1
    frac = np.clip(frac_f[hidx], -0.5, 1.0)
    area_px = np.bincount(hl, weights=frac, minlength=n)[1:]
    if model.cone_fraction is not None and model.cone_fraction[0].size:
        # dark coating: the large sites' rust pixels take the cone's fraction (CONE_MIN_SITE_MM2); their
        # halo pixels where rust does not win keep the neutral fraction
        ci, cv = model.cone_fraction
        big = np.r_[False, area_px / px_per_mm**2 > CONE_MIN_SITE_MM2]
        sel = np.flatnonzero(big[hl])
        pos = np.minimum(np.searchsorted(ci, hidx[sel]), ci.size - 1)
        hit = ci[pos] == hidx[sel]
        frac[sel[hit]] = cv[pos[hit]]
        area_px = np.bincount(hl, weights=frac, minlength=n)[1:]
    area_mm2 = np.maximum(area_px, 0) / px_per_mm**2
    keep = area_mm2 >= min_speck_mm2
    if not geometry:
        return None, area_mm2[keep], None, 0.0
    remap = np.zeros(n, np.int32)
    remap[1:][keep] = np.arange(1, int(keep.sum()) + 1)
    m = int(keep.sum()) + 1
    sl = remap[s_lab]
    on = sl > 0
    sidx, sl = sidx[on], sl[on]
    labels = np.zeros(rated.shape, np.int32)
    labels.ravel()[sidx] = sl
    rr, cc = np.divmod(sidx, rated.shape[1])
    cnt = np.bincount(sl, minlength=m)[1:]
    cy = np.bincount(sl, weights=rr, minlength=m)[1:] / np.maximum(cnt, 1)
    cx = np.bincount(sl, weights=cc, minlength=m)[1:] / np.maximum(cnt, 1)
    centroids = np.column_stack([(cx + 0.5) / px_per_mm, (cy + 0.5) / px_per_mm])
    halo_px = float((remap[hl] > 0).sum())
    return labels, area_mm2[keep], centroids, halo_px


def measure_rust(model: ColourModel, rated: np.ndarray, px_per_mm: float,
                 settings: RustSettings = RustSettings()) -> RustMeasure:
    """Rust sites, rusted area and its uncertainty within the rated area.

    The uncertainty combines the spread of the area when both thresholds are
    scaled by 0.5 and 2 (half the range), a colour-model term (10 %, 20 % on dark coatings) and the
    noise of the fractions summed over the site pixels (``noise_fraction * sqrt(n)``).
    """
    low, high = settings.score_low, settings.score_high
    rated_mm2 = float(np.count_nonzero(rated)) / px_per_mm**2
    factors = (0.5, 2.0)
    # one full-image pass for the grow region at the lowest threshold; the rest is sparse
    cand = _grow_candidates(model, rated, min(low * k for k in factors + (1.0,)))
    cache: dict = {}  # the perturbed thresholds often grow the same region and keep the same sites
    labels, areas, cents, n_px = _sites(model, rated, px_per_mm, low, high, settings.min_speck_mm2, cand, cache=cache)
    rust_mm2 = float(areas.sum())
    alt = []
    for k in factors:
        _, a2, _, _ = _sites(model, rated, px_per_mm, low * k, high * k, settings.min_speck_mm2, cand, geometry=False,
                             cache=cache)
        alt.append(float(a2.sum()))
    spread = (max(alt + [rust_mm2]) - min(alt + [rust_mm2])) / 2
    noise = model.noise_fraction * np.sqrt(max(n_px, 1.0)) / px_per_mm**2
    # colour-model term: the rust colours' brightness is not known per site; on synthetic
    # trays the fraction sums scatter by about 10 %, on dark coatings by about 20 % (see the constants)
    model_term = (COLOUR_MODEL_REL_UNC_DARK if model.coating_darker_than_rust else COLOUR_MODEL_REL_UNC) * rust_mm2
    unc_mm2 = float(np.sqrt(spread**2 + noise**2 + model_term**2))
    pct = 100.0 * rust_mm2 / rated_mm2 if rated_mm2 > 0 else float("nan")
    unc = 100.0 * unc_mm2 / rated_mm2 if rated_mm2 > 0 else float("nan")
    count_pct = 100.0 * float(np.count_nonzero(labels)) / max(float(np.count_nonzero(rated)), 1.0)
    return RustMeasure(labels, areas, cents, rust_mm2, rated_mm2, pct, unc, count_pct)
