"""``coupon panels``: find, rectify and rate coated test panels in tray photos."""

from __future__ import annotations

import csv
import re
import warnings
from dataclasses import dataclass
from pathlib import Path

import click
import numpy as np
import pandas as pd

from coupon import __version__
from coupon.calibrate.profile import Profile, load_profile
from coupon.cli.common import (
    EXIT_FAILED,
    db_option,
    fail,
    force_option,
    max_megapixels_option,
    parse_numbers,
    parse_size,
    record_rows,
    report_failure,
    workers_option,
)
from coupon.errors import AnalysisError, CouponError
from coupon.io.atomic import write_csv, write_json
from coupon.io.batch import Prefetch, ResumeLedger, run_batch, settings_hash
from coupon.io.images import (
    DEFAULT_MAX_PIXELS,
    IMAGE_SUFFIXES,
    LoadedImage,
    expand_image_paths,
    file_sha256,
    load_image,
    try_sha256,
)
from coupon.io.tables import read_previous
from coupon.io.threads import thread_pool
from coupon.io.warmup import warm_in_background, warm_opencv
from coupon.report.panel_figures import write_panel_overlay
from coupon.segment.panels import PanelSettings, rate_panel
from coupon.segment.panels.detect import (
    check_panel_size,
    find_panels,
    read_qr_codes,
    rectify_panel,
)
from coupon.segment.panels.rust import PINPOINT_MIN_PHOTO_PX_PER_MM, RustSettings
from coupon.segment.panels.scribe import SCRIBE_MODES, ScribeSettings

#: Columns of DIR/panels.csv (kept even when a batch finds nothing).
PANEL_COLUMNS = [
    "image", "panel_id", "id_source", "system", "replicate", "position", "row", "col", "exposure_h",
    "x_px", "y_px", "photo_px_per_mm", "chroma_subsampling", "rated_area_mm2", "glare_excluded_mm2",
    "rust_area_mm2", "rust_area_pct",
    "rust_area_pct_unc", "rust_sites",
    "rust_grade", "rust_distribution", "rust_grade_written", "ri_degree", "scribe_found", "scribe_kind",
    "creep_mean_mm", "creep_max_mm", "creep_min_mm", "creep_left_mean_mm", "creep_right_mean_mm",
    "creep_rating", "overlay", "json", "status",
]

_HOURS_RE = re.compile(r"(?<![0-9.])(\d+(?:\.\d+)?)\s*h(?![a-z])", re.IGNORECASE)


def hours_from_name(path: Path) -> float | None:
    """Exposure time from a file name such as ``rack2_0240h.jpg`` (None when absent or ambiguous)."""
    found = _HOURS_RE.findall(path.stem)
    return float(found[0]) if len(found) == 1 else None


def read_layout(path: Path) -> dict[tuple[int, int], dict]:
    """Layout CSV (row, col, panel_id, system, replicate) -> {(row, col): {...}}; a position may appear once."""
    try:
        with open(path, newline="", encoding="utf-8-sig") as fh:
            rows = list(csv.DictReader(fh))
    except OSError as exc:
        raise click.BadParameter(f"{path}: cannot be read ({exc.strerror or exc})", param_hint="--layout")
    except (UnicodeDecodeError, csv.Error) as exc:
        raise click.BadParameter(f"{path}: not a readable text CSV ({exc}); save it as UTF-8 CSV",
                                 param_hint="--layout") from None
    need = {"row", "col", "panel_id"}
    if not rows or not need <= set(rows[0]):
        raise click.BadParameter(f"{path}: expected columns row, col, panel_id (and optionally system, "
                                 f"replicate), got {sorted(rows[0]) if rows else 'no rows'}", param_hint="--layout")
    out: dict[tuple[int, int], dict] = {}
    first_line: dict[tuple[int, int], int] = {}
    id_line: dict[str, int] = {}
    for line, r in enumerate(rows, start=2):
        try:
            pos = (int(r["row"]), int(r["col"]))
        except (TypeError, ValueError):
            raise click.BadParameter(f"{path} line {line}: row and col must be whole numbers, got "
                                     f"{r['row']!r}, {r['col']!r}", param_hint="--layout") from None
        if pos in out:
            raise click.BadParameter(f"{path}: position row {pos[0]}, col {pos[1]} is named twice (lines "
                                     f"{first_line[pos]} and {line}); each position may appear once",
                                     param_hint="--layout")
        first_line[pos] = line
        pid = str(r["panel_id"] or "").strip()
        if not pid:
            raise click.BadParameter(f"{path} line {line}: panel_id is empty; give every position an ID",
                                     param_hint="--layout")
        if pid in id_line:
            raise click.BadParameter(f"{path}: panel_id {pid!r} is named twice (lines {id_line[pid]} and {line}); "
                                     "each panel needs its own ID (its rows and files are named by it)",
                                     param_hint="--layout")
        id_line[pid] = line
        out[pos] = {"panel_id": pid, "system": str(r.get("system") or "").strip(),
                    "replicate": str(r.get("replicate") or "").strip()}
    return out


