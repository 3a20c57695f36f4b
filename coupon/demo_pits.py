"""Demo step: pits on two cleaned coupons from an immersion test, analysed by ``coupon pits``.

Scenario (invented): the Brackwater laboratory immersed coupons of a made-up "BW-S4
low-carbon structural steel" in aerated 3.5 % NaCl for 336 h, cleaned them (ASTM G1
practice), weighed them and scanned each face with a height sensor.  Coupon S4-A pitted
mildly, S4-B heavily.  The scans, height maps (micrometres, float TIFF) and mass losses
are drawn by :mod:`coupon.synth.pits` at the demo profile's scale; the ground truth is
written beside each image, and recovered-vs-truth numbers go to ``ctx.summary["pits"]``.
"""

from __future__ import annotations

import pandas as pd

from coupon.io.atomic import write_float_tiff
from coupon.synth.pits import pitted_coupon_scene

STEEL = "BW-S4 low-carbon structural steel (invented)"
HOURS = 336.0
# (name, seed, pits, radius range mm, depth range mm, mass loss mg); coupon 50 x 30 x 3 mm
COUPONS = [("S4-A", 501, 35, (0.35, 0.9), (0.02, 0.12), 118.0), ("S4-B", 502, 90, (0.4, 1.4), (0.04, 0.3), 236.0)]
COUPON_MM = (50.0, 30.0)
THICKNESS_MM = 3.0


def pits_step(ctx) -> None:
    from coupon.calibrate.profile import load_profile

    prof = load_profile(ctx.profile)
    ppm = prof.scale.px_per_mm if prof.scale is not None else 10.0
    # all six faces of a 50 x 30 x 3 mm coupon were exposed (no suspension hole in this invented test)
    w, h, t = COUPON_MM[0] / 10, COUPON_MM[1] / 10, THICKNESS_MM / 10
    exposed_cm2 = 2 * (w * h + w * t + h * t)
    coupons = COUPONS[1:] if ctx.small else COUPONS
    out = ctx.results / "pits"
    summary = {}
    for name, seed, n, radius, depth, mass_mg in coupons:
        rgb, height, truth = pitted_coupon_scene(
            seed=seed, coupon_mm=COUPON_MM, px_per_mm=ppm, n_pits=n, radius_mm=radius, depth_mm=depth,
            touching_pairs=4, near_edge=6, texture="ground" if name.endswith("A") else "brushed")
        truth = truth | {"steel": STEEL, "hours": HOURS, "mass_loss_mg": mass_mg, "exposed_area_cm2": exposed_cm2}
        img = ctx.save_scene(f"pits/{name}_face1.jpg", rgb, truth)
        hmap = write_float_tiff(img.with_name(f"{name}_face1_height.tiff"), height * 1000.0)
        ctx.run(["pits", img, "--profile", ctx.profile, "--out", out, "--height-map", hmap, "--height-unit", "um",
                 "--mass-loss-mg", mass_mg, "--exposed-area-cm2", round(exposed_cm2, 3), "--hours", HOURS])
        row = pd.read_csv(out / "pit_summary.csv").set_index("image").loc[str(img)]
        tc = truth["counted"]
        summary[name] = {
            "pit_count": int(row["pit_count"]), "pit_count_truth": tc["count"],
            "density_per_m2": float(row["density_per_m2"]), "density_per_m2_truth": tc["density_per_m2"],
            "mean_area_mm2": float(row["mean_area_mm2"]), "mean_area_mm2_truth": tc["mean_area_mm2"],
            "max_depth_mm": float(row["max_depth_mm"]), "max_depth_mm_truth": tc["max_depth_mm"],
            "g46": f"{row['g46_density']} {row['g46_size']} {row['g46_depth']}",
            "corrosion_rate_mm_y": float(row["corrosion_rate_mm_y"]), "pitting_factor": float(row["pitting_factor"]),
        }
    ctx.summary["pits"] = summary
