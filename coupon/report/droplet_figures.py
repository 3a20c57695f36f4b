"""Pictures of a droplet time-lapse: per-frame pH map, montage, kymograph, zone areas.

pH uses the shared perceptual map (:func:`coupon.report.figures.ph_colormap`,
matplotlib's viridis; grey where there is no valid pH); lines and zones use the
Okabe-Ito palette (:data:`coupon.report.figures.PALETTE`).
"""

from __future__ import annotations

from pathlib import Path

import cv2
import numpy as np

from coupon.report.figures import PALETTE, ph_colormap, ph_figure, plt
from coupon.io.atomic import save_figure

ZONE_COLOURS = {"acidic": PALETTE[3], "neutral": PALETTE[2], "basic": PALETTE[0], "rust": PALETTE[1],
                "drop": PALETTE[7]}


def zone_masks(ph_map: np.ndarray, drop: np.ndarray, acidic_below: float, basic_above: float,
               smooth_px: float = 1.5) -> dict[str, np.ndarray]:
    """Smoothed acidic and basic zone masks for outlining (the numbers use the raw pixels)."""
    out = {}
    for name, m in (("acidic", ph_map < acidic_below), ("basic", ph_map > basic_above)):
        f = cv2.GaussianBlur((m & drop).astype(np.float32), (0, 0), smooth_px)
        out[name] = f > 0.5
    return out


def frame_figure(ph_map: np.ndarray, drop: np.ndarray, rust: np.ndarray, dest: str | Path, *, title: str,
                 px_per_mm: float, acidic_below: float, basic_above: float,
                 ph_range: tuple[float, float]) -> Path:
    """pH map of one frame (the drop's crop) with colour bar and outlines of drop, zones and rust."""
    z = zone_masks(ph_map, drop, acidic_below, basic_above)
    contours = {"drop edge": drop, f"acidic (pH < {acidic_below:g})": z["acidic"],
                f"basic (pH > {basic_above:g})": z["basic"], "rust": rust}
    contours = {k: v for k, v in contours.items() if v.any()}
    return ph_figure(ph_map, dest, title=title, ph_range=ph_range, px_per_mm=px_per_mm, contours=contours,
                     max_side_px=420)


def montage_figure(panels: list[tuple[str, np.ndarray]], dest: str | Path, *, ph_range: tuple[float, float],
                   title: str = "") -> Path:
    """Selected frames' pH maps side by side on one colour scale.  ``panels``: (label, pH map)."""
    n = max(1, len(panels))
    cols = min(4, n)
    rows = int(np.ceil(n / cols))
    fig, axes = plt.subplots(rows, cols, figsize=(2.6 * cols + 0.9, 2.6 * rows + 0.5), dpi=110,
                             layout="constrained", squeeze=False)
    im = None
    for ax in axes.ravel():
        ax.set_axis_off()
    for ax, (label, ph) in zip(axes.ravel(), panels):
        step = max(1, int(np.ceil(max(ph.shape) / 300)))
        im = ax.imshow(np.ma.masked_invalid(ph[::step, ::step]), cmap=ph_colormap(), vmin=ph_range[0],
                       vmax=ph_range[1], interpolation="nearest")
        ax.set_title(label, fontsize=9)
    if im is not None:
        fig.colorbar(im, ax=axes, shrink=0.8, label="pH (grey: no reading)")
    if title:
        fig.suptitle(title, fontsize=10)
    return save_figure(fig, dest)


def kymograph_figure(t_min: np.ndarray, r_norm: np.ndarray, ph: np.ndarray, dest: str | Path, *,
                     ph_range: tuple[float, float], acidic_below: float, basic_above: float,
                     title: str = "") -> Path:
    """Radial pH profile against time: time across, normalised radius up (0 centre, 1 edge).

    ``ph`` is (frames, rings); frames without a drop are NaN columns (grey).
    """
    t = np.asarray(t_min, float)
    fig, ax = plt.subplots(figsize=(7.5, 3.8), dpi=120, layout="constrained")
    if len(t) > 1:
        mid = (t[:-1] + t[1:]) / 2
        t_edges = np.concatenate([[t[0] - (mid[0] - t[0])], mid, [t[-1] + (t[-1] - mid[-1])]])
    else:
        t_edges = np.array([t[0] - 0.5, t[0] + 0.5]) if len(t) else np.array([0.0, 1.0])
    r = np.asarray(r_norm, float)
    dr = r[1] - r[0] if len(r) > 1 else 1.0
    r_edges = np.concatenate([r - dr / 2, [r[-1] + dr / 2]])
    data = np.ma.masked_invalid(np.asarray(ph, float).T) if len(t) else np.ma.masked_all((len(r), 1))
    mesh = ax.pcolormesh(t_edges, r_edges, data, cmap=ph_colormap(), vmin=ph_range[0], vmax=ph_range[1],
                         shading="flat")
    if len(t) > 1 and np.isfinite(ph).sum() > 3:
        tt, rr = np.meshgrid(t, r, indexing="ij")
        filled = np.where(np.isfinite(ph), ph, np.nan)
        for level, colour in ((acidic_below, ZONE_COLOURS["acidic"]), (basic_above, ZONE_COLOURS["basic"])):
            try:
                ax.contour(tt, rr, np.ma.masked_invalid(filled), levels=[level], colors=[colour], linewidths=1.2)
            except (ValueError, TypeError):  # a level never reached draws nothing
                pass
            ax.plot([], [], color=colour, label=f"pH {level:g}")
        ax.legend(loc="upper left", fontsize=8, framealpha=0.8)
    ax.set_xlabel("time (min)")
    ax.set_ylabel("normalised radius (0 centre, 1 edge)")
    ax.set_ylim(0, 1)
    fig.colorbar(mesh, ax=ax, label="median pH in ring")
    ax.set_title(title or "radial pH profile over time", fontsize=10)
    return save_figure(fig, dest)


def zone_areas_figure(t_min, areas: dict[str, np.ndarray], dest: str | Path, title: str = "") -> Path:
    """Zone areas (mm2) against time; ``areas`` maps 'drop', 'acidic', 'neutral', 'basic', 'rust' to arrays."""
    fig, ax = plt.subplots(figsize=(7.5, 4.0), dpi=120, layout="constrained")
    styles = {"drop": "--", "acidic": "-", "neutral": "-", "basic": "-", "rust": "-."}
    for name, values in areas.items():
        ax.plot(t_min, values, styles.get(name, "-"), marker="o", ms=3, color=ZONE_COLOURS.get(name, "k"),
                label=name)
    ax.set_xlabel("time (min)")
    ax.set_ylabel("area (mm²)")
    ax.set_ylim(bottom=0)
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8)
    ax.set_title(title or "zone areas over time", fontsize=10)
    return save_figure(fig, dest)
