"""``coupon droplet``: a droplet time-lapse: pH zones, rust and their course over time."""

from __future__ import annotations

import warnings
from collections import Counter
from dataclasses import dataclass
from pathlib import Path

import click
import numpy as np
import pandas as pd
from PIL import Image

from coupon import __version__
from coupon.calibrate.colour import ColourCorrection
from coupon.calibrate.indicator import IndicatorModel
from coupon.calibrate.profile import load_profile
from coupon.calibrate.scale import check_px_per_mm
from coupon.calibrate.shipped import default_indicator
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
from coupon.io import frametimes as ft
from coupon.io.atomic import BackgroundWrites, write_csv, write_float_tiff, write_json
from coupon.io.batch import Prefetch, ResumeLedger, run_batch, settings_hash
from coupon.io.images import LoadedImage, expand_image_paths, load_image, try_sha256
from coupon.segment.droplet import (
    MEASURES,
    DropletSettings,
    analyse_frame,
    series_events,
)

#: droplet.csv columns, in order (the issue's columns are all here, with the same names).
FRAME_COLUMNS = ["frame", "file", "t_min", "time_source", "capture_time", "drop_found", *MEASURES,
                 "ph_tiff", "ph_png", "sha256", "note", "status"]
RADIAL_COLUMNS = ["frame", "file", "t_min", "r_norm", "ph_median", "n_px"]
COMMAND = "droplet"

CAUTION = ("Indicator solutions are often ethanol-based (flammable) and may contain phenolphthalein "
           "(classified as a possible carcinogen); salt solutions and corrosion products irritate eyes and "
           "skin. Wear gloves and eye protection, read the safety data sheets and follow your laboratory's "
           "rules and the governing test method.")


@dataclass(frozen=True)
class DropletJob:
    """Analyse one frame file into its CSV rows (picklable for the process pool)."""

    model: IndicatorModel
    colour: ColourCorrection | None
    px_per_mm: float
    settings: DropletSettings
    out_dir: Path
    max_pixels: int
    expected_shape_rc: tuple[int, int] | None
    frame_figures: bool = True

    def __call__(self, path: Path) -> dict:
        return frame_rows(path, self)

    def load(self, path: Path) -> LoadedImage:
        return load_image(path, max_pixels=self.max_pixels)


def frame_rows(path: Path, job: DropletJob, img: LoadedImage | None = None) -> dict:
    """The rows one frame contributes: ``{"row": droplet.csv row, "radial": radial_profile.csv rows}``.

    ``frame`` and ``t_min`` are filled in once the whole series' times are known.  ``img``: the frame
    already loaded (by a :class:`~coupon.io.batch.Prefetch`), or None to load it here.
    """
    if img is None:
        img = job.load(path)
    if job.expected_shape_rc is not None and img.shape_rc != tuple(job.expected_shape_rc):
        er, ec = job.expected_shape_rc
        raise AnalysisError(
            f"frame is {img.shape_rc[1]}x{img.shape_rc[0]} px but the series is {ec}x{er} px; a time-lapse "
            "needs one camera set-up (same size and scale) for every frame", path)
    s = job.settings
    # an 8-bit frame is passed as decoded: only the reduced copy and the drop's crop are made float
    res = analyse_frame(img.rgb_u8 if img.rgb_u8 is not None else img.rgb, job.model, job.px_per_mm, job.colour, s)
    row = {c: np.nan for c in FRAME_COLUMNS}
    row.update({"file": str(path), "capture_time": img.capture_time.isoformat() if img.capture_time else "",
                "drop_found": res.drop_found, **res.measures, "ph_tiff": "", "ph_png": "",
                "sha256": img.sha256, "note": res.note, "status": "ok"})
    if res.drop_found:
        frames_dir = job.out_dir / "frames"
        # written here, not on the background writer: a failed write then fails this frame's row (the
        # writer's errors are only reported at the end, when the rows are already "ok")
        tiff = write_float_tiff(frames_dir / f"{path.stem}_ph.tiff", res.ph_map)
        row["ph_tiff"] = str(tiff)
        if job.frame_figures:
            from coupon.report.droplet_figures import frame_figure

            png = frame_figure(
                res.ph_map, res.drop_mask, res.rust_mask, frames_dir / f"{path.stem}_ph.png",
                title=f"{path.name}: pH, acidic {res.measures['acidic_area_pct']:.0f} %, basic "
                      f"{res.measures['basic_area_pct']:.0f} %, rust {res.measures['rust_area_pct']:.1f} %",
                px_per_mm=res.work_px_per_mm, acidic_below=s.acidic_below, basic_above=s.basic_above,
                ph_range=(float(job.model.ph[0]), float(job.model.ph[-1])))
            row["ph_png"] = str(png)
    radial = [{"frame": np.nan, "file": str(path), "t_min": np.nan, "r_norm": float(r), "ph_median": float(p),
               "n_px": int(n)} for r, p, n in zip(res.ring_r_norm, res.ring_ph_median, res.ring_n_px)]
    return {"row": row, "radial": radial}


