"""Specular glare on a rectified panel: where to leave the coating out of the rating.

Glare is light reflected off the paint's surface: white light added on top of everything beneath it.
Over rust it washes the rust colour out (the unmixing then sees less rust), and beside a scribe it looks
like bare steel (the corroded zone then runs into it).  The light field of :func:`~coupon.segment.panels.rust.unmix`
is a smooth quadratic over the panel, so a glare patch stays in the neutral deviation as a local
lightening of the clean coating, above a robust quadratic of the clean coating's own brightness.  Where that lightening is large, both relative to the coating and in
absolute terms, the patch is left out of the rated area like a mask (and hides the scribe's zone edge
there); the area left out is reported.

Measured on synthetic trays (a soft band of white light, 0.35 at its peak): without this, rust under
glare read 0.64 of the truth on a black panel and 0.71 on a grey one, and a scribe arm under glare was
lost (ninth session's randomised trays).
"""

from __future__ import annotations

import cv2
import numpy as np

from coupon.segment.panels.rust import _LUMA, ColourModel, lstsq_quadratic

#: A 2 mm block of clean coating is glare when it is lighter than the fitted light field by this share ...
GLARE_MIN_REL = 0.10
#: ... and by at least this much light in absolute terms (linear RGB luminance, 0-1): on a black coating a
#: faint glow is a large share of almost nothing, and changes no rust reading.
GLARE_MIN_ABS = 0.015
#: Glare patches smaller than this (mm2) are left alone (a bright fleck, a reflection off a rust crust).
GLARE_MIN_AREA_MM2 = 12.0
#: The patch is grown by this much (mm): its soft tail.
GLARE_GROW_MM = 2.0

_BLOCK_MM = 2.0


def glare_mask(model: ColourModel, valid: np.ndarray, px_per_mm: float) -> np.ndarray:
    """Pixels of ``valid`` under glare (bool, the panel's shape); all False when there is none."""
    rows, cols = valid.shape
    f = min(1.0, 1.0 / (_BLOCK_MM * px_per_mm))
    size = (max(2, int(round(cols * f))), max(2, int(round(rows * f))))
    ok = valid & ~model.rust_wins
    okf = ok.astype(np.float32)
    # relative excess of the brightness over the light field: -neutral_dev (1 - b, b = brightness / field)
    excess = np.clip(-model.neutral_dev, -1.0, 10.0)
    small = cv2.resize(cv2.merge([excess * okf, okf, model.light]), size, interpolation=cv2.INTER_AREA)
    e_sum, w, light = small[..., 0], small[..., 1], small[..., 2]
    seen = w > 0.5
    if np.count_nonzero(seen) < 12:
        return np.zeros(valid.shape, bool)
    rel = np.where(seen, e_sum / np.maximum(w, 1e-6), 0.0)
    # against a robust quadratic of the clean coating's own brightness: the light field was fitted with the
    # rust pixels in (a wide scribe zone pulls it down, and the coating beside it would look lit up)
    rr, cc = np.nonzero(seen)
    y, x = rr / size[1] - 0.5, cc / size[0] - 0.5
    design = np.column_stack([np.ones_like(x), x, y, x * x, x * y, y * y])
    vals = rel[seen].astype(np.float64)
    keep = np.ones(vals.size, bool)
    for _ in range(3):
        coef = lstsq_quadratic(design[keep], vals[keep])
        res = vals - design @ coef
        mad = float(np.median(np.abs(res[keep] - np.median(res[keep]))))
        keep = np.abs(res) < max(3 * 1.4826 * mad, 0.03)
        if keep.sum() < 12:
            return np.zeros(valid.shape, bool)
    over = np.zeros(rel.shape)
    over[seen] = res
    y_c = float(np.asarray(model.coating_linear, np.float64) @ _LUMA)
    flag = (seen & (over > GLARE_MIN_REL) & (over * light * y_c > GLARE_MIN_ABS)).astype(np.uint8)
    if not flag.any():
        return np.zeros(valid.shape, bool)
    n, lab, stats, _ = cv2.connectedComponentsWithStats(flag, connectivity=8)
    block_mm2 = (cols / size[0] / px_per_mm) * (rows / size[1] / px_per_mm)
    big = np.zeros(n, np.uint8)
    big[1:] = stats[1:, cv2.CC_STAT_AREA] * block_mm2 >= GLARE_MIN_AREA_MM2
    flag = big[lab]
    if not flag.any():
        return np.zeros(valid.shape, bool)
    grow = max(1, int(round(GLARE_GROW_MM / _BLOCK_MM)))
    flag = cv2.dilate(flag, np.ones((2 * grow + 1, 2 * grow + 1), np.uint8))
    return cv2.resize(flag, (cols, rows), interpolation=cv2.INTER_NEAREST).astype(bool) & valid
