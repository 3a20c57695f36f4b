"""Pictures of a droplet time-lapse: per-frame pH map, montage, kymograph, zone areas.

pH uses the shared perceptual map (:func:`coupon.report.figures.ph_colormap`,
matplotlib's viridis; grey where there is no valid pH); lines and zones use the
Okabe-Ito palette (:data:`coupon.report.figures.PALETTE`).

The per-frame picture is drawn with OpenCV (viridis applied as matplotlib's own
256-entry table, outlines with ``cv2.drawContours``, colour bar and labels with
``cv2.putText``): it is made for every frame of a long series, where a
matplotlib figure per frame would cost several times the analysis.  The series
figures (montage, kymograph, zone areas) are made once and use matplotlib.
"""

from __future__ import annotations

import functools
from pathlib import Path

import cv2
import matplotlib
import matplotlib.colors as mcolors
import numpy as np

from coupon.io.atomic import atomic_path, defer, save_figure
from coupon.report.figures import NO_DATA_GREY, PALETTE, PH_CMAP, ph_colormap, plt

ZONE_COLOURS = {"acidic": PALETTE[3], "neutral": PALETTE[2], "basic": PALETTE[0], "rust": PALETTE[1],
                "drop": PALETTE[7]}


def zone_masks(ph_map: np.ndarray, drop: np.ndarray, acidic_below: float, basic_above: float,
               smooth_px: float = 1.5) -> dict[str, np.ndarray]:
    """Smoothed acidic and basic zone masks for outlining (the numbers use the raw pixels)."""
    # both masks as the two channels of one image: one blur pass (the filter works on each channel alone)
    both = np.empty(ph_map.shape + (2,), np.float32)
    with np.errstate(invalid="ignore"):
        np.logical_and(ph_map < acidic_below, drop, out=both[..., 0], casting="unsafe")
        np.logical_and(ph_map > basic_above, drop, out=both[..., 1], casting="unsafe")
    f = cv2.GaussianBlur(both, (0, 0), smooth_px).reshape(both.shape)
    return {"acidic": f[..., 0] > 0.5, "basic": f[..., 1] > 0.5}


#: Per-frame picture: the map is enlarged (never reduced) to about this longest side (px).  The PNG
#: encoding dominates the picture's cost and grows with its pixel count.
FRAME_MAP_SIDE_PX = 540
_FONT = cv2.FONT_HERSHEY_SIMPLEX
_INK = (30, 30, 30)
_PAPER = (255, 255, 255)


def _rgb255(colour) -> tuple[int, int, int]:
    r, g, b = (round(255 * c) for c in mcolors.to_rgb(colour))
    return r, g, b


@functools.lru_cache(maxsize=4)
def ph_lut_u8(cmap_name: str = PH_CMAP) -> np.ndarray:
    """(256, 3) uint8 table of the pH colour map (matplotlib's own colours, sampled at its 256 levels)."""
    return np.round(255 * matplotlib.colormaps[cmap_name](np.arange(256))[:, :3]).astype(np.uint8)


@functools.lru_cache(maxsize=1)
def _ph_lut_with_grey() -> np.ndarray:
    return np.vstack([ph_lut_u8(), np.array([_rgb255(NO_DATA_GREY)], np.uint8)])


def colourise_ph(ph: np.ndarray, ph_range: tuple[float, float]) -> np.ndarray:
    """pH map to uint8 RGB with the pH colour map; NaN is grey (``NO_DATA_GREY``).

    Level ``floor(256 * (ph - lo) / (hi - lo))`` clipped to 0..255, which is
    how matplotlib's ``Normalize`` + 256-entry colour map pick a colour.
    """
    lo, hi = float(ph_range[0]), float(ph_range[1])
    x = (np.asarray(ph, np.float32) - np.float32(lo)) * np.float32(256.0 / (hi - lo))
    invalid = ~np.isfinite(x)
    np.clip(x, 0.0, 255.0, out=x)
    x[invalid] = 256.0  # the grey entry
    return np.take(_ph_lut_with_grey(), x.astype(np.uint16), axis=0)  # truncation = floor for x >= 0


def _fit(text: str, width_px: int, scale: float = 0.5, smallest: float = 0.35) -> tuple[str, float]:
    """Text and font scale that fit ``width_px``: a smaller font first, then the end cut off with '...'."""
    while scale > smallest and _text_size(text, scale)[0] > width_px:
        scale = round(scale - 0.05, 2)
    while len(text) > 4 and _text_size(text, scale)[0] > width_px:
        text = text[:-4] + "..."
    return text, scale


def _text(img, text, org_xy, scale=0.45, colour=_INK, thickness=1):
    # Hershey fonts are ASCII only: anything else shows as '?'
    safe = text.encode("ascii", "replace").decode("ascii")
    cv2.putText(img, safe, (int(org_xy[0]), int(org_xy[1])), _FONT, scale, colour, thickness, cv2.LINE_AA)


