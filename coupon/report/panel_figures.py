"""Overlay pictures of rated panels, drawn with OpenCV on the rectified panel.

Colours (our own choice from the project palette in :mod:`coupon.report.palette`,
picked to stand out on white, grey and dark coatings and against rust):

* rust outline: sky blue; rated-area boundary: yellow with a black rim;
* creep measurement lines: bluish green across the corrosion zone, with the
  scribe centre line in reddish purple.
"""

from __future__ import annotations

from pathlib import Path

import cv2
import numpy as np

from coupon.calibrate import colourspace as cs
from coupon.io.atomic import atomic_path, write_image
from coupon.io.images import to_uint8
from coupon.report.palette import PALETTE


def _rgb255(hex_colour: str) -> tuple[int, int, int]:
    h = hex_colour.lstrip("#")
    return tuple(int(h[i:i + 2], 16) for i in (0, 2, 4))


OVERLAY = {
    "rust": _rgb255(PALETTE[5]),      # sky blue
    "rated": _rgb255(PALETTE[6]),     # yellow
    "rim": (0, 0, 0),
    "creep": _rgb255(PALETTE[2]),     # bluish green
    "scribe": _rgb255(PALETTE[4]),    # reddish purple
}


#: Linear light (65 536 levels) to 8-bit sRGB: one table look-up per value instead of a float64
#: power function; a level step is at most 0.05 of an 8-bit level (the steepest part, near black).
_ENCODE_LEVELS = 65535
_ENCODE_LUT = to_uint8(cs.linear_to_srgb(np.arange(_ENCODE_LEVELS + 1) / _ENCODE_LEVELS))


def encode_srgb_u8(linear: np.ndarray) -> np.ndarray:
    """Linear light (float32, any range) to uint8 sRGB, clipped to [0, 1], through :data:`_ENCODE_LUT`."""
    t = np.multiply(linear, np.float32(_ENCODE_LEVELS), dtype=np.float32)
    np.clip(t, 0, _ENCODE_LEVELS, out=t)
    np.rint(t, out=t)
    # np.take: the same look-up as fancy indexing in half the time (0.75 ms against 1.4 ms for a 5 px/mm overlay)
    return np.take(_ENCODE_LUT, t.astype(np.uint16))


def panel_overlay(linear: np.ndarray, px_per_mm: float, rated: np.ndarray, sites: np.ndarray,
                  scribe=None, title: str = "", out_px_per_mm: float = 5.0) -> np.ndarray:
    """(R, C, 3) uint8 picture of a rated panel at ``out_px_per_mm``."""
    f = out_px_per_mm / px_per_mm
    size = (max(1, int(round(linear.shape[1] * f))), max(1, int(round(linear.shape[0] * f))))
    img = np.ascontiguousarray(encode_srgb_u8(cv2.resize(linear, size, interpolation=cv2.INTER_AREA)))
    for mask, colour, rim in ((rated, OVERLAY["rated"], True), (sites, OVERLAY["rust"], False)):
        m = cv2.resize(mask.astype(np.uint8), size, interpolation=cv2.INTER_NEAREST)
        if mask is sites:
            m = cv2.dilate(m, np.ones((3, 3), np.uint8))
        contours, _ = cv2.findContours(m, cv2.RETR_LIST, cv2.CHAIN_APPROX_SIMPLE)
        if rim:
            cv2.drawContours(img, contours, -1, OVERLAY["rim"], 3)
        cv2.drawContours(img, contours, -1, colour, 1)
    if scribe is not None and scribe.found:
        s = out_px_per_mm
        for p0, p1 in scribe.lines:
            cv2.line(img, tuple(int(v * s) for v in p0), tuple(int(v * s) for v in p1), OVERLAY["scribe"], 1)
        for st in scribe.stations:
            c, n = np.asarray(st["centre_xy_mm"]), np.asarray(st["normal_xy"])
            a, b = (c + st["left_edge_mm"] * n) * s, (c + st["right_edge_mm"] * n) * s
            cv2.line(img, tuple(np.rint(a).astype(int)), tuple(np.rint(b).astype(int)), OVERLAY["creep"], 1)
    if title:
        cv2.rectangle(img, (0, 0), (img.shape[1], 16), (255, 255, 255), -1)
        cv2.putText(img, title[:60], (3, 12), cv2.FONT_HERSHEY_SIMPLEX, 0.38, (0, 0, 0), 1, cv2.LINE_AA)
    return img


#: PNG settings of the overlays (lossless): every row filtered against the one above (libpng's default
#: tries five filters a row) and Huffman coding only.  On the 12 MP benchmark's panels 7.1 ms a
#: picture against 9.4 ms with OpenCV's defaults, and the files are 1 % smaller (468 kB against 473 kB).
OVERLAY_PNG_PARAMS = (cv2.IMWRITE_PNG_FILTER, cv2.IMWRITE_PNG_FILTER_UP,
                      cv2.IMWRITE_PNG_STRATEGY, cv2.IMWRITE_PNG_STRATEGY_HUFFMAN_ONLY)


def write_panel_overlay(dest: str | Path, *args, **kwargs) -> Path:
    """Draw :func:`panel_overlay` and write it as PNG (atomically) with :data:`OVERLAY_PNG_PARAMS`.

    Another suffix than ``.png`` is written by :func:`coupon.io.atomic.write_image`.
    """
    img = panel_overlay(*args, **kwargs)
    if Path(dest).suffix.lower() != ".png":
        return write_image(dest, img)
    with atomic_path(dest) as tmp:
        if not cv2.imwrite(str(tmp), cv2.cvtColor(img, cv2.COLOR_RGB2BGR), list(OVERLAY_PNG_PARAMS)):
            raise OSError(f"{dest}: could not write image")
    return Path(dest)
