"""Panel ratings beyond the tables: the ASTM D610 distribution letter and the written grade.

ASTM D610 names four distributions (S spot, G general, P pinpoint, H hybrid)
and defines them in words and pictures only.  The numeric rule below is
coupon's own, documented choice:

* a *pinpoint* site has a rust area of at most ``PINPOINT_MAX_MM2`` (0.3 mm2,
  a speck about 0.6 mm across);
* **P** when pinpoint sites carry at least 70 % of the rusted area;
* **H** when they carry at least 20 % and there are at least 15 of them (a mix);
* **S** when the rust is concentrated: at least 80 % of the rusted area lies in
  at most 3 clusters (sites closer than ``CLUSTER_MM`` joined) and rust touches
  at most 25 % of the 10 mm cells of the rated area;
* **G** otherwise.

Grades 10 and 0 carry no letter (ASTM D610-08, verified in the reference notes).
Ratings support, and do not replace, a
qualified inspector working to the governing standard.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage as ndi

from coupon.ratings.scales import rate

PINPOINT_MAX_MM2 = 0.3
CLUSTER_MM = 6.0
DISTRIBUTIONS = {"S": "spot", "G": "general", "P": "pinpoint", "H": "hybrid"}


def distribution_letter(site_area_mm2: np.ndarray, site_centroid_mm: np.ndarray, rated_mask: np.ndarray,
                        px_per_mm: float, grade: str | None) -> str:
    """D610 distribution letter from the sizes and spread of the rust sites ("" when none applies)."""
    areas = np.asarray(site_area_mm2, float)
    if grade in (None, "10", "0") or areas.size == 0 or areas.sum() <= 0:
        return ""
    total = areas.sum()
    pin = areas <= PINPOINT_MAX_MM2
    pin_share = areas[pin].sum() / total
    if pin_share >= 0.7:
        return "P"
    if pin_share >= 0.2 and pin.sum() >= 15:
        return "H"
    cent = np.asarray(site_centroid_mm, float).reshape(-1, 2)
    # clusters: sites within CLUSTER_MM of each other, by labelling a coarse 1 mm grid
    rows, cols = rated_mask.shape
    grid = np.zeros((int(np.ceil(rows / px_per_mm)) + 1, int(np.ceil(cols / px_per_mm)) + 1), bool)
    gi = np.clip(cent[:, 1].astype(int), 0, grid.shape[0] - 1)
    gj = np.clip(cent[:, 0].astype(int), 0, grid.shape[1] - 1)
    grid[gi, gj] = True
    r = int(CLUSTER_MM / 2)
    disk = np.hypot(*np.mgrid[-r:r + 1, -r:r + 1]) <= r
    lab, n = ndi.label(ndi.binary_dilation(grid, structure=disk), structure=np.ones((3, 3)))
    per = np.bincount(lab[gi, gj], weights=areas, minlength=n + 1)[1:]
    top3 = np.sort(per)[::-1][:3].sum() / total
    cells = np.zeros((grid.shape[0] // 10 + 1, grid.shape[1] // 10 + 1), bool)
    cells[gi // 10, gj // 10] = True
    rated_cells = max(1, int(np.ceil(rated_mask.sum() / (100 * px_per_mm**2))))
    if top3 >= 0.8 and cells.sum() <= 0.25 * rated_cells:
        return "S"
    return "G"


def rust_grade(rust_area_pct: float) -> str | None:
    """ASTM D610 grade (ASTM D610-08 Table 1 via :mod:`coupon.ratings.scales`)."""
    return rate("astm-d610", rust_area_pct)


def written_grade(grade: str | None, letter: str) -> str:
    """The grade as written on a report, e.g. ``7-G``; grades 10 and 0 have no letter."""
    if grade is None:
        return ""
    return f"{grade}-{letter}" if letter and grade not in ("10", "0") else grade