@dataclass(frozen=True)
class Manifest:
    """Exposure times of a manifest CSV: by the image's resolved path, and by its bare file name."""

    by_path: dict[str, float]
    by_name: dict[str, float]

    def hours_for(self, path: Path) -> float | None:
        hit = self.by_path.get(ResumeLedger.key(path))
        return hit if hit is not None else self.by_name.get(path.name)


def read_manifest(path: Path) -> Manifest:
    """Manifest CSV (image, exposure_h).

    An ``image`` with a folder (``dayA/tray.jpg``, relative to the manifest's own folder, or absolute;
    ``/`` or ``\\`` between the parts) matches that file; one given as a bare file name matches an image
    of that name wherever it lies.  A folder path that matches no file here (a manifest written on
    another computer) still matches by its file name when no other entry has that name with another time.
    """
    from coupon.io.tables import numeric_columns, read_user_csv

    try:
        table = read_user_csv(path, "manifest")
        if not {"image", "exposure_h"} <= set(table.columns):
            raise click.BadParameter(f"{path}: expected columns image, exposure_h, got {list(table.columns)}",
                                     param_hint="--manifest")
        hours = numeric_columns(table, ["exposure_h"], "manifest", path)["exposure_h"]
    except CouponError as exc:
        raise click.BadParameter(str(exc), param_hint="--manifest") from None
    by_path: dict[str, tuple[float, str]] = {}
    bare: dict[str, float] = {}
    elsewhere: dict[str, set[float]] = {}  # folder entries that are no file here: their times by file name
    here: set[str] = set()  # file names of folder entries that are files here (never matched by name)
    for line, (i, h) in enumerate(zip(table["image"], hours), start=2):
        text = str(i).strip().replace("\\", "/")
        name = Path(text).name
        if h < 0:
            raise click.BadParameter(f"{path} line {line}: exposure_h of {name} is {h:g}; exposure times are 0 or "
                                     "more hours", param_hint="--manifest")
        h = float(h)
        if "/" not in text:
            if name in bare and bare[name] != h:
                raise click.BadParameter(f"{path} line {line}: {name} is listed again with another exposure_h "
                                         f"({bare[name]:g} and {h:g} h); list each image once", param_hint="--manifest")
            bare[name] = h
            continue
        key = ResumeLedger.key(text if Path(text).is_absolute() else path.parent / text)
        # by its file name too only when the path is not a file here (a manifest from another computer):
        # an image of that name in another folder is another photo
        if Path(key).exists():
            here.add(name)
        else:
            elsewhere.setdefault(name, set()).add(h)
        if key in by_path and by_path[key][0] != h:
            raise click.BadParameter(f"{path} line {line}: {text} is listed again (as {by_path[key][1]}) with another "
                                     f"exposure_h ({by_path[key][0]:g} and {h:g} h); list each image once",
                                     param_hint="--manifest")
        by_path[key] = (h, text)
    by_name = {n: next(iter(hs)) for n, hs in elsewhere.items() if len(hs) == 1 and n not in here} | bare
    return Manifest({k: v[0] for k, v in by_path.items()}, by_name)


def parse_mask(text: str) -> tuple:
    """``x,y,w,h`` (rectangle) or ``x,y,d`` (circle) in mm on the rectified panel."""
    vals = parse_numbers(text, None, "x,y,w,h for a rectangle or x,y,d for a hole, in mm", "--mask")
    if len(vals) == 4:
        return ("rect", *vals)
    if len(vals) == 3:
        return ("circle", *vals)
    raise click.BadParameter(f"{text!r}: give 4 numbers (x,y,w,h) for a rectangle or 3 (x,y,d) for a hole",
                             param_hint="--mask")


class PanelIdentityWarning(UserWarning):
    """A panel's identity or exposure time is doubtful (the panels command)."""


