"""Campaign figures: ratings against exposure time, time to failure, droplet zones and kymographs, pits.

Every function takes DataFrames shaped as in :mod:`coupon.campaign.timeline` and
returns an open matplotlib Figure (the HTML report turns it into an embedded PNG,
the PDF report into a page).  Colours come from :data:`coupon.report.figures.PALETTE`
(Okabe-Ito, colour-blind safe), one fixed colour per coating system across every
figure; pH uses the shared perceptual colour map.  Axis labels carry units.
"""

from __future__ import annotations

import io
import math
from pathlib import Path

import numpy as np
import pandas as pd

from coupon.report.figures import PALETTE, ph_colormap, plt

_SYSTEM_COLOURS = PALETTE[:-1]  # black is kept for drop outlines and reference lines

ZONE_STYLE = {  # droplet zone -> (label, colour)
    "acidic_area_mm2": ("acidic (anodic) zone", PALETTE[3]),
    "basic_area_mm2": ("basic (cathodic) zone", PALETTE[0]),
    "rust_area_mm2": ("rust precipitate", PALETTE[1]),
}


def system_colours(systems) -> dict[str, str]:
    """One colour per system, stable for the whole report (sorted system names)."""
    names = sorted({str(s) for s in systems})
    return {s: _SYSTEM_COLOURS[i % len(_SYSTEM_COLOURS)] for i, s in enumerate(names)}