def _header_shape(path: Path) -> tuple[int, int] | None:
    """(rows, cols) from the header only (EXIF rotation applied), or None if unreadable."""
    try:
        with Image.open(path) as im:
            w, h = im.size
            if int(im.getexif().get(0x0112, 1) or 1) in (5, 6, 7, 8):
                w, h = h, w
            return h, w
    except Exception:  # noqa: BLE001 - the frame's own load reports why it is unreadable
        return None


def series_shape(paths: list[Path]) -> tuple[int, int] | None:
    """The frame size most frames share (the first such frame's on a tie)."""
    shapes = [s for s in (_header_shape(p) for p in paths) if s is not None]
    return Counter(shapes).most_common(1)[0][0] if shapes else None


def _parse_interval(ctx, param, value):
    if value is None:
        return None
    try:
        v = ft.parse_duration(value)
    except ValueError as exc:
        raise click.BadParameter(str(exc)) from None
    if v <= 0:
        raise click.BadParameter(f"{value!r}: the interval must be positive")
    return v


def _parse_t0(ctx, param, value):
    try:
        return ft.parse_t0(value)
    except ValueError as exc:
        raise click.BadParameter(str(exc)) from None


@click.command("droplet")
@click.argument("frames", nargs=-1, required=True, type=click.Path(path_type=Path))
@click.option("--profile", "profile_path", type=click.Path(dir_okay=False, path_type=Path),
              help="Profile with scale, colour correction and indicator model. Without an indicator the generic "
                   "shipped table is used (approximate, with a warning).")
@click.option("--out", "out_dir", required=True, type=click.Path(file_okay=False, path_type=Path),
              help="Output folder (created if missing).")
@click.option("--px-per-mm", type=float, default=None, help="Scale of the frames when the profile has none.")
@click.option("--acidic-below", default=6.0, show_default=True, type=float, help="pH below which a pixel is acidic.")
@click.option("--basic-above", default=8.0, show_default=True, type=float, help="pH above which a pixel is basic.")
@click.option("--rings", default=20, show_default=True, type=click.IntRange(min=2), help="Rings of the radial profile.")
@click.option("--interval", "interval_min", callback=_parse_interval, default=None,
              help="Time between frames, e.g. 60s, 5min (frames in the order given).")
@click.option("--times", "times_csv", type=click.Path(dir_okay=False, exists=True, path_type=Path), default=None,
              help="CSV with columns file and t_min (or t_s, t_h, or time such as 35min).")
@click.option("--time-source", type=click.Choice(ft.SOURCES), default="auto", show_default=True,
              help="Where frame times come from; auto: --times, --interval, file names (_t035min, _0065s), EXIF.")
@click.option("--t0", "t0", callback=_parse_t0, default=None,
              help="The moment that is t = 0: a duration on the frames' clock (e.g. 5min) or, with EXIF "
                   "times, a date-time (e.g. 2026-03-02T09:15:00). Default: the first frame.")
@click.option("--frame-figures/--no-frame-figures", default=True, show_default=True,
              help="Write a pH picture per frame (the float TIFF is always written).")
