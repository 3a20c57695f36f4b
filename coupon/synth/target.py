"""Synthetic photos of the printed target under perspective, with ground truth."""

from __future__ import annotations

import cv2
import numpy as np

from coupon.calibrate.target import TargetLayout
from coupon.synth import common


def target_scene(
    seed: int = 0, image_wh: tuple[int, int] = (1600, 1200), px_per_mm: float = 12.0,
    tilt_x_deg: float = 0.0, tilt_y_deg: float = 0.0, roll_deg: float = 0.0,
    layout: TargetLayout | None = None, cast=(1.0, 1.0, 1.0), light: float = 0.15,
    noise: float = 0.01, jpeg_quality: int | None = 90,
) -> tuple[np.ndarray, dict]:
    """A photo of the printed target on a desk.

    Ground truth: ``hom_mm_to_img`` (sheet mm -> image px), ``px_per_mm`` (areal
    scale of the board's inner-corner rectangle in the image), the board's
    inner-corner positions in the image, and the colour cast applied.
    """
    rng = common.rng_for(seed)
    layout = layout or TargetLayout()
    plane_res = max(8.0, px_per_mm * 1.5)
    sheet = layout.raster(plane_res)
    hom = common.camera_homography(layout.sheet_size_mm, image_wh, px_per_mm, tilt_x_deg, tilt_y_deg, roll_deg)
    bg = common.desk_background((image_wh[1], image_wh[0]), rng)
    img, _ = common.render_plane(sheet, plane_res, hom, image_wh, bg)
    img = common.apply_light(img, common.lighting_field(img.shape[:2], light, angle_deg=rng.uniform(0, 360)))
    if tuple(cast) != (1.0, 1.0, 1.0):
        img = _apply_cast(img, cast)
    img = common.sensor_noise(img, rng, noise)
    if jpeg_quality:
        img = common.jpeg_roundtrip(img, jpeg_quality)
    cols, rows = layout.squares
    ox, oy = layout.first_inner_corner_mm
    s = layout.square_mm
    jj, ii = np.meshgrid(np.arange(cols - 1), np.arange(rows - 1))
    corners_mm = np.column_stack([ox + jj.ravel() * s, oy + ii.ravel() * s])
    corners_img = cv2.perspectiveTransform(corners_mm.reshape(-1, 1, 2), hom).reshape(-1, 2)
    grid = corners_img.reshape(rows - 1, cols - 1, 2)
    outer = np.array([grid[0, 0], grid[0, -1], grid[-1, -1], grid[-1, 0]], dtype=np.float32)
    area_px = abs(cv2.contourArea(outer.reshape(-1, 1, 2)))
    area_mm = (cols - 2) * (rows - 2) * s * s
    truth = {
        "hom_mm_to_img": hom,
        "px_per_mm": float(np.sqrt(area_px / area_mm)),
        "corners_img_xy": corners_img,
        "first_inner_corner_mm": (ox, oy),
        "cast": cast,
        "layout": layout,
    }
    return img, truth


def _apply_cast(rgb: np.ndarray, cast) -> np.ndarray:
    from coupon.calibrate import colourspace as cs

    lin = cs.srgb_to_linear(rgb) * np.asarray(cast)
    return np.clip(cs.linear_to_srgb(np.clip(lin, 0, 1)), 0, 1).astype(np.float32)
