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

* ``score = beta / (alpha + beta)``: direction towards rust, independent of
  light level; used to *detect* rust sites (hysteresis thresholds);
* ``fraction = 1 - alpha / L``: the share of the coating that is hidden,
  independent of the rust's own brightness ``k``; summed over a site it is
  the rusted area, which is what makes 1 to 3 pixel specks count correctly.
  ``L`` is a smooth (quadratic) fit of ``alpha`` over the coating pixels.

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

#: Relative standard uncertainty of the unmixed rust area from the colour model (coupon's estimate).
COLOUR_MODEL_REL_UNC = 0.10


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
        Rust direction ``beta / (alpha + beta)`` where a rust cone wins, else 0.
    fraction : ndarray
        Hidden share of the coating ``1 - alpha / L`` (rust cone where it wins,
        neutral cone elsewhere); about 0 on clean coating.
    neutral_dev : ndarray
        ``1 - alpha / L`` of the neutral cone: dark (> 0) or light (< 0) neutral marks.
    light : ndarray
        The smooth light level ``L`` relative to the coating colour.
    rust_wins : ndarray of bool
    noise_fraction : float
        Robust standard deviation of ``fraction`` on clean coating.
    """

    coating_linear: np.ndarray
    score: np.ndarray
    fraction: np.ndarray
    neutral_dev: np.ndarray
    light: np.ndarray
    rust_wins: np.ndarray
    noise_fraction: float

    @property
    def coating_srgb(self) -> np.ndarray:
        return cs.linear_to_srgb(self.coating_linear)


def _lin(srgb) -> np.ndarray:
    return cs.srgb_to_linear(np.asarray(srgb, dtype=np.float64))


def coating_colour(lin: np.ndarray, valid: np.ndarray) -> np.ndarray:
    """Robust coating colour: median of the valid pixels, then of those near it in chromaticity."""
    px = lin[valid][:: max(1, int(valid.sum() // 200000))].astype(np.float64)
    if len(px) < 50:
        px = lin.reshape(-1, 3).astype(np.float64)
    c = np.median(px, axis=0)
    for _ in range(2):
        chroma = px / np.maximum(px.sum(axis=1, keepdims=True), 1e-6)
        c_chroma = c / max(c.sum(), 1e-6)
        d = np.abs(chroma - c_chroma).sum(axis=1)
        keep = d <= max(np.median(d) * 3, 0.01)
        if keep.sum() > 50:
            c = np.median(px[keep], axis=0)
    return np.maximum(c, 1e-5)


def _cone_fit(dots: np.ndarray, pp: np.ndarray, gram: np.ndarray):
    """Least squares p = alpha * e1 + beta * e2 from dot products; returns alpha, beta, residual^2."""
    g11, g12, g22 = gram[0, 0], gram[0, 1], gram[1, 1]
    det = g11 * g22 - g12 * g12
    d1, d2 = dots[..., 0], dots[..., 1]
    if det <= 1e-12 * g11 * g22:
        # degenerate (e.g. a neutral coating with the grey direction): one direction only
        alpha = d1 / g11
        return alpha, np.zeros_like(alpha), pp - alpha * d1
    alpha = (g22 * d1 - g12 * d2) / det
    beta = (g11 * d2 - g12 * d1) / det
    res = pp - (alpha * d1 + beta * d2)
    return alpha, beta, res


def _smooth_light(alpha: np.ndarray, clean: np.ndarray, px_per_mm: float) -> np.ndarray:
    """Quadratic fit of ``alpha`` over clean coating pixels (robust, on 2 mm blocks)."""
    rows, cols = alpha.shape
    f = min(1.0, 0.5 / px_per_mm)
    size = (max(4, int(round(cols * f))), max(4, int(round(rows * f))))
    a_small = cv2.resize(np.where(clean, alpha, 0).astype(np.float32), size, interpolation=cv2.INTER_AREA)
    w_small = cv2.resize(clean.astype(np.float32), size, interpolation=cv2.INTER_AREA)
    ok = w_small > 0.9
    vals = a_small[ok] / w_small[ok]
    rr, cc = np.nonzero(ok)
    rs, cs_ = size[1], size[0]

    def design(r, c):
        y, x = r / rs - 0.5, c / cs_ - 0.5
        return np.column_stack([np.ones_like(x), x, y, x * x, x * y, y * y])

    if vals.size < 12:
        level = float(np.median(alpha[clean])) if clean.any() else 1.0
        return np.full(alpha.shape, level, np.float32)
    a = design(rr.astype(float), cc.astype(float))
    keep = np.ones(vals.size, bool)
    coef = None
    for _ in range(3):
        coef, *_ = np.linalg.lstsq(a[keep], vals[keep], rcond=None)
        res = vals - a @ coef
        mad = np.median(np.abs(res[keep])) * 1.4826 + 1e-6
        keep = np.abs(res) < 3 * mad
        if keep.sum() < 12:
            break
    gy, gx = np.mgrid[0:rows, 0:cols].astype(np.float32)
    y, x = (gy + 0.5) * f / rs - 0.5, (gx + 0.5) * f / cs_ - 0.5
    light = coef[0] + coef[1] * x + coef[2] * y + coef[3] * x * x + coef[4] * x * y + coef[5] * y * y
    return np.maximum(light, 1e-3).astype(np.float32)


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
    The neutral cone is fitted to every pixel; the rust cones only to pixels
    that leave the neutral cone by more than the noise (a few per cent of a
    panel), which keeps a 10 px/mm panel fast.
    """
    shape = lin.shape[:2]
    c = coating_colour(lin, valid) if coating_linear is None else np.asarray(coating_linear, np.float64)
    rust = [_lin(e) for e in endmembers_srgb]
    grey = np.ones(3) / np.sqrt(3)
    cc = float(c @ c)
    flat = lin.reshape(-1, 3)
    # orthonormal basis of the neutral cone's plane: the coating direction, then grey
    # minus its coating part (absent when the coating itself is grey)
    u1 = c / np.sqrt(cc)
    g_perp = grey - (grey @ u1) * u1
    cols_ = [u1] + ([g_perp / np.linalg.norm(g_perp)] if np.linalg.norm(g_perp) > 0.03 else [])
    proj = flat @ np.column_stack(cols_).astype(np.float32)
    pp = np.einsum("ij,ij->i", flat, flat)
    res_n = pp - np.einsum("ij,ij->i", proj, proj)

    # brightness relative to the coating: projection on the coating colour
    a_n = (proj[:, 0] / np.sqrt(cc)).reshape(shape).astype(np.float32)
    # light level: the coating coefficient of the neutral cone, smoothed over the panel
    light = _smooth_light(a_n, valid, px_per_mm)
    # distance from the neutral cone, relative to the local coating brightness
    dev = (np.sqrt(np.maximum(res_n, 0)).reshape(shape) / (np.sqrt(cc) * light)).astype(np.float32)
    ref = dev[valid][:: max(1, int(valid.sum() // 200000))]
    med = float(np.median(ref)) if ref.size else 0.0
    sigma = float(1.4826 * np.median(np.abs(ref - med))) if ref.size else 0.0
    noise_floor = med + 3 * sigma
    neutral_dev = (1 - a_n / light).astype(np.float32)
    fraction = neutral_dev.copy()
    score = np.zeros(shape, np.float32)
    rust_wins = np.zeros(shape, bool)
    cand = np.flatnonzero(dev.ravel() > noise_floor)
    if cand.size:
        # with the light level known, unmix linearly: p / L = c + f (e - c) for each rust colour e;
        # f is then robust to the coarse chroma of JPEG on light and on dark coatings alike
        q = flat[cand] / light.ravel()[cand, None] - c.astype(np.float32)
        qq = np.einsum("ij,ij->i", q, q)
        # a rust colour must explain the pixel clearly better than the neutral cone (dirt, glare)
        best_res = RUST_WINS_RATIO * res_n[cand] / light.ravel()[cand] ** 2
        best_f = np.full(cand.size, np.nan, np.float32)
        for e in rust:
            d = (e - c).astype(np.float32)
            dd = float(d @ d)
            f = np.clip((q @ d) / dd, 0.0, 1.0)
            res = qq - 2 * f * (q @ d) + f * f * dd
            better = (f > 0) & (res < best_res)
            best_res = np.where(better, res, best_res)
            best_f = np.where(better, f, best_f)
        won = np.isfinite(best_f)
        idx = cand[won]
        rust_wins.ravel()[idx] = True
        fraction.ravel()[idx] = best_f[won]
        # score: distance from the neutral cone in noise units (how sure this is rust)
        score.ravel()[idx] = (dev.ravel()[idx] - med) / max(sigma, 1e-4)
    clean = valid & ~rust_wins & (dev <= noise_floor)
    refs = fraction[clean][:: max(1, int(clean.sum() // 200000))]
    noise = float(np.median(np.abs(refs - np.median(refs))) * 1.4826) if refs.size else 0.0
    return ColourModel(c, score, fraction, neutral_dev, light, rust_wins, noise)


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


def _sites(model: ColourModel, rated: np.ndarray, px_per_mm: float, low: float, high: float,
           min_speck_mm2: float):
    # a site needs evidence in both senses: colour leaves the coating towards rust (score,
    # in noise units) and part of the coating is hidden (fraction).  The fraction test
    # keeps out the faint colour smear that JPEG's coarse chroma spreads around specks.
    sf = max(model.noise_fraction, 0.005)
    grow = (model.score > low) & (model.fraction > max(0.02, 1.5 * sf)) & rated
    n, labels = cv2.connectedComponents(grow.astype(np.uint8), connectivity=8)
    # keep a component when its colour evidence peaks above ``high`` and its summed
    # fraction stands out of the noise (a matched filter: sum > 5 sigma sqrt(n))
    lab = labels.ravel()
    peak = np.zeros(n, np.float32)
    np.maximum.at(peak, lab, model.score.ravel())
    total = np.bincount(lab, weights=model.fraction.ravel(), minlength=n)
    count = np.bincount(lab, minlength=n)
    keep = (peak > high) & (total > 5 * sf * np.sqrt(count))
    keep[0] = False
    relabel = np.zeros(n, np.int32)
    relabel[keep] = np.arange(1, int(keep.sum()) + 1)
    labels = relabel[labels]
    n = int(keep.sum()) + 1
    if n <= 1:
        return np.zeros(rated.shape, np.int32), np.zeros(0), np.zeros((0, 2)), 0.0
    # halo: the faint rim of a speck (1 px) carries part of its area
    halo = cv2.dilate(labels.astype(np.float32), np.ones((3, 3), np.uint8)).astype(np.int32)
    halo = np.where((labels == 0) & rated, halo, labels)
    # unclipped below (noise averages out); a fraction cannot exceed 1
    frac = np.clip(model.fraction, -0.5, 1.0)
    area_px = np.bincount(halo.ravel(), weights=frac.ravel(), minlength=n)[1:]
    area_mm2 = np.maximum(area_px, 0) / px_per_mm**2
    keep = area_mm2 >= min_speck_mm2
    remap = np.zeros(n, np.int32)
    remap[1:][keep] = np.arange(1, int(keep.sum()) + 1)
    labels = remap[labels]
    halo = remap[halo]
    rr, cc = np.mgrid[0:rated.shape[0], 0:rated.shape[1]]
    cnt = np.bincount(labels.ravel(), minlength=keep.sum() + 1)[1:]
    cy = np.bincount(labels.ravel(), weights=rr.ravel(), minlength=keep.sum() + 1)[1:] / np.maximum(cnt, 1)
    cx = np.bincount(labels.ravel(), weights=cc.ravel(), minlength=keep.sum() + 1)[1:] / np.maximum(cnt, 1)
    centroids = np.column_stack([(cx + 0.5) / px_per_mm, (cy + 0.5) / px_per_mm])
    halo_px = float(((halo > 0) & (labels == 0)).sum() + (labels > 0).sum())
    return labels.astype(np.int32), area_mm2[keep], centroids, halo_px


def measure_rust(model: ColourModel, rated: np.ndarray, px_per_mm: float,
                 settings: RustSettings = RustSettings()) -> RustMeasure:
    """Rust sites, rusted area and its uncertainty within the rated area.

    The uncertainty combines the spread of the area when both thresholds are
    scaled by 0.5 and 2 (half the range), a 10 % colour-model term and the noise of the fractions
    summed over the site pixels (``noise_fraction * sqrt(n)``).
    """
    low, high = settings.score_low, settings.score_high
    rated_mm2 = float(rated.sum()) / px_per_mm**2
    labels, areas, cents, n_px = _sites(model, rated, px_per_mm, low, high, settings.min_speck_mm2)
    rust_mm2 = float(areas.sum())
    alt = []
    for k in (0.5, 2.0):
        _, a2, _, _ = _sites(model, rated, px_per_mm, low * k, high * k, settings.min_speck_mm2)
        alt.append(float(a2.sum()))
    spread = (max(alt + [rust_mm2]) - min(alt + [rust_mm2])) / 2
    noise = model.noise_fraction * np.sqrt(max(n_px, 1.0)) / px_per_mm**2
    # colour-model term: the rust colours' brightness is not known per site; on synthetic
    # trays the fraction sums scatter by about 10 % (coupon's estimate, see the tests)
    model_term = COLOUR_MODEL_REL_UNC * rust_mm2
    unc_mm2 = float(np.sqrt(spread**2 + noise**2 + model_term**2))
    pct = 100.0 * rust_mm2 / rated_mm2 if rated_mm2 > 0 else float("nan")
    unc = 100.0 * unc_mm2 / rated_mm2 if rated_mm2 > 0 else float("nan")
    count_pct = 100.0 * float((labels > 0).sum()) / max(float(rated.sum()), 1.0)
    return RustMeasure(labels, areas, cents, rust_mm2, rated_mm2, pct, unc, count_pct)
