"""Demo step: a droplet screen of an invented steel treatment, analysed by ``coupon droplet``.

Scenario (invented): the Brackwater laboratory puts a 10 mm drop of salt water with universal
indicator on steel panels given the made-up "BW-T2 phosphate rinse" and photographs it every
5 minutes.  The frames are drawn by :mod:`coupon.synth.droplet` at the demo profile's scale,
with the ground truth beside each image; the recovered numbers are compared with it in
``ctx.summary["droplet"]``.
"""

from __future__ import annotations

import dataclasses
import json

import numpy as np
import pandas as pd

from coupon.synth.droplet import DropletSeriesSpec, droplet_series, public_truth, series_events

TREATMENT = "BW-T2 phosphate rinse (invented)"
MACRO_PX_PER_MM = 30.0


def droplet_step(ctx) -> None:
    # colour and indicator come from the bench profile; droplets are photographed through a macro
    # lens at about 30 px/mm (a 10 mm drop ~300 px across), not with the bench camera of the
    # profile's scale, so the scale is given on the command line
    ppm = MACRO_PX_PER_MM
    n = 5 if ctx.small else 10
    spec = DropletSeriesSpec(n_frames=n, interval_min=45.0 / (n - 1), image_wh=(int(18 * ppm), int(16 * ppm)),
                             px_per_mm=ppm, jpeg_quality=None, develop_min=10.0, acid_peak_min=30.0)
    folder = ctx.images / "droplet_BW-T2"
    truths = []
    for rgb, truth in droplet_series(spec, seed=404):
        name = f"droplet_BW-T2/BW-T2_drop_t{int(round(truth['t_min'])):03d}min.jpg"
        truth = public_truth(truth) | {"treatment": TREATMENT, "spec": dataclasses.asdict(spec)}
        ctx.save_scene(name, rgb, truth, quality=92)
        truths.append(truth)
    out = ctx.results / "droplet_BW-T2"
    ctx.run(["droplet", folder, "--profile", ctx.profile, "--px-per-mm", ppm, "--out", out])

    table = pd.read_csv(out / "droplet.csv")
    summary = json.loads((out / "droplet_summary.json").read_text())
    ev, true_ev = summary["events"], series_events(truths)
    ok = table["drop_found"].astype(bool).to_numpy()
    t_area = np.array([t["drop_area_mm2"] for t in truths])
    rel = np.abs(table["drop_area_mm2"].to_numpy()[ok] / t_area[ok] - 1)
    d_acid = np.abs(table["acidic_area_pct"].to_numpy()[ok] - np.array([t["acidic_pct"] for t in truths])[ok])
    d_basic = np.abs(table["basic_area_pct"].to_numpy()[ok] - np.array([t["basic_pct"] for t in truths])[ok])
    d_centre = np.abs(table["ph_centre"].to_numpy()[ok] - np.array([t["ph_centre"] for t in truths])[ok])
    d_rim = np.abs(table["ph_rim"].to_numpy()[ok] - np.array([t["ph_rim"] for t in truths])[ok])
    ctx.summary["droplet"] = {
        "treatment": TREATMENT, "frames": n, "px_per_mm": ppm,
        "drop_area_max_rel_error_pct": float(100 * rel.max()),
        "acidic_pct_max_abs_error": float(d_acid.max()), "basic_pct_max_abs_error": float(d_basic.max()),
        "ph_centre_max_abs_error": float(np.nanmax(d_centre)), "ph_rim_max_abs_error": float(np.nanmax(d_rim)),
        "t_acidic_first_min": ev["t_acidic_first_min"], "t_acidic_first_min_truth": true_ev["t_acidic_first_min"],
        "t_rust_first_min": ev["t_rust_first_min"], "t_rust_first_min_truth": true_ev["t_rust_first_min"],
        "evaporation_mm2_per_min": ev["evaporation"]["rate_mm2_per_min"],
        "evaporation_mm2_per_min_truth": spec.area_loss_mm2_per_min,
        "final_pattern": ev["final"]["pattern"],
    }
