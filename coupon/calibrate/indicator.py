"""Indicator calibration: colour to pH.

Model
=====
Buffer drops of known pH give colours c_i (CIELAB) at pH_i.  The model is the
continuous path c(pH) through them: a shape-preserving cubic (PCHIP) in each
CIELAB coordinate, parameterised by pH and sampled every 0.005 pH.  A pixel's
pH is the parameter of the nearest path point; its distance to the path is the
confidence.  Pixels farther than ``max_distance`` (metal, rust, glare) map to
NaN, not to a made-up pH.  The distance weights L* by ``l_weight`` (default
0.5) because lighting changes lightness far more than hue.

pH is only defined within the calibrated range: colours past the ends map to
the end pH if they are close to it, NaN otherwise.

Limits: colour alone cannot tell every rust from the indicator.  Dark brown
and black rust, grey metal and glare fall far from the path, but an
orange-brown rust (sienna-like) can lie within the tolerance of the acid end
(pH 3-4), where the indicator itself is orange-red.  The droplet analysis
therefore separates rust by opacity and darkness as well.

Speed: an image is quantised to 8 bits per channel, its distinct colours
(typically 1e4 to 5e5) are projected with a k-d tree, and a 2^24-entry table
maps every pixel back; the table persists with the model, so a time-lapse
projects each colour once.  No per-pixel Python loop.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import ndimage as ndi

from coupon.calibrate import colourspace as cs
from coupon.errors import CalibrationError, CouponError

# scipy.interpolate, scipy.spatial and skimage.filters are imported where they are used: together
# they cost about 0.3 s, which every command paid at start-up through the profile module.

#: Default tolerance: weighted CIELAB distance beyond which a colour is "not indicator".
DEFAULT_MAX_DISTANCE = 10.0
DEFAULT_L_WEIGHT = 0.5
#: Smallest CIEDE2000 between neighbouring buffers that the model can resolve.
MIN_NEIGHBOUR_DE00 = 2.0
PATH_STEP_PH = 0.005


@dataclass(frozen=True)
class IndicatorModel:
    """A calibrated colour-to-pH path.

    Attributes
    ----------
    ph : (K,) ndarray
        Buffer pH values, strictly increasing.
    lab : (K, 3) ndarray
        Their CIELAB colours (D65).
    max_distance : float
        Weighted CIELAB distance beyond which a colour maps to NaN.
    l_weight : float
        Weight of L* in that distance.
    name : str
        What indicator and set-up this is.
    is_default : bool
        True for the shipped generic table (no buffer calibration).
    spread : (K,) ndarray
        Robust spread (weighted CIELAB) of the pixels of each buffer drop.
    details : dict
        Provenance and fit checks.
    """

    ph: np.ndarray
    lab: np.ndarray
    max_distance: float = DEFAULT_MAX_DISTANCE
    l_weight: float = DEFAULT_L_WEIGHT
    name: str = "indicator"
    is_default: bool = False
    spread: np.ndarray | None = None
    details: dict = field(default_factory=dict)

    # -- the path -------------------------------------------------------
    @functools.cached_property
    def _path(self) -> tuple[np.ndarray, np.ndarray]:
        from scipy.interpolate import PchipInterpolator

        ph_dense = np.arange(self.ph[0], self.ph[-1] + PATH_STEP_PH / 2, PATH_STEP_PH)
        lab_dense = PchipInterpolator(self.ph, self.lab, axis=0)(ph_dense)
        return ph_dense, lab_dense

    @functools.cached_property
    def _tree(self) -> cKDTree:  # noqa: F821 - scipy.spatial.cKDTree, imported here
        from scipy.spatial import cKDTree

        return cKDTree(self._weight(self._path[1]))

    def _weight(self, lab: np.ndarray) -> np.ndarray:
        w = np.asarray(lab, dtype=np.float64).copy()
        w[..., 0] *= self.l_weight
        return w

    def colour_at(self, ph: np.ndarray) -> np.ndarray:
        """CIELAB on the path at the given pH (clipped to the calibrated range)."""
        from scipy.interpolate import PchipInterpolator

        ph = np.clip(np.asarray(ph, dtype=np.float64), self.ph[0], self.ph[-1])
        return PchipInterpolator(self.ph, self.lab, axis=0)(ph)

    # -- mapping --------------------------------------------------------
    def map_lab(self, lab: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """pH and path distance of CIELAB colours (any shape, colour last).

        Returns
        -------
        ph : ndarray, NaN where the distance exceeds ``max_distance``
        distance : ndarray of the weighted CIELAB distance to the path
        """
        lab = np.asarray(lab, dtype=np.float64)
        shape = lab.shape[:-1]
        dist, idx = self._tree.query(self._weight(lab.reshape(-1, 3)), k=1)
        ph = self._path[0][idx]
        ph = np.where(dist <= self.max_distance, ph, np.nan)
        return ph.reshape(shape), dist.reshape(shape)

    def map_rgb(self, rgb: np.ndarray, correction=None) -> tuple[np.ndarray, np.ndarray]:
        """pH map of an sRGB image (M, N, 3) float [0, 1]: float32 pH (NaN off path) and distance.

        ``correction`` (a :class:`~coupon.calibrate.colour.ColourCorrection`) is
        applied to the image's distinct colours only, which is exactly what
        correcting every pixel first would give, at a fraction of the cost.

        Colours are quantised to 8 bits per channel.  Every colour's reading is
        kept in a lookup table that lives as long as the model, so the frames
        of a time-lapse, which share most of their colours, project only the
        colours not seen before.
        """
        codes = _rgb_codes(rgb)
        ph_lut, d_lut = self._lookup_tables(correction)
        dist = d_lut[codes]
        unknown = dist < 0
        n_unknown = int(np.count_nonzero(unknown))
        if n_unknown:
            if n_unknown > 1 << 20:  # many new colours: a presence table beats sorting them
                present = np.zeros(1 << 24, dtype=bool)
                present[codes[unknown]] = True
                new = np.flatnonzero(present).astype(np.uint32)
                del present
            else:
                new = np.unique(codes[unknown])
            new_rgb = np.column_stack([(new >> 16) & 255, (new >> 8) & 255, new & 255]) / 255.0
            if correction is not None and not correction.is_identity:
                from coupon.calibrate.colour import apply_linear

                lin = np.clip(apply_linear(cs.srgb_to_linear(new_rgb), correction), 0.0, 1.0)
                new_rgb = cs.linear_to_srgb(lin)
            ph_new, d_new = self.map_lab(cs.srgb_to_lab(new_rgb))
            ph_lut[new] = ph_new
            d_lut[new] = d_new
            dist = d_lut[codes]
        return ph_lut[codes], dist

    def _lookup_tables(self, correction) -> tuple[np.ndarray, np.ndarray]:
        """Per-correction (pH, distance) tables over all 2^24 colours; distance < 0 = not yet known."""
        key = None if correction is None or correction.is_identity else _correction_key(correction)
        cache = self.__dict__.setdefault("_luts", {})
        if key not in cache:
            if len(cache) >= 2:  # 128 MB each: keep the two most recent corrections
                cache.pop(next(iter(cache)))
            cache[key] = (np.full(1 << 24, np.nan, dtype=np.float32), np.full(1 << 24, -1.0, dtype=np.float32))
        return cache[key]

    def __getstate__(self):
        # the lookup tables and the k-d tree are rebuilt on demand; never pickle them to workers
        return {k: v for k, v in self.__dict__.items() if k not in ("_luts", "_tree", "_path")}

    # -- profile --------------------------------------------------------
    def to_dict(self) -> dict:
        return {
            "name": self.name,
            "is_default": bool(self.is_default),
            "max_distance": float(self.max_distance),
            "l_weight": float(self.l_weight),
            "points": [
                {"ph": float(p), "lab": [float(v) for v in c],
                 **({} if self.spread is None else {"spread": float(s)})}
                for p, c, s in zip(self.ph, self.lab, self.spread if self.spread is not None else self.ph)
            ],
            "details": self.details,
        }

    @classmethod
    def from_dict(cls, d: dict) -> "IndicatorModel":
        pts = d.get("points")
        if not isinstance(pts, list) or not pts:
            raise CalibrationError("indicator.points must be a non-empty list of {ph, lab}")
        try:
            ph = np.array([float(p["ph"]) for p in pts])
            lab = np.array([[float(v) for v in p["lab"]] for p in pts])
        except (KeyError, TypeError, ValueError):
            raise CalibrationError("each indicator point needs 'ph' (number) and 'lab' (three numbers)") from None
        spread = np.array([float(p["spread"]) for p in pts]) if all("spread" in p for p in pts) else None
        return build_model(
            ph, lab, name=str(d.get("name", "indicator")), is_default=bool(d.get("is_default", False)),
            max_distance=float(d.get("max_distance", DEFAULT_MAX_DISTANCE)),
            l_weight=float(d.get("l_weight", DEFAULT_L_WEIGHT)), spread=spread,
            details=dict(d.get("details", {})),
        )


def _correction_key(correction) -> bytes:
    m = b"" if correction.matrix is None else np.asarray(correction.matrix, dtype=np.float64).tobytes()
    return np.asarray(correction.gains, dtype=np.float64).tobytes() + m


def _rgb_codes(rgb: np.ndarray) -> np.ndarray:
    """24-bit code per pixel from 8-bit-quantised sRGB (built channel by channel to save memory)."""
    codes = np.zeros(rgb.shape[:-1], dtype=np.uint32)
    for ch in range(3):
        q = np.clip(np.rint(rgb[..., ch] * np.float32(255.0)), 0, 255).astype(np.uint32)
        codes <<= 8
        codes |= q
    return codes


def build_model(
    ph, lab, *, name="indicator", is_default=False, max_distance=DEFAULT_MAX_DISTANCE,
    l_weight=DEFAULT_L_WEIGHT, spread=None, details=None,
) -> IndicatorModel:
    """Validate buffer points and build the model.

    Raises
    ------
    CalibrationError
        Fewer than 3 buffers, repeated pH, neighbouring buffers of nearly the
        same colour, or a path that folds back on itself (two pH values far
        apart with nearly the same colour).
    """
    ph = np.asarray(ph, dtype=np.float64).ravel()
    lab = np.asarray(lab, dtype=np.float64).reshape(-1, 3)
    if len(ph) != len(lab):
        raise CalibrationError(f"{len(ph)} pH values but {len(lab)} colours")
    if len(ph) < 3:
        raise CalibrationError(f"an indicator calibration needs at least 3 buffers, got {len(ph)}")
    if not (np.all(np.isfinite(ph)) and np.all(np.isfinite(lab))):
        raise CalibrationError("buffer pH and colours must be finite numbers")
    if np.any((ph < 0) | (ph > 14)):
        raise CalibrationError(f"buffer pH must lie in 0..14, got {ph.tolist()}")
    order = np.argsort(ph, kind="stable")
    ph, lab = ph[order], lab[order]
    spread = None if spread is None else np.asarray(spread, dtype=np.float64)[order]
    if np.any(np.diff(ph) <= 0):
        dup = ph[1:][np.diff(ph) <= 0]
        raise CalibrationError(f"buffer pH values repeat ({dup.tolist()}); each buffer needs its own pH")
    de = cs.delta_e_2000(lab[:-1], lab[1:])
    flat = np.flatnonzero(de < MIN_NEIGHBOUR_DE00)
    if flat.size:
        i = flat[0]
        raise CalibrationError(
            f"buffers at pH {ph[i]:g} and {ph[i + 1]:g} have nearly the same colour (CIEDE2000 {de[i]:.2f} "
            f"< {MIN_NEIGHBOUR_DE00}); the indicator does not resolve that range, or a drop was mis-paired"
        )
    if not (max_distance > 0 and 0 < l_weight <= 1):
        raise CalibrationError(f"max_distance must be > 0 and l_weight in (0, 1], got {max_distance}, {l_weight}")
    model = IndicatorModel(ph, lab, float(max_distance), float(l_weight), name, is_default, spread,
                           dict(details or {}))
    _check_no_fold(model)
    return model


def _check_no_fold(model: IndicatorModel) -> None:
    """Refuse a path that comes back near itself: its pH would be ambiguous.

    A fold is two path points within half the tolerance of each other in
    colour while the path between them travels more than twice the tolerance
    (it went away and came back).  A merely slow stretch, where the colour
    changes little over a pH unit, is not a fold: its path length stays short.
    """
    ph_d, lab_d = model._path
    sub = slice(None, None, 10)  # every 0.05 pH is enough to find a fold
    pts = model._weight(lab_d[sub])
    phs = ph_d[sub]
    arc = np.concatenate([[0.0], np.cumsum(np.linalg.norm(np.diff(pts, axis=0), axis=1))])
    from scipy.spatial import cKDTree

    r = 0.5 * model.max_distance
    pairs = cKDTree(pts).query_pairs(r=r, output_type="ndarray")
    if len(pairs):
        travelled = np.abs(arc[pairs[:, 1]] - arc[pairs[:, 0]])
        bad = pairs[travelled > 4 * r]
        if len(bad):
            a, b = sorted((phs[bad[0, 0]], phs[bad[0, 1]]))
            raise CalibrationError(
                f"the colour path is not monotone: pH {a:.2f} and pH {b:.2f} give nearly the same colour, so "
                "a reading there would be ambiguous; check that the pH list matches the drops' reading order"
            )


# ---------------------------------------------------------------------------
# buffer drops in a photo


@dataclass(frozen=True)
class BufferDrop:
    """One detected buffer drop: centre xy in px, equivalent radius, robust colour."""

    centre_xy: tuple[float, float]
    radius_px: float
    srgb: np.ndarray
    lab: np.ndarray
    spread: float
    n_px: int


def detect_drops(rgb: np.ndarray, min_area_frac: float = 0.2) -> list[np.ndarray]:
    """Find coloured drops (or wells) on a plainer background; masks in reading order.

    A pixel belongs to a drop when its weighted CIELAB colour (lightly
    smoothed) differs from a smooth background model by more than the
    background's own spread (see :func:`_foreground`).  Blobs much smaller than
    the median blob are specks and are dropped.  Reading order: rows top to
    bottom (a new row starts where a centre lies more than half a drop
    diameter below the row's first), left to right within a row.
    """
    rows, cols = rgb.shape[:2]
    step = max(1, int(np.ceil(max(rows, cols) / 1000)))
    small = rgb[::step, ::step]
    lab = cs.srgb_to_lab(small)
    lab[..., 0] *= DEFAULT_L_WEIGHT
    lab = ndi.gaussian_filter(lab, sigma=(1.5, 1.5, 0))
    mask = _foreground(lab)
    mask = ndi.binary_opening(mask, iterations=2)
    mask = ndi.binary_fill_holes(mask)
    labels, n = ndi.label(mask)
    if n == 0:
        return []
    areas = ndi.sum_labels(np.ones_like(labels), labels, index=np.arange(1, n + 1))
    big = np.flatnonzero(areas >= min_area_frac * np.median(areas[areas >= 0.2 * areas.max()])) + 1
    centres = np.array(ndi.center_of_mass(mask, labels, big)).reshape(-1, 2)  # (row, col) in small
    radius = np.sqrt(areas[big - 1] / np.pi)
    order = _reading_order(centres, np.median(radius))
    full = []
    for k in order:
        m_small = labels == big[k]
        m = np.repeat(np.repeat(m_small, step, axis=0), step, axis=1)[:rows, :cols]
        full.append(m)
    return full


def _foreground(lab_w: np.ndarray, rounds: int = 3) -> np.ndarray:
    """Pixels that differ from a smooth background (quadratic in x and y per channel).

    The background is refitted on the pixels not yet called foreground, so a
    lighting gradient across the frame does not hide pale drops; the threshold
    is the lower of Otsu's and the background's spread (median + 8 robust sigma).
    """
    from skimage.filters import threshold_otsu

    h, w = lab_w.shape[:2]
    y, x = np.mgrid[0:h, 0:w]
    x = x.ravel() / w - 0.5
    y = y.ravel() / h - 0.5
    design = np.column_stack([np.ones_like(x), x, y, x * x, y * y, x * y])
    flat = lab_w.reshape(-1, 3)
    bg = np.ones(len(flat), bool)
    for _ in range(rounds):
        coef, *_ = np.linalg.lstsq(design[bg][::7], flat[bg][::7], rcond=None)
        dist = np.linalg.norm(flat - design @ coef, axis=1)
        med = float(np.median(dist[bg]))
        noise = 1.4826 * float(np.median(np.abs(dist[bg] - med)))
        try:
            otsu = float(threshold_otsu(dist))
        except ValueError:
            otsu = np.inf
        thr = max(min(otsu, med + 8 * noise), 4.0)
        bg = dist <= thr
    return (dist > thr).reshape(h, w)


def _reading_order(centres_rc: np.ndarray, radius: float) -> list[int]:
    idx = list(np.argsort(centres_rc[:, 0]))
    rows: list[list[int]] = []
    for i in idx:
        if rows and centres_rc[i, 0] - centres_rc[rows[-1][0], 0] < radius:
            rows[-1].append(i)
        else:
            rows.append([i])
    return [i for row in rows for i in sorted(row, key=lambda j: centres_rc[j, 1])]


def sample_drop(rgb: np.ndarray, mask: np.ndarray) -> BufferDrop:
    """Robust colour of one drop: eroded mask, glare and rust rejected, median in CIELAB."""
    area = int(mask.sum())
    r = np.sqrt(area / np.pi)
    core = ndi.binary_erosion(mask, iterations=max(1, int(0.25 * r)))
    if core.sum() < 20:
        core = mask
    px = rgb[core].astype(np.float64)
    lab = cs.srgb_to_lab(px)
    w = lab.copy()
    w[:, 0] *= DEFAULT_L_WEIGHT
    med = np.median(w, axis=0)
    d = np.linalg.norm(w - med, axis=1)
    mad = np.median(d) * 1.4826 + 1e-6
    keep = d <= max(3 * mad, 2.0)
    lab_med = np.median(lab[keep], axis=0)
    srgb = np.median(px[keep], axis=0)
    rr, cc = np.nonzero(mask)
    return BufferDrop(
        centre_xy=(float(cc.mean()), float(rr.mean())), radius_px=float(r), srgb=srgb, lab=lab_med,
        spread=float(np.median(d[keep]) * 1.4826), n_px=int(keep.sum()),
    )


def fit_from_drops(
    rgb: np.ndarray, ph_values: list[float], name: str = "buffer calibration",
    max_distance: float | None = None,
) -> tuple[IndicatorModel, list[BufferDrop]]:
    """Detect the buffer drops of a photo, pair them with pH in reading order, fit the model.

    ``max_distance`` defaults to max(DEFAULT_MAX_DISTANCE, 3.5 x the largest drop spread),
    so a noisy photo still maps its own buffers.
    """
    n = len(ph_values)
    masks = detect_drops(rgb)
    if len(masks) != n:
        raise CalibrationError(
            f"found {len(masks)} drops but {n} pH values were given; every buffer drop must be in the frame, "
            "separate from its neighbours and clearly coloured against the substrate"
        )
    drops = [sample_drop(rgb, m) for m in masks]
    spread = np.array([d.spread for d in drops])
    tol = max_distance if max_distance is not None else max(DEFAULT_MAX_DISTANCE, 3.5 * float(spread.max()))
    model = build_model(
        ph_values, np.array([d.lab for d in drops]), name=name, max_distance=tol, spread=spread,
        details={"drops_xy": [list(d.centre_xy) for d in drops], "drop_radius_px": [d.radius_px for d in drops]},
    )
    return model, drops


def read_indicator_table(path) -> tuple[np.ndarray, np.ndarray, dict]:
    """Read a CSV of pH and colour: columns ``ph`` and ``L,a,b`` (CIELAB D65) or ``R,G,B`` (sRGB 0-255).

    Lines starting with ``#`` are comments (sources, notes) and are returned as metadata.
    """
    try:
        with open(path, encoding="utf-8") as fh:
            lines = fh.read().splitlines()
    except UnicodeDecodeError:
        raise CouponError("indicator table is not a text CSV file (save it as UTF-8 CSV)", path) from None
    except OSError as exc:
        raise CouponError(f"cannot read indicator table ({exc.strerror or exc})", path) from None
    comments = [ln.lstrip("# ").rstrip() for ln in lines if ln.startswith("#")]
    body = [ln for ln in lines if ln.strip() and not ln.startswith("#")]
    import io

    try:
        table = pd.read_csv(io.StringIO("\n".join(body)))
    except Exception as exc:
        raise CouponError(f"cannot parse indicator table ({exc})", path) from None
    table.columns = [c.strip() for c in table.columns]
    if "ph" not in table.columns:
        raise CouponError("indicator table needs a 'ph' column and L,a,b or R,G,B columns", path)
    from coupon.calibrate.colour import table_lab
    from coupon.io.tables import numeric_columns

    ph = numeric_columns(table, ["ph"], "indicator table", path)["ph"].to_numpy()
    return ph, table_lab(table, "indicator table", path), {"comments": comments}