def identity_warnings(image, rows: list[dict], layout: dict | None) -> list[str]:
    """QR codes that disagree with the layout, and layout positions where no panel was found."""
    out = [f"{image} {r['position']}: {r['id_note']}" for r in rows if r.get("id_note")]
    placed = [r for r in rows if pd.notna(r.get("row"))]  # a photo that failed as a whole has none
    if layout and placed:
        found = {(int(r["row"]), int(r["col"])) for r in placed}
        missing = [f"R{p[0]}C{p[1]} ({layout[p]['panel_id']})" for p in sorted(layout) if p not in found]
        if missing:
            out.append(f"{image}: no panel found where the layout names {', '.join(missing)}")
    return out


class RatingLimitWarning(UserWarning):
    """Photos or panels beyond the limits within which rust was measured correctly (the panels command)."""


def limit_warnings(rows: list[dict]) -> list[str]:
    """One-line warnings about the panel rows of one run: panels below
    :data:`~coupon.segment.panels.rust.PINPOINT_MIN_PHOTO_PX_PER_MM` in the photo, JPEGs with subsampled
    chroma (see that constant's notes for the measurements), and panels on coatings darker than the rust
    colours (:data:`~coupon.segment.panels.rust.COLOUR_MODEL_REL_UNC_DARK`)."""
    out = []
    low: dict[str, float] = {}
    chroma: dict[str, str] = {}
    dark: list[str] = []
    for r in rows:
        if r.get("coating_darker_than_rust"):
            dark.append(f"{Path(r['image']).name} {r['position']}")
        res = r.get("photo_px_per_mm")
        if isinstance(res, float) and np.isfinite(res) and res < PINPOINT_MIN_PHOTO_PX_PER_MM:
            low[r["image"]] = min(res, low.get(r["image"], np.inf))
        c = r.get("chroma_subsampling")
        if isinstance(c, str) and c and c != "4:4:4":
            chroma[r["image"]] = c
    if low:
        worst = min(low, key=low.get)
        out.append(f"{len(low)} photo(s) show panels at under {PINPOINT_MIN_PHOTO_PX_PER_MM:g} px/mm (lowest "
                   f"{low[worst]:.1f} px/mm, {Path(worst).name}): pinpoint rust on grey and dark coatings reads low "
                   "there (about half at 3 px/mm on synthetic trays); photograph at 8 px/mm or more where pinpoint "
                   "rust matters")
    if chroma:
        kinds = "/".join(sorted(set(chroma.values())))
        out.append(f"{len(chroma)} photo(s) are JPEGs with {kinds} chroma subsampling (colour stored for blocks of "
                   "pixels): pinpoint rust on grey, coloured and dark coatings reads high (1.25, 1.17 and 1.45 times "
                   "at 7.5 px/mm on synthetic trays, 1.1, 1.06 and 1.0 as 4:4:4 JPEG); where pinpoint rust matters, save 4:4:4 JPEG, "
                   "TIFF or PNG")
    if dark:
        named = ", ".join(dark[:3]) + (", ..." if len(dark) > 3 else "")
        out.append(f"{len(dark)} panel(s) on dark coatings, darker than the rust colours ({named}): their rust area "
                   "depends on how bright the rust is (0.83 to 1.22 times the truth on synthetic trays) and their "
                   "rust_area_pct_unc carries a 20 % colour-model term; compare them with panels of the same coating")
    return out


def output_names(paths: list[Path], previous: list[str], shas: dict[str, str]) -> dict[str, str]:
    """The stem of each image's output files (``<stem>_<panel_id>.png`` and ``.json``).

    An image's own file stem, or ``<stem>_<first 8 hex digits of its SHA-256>`` when another image of
    this run, or one rated into the folder before (``previous``, the images of panels.csv as resolved
    paths or as given), has the
    same stem: ``dayA/tray_0168h.jpg`` and ``dayB/tray_0168h.jpg`` must not write each other's files.
    """
    seen: dict[str, set[str]] = {}
    for img in [str(p) for p in paths] + [str(x) for x in previous]:
        seen.setdefault(Path(img).stem, set()).add(ResumeLedger.key(img))
    out = {}
    for p in paths:
        sha = shas.get(str(p), "")
        out[str(p)] = f"{p.stem}_{sha[:8]}" if len(seen[p.stem]) > 1 and sha else p.stem
    return out


