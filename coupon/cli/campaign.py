"""``coupon campaign init|status`` and ``coupon export``: the campaign database from the command line."""

from __future__ import annotations

import importlib.util
import warnings
from pathlib import Path

import click
import pandas as pd

from coupon.campaign.criteria import CRITERIA_FILE_NAME, EXAMPLE, load_criteria
from coupon.campaign.layout import read_layout
from coupon.campaign.store import DEFAULT_DB_NAME, TABLES, open_store
from coupon.campaign.timeline import analyse_campaign
from coupon.cli.common import Failed, fail, parse_numbers
from coupon.errors import CouponError
from coupon.io.atomic import atomic_path, to_json_text, write_csv, write_text

DB_HELP = f"Campaign database (default: DIR/{DEFAULT_DB_NAME})."


def _db(campaign_dir: Path, db_path: Path | None) -> Path:
    return db_path if db_path is not None else campaign_dir / DEFAULT_DB_NAME


def campaign_criteria(campaign_dir: Path, criteria_path: Path | None):
    """The criteria file given, else DIR/criteria.json, else the built-in example (with a warning)."""
    if criteria_path is None and (campaign_dir / CRITERIA_FILE_NAME).is_file():
        criteria_path = campaign_dir / CRITERIA_FILE_NAME
    if criteria_path is None:
        warnings.warn("no criteria file (DIR/criteria.json or --criteria): using the built-in example criteria, "
                      "which are not your specification's")
    return load_criteria(criteria_path)


@click.group("campaign")
def campaign() -> None:
    """Set up a test campaign and see what has been rated.

    \b
    Example:
      coupon campaign init lab/run1 --layout specimens.csv --schedule-h 0,168,336,504,720
      coupon panels lab/run1/photos/*.jpg --layout specimens.csv --out lab/run1/panels --db lab/run1/coupon.db
      coupon campaign status lab/run1
      coupon report lab/run1 --out lab/run1/report.html
    """


@campaign.command("init")
@click.argument("campaign_dir", metavar="DIR", type=click.Path(file_okay=False, path_type=Path))
@click.option("--layout", "layout_path", required=True, type=click.Path(dir_okay=False, path_type=Path),
              help="Specimens CSV: specimen_id (or panel_id), system, and optional replicate, row, col, kind "
                   "(panel|coupon|droplet), system_name, notes.")
@click.option("--name", default=None, help="Campaign name (shown in the report).")
@click.option("--lab", default=None, help="Laboratory name (shown in the report).")
@click.option("--notes", default=None, help="Free text for the report.")
@click.option("--schedule-h", default=None, metavar="H,H,...",
              help="Planned inspection times in hours, e.g. 0,168,336,504,720 (status then lists missing ones).")
@click.option("--db", "db_path", type=click.Path(dir_okay=False, path_type=Path), help=DB_HELP)
def init(campaign_dir, layout_path, name, lab, notes, schedule_h, db_path):
    """Create (or update) the campaign in DIR: the database with systems and specimens, and an
    example DIR/criteria.json to edit (an existing one is kept).

    Rerunning init with a changed layout updates the specimens it lists; rated rows are kept.
    """
    schedule = sorted(parse_numbers(schedule_h, None, "hours", "--schedule-h")) if schedule_h else None
    if schedule is not None and any(h < 0 for h in schedule):
        raise click.BadParameter("inspection times cannot be negative", param_hint="--schedule-h")
    try:
        specimens, systems = read_layout(layout_path)
        db = _db(campaign_dir, db_path)
        campaign_dir.mkdir(parents=True, exist_ok=True)
        with open_store(db) as store:
            n = store.set_layout(specimens, systems)
            meta = {k: v for k, v in (("campaign_name", name), ("lab", lab), ("notes", notes)) if v is not None}
            if schedule is not None:
                meta["schedule_h"] = schedule
            if meta:
                store.set_meta(**meta)
            n_sys = len(store.systems())
    except CouponError as exc:
        raise fail(exc) from None
    crit = campaign_dir / CRITERIA_FILE_NAME
    if not crit.exists():
        write_text(crit, to_json_text(EXAMPLE))
        click.echo(f"wrote example failure criteria {crit} (edit them to your specification)")
    click.echo(f"campaign database {db}: {n} specimens in {n_sys} systems")


