"""Demo steps for the campaign: set it up before the analyses, report after them.

The invented campaign of the Brackwater lab: the three coating systems of the
panel step (three replicates each, two with ``--small``), the two immersion
coupons of the pit step and the droplet screen of the droplet step, all in
one database ``results/coupon.db``.  Every analysis command writes its
``--out`` into a subfolder of ``results/``, so it finds that database by
default.  The report step writes ``results/report.html`` and
``results/report.pdf`` and compares the ratings stored in the database with
the scenes' ground truth (``ctx.summary["campaign"]``).
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd

from coupon.demo import LAB_NAME, DemoContext
from coupon.io.atomic import write_csv

def specimens(ctx: DemoContext) -> list[dict]:
    """Every specimen of the demo campaign, with the IDs the analysis steps will report."""
    from coupon.demo_droplet import TREATMENT
    from coupon.demo_panels import SYSTEMS, replicates
    from coupon.demo_pits import COUPONS, STEEL

    rows = [{"specimen_id": f"{system}-{rep}", "system": system, "replicate": rep, "row": rep, "col": col,
             "kind": "panel", "system_name": name}
            for col, (system, name) in enumerate(SYSTEM_NAMES.items(), start=1) if system in SYSTEMS
            for rep in range(1, replicates(ctx) + 1)]
    coupons = COUPONS[1:] if ctx.small else COUPONS
    rows += [{"specimen_id": c[0], "system": "BW-S4", "replicate": k, "kind": "coupon", "system_name": STEEL}
             for k, c in enumerate(coupons, start=1)]
    rows.append({"specimen_id": "BW-T2", "system": "BW-T2", "replicate": 1, "kind": "droplet",
                 "system_name": TREATMENT})
    return rows


#: The invented coating systems, by the IDs the panel step uses.
SYSTEM_NAMES = {
    "BW-1": "zinc-rich epoxy primer + polyurethane topcoat (invented)",
    "BW-2": "waterborne acrylic, two coats (invented)",
    "BW-3": "solvent alkyd, single coat (invented)",
}


def campaign_setup_step(ctx: DemoContext) -> None:
    from coupon.demo_panels import inspection_hours

    layout = ctx.images / "campaign_specimens.csv"
    ctx.images.mkdir(parents=True, exist_ok=True)
    write_csv(layout, pd.DataFrame(specimens(ctx)))
    ctx.results.mkdir(parents=True, exist_ok=True)
    ctx.run(["campaign", "init", ctx.results, "--layout", layout, "--name", "Demo campaign BW-2026",
             "--lab", LAB_NAME, "--schedule-h", ",".join(map(str, inspection_hours(ctx))),
             "--notes", "All scenes, systems and numbers are invented for the demonstration."])


def report_step(ctx: DemoContext) -> None:
    from coupon.campaign.store import read_table
    from coupon.ratings.scales import ASTM_D610

    ctx.run(["campaign", "status", ctx.results])
    report, pdf = ctx.results / "report.html", ctx.results / "report.pdf"
    ctx.run(["report", ctx.results, "--out", report, "--pdf", pdf, "--profile", ctx.profile])
    db = ctx.results / "coupon.db"
    panels = read_table(db, "panels")
    errors = []
    for image in panels["inspection_image"].unique():
        truth_path = (ctx.images / Path(image).name).with_suffix(".truth.json")
        if not truth_path.exists():
            continue
        truth = {f"R{p['position'][0]}C{p['position'][1]}": p for p in json.loads(truth_path.read_text())["panels"]}
        for _, r in panels[panels["inspection_image"] == image].iterrows():
            t = truth.get(r["position"])
            if t is not None and r["status"] == "ok":
                # issue tolerance for rust area: max(0.1 percentage points, 15 % relative)
                tol = max(0.1, 0.15 * t["rust_area_pct"])
                errors.append({"grade": int(r["rust_grade"]), "grade_truth": int(ASTM_D610.rate(t["rust_area_pct"])),
                               "rust_ok": abs(r["rust_area_pct"] - t["rust_area_pct"]) <= tol,
                               "creep_mm": (abs(r["creep_mean_mm"] - t["creep_mean_mm"])
                                            if "creep_mean_mm" in t and np.isfinite(r["creep_mean_mm"]) else None),
                               "specimen": r["specimen_id"]})
    grade_off = [abs(e["grade"] - e["grade_truth"]) for e in errors]
    creep = [e["creep_mm"] for e in errors if e["creep_mm"] is not None]
    ctx.summary["campaign"] = {
        "database": str(db), "report": str(report), "pdf": str(pdf),
        "panel_rows_in_database": int(len(panels)),
        "pit_summaries_in_database": int(len(read_table(db, "pit_summary"))),
        "droplet_frames_in_database": int(len(read_table(db, "droplet"))),
        "rust_grade_max_abs_error": int(max(grade_off)) if grade_off else None,
        "rust_grade_exact_pct": float(100 * np.mean([g == 0 for g in grade_off])) if grade_off else None,
        "panels_compared": len(errors),
        "rust_area_within_tolerance": int(sum(e["rust_ok"] for e in errors)),
        "rust_area_outside_tolerance": sorted({e["specimen"] for e in errors if not e["rust_ok"]}),
        "creep_mean_max_abs_error_mm": float(max(creep)) if creep else None,
    }
    ctx.report = report
