"""coupon campaign init / status and coupon export, end to end with CliRunner."""

from __future__ import annotations

import importlib.util
import json

import numpy as np
import pandas as pd
import pytest
from click.testing import CliRunner

from coupon.campaign.store import open_store, read_specimens
from coupon.cli.main import cli

try:
    from campaign_rows import build_campaign
except ImportError:  # tests collected as a package
    from tests.campaign_rows import build_campaign

LAYOUT = """panel_id,system,replicate,row,col,system_name
P01,SYS-A,1,1,1,zinc epoxy (invented)
P02,SYS-A,2,1,2,
P07,SYS-B,1,2,1,acrylic (invented)
C01,SYS-B,1,,,
"""


def run(args):
    # exceptions are not caught: a crash fails the test instead of passing as "exit 1"
    return CliRunner().invoke(cli, [str(a) for a in args], catch_exceptions=False)


def test_init_writes_specimens_and_criteria_then_status(tmp_path):
    layout = tmp_path / "specimens.csv"
    layout.write_text(LAYOUT)
    d = tmp_path / "run1"
    r = run(["campaign", "init", d, "--layout", layout, "--name", "Run 1", "--schedule-h", "0,168,336,504"])
    assert r.exit_code == 0, r.output
    assert "4 specimens in 2 systems" in r.output
    crit = json.loads((d / "criteria.json").read_text())
    assert crit["criteria"][0] == {"metric": "rust_grade", "fails_below": 7}
    specs = read_specimens(d / "coupon.db").set_index("specimen_id")
    assert specs.loc["P07", "system"] == "SYS-B" and specs.loc["P02", "replicate"] == 2
    assert specs.loc["P01", "system_name"] == "zinc epoxy (invented)"
    r = run(["campaign", "status", d])
    assert r.exit_code == 0, r.output
    assert "P07 has no rated inspection" in r.output
    # an edited criteria file is not overwritten by a second init
    (d / "criteria.json").write_text('{"criteria": [{"metric": "rust_area_pct", "fails_above": 1}]}')
    assert run(["campaign", "init", d, "--layout", layout]).exit_code == 0
    assert "rust_area_pct" in (d / "criteria.json").read_text()


def test_status_names_a_missing_inspection(tmp_path):
    build_campaign(tmp_path, skip=("P07", 504.0))
    r = run(["campaign", "status", tmp_path])
    assert r.exit_code == 0, r.output
    assert "missing: P07 has no 504 h inspection" in r.output
    assert "P07 (SYS-C): rated at 0, 168, 336, 720 h" in r.output
    assert "coupon C02: 30 pits" in r.output and "droplet D01: 6 frames, 0 to 25 min" in r.output


def test_layout_errors_are_one_line(tmp_path):
    d = tmp_path / "run"
    bad = tmp_path / "dup.csv"
    bad.write_text("panel_id,system\nP01,A\nP01,B\n")
    r = run(["campaign", "init", d, "--layout", bad])
    assert r.exit_code == 1 and "line 3: panel_id 'P01' already given on line 2" in r.output
    bad.write_text("panel_id,system,row,col\nP01,A,1,1\nP02,A,1,1\n")
    r = run(["campaign", "init", d, "--layout", bad])
    assert r.exit_code == 1 and "position row 1, col 1 already given to 'P01'" in r.output
    bad.write_text("id,coating\nP01,A\n")
    r = run(["campaign", "init", d, "--layout", bad])
    assert r.exit_code == 1 and "expected columns specimen_id (or panel_id / coupon_id) and system" in r.output
    bad.write_text("panel_id,system,replicate\nP01,A,two\n")
    r = run(["campaign", "init", d, "--layout", bad])
    assert r.exit_code == 1 and "replicate must be a whole number, got 'two'" in r.output
    r = run(["campaign", "status", tmp_path / "nothing"])
    assert r.exit_code == 1 and "no campaign database here" in r.output
    assert "Traceback" not in r.output


