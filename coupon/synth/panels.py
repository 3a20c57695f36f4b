"""Synthetic tray photos of coated test panels with known rust, scribe creep and QR labels.

Each panel is painted on its own plane at ``plane_px_per_mm`` in *linear* light:

    linear = (1 - a) * coating * texture + a * rust_colour        (a = rust coverage, 0..1)

then dirt (neutral grey), glare (added white light), a scribe (bare steel core)
with a corrosion zone of known width per side, and an optional QR label.  The
panels are placed on a tray plane (small random rotations), projected by a
tilted pinhole camera, lit by a gradient, and encoded as sRGB with sensor noise
and JPEG, as a camera would.  Because the image is formed from the coverage
map ``a``, the truth of the rusted area is the integral of ``a``; streaks are
translucent, so they count by their opacity.

The truth dict per panel holds corners in the image, the homography from panel
mm to image px, the rust coverage map (``_rust_cover``, private: not written to
JSON), the scribe geometry and the creep at every 1 mm station.

Everything here is invented test data (seeded, deterministic).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import cv2
import numpy as np

from coupon.calibrate import colourspace as cs
from coupon.synth import common

#: Coating colours (sRGB) of the synthetic panels.
COATINGS = {
    "white": (0.90, 0.90, 0.88),
    "grey": (0.55, 0.56, 0.57),
    "dark": (0.13, 0.13, 0.14),
    "green": (0.28, 0.46, 0.36),
}
#: Rust colours (sRGB): orange-brown, red-brown, brown, dark rust core.
RUST_SRGB = np.array([[0.74, 0.40, 0.14], [0.58, 0.24, 0.10], [0.45, 0.22, 0.08], [0.24, 0.11, 0.05]])
STEEL_SRGB = (0.50, 0.50, 0.52)
DIRT_SRGB = (0.42, 0.42, 0.41)
TRAY_SRGB = (0.16, 0.33, 0.52)

RUST_KINDS = ("spots", "general", "pinpoint", "streaks")
#: The distribution letter (ASTM D610 sense) each kind of rust is meant to show.
KIND_LETTER = {"spots": "S", "general": "G", "pinpoint": "P"}


@dataclass(frozen=True)
class PanelSpec:
    """What to paint on one synthetic panel.

    ``rust`` lists kinds from :data:`RUST_KINDS`; ``amount`` scales the number of
    rust sites; ``scribe`` is ``"none"``, ``"line"`` or ``"x"`` with mean creep
    ``creep_mm`` per side (each side varies smoothly around it).
    """

    coating: str = "white"
    rust: tuple[str, ...] = ()
    amount: float = 1.0
    scribe: str = "none"
    creep_mm: float = 0.0
    scribe_width_mm: float = 0.5
    dirt: bool = False
    glare: bool = False
    qr_text: str | None = None
    landscape: bool = False
    size_mm: tuple[float, float] = (75.0, 150.0)


def _lin(srgb) -> np.ndarray:
    return cs.srgb_to_linear(np.asarray(srgb, dtype=np.float64)).astype(np.float32)


def _blob_polygon(rng, centre_xy, radius, irregular=0.25, n=18) -> np.ndarray:
    ang = np.linspace(0, 2 * np.pi, n, endpoint=False)
    r = radius * (1 + irregular * np.convolve(rng.normal(0, 1, n + 4), np.ones(5) / 5, "valid")[:n])
    return np.column_stack([centre_xy[0] + r * np.cos(ang), centre_xy[1] + r * np.sin(ang)])


def _draw_poly(img, poly_xy, value, shift=4):
    pts = np.rint(np.asarray(poly_xy) * (1 << shift)).astype(np.int32).reshape(-1, 1, 2)
    cv2.fillPoly(img, [pts], value, lineType=cv2.LINE_AA, shift=shift)


def _draw_disc(img, centre_xy, radius, value, shift=4):
    c = tuple(int(round(v * (1 << shift))) for v in centre_xy)
    cv2.circle(img, c, max(1, int(round(radius * (1 << shift)))), value, -1, lineType=cv2.LINE_AA, shift=shift)


class _PanelPainter:
    """Paint one panel plane (linear RGB) and keep its coverage maps."""

    def __init__(self, spec: PanelSpec, s: float, rng: np.random.Generator):
        self.spec, self.s, self.rng = spec, s, rng
        w_mm, h_mm = sorted(spec.size_mm)
        if spec.landscape:
            w_mm, h_mm = h_mm, w_mm
        self.w_mm, self.h_mm = w_mm, h_mm
        self.shape = (int(round(h_mm * s)), int(round(w_mm * s)))
        self.rust_a = np.zeros(self.shape, np.float32)  # rust coverage
        self.rust_col = np.zeros(self.shape + (3,), np.float32)  # coverage-weighted rust colour
        self.keep_out = np.zeros(self.shape, np.uint8)  # where no rust site may start (scribe, label)
        self.sites: list[dict] = []

    # -- rust ---------------------------------------------------------------
    def _site(self, centre_mm, radius_mm, colour_idx=None, core=True, irregular=0.25):
        s = self.s
        cx, cy = centre_mm
        r_px = radius_mm * s
        if self.keep_out[int(np.clip(cy * s, 0, self.shape[0] - 1)), int(np.clip(cx * s, 0, self.shape[1] - 1))]:
            return
        idx = int(self.rng.integers(0, 3)) if colour_idx is None else colour_idx
        layer = np.zeros(self.shape, np.float32)
        x0, y0 = int(max(0, cx * s - 3 * r_px - 3)), int(max(0, cy * s - 3 * r_px - 3))
        x1 = int(min(self.shape[1], cx * s + 3 * r_px + 4))
        y1 = int(min(self.shape[0], cy * s + 3 * r_px + 4))
        if x1 <= x0 or y1 <= y0:
            return
        sub = layer[y0:y1, x0:x1]
        centre_local = (cx * s - 0.5 - x0, cy * s - 0.5 - y0)
        if r_px < 3:
            _draw_disc(sub, centre_local, r_px, 1.0)
        else:
            _draw_poly(sub, _blob_polygon(self.rng, centre_local, r_px, irregular), 1.0)
        col = np.broadcast_to(_lin(RUST_SRGB[idx]), sub.shape + (3,)).copy()
        if core and radius_mm >= 0.8:
            inner = np.zeros_like(sub)
            _draw_poly(inner, _blob_polygon(self.rng, centre_local, 0.45 * r_px, 0.3), 1.0)
            col = col * (1 - inner[..., None]) + _lin(RUST_SRGB[3]) * inner[..., None]
        self._add(sub, col, (y0, y1, x0, x1))
        self.sites.append({"centre_mm": (cx, cy), "radius_mm": radius_mm})

    def _add(self, cover, colour_lin, box):
        y0, y1, x0, x1 = box
        a = self.rust_a[y0:y1, x0:x1]
        new = cover * (1 - a)  # over-compositing keeps the coverage <= 1
        self.rust_col[y0:y1, x0:x1] += new[..., None] * colour_lin
        self.rust_a[y0:y1, x0:x1] = a + new

    def _random_centre(self, margin_mm=2.0):
        return (self.rng.uniform(margin_mm, self.w_mm - margin_mm), self.rng.uniform(margin_mm, self.h_mm - margin_mm))

    def spots(self, amount):
        # a few clusters of larger spots: rust concentrated in localized areas (S)
        for _ in range(max(1, int(round(2 * amount)))):
            cc = self._random_centre(12)
            for _ in range(int(self.rng.integers(3, 7))):
                off = self.rng.normal(0, 2.5, 2)
                self._site((cc[0] + off[0], cc[1] + off[1]), self.rng.uniform(0.8, 2.2))

    def general(self, amount):
        # spots of various sizes spread at random (G)
        for _ in range(int(round(45 * amount))):
            self._site(self._random_centre(), float(np.exp(self.rng.uniform(np.log(0.45), np.log(2.0)))))

    def pinpoint(self, amount):
        # very small specks spread over the surface (P): 0.12 to 0.25 mm radius
        for _ in range(int(round(260 * amount))):
            self._site(self._random_centre(), self.rng.uniform(0.12, 0.25), core=False)

    def streaks(self, amount):
        # rust bleeding down from a spot: a translucent tail fading with distance
        s = self.s
        for _ in range(max(1, int(round(3 * amount)))):
            cx, cy = self.rng.uniform(10, self.w_mm - 10), self.rng.uniform(10, self.h_mm * 0.5)
            length_mm, width_mm = self.rng.uniform(12, 30), self.rng.uniform(1.0, 2.0)
            if self.keep_out[int(cy * s), int(cx * s)] or self.keep_out[int(min(cy + length_mm, self.h_mm - 1) * s), int(cx * s)]:
                continue
            self._site((cx, cy), 1.0, colour_idx=1)
            y0, y1 = int(cy * s), int(min(self.h_mm, cy + length_mm) * s)
            x0, x1 = int((cx - width_mm) * s), int((cx + width_mm) * s)
            yy, xx = np.mgrid[y0:y1, x0:x1].astype(np.float32)
            t = (yy / s - cy) / length_mm
            lateral = np.clip(1 - np.abs(xx / s - cx) / (width_mm / 2 * (1 + t)), 0, 1)
            cover = (0.55 * (1 - t) * np.minimum(1, lateral * 3)).astype(np.float32)
            cover = np.clip(cover, 0, 1)
            self._add(cover, np.broadcast_to(_lin(RUST_SRGB[0]), cover.shape + (3,)), (y0, y1, x0, x1))

    # -- scribe -------------------------------------------------------------
    def scribe_lines_mm(self) -> list[tuple[tuple[float, float], tuple[float, float]]]:
        w, h = self.w_mm, self.h_mm
        # scribe ends at least 12.5 mm from the panel edges (ASTM D1654-08 6.1.2)
        if self.spec.scribe == "line":
            if h >= w:
                return [((w / 2, 25.0), (w / 2, h - 25.0))]
            return [((25.0, h / 2), (w - 25.0, h / 2))]
        if self.spec.scribe == "x":
            mx, my = (15.0, 25.0) if h >= w else (25.0, 15.0)
            return [((mx, my), (w - mx, h - my)), ((w - mx, my), (mx, h - my))]
        return []

    def scribe(self) -> list[dict]:
        s, spec = self.s, self.spec
        out = []
        for k, (p0, p1) in enumerate(self.scribe_lines_mm()):
            p0, p1 = np.asarray(p0), np.asarray(p1)
            length = float(np.linalg.norm(p1 - p0))
            u = (p1 - p0) / length
            n = np.array([-u[1], u[0]])  # left of the direction of travel (image y down)
            # smooth creep per side along the line
            knots = np.linspace(0, length, 9)
            creep_l = np.clip(spec.creep_mm * (1 + 0.3 * self.rng.normal(0, 1, knots.size)), 0, None)
            creep_r = np.clip(spec.creep_mm * (1 + 0.3 * self.rng.normal(0, 1, knots.size)), 0, None)
            yy, xx = np.mgrid[0:self.shape[0], 0:self.shape[1]].astype(np.float32)
            px = (xx + 0.5) / s - p0[0]
            py = (yy + 0.5) / s - p0[1]
            t = px * u[0] + py * u[1]
            d = px * n[0] + py * n[1]
            tc = np.clip(t, 0, length)
            cl = np.interp(tc, knots, creep_l).astype(np.float32)
            cr = np.interp(tc, knots, creep_r).astype(np.float32)
            half = spec.scribe_width_mm / 2
            inside_t = np.clip(np.minimum(t, length - t) * s + 0.5, 0, 1)  # square ends
            pix = 1.0 / s
            zone = np.clip((np.where(d >= 0, half + cl, half + cr) - np.abs(d)) / pix + 0.5, 0, 1) * inside_t
            core = np.clip((half - np.abs(d)) / pix + 0.5, 0, 1) * inside_t
            # the corrosion zone: dark and red-brown rust, mottled; the core: bare steel
            mott = cv2.GaussianBlur(self.rng.uniform(0, 1, self.shape).astype(np.float32), (0, 0), 0.6 * s)
            mott = np.clip((mott - mott.mean()) * 8 + 0.5, 0, 1)[..., None]
            zone_col = _lin(RUST_SRGB[1]) * (1 - mott) + _lin(RUST_SRGB[3]) * mott
            creep_zone = np.clip(zone - core, 0, 1).astype(np.float32)
            self.scribe_zone = np.maximum(getattr(self, "scribe_zone", 0), zone)
            self.scribe_layers.append((creep_zone, zone_col, core))
            keep = (np.abs(d) < half + max(creep_l.max(), creep_r.max()) + 3.0) & (t > -3) & (t < length + 3)
            self.keep_out |= keep.astype(np.uint8)
            st = np.arange(0, length + 1e-9, 1.0)
            out.append({
                "start_mm": p0.tolist(), "end_mm": p1.tolist(), "length_mm": length,
                "width_mm": spec.scribe_width_mm,
                "station_t_mm": st, "creep_left_mm": np.interp(st, knots, creep_l),
                "creep_right_mm": np.interp(st, knots, creep_r),
            })
        return out

    def qr_label(self, text) -> tuple[float, float, float, float]:
        """A white label with a QR code near the top edge; returns its box (x, y, w, h) in mm."""
        s = self.s
        code = cv2.QRCodeEncoder.create().encode(text)  # includes a quiet zone, 255 = white
        size_mm = 19.0
        x_mm, y_mm = (self.w_mm - size_mm) / 2, 4.0
        n = int(round(size_mm * s))
        tile = cv2.resize(code, (n, n), interpolation=cv2.INTER_NEAREST).astype(np.float32) / 255.0
        self.label = (int(round(y_mm * s)), int(round(x_mm * s)), tile)
        self.keep_out[int((y_mm - 3) * s):int((y_mm + size_mm + 3) * s), int((x_mm - 3) * s):int((x_mm + size_mm + 3) * s)] = 1
        return (x_mm, y_mm, size_mm, size_mm)


def paint_panel(spec: PanelSpec, seed: int, plane_px_per_mm: float = 12.0) -> tuple[np.ndarray, dict]:
    """Paint one panel: linear RGB plane and its truth (coverage maps, scribe, label)."""
    rng = common.rng_for(seed)
    p = _PanelPainter(spec, plane_px_per_mm, rng)
    p.scribe_layers = []
    p.label = None
    label_box = p.qr_label(spec.qr_text) if spec.qr_text else None
    scribes = p.scribe() if spec.scribe != "none" else []
    for kind in spec.rust:
        if kind not in RUST_KINDS:
            raise ValueError(f"unknown rust kind {kind!r}; expected one of {RUST_KINDS}")
        getattr(p, kind)(spec.amount)
    # edge rust: cut edges rust first (inside the edge band left out of the rating)
    if spec.rust:
        for _ in range(6):
            side = rng.integers(0, 4)
            along = rng.uniform(3, (p.w_mm if side < 2 else p.h_mm) - 3)
            cx, cy = [(along, 1.2), (along, p.h_mm - 1.2), (1.2, along), (p.w_mm - 1.2, along)][side]
            p._site((cx, cy), rng.uniform(0.6, 1.2))
    shape = p.shape
    coat = _lin(COATINGS[spec.coating])
    tex = 1 + 0.012 * cv2.GaussianBlur(rng.normal(0, 1, shape).astype(np.float32), (0, 0), 2.0)
    lin = coat * tex[..., None]
    if spec.dirt:
        # neutral grey smudges: dirt, not rust
        dirt = np.zeros(shape, np.float32)
        for _ in range(3):
            c = p._random_centre(12)
            _draw_poly(dirt, _blob_polygon(rng, (c[0] * p.s, c[1] * p.s), rng.uniform(3, 6) * p.s, 0.35), 1.0)
        dirt = cv2.GaussianBlur(dirt, (0, 0), 0.8 * p.s) * 0.5
        lin = lin * (1 - dirt[..., None]) + _lin(DIRT_SRGB) * dirt[..., None]
    a = p.rust_a[..., None]
    rust_colour = np.where(a > 0, p.rust_col / np.maximum(a, 1e-6), 0)
    lin = lin * (1 - a) + a * rust_colour
    for creep_zone, zone_col, core in p.scribe_layers:
        z = creep_zone[..., None]
        lin = lin * (1 - z) + zone_col * z
        c = core[..., None]
        lin = lin * (1 - c) + _lin(STEEL_SRGB) * c
    if p.label is not None:
        r0, c0, tile = p.label
        lin[r0:r0 + tile.shape[0], c0:c0 + tile.shape[1]] = _lin((0.02, 0.02, 0.02)) + tile[..., None] * (
            _lin((0.93, 0.93, 0.93)) - _lin((0.02, 0.02, 0.02)))
    glare_box = None
    if spec.glare:
        # a soft specular band: white light added on top
        yy, xx = np.mgrid[0:shape[0], 0:shape[1]].astype(np.float32) / p.s
        gx, gy = rng.uniform(0.3, 0.7) * p.w_mm, rng.uniform(0.55, 0.8) * p.h_mm
        g = 0.35 * np.exp(-(((xx - gx) / 6.0) ** 2 + ((yy - gy) / 14.0) ** 2))
        lin = lin + g[..., None]
        glare_box = (gx, gy)
    truth = {
        "spec": spec,
        "size_mm": (p.w_mm, p.h_mm),
        "_rust_cover": p.rust_a,
        "plane_px_per_mm": plane_px_per_mm,
        "rust_sites": len(p.sites),
        "scribes": scribes,
        "qr_box_mm": label_box,
        "glare_centre_mm": glare_box,
        "distribution": _intended_letter(spec.rust),
    }
    return np.clip(lin, 0, 1).astype(np.float32), truth


def _intended_letter(kinds) -> str | None:
    letters = {KIND_LETTER[k] for k in kinds if k in KIND_LETTER}
    if not letters:
        return None
    if "P" in letters and len(letters) > 1:
        return "H"
    return letters.pop() if len(letters) == 1 else "G"


def truth_rust(panel_truth: dict, edge_mm: float, scribe_margin_mm: float = 1.0) -> dict:
    """Rusted area and rated area of a synthetic panel, as ``coupon panels`` defines them.

    The rated area is the panel minus the edge band, the QR label box (plus 2 mm)
    and the scribe corridors: on each side, at each 1 mm station, the scribe half width + the painted creep
    of that side (at least its median over the line), the larger of it and its two neighbours' (a station
    stands for 1 mm of line), + margin; linear between stations, held to 2 mm past the scribe's ends
    (square ends).
    """
    cover = panel_truth["_rust_cover"]
    s = panel_truth["plane_px_per_mm"]
    rows, cols = cover.shape
    yy, xx = (np.mgrid[0:rows, 0:cols].astype(np.float32) + 0.5) / s
    w_mm, h_mm = panel_truth["size_mm"]
    rated = (xx >= edge_mm) & (xx <= w_mm - edge_mm) & (yy >= edge_mm) & (yy <= h_mm - edge_mm)
    if panel_truth["qr_box_mm"] is not None:
        x, y, w, h = panel_truth["qr_box_mm"]
        rated &= ~((xx >= x - 2) & (xx <= x + w + 2) & (yy >= y - 2) & (yy <= y + h + 2))
    for sc in panel_truth["scribes"]:
        p0, p1 = np.asarray(sc["start_mm"]), np.asarray(sc["end_mm"])
        u = (p1 - p0) / sc["length_mm"]
        t = (xx - p0[0]) * u[0] + (yy - p0[1]) * u[1]
        d = -(xx - p0[0]) * u[1] + (yy - p0[1]) * u[0]
        # each side as far as its own creep at each station (d >= 0 is the left of the line's direction)
        st = sc["station_t_mm"]
        reach = []
        for creep in (sc["creep_left_mm"], sc["creep_right_mm"]):
            creep = np.maximum(creep, np.median(creep))
            pad = np.concatenate([creep[:1], creep, creep[-1:]])
            wide = np.maximum(np.maximum(pad[:-2], pad[1:-1]), pad[2:])
            reach.append(np.interp(t, st, sc["width_mm"] / 2 + wide + scribe_margin_mm).astype(np.float32))
        rated &= ~((d <= reach[0]) & (-d <= reach[1]) & (t >= -2) & (t <= sc["length_mm"] + 2))
    rated_mm2 = float(rated.sum()) / s**2
    rust_mm2 = float(cover[rated].sum()) / s**2
    return {"rated_area_mm2": rated_mm2, "rust_area_mm2": rust_mm2,
            "rust_area_pct": 100.0 * rust_mm2 / rated_mm2 if rated_mm2 > 0 else float("nan")}


def truth_creep(panel_truth: dict, end_mm: float = 10.0, crossing_mm: float = 10.0,
                reach_mm: float = 0.5) -> dict | None:
    """Mean, max and min creepage c = (c_left + c_right) / 2 over the stations ``coupon`` measures.

    On an X those leave out the stations within ``crossing_mm`` of the crossing and those whose corroded
    zone (plus ``reach_mm``) comes nearer the other arm's line than its own: there the two zones merge.
    """
    scribes = panel_truth["scribes"]
    if not scribes:
        return None
    vals = []
    cross = None
    if len(scribes) == 2:
        cross = np.asarray(scribes[0]["start_mm"]) + 0.5 * (np.asarray(scribes[0]["end_mm"]) - np.asarray(scribes[0]["start_mm"]))
    for si, sc in enumerate(scribes):
        t = sc["station_t_mm"]
        keep = (t >= end_mm) & (t <= sc["length_mm"] - end_mm)
        if cross is not None:
            p0, p1 = np.asarray(sc["start_mm"]), np.asarray(sc["end_mm"])
            pts = p0 + np.outer(t, (p1 - p0) / sc["length_mm"])
            keep &= np.linalg.norm(pts - cross, axis=1) > crossing_mm
            other = scribes[1 - si]
            q0, q1 = np.asarray(other["start_mm"]), np.asarray(other["end_mm"])
            uq = (q1 - q0) / np.linalg.norm(q1 - q0)
            u = (p1 - p0) / sc["length_mm"]
            n, nq = np.array([-u[1], u[0]]), np.array([-uq[1], uq[0]])
            half = sc["width_mm"] / 2 + reach_mm
            frac = np.linspace(0.0, 1.0, 101)[None, :]
            for side, creep in ((1.0, sc["creep_left_mm"]), (-1.0, sc["creep_right_mm"])):
                offs = side * (half + creep)[:, None] * frac  # from the line out to the zone's edge
                d_other = np.abs(((pts - q0) @ nq)[:, None] + float(n @ nq) * offs)
                keep &= ~(d_other < np.abs(offs)).any(axis=1)
        vals.append(0.5 * (sc["creep_left_mm"][keep] + sc["creep_right_mm"][keep]))
    v = np.concatenate(vals)
    return {"creep_mean_mm": float(v.mean()), "creep_max_mm": float(v.max()), "creep_min_mm": float(v.min())}


@dataclass(frozen=True)
class TraySettings:
    """Camera, tray and sensor settings of a synthetic tray photo."""

    image_wh: tuple[int, int] = (1400, 1600)
    cols: int = 3
    gap_mm: float = 25.0
    tilt_x_deg: float = 12.0
    tilt_y_deg: float = -8.0
    roll_deg: float = 3.0
    light: float = 0.25
    noise: float = 0.008
    #: camera-like texture at the photo's own resolution (0 = off): relative strength of a fine
    #: surface grain (paint and tray texture finer than the painted planes) and of the
    #: luminance-correlated part of the sensor noise (demosaicing correlates the channels)
    grain: float = 0.0
    jpeg_quality: int | None = 92
    jpeg_chroma: str = "4:2:0"  # chroma sampling of the JPEG (see coupon.synth.common.JPEG_CHROMA)
    plane_px_per_mm: float = 12.0
    max_rotation_deg: float = 2.0
    shift_mm: tuple[float, float] = (0.0, 0.0)
    extra: dict = field(default_factory=dict)


def tray_scene(panels: list[PanelSpec], seed: int = 0, settings: TraySettings = TraySettings()
               ) -> tuple[np.ndarray, dict]:
    """A photo of a tray holding ``panels`` in rows of ``settings.cols``.

    Returns
    -------
    rgb : (M, N, 3) ndarray of float32, sRGB in [0, 1]
    truth : dict
        ``panels``: one dict per panel in tray order (row by row from the top
        left) with ``corners_img_xy`` (TL, TR, BR, BL of the panel as painted),
        ``hom_mm_to_img``, ``centre_img_xy``, ``position`` (row, col) and the
        painted truth of :func:`paint_panel`; plus the tray homography and scale.
    """
    st = settings
    rng = common.rng_for(seed)
    cols = max(1, st.cols)
    n_rows = int(np.ceil(len(panels) / cols))
    sizes = [sorted(p.size_mm)[::-1 if p.landscape else 1] for p in panels]
    cell_w = max(s[0] for s in sizes) if sizes else 75
    cell_h = max(s[1] for s in sizes) if sizes else 150
    tray_w = cols * cell_w + (cols + 1) * st.gap_mm
    tray_h = n_rows * cell_h + (n_rows + 1) * st.gap_mm
    w_px, h_px = st.image_wh
    px_per_mm = 0.86 * min(w_px / tray_w, h_px / tray_h)
    hom_tray = common.camera_homography((tray_w, tray_h), st.image_wh, px_per_mm, st.tilt_x_deg,
                                        st.tilt_y_deg, st.roll_deg,
                                        centre_offset_px=(st.shift_mm[0] * px_per_mm, st.shift_mm[1] * px_per_mm))
    # tray: textured plastic in linear light, large enough to fill the frame
    margin = 200.0
    tray_res = max(1.0, px_per_mm * 0.6)
    big = (int((tray_h + 2 * margin) * tray_res), int((tray_w + 2 * margin) * tray_res))
    tray = common.desk_background(big, rng, colour=TRAY_SRGB)
    shift = np.array([[1, 0, -margin], [0, 1, -margin], [0, 0, 1]], float)
    img, _ = common.render_plane(_lin(tray), tray_res, hom_tray @ shift, st.image_wh,
                                 np.zeros((h_px, w_px, 3), np.float32))
    out_panels = []
    for i, spec in enumerate(panels):
        r, c = divmod(i, cols)
        plane, truth = paint_panel(spec, seed * 1000 + i + 1, st.plane_px_per_mm)
        w_mm, h_mm = truth["size_mm"]
        cx = st.gap_mm + c * (cell_w + st.gap_mm) + cell_w / 2
        cy = st.gap_mm + r * (cell_h + st.gap_mm) + cell_h / 2
        ang = np.deg2rad(rng.uniform(-st.max_rotation_deg, st.max_rotation_deg))
        # panel mm -> tray mm: centre, rotate, place
        place = (np.array([[1, 0, cx], [0, 1, cy], [0, 0, 1]])
                 @ np.array([[np.cos(ang), -np.sin(ang), 0], [np.sin(ang), np.cos(ang), 0], [0, 0, 1]])
                 @ np.array([[1, 0, -w_mm / 2], [0, 1, -h_mm / 2], [0, 0, 1]]))
        hom = hom_tray @ place
        img, _ = common.render_plane(plane, st.plane_px_per_mm, hom, st.image_wh, img)
        corners_mm = np.array([[0, 0], [w_mm, 0], [w_mm, h_mm], [0, h_mm]], float)
        corners = cv2.perspectiveTransform(corners_mm.reshape(-1, 1, 2), hom).reshape(-1, 2)
        centre = cv2.perspectiveTransform(np.array([[[w_mm / 2, h_mm / 2]]]), hom).reshape(2)
        truth.update({"corners_img_xy": corners, "hom_mm_to_img": hom / hom[2, 2], "centre_img_xy": centre,
                      "position": (r + 1, c + 1), "tray_rotation_deg": float(np.rad2deg(ang))})
        out_panels.append(truth)
    field_ = common.lighting_field(img.shape[:2], st.light, angle_deg=float(rng.uniform(0, 360)), vignette=0.08)
    img = img * field_[..., None]
    rgb = cs.linear_to_srgb(np.clip(img, 0, 1)).astype(np.float32)
    if st.grain > 0:
        rgb = _camera_grain(rgb, rng, st.grain, st.noise)
    else:
        rgb = common.sensor_noise(rgb, rng, st.noise)
    if st.jpeg_quality:
        rgb = common.jpeg_roundtrip(rgb, st.jpeg_quality, st.jpeg_chroma)
    return rgb, {"panels": out_panels, "hom_tray_mm_to_img": hom_tray, "px_per_mm": px_per_mm,
                 "tray_size_mm": (tray_w, tray_h), "settings": st}


def _camera_grain(rgb: np.ndarray, rng: np.random.Generator, grain: float, noise: float) -> np.ndarray:
    """Fine surface grain and camera-like sensor noise, at the photo's resolution (sRGB, float32).

    A camera photo is textured down to the pixel: paint and plastic grain, and
    noise that demosaicing spreads over about a pixel and shares between the
    channels.  Without it a synthetic JPEG is unusually smooth (few bits, fast
    to decode).  ``grain`` is the relative strength of the surface texture;
    ``noise`` the standard deviation of the sensor noise (sRGB units), of which
    about 70 % of the variance is common to the three channels.
    """
    rows, cols = rgb.shape[:2]
    tex = cv2.GaussianBlur(rng.standard_normal((rows, cols), dtype=np.float32), (0, 0), 0.8)
    tex *= np.float32(grain / max(float(tex.std()), 1e-6))
    out = rgb * (1 + tex[..., None])
    common_part = rng.standard_normal((rows, cols), dtype=np.float32) * np.float32(0.85 * noise)
    out += common_part[..., None]
    out += rng.standard_normal(rgb.shape, dtype=np.float32) * np.float32(0.5 * noise)
    return np.clip(out, 0, 1)


def truth_summary(truth: dict, edge_mm: float = 5.0) -> dict:
    """Plain ground truth for JSON files beside demo images."""
    out = []
    for p in truth["panels"]:
        r = truth_rust(p, edge_mm)
        cr = truth_creep(p)
        out.append({
            "position": list(p["position"]), "coating": p["spec"].coating, "rust_kinds": list(p["spec"].rust),
            "qr_text": p["spec"].qr_text, "centre_img_xy": p["centre_img_xy"].tolist(),
            "corners_img_xy": p["corners_img_xy"].tolist(), "distribution": p["distribution"],
            "scribe": p["spec"].scribe, **r, **(cr or {}),
        })
    return {"px_per_mm": truth["px_per_mm"], "edge_mm": edge_mm, "panels": out}
