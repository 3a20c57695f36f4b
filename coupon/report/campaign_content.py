"""What a campaign report contains, shared by the HTML and the PDF report.

:func:`plot_plan` lists every plot (id, section, caption, builder) for one
:class:`~coupon.campaign.timeline.CampaignAnalysis`, so both reports show the same
figures; :func:`gallery` lists the overlay pictures per specimen across inspections;
:func:`describe_profile` summarises the calibration profile used.
"""

from __future__ import annotations

import hashlib
import json
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import pandas as pd

from coupon.campaign.timeline import RATING_METRICS, CampaignAnalysis
from coupon.report import campaign_figures as cf

CAUTIONS = (
    "Ratings from images support, and do not replace, a qualified coatings or corrosion inspector and the "
    "governing standard or product specification; confirm borderline and failing ratings by eye against the "
    "standard's own definitions and reference pictures before any decision about a structure or product.",
    "The failure criteria in this report are those of the criteria file named below; they are not acceptance "
    "limits of any standard unless the specification says so.",
    "Salt-spray and cyclic cabinets: follow the cabinet maker's instructions and the test standard (e.g. ASTM "
    "B117, ISO 9227); salt fog is corrosive and an irritant; switch off and let the cabinet vent before opening, "
    "and wear eye protection and gloves when handling wet panels.",
    "Chemicals: cleaning acids for mass loss (ASTM G1) and pH indicators are hazardous; read their safety data "
    "sheets, work in a fume hood with eye, face and hand protection, and dispose of spent solutions as the "
    "local rules require.",
)


@dataclass(frozen=True)
class PlotSpec:
    fig_id: str
    section: str
    caption: str
    make: Callable[[], object]


def resolve_path(path, bases: list[Path]) -> Path | None:
    """An existing file for a path as stored (as given, or relative to one of ``bases``), else None."""
    if path is None or (isinstance(path, float) and math.isnan(path)) or str(path).strip() in ("", "nan", "None"):
        return None
    p = Path(str(path))
    if p.is_file():
        return p
    if not p.is_absolute():
        for b in bases:
            if (b / p).is_file():
                return b / p
    for b in bases:  # the folder may have moved with the campaign: try the file name alone
        if (b / p.name).is_file():
            return b / p.name
    return None


def _has(series: pd.DataFrame, col: str) -> bool:
    return col in series and pd.to_numeric(series[col], errors="coerce").notna().any()


def droplet_keys(a: CampaignAnalysis) -> list[str]:
    return sorted(a.droplet["series_key"].dropna().astype(str).unique()) if len(a.droplet) else []


def pit_images(a: CampaignAnalysis) -> list[tuple[str, str]]:
    """(coupon label, inspection image) for every pit summary with per-pit rows."""
    out = []
    for r in a.coupons.itertuples(index=False):
        out.append((str(r.specimen_id), str(r.image)))
    return out


def plot_plan(a: CampaignAnalysis) -> list[PlotSpec]:
    """Every plot of the report, in order."""
    colours = cf.system_colours(list(a.specimens["system"].dropna()) + list(a.series["system"]))
    plans: list[PlotSpec] = []
    for metric, label in RATING_METRICS.items():
        if _has(a.series, metric):
            plans.append(PlotSpec(f"rating-{metric}", "ratings", f"{label} against exposure time; line: system "
                                  f"mean, band: min to max over replicates, dots: replicates",
                                  lambda m=metric, lab=label: cf.rating_figure(a.series, a.by_system, m, lab,
                                                                               colours)))
    if len(a.ttf):
        plans.append(PlotSpec("ttf", "ttf", "time to failure per specimen",
                              lambda: cf.ttf_figure(a.ttf, colours)))
    for i, key in enumerate(droplet_keys(a)):
        frames = a.droplet[a.droplet["series_key"] == key]
        plans.append(PlotSpec(f"droplet-zones-{i}", "droplet", f"droplet {key}: zone areas against time",
                              lambda f=frames, k=key: cf.droplet_zone_figure(f, f"droplet {k}: zone areas")))
        rad = a.radial[a.radial["series_key"] == key] if len(a.radial) else a.radial
        if len(rad) and _has(rad, "ph_median"):
            plans.append(PlotSpec(f"droplet-kymograph-{i}", "droplet", f"droplet {key}: kymograph of the "
                                  "radial pH profile", lambda r=rad, k=key: cf.kymograph_figure(r, f"droplet {k}: "
                                                                                                 "radial pH")))
    if len(a.coupons):
        plans.append(PlotSpec("coupons", "pits", "pit density and corrosion rate per coupon",
                              lambda: cf.coupon_figure(a.coupons, colours)))
    for i, (label, image) in enumerate(pit_images(a)):
        pits = a.pits[a.pits["inspection_image"].astype(str) == image]
        if len(pits):
            plans.append(PlotSpec(f"pit-hist-{i}", "pits", f"coupon {label}: pit size histogram",
                                  lambda p=pits, lab=label: cf.pit_histogram_figure(p, f"coupon {lab}: pit sizes")))
    return plans


