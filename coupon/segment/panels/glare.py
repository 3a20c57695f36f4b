"""Specular glare on a rectified panel: its light, to take off before rating, and what is left.

Glare is light reflected off the paint's surface: white light added on top of everything beneath it.
Over rust it washes the rust colour out (the unmixing then sees less rust), and beside a scribe it looks
like bare steel (the corroded zone then runs into it).  The light field of :func:`~coupon.segment.panels.rust.unmix`
is a smooth quadratic over the panel, so a glare patch stays in the neutral deviation as a local
lightening of the clean coating, above a robust quadratic of the clean coating's own brightness.  From
that lightening :func:`glare_mask` estimates the added light (filled in beneath rust) for
:func:`~coupon.segment.panels.rate_panel` to subtract before unmixing again; a patch that still stands
out afterwards (a clipped highlight on a white coating) is left out of the rated area like a mask.

Measured on synthetic trays (a soft band of white light, 0.35 at its peak, over general rust): with
nothing done, rust read 0.0 % for 2.7 % on a black panel with an X scribe and 4.6 % on a grey one, and a
green one found a scribe in the glare; leaving the patch out read 0.90 to 1.05 of the truth but lost the
rust spots under it (0.138 % for 0.279 % on a green panel with few spots); taking the light off reads
0.94 to 1.11 and keeps them (0.259 %) (ninth session's randomised trays).
"""

from __future__ import annotations

import cv2
import numpy as np

from coupon.segment.panels.rust import _LUMA, ColourModel, lstsq_quadratic, quadratic_design

#: A 2 mm block of clean coating is glare when it is lighter than the fitted light field by this share ...
GLARE_MIN_REL = 0.10
#: ... and by at least this much light in absolute terms (linear RGB luminance, 0-1): on a black coating a
#: faint glow is a large share of almost nothing, and changes no rust reading.
GLARE_MIN_ABS = 0.015
#: Glare patches smaller than this (mm2) are left alone (a bright fleck, a reflection off a rust crust).
GLARE_MIN_AREA_MM2 = 12.0
#: Glare is smooth: within a 2 mm block its light is nearly even.  A block whose excess brightness varies
#: more than this (standard deviation over mean) holds a sharp bright structure: the bare-steel core of a
#: scribe (a quarter of the block lit up 14 times on a black coating; about 1.7), the edge of a mark.
GLARE_MAX_BLOCK_CV = 1.0
#: ... and it peaks: a patch's brightest block is at least this many times its mean excess.  A plateau
#: (a lighter smudge of dirt on a dark coating, a band of even brightness along a scraped zone) is not glare.
GLARE_MIN_PEAKEDNESS = 1.5
#: The patch is grown by this much (mm): its soft tail.
GLARE_GROW_MM = 2.0

_BLOCK_MM = 2.0
#: Standard deviation (in 2 mm blocks) of the smoothing of the glare's estimated light.
GLARE_LIGHT_BLUR_BLOCKS = 0.5


#: Relative uncertainty of the estimated glare light (coupon's estimate): beneath rust the light is filled
#: in from the clean coating around it, and on the synthetic trays its peak came out 5 to 8 % low where
#: rust holes were filled in (eleventh session).  ``rate_panel`` rates a panel with glare again with the
#: light taken off at 1 -/+ this share and adds half the spread of the rust area to its uncertainty.
GLARE_LIGHT_REL_UNC = 0.10