@workers_option
@force_option("frames")
@db_option
@max_megapixels_option
def droplet(frames, profile_path, out_dir, px_per_mm, acidic_below, basic_above, rings, interval_min, times_csv,
            time_source, t0, frame_figures, workers, force, db_path, max_megapixels):
    """Droplet time-lapse: per frame the drop outline, its pH map, acidic / neutral / basic zones, rust
    and a radial pH profile; over the series the events (first acidic zone, first rust, peak acidity,
    evaporation rate) and pictures.

    \b
    Example:
      coupon droplet frames/ --profile lab.json --out results/drop_A
      coupon droplet A_*.jpg --profile lab.json --interval 60s --t0 -2min --out results/drop_A

    \b
    Outputs in DIR: droplet.csv (one row per frame; status says which frames failed and why),
    radial_profile.csv, droplet_summary.json, frames/<stem>_ph.tiff and .png, droplet_montage.png,
    droplet_kymograph.png, droplet_zone_areas.png.

    Caution: indicator solutions are often ethanol-based (flammable) and may contain
    phenolphthalein; salt solutions and corrosion products irritate eyes and skin.  Gloves, eye
    protection, the safety data sheets, and your laboratory's rules and the governing method.
    """
    try:
        settings = DropletSettings(acidic_below=acidic_below, basic_above=basic_above, rings=rings)
    except CouponError as exc:
        raise click.BadParameter(exc.message, param_hint="--acidic-below/--basic-above") from None
    try:
        profile = load_profile(profile_path) if profile_path is not None else None
        model = profile.indicator if profile is not None else None
        if model is None:
            click.echo("warning: " + ("the profile has no indicator model" if profile is not None else "no --profile")
                       + ": falling back to the generic shipped universal-indicator table", err=True)
            model = default_indicator()
        elif model.is_default:
            warnings.warn("the profile's indicator model is the generic table, not a buffer calibration; "
                          "pH is approximate")
        if px_per_mm is not None:
            ppm = check_px_per_mm(px_per_mm)
            if profile is not None and profile.scale is not None:
                click.echo(f"note: --px-per-mm {ppm:g} overrides the profile's scale "
                           f"{profile.scale.px_per_mm:.4g}", err=True)
        elif profile is not None and profile.scale is not None:
            ppm = profile.scale.px_per_mm
        else:
            raise CouponError("no scale: the profile has none and --px-per-mm was not given; calibrate the scale "
                              "(coupon calibrate scale) or pass --px-per-mm")
        table = ft.read_time_table(times_csv) if times_csv is not None else None
    except CouponError as exc:
        raise fail(exc) from None
    if time_source == "table" and table is None:
        raise click.UsageError("--time-source table needs --times CSV")
    if time_source == "interval" and interval_min is None:
        raise click.UsageError("--time-source interval needs --interval")

    paths = expand_image_paths(list(frames))
    if not paths:
        raise fail(CouponError("no image files among the FRAMES given (folders are searched for "
                               "JPEG, PNG, TIFF, BMP, WebP)"))
    out_dir.mkdir(parents=True, exist_ok=True)
    colour = profile.colour if profile is not None else None
    job = DropletJob(model, colour, float(ppm), settings, out_dir, int(max_megapixels * 1e6), series_shape(paths),
                     frame_figures)
    settings_record = {"command": COMMAND, "version": 1, "profile_sha256": profile.sha256 if profile else None,
                       "px_per_mm": float(ppm), **settings.to_dict(), "frame_figures": frame_figures,
                       "indicator": model.name}
    shash = settings_hash(settings_record)

    # resume: frames already analysed with the same bytes and settings keep their rows
    ledger = ResumeLedger(out_dir, COMMAND)
    old_rows, old_radial = _previous(out_dir, ledger)
    results: dict[Path, dict] = {}
    todo = []
    for p in paths:
        sha = try_sha256(p)
        key = ResumeLedger.key(p)  # the tables are keyed by resolved path: a rerun may type it another way
        if not force and sha and ledger.is_done(p, sha, shash) and key in old_rows:
            results[p] = {"row": old_rows[key], "radial": old_radial.get(key, [])}
            continue
        todo.append(p)
    if len(todo) < len(paths):
        click.echo(f"{len(paths) - len(todo)} frame(s) already analysed (use --force to redo)")
    failed = 0
    # in-process, the next frame decodes and this frame's pictures are encoded on the second core while
    # this frame is analysed
    with BackgroundWrites() as writes, Prefetch(todo if workers <= 1 else [], job.load) as ahead:
        func = (lambda p: frame_rows(p, job, ahead(p))) if workers <= 1 else job
        for out in run_batch(todo, func, workers=workers, label="droplet frames"):
            if out.ok:
                r = out.result
                outputs = [o for o in (r["row"]["ph_tiff"], r["row"]["ph_png"]) if o]
                ledger.record(out.item, r["row"]["sha256"], shash, outputs)
                results[out.item] = r
                if not r["row"]["drop_found"]:
                    click.echo(f"{out.item}: {r['row']['note']}")
            else:
                failed += 1
                report_failure(out.error, out.trace)
                row = {c: np.nan for c in FRAME_COLUMNS} | {"file": str(out.item), "drop_found": False,
                                                             "status": out.error, "note": "", "capture_time": ""}
                results[out.item] = {"row": row, "radial": []}
    for message in writes.errors:
        failed += 1
        report_failure(message)
    ledger.flush()

    rows = [results[p]["row"] for p in paths]
    try:
        source, t_list = _frame_times(paths, rows, time_source, interval_min, table, t0)
    except CouponError as exc:
        raise fail(exc) from None
    for r, t in zip(rows, t_list):
        r["t_min"] = np.nan if t is None else float(t)
        r["time_source"] = source
    _warn_order(paths, t_list)
    order = sorted(range(len(paths)), key=lambda i: (np.inf if t_list[i] is None else t_list[i], i))
    frame_table = pd.DataFrame([rows[i] for i in order], columns=FRAME_COLUMNS)
    frame_table["frame"] = np.arange(len(order))
    radial_rows = []
    for k, i in enumerate(order):
        for rr in results[paths[i]]["radial"]:
            radial_rows.append(rr | {"frame": k, "t_min": rows[i]["t_min"]})
    radial_table = pd.DataFrame(radial_rows, columns=RADIAL_COLUMNS)
    write_csv(out_dir / "droplet.csv", frame_table)
    write_csv(out_dir / "radial_profile.csv", radial_table)

    ok = frame_table[(frame_table["status"] == "ok") & frame_table["t_min"].notna()]
    ok_drop = ok["drop_found"].astype(bool)
    ev = series_events(ok["t_min"], ok_drop, ok["drop_area_mm2"], ok["acidic_area_pct"], ok["basic_area_pct"],
                       ok["rust_area_pct"], ok["ph_centre"], ok["ph_rim"], settings)
    figures = _series_figures(out_dir, ok, radial_table, model, settings)
    failures = [{"file": r["file"], "reason": r["status"]} for r in frame_table.to_dict("records")
                if r["status"] != "ok"]
    summary = {
        "tool": "coupon", "tool_version": __version__, "command": COMMAND,
        "settings": settings_record, "profile": str(profile_path) if profile_path else None,
        "profile_sha256": profile.sha256 if profile else None,
        "indicator": {"name": model.name, "is_default": bool(model.is_default),
                      "ph_range": [float(model.ph[0]), float(model.ph[-1])]},
        "time_source": source, "t0": None if t0 is None else str(t0),
        "frames": len(paths), "frames_ok": int(len(ok)), "frames_with_drop": int(ok_drop.sum()),
        "frames_failed": len(failures), "failures": failures,
        "events": ev, "outputs": {"frames_csv": str(out_dir / "droplet.csv"),
                                  "radial_csv": str(out_dir / "radial_profile.csv"), **figures},
        "caution": CAUTION,
    }
    write_json(out_dir / "droplet_summary.json", summary)
    failed += _record_series(db_path, out_dir, frame_table, radial_rows, settings_record, summary)
    _echo_summary(ev, len(paths), len(ok), int(ok_drop.sum()), failures, out_dir)
    if len(ok) and not ok_drop.any():
        click.echo(f"error: no drop was found in any of the {len(ok)} readable frames: check that the frames show "
                   "an indicator drop on the metal, in the middle of the view, and that the profile matches "
                   "the camera set-up", err=True)
        raise SystemExit(EXIT_FAILED)
    if failed or failures:
        raise SystemExit(EXIT_FAILED)


