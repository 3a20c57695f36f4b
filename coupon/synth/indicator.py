"""A physical stand-in for a universal indicator, and buffer-drop photos rendered from it.

The synthetic indicator changes colour in Henderson-Hasselbalch steps (see
:class:`StepIndicator`), a physical model that is *independent* of the fitted
path model in :mod:`coupon.calibrate.indicator`, which is what the tests need.
"""

from __future__ import annotations

from dataclasses import dataclass

import cv2
import numpy as np
import pandas as pd

from coupon.calibrate import colourspace as cs
from coupon.calibrate.shipped import calibration_dir
from coupon.synth import common

#: Synthetic universal indicator: colour plateaus (sRGB 0-255, as seen over white) and the
#: pKa of each step between them.  The steps sit at the pKa of the single indicators a
#: universal blend is commonly made of (methyl orange 3.7, methyl red 5.1, bromothymol
#: blue 7.1, thymol blue 8.9, phenolphthalein 9.4, from the handbook table shipped in
#: calibration/indicators/single_indicators.csv, nudged to 9.8 for the last so the steps
#: do not overlap); the plateau colours follow the usual chart: red, orange, yellow,
#: green, blue, violet.
UNIVERSAL_PKA = (3.7, 5.1, 7.1, 8.9, 9.8)
UNIVERSAL_COLOURS = ((200, 30, 35), (235, 110, 30), (235, 200, 40), (60, 160, 70), (40, 90, 180), (95, 40, 140))


def single_indicator_table() -> pd.DataFrame:
    return pd.read_csv(calibration_dir() / "indicators" / "single_indicators.csv", comment="#")


@dataclass(frozen=True)
class StepIndicator:
    """Indicator whose colour changes in Henderson-Hasselbalch steps.

    Linear-light colour (as transmittance over white) at pH is
    c_0 + sum_k alpha_k(pH) (c_k - c_(k-1)), alpha_k = 1 / (1 + 10^(pKa_k - pH)).
    A single indicator is one step between its acid and base colours.
    """

    pka: np.ndarray  # (n,)
    colours_lin: np.ndarray  # (n + 1, 3)

    @classmethod
    def from_srgb(cls, pka, colours_255) -> "StepIndicator":
        return cls(np.asarray(pka, float), cs.srgb_to_linear(np.asarray(colours_255, float) / 255.0))

    @classmethod
    def single(cls, name: str) -> "StepIndicator":
        t = single_indicator_table().set_index("name").loc[name]
        return cls.from_srgb([t["pka"]], [t[["acid_R", "acid_G", "acid_B"]].to_numpy(float),
                                          t[["base_R", "base_G", "base_B"]].to_numpy(float)])

    def transmittance(self, ph) -> np.ndarray:
        """Linear RGB transmittance at pH (any shape) -> shape + (3,)."""
        ph = np.asarray(ph, dtype=np.float64)[..., None]
        alpha = 1.0 / (1.0 + 10.0 ** (self.pka - ph))  # (..., n)
        steps = np.diff(self.colours_lin, axis=0)  # (n, 3)
        return self.colours_lin[0] + alpha @ steps

    def srgb_over(self, ph, substrate_srgb, path_length=1.0) -> np.ndarray:
        """Colour of the solution layer seen over a substrate (Beer-Lambert: T ** path_length)."""
        sub = cs.srgb_to_linear(np.asarray(substrate_srgb, dtype=np.float64))
        t = np.clip(self.transmittance(ph), 1e-4, 1.0) ** np.asarray(path_length, dtype=np.float64)
        return np.clip(cs.linear_to_srgb(sub * t), 0, 1)


def universal_indicator() -> StepIndicator:
    return StepIndicator.from_srgb(UNIVERSAL_PKA, UNIVERSAL_COLOURS)