def _text_size(text, scale=0.45, thickness=1) -> tuple[int, int]:
    (w, h), base = cv2.getTextSize(text.encode("ascii", "replace").decode("ascii"), _FONT, scale, thickness)
    return w, h + base


def _nice_length_mm(span_mm: float) -> float:
    """A round scale-bar length of about a fifth of the span (1, 2 or 5 x 10^k mm)."""
    target = max(span_mm / 5.0, 1e-6)
    k = 10.0 ** np.floor(np.log10(target))
    return float(min((1, 2, 5, 10), key=lambda m: abs(m * k - target)) * k)


def frame_figure(ph_map: np.ndarray, drop: np.ndarray, rust: np.ndarray, dest: str | Path, *, title: str,
                 px_per_mm: float, acidic_below: float, basic_above: float,
                 ph_range: tuple[float, float]) -> Path:
    """pH map of one frame (the drop's crop) with colour bar, scale bar and outlines of drop, zones and rust.

    Drawn with OpenCV (one frame costs a few milliseconds); the colours are
    matplotlib's viridis as a 256-entry table, so it matches the series
    figures, which matplotlib draws.
    """
    # Drawing and encoding both run on the writer thread when the command has a background writer active
    # (:class:`coupon.io.atomic.BackgroundWrites`), so the analysis of the next frame does not wait for them.
    # The thread gets its own copies of the three small arrays (about 0.1 ms): whatever the caller does
    # with the frame's arrays afterwards cannot change a picture that is drawn later.
    kw = {"title": str(title), "px_per_mm": float(px_per_mm), "acidic_below": float(acidic_below),
          "basic_above": float(basic_above), "ph_range": (float(ph_range[0]), float(ph_range[1]))}
    rust_copy = None if rust is None else np.array(rust, dtype=bool)
    return defer(dest, _draw_and_write, dest, np.array(ph_map, dtype=np.float32), np.array(drop, dtype=bool),
                 rust_copy, kw)


def _draw_and_write(dest: str | Path, ph_map: np.ndarray, drop: np.ndarray, rust: np.ndarray | None,
                    kw: dict) -> Path:
    """:func:`frame_picture` then :func:`write_png_fast` (the job :func:`frame_figure` hands to the writer)."""
    return write_png_fast(dest, frame_picture(ph_map, drop, rust, **kw))


def write_png_fast(dest: str | Path, rgb_u8: np.ndarray) -> Path:
    """Write a uint8 RGB picture as PNG, atomically, tuned for speed on flat-coloured pictures.

    Fastest zlib level without row filters: about 40 % of the time of OpenCV's
    default (adaptive filters) for a map picture, and a smaller file (flat
    colours compress well as they are).
    """
    params = [cv2.IMWRITE_PNG_COMPRESSION, 1]
    if hasattr(cv2, "IMWRITE_PNG_FILTER"):
        params += [cv2.IMWRITE_PNG_FILTER, cv2.IMWRITE_PNG_FILTER_NONE]
    ok, buf = cv2.imencode(".png", cv2.cvtColor(np.ascontiguousarray(rgb_u8), cv2.COLOR_RGB2BGR), params)
    if not ok:
        raise OSError(f"{dest}: could not encode PNG")
    with atomic_path(dest) as tmp:
        tmp.write_bytes(buf.tobytes())
    return Path(dest)


@functools.lru_cache(maxsize=8)
def _colour_strip(height_px: int, width_px: int, lo: float, hi: float) -> np.ndarray:
    """The colour bar's strip (top = high pH); kept per size and range, as a series repeats them.

    Read-only: it is pasted into each page, never drawn on.
    """
    levels = np.linspace(hi, lo, height_px)
    strip = colourise_ph(levels[:, None].repeat(width_px, axis=1), (lo, hi))
    strip.flags.writeable = False
    return strip


@functools.lru_cache(maxsize=1)
def _bar_label() -> np.ndarray:
    """The colour bar's label written sideways (read-only, made once)."""
    label = "pH (grey: not indicator colour)"
    lw, lh = _text_size(label, 0.45)
    lab_img = np.full((lh + 6, lw + 4, 3), 255, np.uint8)
    _text(lab_img, label, (2, lh), 0.45)
    lab_img = np.ascontiguousarray(cv2.rotate(lab_img, cv2.ROTATE_90_COUNTERCLOCKWISE))
    lab_img.flags.writeable = False
    return lab_img