def glare_mask(model: ColourModel, valid: np.ndarray, px_per_mm: float, light_too: bool = False):
    """Pixels of ``valid`` under glare (bool, the panel's shape); all False when there is none.

    ``light_too``: also return the glare's own light (linear RGB added to every channel, float32 map of
    the panel's shape, 0 outside the patches), estimated from the clean coating's excess brightness and
    filled in beneath rust; None when there is no glare."""
    rows, cols = valid.shape
    f = min(1.0, 1.0 / (_BLOCK_MM * px_per_mm))
    size = (max(2, int(round(cols * f))), max(2, int(round(rows * f))))
    ok = valid & ~model.rust_wins
    okf = ok.astype(np.float32)
    # relative excess of the brightness over the light field: -neutral_dev (1 - b, b = brightness / field)
    # (clipped far out: on a black coating glare of 0.35 is 23 times the coating's own brightness)
    excess = np.clip(-model.neutral_dev, -1.0, 200.0)
    ex_ok = excess * okf
    small = cv2.resize(cv2.merge([ex_ok, okf, model.light, ex_ok * excess]), size, interpolation=cv2.INTER_AREA)
    e_sum, w, light, e2_sum = small[..., 0], small[..., 1], small[..., 2], small[..., 3]
    seen = w > 0.5
    if np.count_nonzero(seen) < 12:
        return _none(valid.shape, light_too)
    rel = np.where(seen, e_sum / np.maximum(w, 1e-6), 0.0)
    spread = np.sqrt(np.maximum(np.where(seen, e2_sum / np.maximum(w, 1e-6), 0.0) - rel**2, 0.0))
    # against a robust quadratic of the clean coating's own brightness: the light field was fitted with the
    # rust pixels in (a wide scribe zone pulls it down, and the coating beside it would look lit up)
    rr, cc = np.nonzero(seen)
    y, x = rr / size[1] - 0.5, cc / size[0] - 0.5
    design = quadratic_design(x, y)
    vals = rel[seen].astype(np.float64)
    keep = np.ones(vals.size, bool)
    for _ in range(3):
        coef = lstsq_quadratic(design[keep], vals[keep])
        res = vals - design @ coef
        mad = float(np.median(np.abs(res[keep] - np.median(res[keep]))))
        keep = np.abs(res) < max(3 * 1.4826 * mad, 0.03)
        if keep.sum() < 12:
            return _none(valid.shape, light_too)
    over = np.zeros(rel.shape)
    over[seen] = res
    y_c = float(np.asarray(model.coating_linear, np.float64) @ _LUMA)
    flag = (seen & (over > GLARE_MIN_REL) & (over * light * y_c > GLARE_MIN_ABS)
            & (spread < GLARE_MAX_BLOCK_CV * np.maximum(rel, 1e-6))).astype(np.uint8)
    if not flag.any():
        return _none(valid.shape, light_too)
    n, lab, stats, _ = cv2.connectedComponentsWithStats(flag, connectivity=8)
    block_mm2 = (cols / size[0] / px_per_mm) * (rows / size[1] / px_per_mm)
    big = np.zeros(n, np.uint8)
    big[1:] = stats[1:, cv2.CC_STAT_AREA] * block_mm2 >= GLARE_MIN_AREA_MM2
    # a peak, not a plateau: the brightest block against the patch's mean excess
    on = lab.ravel() > 0
    peak = np.zeros(n)
    np.maximum.at(peak, lab.ravel()[on], over.ravel()[on])
    mean = np.bincount(lab.ravel()[on], weights=over.ravel()[on], minlength=n) / np.maximum(stats[:, cv2.CC_STAT_AREA], 1)
    big[1:] &= (peak[1:] >= GLARE_MIN_PEAKEDNESS * mean[1:]).astype(np.uint8)
    flag = big[lab]
    if not flag.any():
        return _none(valid.shape, light_too)
    grow = max(1, int(round(GLARE_GROW_MM / _BLOCK_MM)))
    flag = cv2.dilate(flag, np.ones((2 * grow + 1, 2 * grow + 1), np.uint8))
    mask = cv2.resize(flag, (cols, rows), interpolation=cv2.INTER_NEAREST).astype(bool) & valid
    if not light_too:
        return mask
    # added white light g: the clean coating's brightness along its own colour rises by g sum(u1) / |c|
    c = np.asarray(model.coating_linear, np.float64)
    cn = float(np.sqrt(c @ c))
    g_per_rel = cn / max(float(np.sum(c / cn)), 1e-6)
    g = np.where(seen, np.clip(over, 0, None) * light * g_per_rel, 0).astype(np.float32)
    # beneath rust (blocks not seen) and between: filled from the seen blocks around them
    near = cv2.dilate(flag, np.ones((3, 3), np.uint8))
    hole = ((~seen) & (near > 0)).astype(np.uint8)
    if hole.any():
        scale = float(g.max()) or 1.0
        g = cv2.inpaint(np.clip(g / scale * 255, 0, 255).astype(np.uint8), hole, 3, cv2.INPAINT_TELEA
                        ).astype(np.float32) * (scale / 255)
    g *= near.astype(np.float32)
    # a light touch (half a 2 mm block): a blur of one block took a fifth off the peak of a glare 8 mm wide,
    # the rest washed the rust spots under it out and stood out as residual glare (left out of the rating
    # with the spots: a grey panel read 0.71 of its rust, tenth session's randomised trays, seed 2 scene 5)
    g = cv2.GaussianBlur(g, (0, 0), GLARE_LIGHT_BLUR_BLOCKS)
    return mask, cv2.resize(g, (cols, rows), interpolation=cv2.INTER_LINEAR)


def _none(shape, light_too: bool):
    m = np.zeros(shape, bool)
    return (m, None) if light_too else m