def _record_series(db_path, out_dir: Path, frame_table: pd.DataFrame, radial_rows: list[dict],
                   settings_record: dict, summary: dict) -> int:
    """Record every analysed frame and the series summary in the campaign database; returns failures.

    Frame numbers and times depend on the whole series, so every run records all frames (a rerun
    replaces their rows); frames that failed to load keep their earlier rows.
    """
    import sqlite3

    from coupon.campaign.store import flat_row, open_store, resolve_db_path

    db = resolve_db_path(out_dir, db_path)
    series_key = str(out_dir)
    profile_sha = summary["profile_sha256"]
    failed = 0
    by_file: dict[str, list[dict]] = {}
    for rr in radial_rows:
        by_file.setdefault(str(rr["file"]), []).append(rr)
    keep = ("frames", "frames_ok", "frames_with_drop", "frames_failed", "time_source")
    row = flat_row({"series": series_key, **{k: summary[k] for k in keep}, **summary["events"]})
    try:
        with open_store(db) as store:  # one connection for the whole series
            for r in frame_table.to_dict("records"):
                sha = r.get("sha256")
                if not isinstance(sha, str) or not sha:
                    continue
                failed += not record_rows(db, COMMAND, r["file"], sha, settings_record, profile_sha,
                                          {"droplet": [r], "radial_profile": by_file.get(str(r["file"]), [])},
                                          store=store, series=series_key)
            failed += not record_rows(db, COMMAND, f"{out_dir}#series", None, settings_record, profile_sha,
                                      {"droplet_summary": [row]}, store=store, series=series_key)
    except (CouponError, sqlite3.Error) as exc:
        report_failure(f"{db}: the series was not recorded in the database ({exc})")
        failed += 1
    click.echo(f"database: {db}")
    return failed


