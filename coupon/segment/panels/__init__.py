"""Panel rating: find panels in tray photos (:mod:`.detect`), rust (:mod:`.rust`), scribe creep (:mod:`.scribe`).

:func:`rate_panel` chains them for one rectified panel and returns a plain
result dict (the numbers of one CSV row).
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np

from coupon.calibrate.colour import ColourCorrection, apply_linear
from coupon.ratings.panel_ratings import distribution_letter, rust_grade, written_grade
from coupon.ratings.scales import rate
from coupon.segment.panels.detect import RectifiedPanel
from coupon.segment.panels.glare import GLARE_LIGHT_REL_UNC, glare_mask
from coupon.segment.panels.rust import RustSettings, measure_rust, unmix
from coupon.segment.panels.scribe import ScribeSettings, measure_scribe


@dataclass(frozen=True)
class PanelSettings:
    """Everything that changes the numbers of a panel rating."""

    size_mm: tuple[float, float] = (75.0, 150.0)
    edge_mm: float = 5.0
    px_per_mm: float = 10.0
    masks_mm: tuple = ()  # ("rect", x, y, w, h) or ("circle", x, y, d) in the rectified panel's mm
    rust: RustSettings = field(default_factory=RustSettings)
    scribe: ScribeSettings = field(default_factory=ScribeSettings)
    qr: bool = True
    size_tolerance: float = 0.25

    def to_dict(self) -> dict:
        return {"panel_size_mm": list(self.size_mm), "edge_mm": self.edge_mm, "grid_px_per_mm": self.px_per_mm,
                "masks_mm": [list(m) for m in self.masks_mm], "rust": self.rust.to_dict(),
                "scribe": self.scribe.to_dict(), "qr": self.qr, "size_tolerance": self.size_tolerance}


def base_mask(shape_rc, px_per_mm: float, edge_mm: float, masks_mm=(), extra_boxes_mm=()) -> np.ndarray:
    """Rated area before the scribe: the panel minus the edge band, the masks and label boxes."""
    import cv2

    rows, cols = shape_rc
    rated = np.zeros(shape_rc, np.uint8)
    e = int(round(edge_mm * px_per_mm))
    rated[e:rows - e, e:cols - e] = 1
    s = px_per_mm
    for m in masks_mm:
        if m[0] == "rect":
            _, x, y, w, h = m
            cv2.rectangle(rated, (int(round(x * s)), int(round(y * s))),
                          (int(round((x + w) * s)) - 1, int(round((y + h) * s)) - 1), 0, -1)
        elif m[0] == "circle":
            _, x, y, d = m
            cv2.circle(rated, (int(round(x * s)), int(round(y * s))), int(round(d / 2 * s)), 0, -1)
    for x0, y0, x1, y1 in extra_boxes_mm:
        cv2.rectangle(rated, (int(np.floor(x0 * s)), int(np.floor(y0 * s))),
                      (int(np.ceil(x1 * s)), int(np.ceil(y1 * s))), 0, -1)
    return rated.astype(bool)


def rate_panel(panel: RectifiedPanel, settings: PanelSettings, colour: ColourCorrection | None = None,
               label_boxes_mm=()) -> dict:
    """Rust, ratings and scribe creep of one rectified panel.

    Returns a dict with the CSV numbers plus ``_model``, ``_rust``, ``_scribe``
    and ``_rated`` (arrays and results for the overlay; not written to tables).
    """
    lin = panel.linear
    if colour is not None and not colour.is_identity:
        lin = np.clip(apply_linear(lin, colour), 0, 1).astype(np.float32)
    s = panel.px_per_mm
    rated0 = base_mask(lin.shape[:2], s, settings.edge_mm, settings.masks_mm, label_boxes_mm)
    model = unmix(lin, rated0, s)
    # specular glare (white light added on top) washes out the rust beneath it and looks like bare steel
    # beside a scribe: its light is estimated from the clean coating around it and taken off, and what
    # still stands out afterwards is left out of the rating like a mask (coupon.segment.panels.glare)
    patch, glare_light = glare_mask(model, rated0, s, light_too=True)
    lin_seen, valid = lin, rated0
    if glare_light is not None:
        lin = np.clip(lin - glare_light[..., None], 0, 1).astype(np.float32)
        model = unmix(lin, rated0, s)
    # masked areas and label boxes are not coating: a QR label's dark modules on the scribe's line
    # carried the scribe (and its zone left out of the rating) 20 mm past its end
    cut = ~base_mask(lin.shape[:2], s, 0.0, settings.masks_mm, label_boxes_mm) if (
        settings.masks_mm or label_boxes_mm) else None
    # what still stands out after the correction, within the corrected patch only
    glare = (glare_mask(model, rated0, s) & patch) if glare_light is not None else patch
    if glare.any():
        rated0 = rated0 & ~glare
        cut = glare if cut is None else (cut | glare)
    scribe = measure_scribe(model, s, panel.size_mm, settings.scribe, exclude=cut,
                            unsure=patch.astype(np.float32) if patch.any() else None)
    rated = rated0 & ~scribe.corridor_mask(lin.shape[:2], s) if scribe.found else rated0
    rust = measure_rust(model, rated, s, settings.rust)
    glare_unc = 0.0
    if glare_light is not None and rust.rated_area_mm2 > 0:
        # the glare's light is estimated, not known: the rust area with it taken off at 1 -/+ its relative
        # uncertainty (on a dark coating, where the glare is many times the coating's own light, dark
        # streaks read 0.43, 0.92 and 1.29 % for 0.50 % at 0.9, 1 and 1.1 of the estimate; light
        # coatings move by a few per cent)
        areas = [rust.rust_area_mm2]
        for k in (1 - GLARE_LIGHT_REL_UNC, 1 + GLARE_LIGHT_REL_UNC):
            lin_k = np.clip(lin_seen - np.float32(k) * glare_light[..., None], 0, 1).astype(np.float32)
            areas.append(measure_rust(unmix(lin_k, valid, s), rated, s, settings.rust).rust_area_mm2)
        glare_unc = 100.0 * (max(areas) - min(areas)) / 2 / rust.rated_area_mm2
        rust = replace(rust, rust_area_pct_unc=float(np.hypot(rust.rust_area_pct_unc, glare_unc)))
    grade = rust_grade(rust.rust_area_pct)
    letter = distribution_letter(rust.site_area_mm2, rust.site_centroid_mm, rated, s, grade)
    left, right = scribe.side_means_mm()
    creep_mean = scribe.creep_mean_mm
    return {
        "rated_area_mm2": rust.rated_area_mm2, "rust_area_mm2": rust.rust_area_mm2,
        "glare_excluded_mm2": float(np.count_nonzero(glare)) / s**2,
        "glare_corrected_mm2": float(np.count_nonzero(patch)) / s**2,
        "rust_area_pct_unc_glare": glare_unc,
        "rust_area_pct": rust.rust_area_pct, "rust_area_pct_unc": rust.rust_area_pct_unc,
        "rust_pixel_count_pct": rust.pixel_count_pct,
        "rust_sites": rust.sites, "rust_grade": grade, "rust_distribution": letter,
        "rust_grade_written": written_grade(grade, letter),
        "ri_degree": rate("iso-4628-3", rust.rust_area_pct),
        "coating_srgb": [round(float(v), 4) for v in model.coating_srgb],
        "coating_darker_than_rust": bool(model.coating_darker_than_rust),
        "scribe_found": scribe.found, "scribe_kind": scribe.kind, "scribe_stations": len(scribe.stations),
        "creep_mean_mm": creep_mean, "creep_max_mm": scribe.creep_max_mm, "creep_min_mm": scribe.creep_min_mm,
        "creep_left_mean_mm": left, "creep_right_mean_mm": right,
        "creep_rating": rate("astm-d1654", creep_mean) if np.isfinite(creep_mean) else None,
        "scribe_note": scribe.note,
        "_model": model, "_rust": rust, "_scribe": scribe, "_rated": rated,
    }