def gallery(a: CampaignAnalysis, bases: list[Path]) -> list[tuple[str, list[tuple[Path | None, str, str]]]]:
    """Per specimen with panel ratings: (specimen, [(overlay file or None, caption, stored path)]) by time."""
    out = []
    for sid, g in a.series.groupby("specimen_id", sort=False):
        items = []
        for r in g.sort_values("exposure_h").itertuples(index=False):
            area = "" if pd.isna(r.rust_area_pct) else f", {r.rust_area_pct:.2f} %"
            grade = f", grade {r.rust_grade_label}" if r.rust_grade_label else ""
            stored = "" if pd.isna(r.overlay) else str(r.overlay)
            items.append((resolve_path(r.overlay, bases), f"{r.exposure_h:g} h{grade}{area}", stored))
        out.append((str(sid), items))
    return out


def describe_profile(path: Path | None) -> dict | None:
    """Summary of a calibration profile file (read as plain JSON; nothing in it is executed)."""
    if path is None or not Path(path).is_file():
        return None
    raw = Path(path).read_bytes()
    try:
        data = json.loads(raw.decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError):
        return {"path": str(path), "sha256": hashlib.sha256(raw).hexdigest(), "error": "not valid JSON"}
    info = {"path": str(path), "sha256": hashlib.sha256(raw).hexdigest(), "created": data.get("created"),
            "tool_version": data.get("tool_version"), "parts": {}, "history": []}
    sc = data.get("scale") or None
    if isinstance(sc, dict):
        info["parts"]["scale"] = (f"{sc.get('px_per_mm', float('nan')):.4g} px/mm "
                                  f"(+/- {sc.get('uncertainty_px_per_mm', float('nan')):.2g}), method "
                                  f"{sc.get('method')}, reprojection error {sc.get('reprojection_error_mm')} mm")
    co = data.get("colour") or None
    if isinstance(co, dict):
        res = co.get("residual_de00") or {}
        worst = max(res.values()) if res else float("nan")
        info["parts"]["colour"] = (f"mean CIEDE2000 residual {co.get('mean_de00')}, worst patch {worst:.3g}, "
                                   f"matrix {co.get('matrix_kind')}")
    ind = data.get("indicator") or None
    if isinstance(ind, dict):
        pts = ind.get("points") or []
        phs = [p.get("ph") for p in pts if isinstance(p, dict)]
        info["parts"]["indicator"] = (f"{ind.get('name')}, {len(pts)} calibration points"
                                      + (f", pH {min(phs):g} to {max(phs):g}" if phs else "")
                                      + (" (generic shipped table, approximate)" if ind.get("is_default") else ""))
    for h in data.get("history") or []:
        if isinstance(h, dict):
            res = h.get("residuals") or {}
            flat = ", ".join(f"{k} = {v:.4g}" if isinstance(v, (int, float)) else f"{k} = {v}"
                             for k, v in res.items() if not isinstance(v, (dict, list)))
            info["history"].append({"step": h.get("step"), "date": h.get("date"), "residuals": flat})
    return info


def profiles_used(a: CampaignAnalysis) -> pd.DataFrame:
    """Distinct profile SHA-256 values of the inspections, with how many inspections used each."""
    ins = a.inspections
    if ins.empty:
        return pd.DataFrame(columns=["profile_sha256", "inspections", "commands"])
    ins = ins.assign(profile_sha256=ins["profile_sha256"].fillna("(none)"))
    g = ins.groupby("profile_sha256")
    return pd.DataFrame({"inspections": g.size(), "commands": g["command"].agg(lambda s: ", ".join(sorted(set(s))))}
                        ).reset_index()
