"""Panel ratings beyond the tables: the ASTM D610 distribution letter and the written grade.

ASTM D610 names four distributions (S spot, G general, P pinpoint, H hybrid)
and defines them in words and pictures only (S: rust concentrated in a few
localized areas; G: spots of various sizes spread at random; P: very small
individual specks spread over the surface; H: a mix).  The numeric rule below
is coupon's own, documented choice.  It weighs every site by its rust area, so
a few small false sites, or specks merged into one site, move the letter only
by the little area they carry:

* a *pinpoint* site has a rust area of at most ``PINPOINT_MAX_MM2`` (0.8 mm2, a
  speck about 1 mm across).  Pinpoint specks one to three photo pixels across
  measure larger than painted once JPEG has spread them, and specks closer than
  a pixel or two merge into one site; both stay well under this limit;
* the *pinpoint share* is the pinpoint sites' part of the rusted area, the
  *larger share* the rest;
* **H** when both shares are at least ``MIX_MIN_SHARE`` (30 %): two kinds each
  carry a substantial part of the rust;
* **P** when the pinpoint share is larger than ``1 - MIX_MIN_SHARE`` (more than 70 %);
* otherwise the larger sites decide (pinpoint share under 30 %).  Sites closer than
  ``CLUSTER_MM`` (6 mm) are joined into clusters.  **S** when the largest
  ``SPOT_MAX_CLUSTERS`` (3) clusters carry at least ``SPOT_MIN_SHARE`` (80 %) of
  their rust and it touches at most ``SPOT_MAX_CELL_SHARE`` (25 %) of the
  ``CELL_MM`` (10 mm) cells of the rated area: rust concentrated in a few
  localized areas;
* **G** otherwise: spots spread over the panel.  Spot and general rust together
  read G, not H.

Grades 10 and 0 carry no letter (ASTM D610-08, verified in the reference notes).
Ratings support, and do not replace, a qualified inspector working to the
governing standard.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage as ndi

from coupon.ratings.scales import rate

#: Largest rust area (mm2) of a pinpoint site: a speck about 1 mm across (coupon's choice).
PINPOINT_MAX_MM2 = 0.8
#: Share of the rusted area each of two kinds must carry for H (coupon's choice).
MIX_MIN_SHARE = 0.30
#: Sites closer than this (mm) form one cluster for the spot test (coupon's choice).
CLUSTER_MM = 6.0
#: S: at most this many clusters ...
SPOT_MAX_CLUSTERS = 3
#: ... carry at least this share of the larger sites' rust ...
SPOT_MIN_SHARE = 0.80
#: ... and the rust touches at most this share of the rated area's cells ...
SPOT_MAX_CELL_SHARE = 0.25
#: ... of this side (mm).
CELL_MM = 10.0
DISTRIBUTIONS = {"S": "spot", "G": "general", "P": "pinpoint", "H": "hybrid"}


def pinpoint_share(site_area_mm2) -> float:
    """Part of the rusted area (0 to 1) in pinpoint sites (rust area <= ``PINPOINT_MAX_MM2``)."""
    areas = np.asarray(site_area_mm2, float).ravel()
    total = areas.sum()
    if areas.size == 0 or total <= 0:
        return float("nan")
    return float(areas[areas <= PINPOINT_MAX_MM2].sum() / total)


def distribution_letter(site_area_mm2: np.ndarray, site_centroid_mm: np.ndarray, rated_mask: np.ndarray,
                        px_per_mm: float, grade: str | None) -> str:
    """ASTM D610 distribution letter from the sizes and spread of the rust sites.

    Parameters
    ----------
    site_area_mm2 : (n,) array
        Rust area of each site.
    site_centroid_mm : (n, 2) array
        Centroid of each site, (x, y) in mm from the rated panel's top-left corner.
    rated_mask : (R, C) bool array
        Rated area on the panel grid.
    px_per_mm : float
        Resolution of ``rated_mask``.
    grade : str or None
        ASTM D610 grade; grades 10 and 0 (and no grade) carry no letter.

    Returns
    -------
    str
        "P", "H", "S" or "G" by the rule in the module docstring; "" when none applies.
    """
    areas = np.asarray(site_area_mm2, float).ravel()
    if grade in (None, "10", "0") or areas.size == 0 or areas.sum() <= 0:
        return ""
    total = areas.sum()
    pin = areas <= PINPOINT_MAX_MM2
    pin_share = areas[pin].sum() / total
    larger_share = areas[~pin].sum() / total
    if pin_share >= MIX_MIN_SHARE and larger_share >= MIX_MIN_SHARE:
        return "H"
    if larger_share < MIX_MIN_SHARE:
        return "P"
    # the larger sites carry more than 70 %: concentrated in a few places (S) or spread (G)
    big = ~pin
    cent = np.asarray(site_centroid_mm, float).reshape(-1, 2)[big]
    big_areas = areas[big]
    rows, cols = rated_mask.shape
    # clusters: sites within CLUSTER_MM of each other, by labelling a 1 mm grid
    grid = np.zeros((int(np.ceil(rows / px_per_mm)) + 1, int(np.ceil(cols / px_per_mm)) + 1), bool)
    gi = np.clip(cent[:, 1].astype(int), 0, grid.shape[0] - 1)
    gj = np.clip(cent[:, 0].astype(int), 0, grid.shape[1] - 1)
    grid[gi, gj] = True
    r = int(CLUSTER_MM / 2)
    disk = np.hypot(*np.mgrid[-r:r + 1, -r:r + 1]) <= r
    lab, n = ndi.label(ndi.binary_dilation(grid, structure=disk), structure=np.ones((3, 3)))
    per_cluster = np.bincount(lab[gi, gj], weights=big_areas, minlength=n + 1)[1:]
    top_share = np.sort(per_cluster)[::-1][:SPOT_MAX_CLUSTERS].sum() / big_areas.sum()
    c = int(CELL_MM)
    cells = np.zeros((grid.shape[0] // c + 1, grid.shape[1] // c + 1), bool)
    cells[gi // c, gj // c] = True
    rated_cells = max(1, int(np.ceil(rated_mask.sum() / ((CELL_MM * px_per_mm) ** 2))))
    if top_share >= SPOT_MIN_SHARE and cells.sum() <= SPOT_MAX_CELL_SHARE * rated_cells:
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
