"""The campaign report as one self-contained HTML file.

Everything is inside the file: figures and overlay pictures are embedded as base64
``data:`` URIs, the style sheet is inline, and there is no script and no external
link, so the file opens offline in any browser and can be mailed as is.  Every
piece of text that comes from users or files (IDs, system names, notes, paths,
statuses) goes through :func:`html.escape`.
"""

from __future__ import annotations

import base64
import datetime as _dt
import html
import io
import math
from pathlib import Path

import numpy as np
import pandas as pd

from coupon import __version__
from coupon.campaign.timeline import RATING_METRICS, CampaignAnalysis
from coupon.report import campaign_figures as cf
from coupon.report.campaign_content import (CAUTIONS, describe_profile, droplet_keys, gallery, plot_plan,
                                            profiles_used, resolve_path)

_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",Roboto,sans-serif;margin:2em auto;max-width:1100px;
color:#222;line-height:1.4;padding:0 1em}
h1{font-size:1.6em}h2{border-bottom:2px solid #0072B2;padding-bottom:.2em;margin-top:2em}
table{border-collapse:collapse;margin:.6em 0;font-size:.88em}
th,td{border:1px solid #bbb;padding:.25em .5em;text-align:left;vertical-align:top}
th{background:#eef3f8}td.num{text-align:right;font-variant-numeric:tabular-nums}
.caution{border-left:5px solid #D55E00;background:#fdf3ec;padding:.6em 1em;margin:1em 0}
figure{margin:1em 0}figcaption{font-size:.85em;color:#444}
.gallery{display:flex;flex-wrap:wrap;gap:.6em}.gallery figure{margin:0;width:200px}
.gallery img{max-width:200px;max-height:260px;border:1px solid #ccc}
.missing{width:200px;height:120px;border:1px dashed #999;display:flex;align-items:center;
justify-content:center;font-size:.8em;color:#666}
.small{font-size:.8em;color:#555}code{font-size:.85em}
"""


def esc(value) -> str:
    """Escaped text of a cell value; empty for missing values."""
    if value is None:
        return ""
    if isinstance(value, float):
        if math.isnan(value):
            return ""
        if math.isinf(value):
            return "&infin;" if value > 0 else "-&infin;"
        return html.escape(f"{value:.4g}")
    if isinstance(value, (np.floating,)):
        return esc(float(value))
    try:
        if pd.isna(value) is True:
            return ""
    except (TypeError, ValueError):
        pass
    return html.escape(str(value))


def table_html(df: pd.DataFrame, columns: list[str] | None = None, headers: dict[str, str] | None = None,
               caption: str | None = None) -> str:
    columns = [c for c in (columns or list(df.columns)) if c in df.columns]
    headers = headers or {}
    parts = ["<table>"]
    if caption:
        parts.append(f"<caption>{esc(caption)}</caption>")
    parts.append("<tr>" + "".join(f"<th>{esc(headers.get(c, c))}</th>" for c in columns) + "</tr>")
    for row in df[columns].itertuples(index=False):
        cells = []
        for v in row:
            num = isinstance(v, (int, float, np.number)) and not isinstance(v, bool)
            cells.append(f"<td class=\"num\">{esc(v)}</td>" if num else f"<td>{esc(v)}</td>")
        parts.append("<tr>" + "".join(cells) + "</tr>")
    if df.empty:
        parts.append(f"<tr><td colspan=\"{max(len(columns), 1)}\">(none)</td></tr>")
    parts.append("</table>")
    return "\n".join(parts)


def data_uri(data: bytes, mime: str) -> str:
    return f"data:{mime};base64,{base64.b64encode(data).decode('ascii')}"


def picture_uri(path: Path | None, max_side_px: int = 360) -> str | None:
    """A JPEG data URI of a downsized picture file, or None if it cannot be read."""
    arr = cf.load_picture(path, max_side_px)
    if arr is None:
        return None
    from PIL import Image

    buf = io.BytesIO()
    Image.fromarray(arr).save(buf, format="JPEG", quality=85)
    return data_uri(buf.getvalue(), "image/jpeg")


def _figure_block(fig_id: str, png: bytes, caption: str) -> str:
    return (f"<figure id=\"{esc(fig_id)}\"><img src=\"{data_uri(png, 'image/png')}\" alt=\"{esc(caption)}\">"
            f"<figcaption>{esc(caption)}</figcaption></figure>")


def _picture_block(path: Path | None, caption: str, stored: str = "") -> str:
    uri = picture_uri(path)
    if uri is None:
        return (f"<figure><div class=\"missing\">picture not found<br>{esc(Path(stored).name if stored else '')}"
                f"</div><figcaption>{esc(caption)}</figcaption></figure>")
    return f"<figure><img src=\"{uri}\" alt=\"{esc(caption)}\"><figcaption>{esc(caption)}</figcaption></figure>"


def system_table(a: CampaignAnalysis, system: str) -> str:
    """Rows: exposure times; columns: each rating as mean (min to max), n."""
    d = a.by_system[a.by_system["system"] == system]
    if d.empty:
        return "<p>(no panel ratings)</p>"
    hours = sorted(d["exposure_h"].unique())
    metrics = [m for m in RATING_METRICS if m in set(d["metric"])]
    head = "<tr><th>exposure (h)</th>" + "".join(f"<th>{esc(RATING_METRICS[m])}</th>" for m in metrics) + \
        "<th>replicates</th></tr>"
    rows = []
    for h in hours:
        cells, n = [], 0
        for m in metrics:
            r = d[(d["exposure_h"] == h) & (d["metric"] == m)]
            if r.empty:
                cells.append("<td></td>")
                continue
            r = r.iloc[0]
            n = max(n, int(r["n"]))
            cells.append(f"<td class=\"num\">{r['mean']:.3g} ({r['min']:.3g} to {r['max']:.3g})</td>")
        rows.append(f"<tr><td class=\"num\">{h:g}</td>{''.join(cells)}<td class=\"num\">{n}</td></tr>")
    return "<table>" + head + "".join(rows) + "</table>"


def build_html(a: CampaignAnalysis, *, title: str | None = None, db_path: Path | None = None,
               profile_path: Path | None = None, bases: list[Path] | None = None,
               generated_at: str | None = None) -> str:
    """The whole report as one HTML string (see the module docstring)."""
    bases = bases or []
    meta = a.meta
    name = title or meta.get("campaign_name") or "corrosion test campaign"
    generated_at = generated_at or _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
    plots = plot_plan(a)
    pngs = {p.fig_id: cf.figure_png(p.make()) for p in plots}
    by_section: dict[str, list[str]] = {}
    for p in plots:
        by_section.setdefault(p.section, []).append(_figure_block(p.fig_id, pngs[p.fig_id], p.caption))

    hours = sorted(a.series["exposure_h"].dropna().unique()) if len(a.series) else []
    out = ["<!DOCTYPE html>", "<html lang=\"en\"><head><meta charset=\"utf-8\">",
           f"<title>{esc(name)}</title><style>{_CSS}</style></head><body>",
           f"<h1>{esc(name)}</h1>"]
    cautions = "".join(f"<p>{esc(c)}</p>" for c in CAUTIONS)
    out.append(f"<div class=\"caution\" id=\"cautions\"><strong>Cautions</strong>{cautions}</div>")

    out.append("<h2 id=\"summary\">Campaign summary</h2>")
    summary = [("campaign", name), ("laboratory", meta.get("lab", "")), ("notes", meta.get("notes", "")),
               ("database", str(db_path) if db_path else ""),
               ("systems", len(a.systems)), ("specimens", len(a.specimens)),
               ("inspections (images analysed)", len(a.inspections)),
               ("panel exposure times (h)", ", ".join(f"{h:g}" for h in hours)),
               ("report generated", generated_at), ("tool", f"coupon {__version__}")]
    out.append("<table>" + "".join(f"<tr><th>{esc(k)}</th><td>{esc(v)}</td></tr>" for k, v in summary) + "</table>")

    out.append("<h2 id=\"specimens\">Specimens</h2>")
    out.append(table_html(a.specimens, ["specimen_id", "system", "system_name", "replicate", "kind", "row", "col",
                                        "notes"]))
    if a.missing:
        out.append("<p><strong>Missing inspections:</strong></p><ul>"
                   + "".join(f"<li>{esc(m)}</li>" for m in a.missing) + "</ul>")
    if a.unassigned:
        out.append("<p><strong>Panel IDs rated but not in the layout:</strong> "
                   + esc(", ".join(a.unassigned)) + "</p>")

    out.append("<h2 id=\"criteria\">Failure criteria</h2>")
    out.append(f"<p>{esc(a.criteria.name)} <span class=\"small\">(from {esc(a.criteria.source)})</span>. "
               "A specimen fails at the first inspection where any criterion fails; the time is interpolated "
               "linearly between the last passing and the first failing inspection.</p><ul>")
    for c in a.criteria.criteria:
        extra = "" if c.continuous_column == c.metric and c.continuous_threshold == c.threshold else \
            f" (interpolated on {c.continuous_column} with threshold {c.continuous_threshold:.4g})"
        out.append(f"<li>{esc(c.describe())}{esc(extra)}</li>")
    out.append("</ul>")

    out.append("<h2 id=\"ranking\">Systems ranked</h2>")
    out.append(table_html(a.ranking, headers={"median_ttf_h": "median time to failure (h)",
                                              "median_text": "median time to failure",
                                              "n_failed": "replicates failed", "n_specimens": "replicates",
                                              "final_rust_area_pct_mean": "final rust area, mean (%)",
                                              "growth_pp_per_100h": "rust growth (pp per 100 h)"}))

    out.append("<h2 id=\"systems\">Ratings per system</h2>")
    for sysname in sorted(a.series["system"].unique()) if len(a.series) else []:
        out.append(f"<h3>{esc(sysname)}</h3>")
        out.append(system_table(a, sysname))

    out.append("<h2 id=\"ratings\">Ratings against exposure time</h2>")
    out.extend(by_section.get("ratings", ["<p>(no panel ratings)</p>"]))

    out.append("<h2 id=\"ttf\">Time to failure</h2>")
    out.extend(by_section.get("ttf", []))
    out.append(table_html(a.ttf, ["specimen_id", "system", "replicate", "ttf_low_h", "ttf_high_h", "ttf_h", "method",
                                  "criterion", "status"],
                          headers={"ttf_low_h": "last passing (h)", "ttf_high_h": "first failing (h)",
                                   "ttf_h": "estimate (h)"}))
    out.append("<h3>Rust growth rate</h3>")
    out.append(table_html(a.growth, headers={"growth_pp_per_100h": "growth (pp per 100 h)",
                                             "intercept_pct": "fit at 0 h (%)"}))

    out.append("<h2 id=\"gallery\">Overlays per specimen across inspections</h2>")
    for sid, items in gallery(a, bases):
        out.append(f"<h3>{esc(sid)}</h3><div class=\"gallery\">")
        for path, caption, stored in items:
            out.append(_picture_block(path, caption, stored))
        out.append("</div>")

    out.append("<h2 id=\"droplet\">Droplet tests</h2>")
    keys = droplet_keys(a)
    if not keys:
        out.append("<p>(no droplet series)</p>")
    out.extend(by_section.get("droplet", []))
    if len(a.droplet_summary):
        out.append("<h3>Droplet events</h3>")
        cols = [c for c in a.droplet_summary.columns if c not in ("inspection_id", "command", "image_sha256",
                                                                   "profile_sha256", "tool_version")]
        out.append(table_html(a.droplet_summary, cols))

    out.append("<h2 id=\"pits\">Pits on coupons</h2>")
    out.append(table_html(a.coupons, headers={"density_per_m2": "pit density (pits/m2)",
                                              "corrosion_rate_mm_y": "corrosion rate (mm/y)",
                                              "corrosion_rate_mpy": "corrosion rate (mpy)",
                                              "max_depth_mm": "deepest pit (mm)"}))
    out.extend(by_section.get("pits", []))
    if len(a.coupons):
        out.append("<div class=\"gallery\">")
        for r in a.coupons.itertuples(index=False):
            st = "" if pd.isna(r.overlay) else str(r.overlay)
            out.append(_picture_block(resolve_path(r.overlay, bases), f"coupon {r.specimen_id}: pits", st))
        out.append("</div>")

    out.append("<h2 id=\"calibration\">Calibration used</h2>")
    out.append(table_html(profiles_used(a), headers={"profile_sha256": "profile SHA-256"}))
    info = describe_profile(profile_path)
    if info is None:
        out.append("<p>No profile file given or found (pass --profile); the SHA-256 values above identify "
                   "the profiles the commands used.</p>")
    else:
        used = set(a.inspections["profile_sha256"].dropna()) if len(a.inspections) else set()
        match = "matches" if info["sha256"] in used else "does NOT match any"
        out.append(f"<p>Profile <code>{esc(info['path'])}</code>, SHA-256 <code>{esc(info['sha256'])}</code> "
                   f"({esc(match)} inspection's profile hash), created {esc(info.get('created'))}.</p><ul>")
        for part, text in info.get("parts", {}).items():
            out.append(f"<li>{esc(part)}: {esc(text)}</li>")
        out.append("</ul>")
        if info.get("history"):
            out.append(table_html(pd.DataFrame(info["history"]), caption="calibration steps and residuals"))

    out.append("<h2 id=\"provenance\">Inspections (audit trail)</h2>")
    out.append(table_html(a.inspections, ["inspection_id", "command", "image", "image_sha256", "exposure_h",
                                          "profile_sha256", "tool_version", "analysed_at", "n_rows"]))
    out.append(f"<p class=\"small\">Written by coupon {esc(__version__)} on {esc(generated_at)}.</p>")
    out.append(f"<div class=\"caution\"><strong>Cautions</strong>{cautions}</div>")
    out.append("</body></html>")
    return "\n".join(out) + "\n"
