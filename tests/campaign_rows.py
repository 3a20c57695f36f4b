"""Invented campaign rows shaped as the documented CSV columns of panels, pits and droplet (issues 3-5).

The numbers are made up for the mechanics tests of the campaign store, timeline and
reports; the ratings in them are looked up from the published tables in
coupon.ratings.scales, as the panels and pits commands do.
"""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np

from coupon.campaign.store import open_store
from coupon.ratings.scales import rate

HOURS = (0, 168, 336, 504, 720)
#: system -> rust growth (percentage points per 100 h) of replicates 1..3 (invented)
SYSTEMS = {"SYS-A": (0.02, 0.03, 0.025), "SYS-B": (0.1, 0.12, 0.2), "SYS-C": (0.5, 0.6, 0.4)}


def panel_row(image: str, panel_id: str, exposure_h: float, rust_area_pct: float, creep_mean_mm: float,
              overlay: str = "", status: str = "ok") -> dict:
    """A panels.csv row (issue 3 columns); ratings from the published tables."""
    return {
        "image": image, "panel_id": panel_id, "position": "r1c1", "exposure_h": exposure_h,
        "x_px": 100.0, "y_px": 200.0, "rated_area_mm2": 9600.0, "rust_area_mm2": 96.0 * rust_area_pct,
        "rust_area_pct": rust_area_pct, "rust_area_pct_unc": 0.1 * rust_area_pct, "rust_sites": 3,
        "rust_grade": rate("astm-d610", rust_area_pct), "rust_distribution": "G" if rust_area_pct > 0.01 else "",
        "ri_degree": rate("iso-4628-3", rust_area_pct), "scribe_found": True, "creep_mean_mm": creep_mean_mm,
        "creep_max_mm": 1.5 * creep_mean_mm, "creep_min_mm": 0.5 * creep_mean_mm,
        "creep_rating": rate("astm-d1654", creep_mean_mm), "overlay": overlay, "status": status,
    }


def pit_rows(image: str, n: int, seed: int) -> tuple[list[dict], dict]:
    rng = np.random.default_rng(seed)
    areas = rng.lognormal(-2.0, 0.6, n)
    pits = [{"image": image, "pit_id": i + 1, "x_mm": float(rng.uniform(0, 50)), "y_mm": float(rng.uniform(0, 25)),
             "area_mm2": float(a), "eq_diameter_mm": float(2 * np.sqrt(a / np.pi)), "major_mm": float(np.sqrt(a)),
             "minor_mm": float(np.sqrt(a) / 2), "depth_mm": float(rng.uniform(0.05, 0.4))} for i, a in enumerate(areas)]
    area_mm2 = 1250.0
    summary = {"image": image, "analysed_area_mm2": area_mm2, "pit_count": n, "density_per_m2": n / area_mm2 * 1e6,
               "mean_area_mm2": float(areas.mean()), "median_area_mm2": float(np.median(areas)),
               "max_area_mm2": float(areas.max()), "pitted_area_pct": float(100 * areas.sum() / area_mm2),
               "clark_evans_r": 1.02, "g46_density": rate("astm-g46-density", n / area_mm2 * 1e6),
               "g46_size": rate("astm-g46-size", float(areas.mean())), "g46_depth": "C-1", "max_depth_mm": 0.4,
               "corrosion_rate_mm_y": 1.513, "corrosion_rate_mpy": 59.59, "pitting_factor": 3.1, "overlay": "",
               "status": "ok"}
    return pits, summary


def droplet_frames(n_frames: int = 6, rings: int = 5) -> tuple[list[tuple[str, dict, list[dict]]], dict]:
    frames = []
    for k in range(n_frames):
        t = 5.0 * k
        name = f"frames/D01_t{int(t):03d}min.png"
        drop = 80.0 - 1.0 * t
        row = {"frame": name, "t_min": t, "drop_found": True, "drop_area_mm2": drop, "drop_diameter_mm":
               float(2 * np.sqrt(drop / np.pi)), "ph_median": 7.0, "ph_p05": 5.0 - 0.1 * k, "ph_p95": 9.0 + 0.1 * k,
               "ph_centre": 7.0 - 0.5 * k, "ph_rim": 7.0 + 0.5 * k, "acidic_area_mm2": 2.0 * k,
               "acidic_area_pct": 100 * 2.0 * k / drop, "basic_area_mm2": 3.0 * k, "basic_area_pct": 100 * 3.0 * k / drop,
               "rust_area_mm2": 0.5 * k, "rust_area_pct": 100 * 0.5 * k / drop, "indicator_coverage_pct": 95.0,
               "status": "ok"}
        radial = [{"frame": name, "t_min": t, "r_norm": (j + 0.5) / rings, "ph_median": 7.0 + (j - 2) * 0.4 * k / 5,
                   "n_px": 100 + j} for j in range(rings)]
        frames.append((name, row, radial))
    summary = {"series": "D01", "t_acidic_1pct_min": 5.0, "t_rust_0p5pct_min": 5.0, "peak_acidic_pct": 16.4,
               "peak_acidic_t_min": 25.0, "evaporation_rate_mm2_per_min": 1.0, "final_state": "drop present"}
    return frames, summary


