"""Benchmark: rate a 12-megapixel tray photo with 6 panels.

Prints, measured in one run (one fresh process, so the numbers are not
mixed with the scene rendering):

* the JPEG decode time of the file (best of 5, after a warm-up);
* the full rating time (``rate_image``: load, find, QR, rectify, unmix,
  scribe, overlays, JSON), the fastest of three runs after one warm-up run, and
  their ratio (goal <= 4);
* the peak memory of that process: ``VmHWM`` from ``/proc/self/status`` (Linux), which
  belongs to the process's own address space.  ``ru_maxrss`` is printed beside it but
  is not the rating's memory: Linux carries it over ``fork`` + ``exec``, so the child
  reports the parent's high-water mark from rendering the 12 MP scene (about 1.6 GB);
* the wall time of a 4-image batch through the ``coupon panels`` command with
  ``--workers 1`` and ``--workers 2``, the speed-up, and the CPU time over wall
  time of the ``--workers 1`` batch (the pool's workers are children of the
  forkserver, so their CPU time cannot be read here).  The speed-up is only
  meaningful on an otherwise idle machine: with other jobs on both cores two
  workers get no more CPU than one and add the pool's start-up.

The tray photo is given a camera's texture: surface grain and demosaiced
sensor noise at the photo's own resolution, saved at JPEG quality 95 (a
camera's "fine" setting), so the file decodes like a camera photo rather than
an unusually smooth synthetic one.

Run by hand: ``python tests/benchmarks/bench_panels.py``
"""

from __future__ import annotations

import json
import os
import resource
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import cv2
import numpy as np

SPECS_ARGS = [("white", ("general",), "line", 2.0), ("grey", ("pinpoint",), "none", 0.0),
              ("dark", ("spots",), "x", 1.0), ("white", ("streaks",), "none", 0.0),
              ("green", ("general",), "none", 0.0), ("grey", ("general",), "none", 0.0)]


def make_photo(path: Path) -> None:
    from coupon.io.images import to_uint8
    from coupon.synth.panels import PanelSpec, TraySettings, tray_scene

    specs = [PanelSpec(c, r, scribe=s, creep_mm=cr, dirt=(i == 5)) for i, (c, r, s, cr) in enumerate(SPECS_ARGS)]
    img, _ = tray_scene(specs, seed=1, settings=TraySettings(image_wh=(4000, 3000), cols=3, plane_px_per_mm=10.0,
                                                             grain=0.03, noise=0.02, jpeg_quality=None))
    cv2.imwrite(str(path), cv2.cvtColor(to_uint8(img), cv2.COLOR_RGB2BGR), [cv2.IMWRITE_JPEG_QUALITY, 95])


def peak_rss_mb() -> float:
    """High-water mark of this process's resident memory (MB): VmHWM, else ru_maxrss."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def measure(path: Path, out: Path) -> dict:
    """Decode time and rating time of one file, in this process."""
    from coupon.cli.panels import rate_image
    from coupon.segment.panels import PanelSettings

    buf = np.frombuffer(path.read_bytes(), np.uint8)
    cv2.imdecode(buf, cv2.IMREAD_COLOR)  # warm-up
    decode = []
    for _ in range(5):
        t0 = time.perf_counter()
        cv2.imdecode(buf, cv2.IMREAD_COLOR)
        decode.append(time.perf_counter() - t0)
    rate_image(path, PanelSettings(), None, out / "warm")  # warm-up (imports, caches)
    runs = []
    for k in range(3):  # the fastest of three counts (other jobs share the machine); all are printed
        t0 = time.perf_counter()
        rows = rate_image(path, PanelSettings(), None, out / f"run{k}")
        runs.append(time.perf_counter() - t0)
    full_s = min(runs)
    return {"decode_s": min(decode), "full_s": full_s, "runs_s": runs, "ok": sum(r["status"] == "ok" for r in rows),
            "n": len(rows), "peak_mb": peak_rss_mb(),
            "maxrss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
            "mb": buf.size / 1e6}


def batch(paths: list[str], out: Path, workers: int) -> tuple[float, float, int]:
    """Wall time, CPU time (all processes) over wall time, exit code of one ``coupon panels`` run."""
    exe = Path(sys.executable).with_name("coupon")
    before = resource.getrusage(resource.RUSAGE_CHILDREN)
    t0 = time.perf_counter()
    res = subprocess.run([str(exe), "panels", *paths, "--out", str(out), "--workers", str(workers)],
                         capture_output=True, text=True)
    wall = time.perf_counter() - t0
    after = resource.getrusage(resource.RUSAGE_CHILDREN)
    cpu = (after.ru_utime - before.ru_utime) + (after.ru_stime - before.ru_stime)
    return wall, cpu / wall, res.returncode


def main() -> None:
    if len(sys.argv) == 4 and sys.argv[1] == "--measure":
        print(json.dumps(measure(Path(sys.argv[2]), Path(sys.argv[3]))))
        return
    tmp = Path(tempfile.mkdtemp(prefix="bench_panels_"))
    try:
        path = tmp / "tray_12mp_0168h.jpg"
        make_photo(path)
        res = subprocess.run([sys.executable, __file__, "--measure", str(path), str(tmp / "m")],
                             capture_output=True, text=True, check=True)
        m = json.loads(res.stdout.strip().splitlines()[-1])
        print(f"image: 4000x3000 JPEG q95 with camera texture, {m['mb']:.1f} MB, {m['ok']}/{m['n']} panels rated")
        print(f"JPEG decode: {m['decode_s']:.3f} s   full rating: {m['full_s']:.3f} s   "
              f"ratio: {m['full_s'] / m['decode_s']:.1f} (goal <= 4); runs {', '.join(f'{t:.3f}' for t in m['runs_s'])} s")
        print(f"peak memory of the rating process (VmHWM): {m['peak_mb']:.0f} MB   "
              f"(ru_maxrss {m['maxrss_mb']:.0f} MB includes the parent's scene rendering)")
        paths = []
        for k in range(4):
            p = tmp / f"batch_{k}.jpg"
            shutil.copy(path, p)
            paths.append(str(p))
        walls = {}
        for workers in (1, 2):
            wall, load, code = batch(paths, tmp / f"b{workers}", workers)
            walls[workers] = wall
            # with --workers 2 the workers are children of the forkserver, which reaps them itself, so
            # RUSAGE_CHILDREN does not see their CPU time: the figure would be the parent's alone
            cpu_note = f"CPU/wall {load:.2f}" if workers == 1 else "CPU/wall not measurable (forkserver workers)"
            print(f"batch of 4 with --workers {workers}: {wall:.1f} s wall, {cpu_note} (exit {code})")
        print(f"speed-up --workers 2 over 1: {walls[1] / walls[2]:.2f} (2 cores: at most 2; "
              f"os.cpu_count() = {os.cpu_count()})")
    finally:
        shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
