"""Benchmark: rate a 12-megapixel tray photo with 6 panels.

Prints, measured in one run: JPEG decode time of the file, full rating time
(load, find, rectify, unmix, scribe, overlays, JSON), their ratio (goal <= 4),
peak memory (ru_maxrss), and the wall time of a 4-image batch with --workers 1
and --workers 2 (both cores).  Run by hand: python tests/benchmarks/bench_panels.py
"""

from __future__ import annotations

import resource
import shutil
import tempfile
import time
from pathlib import Path

import cv2

from coupon.io.images import to_uint8
from coupon.segment.panels import PanelSettings
from coupon.synth.panels import PanelSpec, TraySettings, tray_scene


def main() -> None:
    from coupon.cli.panels import rate_image
    from click.testing import CliRunner
    from coupon.cli.main import cli

    tmp = Path(tempfile.mkdtemp(prefix="bench_panels_"))
    specs = [PanelSpec("white", ("general",), scribe="line", creep_mm=2.0), PanelSpec("grey", ("pinpoint",)),
             PanelSpec("dark", ("spots",), scribe="x", creep_mm=1.0), PanelSpec("white", ("streaks",)),
             PanelSpec("green", ("general",)), PanelSpec("grey", ("general",), dirt=True)]
    img, _ = tray_scene(specs, seed=1, settings=TraySettings(image_wh=(4000, 3000), cols=3, plane_px_per_mm=10.0))
    path = tmp / "tray_12mp_0168h.jpg"
    cv2.imwrite(str(path), cv2.cvtColor(to_uint8(img), cv2.COLOR_RGB2BGR), [cv2.IMWRITE_JPEG_QUALITY, 92])
    del img
    data = path.read_bytes()
    import numpy as np

    buf = np.frombuffer(data, np.uint8)
    cv2.imdecode(buf, cv2.IMREAD_COLOR)  # warm-up
    t0 = time.perf_counter()
    cv2.imdecode(buf, cv2.IMREAD_COLOR)
    decode_s = time.perf_counter() - t0
    rate_image(path, PanelSettings(), None, tmp / "warm")  # warm-up (imports, caches)
    t0 = time.perf_counter()
    rows = rate_image(path, PanelSettings(), None, tmp / "out")
    full_s = time.perf_counter() - t0
    ok = sum(r["status"] == "ok" for r in rows)
    print(f"image: 4000x3000 JPEG, {len(data) / 1e6:.1f} MB, {ok}/{len(rows)} panels rated")
    print(f"JPEG decode: {decode_s:.3f} s   full rating: {full_s:.3f} s   ratio: {full_s / decode_s:.1f} (goal <= 4)")
    print(f"peak memory (ru_maxrss): {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MB")
    batch = []
    for k in range(4):
        p = tmp / f"batch_{k}.jpg"
        shutil.copy(path, p)
        batch.append(str(p))
    runner = CliRunner()
    for workers in (1, 2):
        t0 = time.perf_counter()
        res = runner.invoke(cli, ["panels", *batch, "--out", str(tmp / f"b{workers}"), "--workers", str(workers)])
        wall = time.perf_counter() - t0
        print(f"batch of 4 with --workers {workers}: {wall:.1f} s (exit {res.exit_code})")
    shutil.rmtree(tmp, ignore_errors=True)


if __name__ == "__main__":
    main()
