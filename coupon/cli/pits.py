"""``coupon pits``: count, size and depth of pits on cleaned coupons; G46 ratings; G1 corrosion rate."""

from __future__ import annotations

import math
from concurrent.futures import ThreadPoolExecutor, wait
from dataclasses import dataclass, field, replace
from pathlib import Path

import click
import numpy as np
import pandas as pd

from coupon import __version__
from coupon.calibrate.profile import load_profile
from coupon.cli.common import (
    EXIT_FAILED,
    db_option,
    fail,
    force_option,
    max_megapixels_option,
    record_rows,
    report_failure,
    workers_option,
)
from coupon.errors import AnalysisError, CouponError
from coupon.io.atomic import write_csv, write_json
from coupon.io.batch import Prefetch, ResumeLedger, run_batch, settings_hash
from coupon.io.heightmap import HEIGHT_UNITS, check_height_shape, read_height_map_mm
from coupon.io.images import LoadedImage, expand_image_paths, file_sha256, load_image, try_sha256
from coupon.io.tables import read_previous
from coupon.io.threads import thread_pool
from coupon.ratings import mass_loss as ml
from coupon.ratings.pitting import MassLoss, summarise_pits
from coupon.report.pit_figures import (
    overlay_background,
    size_histogram,
    size_histogram_figure,
    write_overlay,
)
from coupon.segment.pits import (
    PIT_COLUMNS,
    PIT_LOOKS,
    PitSettings,
    analyse_pits,
    default_min_pit_mm2,
)

#: Columns of DIR/pits.csv (one row per pit).
PITS_COLUMNS = ["image"] + PIT_COLUMNS
#: Columns of DIR/pit_summary.csv (one row per image).
SUMMARY_COLUMNS = [
    "image", "analysed_area_mm2", "pit_count", "density_per_m2", "density_per_cm2", "mean_area_mm2",
    "median_area_mm2", "max_area_mm2", "pitted_area_pct", "clark_evans_r", "clark_evans_note", "g46_density",
    "g46_size", "g46_depth", "max_depth_mm", "corrosion_rate_mm_y", "corrosion_rate_mpy", "average_penetration_mm",
    "pitting_factor", "overlay", "status",
]
# 3: noise estimate from 250k samples; 2: touching pits split more often, 12.4 mm background window;
# 4: the clipped fraction in the JSON comes from a quarter-million-pixel sample
# 5: exposure and clipping sampled at block centres (the recorded clipped_pct moves slightly)
COMMAND_VERSION = 6  # 6: OpenCV without IPP (repeatable distance transforms: touching pairs split the same every run)
CAUTION = ("Ratings and rates support, and do not replace, a qualified corrosion engineer and the governing "
           "standard (ASTM G1, G46) or specification; structural decisions need measured pit depths and "
           "licensed judgement.")


@dataclass(frozen=True)
class PitJob:
    """Everything one image needs (picklable for the process pool)."""

    settings: PitSettings
    out_dir: Path
    max_pixels: int
    profile_sha256: str | None = None
    height_map: str | None = None  # a path, or a pattern with {stem}
    height_unit: str | None = None
    mass: MassLoss | None = None
    base_settings: dict = field(default_factory=dict)
    #: the profile's homography (px -> mm) as nested tuples, so the job pickles to workers
    homography: tuple | None = None
    #: (height-map path, SHA-256) pairs already computed for the resume key: hashed once, not twice
    height_sha256: tuple = ()

    def height_path(self, image: Path) -> Path | None:
        if self.height_map is None:
            return None
        return Path(self.height_map.replace("{stem}", image.stem).replace("{name}", image.name))

    def __call__(self, path: Path) -> dict:
        return pit_rows_for_image(path, self)

    def load(self, path: Path) -> LoadedImage:
        return load_image(path, max_pixels=self.max_pixels)


def pit_rows_for_image(path: Path, job: PitJob, img: LoadedImage | None = None) -> dict:
    """Analyse one image and write its figures and JSON; return its rows.

    ``img``: the image already loaded (by a :class:`~coupon.io.batch.Prefetch`), or None to load it here.

    Returns
    -------
    dict
        ``summary`` (one row of :data:`SUMMARY_COLUMNS`), ``pits`` (rows of
        :data:`PITS_COLUMNS`), ``outputs`` (files written), ``sha256`` (of the image),
        ``warnings``.  These rows are what the tables (and a database) store.
    """
    hpath = job.height_path(path)
    known = dict(job.height_sha256).get(str(hpath)) if hpath is not None else None
    # one helper thread on the second core (OpenCV's decoders, numpy and hashlib release the GIL), in turn:
    # the height map is read and converted to mm while the image decodes, then hashed while it is analysed
    helpers = thread_pool(1, "coupon-pits")
    try:
        read_future = hash_future = None
        if hpath is not None:
            read_future = helpers.submit(read_height_map_mm, hpath, job.height_unit)
            if known is None:
                hash_future = helpers.submit(file_sha256, hpath)
        rows = _pit_rows(path, job, hpath, known, read_future, hash_future, helpers, img)
    except BaseException:
        helpers.shutdown(wait=False, cancel_futures=True)  # a failed image does not wait for the map's hash
        raise
    helpers.shutdown(wait=True)
    return rows


