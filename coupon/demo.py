"""The end-to-end demo: an invented lab's scenes, generated, then analysed by the real commands.

Scenario (invented for the demo): the Brackwater Coatings Test Laboratory
screens three made-up coating systems (BW-1 zinc-rich epoxy / polyurethane,
BW-2 waterborne acrylic, BW-3 solvent alkyd) and two made-up steel surface
treatments by droplet tests.  Every image is drawn by :mod:`coupon.synth`
from a seed; its ground truth is written beside it as JSON.

Each job adds a step to :data:`STEPS`; a step generates its scenes into
``ctx.images`` and runs its command(s) through the real command line.
"""

from __future__ import annotations

import importlib
import json
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import click
import numpy as np

from coupon.io.atomic import to_json_text, write_csv, write_image, write_text
from coupon.io.images import to_uint8

LAB_NAME = "Brackwater Coatings Test Laboratory (invented for the demo)"


@dataclass
class DemoContext:
    root: Path
    small: bool = False
    summary: dict = field(default_factory=dict)
    images_dir: Path | None = None
    report: Path | None = None  # set by the report step

    @property
    def images(self) -> Path:
        return self.images_dir or self.root / "images"

    @property
    def results(self) -> Path:
        return self.root / "results"

    @property
    def profile(self) -> Path:
        return self.root / "results" / "profile.json"

    def run(self, args: list[str]) -> None:
        """Run one real ``coupon`` command; stop the demo if it fails."""
        from coupon.cli.main import cli

        args = [str(a) for a in args]
        click.echo(click.style("$ coupon " + " ".join(args), bold=True))
        try:
            cli.main(args=args, prog_name="coupon", standalone_mode=False)
        except SystemExit as exc:
            if exc.code not in (0, None):
                raise click.ClickException(f"demo step failed: coupon {' '.join(map(str, args))}") from None

    def save_scene(self, name: str, rgb: np.ndarray, truth: dict, quality: int = 92) -> Path:
        """Write a scene as JPEG (as a camera would) or PNG, and its ground truth as JSON."""
        path = self.images / name
        write_image(path, to_uint8(rgb), jpeg_quality=quality)
        write_text(path.with_suffix(".truth.json"), to_json_text(_plain(truth)))
        return path


def _plain(obj):
    """Ground truth to JSON-able values."""
    if isinstance(obj, dict):
        return {str(k): _plain(v) for k, v in obj.items() if not k.startswith("_")}
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, (np.floating, np.integer)):
        return obj.item()
    if hasattr(obj, "__dataclass_fields__"):
        return {k: _plain(getattr(obj, k)) for k in obj.__dataclass_fields__}
    return obj


# ---------------------------------------------------------------------------
# calibration step (foundation)

BUFFER_PH = [3, 4, 5, 6, 7, 8, 9, 10, 11]
TEST_DROP_PH = [4.0, 5.5, 7.0, 9.5]


def calibration_scenes(ctx: DemoContext) -> dict:
    """Write the calibration scenes (target, patch chart, buffers, unknown drops); return their paths."""
    from coupon.synth.indicator import buffer_strip_scene, patch_chart_scene
    from coupon.synth.target import target_scene

    cast = (1.06, 1.0, 0.90)  # the bench lamp is warm
    img, truth = target_scene(seed=101, tilt_x_deg=12, tilt_y_deg=-8, roll_deg=4, px_per_mm=10.0, cast=cast)
    truth = {"px_per_mm": truth["px_per_mm"], "hom_mm_to_img": truth["hom_mm_to_img"], "cast": truth["cast"]}
    paths = {"target": ctx.save_scene("bench_target.jpg", img, truth), "target_truth": truth}
    chart, table = patch_chart_scene(seed=102, cast=cast)
    paths["chart"] = ctx.save_scene("bench_patch_chart.png", chart, {"cast": list(cast)})
    paths["patches"] = write_csv(ctx.images / "bench_patch_chart_patches.csv", table)
    buffers, btruth = buffer_strip_scene(BUFFER_PH, seed=103)
    paths["buffers"] = ctx.save_scene("buffers_universal.jpg", buffers, btruth)
    drops, dtruth = buffer_strip_scene(TEST_DROP_PH, seed=104, per_row=4)
    paths["drops"] = ctx.save_scene("unknown_drops.jpg", drops, dtruth)
    return paths