def _qr_identity(text: str, position: tuple[int, int], layout: dict | None) -> dict:
    """The identity a panel's QR code gives it, with a system and replicate from the layout.

    The code is the panel's own: it wins over the layout.  When the layout lists the code's ID, the
    system and replicate are that entry's (wherever the layout puts it: a panel in another slot than
    planned keeps its own system); otherwise they are the layout's for this position (a layout of
    systems by slot, codes carrying serial numbers).  ``id_note`` says when code and layout disagree.
    """
    out = {"panel_id": text, "id_source": "qr", "system": "", "replicate": "", "id_note": ""}
    if not layout:
        return out
    entry = next((e for e in layout.values() if e["panel_id"] == text), None)
    planned = layout.get(position)
    where = f"R{position[0]}C{position[1]}"
    if entry is not None:
        out.update(system=entry["system"], replicate=entry["replicate"])
        if planned is not None and planned["panel_id"] != text:
            out["id_note"] = (f"QR code {text} stands at {where}, where the layout names {planned['panel_id']}; "
                              f"system and replicate are the layout's for {text}")
    elif planned is not None:
        out.update(system=planned["system"], replicate=planned["replicate"])
        out["id_note"] = (f"QR code {text} is not in the layout, which names {planned['panel_id']} at {where}; "
                          f"system and replicate are the layout's for {where}")
    return out


def panel_identities(positions: list[tuple[int, int]], qr_texts: dict[int, str], layout: dict | None) -> list[dict]:
    """The identity of every panel of one photo (``positions[i]``: its row and column; ``qr_texts``:
    panel index -> text of its QR code), with ``stem``, the name part of its output files.

    By position, then the layout, then the panel's own QR code (:func:`_qr_identity`).  No ID is given
    twice in a photo: a layout ID whose QR code is read on a panel in another slot is that panel's,
    and the slot keeps its position ID; a code read on two panels (a copied label) gives each the code
    plus its position.  ``id_note`` says so.  Stems are unique too, also where IDs differ only in case or
    in characters a file name cannot hold (``A/1`` and ``A_1``): the position is added.
    """
    by_text: dict[str, list[int]] = {}
    for i, text in qr_texts.items():
        by_text.setdefault(text, []).append(i)
    out = []
    for i, (r, c) in enumerate(positions):
        where = f"R{r}C{c}"
        ident = {"panel_id": where, "id_source": "position", "system": "", "replicate": "", "id_note": ""}
        if layout and (r, c) in layout:
            ident.update(layout[(r, c)], id_source="layout")
            owners = [j for j in by_text.get(ident["panel_id"], []) if j != i]
            if owners and qr_texts.get(i) is None:
                there = ", ".join("R{}C{}".format(*positions[j]) for j in owners)
                ident.update(panel_id=where, id_source="position",
                             id_note=f"the layout names {layout[(r, c)]['panel_id']} here, but its QR code is read at "
                                     f"{there}; this panel keeps its position ID")
        text = qr_texts.get(i)
        if text is not None:
            ident.update(_qr_identity(text, (r, c), layout))
            if len(by_text[text]) > 1:
                others = ", ".join("R{}C{}".format(*positions[j]) for j in by_text[text] if j != i)
                note = f"QR code {text} is read on {len(by_text[text])} panels (also {others}); the ID adds the position"
                ident.update(panel_id=f"{text}@{where}",
                             id_note=f"{ident['id_note']}; {note}" if ident["id_note"] else note)
        out.append(ident)
    stems = [_safe(x["panel_id"]).lower() for x in out]
    for x, stem, (r, c) in zip(out, stems, positions):
        x["stem"] = _safe(x["panel_id"]) + (f"_R{r}C{c}" if stems.count(stem) > 1 else "")
    return out


def _safe(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9._-]+", "_", text).strip("_") or "panel"


def _empty_row(image: str, status: str) -> dict:
    return {c: np.nan for c in PANEL_COLUMNS} | {"image": image, "status": status, "scribe_found": False}


#: At most this many panels of one photo are rated at once: each holds about 100 MB of maps at
#: 10 px/mm (VmHWM of the 12 MP benchmark 391 MB with two threads, 400 MB one panel at a time before).
PANEL_THREADS_MAX = 4


def panel_threads() -> int:
    """Threads that rate the panels of one photo side by side: as many as OpenCV may use (its core
    count), at most :data:`PANEL_THREADS_MAX`.

    Batch workers set OpenCV to one thread each (``coupon.io.batch``), so they rate their panels one
    after the other and ``--workers N`` keeps N cores busy, not 2 N.  In one process the panels share
    the cores: most of a panel's work (OpenCV, numpy on strips, PNG encoding) releases the GIL; on the
    2-core benchmark machine two threads take 0.8 of the time of one (the rest holds the GIL: small
    numpy calls, the JSON encoder).
    """
    import cv2

    return max(1, min(PANEL_THREADS_MAX, cv2.getNumThreads()))