def _pit_rows(path: Path, job: PitJob, hpath: Path | None, known: str | None, read_future, hash_future,
              helpers: ThreadPoolExecutor, img: LoadedImage | None) -> dict:
    if img is None:
        img = job.load(path)  # an image error comes first, as in a serial read
    height = None
    if hpath is not None:
        stored_shape, height, value_error = read_future.result()
        check_height_shape(stored_shape, hpath, img.shape_rc)  # the size first, as load_height_map checks it
        if value_error is not None:
            raise value_error
    try:
        hom = None if job.homography is None else np.asarray(job.homography, dtype=np.float64)
        # an 8-bit picture is analysed from its decoded pixels: no float copy of a 24 MP scan (288 MB)
        pixels = img.rgb_u8 if img.rgb_u8 is not None else img.rgb
        # the overlay's background (the reduced picture, dimmed outside the analysed region) is drawn on the
        # helper thread as soon as the region is known, while this thread finds the pits
        backgrounds = []
        res = analyse_pits(pixels, job.settings, height, homography_px_to_mm=hom, height_unit=job.height_unit,
                           on_region=lambda pic, an: backgrounds.append(helpers.submit(overlay_background, pic, an)))
    except AnalysisError as exc:
        if exc.path is not None:
            raise
        raise AnalysisError(exc.message, path) from None  # name the image in the one-line message
    summary, extra, warnings = summarise_pits(res.pits, res.analysed_area_mm2, res.perimeter_mm, job.mass)
    if height is not None and len(res.pits) and not (summary["max_depth_mm"] >= 1e-4):
        raise AnalysisError(
            f"the height map shows no depth at the pits (deepest {summary['max_depth_mm'] * 1000:.3g} um); "
            "check --height-unit and that the map is registered to the image", hpath)
    stem = path.stem
    shown = res.rectified_rgb if res.rectified_rgb is not None else pixels
    # the histogram is drawn on the helper thread (after the overlay's background, done by now) while this
    # thread draws the pits on the background and encodes the overlay
    hist_future = helpers.submit(size_histogram_figure, res.pits, job.out_dir / f"{stem}_pit_sizes.png",
                                 title=f"{path.name}: pit sizes")
    try:
        background = backgrounds[0].result() if backgrounds else None
        overlay = write_overlay(job.out_dir / f"{stem}_pits.png", shown, res.labels, res.analysed, res.pits,
                                job.settings.px_per_mm, background=background)
        pit_rows = [{"image": str(path)} | r for r in res.pits.to_dict("records")]
    except BaseException:
        wait([hist_future])  # no histogram is left being written behind a failed image
        raise
    hist = hist_future.result()
    record = {
        "tool": "coupon pits", "coupon_version": __version__, "command_version": COMMAND_VERSION,
        "image": {"path": str(path), "sha256": img.sha256, "size_px": list(img.shape_rc[::-1]),
                  "notes": list(img.notes)},
        "height_map": None if hpath is None else {"path": str(hpath),
                                                  "sha256": known or hash_future.result(),
                                                  "unit": job.height_unit},
        "profile_sha256": job.profile_sha256,
        "settings": job.settings.to_dict() | job.base_settings,
        "summary": summary,
        "spread": extra["spread"],
        "depth": {"max_depth_mm": summary["max_depth_mm"], "mean_of_deepest_mm": extra["mean_depth_deepest_mm"],
                  "deepest_n": extra["deepest_n"]},
        "mass_loss": None if job.mass is None else extra["mass_loss"] | {
            "exposed_area_cm2_used": extra["exposed_area_cm2_used"],
            "formula": "CR = K W / (A T D), ASTM G1; K = 8.76e4 (mm/y), 3.45e6 (mpy)",
            "pitting_factor": "P / d with P = deepest pit depth + d (ASTM G46)"},
        "size_histogram": size_histogram(res.pits["area_mm2"].to_numpy(float)),
        "analysis": res.details,
        "sources": {"g46": "ASTM G46 standard rating charts (chart values from memory); A: pits/m2, "
                           "B: mean opening area, C: mean of the ten deepest pits",
                    "g1": "ASTM G1 corrosion-rate formula (K for mm/y secondary, mpy from memory)",
                    "density": ml.CARBON_STEEL_DENSITY_SOURCE},
        "warnings": warnings,
        "caution": CAUTION,
        "outputs": {"overlay": str(overlay), "histogram": str(hist)},
    }
    js = write_json(job.out_dir / f"{stem}_pits.json", record)
    summary_row = {"image": str(path)} | summary | {"overlay": str(overlay), "status": "ok"}
    return {"summary": summary_row, "pits": pit_rows, "outputs": [overlay, hist, js], "sha256": img.sha256,
            "warnings": warnings}


