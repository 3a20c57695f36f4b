"""``coupon phmap``: pH per pixel from the profile's indicator model."""

from __future__ import annotations

import warnings
from dataclasses import dataclass, replace
from pathlib import Path

import click
import numpy as np
import pandas as pd

from coupon.calibrate.profile import Profile, load_profile
from coupon.calibrate.shipped import default_indicator
from coupon.cli.common import (
    EXIT_FAILED,
    fail,
    force_option,
    max_megapixels_option,
    report_failure,
    workers_option,
)
from coupon.errors import CouponError
from coupon.io.atomic import write_csv, write_float_tiff
from coupon.io.batch import ResumeLedger, run_batch, settings_hash
from coupon.io.images import expand_image_paths, load_image, try_sha256
from coupon.io.tables import read_previous
from coupon.report.figures import ph_figure

SUMMARY_COLUMNS = ["image", "ph_median", "ph_p05", "ph_p95", "indicator_coverage_pct", "ph_tiff", "ph_png", "status"]


@dataclass(frozen=True)
class PhMapJob:
    profile: Profile
    out_dir: Path
    max_pixels: int

    def __call__(self, path: Path) -> dict:
        img = load_image(path, max_pixels=self.max_pixels)
        model = self.profile.indicator
        ph, _ = model.map_rgb(img.rgb, self.profile.colour)
        valid = np.isfinite(ph)
        stem = path.stem
        tiff = write_float_tiff(self.out_dir / f"{stem}_ph.tiff", ph)
        px = self.profile.scale.px_per_mm if self.profile.scale else None
        png = ph_figure(ph, self.out_dir / f"{stem}_ph.png", title=f"{path.name}: pH ({model.name})",
                        ph_range=(float(model.ph[0]), float(model.ph[-1])), px_per_mm=px)
        q = np.nanpercentile(ph[valid], [5, 50, 95]) if valid.any() else [np.nan] * 3
        return {
            "image": str(path), "ph_median": float(q[1]), "ph_p05": float(q[0]), "ph_p95": float(q[2]),
            "indicator_coverage_pct": float(100.0 * valid.mean()), "ph_tiff": str(tiff), "ph_png": str(png),
            "status": "ok", "_sha256": img.sha256,
        }


@click.command("phmap")
@click.argument("images", nargs=-1, required=True, type=click.Path(path_type=Path))
@click.option("--profile", "profile_path", required=True, type=click.Path(dir_okay=False, path_type=Path),
              help="Profile with an indicator model (and optionally colour correction).")
@click.option("--out", "out_dir", required=True, type=click.Path(file_okay=False, path_type=Path),
              help="Output folder.")
@workers_option
@force_option("images")
@max_megapixels_option
def phmap(images, profile_path, out_dir, workers, force, max_megapixels):
    """pH per pixel for each image: DIR/<stem>_ph.tiff (float32, NaN off the indicator path),
    DIR/<stem>_ph.png (picture with colour bar) and DIR/phmap.csv; prints the median pH.

    Without an indicator in the profile, the generic shipped table is used (approximate, with a warning).
    pH read from photos is an estimate; where a calibrated pH electrode can be used, it rules.
    """
    try:
        profile = load_profile(profile_path)
    except CouponError as exc:
        raise fail(exc) from None
    if profile.indicator is None:
        profile = replace(profile, indicator=default_indicator())
    elif profile.indicator.is_default:
        warnings.warn("the profile's indicator model is the generic table, not a buffer calibration; pH is approximate")
    out_dir.mkdir(parents=True, exist_ok=True)
    paths = expand_image_paths(list(images))
    settings = settings_hash({"profile": profile.sha256, "command": "phmap", "version": 1})
    ledger = ResumeLedger(out_dir, "phmap")
    summary_path = out_dir / "phmap.csv"
    old = read_previous(summary_path, SUMMARY_COLUMNS)
    # keyed by the input's resolved path (ResumeLedger.row_key): a rerun may type it another way or run elsewhere
    rows = {ledger.row_key(r["image"]): r for r in old.to_dict("records")}
    todo = []
    for p in paths:
        sha = try_sha256(p)
        if not force and sha and ledger.is_done(p, sha, settings) and ResumeLedger.key(p) in rows:
            click.echo(f"{p}: already mapped (use --force to redo)")
            continue
        todo.append(p)
    failed = 0
    job = PhMapJob(profile, out_dir, int(max_megapixels * 1e6))
    for out in run_batch(todo, job, workers=workers, label="pH maps"):
        if out.ok:
            r = out.result
            ledger.record(out.item, r.pop("_sha256"), settings, [r["ph_tiff"], r["ph_png"]])
            click.echo(f"{out.item}: median pH {r['ph_median']:.2f} "
                       f"(5-95 %: {r['ph_p05']:.2f}-{r['ph_p95']:.2f}; indicator colour on "
                       f"{r['indicator_coverage_pct']:.1f} % of pixels)")
        else:
            failed += 1
            report_failure(out.error, out.trace)
            r = {c: np.nan for c in SUMMARY_COLUMNS} | {"image": str(out.item), "status": out.error}
        rows[ResumeLedger.key(out.item)] = r
    ledger.flush()
    write_csv(summary_path, pd.DataFrame(list(rows.values()), columns=SUMMARY_COLUMNS))
    click.echo(f"summary: {summary_path}")
    if failed:
        raise SystemExit(EXIT_FAILED)
