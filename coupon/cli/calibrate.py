"""``coupon calibrate``: scale, colour, indicator, target, show."""

from __future__ import annotations

import json
from pathlib import Path

import click
import numpy as np

from coupon.calibrate import colourspace as cs
from coupon.calibrate.colour import (
    MATRIX_KINDS,
    ColourCorrection,
    apply_correction,
    box_pixels,
    fit_colour_matrix,
    read_patch_table,
    robust_colour,
    white_balance_gains,
)
from coupon.calibrate.indicator import (
    DEFAULT_MAX_DISTANCE,
    build_model,
    fit_from_drops,
    read_indicator_table,
)
from coupon.calibrate.profile import (
    load_or_new,
    load_profile,
    save_profile,
    step_record,
)
from coupon.calibrate.scale import (
    scale_from_checkerboard,
    scale_from_points,
    scale_from_rectangle,
    scale_given,
)
from coupon.calibrate.target import TargetLayout, sample_white_patch
from coupon.cli.common import fail, max_megapixels_option, parse_numbers, parse_size
from coupon.errors import CouponError
from coupon.io.images import file_sha256, load_image, try_sha256


@click.group()
def calibrate() -> None:
    """Make or update a calibration profile (scale, colour, indicator), print a target."""


def _profile_opt(f):
    return click.option("--profile", "profile_path", required=True,
                        type=click.Path(dir_okay=False, path_type=Path),
                        help="Profile JSON to create or update (other parts are kept).")(f)


def _load(path: Path, max_megapixels: float):
    return load_image(path, max_pixels=int(max_megapixels * 1e6))


# ---------------------------------------------------------------------------
@calibrate.command("scale")
@click.argument("image", required=False, type=click.Path(dir_okay=False, path_type=Path))
@click.option("--checker", help="Printed checkerboard, squares as counted on the sheet: COLSxROWS (e.g. 9x7).")
@click.option("--square-mm", type=float, help="Side of one checkerboard square in mm (measure the print).")
@click.option("--px-per-mm", type=float, help="Known scale in pixels per mm.")
@click.option("--points", help="Two image points X1,Y1,X2,Y2 (px) a known distance apart.")
@click.option("--distance-mm", type=float, help="Distance between --points in mm.")
@click.option("--rect", help="Four corners X1,Y1,...,X4,Y4 (px) of a rectangle of known size, any order.")
@click.option("--rect-mm", help="Size of --rect in mm, WxH.")
@_profile_opt
@max_megapixels_option
def scale_cmd(image, checker, square_mm, px_per_mm, points, distance_mm, rect, rect_mm, profile_path, max_megapixels):
    """Pixels-to-millimetres scale, by one of four methods.

    \b
    coupon calibrate scale IMG --checker 9x7 --square-mm 5 --profile P.json
    coupon calibrate scale IMG --px-per-mm 12.5 --profile P.json
    coupon calibrate scale IMG --points 100,200,900,210 --distance-mm 50 --profile P.json
    coupon calibrate scale IMG --rect 10,10,760,12,758,1510,12,1508 --rect-mm 75x150 --profile P.json
    """
    methods = [m for m, given in (("checker", checker), ("px-per-mm", px_per_mm is not None),
                                  ("points", points), ("rect", rect)) if given]
    if len(methods) != 1:
        raise click.UsageError("give exactly one of --checker, --px-per-mm, --points or --rect"
                               + (f" (got {', '.join('--' + m for m in methods)})" if methods else ""))
    method = methods[0]
    if method != "px-per-mm" and image is None:
        raise click.UsageError(f"--{method} needs the IMAGE it was measured on")
    files, settings, img = [], {"method": method}, None
    try:
        if method == "checker":
            if square_mm is None:
                raise click.UsageError("--checker needs --square-mm (the printed square size)")
            squares = parse_size(checker, "--checker", integer=True)
            img = _load(image, max_megapixels)
            result = scale_from_checkerboard(img.rgb, squares, square_mm)
            settings.update(squares=list(squares), square_mm=square_mm)
        elif method == "px-per-mm":
            result = scale_given(px_per_mm)
            settings.update(px_per_mm=px_per_mm)
        elif method == "points":
            if distance_mm is None:
                raise click.UsageError("--points needs --distance-mm")
            x1, y1, x2, y2 = parse_numbers(points, 4, "X1,Y1,X2,Y2", "--points")
            img = _load(image, max_megapixels)  # the points must be on a real image
            result = scale_from_points((x1, y1), (x2, y2), distance_mm)
            settings.update(points=[x1, y1, x2, y2], distance_mm=distance_mm)
        else:
            if rect_mm is None:
                raise click.UsageError("--rect needs --rect-mm WxH")
            corners = np.array(parse_numbers(rect, 8, "X1,Y1,...,X4,Y4", "--rect")).reshape(4, 2)
            w_mm, h_mm = parse_size(rect_mm, "--rect-mm")
            img = _load(image, max_megapixels)
            result = scale_from_rectangle(corners, w_mm, h_mm)
            settings.update(rect=corners.tolist(), rect_mm=[w_mm, h_mm])
        if image is not None:  # the loader already hashed the image it read
            files.append((str(image), img.sha256 if img is not None else try_sha256(image)))
        profile = load_or_new(profile_path)
        rec = step_record("scale", files, settings, {"reprojection_error_mm": result.reprojection_error_mm})
        save_profile(profile.with_part("scale", result, rec), profile_path)
    except CouponError as exc:
        raise fail(exc) from None
    msg = f"scale: {result.px_per_mm:.4f} px/mm +/- {result.uncertainty_px_per_mm:.4f} ({result.method})"
    if result.reprojection_error_mm is not None and method == "checker":
        msg += f", reprojection error {result.reprojection_error_mm:.4f} mm"
    click.echo(msg)
    click.echo(f"profile written: {profile_path}")