def _previous(out_dir: Path, ledger: ResumeLedger) -> tuple[dict, dict]:
    """The rows of droplet.csv and radial_profile.csv, keyed by the input's resolved path (``ledger.row_key``)."""
    rows, radial = {}, {}
    f, g = out_dir / "droplet.csv", out_dir / "radial_profile.csv"
    try:
        if f.exists():
            for r in pd.read_csv(f, keep_default_na=True).to_dict("records"):
                r["capture_time"] = "" if pd.isna(r.get("capture_time")) else r["capture_time"]
                r["note"] = "" if pd.isna(r.get("note")) else r["note"]
                for k in ("ph_tiff", "ph_png"):
                    r[k] = "" if pd.isna(r.get(k)) else r[k]
                r["drop_found"] = bool(r["drop_found"])
                rows[ledger.row_key(r["file"])] = r
        if g.exists():
            for r in pd.read_csv(g).to_dict("records"):
                radial.setdefault(ledger.row_key(r["file"]), []).append(r)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError, KeyError, ValueError,
            OSError) as exc:  # a damaged table means: redo, and say so
        warnings.warn(f"{out_dir}: earlier droplet tables cannot be read back ({exc}); all frames are redone")
        return {}, {}
    return rows, radial


def _frame_times(paths, rows, source, interval_min, table, t0):
    import datetime as _dt

    captures = [_dt.datetime.fromisoformat(r["capture_time"]) if r.get("capture_time") else None for r in rows]
    readable = [i for i, r in enumerate(rows) if r["status"] == "ok"]
    if source == "auto":
        source = ft.choose_source([paths[i] for i in readable] or paths, interval_min=interval_min, table=table,
                                  captures=[captures[i] for i in readable] or captures)
    raw = [ft.raw_time(p, i, source, interval_min=interval_min, table=table, capture=c)
           for i, (p, c) in enumerate(zip(paths, captures))]
    missing = [str(paths[i]) for i in readable if raw[i] is None]
    if missing:
        for i in readable:
            if raw[i] is None:
                rows[i]["status"] = f"no frame time from {source}"
        click.echo(f"error: {len(missing)} frame(s) have no time from {source} (first: {missing[0]}); they are "
                   "left out of the series", err=True)
    return source, ft.to_minutes(raw, t0)