def _positive(what: str, unit: str):
    def check(ctx, param, value):
        if value is None:
            return None
        if not (math.isfinite(value) and value > 0):
            raise click.BadParameter(f"{what} must be positive, got {value:g} {unit}")
        return value
    return check


def _fmt(x: float, spec: str) -> str:
    return format(x, spec) if isinstance(x, (int, float)) and np.isfinite(x) else "-"


def _resolved(images: pd.Series, ledger: ResumeLedger) -> pd.Series:
    """Each row's image as the resolved path of its input (``ledger.row_key``), resolving each distinct path
    once: pits.csv holds one row per pit, and a path resolution is a file-system call."""
    text = images.astype(str)
    return text.map({v: ledger.row_key(v) for v in text.unique()})


@click.command("pits")
@click.argument("images", nargs=-1, required=True, type=click.Path(path_type=Path))
@click.option("--out", "out_dir", required=True, type=click.Path(file_okay=False, path_type=Path),
              help="Output folder (created if missing).")
@click.option("--profile", "profile_path", type=click.Path(dir_okay=False, path_type=Path),
              help="Calibration profile with a scale (px/mm).")
@click.option("--px-per-mm", type=float, callback=_positive("--px-per-mm", "px/mm"),
              help="Scale of a square-on scan or photo, instead of --profile (e.g. 23.62 for 600 dpi).")
@click.option("--edge-mm", default=2.0, show_default=True, type=click.FloatRange(min=0),
              help="Band along the coupon's edge left out of the analysis.")
@click.option("--min-pit-mm2", type=float, callback=_positive("--min-pit-mm2", "mm2"),
              help="Smallest pit counted [default: 16 pixels of area, e.g. 0.16 mm2 at 10 px/mm].")
@click.option("--pit-look", type=click.Choice(PIT_LOOKS), default="dark", show_default=True,
              help="Pits appear as dark openings, or outlined by a bright lip (low-angle or ring light).")
@click.option("--min-contrast", default=0.12, show_default=True, type=click.FloatRange(0, 1, min_open=True,
              max_open=True), help="Smallest relative darkness (or rim brightness) of a pit against the surface.")
@click.option("--rectify", is_flag=True,
              help="Resample the image to a mm grid with the profile's homography first: for a camera on a fixed "
                   "stand photographing the coupon where the calibration target lay, at an angle. Without it the "
                   "profile's mean px/mm is used and the image must be square-on (a scan).")
@click.option("--whole-frame", is_flag=True, help="Analyse the whole frame (a close-up inside the coupon).")
@click.option("--height-map", help="Height map registered pixel for pixel (float TIFF or CSV); for several "
              "images a pattern with {stem}, e.g. 'scans/{stem}_height.tiff'.")
@click.option("--height-unit", type=click.Choice(sorted(HEIGHT_UNITS)), help="Unit of the height map values.")
@click.option("--mass-loss-mg", type=float, callback=_positive("mass loss (--mass-loss-mg)", "mg"),
              help="Mass lost by the coupon after cleaning (one coupon per run).")
@click.option("--exposed-area-cm2", type=float, callback=_positive("exposed area (--exposed-area-cm2)", "cm2"),
              help="All exposed faces and edges [default: the analysed area, with a warning].")
@click.option("--hours", type=float, callback=_positive("exposure time (--hours)", "h"),
              help="Exposure time.")
@click.option("--density-g-cm3", type=float, default=ml.CARBON_STEEL_DENSITY_G_CM3, show_default=True,
              callback=_positive("density (--density-g-cm3)", "g/cm3"),
              help="Metal density; the default is carbon steel (ASTM G1 appendix table, value from memory).")