# ---------------------------------------------------------------------------
@calibrate.command("colour")
@click.argument("image", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--patches", type=click.Path(dir_okay=False, path_type=Path),
              help="CSV of reference patches: name,x_px,y_px,w_px,h_px and L,a,b or R,G,B (sRGB 0-255).")
@click.option("--matrix", "kind", type=click.Choice(list(MATRIX_KINDS)), default="affine", show_default=True,
              help="Colour matrix form: affine 3x4 or linear 3x3 (in linear RGB).")
@click.option("--neutral-box", help="White balance from a neutral region X,Y,W,H (px).")
@click.option("--target", "use_target", is_flag=True,
              help="White balance from the grey patch of the printed coupon target in IMAGE.")
@click.option("--checker", default="9x7", show_default=True, help="Squares of the printed target (with --target).")
@_profile_opt
@max_megapixels_option
def colour_cmd(image, patches, kind, neutral_box, use_target, checker, profile_path, max_megapixels):
    """White balance and colour correction matrix.

    \b
    coupon calibrate colour IMG --patches PATCHES.csv --profile P.json
    coupon calibrate colour IMG --target --profile P.json          (white balance only)
    coupon calibrate colour IMG --neutral-box 40,40,80,60 --patches PATCHES.csv --profile P.json
    """
    if not (patches or neutral_box or use_target):
        raise click.UsageError("give --patches, --neutral-box or --target")
    if neutral_box and use_target:
        raise click.UsageError("give one white-balance source: --neutral-box or --target")
    try:
        img = _load(image, max_megapixels)
        settings: dict = {"matrix": kind if patches else None}
        gains = np.ones(3)
        if neutral_box:
            box = parse_numbers(neutral_box, 4, "X,Y,W,H", "--neutral-box")
            gains = white_balance_gains(robust_colour(box_pixels(img.rgb, box)))
            settings["neutral_box"] = box
        elif use_target:
            squares = parse_size(checker, "--checker", integer=True)
            layout = TargetLayout(squares=(int(squares[0]), int(squares[1])))
            sc = scale_from_checkerboard(img.rgb, layout.squares, layout.square_mm)
            gains = white_balance_gains(sample_white_patch(img.rgb, sc.homography, layout))
            settings["target"] = list(layout.squares)
        files = [(str(image), img.sha256)]
        if patches:
            table = read_patch_table(patches)
            measured = np.array([robust_colour(box_pixels(img.rgb, r)) for r in
                                 table[["x_px", "y_px", "w_px", "h_px"]].to_numpy()])
            corr = fit_colour_matrix(measured, table[["L", "a", "b"]].to_numpy(), kind=kind, gains=gains,
                                     names=[str(n) for n in table["name"]])
            files.append((str(patches), file_sha256(patches)))
        else:
            corr = ColourCorrection(gains=gains, details={"white_balance_only": True})
        profile = load_or_new(profile_path)
        rec = step_record("colour", files, settings, {"mean_de00": corr.mean_de00})
        save_profile(profile.with_part("colour", corr, rec), profile_path)
    except CouponError as exc:
        raise fail(exc) from None
    click.echo("white balance gains (linear R, G, B): " + ", ".join(f"{g:.4f}" for g in corr.gains))
    if corr.residual_de00:
        click.echo("residual CIEDE2000 per patch:")
        for name, de in corr.residual_de00.items():
            click.echo(f"  {name:<16} {de:6.2f}")
        click.echo(f"  {'mean':<16} {corr.mean_de00:6.2f}")
    click.echo(f"profile written: {profile_path}")