@campaign.command("status")
@click.argument("campaign_dir", metavar="DIR", type=click.Path(file_okay=False, path_type=Path))
@click.option("--db", "db_path", type=click.Path(dir_okay=False, path_type=Path), help=DB_HELP)
def status(campaign_dir, db_path):
    """Print what has been rated and what is missing (e.g. 'P07 has no 504 h inspection')."""
    try:
        with open_store(_db(campaign_dir, db_path), create=False) as store:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")  # status does not judge, the criteria warning is noise here
                a = analyse_campaign(store, load_criteria(None))
    except CouponError as exc:
        raise fail(exc) from None
    meta = a.meta
    click.echo(f"campaign: {meta.get('campaign_name', '(unnamed)')} ({_db(campaign_dir, db_path)})")
    kinds = a.specimens["kind"].value_counts().to_dict()
    click.echo(f"specimens: {len(a.specimens)} in {len(a.systems)} systems ("
               + ", ".join(f"{v} {k}" for k, v in sorted(kinds.items())) + ")")
    ins = a.inspections
    per_cmd = ins["command"].value_counts().to_dict() if len(ins) else {}
    click.echo("images analysed: " + (", ".join(f"{v} by {k}" for k, v in sorted(per_cmd.items())) or "none"))
    if len(a.series):
        for sid, g in a.series.groupby("specimen_id", sort=False):
            hs = ", ".join(f"{h:g}" for h in sorted(g["exposure_h"]))
            click.echo(f"  {sid} ({g['system'].iloc[0]}): rated at {hs} h")
    bad = a.panels[a.panels["status"].notna() & (a.panels["status"].astype(str) != "ok")] if len(a.panels) else []
    for r in (bad.itertuples(index=False) if len(bad) else []):
        click.echo(f"  not rated: {r.panel_id} in {r.inspection_image}: {r.status}")
    for r in a.coupons.itertuples(index=False):
        click.echo(f"  coupon {r.specimen_id}: {int(r.pit_count) if pd.notna(r.pit_count) else '?'} pits "
                   f"({Path(str(r.image)).name})")
    coupons = set(a.coupons["specimen_id"].astype(str)) if len(a.coupons) else set()
    for sid in a.specimens.loc[a.specimens["kind"] == "coupon", "specimen_id"]:
        if sid not in coupons:
            click.echo(f"missing: coupon {sid} has no pit analysis")
    keys = a.droplet["series_key"].value_counts().to_dict() if len(a.droplet) else {}
    for k, v in sorted(keys.items()):
        t = pd.to_numeric(a.droplet.loc[a.droplet["series_key"] == k, "t_min"], errors="coerce")
        click.echo(f"  droplet {k}: {v} frames, {t.min():g} to {t.max():g} min")
    drops = set(keys)
    for sid in a.specimens.loc[a.specimens["kind"] == "droplet", "specimen_id"]:
        if sid not in drops:
            click.echo(f"missing: droplet sample {sid} has no frames")
    for m in a.missing:
        click.echo(f"missing: {m}")
    if a.unassigned:
        click.echo("rated panels not in the layout: " + ", ".join(a.unassigned))
    if not a.missing and len(a.series):
        click.echo("every panel has every inspection")


FORMATS = ("csv", "json", "parquet")


def _plain(df: pd.DataFrame) -> pd.DataFrame:
    """Object cells only (None for missing), so JSON and Parquet writers take any column."""
    return df.astype(object).where(df.notna(), None)


def _parquet_ready(df: pd.DataFrame) -> pd.DataFrame:
    """Parquet needs one type per column: numeric columns stay numeric, mixed ones become text."""
    out = {}
    for c in df.columns:
        s = df[c]
        if s.dtype == object or pd.api.types.is_string_dtype(s):  # pandas 3 reads SQLite text as "str"
            text = s.map(lambda v: isinstance(v, str))
            # text that reads as a number becomes one, unless that would lose what it says: identifiers
            # with a leading zero ("007") stay text, and so does a column with no value at all
            keep_text = bool(s[text].str.fullmatch(r"\s*[+-]?0\d.*").any()) or not s.notna().any()
            try:
                if keep_text:
                    raise ValueError
                s = pd.to_numeric(s)
            except (TypeError, ValueError):
                s = s.map(lambda v: None if v is None or (isinstance(v, float) and v != v) else str(v))
        out[c] = s
    return pd.DataFrame(out)


@click.command("export")
@click.argument("campaign_dir", metavar="DIR", type=click.Path(file_okay=False, path_type=Path))
@click.option("--format", "fmt", type=click.Choice(FORMATS), default="csv", show_default=True,
              help="File format (parquet needs the optional package pyarrow).")
@click.option("--out", "out_dir", type=click.Path(file_okay=False, path_type=Path),
              help="Output folder (default: DIR/export).")
@click.option("--db", "db_path", type=click.Path(dir_okay=False, path_type=Path), help=DB_HELP)
@click.option("--criteria", "criteria_path", type=click.Path(dir_okay=False, path_type=Path),
              help="Failure criteria JSON for the derived tables (default: DIR/criteria.json).")
def export(campaign_dir, fmt, out_dir, db_path, criteria_path):
    """Write every table of the campaign database, one file per table, plus the derived tables
    (ratings over time, per system, time to failure, ranking, growth, coupons).

    \b
    Example:
      coupon export lab/run1 --format csv
    """
    if fmt == "parquet" and importlib.util.find_spec("pyarrow") is None:
        raise Failed("Parquet export needs the package pyarrow, which is not installed "
                     "(pip install pyarrow), or use --format csv or json")
    out_dir = out_dir or campaign_dir / "export"
    try:
        with open_store(_db(campaign_dir, db_path), create=False) as store:
            a = analyse_campaign(store, campaign_criteria(campaign_dir, criteria_path))
    except CouponError as exc:
        raise fail(exc) from None
    tables = {"systems": a.systems, "specimens": a.specimens, "inspections": a.inspections}
    raw = {"panels": a.panels, "pits": a.pits, "pit_summary": a.pit_summary, "droplet": a.droplet,
           "radial_profile": a.radial, "droplet_summary": a.droplet_summary}
    tables |= {k: v.drop(columns=["series_key"], errors="ignore") for k, v in raw.items() if k in TABLES}
    tables |= {"ratings_over_time": a.series, "ratings_by_system": a.by_system, "time_to_failure": a.ttf,
               "system_ranking": a.ranking, "rust_growth": a.growth, "coupons": a.coupons}
    written = []
    for name, df in tables.items():
        dest = out_dir / f"{name}.{fmt}"
        if fmt == "csv":
            write_csv(dest, df)
        elif fmt == "json":
            write_text(dest, to_json_text(_plain(df).to_dict("records")))
        else:
            with atomic_path(dest) as tmp:
                _parquet_ready(df).to_parquet(tmp, index=False)
        written.append(f"{name} ({len(df)} rows)")
    click.echo(f"exported to {out_dir}: " + ", ".join(written))