def rate_image(path: Path, settings: PanelSettings, profile: Profile | None, out_dir: Path,
               layout: dict | None = None, exposure_h: float | None = None,
               max_pixels: int = DEFAULT_MAX_PIXELS, img: LoadedImage | None = None,
               name: str | None = None) -> list[dict]:
    """Rate every panel in one tray photo; write its overlays and JSON files; return the CSV rows.

    The files are ``<name>_<panel_id>`` in ``out_dir`` (``name``: the photo's file stem unless given,
    see :func:`output_names`).

    The panels are rated on :func:`panel_threads` threads; the rows come back in tray order.
    ``img``: the photo already loaded (by a :class:`~coupon.io.batch.Prefetch`), or None to load it here.

    Raises
    ------
    ImageLoadError, AnalysisError
        The image cannot be read, or no panel is found in it.
    """
    if img is None:
        img = load_image(path, max_pixels=max_pixels)
    warm_opencv()  # the Lab tables find_panels needs: built by now on the command's helper thread, or here
    # an 8-bit photo is worked from its decoded pixels: no float copy of the whole tray (144 MB at 12 MP)
    pixels = img.rgb_u8 if img.rgb_u8 is not None else img.rgb
    quads = find_panels(pixels)
    if not quads:
        raise AnalysisError("no panel found: nothing stands out from the tray; check that the panels are in "
                            "the frame and differ in colour from the tray", path)
    qr = read_qr_codes(pixels, quads) if settings.qr else {}
    px_scale = profile.scale.px_per_mm if (profile is not None and profile.scale is not None) else None
    inside = [q for q in quads if q.touches is None]
    median_area = float(np.median([q.area_px2 for q in inside])) if len(inside) >= 3 else None

    idents = panel_identities([q.position for q in quads], {i: t for i, (t, _) in qr.items()}, layout)

    def one(i: int) -> dict:
        return _rate_quad(path, img.sha256, pixels, quads[i], qr.get(i), settings, profile, out_dir, idents[i],
                          exposure_h, px_scale, median_area, img.chroma_subsampling or "", name or path.stem)

    threads = min(panel_threads(), len(quads))
    if threads <= 1:
        return [one(i) for i in range(len(quads))]
    with thread_pool(threads, "coupon-panels") as pool:
        return list(pool.map(one, range(len(quads))))


