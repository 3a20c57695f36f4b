"""Benchmark of ``coupon droplet`` on a long series of 4-megapixel frames (run by hand).

    /work/venv/bin/python tests/benchmarks/bench_droplet.py [--frames 200] [--distinct 6] [--repeat 3]

Prints, measured in this run: the median decode time of a frame (``load_image``,
measured before and after the series runs), then for two runs of the command over
the same frames, without and with per-frame pictures: the time per frame of the
frame loop and its ratio to the decode time (goal <= 3), the time per frame
including the series part (summary figures, tables), and the resident memory
(RSS) when the first tenth of the frames is done and when the last frame is done
(streaming: it must not grow with the number of frames).  Progress is read from
the per-frame TIFFs as they appear in the output folder.
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
    """RSS and frames done (``*_ph.tiff`` files in the output's ``frames/``) every ``period_s``."""

    def __init__(self, frames_dir: Path, period_s: float = 0.05):
        super().__init__(daemon=True)
        self.frames_dir = frames_dir
        self.samples: list[tuple[float, float, int]] = []
        self.period_s = period_s
        self._halt = threading.Event()
        self.t0 = time.perf_counter()

    def _done(self) -> int:
        try:
            return sum(1 for n in os.listdir(self.frames_dir) if n.endswith("_ph.tiff") and not n.startswith("."))
        except FileNotFoundError:
            return 0

    def run(self):
        while not self._halt.is_set():
            self.samples.append((time.perf_counter() - self.t0, rss_mb(), self._done()))
            time.sleep(self.period_s)

    def stop(self):
        self._halt.set()
        self.join()
        self.samples.append((time.perf_counter() - self.t0, rss_mb(), self._done()))

    def first(self, n_done: int) -> tuple[float, float]:
        """(time, RSS) of the first sample with at least ``n_done`` frames written."""
        for t, r, k in self.samples:
            if k >= n_done:
                return t, r
        return self.samples[-1][0], self.samples[-1][1]


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--frames", type=int, default=200)
    ap.add_argument("--distinct", type=int, default=6, help="distinct rendered frames (the rest are hard links)")
    ap.add_argument("--figure-frames", type=int, default=0,
                    help="frames of the run with per-frame pictures (default: all)")
    ap.add_argument("--repeat", type=int, default=1,
                    help="rounds of (decode, run without, run with pictures); each round's ratios use its own decode "
                         "time and the best round is printed too (for a shared machine)")
    args = ap.parse_args()

    import cv2
    import numpy as np
    from click.testing import CliRunner

    from coupon.cli.main import cli
    from coupon.io.images import load_image
    from coupon.segment import droplet as droplet_core
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

        raw_jpeg = [np.fromfile(p, np.uint8) for p in distinct]
        bare: list[float] = []  # OpenCV's JPEG decode alone (no orientation, float conversion or hash)

        def decode_times():
            out = []
            for p, b in zip(distinct * 3, raw_jpeg * 3):
                t = time.perf_counter()
                load_image(p)
                out.append(time.perf_counter() - t)
                t = time.perf_counter()
                cv2.imdecode(b, cv2.IMREAD_COLOR)
                bare.append(time.perf_counter() - t)
            return out

        def run(paths, extra, out):
            # start cold, as a new command process would: no colour tables kept from the previous run
            getattr(droplet_core, "_TABLES", {}).clear()
            sampler = RssSampler(out / "frames")
            t = time.perf_counter()
            sampler.t0 = t
            sampler.start()
            res = CliRunner().invoke(cli, ["droplet", *map(str, paths), "--profile", str(prof), "--out", str(out),
                                           *extra], catch_exceptions=False)
            total = time.perf_counter() - t
            sampler.stop()
            assert res.exit_code == 0, res.output
            n = len(paths)
            t_loop, rss_end = sampler.first(n)
            _, rss_start = sampler.first(max(1, n // 10))
            peak = max(r for _, r, _ in sampler.samples)
            return {"loop": t_loop / n, "total": total / n, "rss_start": rss_start, "rss_end": rss_end,
                    "peak": peak}

        all_frames = sorted(frames.iterdir())
        rounds = []
        for k in range(args.repeat):
            # each round measures its own decode time next to its two runs (the machine may be shared)
            dec = decode_times()
            nofig = run(all_frames, ["--no-frame-figures"], tmp / f"out1_{k}")
            fig = run(all_frames[:args.figure_frames or None], [], tmp / f"out2_{k}")
            dec += decode_times()
            rounds.append((dec, nofig, fig))

    n_fig = args.figure_frames or args.frames
    for k, (dec, nofig, fig) in enumerate(rounds):
        decode_s = float(np.median(dec))
        head = f"round {k + 1} of {len(rounds)}: " if len(rounds) > 1 else ""
        print(f"{head}decode (load_image, median of {len(dec)}, before and after): {decode_s * 1000:7.1f} ms per "
              f"frame (range {min(dec) * 1000:.0f}-{max(dec) * 1000:.0f} ms)")
        for label, r, n in (("no per-frame pictures  ", nofig, args.frames), ("with per-frame pictures", fig, n_fig)):
            print(f"droplet, {label} ({n} frames): frame loop {r['loop'] * 1000:6.1f} ms per frame, "
                  f"ratio {r['loop'] / decode_s:5.2f} (goal <= 3); incl. series part {r['total'] * 1000:6.1f} ms, "
                  f"ratio {r['total'] / decode_s:5.2f}")
            print(f"    RSS after {max(1, n // 10)} frames {r['rss_start']:.0f} MB, after all {n} frames "
                  f"{r['rss_end']:.0f} MB (growth {r['rss_end'] - r['rss_start']:+.0f} MB; streaming: near 0), "
                  f"peak incl. series pictures {r['peak']:.0f} MB")
    bare_s = float(np.median(bare))
    print(f"OpenCV's JPEG decode alone (cv2.imdecode, median of {len(bare)}): {bare_s * 1000:7.1f} ms per frame; "
          "frame loop against it: " + ", ".join(f"{lab} {rd[i]['loop'] / bare_s:5.2f}" for rd in rounds[-1:]
                                                for lab, i in (("no pictures", 1), ("with pictures", 2))))
    if len(rounds) > 1:
        for label, i in (("no per-frame pictures  ", 1), ("with per-frame pictures", 2)):
            ratios = [rd[i]["loop"] / float(np.median(rd[0])) for rd in rounds]
            print(f"best of {len(rounds)} rounds, {label}: frame loop ratio {min(ratios):5.2f} "
                  f"(all: {', '.join(f'{x:.2f}' for x in ratios)})")


if __name__ == "__main__":
    main()