@workers_option
@force_option("images")
@db_option
@max_megapixels_option
def pits(images, out_dir, profile_path, px_per_mm, edge_mm, min_pit_mm2, pit_look, min_contrast, whole_frame,
         height_map, height_unit, mass_loss_mg, exposed_area_cm2, hours, density_g_cm3, workers, force,
         db_path, max_megapixels, rectify):
    """Pits on cleaned coupons: count, density, size, depth, spread, ASTM G46 ratings and,
    with the mass loss, the ASTM G1 corrosion rate and the pitting factor.

    \b
    Example:
      coupon pits C7.png --px-per-mm 23.62 --out results/pits \\
          --height-map C7_height.tiff --height-unit um \\
          --mass-loss-mg 412 --exposed-area-cm2 28.5 --hours 336

    Writes DIR/pits.csv (one row per pit), DIR/pit_summary.csv (one row per image),
    and per image DIR/<stem>_pits.png (pits outlined and numbered), DIR/<stem>_pit_sizes.png
    and DIR/<stem>_pits.json (settings, profile SHA-256, version).  Images already done
    with the same settings are skipped unless --force.

    Caution: cleaning coupons (ASTM G1) uses corrosive acids such as inhibited hydrochloric
    acid: fume hood, face shield, acid-resistant gloves, add acid to water, follow the standard
    and the safety data sheets.  Ratings and rates support, and do not replace, a qualified
    corrosion engineer; structural decisions need measured pit depths and licensed judgement.
    """
    if (profile_path is None) == (px_per_mm is None):
        raise click.UsageError("give the scale with exactly one of --profile or --px-per-mm")
    if rectify and profile_path is None:
        raise click.UsageError("--rectify uses the homography of a --profile")
    if height_map is not None and height_unit is None:
        raise click.UsageError("give --height-unit um or mm with --height-map (the unit is never guessed)")
    if height_unit is not None and height_map is None:
        raise click.UsageError("--height-unit is used only with --height-map")
    if mass_loss_mg is None and (hours is not None or exposed_area_cm2 is not None):
        raise click.UsageError("--hours and --exposed-area-cm2 are used only with --mass-loss-mg")
    if mass_loss_mg is not None and hours is None:
        raise click.UsageError("--mass-loss-mg needs the exposure time --hours")
    paths = expand_image_paths(list(images))
    if not paths:
        raise click.UsageError("no images found in the paths given")
    if mass_loss_mg is not None and len(paths) > 1:
        raise click.UsageError(f"one --mass-loss-mg for {len(paths)} images: run once per coupon "
                               "(results add up in the same --out folder)")
    if height_map is not None and len(paths) > 1 and "{stem}" not in height_map and "{name}" not in height_map:
        raise click.UsageError("one --height-map for several images: use a pattern with {stem}, "
                               "e.g. 'scans/{stem}_height.tiff'")
    profile_sha = None
    homography = None
    try:
        if profile_path is not None:
            profile = load_profile(profile_path)
            if profile.scale is None:
                raise CouponError("profile has no scale; run 'coupon calibrate scale' or pass --px-per-mm",
                                  profile_path)
            px_per_mm = profile.scale.px_per_mm
            profile_sha = profile.sha256
            if rectify and profile.scale.homography is None:
                raise CouponError("--rectify needs a profile whose scale has a homography (from "
                                  "'coupon calibrate scale --checker' or '--rect')", profile_path)
            if rectify:
                homography = tuple(map(tuple, np.asarray(profile.scale.homography, dtype=float).tolist()))
        settings = PitSettings(px_per_mm=px_per_mm, edge_mm=edge_mm, min_pit_mm2=min_pit_mm2, look=pit_look,
                               whole_frame=whole_frame, min_contrast=min_contrast)
        mass = None if mass_loss_mg is None else MassLoss(mass_loss_mg, hours, density_g_cm3, exposed_area_cm2)
    except CouponError as exc:
        raise fail(exc) from None
    out_dir.mkdir(parents=True, exist_ok=True)
    base = {"scale_source": "profile" if profile_path else "--px-per-mm", "rectify": rectify, "height_unit": height_unit,
            "mass_loss": None if mass is None else mass.__dict__, "default_min_pit_mm2": default_min_pit_mm2(px_per_mm)}
    job = PitJob(settings, out_dir, int(max_megapixels * 1e6), profile_sha, height_map, height_unit, mass, base,
                 homography)
    ledger = ResumeLedger(out_dir, "pits")
    summary_path, pits_path = out_dir / "pit_summary.csv", out_dir / "pits.csv"
    old = read_previous(summary_path, SUMMARY_COLUMNS, keep_default_na=False)
    # keyed by the input's resolved path (ResumeLedger.row_key): a rerun may type it another way or run elsewhere
    rows = {ledger.row_key(r["image"]): r for r in old.to_dict("records")}
    old_pits = read_previous(pits_path, PITS_COLUMNS)
    from coupon.campaign.store import is_recorded, resolve_db_path

    db = resolve_db_path(out_dir, db_path)
    db_settings = {"settings": settings.to_dict(), **base}
    failed = 0
    todo, item_settings = [], {}
    height_hashes: dict[str, str] = {}
    for p in paths:
        hp = job.height_path(p)
        h_sha = try_sha256(hp) if hp is not None else ""
        if h_sha:
            height_hashes[str(hp)] = h_sha
        key = {"profile": profile_sha, "settings": settings.to_dict(), "base": base, "command": "pits",
               "version": COMMAND_VERSION, "height_sha": h_sha or None}
        item_settings[str(p)] = settings_hash(key)
        sha = try_sha256(p)
        if not force and sha and ledger.is_done(p, sha, item_settings[str(p)]) and ResumeLedger.key(p) in rows:
            click.echo(f"{p}: already analysed (use --force to redo)")
            if not is_recorded(db, "pits", p, sha):  # a database added after the first run gets every image
                same = _resolved(old_pits["image"], ledger) == ResumeLedger.key(p)
                kept_pits = old_pits[same].to_dict("records")
                failed += not record_rows(db, "pits", p, sha, db_settings, profile_sha,
                                          {"pits": kept_pits, "pit_summary": [rows[ResumeLedger.key(p)]]},
                                          exposure_h=hours)
            continue
        todo.append(p)
    new_pits: dict[str, list[dict]] = {}
    job = replace(job, height_sha256=tuple(height_hashes.items()))
    # in-process, the next image decodes on a helper thread while this one is analysed
    ahead = Prefetch(todo if workers <= 1 else [], job.load)
    func = (lambda p: pit_rows_for_image(p, job, ahead(p))) if workers <= 1 else job
    with ahead:
        for out in run_batch(todo, func, workers=workers, label="Pits"):
            key, rkey = str(out.item), ResumeLedger.key(out.item)
            if out.ok:
                r = out.result
                ledger.record(out.item, r["sha256"], item_settings[key], r["outputs"])
                s = r["summary"]
                for w in r["warnings"]:
                    click.echo(f"warning: {out.item}: {w}", err=True)
                click.echo(f"{out.item}: {s['pit_count']} pits on {s['analysed_area_mm2'] / 100:.2f} cm2 "
                           f"({_fmt(s['density_per_m2'], '.3g')} per m2), mean {_fmt(s['mean_area_mm2'], '.3f')} mm2, "
                           f"G46 {s['g46_density'] or '-'} {s['g46_size'] or '-'} {s['g46_depth'] or '-'}, "
                           f"deepest {_fmt(s['max_depth_mm'], '.3f')} mm, "
                           f"Clark-Evans R {_fmt(s['clark_evans_r'], '.2f')} ({s['clark_evans_note']})"
                           + (f", {_fmt(s['corrosion_rate_mm_y'], '.4g')} mm/y = "
                              f"{_fmt(s['corrosion_rate_mpy'], '.4g')} mpy,"
                              f" pitting factor {_fmt(s['pitting_factor'], '.1f')}" if mass is not None else ""))
                rows[rkey] = s
                new_pits[rkey] = r["pits"]
                failed += not record_rows(db, "pits", out.item, r["sha256"], db_settings, profile_sha,
                                          {"pits": r["pits"], "pit_summary": [s]}, exposure_h=hours)
            else:
                failed += 1
                report_failure(out.error, out.trace)
                rows[rkey] = {c: np.nan for c in SUMMARY_COLUMNS} | {"image": key, "status": out.error}
                new_pits[rkey] = []
    ledger.flush()
    kept = old_pits[~_resolved(old_pits["image"], ledger).isin(list(new_pits))] if len(old_pits) else old_pits
    fresh = [r for v in new_pits.values() for r in v]
    table = pd.concat([t for t in (kept.reindex(columns=PITS_COLUMNS), pd.DataFrame(fresh, columns=PITS_COLUMNS))
                       if len(t)], ignore_index=True) if (len(kept) or fresh) else pd.DataFrame(columns=PITS_COLUMNS)
    write_csv(pits_path, table)
    write_csv(summary_path, pd.DataFrame(list(rows.values()), columns=SUMMARY_COLUMNS))
    click.echo(f"pits: {pits_path}\nsummary: {summary_path}\ndatabase: {db}")
    if failed:
        raise SystemExit(EXIT_FAILED)