def calibration_step(ctx: DemoContext) -> None:
    """Target photo -> scale and white balance; patch chart -> colour matrix; buffers -> indicator; pH maps."""
    paths = calibration_scenes(ctx)
    target, chart_path, patches = paths["target"], paths["chart"], paths["patches"]
    buffers_path, drops_path, truth = paths["buffers"], paths["drops"], paths["target_truth"]

    ctx.results.mkdir(parents=True, exist_ok=True)
    ctx.run(["calibrate", "target", ctx.results / "print_target"])
    ctx.run(["calibrate", "scale", target, "--checker", "9x7", "--square-mm", "5", "--profile", ctx.profile])
    ctx.run(["calibrate", "colour", chart_path, "--patches", patches, "--profile", ctx.profile])
    ctx.run(["calibrate", "indicator", buffers_path, "--ph", ",".join(map(str, BUFFER_PH)), "--profile", ctx.profile])
    ctx.run(["calibrate", "show", ctx.profile])
    ctx.run(["phmap", drops_path, "--profile", ctx.profile, "--out", ctx.results / "phmap"])

    from coupon.calibrate.profile import load_profile

    prof = load_profile(ctx.profile)
    ctx.summary["calibration"] = {
        "px_per_mm": prof.scale.px_per_mm, "px_per_mm_truth": truth["px_per_mm"],
        "colour_mean_de00": prof.colour.mean_de00,
        "indicator_buffers": len(prof.indicator.ph),
    }


def job_sample_scenes(ctx: DemoContext) -> None:
    """One small sample scene per job (a tray, a droplet frame, a coupon), with truth, for ``demo_images/``."""
    from coupon.synth.droplet import DropletSeriesSpec, public_truth, render_frame
    from coupon.synth.panels import PanelSpec, TraySettings, tray_scene, truth_summary
    from coupon.synth.pits import pitted_coupon_scene

    specs = [PanelSpec("white", ("general",), amount=0.6, scribe="line", creep_mm=1.2),
             PanelSpec("grey", ("spots",), amount=0.8)]
    img, truth = tray_scene(specs, seed=901, settings=TraySettings(image_wh=(1400, 1100), cols=2))
    ctx.save_scene("sample_tray_0336h.jpg", img, truth_summary(truth))
    spec = DropletSeriesSpec(n_frames=6, image_wh=(540, 480), px_per_mm=30.0)
    rgb, dtruth = render_frame(spec, 5, seed=902)
    ctx.save_scene("sample_drop_t025min.jpg", rgb, public_truth(dtruth))
    rgb, _, ptruth = pitted_coupon_scene(seed=903, coupon_mm=(40, 30), px_per_mm=15.0, n_pits=30)
    ctx.save_scene("sample_coupon_cleaned.jpg", rgb, ptruth)


#: Functions that write a job's scenes into ``ctx.images`` (used by ``python -m coupon.synth.demo_images``).
SCENE_WRITERS: list[Callable[[DemoContext], object]] = [calibration_scenes, job_sample_scenes]

#: (name, step) in run order; later jobs append theirs.
#: A step is a function or "module:function" (imported when the demo runs, so importing
#: this module stays cheap).
STEPS: list[tuple[str, Callable[[DemoContext], None] | str]] = [
    ("calibration", calibration_step),
    ("campaign", "coupon.demo_campaign:campaign_setup_step"),
    ("panels", "coupon.demo_panels:panels_step"),
    ("droplet", "coupon.demo_droplet:droplet_step"),
    ("pits", "coupon.demo_pits:pits_step"),
    ("report", "coupon.demo_campaign:report_step"),
]


def _resolve(step):
    if callable(step):
        return step
    module, _, func = step.partition(":")
    return getattr(importlib.import_module(module), func)


def run_demo(root: Path, small: bool = False) -> DemoContext:
    ctx = DemoContext(Path(root), small=small)
    ctx.root.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    for name, step in STEPS:
        click.echo(click.style(f"== demo: {name} ==", fg="cyan"))
        _resolve(step)(ctx)
    ctx.summary["seconds"] = round(time.perf_counter() - t0, 1)
    ctx.summary["lab"] = LAB_NAME
    write_text(ctx.results / "demo_summary.json", json.dumps(ctx.summary, indent=2, default=float) + "\n")
    return ctx