# ---------------------------------------------------------------------------
@calibrate.command("indicator")
@click.argument("image", required=False, type=click.Path(dir_okay=False, path_type=Path))
@click.option("--ph", "ph_text", help="pH of the buffer drops in reading order (rows top to bottom, "
              "left to right), e.g. 3,4,5,6,7,8,9,10,11.")
@click.option("--table", type=click.Path(dir_okay=False, path_type=Path),
              help="Instead of a photo: CSV with columns ph and L,a,b or R,G,B.")
@click.option("--name", default=None, help="Name of the indicator and set-up, for the record.")
@click.option("--max-distance", type=click.FloatRange(min=0, min_open=True), default=None,
              help=f"Colour distance (weighted CIELAB) beyond which a pixel is not indicator "
                   f"[default: max({DEFAULT_MAX_DISTANCE:g}, 3.5 x the drops' spread)].")
@_profile_opt
@max_megapixels_option
def indicator_cmd(image, ph_text, table, name, max_distance, profile_path, max_megapixels):
    """Indicator colour-to-pH model from buffer drops of known pH.

    Photograph the buffer drops with the indicator on the test substrate, under
    the test's lighting, in rows.  The profile's colour correction (if any) is
    applied before the drops are sampled, as it is for every later measurement.

    \b
    coupon calibrate indicator BUFFERS.jpg --ph 3,4,5,6,7,8,9,10,11 --profile P.json
    coupon calibrate indicator --table my_chart.csv --profile P.json

    Caution: indicator solutions are often ethanol-based (flammable) and may contain
    phenolphthalein; buffers at the ends of the scale are irritant or corrosive.  Gloves, eye
    protection, and the safety data sheets.
    """
    if (image is None) == (table is None):
        raise click.UsageError("give a buffer photo IMAGE with --ph, or --table CSV")
    try:
        profile = load_or_new(profile_path)
        if table is not None:
            ph, lab, meta = read_indicator_table(table)
            model = build_model(ph, lab, name=name or f"table {table.name}",
                                max_distance=max_distance or DEFAULT_MAX_DISTANCE, details={"table": str(table), **meta})
            files, drops = [(str(table), file_sha256(table))], None
        else:
            if not ph_text:
                raise click.UsageError("a buffer photo needs --ph with the buffers' pH in reading order")
            ph = parse_numbers(ph_text, None, "pH values", "--ph")
            img = _load(image, max_megapixels)
            rgb = apply_correction(img.rgb, profile.colour)
            model, drops = fit_from_drops(rgb, ph, name=name or f"buffers {image.name}", max_distance=max_distance)
            files = [(str(image), img.sha256)]
        rec = step_record("indicator", files, {"ph": model.ph.tolist(), "max_distance": model.max_distance,
                                               "colour_corrected": profile.colour is not None},
                          {"drop_spread": None if model.spread is None else model.spread.tolist()})
        save_profile(profile.with_part("indicator", model, rec), profile_path)
    except CouponError as exc:
        raise fail(exc) from None
    de = cs.delta_e_2000(model.lab[:-1], model.lab[1:])
    click.echo(f"{'pH':>5} {'L*':>7} {'a*':>7} {'b*':>7} {'spread':>7} {'dE00 to next':>13}")
    for i, p in enumerate(model.ph):
        sp = "" if model.spread is None else f"{model.spread[i]:7.2f}"
        nxt = f"{de[i]:13.1f}" if i < len(de) else ""
        click.echo(f"{p:5.2f} {model.lab[i, 0]:7.2f} {model.lab[i, 1]:7.2f} {model.lab[i, 2]:7.2f} {sp:>7} {nxt}")
    click.echo(f"tolerance: colours farther than {model.max_distance:.1f} from the path map to NaN")
    click.echo(f"profile written: {profile_path}")


