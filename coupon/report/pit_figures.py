"""Pit figures: the coupon with every counted pit outlined and numbered, and a size histogram.

Outline colours follow the pit's ASTM G46 size chart (B-1 ... B-5), from a
palette chosen for this tool: saturated hues that stand out on grey metal and
stay apart for the commonest colour-vision deficiencies (light to dark, warm to
cold).  The analysed region's border is drawn as a thin dashed white line, the
excluded edge band dimmed.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import cv2
import numpy as np
import pandas as pd

from coupon.io.atomic import atomic_path
from coupon.ratings.scales import ASTM_G46_SIZE

#: Outline colour per G46 size chart (sRGB 0-255): yellow, orange, magenta, violet, cyan.
PIT_PALETTE = {
    "B-1": (255, 226, 0),
    "B-2": (255, 128, 0),
    "B-3": (236, 0, 140),
    "B-4": (146, 60, 255),
    "B-5": (0, 200, 255),
}
DIMMED = 0.45  # brightness kept in the edge band and the background
#: Histogram bin edges for pit opening areas, mm2 (1-2-5 steps).
AREA_BINS_MM2 = np.array([0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 0.5, 1, 2, 5, 10, 20, 50, 100, 200])


def size_class(area_mm2: np.ndarray) -> list[str]:
    """G46 size chart of each pit (``ASTM_G46_SIZE.rate``, vectorised; "B-1" where it gives none)."""
    a = np.asarray(area_mm2, float)
    names = [name for name, _ in ASTM_G46_SIZE.charts]
    k = np.searchsorted(ASTM_G46_SIZE.boundaries(), a, side="left")  # the same rule as ChartScale.rate
    valid = np.isfinite(a) & (a > 0)
    return [names[i] if ok else "B-1" for i, ok in zip(k.tolist(), valid.tolist())]


def size_histogram(area_mm2: np.ndarray) -> dict:
    """Counts of pit areas in :data:`AREA_BINS_MM2` (areas outside the edges go to the end bins)."""
    a = np.clip(np.asarray(area_mm2, float), AREA_BINS_MM2[0], AREA_BINS_MM2[-1] * 0.999)
    counts, _ = np.histogram(a, bins=AREA_BINS_MM2)
    return {"bin_edges_mm2": AREA_BINS_MM2.tolist(), "counts": counts.tolist()}


#: Overlays with more pixels than this are written as JPEG (4:4:4 chroma, quality 92) instead of PNG:
#: PNG of a photograph of that size takes about 0.15 s to encode, JPEG about 0.015 s.
JPEG_ABOVE_PX = 2_000_000
JPEG_QUALITY = 92


def _overlay_factor(shape_rc: tuple[int, int], max_side_px: int) -> tuple[int, float]:
    """(integer reduction k, enlargement f): a huge picture is reduced by the smallest integer factor
    that brings its longer side to at most ``max_side_px`` (OpenCV's fast area path; nearest-pixel
    label sampling stays exact); a small one is enlarged up to 3 x so numbers stay legible."""
    side = max(shape_rc)
    if side > max_side_px:
        return int(np.ceil(side / max_side_px)), 1.0
    return 1, max(1.0, min(3.0, 900 / side))


def block_centres(img: np.ndarray, k: int) -> np.ndarray:
    """The centre pixel (offset k // 2) of every whole k x k block: ``img[k//2::k, k//2::k]`` cut to whole blocks.

    A colour picture goes through OpenCV's exact nearest-pixel reduction by exactly
    k, which picks the same pixels (tested) in 4 ms at 24 MP where numpy's strided
    copy of 3-byte pixels took 13 to 19 ms; label maps and masks are sliced.
    """
    hb, wb = img.shape[0] // k, img.shape[1] // k
    if img.ndim == 3 and img.dtype in (np.uint8, np.float32):
        return cv2.resize(img[:hb * k, :wb * k], (wb, hb), interpolation=cv2.INTER_NEAREST_EXACT)
    return np.ascontiguousarray(img[k // 2::k, k // 2::k][:hb, :wb])


@dataclass
class OverlayBackground:
    """The overlay's picture before the pits are drawn: reduced or enlarged, dimmed outside the
    analysed region, its border dashed (:func:`overlay_background`).

    ``picture`` is drawn on by :func:`overlay_image`, so one background serves one overlay.
    """

    picture: np.ndarray
    analysed: np.ndarray  # the analysed region at the picture's size (bool)
    k: int  # integer reduction (1: none)
    f: float  # enlargement of a small picture (1: none)
    size: tuple[int, int]  # (width, height) of the picture
    scale_xy: float  # picture px per source px


def overlay_background(rgb: np.ndarray, analysed: np.ndarray, max_side_px: int = 2400) -> OverlayBackground:
    """The first stage of :func:`overlay_image`: everything that needs only the picture and the region.

    The pits command draws it on its helper thread as soon as the region is known, while the pits
    are still being found, so that only the pits are left to draw once they are.
    """
    h, w = analysed.shape
    k, f = _overlay_factor((h, w), max_side_px)
    if k > 1:
        # nearest-pixel sampling (the centre pixel of each k x k block) of picture, labels and region alike:
        # outlines stay exactly on the picture's pixels, and only one pixel in k*k is read and converted to
        # 8 bits (an area reduction of the whole frame took 60 ms of the job at 24 MP, this takes about 8)
        picked = block_centres(np.asarray(rgb), k)
        small = picked if picked.dtype == np.uint8 else cv2.convertScaleAbs(picked, alpha=255.0)
        an = block_centres(analysed, k)
        size = (small.shape[1], small.shape[0])  # the whole blocks
        scale_xy = 1.0 / k
    else:
        size = (max(1, int(round(w * f))), max(1, int(round(h * f))))
        src = rgb if rgb.dtype == np.uint8 else np.asarray(rgb, np.float32)
        small = cv2.resize(src, size, interpolation=cv2.INTER_LINEAR) if f != 1 else rgb
        an = (cv2.resize(analysed.view(np.uint8), size, interpolation=cv2.INTER_NEAREST) if f != 1
              else analysed.view(np.uint8)).astype(bool)
        scale_xy = f
    out = small if small.dtype == np.uint8 else cv2.convertScaleAbs(np.asarray(small, np.float32), alpha=255.0)
    if out is rgb:
        out = out.copy()  # never draw on the caller's picture
    out = np.ascontiguousarray(out)  # drawn on through flat views below
    # dim outside the analysed region (OpenCV's masked copy: a numpy copyto with a broadcast mask is 5 x slower)
    cv2.copyTo(cv2.convertScaleAbs(out, alpha=DIMMED), (~an).view(np.uint8), out)
    # analysed border: dashed white
    contours, _ = cv2.findContours(an.view(np.uint8), cv2.RETR_EXTERNAL, cv2.CHAIN_APPROX_NONE)
    dashes = [c[k0:k0 + 8] for c in contours for k0 in range(0, len(c), 16) if len(c[k0:k0 + 8]) > 1]
    if dashes:
        cv2.polylines(out, dashes, False, (255, 255, 255), 1, cv2.LINE_AA)
    return OverlayBackground(out, an, k, f, size, scale_xy)


def overlay_image(rgb: np.ndarray, labels, analysed: np.ndarray, pits: pd.DataFrame,
                  px_per_mm: float, max_side_px: int = 2400, background: OverlayBackground | None = None
                  ) -> np.ndarray:
    """The picture with pits outlined and numbered, as uint8 RGB.

    A picture longer than ``max_side_px`` is reduced by an integer factor first
    (6000 px becomes 2000 px) and everything is drawn on the reduced copy with
    OpenCV: outlines, numbers, the dashed border of the analysed region and a
    legend strip.  ``labels``: the (M, N) pit-id map, or the analysis's
    ``PitLabels`` pixel list (sampled without making the map).  ``background``:
    :func:`overlay_background` of the same picture and region, made ahead (it is
    drawn on); made here when None.
    """
    bg = overlay_background(rgb, analysed, max_side_px) if background is None else background
    out, k, f, size, scale_xy = bg.picture, bg.k, bg.f, bg.size, bg.scale_xy
    if k == 1 and not isinstance(labels, np.ndarray):
        labels = np.asarray(labels)  # a PitLabels pixel list: the full map of a picture this small is cheap
    if k > 1:
        lab = labels.block_centres(k) if hasattr(labels, "block_centres") else block_centres(labels, k)
    else:
        lab = cv2.resize(labels, size, interpolation=cv2.INTER_NEAREST) if f != 1 else labels
    if len(pits):
        classes = size_class(pits["area_mm2"].to_numpy())
        # outline = label pixels with a neighbour of another label
        lab32 = lab.astype(np.float32)
        edge = (lab32 != cv2.erode(lab32, np.ones((3, 3), np.uint8))) & (lab > 0)
        colour_of = np.zeros((int(lab.max()) + 1, 3), np.uint8)
        ids = pits["pit_id"].to_numpy()
        ok = ids < len(colour_of)
        colour_of[ids[ok]] = [PIT_PALETTE[c] for c, o in zip(classes, ok) if o]
        e = np.flatnonzero(edge)  # one pass over the mask instead of two boolean indexings
        out.reshape(-1, 3)[e] = colour_of[lab.ravel()[e]]
        scale = max(0.35, min(0.8, 0.9 * max(size) / 2400))
        thick = 1 if scale < 0.6 else 2
        s = px_per_mm * scale_xy
        for pid, x_mm, y_mm, cls, d_mm in zip(ids, pits["x_mm"], pits["y_mm"], classes, pits["eq_diameter_mm"]):
            x = int(round(x_mm * s + 0.5 * d_mm * s + 2))
            y = int(round(y_mm * s - 0.5 * d_mm * s))
            text = str(int(pid))
            cv2.putText(out, text, (x, y), cv2.FONT_HERSHEY_SIMPLEX, scale, (0, 0, 0), thick + 2, cv2.LINE_AA)
            cv2.putText(out, text, (x, y), cv2.FONT_HERSHEY_SIMPLEX, scale, PIT_PALETTE[cls], thick, cv2.LINE_AA)
    # legend strip
    strip_h = max(22, int(0.035 * size[1]))
    strip = np.full((strip_h, size[0], 3), 30, np.uint8)
    x = 8
    fs = max(0.4, strip_h / 45)
    for name, col in PIT_PALETTE.items():
        cv2.rectangle(strip, (x, strip_h // 4), (x + strip_h // 2, 3 * strip_h // 4), col, -1)
        cv2.putText(strip, name, (x + strip_h // 2 + 4, 3 * strip_h // 4), cv2.FONT_HERSHEY_SIMPLEX, fs,
                    (235, 235, 235), 1, cv2.LINE_AA)
        x += int(strip_h * 3.2)
    cv2.putText(strip, "outline colour: ASTM G46 size chart of the pit", (x + 10, 3 * strip_h // 4),
                cv2.FONT_HERSHEY_SIMPLEX, fs, (235, 235, 235), 1, cv2.LINE_AA)
    return np.vstack([out, strip])


def encode_overlay(rgb_u8: np.ndarray, dest: str | Path) -> tuple[Path, bytes]:
    """The overlay's file name and bytes: PNG, or JPEG (same stem, ``.jpg``) above :data:`JPEG_ABOVE_PX`."""
    dest = Path(dest)
    bgr = cv2.cvtColor(np.ascontiguousarray(rgb_u8), cv2.COLOR_RGB2BGR)
    if rgb_u8.shape[0] * rgb_u8.shape[1] > JPEG_ABOVE_PX:
        dest = dest.with_suffix(".jpg")
        # 4:4:4 keeps the one-pixel coloured outlines in colour (4:2:0 would smear their chroma)
        params = [cv2.IMWRITE_JPEG_QUALITY, JPEG_QUALITY,
                  cv2.IMWRITE_JPEG_SAMPLING_FACTOR, cv2.IMWRITE_JPEG_SAMPLING_FACTOR_444]
    else:
        params = [cv2.IMWRITE_PNG_COMPRESSION, 1]
    ok, buf = cv2.imencode(dest.suffix, bgr, params)
    if not ok:
        raise OSError(f"{dest}: could not encode the overlay")
    return dest, buf.tobytes()


def write_overlay(dest: str | Path, rgb: np.ndarray, labels, analysed: np.ndarray,
                  pits: pd.DataFrame, px_per_mm: float, background: OverlayBackground | None = None) -> Path:
    """Write the overlay (atomically); return the path written.

    A big overlay (more than :data:`JPEG_ABOVE_PX` pixels) goes to ``<stem>.jpg``
    beside ``dest`` instead of the ``.png`` asked for; callers record the path
    returned.  ``background``: see :func:`overlay_image`.
    """
    path, data = encode_overlay(overlay_image(rgb, labels, analysed, pits, px_per_mm, background=background), dest)
    with atomic_path(path) as tmp:
        tmp.write_bytes(data)
    return path


def _log_position(values: np.ndarray, edges: np.ndarray) -> np.ndarray:
    """Position of values on the bin-index axis (0 at the first edge), log-interpolated inside a bin."""
    return np.interp(np.log(values), np.log(edges), np.arange(len(edges), dtype=float))


def _text(img, text, xy, scale, colour=(40, 40, 40), anchor="left"):
    (tw, th), _ = cv2.getTextSize(text, cv2.FONT_HERSHEY_SIMPLEX, scale, 1)
    x, y = xy
    if anchor == "centre":
        x -= tw // 2
    elif anchor == "right":
        x -= tw
    cv2.putText(img, text, (int(x), int(y)), cv2.FONT_HERSHEY_SIMPLEX, scale, colour, 1, cv2.LINE_AA)
    return tw, th


def size_histogram_image(pits: pd.DataFrame, title: str = "", size_wh: tuple[int, int] = (720, 380)) -> np.ndarray:
    """Histogram of pit opening areas (1-2-5 log bins) with the G46 size charts marked, as uint8 RGB.

    Drawn with OpenCV (a few milliseconds; a matplotlib figure of the same took
    about 0.5 s, mostly layout and log-axis text): one bar per bin, the bins
    equally wide on a log axis labelled with their edges, the G46 size chart
    values as dashed lines in the outline colours of the overlay.
    """
    w, h = size_wh
    img = np.full((h, w, 3), 255, np.uint8)
    left, right, top, bottom = 52, 14, 34, 58
    pw, ph = w - left - right, h - top - bottom
    areas = pits["area_mm2"].to_numpy(float) if len(pits) else np.array([])
    hist = size_histogram(areas)
    edges = np.asarray(hist["bin_edges_mm2"])
    counts = np.asarray(hist["counts"])
    nb = len(counts)
    ymax = max(1, int(counts.max()) if nb else 1)
    # a 1-2-5 step for the count axis, about 5 ticks
    step = next(m * 10**e for e in range(0, 9) for m in (1, 2, 5) if m * 10**e * 5 >= ymax)
    ytop = step * int(np.ceil(ymax * 1.1 / step))

    def px(i):  # bin-index position -> x pixel
        return left + pw * i / nb

    def py(c):
        return top + ph * (1 - c / ytop)

    for c in range(0, ytop + 1, step):
        y = int(round(py(c)))
        cv2.line(img, (left, y), (left + pw, y), (225, 225, 225), 1)
        _text(img, str(c), (left - 6, y + 4), 0.38, anchor="right")
    for i, c in enumerate(counts):
        if c:
            cv2.rectangle(img, (int(round(px(i))) + 1, int(round(py(c)))), (int(round(px(i + 1))) - 1, top + ph),
                          (112, 103, 91), -1)  # slate grey (RGB 91, 103, 112)
    for name, value in ASTM_G46_SIZE.charts:
        x = int(round(px(float(_log_position(np.array([value]), edges)[0]))))
        col = PIT_PALETTE[name]
        for y0 in range(top, top + ph, 8):
            cv2.line(img, (x, y0), (x, min(y0 + 4, top + ph)), col, 2)
        _text(img, name, (x + 3, top + 12), 0.38)
    cv2.rectangle(img, (left, top), (left + pw, top + ph), (60, 60, 60), 1)
    for i, e in enumerate(edges):
        x = int(round(px(i)))
        cv2.line(img, (x, top + ph), (x, top + ph + 4), (60, 60, 60), 1)
        if i % 2 == 0 or nb < 10:
            _text(img, f"{e:g}", (x, top + ph + 17), 0.36, anchor="centre")
    _text(img, "pit opening area (mm2), log bins", (left + pw // 2, h - 14), 0.45, anchor="centre")
    _text(img, "pits", (6, top - 10), 0.42)
    _text(img, (title or "pit sizes")[:90], (left + pw // 2, 20), 0.5, colour=(0, 0, 0), anchor="centre")
    if not len(areas):
        _text(img, "no pits counted", (left + pw // 2, top + ph // 2), 0.6, anchor="centre")
    return img


def size_histogram_figure(pits: pd.DataFrame, dest: str | Path, title: str = "") -> Path:
    """Write :func:`size_histogram_image` as PNG (atomically); return the path."""
    img = size_histogram_image(pits, title)
    ok, buf = cv2.imencode(".png", cv2.cvtColor(img, cv2.COLOR_RGB2BGR), [cv2.IMWRITE_PNG_COMPRESSION, 3])
    if not ok:
        raise OSError(f"{dest}: could not encode the histogram")
    with atomic_path(dest) as tmp:
        tmp.write_bytes(buf.tobytes())
    return Path(dest)
