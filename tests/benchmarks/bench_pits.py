"""Benchmark ``coupon pits`` on a 24-megapixel coupon scan (run by hand; not collected by pytest).

Prints, measured in one run: the decode time of the JPEG (``load_image``, and OpenCV's
``cv2.imdecode`` alone, the stricter baseline the panels benchmark uses), the core
analysis time (``analyse_pits``), the full per-image job (analysis, height map,
figures, JSON: what ``coupon pits`` does per image), their ratios to the decode time
(goal: the full per-image job, minus its own decode, <= 4 x decode) and the peak
memory of the process.  Steps are interleaved over the repeats and the fastest
run of each counts, so a busy machine hurts all ratios alike.

    /work/venv/bin/python tests/benchmarks/bench_pits.py [--repeat 3]
"""

from __future__ import annotations

import argparse
import resource
import tempfile
import time
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import cv2
import numpy as np


def best_of(fn, repeat):
    times = []
    for _ in range(repeat):
        t = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t)
    return min(times), out


def make_scene(tmp: Path):
    from coupon.io.atomic import write_float_tiff
    from coupon.synth.pits import pitted_coupon_scene

    # 150 x 100 mm at 40 px/mm (about 1000 dpi): 6000 x 4000 px = 24 megapixels
    rgb, height, truth = pitted_coupon_scene(seed=7, coupon_mm=(140, 90), margin_mm=5, px_per_mm=40.0, n_pits=600,
                                             touching_pairs=20, near_edge=16)
    cv2.imwrite(str(tmp / "scan24.jpg"), cv2.cvtColor(np.clip(np.rint(rgb * 255), 0, 255).astype(np.uint8),
                                                      cv2.COLOR_RGB2BGR), [cv2.IMWRITE_JPEG_QUALITY, 92])
    write_float_tiff(tmp / "scan24_height.tiff", height * 1000.0)
    return height.shape, {"counted": truth["counted"]}


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeat", type=int, default=3, help="runs of each step; the fastest counts (others share the machine)")
    args = ap.parse_args()
    from coupon.cli.pits import PitJob, pit_rows_for_image
    from coupon.io.heightmap import load_height_map
    from coupon.io.images import file_sha256, load_image
    from coupon.report.pit_figures import size_histogram_figure, write_overlay
    from coupon.segment.pits import PitSettings, analyse_pits

    tmp = Path(tempfile.mkdtemp(prefix="bench_pits_"))
    t = time.perf_counter()
    # the scene is drawn in a child process so that this process's peak memory is the analysis's own
    with ProcessPoolExecutor(1) as pool:
        shape, truth = pool.submit(make_scene, tmp).result()
    print(f"scene: {shape[1]}x{shape[0]} px ({shape[0] * shape[1] / 1e6:.1f} MP), "
          f"{truth['counted']['count']} pits counted in truth, generated in {time.perf_counter() - t:.1f} s")
    path = tmp / "scan24.jpg"
    rss0 = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    settings = PitSettings(px_per_mm=40.0)
    job = PitJob(settings, tmp / "out", 250_000_000, height_map=str(tmp / "scan24_height.tiff"), height_unit="um")
    (tmp / "out").mkdir()
    t_decode = t_core = t_full = float("inf")
    parts: dict[str, float] = {}
    rows = None
    hpath = tmp / "scan24_height.tiff"
    t_jpeg = float("inf")
    t_full_runs: list[float] = []
    raw = np.fromfile(path, np.uint8)
    # the first image of a batch: the analysis makes its scratch arrays (reused for later images)
    t_first, _ = best_of(lambda: pit_rows_for_image(path, job), 1)
    for _ in range(args.repeat):  # interleaved: a burst of load from others hits every step alike
        t_jpeg = min(t_jpeg, best_of(lambda: cv2.imdecode(raw, cv2.IMREAD_COLOR), 1)[0])
        td, img = best_of(lambda: load_image(path), 1)
        px = img.rgb_u8  # what the job analyses: the 8-bit pixels as decoded
        tc, _ = best_of(lambda: analyse_pits(px, settings), 1)
        # the full job's other steps, one by one (where its time goes)
        step = {}
        step["height map read (load_height_map)"], hm = best_of(lambda: load_height_map(hpath, "um", img.shape_rc), 1)
        step["analysis with the height map"], res = best_of(lambda: analyse_pits(px, settings, hm), 1)
        step["overlay (write_overlay)"], _ = best_of(lambda: write_overlay(tmp / "out" / "b_pits.png", px, res.labels,
                                                                            res.analysed, res.pits, 40.0), 1)
        step["histogram (size_histogram_figure)"], _ = best_of(lambda: size_histogram_figure(res.pits,
                                                                                             tmp / "out" / "b.png"), 1)
        step["height map SHA-256 (file_sha256, in the CLI)"], _ = best_of(lambda: file_sha256(hpath), 1)
        for k, v in step.items():
            parts[k] = min(parts.get(k, float("inf")), v)
        del img, px, hm, res
        tf, rows = best_of(lambda: pit_rows_for_image(path, job), 1)
        t_full_runs.append(tf)
        t_decode, t_core, t_full = min(t_decode, td), min(t_core, tc), min(t_full, tf)
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    s = rows["summary"]
    full_ratio = (t_full - t_decode) / t_decode  # the full job decodes the image itself: subtract it
    print(f"decode (load_image: JPEG decode, orientation, SHA-256) {t_decode:6.3f} s; "
          f"OpenCV's JPEG decode alone (cv2.imdecode) {t_jpeg:6.3f} s")
    print(f"core analysis (analyse_pits, no height map) {t_core:6.3f} s   ratio {t_core / t_decode:5.2f} x decode")
    print(f"full job (decode, height map, analysis, overlay, histogram, JSON) {t_full:6.3f} s   "
          f"ratio {full_ratio:5.2f} x decode without its decode ({t_full / t_decode:5.2f} x with it)")
    for k, v in parts.items():
        print(f"  step of the full job: {k:46s} {v:6.3f} s  ({v / t_decode:4.2f} x decode)")
    print(f"full job of the process's first image (scratch arrays not yet made): {t_first:.3f} s; "
          f"later repeats: {', '.join(f'{t:.3f}' for t in t_full_runs)} s")
    print(f"pits found {s['pit_count']} (truth {truth['counted']['count']}), deepest {s['max_depth_mm']:.3f} mm "
          f"(truth {truth['counted']['max_depth_mm']:.3f}); overlay {Path(s['overlay']).name}")
    print(f"peak memory (max RSS of this process) {peak:.0f} MiB (at start {rss0:.0f} MiB; the decoded image alone "
          f"is {shape[0] * shape[1] * 3 / 2**20:.0f} MiB of uint8)")
    print(f"full job against OpenCV's JPEG decode alone: {t_full / t_jpeg:5.2f} x (whole job, its own decode included)")
    print("goal: full job <= 4 x decode (without its decode):", "met" if full_ratio <= 4 else "NOT met",
          "| against the bare JPEG decode:", "met" if t_full / t_jpeg <= 4 else "NOT met")


if __name__ == "__main__":
    main()