def write_overlay(path: Path, level: float) -> str:
    from PIL import Image

    path.parent.mkdir(parents=True, exist_ok=True)
    arr = np.zeros((60, 30, 3), np.uint8)
    arr[...] = (230, 230, 230)
    arr[: int(60 * level), :, :] = (160, 80, 30)
    Image.fromarray(arr).save(path)
    return str(path)


def layout_specimens(bad_id: str | None = None) -> list[dict]:
    specs = []
    k = 0
    for sysname, rates in SYSTEMS.items():
        for rep in range(1, len(rates) + 1):
            k += 1
            sid = bad_id if (bad_id and k == 1) else f"P{k:02d}"
            specs.append({"specimen_id": sid, "system": sysname, "replicate": rep, "kind": "panel",
                          "row": (k - 1) // 3 + 1, "col": (k - 1) % 3 + 1})
    specs += [{"specimen_id": "C01", "system": "SYS-A", "replicate": 1, "kind": "coupon"},
              {"specimen_id": "C02", "system": "SYS-B", "replicate": 1, "kind": "coupon"},
              {"specimen_id": "D01", "system": "SYS-A", "replicate": 1, "kind": "droplet"}]
    return specs


def build_campaign(root: Path, bad_id: str | None = None, skip: tuple[str, float] | None = None) -> Path:
    """A full invented campaign in root/coupon.db: 9 panels x 5 inspections, 2 coupons, 1 droplet series.

    ``skip`` = (panel ID, hours) leaves that inspection out; ``bad_id`` replaces the first panel's ID.
    """
    db = root / "coupon.db"
    specs = layout_specimens(bad_id)
    with open_store(db) as store:
        store.set_layout(specs)
        store.set_meta(campaign_name="Invented test campaign", lab="Nowhere Test Lab (invented)",
                       schedule_h=list(HOURS))
        panels = [s for s in specs if s["kind"] == "panel"]
        for h in HOURS:
            image = str(root / f"rack_{h:04d}h.jpg")
            rows = []
            for s, rate_pp in zip(panels, [r for rates in SYSTEMS.values() for r in rates]):
                if skip and (s["specimen_id"], h) == skip:
                    continue
                area = 0.005 + rate_pp * h / 100.0
                safe = re.sub(r"[^A-Za-z0-9]", "_", s["specimen_id"])
                ov = write_overlay(root / "overlays" / f"{safe}_{h}.png", min(area / 2, 1))
                rows.append(panel_row(image, s["specimen_id"], float(h), area, 0.004 * h * rate_pp * 10, ov))
            store.replace_results("panels", image, f"sha-rack-{h}", {"edge_mm": 5}, "profile-sha-1",
                                  {"panels": rows})
        for cid, n, seed in (("C01", 12, 1), ("C02", 30, 2)):
            image = str(root / f"{cid}_cleaned.png")
            pits, summary = pit_rows(image, n, seed)
            store.replace_results("pits", image, f"sha-{cid}", {"edge_mm": 2}, "profile-sha-1",
                                  {"pits": pits, "pit_summary": [summary]}, exposure_h=720.0)
        frames, dsum = droplet_frames()
        for name, row, radial in frames:
            store.replace_results("droplet", str(root / name), f"sha-{name}", {"acidic_below": 6.0}, "profile-sha-1",
                                  {"droplet": [row], "radial_profile": radial})
        store.replace_results("droplet", str(root / "frames"), "sha-series", {"acidic_below": 6.0}, "profile-sha-1",
                              {"droplet_summary": [dsum]}, specimen_id="D01")
    return db
