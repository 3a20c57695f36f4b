"""Every analysis command records its rows in the campaign database (--db): once, never duplicated."""

from __future__ import annotations

import sqlite3

import pandas as pd
import pytest

from coupon.campaign.store import read_table
from coupon.io.atomic import write_float_tiff
from coupon.synth.droplet import DropletSeriesSpec
from coupon.synth.panels import PanelSpec, TraySettings, tray_scene
from coupon.synth.pits import pitted_coupon_scene
from tests.conftest import invoke, write_rgb
from tests.droplet_support import write_profile, write_series


def _inspections(db, command):
    with sqlite3.connect(db) as conn:
        return conn.execute("SELECT COUNT(*) FROM inspections WHERE command = ?", (command,)).fetchone()[0]


@pytest.mark.slow
def test_panels_rows_recorded_once(runner, tmp_path):
    img, _ = tray_scene([PanelSpec("white", ("general",)), PanelSpec("grey", ("spots",))], seed=31,
                        settings=TraySettings(image_wh=(1400, 1200), cols=2))
    photo = write_rgb(tmp_path / "rack1_0168h.jpg", img)
    db = tmp_path / "camp.db"
    out = tmp_path / "out"
    for extra in ([], ["--force"]):  # a rerun, even forced, replaces the image's rows
        r = invoke(runner, ["panels", photo, "--out", out, "--db", db, *extra])
        assert r.exit_code == 0, r.output
    table = read_table(db, "panels")
    csv = pd.read_csv(out / "panels.csv")
    assert len(table) == len(csv) == 2 and _inspections(db, "panels") == 1
    assert sorted(table["panel_id"]) == sorted(csv["panel_id"].astype(str))
    assert (table["exposure_h"] == 168).all()
    pd.testing.assert_series_equal(table.sort_values("panel_id")["rust_area_pct"].reset_index(drop=True),
                                   csv.sort_values("panel_id")["rust_area_pct"].reset_index(drop=True),
                                   check_names=False, rtol=1e-5)


def test_pits_default_database_in_out_and_late_database_gets_old_images(runner, tmp_path):
    rgb, height, _ = pitted_coupon_scene(seed=32, coupon_mm=(30, 25), n_pits=20, touching_pairs=1, near_edge=2)
    img = write_rgb(tmp_path / "C01_cleaned.jpg", rgb)
    write_float_tiff(tmp_path / "C01_cleaned_height.tiff", height * 1000.0)
    out = tmp_path / "pits"
    args = ["pits", img, "--px-per-mm", 20, "--out", out, "--height-map", tmp_path / "C01_cleaned_height.tiff",
            "--height-unit", "um"]
    r = invoke(runner, args)
    assert r.exit_code == 0, r.output
    db = out / "coupon.db"  # default: created in --out
    summary = read_table(db, "pit_summary")
    pits = read_table(db, "pits")
    assert len(summary) == 1 and len(pits) == len(pd.read_csv(out / "pits.csv"))
    # a database named later still receives the image analysed before (from the kept rows)
    late = tmp_path / "late.db"
    r = invoke(runner, [*args, "--db", late])
    assert r.exit_code == 0 and "already analysed" in r.output
    assert len(read_table(late, "pits")) == len(pits) and _inspections(late, "pits") == 1
    r = invoke(runner, [*args, "--db", late])
    assert _inspections(late, "pits") == 1 and len(read_table(late, "pits")) == len(pits)


@pytest.mark.slow
def test_droplet_frames_and_summary_recorded(runner, tmp_path):
    spec = DropletSeriesSpec(n_frames=4, image_wh=(400, 350), px_per_mm=25.0, interval_min=10.0)
    paths, _ = write_series(tmp_path / "D01", spec)
    prof = write_profile(tmp_path / "p.json", spec.px_per_mm)
    db = tmp_path / "c.db"
    for _ in range(2):
        r = invoke(runner, ["droplet", tmp_path / "D01", "--profile", prof, "--out", tmp_path / "out", "--db", db,
                            "--no-frame-figures"])
        assert r.exit_code == 0, r.output
    frames = read_table(db, "droplet")
    assert len(frames) == 4 and sorted(frames["t_min"]) == [0, 10, 20, 30]
    assert len(read_table(db, "radial_profile")) == 4 * 20
    assert len(read_table(db, "droplet_summary")) == 1