def figure_png(fig, dpi: int = 110) -> bytes:
    """PNG bytes of a figure (and close it)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi)
    plt.close(fig)
    return buf.getvalue()


def rating_figure(series: pd.DataFrame, by_system: pd.DataFrame, metric: str, label: str,
                  colours: dict[str, str]):
    """One rating against exposure time: system mean (line), min-max over replicates (band), replicates (dots)."""
    fig, ax = plt.subplots(figsize=(7.0, 4.0), dpi=110, layout="constrained")
    agg = by_system[by_system["metric"] == metric]
    for sysname, g in agg.groupby("system"):
        g = g.sort_values("exposure_h")
        col = colours.get(str(sysname), PALETTE[-1])
        ax.fill_between(g["exposure_h"], g["min"], g["max"], color=col, alpha=0.18, linewidth=0)
        ax.plot(g["exposure_h"], g["mean"], "-o", color=col, ms=4, label=f"{sysname} (mean, band min-max)")
        pts = series[(series["system"] == sysname) & series[metric].notna()]
        ax.plot(pts["exposure_h"], pts[metric], ".", color=col, alpha=0.6, ms=5)
    ax.set_xlabel("exposure time (h)")
    ax.set_ylabel(label)
    if metric in ("rust_grade",):
        ax.set_ylim(-0.5, 10.5)
    ax.grid(alpha=0.3)
    if len(agg):
        ax.legend(fontsize=8, loc="best")
    ax.set_title(f"{label} against exposure time", fontsize=10)
    return fig


def ttf_figure(ttf: pd.DataFrame, colours: dict[str, str]):
    """Time to failure per specimen: the interval (last passing, first failing], the estimate as a dot.

    Specimens that never failed show an arrow from their last inspection (censored).
    """
    n = max(len(ttf), 1)
    fig, ax = plt.subplots(figsize=(7.0, 1.2 + 0.32 * n), dpi=110, layout="constrained")
    labels = []
    right = float(pd.to_numeric(ttf["last_h"], errors="coerce").max()) if len(ttf) else 1.0
    right = right if math.isfinite(right) and right > 0 else 1.0
    for i, r in enumerate(ttf.itertuples(index=False)):
        col = colours.get(str(r.system), PALETTE[-1])
        labels.append(f"{r.specimen_id} ({r.system})")
        if r.failed:
            lo = 0.0 if not math.isfinite(r.ttf_low_h) else r.ttf_low_h
            ax.plot([lo, r.ttf_high_h], [i, i], "-", color=col, lw=4, alpha=0.45, solid_capstyle="butt")
            ax.plot([r.ttf_h], [i], "o", color=col, ms=6)
        else:
            ax.annotate("", xy=(right * 1.08, i), xytext=(r.last_h, i),
                        arrowprops={"arrowstyle": "->", "color": col, "lw": 1.5})
    ax.set_yticks(range(len(labels)), labels, fontsize=8)
    ax.set_ylim(-0.8, n - 0.2)
    ax.invert_yaxis()
    ax.set_xlim(0, right * 1.12)
    ax.set_xlabel("exposure time (h): bar = (last passing, first failing], dot = interpolated; arrow = not failed")
    ax.grid(axis="x", alpha=0.3)
    ax.set_title("time to failure", fontsize=10)
    return fig


def droplet_zone_figure(frames: pd.DataFrame, title: str):
    """Zone areas (mm2) and the drop area against time (min) for one droplet series."""
    d = frames.sort_values("t_min")
    t = pd.to_numeric(d["t_min"], errors="coerce")
    fig, ax = plt.subplots(figsize=(7.0, 3.8), dpi=110, layout="constrained")
    for col, (label, colour) in ZONE_STYLE.items():
        ax.plot(t, pd.to_numeric(d[col], errors="coerce"), "-o", ms=3, color=colour, label=label)
    ax.plot(t, pd.to_numeric(d["drop_area_mm2"], errors="coerce"), "--", color=PALETTE[-1], label="whole drop")
    ax.set_xlabel("time since the drop was placed (min)")
    ax.set_ylabel("area (mm\u00b2)")
    ax.grid(alpha=0.3)
    ax.legend(fontsize=8)
    ax.set_title(title, fontsize=10)
    return fig


def kymograph_figure(radial: pd.DataFrame, title: str, ph_range: tuple[float, float] = (3.0, 11.0)):
    """Radial pH profile against time: time on x, normalised radius on y (0 centre, 1 edge)."""
    grid = radial.pivot_table(index="r_norm", columns="t_min", values="ph_median", aggfunc="median")
    grid = grid.sort_index().sort_index(axis=1)
    t = grid.columns.to_numpy(float)
    r = grid.index.to_numpy(float)
    fig, ax = plt.subplots(figsize=(7.0, 3.8), dpi=110, layout="constrained")
    te = _edges(t)
    re_ = _edges(r)
    mesh = ax.pcolormesh(te, re_, np.ma.masked_invalid(grid.to_numpy(float)), cmap=ph_colormap(),
                         vmin=ph_range[0], vmax=ph_range[1], shading="flat")
    cb = fig.colorbar(mesh, ax=ax)
    cb.set_label("median pH in ring (grey: no indicator colour)")
    ax.set_xlabel("time since the drop was placed (min)")
    ax.set_ylabel("radius / drop radius (0 centre, 1 edge)")
    ax.set_title(title, fontsize=10)
    return fig


def _edges(v: np.ndarray) -> np.ndarray:
    """Cell edges around sorted centres (half-way between neighbours)."""
    if len(v) == 1:
        return np.array([v[0] - 0.5, v[0] + 0.5])
    mid = (v[:-1] + v[1:]) / 2
    return np.concatenate([[v[0] - (mid[0] - v[0])], mid, [v[-1] + (v[-1] - mid[-1])]])


def pit_histogram_figure(pits: pd.DataFrame, title: str):
    """Histogram of pit opening areas (mm2, logarithmic bins)."""
    a = pd.to_numeric(pits["area_mm2"], errors="coerce").to_numpy(float)
    a = a[np.isfinite(a) & (a > 0)]
    fig, ax = plt.subplots(figsize=(6.0, 3.4), dpi=110, layout="constrained")
    if len(a):
        lo, hi = a.min(), a.max()
        bins = np.geomspace(lo, hi * 1.0001, 15) if hi > lo else np.array([lo * 0.9, lo * 1.1])
        ax.hist(a, bins=bins, color=PALETTE[0], edgecolor="white")
        ax.set_xscale("log")
    ax.set_xlabel("pit opening area (mm\u00b2, log scale)")
    ax.set_ylabel("pits (count)")
    ax.set_title(title, fontsize=10)
    ax.grid(alpha=0.3)
    return fig


def coupon_figure(coupons: pd.DataFrame, colours: dict[str, str]):
    """Pit density (pits/m2) and corrosion rate (mm/y) per coupon, coloured by system."""
    fig, (a1, a2) = plt.subplots(1, 2, figsize=(8.0, 3.4), dpi=110, layout="constrained")
    names = coupons["specimen_id"].astype(str).tolist()
    cols = [colours.get(str(s), PALETTE[-1]) for s in coupons["system"]]
    x = np.arange(len(names))
    a1.bar(x, pd.to_numeric(coupons["density_per_m2"], errors="coerce").fillna(0), color=cols)
    a1.set_ylabel("pit density (pits/m\u00b2)")
    a2.bar(x, pd.to_numeric(coupons["corrosion_rate_mm_y"], errors="coerce").fillna(0), color=cols)
    a2.set_ylabel("corrosion rate from mass loss (mm/y)")
    for a in (a1, a2):
        a.set_xticks(x, names, rotation=30, ha="right", fontsize=8)
        a.set_xlabel("coupon")
        a.grid(axis="y", alpha=0.3)
    fig.suptitle("pits per coupon (empty bar: not measured)", fontsize=10)
    return fig


def gallery_figure(pictures: list[tuple[np.ndarray | None, str]], title: str, ncols: int = 5):
    """A row (or grid) of pictures with captions, for the PDF gallery; None shows 'missing'."""
    n = max(len(pictures), 1)
    ncols = min(ncols, n)
    nrows = int(math.ceil(n / ncols))
    fig, axes = plt.subplots(nrows, ncols, figsize=(2.2 * ncols + 0.4, 2.9 * nrows + 0.5), dpi=110,
                             layout="constrained", squeeze=False)
    for ax in axes.ravel():
        ax.axis("off")
    for ax, (img, caption) in zip(axes.ravel(), pictures):
        if img is None:
            ax.text(0.5, 0.5, "picture\nnot found", ha="center", va="center", fontsize=8)
        else:
            ax.imshow(img)
        ax.set_title(caption, fontsize=8)
    fig.suptitle(title, fontsize=10)
    return fig


def load_picture(path: Path | None, max_side_px: int = 360) -> np.ndarray | None:
    """A downsized RGB uint8 array of a picture file, or None if it cannot be read."""
    if path is None:
        return None
    from PIL import Image

    try:
        with Image.open(path) as im:
            im = im.convert("RGB")
            im.thumbnail((max_side_px, max_side_px))
            return np.asarray(im)
    except (OSError, ValueError):
        return None
