"""The campaign report as a PDF (matplotlib's PdfPages), page for page as :func:`pdf_page_plan` says.

Pages, in order: the summary with the cautions; the criteria, ranking and time-to-failure
text (one or more pages, 58 lines each); one page per plot of
:func:`coupon.report.campaign_content.plot_plan`; one gallery page per specimen with
panel ratings; one page of pit overlays when coupons were analysed; the calibration
page.  The text is plain (matplotlib text), the figures the same as in the HTML.
"""

from __future__ import annotations

import datetime as _dt
import math
import textwrap
from pathlib import Path

from coupon import __version__
from coupon.campaign.timeline import CampaignAnalysis
from coupon.io.atomic import atomic_path
from coupon.report import campaign_figures as cf
from coupon.report.campaign_content import (CAUTIONS, describe_profile, gallery, plot_plan, profiles_used,
                                            resolve_path)
from coupon.report.figures import plt

LINES_PER_PAGE = 58
_WRAP = 100


def _fmt(v) -> str:
    if v is None:
        return ""
    if isinstance(v, float):
        if math.isnan(v):
            return "-"
        if math.isinf(v):
            return "inf"
        return f"{v:.4g}"
    return str(v)


def _wrap(text: str, indent: str = "") -> list[str]:
    return textwrap.wrap(text, _WRAP, initial_indent=indent, subsequent_indent=indent + "  ") or [""]


def summary_lines(a: CampaignAnalysis, title: str, generated_at: str) -> list[str]:
    meta = a.meta
    hours = sorted(a.series["exposure_h"].dropna().unique()) if len(a.series) else []
    lines = [title, "", f"laboratory: {meta.get('lab', '')}", f"systems: {len(a.systems)}    specimens: "
             f"{len(a.specimens)}    inspections: {len(a.inspections)}",
             "panel exposure times (h): " + ", ".join(f"{h:g}" for h in hours),
             f"report generated {generated_at} by coupon {__version__}", "", "CAUTIONS"]
    for c in CAUTIONS:
        lines += _wrap(c, "- ")
    lines += ["", "SPECIMENS"]
    for r in a.specimens.itertuples(index=False):
        lines.append(f"  {r.specimen_id:<14} system {r.system:<12} replicate {_fmt(r.replicate):<4} {r.kind}")
    return lines


def results_lines(a: CampaignAnalysis) -> list[str]:
    lines = ["FAILURE CRITERIA: " + a.criteria.name + f" (from {a.criteria.source})"]
    lines += [f"  - {c.describe()}" for c in a.criteria.criteria]
    lines += ["", "SYSTEMS RANKED (median time to failure; replicates failed; final mean rust area; growth)"]
    for r in a.ranking.itertuples(index=False):
        lines.append(f"  {r.rank}. {r.system:<14} {r.median_text:<22} failed {r.n_failed}/{r.n_specimens}   "
                     f"rust {_fmt(r.final_rust_area_pct_mean)} % at {_fmt(r.final_h)} h   "
                     f"growth {_fmt(r.growth_pp_per_100h)} pp/100 h")
    lines += ["", "TIME TO FAILURE PER SPECIMEN"]
    for r in a.ttf.itertuples(index=False):
        lines += _wrap(f"{r.specimen_id} ({r.system}): {r.status}", "  ")
    if a.missing:
        lines += ["", "MISSING INSPECTIONS"] + [f"  {m}" for m in a.missing]
    if len(a.coupons):
        lines += ["", "COUPONS (pit density pits/m2; corrosion rate mm/y; ASTM G46 ratings)"]
        for r in a.coupons.itertuples(index=False):
            lines.append(f"  {r.specimen_id:<14} {_fmt(r.density_per_m2):>10}  {_fmt(r.corrosion_rate_mm_y):>8}  "
                         f"{_fmt(r.g46_density)} {_fmt(r.g46_size)} {_fmt(r.g46_depth)}")
    return lines


