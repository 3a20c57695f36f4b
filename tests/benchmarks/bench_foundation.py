"""Benchmark: image loading and pH mapping, measured in one run.

Prints the time to load a 12-megapixel JPEG and the ratio
(pH mapping of that image) / (its decode time), plus the 4-megapixel pH
mapping time.  Run:  python tests/benchmarks/bench_foundation.py
"""

from __future__ import annotations

import tempfile
import time
import tracemalloc
from pathlib import Path

import cv2
import numpy as np

from coupon.calibrate.colour import ColourCorrection
from coupon.calibrate.indicator import IndicatorModel, fit_from_drops
from coupon.io.images import load_image, to_uint8
from coupon.synth.indicator import buffer_strip_scene


def scene(width: int, height: int, seed: int = 0) -> np.ndarray:
    """A photo-like frame: buffer drops of many pH values tiled over steel, noise, JPEG-like content."""
    ph = list(np.round(np.linspace(3, 11, 40), 2))
    tile, _ = buffer_strip_scene(ph, seed=seed, per_row=8, drop_radius_px=70)
    reps = (int(np.ceil(height / tile.shape[0])), int(np.ceil(width / tile.shape[1])), 1)
    return np.tile(tile, reps)[:height, :width]


def best_of(fn, n=3):
    times = []
    for _ in range(n):
        t = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t)
    return min(times), out


def main() -> None:
    cal, _ = buffer_strip_scene([3, 4, 5, 6, 7, 8, 9, 10, 11], seed=1)
    model, _ = fit_from_drops(cal, [3, 4, 5, 6, 7, 8, 9, 10, 11])
    corr = ColourCorrection(gains=np.array([1.02, 1.0, 0.97]))
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "frame_12mp.jpg"
        img12 = scene(4000, 3000)
        cv2.imwrite(str(path), cv2.cvtColor(to_uint8(img12), cv2.COLOR_RGB2BGR), [cv2.IMWRITE_JPEG_QUALITY, 92])
        t_decode, _ = best_of(lambda: cv2.imdecode(np.fromfile(path, np.uint8), cv2.IMREAD_UNCHANGED))
        t_load, loaded = best_of(lambda: load_image(path))
        # cold: a fresh model (no colour seen yet); warm: the same model again (a time-lapse's later frames)
        t_cold, (ph, _) = best_of(lambda: IndicatorModel.from_dict(model.to_dict()).map_rgb(loaded.rgb, corr))
        t_warm, _ = best_of(lambda: model.map_rgb(loaded.rgb, corr))
        print(f"12 MP JPEG ({path.stat().st_size / 1e6:.1f} MB): OpenCV decode {t_decode * 1e3:.0f} ms, "
              f"coupon load_image {t_load * 1e3:.0f} ms (ratio {t_load / t_decode:.2f})")
        print(f"12 MP pH mapping with colour correction: first image {t_cold * 1e3:.0f} ms "
              f"(ratio mapping / decode = {t_cold / t_decode:.2f}), later images {t_warm * 1e3:.0f} ms "
              f"(ratio {t_warm / t_decode:.2f}); valid pH on {np.isfinite(ph).mean() * 100:.0f} % of pixels")
        img4 = loaded.rgb[:2000, :2000]
        t4, _ = best_of(lambda: IndicatorModel.from_dict(model.to_dict()).map_rgb(img4))
        print(f"4 MP pH mapping, first image: {t4 * 1e3:.0f} ms")
        tracemalloc.start()
        model.map_rgb(loaded.rgb, corr)
        peak = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
        print(f"peak memory of one 12 MP mapping (tracemalloc): {peak / 1e6:.0f} MB")


if __name__ == "__main__":
    main()
