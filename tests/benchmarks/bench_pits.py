"""Benchmark ``coupon pits`` on a 24-megapixel coupon scan (run by hand; not collected by pytest).

Prints, measured in one run: the decode time of the JPEG (``load_image``), the core
analysis time (``analyse_pits``), the full per-image job (analysis, height map,
figures, JSON: what ``coupon pits`` does per image), their ratios to the decode time
(goal: full analysis <= 4 x decode) and the peak memory of the process.

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
    from coupon.io.images import load_image
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
    t_decode, img = best_of(lambda: load_image(path), args.repeat)
    settings = PitSettings(px_per_mm=40.0)
    t_core, res = best_of(lambda: analyse_pits(img.rgb, settings), args.repeat)
    job = PitJob(settings, tmp / "out", 250_000_000, height_map=str(tmp / "scan24_height.tiff"), height_unit="um")
    (tmp / "out").mkdir()
    t_full, rows = best_of(lambda: pit_rows_for_image(path, job), args.repeat)
    t_job_decode = t_decode  # the full job decodes the image itself: subtract for the analysis part
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    s = rows["summary"]
    print(f"decode (load_image)               {t_decode:6.3f} s")
    print(f"core analysis (analyse_pits)      {t_core:6.3f} s   ratio {t_core / t_decode:5.2f} x decode")
    print(f"full job incl. decode, height map, figures, JSON "
          f"{t_full:6.3f} s   ratio {(t_full - t_job_decode) / t_decode:5.2f} x decode (analysis part)")
    print(f"pits found {s['pit_count']} (truth {truth['counted']['count']}), deepest {s['max_depth_mm']:.3f} mm "
          f"(truth {truth['counted']['max_depth_mm']:.3f})")
    print(f"peak memory (max RSS of this process) {peak:.0f} MiB (at start {rss0:.0f} MiB; the decoded image alone "
          f"is {img.rgb.nbytes / 2**20:.0f} MiB of float32)")
    print("goal: core analysis <= 4 x decode:", "met" if t_core / t_decode <= 4 else "NOT met")


if __name__ == "__main__":
    main()