def _rate_quad(path: Path, sha256: str, pixels: np.ndarray, q, qr_hit, settings: PanelSettings,
               profile: Profile | None, out_dir: Path, ident: dict, exposure_h: float | None,
               px_scale: float | None, median_area: float | None, chroma: str = "", name: str = "") -> dict:
    """The CSV row of one found panel (rectify, rate, overlay, JSON); ``qr_hit`` is (text, corners) or None,
    ``ident`` its entry of :func:`panel_identities`."""
    r, c = q.position
    ident = dict(ident)
    file_part = ident.pop("stem")
    centre = q.centre_xy
    row = _empty_row(str(path), "ok") | ident | {
        "position": f"R{r}C{c}", "row": r, "col": c,
        "exposure_h": np.nan if exposure_h is None else float(exposure_h),
        "x_px": float(centre[0]), "y_px": float(centre[1]), "chroma_subsampling": chroma,
        # the panel's own resolution in the photo (areal mean over its quadrilateral)
        "photo_px_per_mm": (float(np.sqrt(q.area_px2 / (settings.size_mm[0] * settings.size_mm[1])))
                            if q.touches is None else np.nan),
    }
    if q.touches is not None:
        row["status"] = (f"panel partly outside the frame (touches the {q.touches} edge); "
                         "reframe so that every panel is wholly in the photo (the other panels' positions "
                         "count this one: if it is background beyond the tray, they are shifted)")
        return row
    problem = check_panel_size(q, settings.size_mm, px_scale, median_area, settings.size_tolerance)
    if problem:
        row["status"] = problem
        return row
    panel = rectify_panel(pixels, q.corners_xy, settings.size_mm, settings.px_per_mm)
    boxes = []
    if qr_hit is not None:
        # the QR label is not coating: leave its box (plus 2 mm) out of the rating
        import cv2

        mm = cv2.perspectiveTransform(qr_hit[1].reshape(-1, 1, 2), panel.scale.homography).reshape(-1, 2)
        lo, hi = mm.min(axis=0) - 2, mm.max(axis=0) + 2
        if np.all(hi > 0) and np.all(lo < panel.size_mm):
            boxes.append((lo[0], lo[1], hi[0], hi[1]))
    res = rate_panel(panel, settings, profile.colour if profile is not None else None, boxes)
    stem = f"{name or path.stem}_{file_part}"
    overlay = out_dir / "overlays" / f"{stem}.png"
    name_pos = row["panel_id"] if row["panel_id"] == row["position"] else f"{row['panel_id']} {row['position']}"
    title = (f"{name_pos}  rust {res['rust_area_pct']:.2f} %  "
             f"D610 {res['rust_grade_written']}  {res['ri_degree']}")
    if res["scribe_found"]:
        title += f"  creep {res['creep_mean_mm']:.2f} mm"
    write_panel_overlay(overlay, panel.linear, panel.px_per_mm, res["_rated"], res["_rust"].site_mask,
                        res["_scribe"], title)
    status = "ok"
    if settings.scribe.mode in ("line", "x") and not res["scribe_found"]:
        status = f"scribe not found ({res['scribe_note']}); rust rated without a scribe zone"
    for k in PANEL_COLUMNS:
        if k in res:
            row[k] = res[k]
    row.update(overlay=str(overlay), status=status, coating_darker_than_rust=res["coating_darker_than_rust"])
    jpath = out_dir / "panels" / f"{stem}.json"
    row["json"] = str(jpath)
    scribe = res["_scribe"]
    write_json(jpath, {
        **{k: row[k] for k in PANEL_COLUMNS},
        "corners_xy": q.corners_xy.tolist(), "panel_size_mm": list(panel.size_mm),
        "coating_srgb": res["coating_srgb"], "coating_darker_than_rust": res["coating_darker_than_rust"],
        "rust_pixel_count_pct": res["rust_pixel_count_pct"], "glare_corrected_mm2": res["glare_corrected_mm2"],
        "rust_area_pct_unc_glare": res["rust_area_pct_unc_glare"],
        "scribe_lines_mm": scribe.lines, "creep_stations": scribe.stations, "scribe_note": scribe.note,
        # how far the corridor left out of the rating reaches on either side of each line (mm; against and
        # along the normal (-u_y, u_x) of the line's direction u)
        "scribe_corridor_mm": [[round(float(a), 3), round(float(b), 3)] for a, b in scribe.corridor_sides_mm],
        "id_note": row.get("id_note", ""),
        "rust_site_area_mm2": res["_rust"].site_area_mm2.tolist(),
        "settings": settings.to_dict(), "image_sha256": sha256,
        "profile": None if profile is None else str(profile.path),
        "profile_sha256": None if profile is None else profile.sha256,
        "coupon_version": __version__,
        "scales": {"rust_grade": "ASTM D610-08 Table 1", "ri_degree": "ISO 4628-3 (coupon cut-offs)",
                   "creep_rating": "ASTM D1654 (body of table from memory)"},
    })
    return row


@dataclass(frozen=True)
class PanelsJob:
    """Picklable per-image job for the process pool."""

    settings: PanelSettings
    profile: Profile | None
    out_dir: Path
    layout: dict | None
    hours: float | None
    manifest: Manifest | None
    max_pixels: int
    names: dict[str, str] | None = None  # image -> stem of its output files (output_names)

    def exposure_for(self, path: Path) -> float | None:
        hit = self.manifest.hours_for(path) if self.manifest is not None else None
        if hit is not None:
            return hit
        if self.hours is not None:
            return self.hours
        return hours_from_name(path)

    def __call__(self, path: Path, img: LoadedImage | None = None) -> list[dict]:
        return rate_image(path, self.settings, self.profile, self.out_dir, self.layout, self.exposure_for(path),
                          self.max_pixels, img, (self.names or {}).get(str(path)))

    def load(self, path: Path) -> LoadedImage:
        return load_image(path, max_pixels=self.max_pixels)


EXAMPLE = """
\b
Example:
  coupon panels trays/*.jpg --out ratings --panel-size 75x150 --edge-mm 5 \\
      --layout rack.csv --profile bench.json --workers 2
"""


@click.command("panels", epilog=EXAMPLE)
@click.argument("images", nargs=-1, required=True, type=click.Path(path_type=Path))
@click.option("--out", "out_dir", required=True, type=click.Path(file_okay=False, path_type=Path),
              help="Output folder: panels.csv, panels/*.json, overlays/*.png.")
@click.option("--panel-size", default="75x150", show_default=True,
              help="Nominal panel size WxH in mm (portrait or landscape in the photo).")
