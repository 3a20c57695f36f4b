"""The printable calibration target: a checkerboard flanked by neutral grey strips.

Design (our own): an odd x odd checkerboard (default 9 x 7 squares of 5 mm),
one square of white margin, a strip of four neutral patches above the board and
the same strip, reversed, below it, and a 50 mm check bar.  Because the board
and the strips are symmetric under a half turn, the grey patches sit at the
same board coordinates whichever way round the detector reads the corners.

All geometry is in millimetres on the sheet; "board coordinates" have their
origin at the first inner corner of the checkerboard (where OpenCV's corner
list starts), x along the columns, y along the rows.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

#: Grey levels (sRGB-encoded fraction) of the four neutral patches, top strip, left to right.
NEUTRAL_LEVELS = (0.95, 0.75, 0.45, 0.20)
#: Which patch white balance reads (light grey: bright but not clipped).
WHITE_BALANCE_PATCH = 1


@dataclass(frozen=True)
class TargetLayout:
    squares: tuple[int, int] = (9, 7)
    square_mm: float = 5.0
    margin_mm: float = 15.0
    strip_mm: float = 8.0
    bar_mm: float = 50.0

    def __post_init__(self):
        cols, rows = self.squares
        if cols < 3 or rows < 3 or cols % 2 == 0 or rows % 2 == 0:
            raise ValueError(
                f"the target uses an odd number of squares each way (e.g. 9x7) so that it reads the same "
                f"turned round; got {cols}x{rows}"
            )
        if self.square_mm <= 0:
            raise ValueError(f"square size must be positive, got {self.square_mm} mm")

    @property
    def gap_mm(self) -> float:
        return max(5.0, self.square_mm)

    @property
    def board_origin_mm(self) -> tuple[float, float]:
        """Sheet position of the board's outer top-left corner."""
        return self.margin_mm, self.margin_mm + self.strip_mm + self.gap_mm

    @property
    def board_size_mm(self) -> tuple[float, float]:
        return self.squares[0] * self.square_mm, self.squares[1] * self.square_mm

    @property
    def sheet_size_mm(self) -> tuple[float, float]:
        bw, bh = self.board_size_mm
        width = max(bw, self.bar_mm) + 2 * self.margin_mm
        height = self.board_origin_mm[1] + bh + self.gap_mm + self.strip_mm + 30.0
        return width, height

    @property
    def first_inner_corner_mm(self) -> tuple[float, float]:
        x0, y0 = self.board_origin_mm
        return x0 + self.square_mm, y0 + self.square_mm

    def neutral_patches_sheet_mm(self) -> list[tuple[float, float, float, float, float]]:
        """(x, y, w, h, level) of every neutral patch on the sheet, top strip then bottom strip."""
        x0, y0 = self.board_origin_mm
        bw, bh = self.board_size_mm
        w = bw / len(NEUTRAL_LEVELS)
        top_y = y0 - self.gap_mm - self.strip_mm
        bot_y = y0 + bh + self.gap_mm
        top = [(x0 + i * w, top_y, w, self.strip_mm, lv) for i, lv in enumerate(NEUTRAL_LEVELS)]
        bot = [(x0 + i * w, bot_y, w, self.strip_mm, lv) for i, lv in enumerate(reversed(NEUTRAL_LEVELS))]
        return top + bot

    def white_patch_board_mm(self, inset_mm: float = 1.0) -> np.ndarray:
        """Corners (4, 2) of the white-balance patch of the top strip, board coordinates."""
        x, y, w, h, _ = self.neutral_patches_sheet_mm()[WHITE_BALANCE_PATCH]
        ox, oy = self.first_inner_corner_mm
        x, y = x - ox + inset_mm, y - oy + inset_mm
        w, h = w - 2 * inset_mm, h - 2 * inset_mm
        return np.array([[x, y], [x + w, y], [x + w, y + h], [x, y + h]], dtype=np.float64)

    # -- drawing ---------------------------------------------------------
    def figure(self, dpi: float = 300):
        """A matplotlib figure of the sheet at true size (1 data unit = 1 mm)."""
        import matplotlib

        matplotlib.use("Agg", force=False)
        from matplotlib.figure import Figure
        from matplotlib.patches import Rectangle

        sw, sh = self.sheet_size_mm
        fig = Figure(figsize=(sw / 25.4, sh / 25.4), dpi=dpi)
        ax = fig.add_axes((0, 0, 1, 1))
        ax.set_xlim(0, sw)
        ax.set_ylim(sh, 0)
        ax.set_axis_off()
        ax.add_patch(Rectangle((0, 0), sw, sh, facecolor="white", edgecolor="none"))
        x0, y0 = self.board_origin_mm
        s = self.square_mm
        for r in range(self.squares[1]):
            for c in range(self.squares[0]):
                if (r + c) % 2 == 0:
                    ax.add_patch(Rectangle((x0 + c * s, y0 + r * s), s, s, facecolor="black", edgecolor="none",
                                           antialiased=False))
        for x, y, w, h, lv in self.neutral_patches_sheet_mm():
            ax.add_patch(Rectangle((x, y), w, h, facecolor=(lv, lv, lv), edgecolor="none"))
        # check bar: measure it on the print, it must read bar_mm
        bw, bh = self.board_size_mm
        by = y0 + bh + self.gap_mm + self.strip_mm + 8.0
        bx = (sw - self.bar_mm) / 2
        ax.add_patch(Rectangle((bx, by), self.bar_mm, 1.0, facecolor="black", edgecolor="none"))
        for k in range(int(self.bar_mm // 5) + 1):
            ax.add_patch(Rectangle((bx + 5 * k - 0.15, by - (2.0 if k % 2 == 0 else 1.2)), 0.3,
                                   2.0 if k % 2 == 0 else 1.2, facecolor="black", edgecolor="none"))
        cols, rows = self.squares
        ax.text(sw / 2, by + 6.0, f"coupon scale and grey target  |  {cols} x {rows} squares of {s:g} mm",
                ha="center", va="center", fontsize=6, family="DejaVu Sans")
        ax.text(sw / 2, by + 10.5, f"print at 100 % (no fit-to-page); the bar must measure {self.bar_mm:g} mm",
                ha="center", va="center", fontsize=5, family="DejaVu Sans")
        return fig

    def raster(self, px_per_mm: float) -> np.ndarray:
        """The sheet rendered at ``px_per_mm``, float32 sRGB (rows, cols, 3)."""
        from matplotlib.backends.backend_agg import FigureCanvasAgg

        fig = self.figure(dpi=px_per_mm * 25.4)
        canvas = FigureCanvasAgg(fig)
        canvas.draw()
        rgba = np.asarray(canvas.buffer_rgba())
        return (rgba[:, :, :3].astype(np.float32) / 255.0).copy()

    def write(self, stem: str | Path, dpi: int = 600) -> list[Path]:
        """Write ``stem.pdf`` (vector, true scale) and ``stem.png`` (``dpi``, true scale)."""
        from coupon.io.atomic import atomic_path

        stem = Path(stem)
        if stem.suffix.lower() in (".png", ".pdf"):
            stem = stem.with_suffix("")
        out = []
        for suffix in (".pdf", ".png"):
            dest = stem.with_suffix(suffix)
            fig = self.figure(dpi=dpi)
            with atomic_path(dest) as tmp:
                fig.savefig(tmp, dpi=dpi, format=suffix[1:])
            out.append(dest)
        return out


def sample_white_patch(rgb: np.ndarray, homography_px_to_mm: np.ndarray, layout: TargetLayout) -> np.ndarray:
    """Robust sRGB colour of the target's white-balance patch in a photo.

    ``homography_px_to_mm`` maps image px to board mm (as from
    :func:`coupon.calibrate.scale.scale_from_checkerboard`).  The board reads
    the same turned round, so the patch is at the same board coordinates
    either way.
    """
    import cv2

    from coupon.calibrate.colour import robust_colour
    from coupon.errors import CalibrationError

    inv = np.linalg.inv(np.asarray(homography_px_to_mm, dtype=np.float64))
    poly = cv2.perspectiveTransform(layout.white_patch_board_mm().reshape(-1, 1, 2), inv).reshape(-1, 2)
    rows, cols = rgb.shape[:2]
    if poly.min() < 0 or poly[:, 0].max() >= cols or poly[:, 1].max() >= rows:
        raise CalibrationError("the target's grey patch is outside the frame; photograph the whole sheet")
    mask = np.zeros((rows, cols), np.uint8)
    cv2.fillPoly(mask, [np.round(poly).astype(np.int32)], 1)
    px = rgb[mask.astype(bool)]
    if len(px) < 25:
        raise CalibrationError("the target's grey patch is too small in this photo (under 25 px)")
    return robust_colour(px)