def _warn_order(paths, t_list) -> None:
    known = [(t, p) for t, p in zip(t_list, paths) if t is not None]
    for (ta, pa), (tb, pb) in zip(known, known[1:]):
        if tb < ta:
            warnings.warn(f"frames are not in time order: {pb.name} (t = {tb:.4g} min) comes after {pa.name} "
                          f"(t = {ta:.4g} min); the series is analysed in time order")
            break
    ts = [t for t, _ in known]
    if len(set(ts)) < len(ts):
        warnings.warn("two or more frames have the same time; check the frame times")


def _series_figures(out_dir: Path, ok: pd.DataFrame, radial: pd.DataFrame, model, s: DropletSettings) -> dict:
    import cv2

    from coupon.report import droplet_figures as dfig

    ph_range = (float(model.ph[0]), float(model.ph[-1]))
    out = {}
    if ok.empty:
        return out
    t = ok["t_min"].to_numpy(float)
    areas = {name: ok[col].to_numpy(float) for name, col in (
        ("drop", "drop_area_mm2"), ("acidic", "acidic_area_mm2"), ("neutral", "neutral_area_mm2"),
        ("basic", "basic_area_mm2"), ("rust", "rust_area_mm2"))}
    out["zone_areas_png"] = str(dfig.zone_areas_figure(t, areas, out_dir / "droplet_zone_areas.png"))
    rad = radial[radial["frame"].isin(ok["frame"])]
    mat = np.full((len(ok), s.rings), np.nan)
    pos = {f: k for k, f in enumerate(ok["frame"])}
    r_norm = (np.arange(s.rings) + 0.5) / s.rings
    if not rad.empty:
        ring = np.clip(np.rint(rad["r_norm"].to_numpy(float) * s.rings - 0.5).astype(int), 0, s.rings - 1)
        mat[[pos[f] for f in rad["frame"]], ring] = rad["ph_median"].to_numpy(float)
    out["kymograph_png"] = str(dfig.kymograph_figure(t, r_norm, mat, out_dir / "droplet_kymograph.png",
                                                     ph_range=ph_range, acidic_below=s.acidic_below,
                                                     basic_above=s.basic_above))
    with_drop = ok[ok["drop_found"].astype(bool) & (ok["ph_tiff"].astype(str) != "")]
    if len(with_drop):
        pick = np.unique(np.linspace(0, len(with_drop) - 1, min(8, len(with_drop))).round().astype(int))
        panels = []
        for _, r in with_drop.iloc[pick].iterrows():
            ph = cv2.imread(str(r["ph_tiff"]), cv2.IMREAD_UNCHANGED)
            if ph is not None:
                panels.append((f"t = {r['t_min']:.4g} min", ph))
        if panels:
            out["montage_png"] = str(dfig.montage_figure(panels, out_dir / "droplet_montage.png", ph_range=ph_range,
                                                         title="pH maps of selected frames"))
    return out


def _fmt(v, unit="min"):
    return "never" if v is None else f"{v:.4g} {unit}"


def _echo_summary(ev, n, n_ok, n_drop, failures, out_dir) -> None:
    click.echo(f"{n} frames: {n_ok} analysed ({n_drop} with a drop), {len(failures)} failed")
    click.echo(f"acidic zone > {ev['acidic_event_pct']:g} % of the drop: {_fmt(ev['t_acidic_first_min'])}; "
               f"rust > {ev['rust_event_pct']:g} %: {_fmt(ev['t_rust_first_min'])}")
    if ev["acidic_peak_pct"] is not None:
        click.echo(f"peak acidic zone {ev['acidic_peak_pct']:.1f} % at {_fmt(ev['t_acidic_peak_min'])}")
    rate = ev["evaporation"]["rate_mm2_per_min"]
    if rate is not None:
        click.echo(f"evaporation: drop area falls {rate:.3g} mm2/min (line fit over "
                   f"{ev['evaporation']['frames']} frames)")
    fin = ev["final"]
    if fin.get("t_min") is not None:
        click.echo(f"final state (t = {fin['t_min']:.4g} min): {fin['pattern']}")
    click.echo(f"results: {out_dir / 'droplet.csv'}, {out_dir / 'droplet_summary.json'}")