@click.option("--edge-mm", default=5.0, show_default=True, type=click.FloatRange(min=0),
              help="Band along the panel edges left out of the rust rating.")
@click.option("--mask", "masks", multiple=True,
              help="Area left out of the rating, in mm on the rectified panel from its top-left corner: "
                   "x,y,w,h (rectangle, e.g. a label) or x,y,d (hole). Repeat for several.")
@click.option("--layout", "layout_path", type=click.Path(dir_okay=False, path_type=Path),
              help="CSV with row, col, panel_id, system, replicate: IDs by tray position.")
@click.option("--qr/--no-qr", default=True, show_default=True, help="Read QR codes on panels or holders as IDs.")
@click.option("--hours", type=click.FloatRange(min=0), help="Exposure time of every image, h.")
@click.option("--manifest", "manifest_path", type=click.Path(dir_okay=False, path_type=Path),
              help="CSV with image, exposure_h (overrides --hours and the file name).")
@click.option("--profile", "profile_path", type=click.Path(dir_okay=False, path_type=Path),
              help="Calibration profile: colour correction, and the scale used to check panel sizes.")
@click.option("--scribe", "scribe_mode", type=click.Choice(SCRIBE_MODES), default="auto", show_default=True,
              help="Scribe to look for.")
@click.option("--scribe-width-mm", default=0.5, show_default=True, type=click.FloatRange(min=0, min_open=True),
              help="Nominal scribe width w.")
@click.option("--scribe-end-mm", default=10.0, show_default=True, type=click.FloatRange(min=0),
              help="Length left out at each scribe end (and around an X crossing).")
@click.option("--min-speck-mm2", default=0.02, show_default=True, type=click.FloatRange(min=0),
              help="Smallest rust site counted.")
@click.option("--grid-px-per-mm", default=10.0, show_default=True, type=click.FloatRange(min=1, max=40),
              help="Resolution of the rectified panel.")
