"""Study: rate randomised synthetic trays and list every panel outside issue 3's tolerances.

Not a test (pytest collects only ``test_*.py``): a way to find the scenes the fixed tests miss.  Each
scene draws 3 to 6 panels (coating, rust kind and amount, scribe none/line/X with 0.5 to 3 mm creep (``--creep-max-mm``),
dirt, glare), 2 or 3 columns, a panel resolution of 6 to 10 px/mm, camera tilts up to 12 degrees, roll up
to 4, a light gradient up to 30 %, JPEG q85 to q95 with 4:2:0 or 4:4:4 chroma.  Checks (issue 3): every
panel found in its tray position; rust area within max(0.1 percentage points, 15 %) of the painted
truth; D610 grade within one class; a scribe found exactly where one is painted; creep mean within
0.3 mm.  Dense pinpoint rust on grey, green and dark coatings in 4:2:0 JPEGs is marked as the known fault
(DEVELOPERS.md).

Run by hand: ``python tests/studies/random_trays.py --seed 2 --scenes 17`` (about 10 s a scene).
"""

from __future__ import annotations

import argparse

import numpy as np

from coupon.ratings.panel_ratings import rust_grade
from coupon.segment.panels import PanelSettings, rate_panel
from coupon.segment.panels.detect import find_panels, rectify_panel
from coupon.synth.panels import (
    PanelSpec,
    TraySettings,
    tray_scene,
    truth_creep,
    truth_rust,
)

COATINGS = ["white", "grey", "dark", "green"]
KINDS = ["spots", "general", "pinpoint", "streaks"]


def random_scene(rng: np.random.Generator, creep_max_mm: float = 3.0) -> tuple[list[PanelSpec], int, TraySettings]:
    """One scene's panels, scene seed and settings (``creep_max_mm`` changes no other draw)."""
    n, cols = int(rng.integers(3, 7)), int(rng.integers(2, 4))
    specs = []
    for _ in range(n):
        scribe = str(rng.choice(["none", "line", "x"], p=[0.5, 0.3, 0.2]))
        specs.append(PanelSpec(str(rng.choice(COATINGS)), (str(rng.choice(KINDS)),), amount=float(rng.uniform(0.3, 2.0)),
                               scribe=scribe, creep_mm=float(rng.uniform(0.5, creep_max_mm)) if scribe != "none" else 0.0,
                               dirt=bool(rng.random() < 0.3), glare=bool(rng.random() < 0.3)))
    rows = int(np.ceil(n / cols))
    ppm = float(rng.uniform(6.0, 10.0))
    wh = (int((cols * 75 + (cols + 1) * 25) * ppm * 1.15), int((rows * 150 + (rows + 1) * 25) * ppm * 1.15))
    st = TraySettings(image_wh=wh, cols=cols, tilt_x_deg=float(rng.uniform(-12, 12)),
                      tilt_y_deg=float(rng.uniform(-12, 12)), roll_deg=float(rng.uniform(-4, 4)),
                      light=float(rng.uniform(0, 0.3)), jpeg_quality=int(rng.integers(85, 96)),
                      jpeg_chroma=str(rng.choice(["4:2:0", "4:4:4"])), plane_px_per_mm=max(12.0, 1.5 * ppm))
    return specs, int(rng.integers(0, 10000)), st


def check_scene(specs, seed, st) -> tuple[list[str], int]:
    """The problems of one scene (one line each) and the number of panels checked."""
    img, truth = tray_scene(specs, seed=seed, settings=st)
    quads = find_panels(img)
    panels = truth["panels"]
    centres = np.array([p["centre_img_xy"] for p in panels])
    out = [] if len(quads) == len(specs) else [f"found {len(quads)} of {len(specs)} panels"]
    for q in quads:
        p = panels[int(np.argmin(np.linalg.norm(centres - q.centre_xy, axis=1)))]
        sp = p["spec"]
        name = "/".join([sp.coating, sp.rust[0]] + (["dirt"] if sp.dirt else []) + (["glare"] if sp.glare else [])
                        + ([sp.scribe] if sp.scribe != "none" else []))
        if tuple(q.position) != tuple(p["position"]):
            out.append(f"{name}: position {q.position}, painted at {p['position']}")
        if q.touches is not None:
            out.append(f"{name}: touches the {q.touches} edge")
            continue
        res = rate_panel(rectify_panel(img, q.corners_xy, (75, 150)), PanelSettings())
        tr = truth_rust(p, 5.0)["rust_area_pct"]
        # green too: 1.16 to 1.18 x in 4:2:0 against 1.06 in 4:4:4 at 7.5 px/mm (twelfth session)
        known = sp.rust == ("pinpoint",) and sp.coating in ("grey", "green", "dark") and st.jpeg_chroma == "4:2:0"
        if abs(res["rust_area_pct"] - tr) > max(0.1, 0.15 * tr):
            out.append(f"{name}: rust {res['rust_area_pct']:.3f} % for {tr:.3f} %" + (" (known fault)" if known else ""))
        if abs(int(res["rust_grade"]) - int(rust_grade(tr))) > 1:
            out.append(f"{name}: D610 {res['rust_grade']} for {rust_grade(tr)}")
        tc = truth_creep(p)
        if (tc is not None) != res["scribe_found"]:
            out.append(f"{name}: scribe found {res['scribe_found']} ({res['scribe_note']})")
        elif tc is not None and abs(res["creep_mean_mm"] - tc["creep_mean_mm"]) > 0.3:
            out.append(f"{name}: creep {res['creep_mean_mm']:.2f} mm for {tc['creep_mean_mm']:.2f} mm")
    return out, len(quads)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seed", type=int, default=2)
    ap.add_argument("--scenes", type=int, default=17)
    ap.add_argument("--creep-max-mm", type=float, default=3.0,
                    help="largest mean creep drawn for a scribe (mm; default 3; e.g. 10 for heavy creep)")
    args = ap.parse_args()
    rng = np.random.default_rng(args.seed)
    n_panels = n_bad = 0
    for k in range(args.scenes):
        specs, seed, st = random_scene(rng, args.creep_max_mm)
        problems, n = check_scene(specs, seed, st)
        n_panels += n
        n_bad += len({x.split(":")[0] for x in problems})
        print(f"scene {k} (seed {seed}, {st.jpeg_chroma} q{st.jpeg_quality}, tilt {st.tilt_x_deg:.0f}/{st.tilt_y_deg:.0f}"
              f"/{st.roll_deg:.0f}): " + ("; ".join(problems) if problems else "ok"), flush=True)
    print(f"{n_panels} panels, about {n_bad} with a problem")


if __name__ == "__main__":
    main()
