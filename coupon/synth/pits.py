"""Synthetic cleaned coupons with known pits, and their height maps.

A rectangular coupon (axis-aligned, as on a flatbed scanner or a copy stand)
lies on a darker cloth.  Its surface is brushed or ground steel; pits are discs
of random sizes (a few touching pairs, a few near or across the edge band),
rendered with analytic anti-aliasing, darker towards their floor (or with a
bright rim for ``look="bright-rim"``).  A lighting gradient, optical blur,
sensor noise and JPEG follow.  The height map on the same pixel grid has a
tilted, slightly wavy, rough surface and paraboloid pits of known depth; the
table around the coupon lies 3 mm below it.

Everything is invented and seeded: the same seed gives the same pixels.
"""

from __future__ import annotations

import cv2
import numpy as np

from coupon.synth import common

LOOKS = ("dark", "bright-rim")
TEXTURES = ("brushed", "ground")


def _place_pits(rng, coupon_mm, n_pits, radius_mm, touching_pairs, edge_mm, near_edge, gap_mm=0.35):
    """Pit centres (mm, coupon frame) and radii: random, touching pairs, near-edge ones."""
    cw, ch = coupon_mm
    lo, hi = radius_mm
    xs, ys, rs, kinds = [], [], [], []

    def free(x, y, r, ignore=-1, gap=gap_mm):
        for k, (px, py, pr) in enumerate(zip(xs, ys, rs)):
            if k != ignore and np.hypot(x - px, y - py) < r + pr + gap:
                return False
        return True

    # log-uniform radii: many small pits, a few large ones, as on real coupons
    def radius():
        return float(np.exp(rng.uniform(np.log(lo), np.log(hi))))

    tries = 0
    while len(xs) < n_pits and tries < 200 * n_pits:
        tries += 1
        r = radius()
        m = edge_mm + r + 0.6
        x, y = rng.uniform(m, cw - m), rng.uniform(m, ch - m)
        if free(x, y, r):
            xs.append(x), ys.append(y), rs.append(r), kinds.append("single")
    # touching pairs: a partner at 0.93-0.99 of the sum of radii (the openings just merge)
    made, tries = 0, 0
    while made < touching_pairs and tries < 500:
        tries += 1
        k = int(rng.integers(len(xs)))
        if kinds[k] != "single":
            continue
        r2 = radius()
        ang = rng.uniform(0, 2 * np.pi)
        d = (rs[k] + r2) * rng.uniform(0.93, 0.99)
        x2, y2 = xs[k] + d * np.cos(ang), ys[k] + d * np.sin(ang)
        m = edge_mm + r2 + 0.6
        if not (m < x2 < cw - m and m < y2 < ch - m):
            continue
        if not free(x2, y2, r2, ignore=k):
            continue
        # the partner must not come near any third pit either
        kinds[k] = "touching"
        xs.append(x2), ys.append(y2), rs.append(r2), kinds.append("touching")
        made += 1
    # near-edge pits: inside the edge band, or across its inner line (both not counted)
    for j in range(near_edge):
        r = radius()
        side = j % 4
        if j % 2 == 0:
            inset = rng.uniform(r + 0.2, max(r + 0.25, edge_mm - r - 0.2))  # within the band
            kind = "in_band"
        else:
            inset = edge_mm + rng.uniform(-0.4, 0.4) * r  # straddles the band's inner line
            kind = "across_band"
        along = rng.uniform(edge_mm + 3, (cw if side in (0, 2) else ch) - edge_mm - 3)
        x, y = {0: (along, inset), 1: (cw - inset, along), 2: (along, ch - inset), 3: (inset, along)}[side]
        if free(x, y, r):
            xs.append(x), ys.append(y), rs.append(r), kinds.append(kind)
    return np.array(xs), np.array(ys), np.array(rs), kinds