@workers_option
@force_option("images")
@db_option
@max_megapixels_option
def panels(images, out_dir, panel_size, edge_mm, masks, layout_path, qr, hours, manifest_path, profile_path,
           scribe_mode, scribe_width_mm, scribe_end_mm, min_speck_mm2, grid_px_per_mm, workers, force,
           db_path, max_megapixels):
    """Rate coated test panels in tray photos: rust area and grade (ASTM D610, ISO 4628-3), creepage
    from a scribe (ASTM D1654), one overlay and one JSON per panel, DIR/panels.csv.

    Ratings support, and do not replace, a qualified inspector working to the governing
    standard or specification.
    """
    size = parse_size(panel_size, "--panel-size")
    if 2 * edge_mm >= min(size):
        raise click.BadParameter(f"{edge_mm:g} mm along every edge leaves nothing of a {size[0]:g}x{size[1]:g} mm "
                                 f"panel to rate; give less than {min(size) / 2:g} mm", param_hint="--edge-mm")
    if workers <= 1:
        warm_in_background()  # OpenCV's tables, built while the images are hashed and the first one decoded
    mask_specs = tuple(parse_mask(m) for m in masks)
    layout = read_layout(layout_path) if layout_path else None
    manifest = read_manifest(manifest_path) if manifest_path else None
    profile = None
    if profile_path:
        try:
            profile = load_profile(profile_path)
        except CouponError as exc:
            raise fail(exc) from None
    settings = PanelSettings(
        size_mm=size, edge_mm=edge_mm, px_per_mm=grid_px_per_mm, masks_mm=mask_specs,
        rust=RustSettings(min_speck_mm2=min_speck_mm2),
        scribe=ScribeSettings(mode=scribe_mode, width_mm=scribe_width_mm, end_mm=scribe_end_mm), qr=qr,
    )
    out_dir.mkdir(parents=True, exist_ok=True)
    paths = expand_image_paths(list(images))
    if not paths:
        raise click.BadParameter(f"no image files in {', '.join(map(str, images))} (looked for "
                                 f"{', '.join(sorted(IMAGE_SUFFIXES))})", param_hint="IMAGES")
    base = {"settings": settings.to_dict(), "profile": profile.sha256 if profile else None,
            "layout": layout and {f"{k}": v for k, v in layout.items()}, "command": "panels", "version": 2}
    ledger = ResumeLedger(out_dir, "panels")
    table_path = out_dir / "panels.csv"
    old = read_previous(table_path, PANEL_COLUMNS, dtype={"panel_id": str})
    by_image: dict[str, list[dict]] = {}
    for rec in old.to_dict("records"):  # keyed by the input's resolved path (ResumeLedger.row_key): a rerun
        by_image.setdefault(ledger.row_key(rec["image"]), []).append(rec)  # may type it another way or run elsewhere
    from coupon.campaign.store import is_recorded, resolve_db_path

    db = resolve_db_path(out_dir, db_path)
    db_settings = {"settings": settings.to_dict(), "layout": str(layout_path) if layout_path else None}
    profile_sha = profile.sha256 if profile else None
    shas = {str(p): try_sha256(p) for p in paths}
    names = output_names(paths, list(by_image), shas)
    job = PanelsJob(settings, profile, out_dir, layout, hours, manifest, int(max_megapixels * 1e6), names)
    # per image: its own exposure time, so a manifest that grows by a day's photos redoes none of the others
    digests = {str(p): settings_hash({**base, "exposure_h": job.exposure_for(p)}) for p in paths}
    failed = 0
    todo = []
    for p in paths:
        sha = shas[str(p)]
        if not force and sha and ledger.is_done(p, sha, digests[str(p)]) and ResumeLedger.key(p) in by_image:
            click.echo(f"{p}: already rated (use --force to redo)")
            if not is_recorded(db, "panels", p, sha):  # a database added after the first run gets every image
                failed += not record_rows(db, "panels", p, sha, db_settings, profile_sha,
                                          {"panels": by_image[ResumeLedger.key(p)]},
                                          exposure_h=job.exposure_for(p))
            continue
        todo.append(p)
    # in-process, the next photo decodes on a helper thread while this one is rated
    ahead = Prefetch(todo if workers <= 1 else [], job.load)
    func = (lambda p: job(p, ahead(p))) if workers <= 1 else job
    rated_now: list[dict] = []
    with ahead:
        for out in run_batch(todo, func, workers=workers, label="Rating panels"):
            if out.ok:
                rows = out.result
                rated_now += rows
                bad = [r for r in rows if r["status"] != "ok"]
                failed += bool(bad)
                for r in bad:
                    report_failure(f"{out.item} {r['position']}: {r['status']}")
                for text in identity_warnings(out.item, rows, layout):
                    warnings.warn(text, PanelIdentityWarning, stacklevel=1)
                sha = shas[str(out.item)] or file_sha256(out.item)  # hashed once, in the pre-scan
                outputs = [r[k] for r in rows for k in ("overlay", "json") if isinstance(r.get(k), str)]
                ledger.replace_outputs(out.item, outputs, out_dir)  # files of panel IDs this run no longer gives
                ledger.record(out.item, sha, digests[str(out.item)], outputs, "ok" if not bad else "partial")
                failed += not record_rows(db, "panels", out.item, sha, db_settings, profile_sha, {"panels": rows},
                                          exposure_h=job.exposure_for(out.item))
                for r in rows:
                    if r["status"] == "ok":
                        extra = f", creep {r['creep_mean_mm']:.2f} mm" if r["scribe_found"] else ""
                        click.echo(f"{out.item} {r['position']} {r['panel_id']}: rust {r['rust_area_pct']:.2f} % "
                                   f"(+/- {r['rust_area_pct_unc']:.2f}), D610 {r['rust_grade_written']}, "
                                   f"{r['ri_degree']}{extra}")
            else:
                failed += 1
                report_failure(out.error, out.trace)
                # the row names the image already: its status is the message alone
                status = out.error.removeprefix(f"{out.item}: ")
                rows = [_empty_row(str(out.item), status)]
                hours_here = job.exposure_for(out.item)
                rows[0]["exposure_h"] = np.nan if hours_here is None else float(hours_here)
            by_image[ResumeLedger.key(out.item)] = rows
    ledger.flush()
    no_hours = [p for p in todo if job.exposure_for(p) is None]
    if no_hours:
        warnings.warn(f"{len(no_hours)} image(s) have no exposure time (first: {no_hours[0]}); give --hours, a "
                      "--manifest, or the hours in the file name (e.g. rack2_0240h.jpg)", PanelIdentityWarning,
                      stacklevel=1)
    for text in limit_warnings(rated_now):
        warnings.warn(text, RatingLimitWarning, stacklevel=1)
    all_rows = [r for rows in by_image.values() for r in rows]
    write_csv(table_path, pd.DataFrame(all_rows, columns=PANEL_COLUMNS))
    click.echo(f"table: {table_path}\ndatabase: {db}")
    if failed:
        raise SystemExit(EXIT_FAILED)
