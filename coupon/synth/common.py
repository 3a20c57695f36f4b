"""Building blocks shared by all synthetic scenes: camera, light, sensor, codec."""

from __future__ import annotations

import cv2
import numpy as np
from scipy import ndimage as ndi

from coupon.calibrate import colourspace as cs
from coupon.calibrate.scale import warp_perspective


def rng_for(seed: int) -> np.random.Generator:
    return np.random.default_rng(seed)


def camera_homography(
    plane_size_mm: tuple[float, float], image_wh: tuple[int, int], px_per_mm: float,
    tilt_x_deg: float = 0.0, tilt_y_deg: float = 0.0, roll_deg: float = 0.0, focal_px: float | None = None,
    centre_offset_px: tuple[float, float] = (0.0, 0.0),
) -> np.ndarray:
    """Homography plane (mm) -> image (px) of a pinhole camera looking at a tilted plane.

    The plane's centre lands at the image centre (plus an offset) and the scale
    there is about ``px_per_mm``.
    """
    w, h = image_wh
    f = focal_px if focal_px is not None else 1.2 * max(w, h)
    dist_mm = f / px_per_mm
    ax, ay, az = np.deg2rad([tilt_x_deg, tilt_y_deg, roll_deg])
    rx = np.array([[1, 0, 0], [0, np.cos(ax), -np.sin(ax)], [0, np.sin(ax), np.cos(ax)]])
    ry = np.array([[np.cos(ay), 0, np.sin(ay)], [0, 1, 0], [-np.sin(ay), 0, np.cos(ay)]])
    rz = np.array([[np.cos(az), -np.sin(az), 0], [np.sin(az), np.cos(az), 0], [0, 0, 1]])
    rot = rz @ ry @ rx
    pw, ph = plane_size_mm
    centre = np.array([pw / 2, ph / 2, 0.0])
    t = np.array([0.0, 0.0, dist_mm]) - rot @ centre
    k = np.array([[f, 0, w / 2 + centre_offset_px[0]], [0, f, h / 2 + centre_offset_px[1]], [0, 0, 1]])
    hom = k @ np.column_stack([rot[:, 0], rot[:, 1], t])
    return hom / hom[2, 2]


def render_plane(
    plane_rgb: np.ndarray, plane_px_per_mm: float, hom_mm_to_img: np.ndarray, image_wh: tuple[int, int],
    background: np.ndarray,
) -> tuple[np.ndarray, np.ndarray]:
    """Project a plane picture (rendered at ``plane_px_per_mm``) into the image over ``background``.

    Returns the image and the coverage mask (float, 1 inside the plane).
    """
    s = plane_px_per_mm
    # plane pixel (u, v) centre is at mm ((u + 0.5) / s, (v + 0.5) / s)
    planepx_to_mm = np.array([[1 / s, 0, 0.5 / s], [0, 1 / s, 0.5 / s], [0, 0, 1]])
    m = hom_mm_to_img @ planepx_to_mm
    warped = warp_perspective(plane_rgb, m, image_wh, flags=cv2.INTER_AREA | cv2.INTER_LINEAR,
                              border=cv2.BORDER_CONSTANT)
    ones = np.ones(plane_rgb.shape[:2], np.float32)
    cover = warp_perspective(ones, m, image_wh, flags=cv2.INTER_LINEAR, border=cv2.BORDER_CONSTANT)
    out = warped + background * (1 - cover[..., None])
    return out.astype(np.float32), cover


def lighting_field(shape_rc: tuple[int, int], strength: float, angle_deg: float = 30.0,
                   vignette: float = 0.1) -> np.ndarray:
    """Multiplicative light field: a linear gradient of +/- strength plus a radial fall-off."""
    rows, cols = shape_rc
    y, x = np.mgrid[0:rows, 0:cols].astype(np.float32)
    x = (x - cols / 2) / (max(rows, cols) / 2)
    y = (y - rows / 2) / (max(rows, cols) / 2)
    a = np.deg2rad(angle_deg)
    field = 1.0 + strength * (np.cos(a) * x + np.sin(a) * y) - vignette * (x * x + y * y)
    return field.astype(np.float32)


