"""Summary of a pit analysis: density, sizes, spread, ASTM G46 ratings, ASTM G1 rate, pitting factor.

:func:`summarise_pits` turns a per-pit table into the numbers a report needs.
Choices made here (documented in the README):

* ASTM G46 density (A) rates pits per m2 of the analysed area; size (B) rates
  the mean opening area of the counted pits; depth (C) rates the mean of the
  ten deepest pits (all pits when fewer), the average the standard asks for
  alongside the maximum (from memory).
* The exposed area for the corrosion rate is the one given, or else the
  analysed area of the imaged face (a warning says so: mass is lost from every
  exposed face and edge).
* The pitting factor uses P = deepest pit depth + average penetration
  (:func:`coupon.ratings.mass_loss.deepest_penetration_mm`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from coupon.ratings import mass_loss as ml
from coupon.ratings.scales import ASTM_G46_DEPTH, ASTM_G46_DENSITY, ASTM_G46_SIZE
from coupon.ratings.spatial import clark_evans

#: Number of deepest pits averaged for the depth rating (ASTM G46, from memory).
DEEPEST_N = 10


@dataclass(frozen=True)
class MassLoss:
    """Mass-loss inputs of one coupon (ASTM G1).

    Attributes
    ----------
    mass_loss_mg : float
        Mass lost after cleaning, mg.
    hours : float
        Exposure time, h.
    density_g_cm3 : float
        Metal density, g/cm3.
    exposed_area_cm2 : float or None
        All exposed surface; None to use the analysed area (with a warning).
    """

    mass_loss_mg: float
    hours: float
    density_g_cm3: float = ml.CARBON_STEEL_DENSITY_G_CM3
    exposed_area_cm2: float | None = None

    def __post_init__(self):
        for name, value, unit in (("mass loss", self.mass_loss_mg, "mg"), ("exposure time", self.hours, "h"),
                                  ("density", self.density_g_cm3, "g/cm3")):
            if not (np.isfinite(value) and value > 0):
                raise ValueError(f"{name} must be finite and positive, got {value!r} {unit}")
        if self.exposed_area_cm2 is not None and not (np.isfinite(self.exposed_area_cm2) and self.exposed_area_cm2 > 0):
            raise ValueError(f"exposed area must be finite and positive, got {self.exposed_area_cm2!r} cm2")


def _none_if_nan(x: float) -> float:
    return float(x) if x is not None and np.isfinite(x) else float("nan")


def summarise_pits(pits: pd.DataFrame, analysed_area_mm2: float, perimeter_mm: float,
                   mass: MassLoss | None = None) -> tuple[dict, dict, list[str]]:
    """Numbers for one coupon.

    Returns
    -------
    summary : dict
        The summary-table values (see :data:`coupon.cli.pits.SUMMARY_COLUMNS`).
    extra : dict
        Spread statistics, ten-deepest mean, average penetration, exposed area used.
    warnings : list of str
    """
    warnings: list[str] = []
    n = int(len(pits))
    area = pits["area_mm2"].to_numpy(float)
    area_m2 = analysed_area_mm2 * 1e-6
    density_m2 = n / area_m2
    spread = clark_evans(pits[["x_mm", "y_mm"]].to_numpy(float), analysed_area_mm2, perimeter_mm)
    depths = pits["depth_mm"].to_numpy(float)
    has_depth = bool(n and np.isfinite(depths).any())
    max_depth = float(np.nanmax(depths)) if has_depth else float("nan")
    deepest = np.sort(depths[np.isfinite(depths)])[::-1][:DEEPEST_N] if has_depth else np.array([])
    mean_deepest = float(deepest.mean()) if deepest.size else float("nan")
    mean_area = float(area.mean()) if n else float("nan")
    summary = {
        "analysed_area_mm2": float(analysed_area_mm2),
        "pit_count": n,
        "density_per_m2": density_m2,
        "density_per_cm2": n / (analysed_area_mm2 / 100.0),
        "mean_area_mm2": mean_area,
        "median_area_mm2": float(np.median(area)) if n else float("nan"),
        "max_area_mm2": float(area.max()) if n else float("nan"),
        "pitted_area_pct": 100.0 * float(area.sum()) / analysed_area_mm2,
        "clark_evans_r": spread.ratio,
        "clark_evans_note": spread.note,
        "g46_density": ASTM_G46_DENSITY.rate(density_m2) or "",
        "g46_size": ASTM_G46_SIZE.rate(mean_area) or "",
        "g46_depth": ASTM_G46_DEPTH.rate(mean_deepest) or "",
        "max_depth_mm": max_depth,
        "corrosion_rate_mm_y": float("nan"),
        "corrosion_rate_mpy": float("nan"),
        "average_penetration_mm": float("nan"),
        "pitting_factor": float("nan"),
    }
    extra = {"spread": spread.to_dict(), "mean_depth_deepest_mm": mean_deepest, "deepest_n": int(deepest.size)}
    if n == 0:
        warnings.append("no pits counted: the G46 ratings are left empty")
    if mass is not None:
        if mass.exposed_area_cm2 is None:
            area_cm2 = analysed_area_mm2 / 100.0
            warnings.append(f"exposed area taken from the analysed area of this face ({area_cm2:.2f} cm2); a coupon "
                            "loses mass from every exposed face and edge: give --exposed-area-cm2 for the G1 rate")
        else:
            area_cm2 = mass.exposed_area_cm2
        w_g = mass.mass_loss_mg / 1000.0
        summary["corrosion_rate_mm_y"] = ml.corrosion_rate(w_g, area_cm2, mass.hours, mass.density_g_cm3, "mm/y")
        summary["corrosion_rate_mpy"] = ml.corrosion_rate(w_g, area_cm2, mass.hours, mass.density_g_cm3, "mpy")
        d = ml.average_penetration_mm(w_g, area_cm2, mass.density_g_cm3)
        summary["average_penetration_mm"] = d
        if has_depth:
            summary["pitting_factor"] = ml.pitting_factor(ml.deepest_penetration_mm(max_depth, d), d)
        extra["exposed_area_cm2_used"] = area_cm2
        extra["mass_loss"] = {"mass_loss_mg": mass.mass_loss_mg, "hours": mass.hours,
                              "density_g_cm3": mass.density_g_cm3, "exposed_area_cm2": mass.exposed_area_cm2}
    return summary, extra, warnings
