"""Pit figures: the coupon with every counted pit outlined and numbered, and a size histogram.

Outline colours follow the pit's ASTM G46 size chart (B-1 ... B-5), from a
palette chosen for this tool: saturated hues that stand out on grey metal and
stay apart for the commonest colour-vision deficiencies (light to dark, warm to
cold).  The analysed region's border is drawn as a thin dashed white line, the
excluded edge band dimmed.
"""

from __future__ import annotations

from pathlib import Path

import cv2
import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402

from coupon.io.atomic import save_figure, write_image  # noqa: E402
from coupon.io.images import to_uint8  # noqa: E402
from coupon.ratings.scales import ASTM_G46_SIZE  # noqa: E402

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
    return [ASTM_G46_SIZE.rate(a) or "B-1" for a in np.asarray(area_mm2, float)]


def size_histogram(area_mm2: np.ndarray) -> dict:
    """Counts of pit areas in :data:`AREA_BINS_MM2` (areas outside the edges go to the end bins)."""
    a = np.clip(np.asarray(area_mm2, float), AREA_BINS_MM2[0], AREA_BINS_MM2[-1] * 0.999)
    counts, _ = np.histogram(a, bins=AREA_BINS_MM2)
    return {"bin_edges_mm2": AREA_BINS_MM2.tolist(), "counts": counts.tolist()}


def overlay_image(rgb: np.ndarray, labels: np.ndarray, analysed: np.ndarray, pits: pd.DataFrame,
                  px_per_mm: float, max_side_px: int = 2400) -> np.ndarray:
    """The picture with pits outlined and numbered, as uint8 RGB (reduced to ``max_side_px``)."""
    h, w = labels.shape
    f = min(1.0, max_side_px / max(h, w))
    # enlarge small pictures so numbers stay legible
    f = max(f, min(3.0, 900 / max(h, w)))
    size = (max(1, int(round(w * f))), max(1, int(round(h * f))))
    interp = cv2.INTER_AREA if f < 1 else cv2.INTER_LINEAR
    base = to_uint8(cv2.resize(rgb, size, interpolation=interp))
    lab = cv2.resize(labels, size, interpolation=cv2.INTER_NEAREST)
    an = cv2.resize(analysed.view(np.uint8), size, interpolation=cv2.INTER_NEAREST).astype(bool)
    out = base.copy()
    out[~an] = (out[~an] * DIMMED).astype(np.uint8)
    # analysed border: dashed white
    contours, _ = cv2.findContours(an.astype(np.uint8), cv2.RETR_EXTERNAL, cv2.CHAIN_APPROX_NONE)
    for c in contours:
        pts = c[:, 0, :]
        for k in range(0, len(pts), 16):
            seg = pts[k:k + 8]
            if len(seg) > 1:
                cv2.polylines(out, [seg.reshape(-1, 1, 2)], False, (255, 255, 255), 1, cv2.LINE_AA)
    if len(pits):
        classes = size_class(pits["area_mm2"].to_numpy())
        # outline = label pixels with a neighbour of another label
        edge = (lab != cv2.erode(lab.astype(np.float32), np.ones((3, 3), np.uint8)).astype(lab.dtype)) & (lab > 0)
        colour_of = np.zeros((int(lab.max()) + 1, 3), np.uint8)
        ids = pits["pit_id"].to_numpy()
        colour_of[ids] = [PIT_PALETTE[c] for c in classes]
        out[edge] = colour_of[lab[edge]]
        scale = max(0.35, min(0.8, 0.9 * max(size) / 2400))
        thick = 1 if scale < 0.6 else 2
        for pid, x_mm, y_mm, cls, d_mm in zip(ids, pits["x_mm"], pits["y_mm"], classes, pits["eq_diameter_mm"]):
            x = int(round(x_mm * px_per_mm * f + 0.5 * d_mm * px_per_mm * f + 2))
            y = int(round(y_mm * px_per_mm * f - 0.5 * d_mm * px_per_mm * f))
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


def write_overlay(dest: str | Path, rgb: np.ndarray, labels: np.ndarray, analysed: np.ndarray,
                  pits: pd.DataFrame, px_per_mm: float) -> Path:
    return write_image(dest, overlay_image(rgb, labels, analysed, pits, px_per_mm))


def size_histogram_figure(pits: pd.DataFrame, dest: str | Path, title: str = "") -> Path:
    """Histogram of pit opening areas on a log axis, with the G46 size charts marked."""
    fig, ax = plt.subplots(figsize=(6.4, 3.6), dpi=110, layout="constrained")
    areas = pits["area_mm2"].to_numpy(float) if len(pits) else np.array([])
    hist = size_histogram(areas)
    edges = np.asarray(hist["bin_edges_mm2"])
    ax.bar(edges[:-1], hist["counts"], width=np.diff(edges), align="edge", color="#5B6770", edgecolor="white")
    for name, value in ASTM_G46_SIZE.charts:
        ax.axvline(value, color=np.array(PIT_PALETTE[name]) / 255, lw=1.5, ls="--")
        ax.text(value, ax.get_ylim()[1] * 0.97, name, rotation=90, va="top", ha="right", fontsize=8)
    ax.set_xscale("log")
    lo = min(0.2, 0.7 * float(areas.min())) if len(areas) else 0.05
    hi = max(40.0, 1.5 * float(areas.max())) if len(areas) else 40.0
    ax.set_xlim(lo, hi)
    ax.set_xlabel("pit opening area (mm2)")
    ax.set_ylabel("pits")
    ax.set_title(title or "pit sizes", fontsize=10)
    if not len(areas):
        ax.text(0.5, 0.5, "no pits counted", transform=ax.transAxes, ha="center")
    return save_figure(fig, dest)