def apply_light(rgb: np.ndarray, field: np.ndarray) -> np.ndarray:
    """Multiply linear light by a field (the light falls on the scene, not on the sRGB code)."""
    lin = cs.srgb_to_linear(rgb) * field[..., None]
    return np.clip(cs.linear_to_srgb(np.clip(lin, 0, 1)), 0, 1).astype(np.float32)


def sensor_noise(rgb: np.ndarray, rng: np.random.Generator, sigma: float = 0.01) -> np.ndarray:
    noise = rng.normal(0.0, sigma, rgb.shape).astype(np.float32)
    return np.clip(rgb + noise, 0, 1)


#: OpenCV's JPEG chroma sampling settings by J:a:b name.
JPEG_CHROMA = {"4:2:0": cv2.IMWRITE_JPEG_SAMPLING_FACTOR_420, "4:2:2": cv2.IMWRITE_JPEG_SAMPLING_FACTOR_422,
               "4:4:4": cv2.IMWRITE_JPEG_SAMPLING_FACTOR_444}


def jpeg_roundtrip(rgb: np.ndarray, quality: int = 90, chroma: str = "4:2:0") -> np.ndarray:
    """Encode and decode as JPEG (OpenCV codec); ``chroma``: sampling, 4:2:0 as most cameras save."""
    u8 = cv2.cvtColor(np.clip(np.rint(rgb * 255), 0, 255).astype(np.uint8), cv2.COLOR_RGB2BGR)
    params = [cv2.IMWRITE_JPEG_QUALITY, int(quality)]
    if chroma != "4:2:0":  # OpenCV's default
        params += [cv2.IMWRITE_JPEG_SAMPLING_FACTOR, JPEG_CHROMA[chroma]]
    ok, buf = cv2.imencode(".jpg", u8, params)
    assert ok
    return cv2.cvtColor(cv2.imdecode(buf, cv2.IMREAD_COLOR), cv2.COLOR_BGR2RGB).astype(np.float32) / 255.0


def encode_jpeg(rgb: np.ndarray, quality: int = 92) -> bytes:
    u8 = cv2.cvtColor(np.clip(np.rint(rgb * 255), 0, 255).astype(np.uint8), cv2.COLOR_RGB2BGR)
    ok, buf = cv2.imencode(".jpg", u8, [cv2.IMWRITE_JPEG_QUALITY, int(quality)])
    assert ok
    return buf.tobytes()


def metal_texture(shape_rc: tuple[int, int], rng: np.random.Generator, base: float = 0.55,
                  brushed: float = 0.04, grain: float = 0.02, tint=(1.0, 1.0, 1.02)) -> np.ndarray:
    """Grey steel: fine grain plus horizontal brushing streaks, float32 sRGB."""
    rows, cols = shape_rc
    streak = ndi.gaussian_filter1d(rng.normal(0, 1, rows), 1.5).astype(np.float32).reshape(rows, 1)
    fine = cv2.GaussianBlur(rng.normal(0, 1, (rows, cols)).astype(np.float32), (0, 0), 1.0)
    lum = base + brushed * streak + grain * fine
    rgb = np.clip(lum[..., None] * np.asarray(tint, np.float32), 0, 1)
    return rgb.astype(np.float32)


def desk_background(shape_rc: tuple[int, int], rng: np.random.Generator, colour=(0.32, 0.30, 0.28)) -> np.ndarray:
    rows, cols = shape_rc
    n = cv2.GaussianBlur(rng.normal(0, 1, (rows, cols)).astype(np.float32), (0, 0), 3.0)
    return np.clip(np.asarray(colour, np.float32) * (1 + 0.05 * n[..., None]), 0, 1).astype(np.float32)
