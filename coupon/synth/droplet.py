"""Synthetic droplet time-lapse: an indicator drop on steel developing zones, rust and shrinking.

Scene model (invented, for tests, benchmarks and the demo)
==========================================================
* Substrate: brushed grey steel (:func:`coupon.synth.common.metal_texture`), the
  same metal in every frame (one camera, one sample).
* Drop: an ellipse (circle by default) of known area whose area falls linearly
  with time (evaporation, ``area_loss_mm2_per_min``); its colour is the synthetic
  universal indicator (:func:`coupon.synth.indicator.universal_indicator`) seen
  over the metal with Beer-Lambert absorption (``StepIndicator.srgb_over``), with
  the path length thinning toward the rim like a spherical cap.
* pH field: ``pH(r, t) = ph_start + s(t) [(1 - w(r)) (ph_centre_end - ph_start)
  + w(r) (ph_rim_end - ph_start)]`` where r is the normalised radius,
  ``w`` a smoothstep from the acidic core radius to ``zone_r_out`` and ``s(t)``
  ramps from 0 to 1 over ``develop_min``: neutral at first, then an acidic
  centre (anodic) and a basic rim (cathodic).  The acidic core grows to
  ``zone_r_in`` at ``acid_peak_min`` and then recedes to half that growth, so
  the acidic share has a peak of known time.
* Rust: an opaque, dark orange-brown, granular ring at ``rust_r_mm`` (a fixed
  place on the metal, so it stays while the drop shrinks) whose covered share of
  the ring grows from ``rust_start_min`` to ``rust_full_min``.
* Glare: one specular highlight inside the drop.
* Camera: lighting gradient, sensor noise, JPEG.

Ground truth per frame is counted on the pixel grid of the frame before light,
noise and JPEG: the drop mask, the pH of every pixel, the rust and glare masks,
and the zone shares (pixels where the indicator is visible, i.e. not rust and
not glare, with pH below / above the thresholds, as percent of the drop).
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, replace
from typing import Iterator

import cv2
import numpy as np

from coupon.synth import common
from coupon.synth.indicator import StepIndicator, universal_indicator

#: Opaque rust colour (sRGB) before grain: a dark orange-brown (invented rendering of the usual
#: "orange to brown" description of iron oxide-hydroxide precipitates).
RUST_SRGB = (0.36, 0.19, 0.08)
#: Steel colour matching :func:`coupon.synth.indicator.buffer_strip_scene` (buffers on the same metal).
SUBSTRATE = (0.62, 0.62, 0.63)


@dataclass(frozen=True)
class DropletSeriesSpec:
    """Everything that defines a synthetic series (all lengths in mm, times in minutes)."""

    n_frames: int = 10
    interval_min: float = 5.0
    image_wh: tuple[int, int] = (640, 560)
    px_per_mm: float = 40.0
    diameter0_mm: float = 10.0
    aspect: float = 1.0  # minor / major axis of the drop outline
    angle_deg: float = 0.0
    centre_offset_mm: tuple[float, float] = (0.4, -0.3)
    area_loss_mm2_per_min: float = 0.25
    ph_start: float = 7.0
    ph_centre_end: float = 4.0
    ph_rim_end: float = 10.0
    zone_r_in: float = 0.35
    zone_r_out: float = 0.8
    develop_min: float = 10.0
    acid_peak_min: float = 30.0
    rust_r_mm: float = 2.7
    rust_width_mm: float = 0.6
    rust_start_min: float = 12.0
    rust_full_min: float = 40.0
    rust_max_cover: float = 0.85
    glare: bool = True
    dried_after_min: float | None = None
    light: float = 0.1
    noise: float = 0.01
    jpeg_quality: int | None = 90
    path_length: float = 0.6

    def radius_mm(self, t_min: float) -> float:
        """Equivalent radius of the drop at time t (area loss linear in time)."""
        a0 = np.pi * (self.diameter0_mm / 2) ** 2
        area = max(a0 - self.area_loss_mm2_per_min * t_min, 0.0)
        return float(np.sqrt(area / np.pi))

    def development(self, t_min: float) -> float:
        return float(np.clip(t_min / self.develop_min, 0.0, 1.0)) if self.develop_min > 0 else 1.0

    def rust_cover(self, t_min: float) -> float:
        span = max(self.rust_full_min - self.rust_start_min, 1e-9)
        return float(np.clip((t_min - self.rust_start_min) / span, 0.0, 1.0)) * self.rust_max_cover

    def acid_core_r(self, t_min: float) -> float:
        """Normalised radius of the acidic core: grows to ``zone_r_in`` at ``acid_peak_min``, then recedes."""
        p = max(self.acid_peak_min, 1e-9)
        tri = t_min / p if t_min <= p else max(0.5, 1.0 - 0.5 * (t_min - p) / p)
        return self.zone_r_in * (0.4 + 0.6 * float(np.clip(tri, 0.0, 1.0)))

    def ph_at(self, r_norm: np.ndarray, t_min: float) -> np.ndarray:
        """True pH at normalised radius r (any shape) and time t."""
        r_in = self.acid_core_r(t_min)
        x = np.clip((np.asarray(r_norm, np.float64) - r_in) / (self.zone_r_out - r_in), 0, 1)
        w = x * x * (3 - 2 * x)
        s = self.development(t_min)
        return self.ph_start + s * ((1 - w) * (self.ph_centre_end - self.ph_start)
                                    + w * (self.ph_rim_end - self.ph_start))


def common_practice_spec(**overrides) -> DropletSeriesSpec:
    """A 10 mm drop on steel that ends with its centre near pH 4, its rim near pH 10 and rust between.

    Common practice (the droplet test's known outcome): anodic acidic centre,
    cathodic basic rim, rust precipitating where the two meet.
    """
    base = DropletSeriesSpec(diameter0_mm=10.0, ph_centre_end=4.0, ph_rim_end=10.0, rust_r_mm=2.7,
                             area_loss_mm2_per_min=0.15)
    return replace(base, **overrides)


class _Static:
    """What stays the same in every frame of a series (metal, rust grain, grids)."""

    def __init__(self, spec: DropletSeriesSpec, seed: int):
        w, h = spec.image_wh
        rng = common.rng_for(seed)
        metal = common.metal_texture((h, w), rng, base=float(np.mean(SUBSTRATE)), brushed=0.025, grain=0.012)
        self.metal = np.clip(metal * (np.asarray(SUBSTRATE, np.float32) / np.float32(np.mean(SUBSTRATE))), 0, 1)
        # rank-normalised smooth noise: "cover < c" selects a share c of the ring in clumps
        blob = cv2.GaussianBlur(rng.normal(0, 1, (h, w)).astype(np.float32), (0, 0), 0.12 * spec.px_per_mm)
        order = np.argsort(blob, axis=None)
        rank = np.empty(h * w, np.float32)
        rank[order] = np.linspace(0, 1, h * w, dtype=np.float32)
        self.rust_rank = rank.reshape(h, w)
        self.rust_grain = cv2.GaussianBlur(rng.normal(0, 1, (h, w)).astype(np.float32), (0, 0), 0.8)
        self.light_angle = float(rng.uniform(0, 360))
        self.cx = w / 2 + spec.centre_offset_mm[0] * spec.px_per_mm
        self.cy = h / 2 + spec.centre_offset_mm[1] * spec.px_per_mm
        yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
        a = np.deg2rad(spec.angle_deg)
        dx, dy = xx - self.cx, yy - self.cy
        self.u = (np.cos(a) * dx + np.sin(a) * dy).astype(np.float32)  # along the major axis, px
        self.v = (-np.sin(a) * dx + np.cos(a) * dy).astype(np.float32)
        self.dist_mm = (np.hypot(dx, dy) / spec.px_per_mm).astype(np.float32)
        self.light = common.lighting_field((h, w), spec.light, angle_deg=self.light_angle)


def render_frame(spec: DropletSeriesSpec, index: int, seed: int = 0, blend: StepIndicator | None = None,
                 static: _Static | None = None, acidic_below: float = 6.0,
                 basic_above: float = 8.0) -> tuple[np.ndarray, dict]:
    """Render frame ``index`` of a series; returns (rgb float32, truth dict).

    Truth keys: ``t_min``, ``drop_found``, ``drop_area_mm2``, ``drop_diameter_mm``,
    ``centre_xy_px``, ``centre_xy_mm``, ``acidic_pct``, ``basic_pct``, ``neutral_pct``,
    ``rust_pct``, ``rust_area_mm2``, ``ph_centre``, ``ph_rim``, ``rust_r_mm``, and the masks
    ``_drop``, ``_rust``, ``_glare``, ``_ph`` (keys with a leading underscore are arrays).
    """
    st = static or _Static(spec, seed)
    blend = blend or universal_indicator()
    rng = common.rng_for(seed * 1000 + index + 1)
    t = index * spec.interval_min
    s = spec.px_per_mm
    img = st.metal.copy()
    dried = spec.dried_after_min is not None and t >= spec.dried_after_min
    r_eq_px = spec.radius_mm(t) * s
    a_px = r_eq_px / np.sqrt(spec.aspect)
    b_px = r_eq_px * np.sqrt(spec.aspect)
    r_norm = np.sqrt((st.u / max(a_px, 1e-6)) ** 2 + (st.v / max(b_px, 1e-6)) ** 2)
    drop = (r_norm < 1.0) & (not dried) & (r_eq_px > 0)
    ph_true = np.full(drop.shape, np.nan, np.float32)
    if drop.any():
        ph_true[drop] = spec.ph_at(r_norm[drop], t)
        thickness = np.sqrt(np.clip(1 - r_norm[drop] ** 2, 0, 1))
        path = spec.path_length * (0.4 + 0.6 * thickness)
        img[drop] = blend.srgb_over(ph_true[drop], img[drop], path[:, None]).astype(np.float32)
    # rust: deposited on the metal, so it stays when the drop recedes or dries
    t_rust = min(t, spec.dried_after_min) if spec.dried_after_min is not None else t
    ring = np.abs(st.dist_mm - spec.rust_r_mm) < spec.rust_width_mm / 2
    rust = ring & (st.rust_rank < _ring_rank_cut(st, ring, spec.rust_cover(t_rust)))
    if rust.any():
        grain = 1.0 + 0.18 * st.rust_grain[rust]
        col = np.clip(np.asarray(RUST_SRGB, np.float32)[None, :] * grain[:, None], 0, 1)
        img[rust] = 0.9 * col + 0.1 * img[rust]
    glare = np.zeros(drop.shape, bool)
    if spec.glare and drop.any():
        gx = st.cx - 0.4 * r_eq_px
        gy = st.cy - 0.4 * r_eq_px
        sig = 0.07 * r_eq_px
        yy, xx = np.ogrid[0:drop.shape[0], 0:drop.shape[1]]
        g = np.exp(-((xx - gx) ** 2 + (yy - gy) ** 2) / (2 * sig ** 2)).astype(np.float32) * drop
        img = np.clip(img + 0.9 * g[..., None], 0, 1)
        glare = g > 0.05
    img = common.apply_light(img, st.light)
    img = common.sensor_noise(img, rng, spec.noise)
    if spec.jpeg_quality:
        img = common.jpeg_roundtrip(img, spec.jpeg_quality)
    truth = _truth(spec, t, drop, rust, glare, ph_true, r_norm, st, acidic_below, basic_above)
    return img.astype(np.float32), truth


def _ring_rank_cut(st: _Static, ring: np.ndarray, cover: float) -> float:
    """Rank threshold that selects the share ``cover`` of the ring's pixels."""
    if cover <= 0 or not ring.any():
        return -1.0
    return float(np.quantile(st.rust_rank[ring], cover))


def _truth(spec, t, drop, rust, glare, ph_true, r_norm, st, acidic_below, basic_above) -> dict:
    s = spec.px_per_mm
    n = int(drop.sum())
    out = {"t_min": float(t), "drop_found": bool(n > 0), "px_per_mm": s,
           "acidic_below": acidic_below, "basic_above": basic_above}
    rust_in = rust & drop
    if n:
        readable = drop & ~rust & ~glare
        ph = ph_true
        pct = lambda m: float(100.0 * m.sum() / n)  # noqa: E731
        centre = readable & (r_norm < 0.2)
        rim = readable & (r_norm > 0.8)
        rr, cc = np.nonzero(drop)
        out.update({
            "drop_area_mm2": n / s**2,
            "drop_diameter_mm": float(2 * np.sqrt(n / np.pi) / s),
            "centre_xy_px": [float(cc.mean()), float(rr.mean())],
            "centre_xy_mm": [float(cc.mean() + 0.5) / s, float(rr.mean() + 0.5) / s],
            "acidic_pct": pct(readable & (ph < acidic_below)),
            "basic_pct": pct(readable & (ph > basic_above)),
            "neutral_pct": pct(readable & (ph >= acidic_below) & (ph <= basic_above)),
            "rust_pct": pct(rust_in),
            "rust_area_mm2": float(rust_in.sum() / s**2),
            "glare_pct": pct(glare),
            "ph_centre": float(np.median(ph[centre])) if centre.any() else float("nan"),
            "ph_rim": float(np.median(ph[rim])) if rim.any() else float("nan"),
        })
    else:
        out.update({k: float("nan") for k in ("drop_area_mm2", "drop_diameter_mm", "acidic_pct", "basic_pct",
                                              "neutral_pct", "ph_centre", "ph_rim", "glare_pct")})
        out.update({"rust_pct": float("nan"), "rust_area_mm2": float(rust.sum() / s**2),
                    "centre_xy_px": None, "centre_xy_mm": None})
    out["rust_r_mm"] = spec.rust_r_mm
    out["_drop"], out["_rust"], out["_glare"], out["_ph"] = drop, rust, glare, ph_true
    return out


def droplet_series(spec: DropletSeriesSpec, seed: int = 0, blend: StepIndicator | None = None,
                   **kw) -> Iterator[tuple[np.ndarray, dict]]:
    """Yield (rgb, truth) for every frame in time order, one frame in memory at a time."""
    st = _Static(spec, seed)
    for i in range(spec.n_frames):
        yield render_frame(spec, i, seed=seed, blend=blend, static=st, **kw)


def series_events(truths: list[dict], acidic_pct: float = 1.0, rust_pct: float = 0.5) -> dict:
    """True event times of a series (same definitions as the analysis)."""
    t = np.array([d["t_min"] for d in truths])
    acid = np.array([d["acidic_pct"] for d in truths], float)
    rust = np.array([d["rust_pct"] for d in truths], float)

    def first(v, thr):
        idx = np.flatnonzero(np.nan_to_num(v, nan=-1) > thr)
        return float(t[idx[0]]) if idx.size else None

    k = int(np.nanargmax(acid)) if np.isfinite(acid).any() else None
    return {"t_acidic_first_min": first(acid, acidic_pct), "t_rust_first_min": first(rust, rust_pct),
            "acidic_peak_pct": None if k is None else float(acid[k]),
            "t_acidic_peak_min": None if k is None else float(t[k])}


def spec_dict(spec: DropletSeriesSpec) -> dict:
    return asdict(spec)


def public_truth(truth: dict) -> dict:
    """Truth without the arrays (for JSON beside the images)."""
    return {k: v for k, v in truth.items() if not k.startswith("_")}