def calibration_lines(a: CampaignAnalysis, profile_path: Path | None) -> list[str]:
    lines = ["CALIBRATION USED", "profiles by SHA-256 (inspections using each):"]
    for r in profiles_used(a).itertuples(index=False):
        lines.append(f"  {r.profile_sha256}  ({r.inspections}; {r.commands})")
    info = describe_profile(profile_path)
    if info:
        lines += ["", f"profile file {info['path']}", f"  SHA-256 {info['sha256']}"]
        for part, text in info.get("parts", {}).items():
            lines += _wrap(f"{part}: {text}", "  ")
        for h in info.get("history", []):
            lines += _wrap(f"{h['step']} ({h['date']}): {h['residuals']}", "  ")
    else:
        lines.append("(no profile file given: pass --profile to describe it)")
    lines += ["", f"tool: coupon {__version__}"]
    return lines


def _chunks(lines: list[str]) -> list[list[str]]:
    return [lines[i:i + LINES_PER_PAGE] for i in range(0, max(len(lines), 1), LINES_PER_PAGE)]


def pdf_page_plan(a: CampaignAnalysis, title: str = "", profile_path: Path | None = None,
                  bases: list[Path] | None = None) -> list[str]:
    """Names of the pages :func:`write_pdf` writes, in order."""
    pages = [f"summary {i + 1}" for i in range(len(_chunks(summary_lines(a, title, ""))))]
    pages += [f"results {i + 1}" for i in range(len(_chunks(results_lines(a))))]
    pages += [p.fig_id for p in plot_plan(a)]
    pages += [f"gallery {sid}" for sid, _ in gallery(a, bases or [])]
    if len(a.coupons):
        pages.append("pit overlays")
    pages += [f"calibration {i + 1}" for i in range(len(_chunks(calibration_lines(a, profile_path))))]
    return pages


def _text_page(lines: list[str], heading: str):
    fig = plt.figure(figsize=(8.27, 11.69), dpi=100)  # A4 portrait
    fig.text(0.06, 0.97, heading, fontsize=9, color="#555555", va="top")
    fig.text(0.06, 0.94, "\n".join(lines), fontsize=8, family="monospace", va="top")
    return fig


def _save(pdf, fig) -> None:
    pdf.savefig(fig)
    plt.close(fig)


def write_pdf(a: CampaignAnalysis, dest: str | Path, *, title: str | None = None, profile_path: Path | None = None,
              bases: list[Path] | None = None, generated_at: str | None = None) -> Path:
    """Write the PDF report atomically; returns its path."""
    from matplotlib.backends.backend_pdf import PdfPages

    bases = bases or []
    title = title or a.meta.get("campaign_name") or "corrosion test campaign"
    generated_at = generated_at or _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
    head = f"{title} - coupon {__version__}"
    dest = Path(dest)
    with atomic_path(dest) as tmp:
        with PdfPages(tmp, metadata={"Title": title, "Creator": f"coupon {__version__}"}) as pdf:
            for chunk in _chunks(summary_lines(a, title, generated_at)):
                _save(pdf, _text_page(chunk, head))
            for chunk in _chunks(results_lines(a)):
                _save(pdf, _text_page(chunk, head))
            for spec in plot_plan(a):
                fig = spec.make()
                _save(pdf, fig)
            for sid, items in gallery(a, bases):
                fig = cf.gallery_figure([(cf.load_picture(p), cap) for p, cap, _ in items],
                                        f"{sid}: overlays across inspections")
                _save(pdf, fig)
            if len(a.coupons):
                pics = [(cf.load_picture(resolve_path(r.overlay, bases)), f"coupon {r.specimen_id}")
                        for r in a.coupons.itertuples(index=False)]
                fig = cf.gallery_figure(pics, "pit overlays")
                _save(pdf, fig)
            for chunk in _chunks(calibration_lines(a, profile_path)):
                _save(pdf, _text_page(chunk, head))
        plt.close("all")
    return dest