def buffer_strip_scene(
    ph_values, seed: int = 0, per_row: int = 5, drop_radius_px: int = 60, substrate=(0.62, 0.62, 0.63),
    blend: StepIndicator | None = None, light: float = 0.1, noise: float = 0.012, jpeg_quality: int | None = 88,
    glare: bool = True, path_length: float = 0.6,
) -> tuple[np.ndarray, dict]:
    """Buffer drops (one per pH, rows of ``per_row``) on a steel substrate.

    Ground truth: the drops' centres (xy, px) in reading order, their radius, the pH
    of each and the model's colour of each before light, noise and JPEG.
    """
    rng = common.rng_for(seed)
    blend = blend or universal_indicator()
    n = len(ph_values)
    nrows = int(np.ceil(n / per_row))
    pitch = int(drop_radius_px * 3)
    w, h = pitch * per_row + pitch // 2, pitch * nrows + pitch // 2
    img = common.metal_texture((h, w), rng, base=float(np.mean(substrate)), brushed=0.025, grain=0.012)
    img = np.clip(img * (np.asarray(substrate) / np.mean(substrate)), 0, 1).astype(np.float32)
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
    centres, colours = [], []
    for i, ph in enumerate(ph_values):
        r, c = divmod(i, per_row)
        cx = pitch * (c + 0.5) + pitch // 4 + rng.uniform(-0.1, 0.1) * drop_radius_px
        cy = pitch * (r + 0.5) + pitch // 4 + rng.uniform(-0.1, 0.1) * drop_radius_px
        rad = drop_radius_px * rng.uniform(0.92, 1.08)
        d = np.hypot(xx - cx, yy - cy) / rad
        inside = d < 1.0
        # thinner at the edge: path length falls toward the rim (a spherical cap)
        thickness = np.sqrt(np.clip(1 - d**2, 0, 1))
        colour = blend.srgb_over(ph, substrate, path_length)
        layer = blend.srgb_over(np.full(inside.sum(), ph), img[inside], path_length * (0.4 + 0.6 * thickness[inside])[:, None])
        img[inside] = layer.astype(np.float32)
        if glare:
            gx, gy = cx - 0.35 * rad, cy - 0.35 * rad
            g = np.exp(-((xx - gx) ** 2 + (yy - gy) ** 2) / (2 * (0.08 * rad) ** 2))
            img = np.clip(img + 0.9 * g[..., None] * inside[..., None], 0, 1)
        centres.append((cx, cy))
        colours.append(colour)
    img = common.apply_light(img, common.lighting_field((h, w), light, angle_deg=rng.uniform(0, 360)))
    img = common.sensor_noise(img, rng, noise)
    if jpeg_quality:
        img = common.jpeg_roundtrip(img, jpeg_quality)
    truth = {"ph": list(map(float, ph_values)), "centres_xy": centres, "radius_px": drop_radius_px,
             "srgb": np.array(colours)}
    return img.astype(np.float32), truth


def patch_chart_scene(seed: int = 0, cast=(1.12, 1.0, 0.82), patch_px: int = 70, gap_px: int = 20,
                      noise: float = 0.008, jpeg_quality: int | None = 92) -> tuple[np.ndarray, pd.DataFrame]:
    """A chart of colour patches of known CIELAB photographed under a colour cast.

    Returns the photo and the patch table (name, x_px, y_px, w_px, h_px, L, a, b)
    in the format ``coupon calibrate colour --patches`` reads.  The reference
    colours are invented (spread over the sRGB gamut), not a commercial chart.
    """
    rng = common.rng_for(seed)
    ref_srgb = np.array([
        [0.95, 0.95, 0.95], [0.75, 0.75, 0.75], [0.50, 0.50, 0.50], [0.25, 0.25, 0.25],
        [0.80, 0.25, 0.20], [0.25, 0.65, 0.30], [0.20, 0.30, 0.75], [0.90, 0.80, 0.20],
        [0.75, 0.35, 0.65], [0.20, 0.65, 0.70], [0.85, 0.55, 0.25], [0.45, 0.30, 0.20],
    ])
    cols = 4
    rows = int(np.ceil(len(ref_srgb) / cols))
    w = cols * (patch_px + gap_px) + gap_px
    h = rows * (patch_px + gap_px) + gap_px
    img = np.full((h, w, 3), 0.12, np.float32)
    recs = []
    for i, c in enumerate(ref_srgb):
        r, k = divmod(i, cols)
        x, y = gap_px + k * (patch_px + gap_px), gap_px + r * (patch_px + gap_px)
        img[y:y + patch_px, x:x + patch_px] = c
        lab = cs.srgb_to_lab(c)
        m = patch_px // 6
        recs.append({"name": f"P{i + 1:02d}", "x_px": x + m, "y_px": y + m, "w_px": patch_px - 2 * m,
                     "h_px": patch_px - 2 * m, "L": lab[0], "a": lab[1], "b": lab[2]})
    lin = cs.srgb_to_linear(img) * np.asarray(cast)
    img = np.clip(cs.linear_to_srgb(np.clip(lin, 0, 1)), 0, 1).astype(np.float32)
    img = common.sensor_noise(img, rng, noise)
    if jpeg_quality:
        img = common.jpeg_roundtrip(img, jpeg_quality)
    return img, pd.DataFrame(recs)


def cv2_circle_mask(shape_rc, centre_xy, radius) -> np.ndarray:
    m = np.zeros(shape_rc, np.uint8)
    cv2.circle(m, (int(round(centre_xy[0])), int(round(centre_xy[1]))), int(round(radius)), 1, -1)
    return m.astype(bool)
