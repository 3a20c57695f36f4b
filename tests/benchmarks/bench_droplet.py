"""Benchmark of ``coupon droplet`` on a long series of 4-megapixel frames (run by hand).

    /work/venv/bin/python tests/benchmarks/bench_droplet.py [--frames 200] [--distinct 6]

Prints, measured in this run: the mean decode time of a frame (``load_image``), the
command's time per frame with and without per-frame pictures, their ratio to the
decode time (goal <= 3), and the resident memory (RSS) early and late in the run
(streaming: it must not grow with the number of frames).
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import threading
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))


def rss_mb() -> float:
    with open("/proc/self/status") as fh:
        for line in fh:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024.0
    return float("nan")


class RssSampler(threading.Thread):
    def __init__(self, period_s: float = 0.1):
        super().__init__(daemon=True)
        self.samples: list[tuple[float, float]] = []
        self.period_s = period_s
        self._halt = threading.Event()

    def run(self):
        t0 = time.perf_counter()
        while not self._halt.is_set():
            self.samples.append((time.perf_counter() - t0, rss_mb()))
            time.sleep(self.period_s)

    def stop(self):
        self._halt.set()
        self.join()


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--frames", type=int, default=200)
    ap.add_argument("--distinct", type=int, default=6, help="distinct rendered frames (the rest are hard links)")
    ap.add_argument("--figure-frames", type=int, default=20, help="frames of the run with per-frame pictures")
    args = ap.parse_args()

    import dataclasses

    from click.testing import CliRunner

    from coupon.cli.main import cli
    from coupon.io.images import load_image
    from coupon.synth.common import encode_jpeg
    from coupon.synth.droplet import DropletSeriesSpec, _Static, render_frame
    from tests.droplet_support import write_profile

    spec = DropletSeriesSpec(image_wh=(2310, 1732), px_per_mm=80.0, n_frames=args.distinct,
                             interval_min=45.0 / max(1, args.distinct - 1), jpeg_quality=None)
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        src, frames = tmp / "src", tmp / "frames"
        src.mkdir()
        frames.mkdir()
        t = time.perf_counter()
        st = _Static(spec, 3)
        distinct = []
        for i in range(args.distinct):
            rgb, _ = render_frame(spec, i, seed=3, static=st)
            p = src / f"d{i}.jpg"
            p.write_bytes(encode_jpeg(rgb, 90))
            distinct.append(p)
        del st, rgb
        for k in range(args.frames):
            os.link(distinct[k * args.distinct // args.frames], frames / f"drop_{k * 30:06d}s.jpg")
        print(f"rendered {args.distinct} distinct {spec.image_wh[0]}x{spec.image_wh[1]} frames "
              f"({spec.image_wh[0] * spec.image_wh[1] / 1e6:.1f} MP) in {time.perf_counter() - t:.1f} s; "
              f"series of {args.frames} frames")
        prof = write_profile(tmp / "profile.json", spec.px_per_mm)

        # decode time: load_image (read, hash, header, decode, float conversion)
        dec = []
        for p in distinct * 3:
            t = time.perf_counter()
            load_image(p)
            dec.append(time.perf_counter() - t)
        decode_s = sorted(dec)[len(dec) // 2]

        def run(paths, extra, out):
            sampler = RssSampler()
            sampler.start()
            t = time.perf_counter()
            res = CliRunner().invoke(cli, ["droplet", *map(str, paths), "--profile", str(prof), "--out", str(out),
                                           *extra], catch_exceptions=False)
            dt = time.perf_counter() - t
            sampler.stop()
            assert res.exit_code == 0, res.output
            return dt / len(paths), sampler.samples

        all_frames = sorted(frames.iterdir())
        per_nofig, samples = run(all_frames, ["--no-frame-figures"], tmp / "out1")
        per_fig, _ = run(all_frames[:args.figure_frames], [], tmp / "out2")

    n = len(samples)
    early = max(r for _, r in samples[n // 10: n // 4 + 1])
    # the last tenth is the series part (summary pictures import matplotlib once): not per-frame memory
    late = max(r for _, r in samples[3 * n // 4: 9 * n // 10 + 1])
    end = max(r for _, r in samples)
    print(f"decode (load_image, median)         : {decode_s * 1000:7.1f} ms per frame")
    print(f"droplet, no per-frame pictures      : {per_nofig * 1000:7.1f} ms per frame  ratio {per_nofig / decode_s:5.2f}"
          f"  (goal <= 3)")
    print(f"droplet, with per-frame pictures    : {per_fig * 1000:7.1f} ms per frame  ratio {per_fig / decode_s:5.2f}")
    print(f"RSS over {args.frames} frames (10-25 % vs 75-90 % of the run): early {early:.0f} MB, late {late:.0f} MB, "
          f"growth {late - early:+.0f} MB (streaming: should stay near 0); peak incl. series pictures {end:.0f} MB")


if __name__ == "__main__":
    main()