def test_export_csv_and_json(tmp_path):
    build_campaign(tmp_path)
    r = run(["export", tmp_path, "--format", "csv"])
    assert r.exit_code == 0, r.output
    panels = pd.read_csv(tmp_path / "export" / "panels.csv")
    assert len(panels) == 45 and {"rust_area_pct", "creep_mean_mm", "specimen_id"} <= set(panels.columns)
    ttf = pd.read_csv(tmp_path / "export" / "time_to_failure.csv")
    assert len(ttf) == 9
    with open_store(tmp_path / "coupon.db") as s:
        n_radial = s.count_rows("radial_profile")
    r = run(["export", tmp_path, "--format", "json", "--out", tmp_path / "j"])
    assert r.exit_code == 0, r.output
    radial = json.loads((tmp_path / "j" / "radial_profile.json").read_text())
    assert len(radial) == n_radial == 30 and set(radial[0]) >= {"frame", "t_min", "r_norm", "ph_median", "n_px"}


def test_export_parquet_without_pyarrow_says_what_to_install(tmp_path, monkeypatch):
    build_campaign(tmp_path)
    real = importlib.util.find_spec
    monkeypatch.setattr(importlib.util, "find_spec", lambda name, *a: None if name == "pyarrow" else real(name, *a))
    r = run(["export", tmp_path, "--format", "parquet"])
    assert r.exit_code == 1
    assert "Parquet export needs the package pyarrow, which is not installed" in r.output
    assert not (tmp_path / "export").exists()


def test_export_parquet_round_trips_every_table(tmp_path):
    # pyarrow is in the test extras; pandas reads the files back (the reference reader)
    pytest.importorskip("pyarrow")
    build_campaign(tmp_path)
    assert run(["export", tmp_path, "--format", "csv"]).exit_code == 0
    r = run(["export", tmp_path, "--format", "parquet", "--out", tmp_path / "pq"])
    assert r.exit_code == 0, r.output
    csvs = sorted((tmp_path / "export").glob("*.csv"))
    assert len(csvs) >= 10
    for c in csvs:
        pq = pd.read_parquet(tmp_path / "pq" / f"{c.stem}.parquet")
        ref = pd.read_csv(c)
        assert list(pq.columns) == list(ref.columns), c.stem
        assert len(pq) == len(ref), c.stem
        for col in ref.select_dtypes("number").columns:
            if ref[col].isna().all():
                continue  # an empty column (CSV reads "" as NaN) carries no value to compare
            # a numeric column stays numeric, with the values of the CSV export (which keeps 6 significant
            # digits: write_csv's float_format)
            assert pd.api.types.is_numeric_dtype(pq[col]), (c.stem, col)
            np.testing.assert_allclose(pq[col].to_numpy(float), ref[col].to_numpy(float), rtol=5e-6, atol=1e-300,
                                       equal_nan=True, err_msg=f"{c.stem}.{col}")
    assert not list((tmp_path / "pq").glob("*.tmp*"))  # atomic writes leave no temporary files


def test_parquet_columns_keep_identifiers_and_numbers():
    # Parquet is typed: text that reads as a number becomes one (a grade), but an identifier with a leading
    # zero must not lose it, and text stays text
    from coupon.cli.campaign import _parquet_ready

    df = pd.DataFrame({"panel_id": ["007", "12"], "rust_grade": ["10", "8"], "position": ["R1C1", "R1C2"],
                       "empty": [None, None], "mixed": [3, "a"]})
    out = _parquet_ready(df)
    assert out["panel_id"].tolist() == ["007", "12"]
    assert pd.api.types.is_numeric_dtype(out["rust_grade"]) and out["rust_grade"].tolist() == [10, 8]
    assert out["position"].tolist() == ["R1C1", "R1C2"] and out["mixed"].tolist() == ["3", "a"]
    assert out["empty"].isna().all()
