"""``coupon report``: the campaign report as one self-contained HTML file (and optionally a PDF)."""

from __future__ import annotations

from pathlib import Path

import click

from coupon.campaign.criteria import with_overrides
from coupon.campaign.store import open_store
from coupon.campaign.timeline import analyse_campaign
from coupon.cli.campaign import DB_HELP, _db, campaign_criteria
from coupon.cli.common import fail
from coupon.errors import CouponError
from coupon.io.atomic import write_text
from coupon.report.html_report import build_html
from coupon.report.pdf_report import write_pdf


@click.command("report")
@click.argument("campaign_dir", metavar="DIR", type=click.Path(file_okay=False, path_type=Path))
@click.option("--out", "out_path", type=click.Path(dir_okay=False, path_type=Path),
              help="HTML report to write (default: DIR/report.html).")
@click.option("--pdf", "pdf_path", type=click.Path(dir_okay=False, path_type=Path), help="Also write a PDF.")
@click.option("--db", "db_path", type=click.Path(dir_okay=False, path_type=Path), help=DB_HELP)
@click.option("--criteria", "criteria_path", type=click.Path(dir_okay=False, path_type=Path),
              help="Failure criteria JSON (default: DIR/criteria.json, else a built-in example with a warning).")
@click.option("--fail-rust-grade-below", type=click.IntRange(0, 10), default=None,
              help="Criterion: fails when the ASTM D610 rust grade is below this (replaces the file's).")
@click.option("--fail-ri-above", type=click.IntRange(0, 5), default=None,
              help="Criterion: fails when the ISO 4628-3 Ri degree is above this.")
@click.option("--fail-creep-mean-above-mm", type=click.FloatRange(min=0), default=None,
              help="Criterion: fails when the mean creepage from the scribe is above this (mm).")
@click.option("--profile", "profile_path", type=click.Path(dir_okay=False, path_type=Path),
              help="Calibration profile to describe (default: DIR/profile.json if present).")
@click.option("--title", default=None, help="Report title (default: the campaign name).")
def report(campaign_dir, out_path, pdf_path, db_path, criteria_path, fail_rust_grade_below, fail_ri_above,
           fail_creep_mean_above_mm, profile_path, title):
    """Write the campaign report: summary, criteria, tables per system, ratings against exposure
    time with the replicate spread, time to failure, overlays per specimen, droplet zones and
    kymographs, pits, calibration, cautions.  The HTML embeds every picture (works offline).

    \b
    Example:
      coupon report lab/run1 --out lab/run1/report.html --pdf lab/run1/report.pdf
    """
    db = _db(campaign_dir, db_path)
    out_path = out_path or campaign_dir / "report.html"
    if profile_path is None and (campaign_dir / "profile.json").is_file():
        profile_path = campaign_dir / "profile.json"
    bases = [campaign_dir, db.parent, out_path.parent]
    try:
        crit = with_overrides(campaign_criteria(campaign_dir, criteria_path), rust_grade=fail_rust_grade_below,
                              ri_degree=fail_ri_above, creep_mean_mm=fail_creep_mean_above_mm)
        with open_store(db, create=False) as store:
            a = analyse_campaign(store, crit)
        text = build_html(a, title=title, db_path=db, profile_path=profile_path, bases=bases)
        write_text(out_path, text)
        click.echo(f"report: {out_path}")
        if pdf_path is not None:
            write_pdf(a, pdf_path, title=title, profile_path=profile_path, bases=bases)
            click.echo(f"pdf: {pdf_path}")
    except CouponError as exc:
        raise fail(exc) from None