def pitted_coupon_scene(
    seed: int = 0, coupon_mm: tuple[float, float] = (60.0, 40.0), px_per_mm: float = 20.0,
    margin_mm: float = 6.0, n_pits: int = 80, radius_mm: tuple[float, float] = (0.25, 1.1),
    touching_pairs: int = 6, near_edge: int = 8, edge_mm: float = 2.0, depth_mm: tuple[float, float] = (0.04, 0.45),
    texture: str = "brushed", look: str = "dark", light: float = 0.2, blur_px: float = 0.6,
    noise: float = 0.01, jpeg_quality: int | None = 90, tilt_mm_per_mm: tuple[float, float] = (0.002, -0.001),
    roughness_mm: float = 0.0015, layout: tuple | None = None,
) -> tuple[np.ndarray, np.ndarray, dict]:
    """A scanned, cleaned coupon with known pits; its height map; the truth.

    Parameters
    ----------
    coupon_mm : (width_mm, height_mm)
    px_per_mm : float
        Scan resolution.
    n_pits : int
        Pits placed at random inside the analysed region (before touching partners
        and near-edge pits are added).
    radius_mm : (min, max)
        Pit opening radii, log-uniform.
    edge_mm : float
        Edge band the analysis will leave out (placement of near-edge pits and the truth).
    depth_mm : (min, max)
        Pit depths, uniform, below the surrounding surface.
    layout : (xs_mm, ys_mm, radii_mm, kinds), optional
        Pits placed by the caller (coupon frame, mm) instead of at random.

    Returns
    -------
    rgb : (M, N, 3) ndarray of float32
    height_mm : (M, N) ndarray of float32
        Surface height in mm on the image's pixel grid.
    truth : dict
        ``px_per_mm``, ``coupon_box_mm`` (x0, y0, width, height in image mm),
        ``pits`` (list of dicts: x_mm, y_mm in image mm, radius_mm, area_mm2,
        depth_mm, kind, counted), ``counted`` summary (count, density_per_m2,
        mean/median/max area, max depth), ``analysed_area_mm2``.
    """
    if texture not in TEXTURES:
        raise ValueError(f"{texture!r} texture is invalid, it must be one of {TEXTURES}")
    if look not in LOOKS:
        raise ValueError(f"{look!r} look is invalid, it must be one of {LOOKS}")
    rng = common.rng_for(seed)
    s = float(px_per_mm)
    cw, ch = coupon_mm
    w_px, h_px = int(round((cw + 2 * margin_mm) * s)), int(round((ch + 2 * margin_mm) * s))
    x0_px, y0_px = int(round(margin_mm * s)), int(round(margin_mm * s))
    cw_px, ch_px = int(round(cw * s)), int(round(ch * s))
    x0_mm, y0_mm = x0_px / s, y0_px / s
    cw, ch = cw_px / s, ch_px / s  # exact on the pixel grid

    if layout is None:
        xs, ys, rs, kinds = _place_pits(rng, (cw, ch), n_pits, radius_mm, touching_pairs, edge_mm, near_edge)
    else:
        xs, ys, rs = (np.asarray(v, float) for v in layout[:3])
        kinds = list(layout[3])
    depths = rng.uniform(depth_mm[0], depth_mm[1], len(xs))
    floors = rng.uniform(0.18, 0.4, len(xs))  # reflectance of a pit floor relative to the surface

    # surface picture of the coupon alone
    base = common.metal_texture((ch_px, cw_px), rng, base=0.56, brushed=0.05, grain=0.02)
    if texture == "ground":
        scratches = np.zeros((ch_px, cw_px), np.float32)
        for _ in range(int(cw * ch / 8)):
            ang = np.deg2rad(rng.normal(20, 8))
            length = rng.uniform(3, 15) * s
            cx, cy = rng.uniform(0, cw_px), rng.uniform(0, ch_px)
            dx, dy = np.cos(ang) * length / 2, np.sin(ang) * length / 2
            cv2.line(scratches, (int(cx - dx), int(cy - dy)), (int(cx + dx), int(cy + dy)),
                     float(rng.choice([-1, 1]) * rng.uniform(0.02, 0.05)), 1, cv2.LINE_AA)
        base = np.clip(base + scratches[..., None], 0, 1)
    factor = np.ones((ch_px, cw_px), np.float32)
    height = np.zeros((ch_px, cw_px), np.float32)
    for x, y, r, dep, f0 in zip(xs, ys, rs, depths, floors):
        pad = 2
        c0, c1 = max(0, int((x - r) * s) - pad), min(cw_px, int((x + r) * s) + pad + 1)
        r0, r1 = max(0, int((y - r) * s) - pad), min(ch_px, int((y + r) * s) + pad + 1)
        yy, xx = np.mgrid[r0:r1, c0:c1]
        d_mm = np.hypot((xx + 0.5) / s - x, (yy + 0.5) / s - y)
        cover = np.clip((r - d_mm) * s + 0.5, 0, 1).astype(np.float32)  # analytic anti-aliasing
        rho = np.clip(d_mm / r, 0, 1)
        if look == "dark":
            inside = f0 + 0.3 * (1 - f0) * rho**2  # darkest at the floor, lighter up the walls
        else:
            rim = np.clip((d_mm - (r - 0.15)) / 0.05, 0, 1)  # a bright lip along the opening's edge
            inside = 0.85 + 0.8 * rim
        local = 1 - cover * (1 - inside)
        factor[r0:r1, c0:c1] = np.minimum(factor[r0:r1, c0:c1], local) if look == "dark" else \
            np.where(cover > 0, local, factor[r0:r1, c0:c1])
        prof = np.where(d_mm < r, dep * (1 - rho**2), 0.0).astype(np.float32)
        height[r0:r1, c0:c1] = np.minimum(height[r0:r1, c0:c1], -prof)
    coupon_rgb = np.clip(base * factor[..., None], 0, 1).astype(np.float32)

    # the scene: cloth background, coupon pasted in, light, optics, sensor, codec
    bg = common.desk_background((h_px, w_px), rng, colour=(0.16, 0.18, 0.22))
    img = bg.copy()
    img[y0_px:y0_px + ch_px, x0_px:x0_px + cw_px] = coupon_rgb
    img = common.apply_light(img, common.lighting_field((h_px, w_px), light, angle_deg=float(rng.uniform(0, 360))))
    if blur_px > 0:
        img = cv2.GaussianBlur(img, (0, 0), blur_px)
    img = common.sensor_noise(img, rng, noise)
    if jpeg_quality:
        img = common.jpeg_roundtrip(img, jpeg_quality)

    yy, xx = np.mgrid[0:h_px, 0:w_px].astype(np.float32)
    xx_mm, yy_mm = (xx + 0.5) / s, (yy + 0.5) / s
    wav = 0.004 * np.sin(2 * np.pi * xx_mm / 37.0) * np.cos(2 * np.pi * yy_mm / 29.0)
    surface = 0.05 + tilt_mm_per_mm[0] * xx_mm + tilt_mm_per_mm[1] * yy_mm + wav
    rough = cv2.GaussianBlur(rng.normal(0, 1, (h_px, w_px)).astype(np.float32), (0, 0), 1.0)
    rough *= roughness_mm / max(float(rough.std()), 1e-9)
    hmap = np.full((h_px, w_px), -3.0, np.float32)  # the table, a coupon thickness below
    inner = (slice(y0_px, y0_px + ch_px), slice(x0_px, x0_px + cw_px))
    hmap[inner] = (surface[inner] + rough[inner] + height).astype(np.float32)

    edge_dist = np.minimum.reduce([xs, ys, cw - xs, ch - ys])  # centre to nearest coupon edge
    counted = edge_dist - rs >= edge_mm
    pits = [
        {"x_mm": float(x + x0_mm), "y_mm": float(y + y0_mm), "radius_mm": float(r), "area_mm2": float(np.pi * r * r),
         "depth_mm": float(dp), "kind": k, "counted": bool(c)}
        for x, y, r, dp, k, c in zip(xs, ys, rs, depths, kinds, counted)
    ]
    analysed = (cw - 2 * edge_mm) * (ch - 2 * edge_mm)
    areas = np.pi * rs[counted] ** 2
    truth = {
        "px_per_mm": s,
        "coupon_box_mm": [x0_mm, y0_mm, cw, ch],
        "edge_mm": edge_mm,
        "analysed_area_mm2": analysed,
        "texture": texture, "look": look,
        "pits": pits,
        "counted": {
            "count": int(counted.sum()),
            "density_per_m2": float(counted.sum() / (analysed * 1e-6)),
            "mean_area_mm2": float(areas.mean()) if len(areas) else float("nan"),
            "median_area_mm2": float(np.median(areas)) if len(areas) else float("nan"),
            "max_area_mm2": float(areas.max()) if len(areas) else float("nan"),
            "max_depth_mm": float(depths[counted].max()) if counted.any() else float("nan"),
            "touching_pairs": int(sum(1 for k in kinds if k == "touching") // 2),
        },
    }
    return img.astype(np.float32), hmap, truth


def touching_pairs_scene(seed: int = 0, n_pairs: int = 24, px_per_mm: float = 20.0,
                         big_radius_mm: tuple[float, float] = (0.7, 1.3), size_ratio: tuple[float, float] = (0.3, 0.6),
                         overlap: tuple[float, float] = (0.93, 0.99), spacing_mm: float = 5.0, **kw
                         ) -> tuple[np.ndarray, np.ndarray, dict]:
    """Touching pairs of unequal pits (a small pit merged into a larger one), on a grid.

    Each pair: a large pit of radius ``big_radius_mm`` (uniform) and a partner of
    ``size_ratio`` times that radius, centres ``overlap`` times the sum of radii apart
    (the openings just merge), at a random angle.  Other arguments go to
    :func:`pitted_coupon_scene`.  ``truth["pairs"]`` lists the two pit indices of
    each pair in ``truth["pits"]``.
    """
    rng = common.rng_for(seed + 7_000_003)
    cols = int(np.ceil(np.sqrt(n_pairs * 1.5)))
    rows = int(np.ceil(n_pairs / cols))
    edge_mm = kw.get("edge_mm", 2.0)
    cw, ch = cols * spacing_mm + 2 * edge_mm + 2, rows * spacing_mm + 2 * edge_mm + 2
    xs, ys, rs, kinds, pairs = [], [], [], [], []
    for k in range(n_pairs):
        cx = edge_mm + 1 + (k % cols + 0.5) * spacing_mm
        cy = edge_mm + 1 + (k // cols + 0.5) * spacing_mm
        r1 = rng.uniform(*big_radius_mm)
        r2 = r1 * rng.uniform(*size_ratio)
        ang = rng.uniform(0, 2 * np.pi)
        d = (r1 + r2) * rng.uniform(*overlap)
        # the pair's centroid of area at the cell centre, so both pits stay inside the cell
        w2 = r2 * r2 / (r1 * r1 + r2 * r2)
        x1, y1 = cx - w2 * d * np.cos(ang), cy - w2 * d * np.sin(ang)
        pairs.append((len(xs), len(xs) + 1))
        xs += [x1, x1 + d * np.cos(ang)]
        ys += [y1, y1 + d * np.sin(ang)]
        rs += [r1, r2]
        kinds += ["touching", "touching"]
    rgb, height, truth = pitted_coupon_scene(seed=seed, coupon_mm=(cw, ch), px_per_mm=px_per_mm,
                                             layout=(xs, ys, rs, kinds), **kw)
    truth["pairs"] = pairs
    return rgb, height, truth


def tilted_coupon_scene(seed: int = 0, tilt_deg: float = 30.0, image_wh: tuple[int, int] = (1500, 1100),
                        px_per_mm: float = 18.0, plane_px_per_mm: float = 36.0, noise: float = 0.01,
                        jpeg_quality: int | None = 90, **kw) -> tuple[np.ndarray, np.ndarray, dict]:
    """A cleaned coupon photographed obliquely (camera tilted about the image's x axis).

    The coupon and its cloth are drawn as a plane picture at ``plane_px_per_mm``
    (finer than the photo, so the projection is area-sampled), then projected by a
    pinhole camera (:func:`coupon.synth.common.camera_homography`) about
    ``px_per_mm`` at the image centre, with noise and JPEG after the projection.

    Returns
    -------
    rgb : (M, N, 3) ndarray of float32
    homography_px_to_mm : (3, 3) ndarray
        Image px -> plane mm (what a checkerboard calibration in the coupon's plane gives).
    truth : dict
        As :func:`pitted_coupon_scene` (positions in plane mm), plus ``tilt_deg``.
    """
    plane, _, truth = pitted_coupon_scene(seed=seed, px_per_mm=plane_px_per_mm, noise=0.0, jpeg_quality=None,
                                          blur_px=0.0, **kw)
    rng = common.rng_for(seed + 1_000_003)
    size_mm = (plane.shape[1] / plane_px_per_mm, plane.shape[0] / plane_px_per_mm)
    hom = common.camera_homography(size_mm, image_wh, px_per_mm, tilt_x_deg=tilt_deg)
    bg = common.desk_background(image_wh[::-1], rng, colour=(0.16, 0.18, 0.22))
    img, _ = common.render_plane(plane, plane_px_per_mm, hom, image_wh, bg)
    img = cv2.GaussianBlur(img, (0, 0), 0.5)
    img = common.sensor_noise(img, rng, noise)
    if jpeg_quality:
        img = common.jpeg_roundtrip(img, jpeg_quality)
    truth["tilt_deg"] = float(tilt_deg)
    truth["plane_px_per_mm"] = float(plane_px_per_mm)
    return img.astype(np.float32), np.linalg.inv(hom), truth