# ---------------------------------------------------------------------------
@calibrate.command("target")
@click.argument("out", type=click.Path(path_type=Path))
@click.option("--checker", default="9x7", show_default=True, help="Squares COLSxROWS (both odd).")
@click.option("--square-mm", default=5.0, show_default=True, type=click.FloatRange(min=1.0), help="Square side in mm.")
@click.option("--dpi", default=600, show_default=True, type=click.IntRange(min=72, max=2400), help="PNG resolution.")
def target_cmd(out, checker, square_mm, dpi):
    """Write the printable scale and grey target as OUT.pdf and OUT.png (true scale).

    Print at 100 % (no fit-to-page) on matte paper and check the printed bar with a
    ruler; measure a square and pass that size to 'calibrate scale --square-mm'.
    """
    cols, rows = parse_size(checker, "--checker", integer=True)
    try:
        layout = TargetLayout(squares=(int(cols), int(rows)), square_mm=square_mm)
    except ValueError as exc:
        raise click.BadParameter(str(exc), param_hint="--checker") from None
    if out.is_dir():
        out = out / f"coupon_target_{int(cols)}x{int(rows)}_{square_mm:g}mm"
    try:
        written = layout.write(out, dpi=dpi)
    except OSError as exc:
        raise fail(exc) from None
    w, h = layout.sheet_size_mm
    for p in written:
        click.echo(f"written: {p}")
    click.echo(f"sheet {w:.0f} x {h:.0f} mm; print at 100 %, check the {layout.bar_mm:g} mm bar with a ruler")


# ---------------------------------------------------------------------------
@calibrate.command("show")
@click.argument("profile_path", metavar="PROFILE", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--json", "as_json", is_flag=True, help="Print the validated profile as JSON.")
def show_cmd(profile_path, as_json):
    """Print a profile readably (after validating it)."""
    try:
        p = load_profile(profile_path)
    except CouponError as exc:
        raise fail(exc) from None
    if as_json:
        click.echo(json.dumps(p.to_dict(), indent=2))
        return
    click.echo(f"profile {profile_path}  (created {p.created}, sha256 {p.sha256[:12]}...)")
    if p.scale:
        s = p.scale
        line = f"  scale      {s.px_per_mm:.4f} px/mm +/- {s.uncertainty_px_per_mm:.4f}  method {s.method}"
        if s.reprojection_error_mm is not None:
            line += f", reprojection {s.reprojection_error_mm:.4f} mm"
        click.echo(line + (", with homography" if s.homography is not None else ""))
    else:
        click.echo("  scale      (none)")
    if p.colour:
        c = p.colour
        line = "  colour     gains " + ", ".join(f"{g:.3f}" for g in c.gains)
        if c.matrix is not None:
            line += f"; {'affine 3x4' if c.matrix.shape[1] == 4 else 'linear 3x3'} matrix, mean CIEDE2000 {c.mean_de00:.2f}"
        click.echo(line)
    else:
        click.echo("  colour     (none)")
    if p.indicator:
        m = p.indicator
        tag = " [generic table, approximate]" if m.is_default else ""
        click.echo(f"  indicator  {m.name}{tag}: {len(m.ph)} points, pH {m.ph[0]:g}-{m.ph[-1]:g}, "
                   f"tolerance {m.max_distance:.1f}")
    else:
        click.echo("  indicator  (none)")
    for h in p.history:
        files = ", ".join(f"{Path(f['path']).name} ({f['sha256'][:10]})" for f in h.get("files", []))
        click.echo(f"  {h.get('date', '?')}  {h.get('step', '?'):<9} {files}")