def frame_picture(ph_map: np.ndarray, drop: np.ndarray, rust: np.ndarray, *, title: str, px_per_mm: float,
                  acidic_below: float, basic_above: float, ph_range: tuple[float, float]) -> np.ndarray:
    """The picture of :func:`frame_figure` as (M, N, 3) uint8 RGB."""
    h, w = ph_map.shape
    side = max(h, w)
    zoom = max(1.0, FRAME_MAP_SIDE_PX / side)
    zw, zh = round(w * zoom), round(h * zoom)
    shown = colourise_ph(ph_map, ph_range)
    z = zone_masks(ph_map, drop, acidic_below, basic_above)
    # (label, mask, colour, line width): the drop edge last and thin, so it shows on top of a zone outline
    outlines = [(f"acidic (pH < {acidic_below:g})", z["acidic"], ZONE_COLOURS["acidic"], 2),
                (f"basic (pH > {basic_above:g})", z["basic"], ZONE_COLOURS["basic"], 2),
                ("rust", rust, ZONE_COLOURS["rust"], 2),
                ("drop edge", drop, ZONE_COLOURS["drop"], 1)]
    if (zw, zh) != (w, h):
        shown = cv2.resize(shown, (zw, zh), interpolation=cv2.INTER_NEAREST)
    shown = np.ascontiguousarray(shown)
    drawn = []
    for label, mask, colour, width in outlines:
        if mask is None or not mask.any():
            continue
        contours, _ = cv2.findContours(mask.astype(np.uint8), cv2.RETR_LIST, cv2.CHAIN_APPROX_SIMPLE)
        # pixel centres of the zoomed picture
        scaled = [np.rint((c + 0.5) * (zw / w, zh / h) - 0.5).astype(np.int32) for c in contours]
        cv2.drawContours(shown, scaled, -1, _rgb255(colour), width, cv2.LINE_8)
        drawn.append((label, colour))
    drawn = drawn[-1:] + drawn[:-1] if drawn and drawn[-1][0] == "drop edge" else drawn
    mh, mw = shown.shape[:2]

    # scale bar in the map's lower left corner
    px_per_mm_shown = px_per_mm * zw / w
    if np.isfinite(px_per_mm_shown) and px_per_mm_shown > 0:
        bar_mm = _nice_length_mm(mw / px_per_mm_shown)
        bar_px = round(bar_mm * px_per_mm_shown)
        x0, y0 = 12, mh - 14
        cv2.rectangle(shown, (x0 - 6, y0 - 22), (x0 + bar_px + 6, y0 + 7), _PAPER, -1)
        cv2.rectangle(shown, (x0, y0 - 2), (x0 + bar_px, y0 + 2), _INK, -1)
        _text(shown, f"{bar_mm:g} mm", (x0, y0 - 7), 0.42)

    # page: title above, colour bar right, legend below
    title_h, margin, bar_w = 34, 12, 22
    tick_w = _text_size("00.0")[0] + 10
    label_w = 24
    legend_h = 26 if drawn else 0
    ph_h = title_h + mh + legend_h + margin
    ph_w = margin + mw + margin + bar_w + tick_w + label_w + margin
    page = np.full((ph_h, max(ph_w, 200), 3), 255, np.uint8)
    page[title_h:title_h + mh, margin:margin + mw] = shown
    cv2.rectangle(page, (margin - 1, title_h - 1), (margin + mw, title_h + mh), _INK, 1)
    fitted, scale = _fit(title, page.shape[1] - 2 * margin)
    _text(page, fitted, (margin, 22), scale)

    lo, hi = float(ph_range[0]), float(ph_range[1])
    bx = margin + mw + margin
    page[title_h:title_h + mh, bx:bx + bar_w] = _colour_strip(mh, bar_w, lo, hi)
    cv2.rectangle(page, (bx - 1, title_h - 1), (bx + bar_w, title_h + mh), _INK, 1)
    step = 1.0 if hi - lo <= 10 else 2.0
    for t in np.arange(np.ceil(lo / step) * step, hi + 1e-9, step):
        y = title_h + round((hi - t) / (hi - lo) * (mh - 1))
        cv2.line(page, (bx + bar_w, y), (bx + bar_w + 4, y), _INK, 1)
        _text(page, f"{t:g}", (bx + bar_w + 7, y + 5), 0.42)
    # the colour bar's label, written sideways
    lab_img = _bar_label()
    lx = bx + bar_w + tick_w
    ly = title_h + max(0, (mh - lab_img.shape[0]) // 2)
    hh = min(lab_img.shape[0], ph_h - ly)
    ww = min(lab_img.shape[1], page.shape[1] - lx)
    page[ly:ly + hh, lx:lx + ww] = lab_img[:hh, :ww]

    # legend of the outlines
    x, y = margin, title_h + mh + 18
    for label, colour in drawn:
        cv2.line(page, (x, y - 4), (x + 22, y - 4), _rgb255(colour), 3, cv2.LINE_AA)
        _text(page, label, (x + 28, y), 0.42)
        x += 28 + _text_size(label, 0.42)[0] + 18
    return page


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
