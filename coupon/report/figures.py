"""Figures shared by the commands.  Palette and colour maps live here, in one place.

pH is drawn with matplotlib's perceptual ``viridis`` map (never the indicator's
own colours, which would read as a photo); pixels with no valid pH are grey.
Categorical colours use the Okabe-Ito colour-blind-safe palette.
"""

from __future__ import annotations

from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402

from coupon.io.atomic import save_figure  # noqa: E402

from coupon.report.palette import NO_DATA_GREY, PALETTE, PH_CMAP  # noqa: E402, F401 - re-exported


def ph_colormap():
    return plt.get_cmap(PH_CMAP).with_extremes(bad=NO_DATA_GREY)


def ph_figure(ph: np.ndarray, dest: str | Path, title: str = "", ph_range: tuple[float, float] = (3.0, 11.0),
              px_per_mm: float | None = None, contours: dict | None = None, max_side_px: int = 1600) -> Path:
    """Write a pH map with a colour bar (and optional outlines) as PNG.

    ``contours`` maps a label to a boolean mask to outline.  Large maps are
    shown decimated to ``max_side_px`` (the TIFF keeps every pixel).
    """
    step = max(1, int(np.ceil(max(ph.shape) / max_side_px)))
    shown = ph[::step, ::step]
    h, w = shown.shape
    fig, ax = plt.subplots(figsize=(7.5, 7.5 * h / w + 0.6), dpi=120, layout="constrained")
    extent = None
    if px_per_mm:
        extent = (0, ph.shape[1] / px_per_mm, ph.shape[0] / px_per_mm, 0)
        ax.set_xlabel("x (mm)")
        ax.set_ylabel("y (mm)")
    else:
        ax.set_xlabel("x (px)")
        ax.set_ylabel("y (px)")
    im = ax.imshow(np.ma.masked_invalid(shown), cmap=ph_colormap(), vmin=ph_range[0], vmax=ph_range[1],
                   extent=extent, interpolation="nearest")
    for k, (label, mask) in enumerate((contours or {}).items()):
        ax.contour(mask[::step, ::step].astype(float), levels=[0.5], colors=[PALETTE[(k + 3) % len(PALETTE)]],
                   linewidths=1.2, extent=extent, origin="upper" if extent is None else "upper")
        ax.plot([], [], color=PALETTE[(k + 3) % len(PALETTE)], label=label)
    if contours:
        ax.legend(loc="upper right", fontsize=8, framealpha=0.8)
    cb = fig.colorbar(im, ax=ax, shrink=0.85)
    cb.set_label("pH (grey: not indicator colour)")
    if title:
        ax.set_title(title, fontsize=10)
    return save_figure(fig, dest)
