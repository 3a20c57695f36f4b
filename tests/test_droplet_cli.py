"""``coupon droplet`` end to end on synthetic series: numbers vs truth, events, outputs, bad input."""

from __future__ import annotations

import dataclasses
import json
import shutil

import numpy as np
import pandas as pd
import pytest
from PIL import Image

from coupon.synth.droplet import DropletSeriesSpec, series_events
from tests.conftest import invoke
from tests.droplet_support import write_profile, write_series

ISSUE_COLUMNS = ["frame", "t_min", "drop_found", "drop_area_mm2", "drop_diameter_mm", "ph_median", "ph_p05",
                 "ph_p95", "ph_centre", "ph_rim", "acidic_area_mm2", "acidic_area_pct", "basic_area_mm2",
                 "basic_area_pct", "rust_area_mm2", "rust_area_pct", "indicator_coverage_pct"]
SMALL = DropletSeriesSpec(n_frames=5, image_wh=(400, 350), px_per_mm=25.0, interval_min=10.0)


@pytest.fixture(scope="module")
def full_run(tmp_path_factory):
    from click.testing import CliRunner

    root = tmp_path_factory.mktemp("droplet_full")
    spec = DropletSeriesSpec()
    paths, truths = write_series(root / "frames", spec)
    prof = write_profile(root / "profile.json", spec.px_per_mm)
    res = invoke(CliRunner(), ["droplet", root / "frames", "--profile", prof, "--out", root / "out"])
    return root, spec, truths, res


@pytest.mark.slow
def test_series_end_to_end(full_run):
    root, spec, truths, res = full_run
    assert res.exit_code == 0, res.output
    table = pd.read_csv(root / "out" / "droplet.csv")
    assert set(ISSUE_COLUMNS) <= set(table.columns)
    assert len(table) == spec.n_frames and (table["status"] == "ok").all()
    assert table["t_min"].tolist() == [t["t_min"] for t in truths]
    for (_, row), truth in zip(table.iterrows(), truths):
        assert row["drop_area_mm2"] == pytest.approx(truth["drop_area_mm2"], rel=0.03)
        assert abs(row["acidic_area_pct"] - truth["acidic_pct"]) <= 5
        assert abs(row["basic_area_pct"] - truth["basic_pct"]) <= 5
        assert abs(row["ph_centre"] - truth["ph_centre"]) <= 0.5
        assert abs(row["ph_rim"] - truth["ph_rim"]) <= 0.5
    radial = pd.read_csv(root / "out" / "radial_profile.csv")
    assert list(radial.columns[:2]) == ["frame", "file"] and {"t_min", "r_norm", "ph_median", "n_px"} <= set(radial)
    assert len(radial) == 20 * spec.n_frames


@pytest.mark.slow
def test_series_events_within_one_frame(full_run):
    root, spec, truths, res = full_run
    summary = json.loads((root / "out" / "droplet_summary.json").read_text())
    ev, true_ev = summary["events"], series_events(truths)
    step = spec.interval_min
    assert true_ev["t_acidic_first_min"] is not None and true_ev["t_rust_first_min"] is not None
    assert abs(ev["t_acidic_first_min"] - true_ev["t_acidic_first_min"]) <= step
    assert abs(ev["t_rust_first_min"] - true_ev["t_rust_first_min"]) <= step
    assert abs(ev["t_acidic_peak_min"] - true_ev["t_acidic_peak_min"]) <= step
    assert ev["acidic_peak_pct"] == pytest.approx(true_ev["acidic_peak_pct"], abs=5)
    # evaporation: the generator removes area_loss_mm2_per_min linearly
    assert ev["evaporation"]["rate_mm2_per_min"] == pytest.approx(spec.area_loss_mm2_per_min, rel=0.1)
    assert ev["final"]["pattern"] == "acidic centre, basic rim"
    assert summary["tool_version"] and summary["profile_sha256"] and summary["settings"]["acidic_below"] == 6.0
    for key in ("zone_areas_png", "kymograph_png", "montage_png"):
        assert (root / "out" / summary["outputs"][key]).is_file() or \
            (root / "out").joinpath(summary["outputs"][key]).is_file()
    assert len(list((root / "out" / "frames").glob("*_ph.png"))) == spec.n_frames


@pytest.mark.slow
def test_resume_skips_done_frames(full_run, runner, monkeypatch):
    root, spec, truths, res = full_run
    before = pd.read_csv(root / "out" / "droplet.csv")
    again = invoke(runner, ["droplet", root / "frames", "--profile", root / "profile.json", "--out", root / "out"])
    assert again.exit_code == 0, again.output
    assert f"{spec.n_frames} frame(s) already analysed" in again.output
    after = pd.read_csv(root / "out" / "droplet.csv")
    pd.testing.assert_frame_equal(before, after)
    # the frames typed relative to another folder: still done
    monkeypatch.chdir(root)
    again = invoke(runner, ["droplet", "frames", "--profile", root / "profile.json", "--out", root / "out"])
    assert again.exit_code == 0 and f"{spec.n_frames} frame(s) already analysed" in again.output, again.output
    monkeypatch.undo()


def test_bad_frames_are_reported_and_the_rest_processed(tmp_path, runner):
    paths, truths = write_series(tmp_path / "f", SMALL)
    prof = write_profile(tmp_path / "p.json", SMALL.px_per_mm)
    (tmp_path / "f" / "drop_t025min.jpg").write_bytes(b"not a jpeg at all")
    big = dataclasses.replace(SMALL, image_wh=(420, 350), n_frames=1)
    write_series(tmp_path / "g", big, name="drop_t050min.jpg")
    shutil.copy(tmp_path / "g" / "drop_t050min.jpg", tmp_path / "f" / "drop_t050min.jpg")
    res = invoke(runner, ["droplet", tmp_path / "f", "--profile", prof, "--out", tmp_path / "out"])
    assert res.exit_code == 1
    assert "drop_t025min.jpg" in res.output and "not an image" in res.output
    assert "drop_t050min.jpg" in res.output and "420x350 px but the series is 400x350 px" in res.output
    table = pd.read_csv(tmp_path / "out" / "droplet.csv")
    assert len(table) == 7
    bad = table[table["status"] != "ok"]
    assert sorted(bad["file"].map(lambda s: s.rsplit("/", 1)[-1])) == ["drop_t025min.jpg", "drop_t050min.jpg"]
    assert (table[table["status"] == "ok"]["drop_found"]).all()
    summary = json.loads((tmp_path / "out" / "droplet_summary.json").read_text())
    assert summary["frames_failed"] == 2 and summary["frames_with_drop"] == 5


def test_out_of_order_times_from_table(tmp_path, runner):
    paths, truths = write_series(tmp_path / "f", SMALL, name="shot_{i}.jpg")
    prof = write_profile(tmp_path / "p.json", SMALL.px_per_mm)
    # the camera counter is not the time order: shot_0 was taken last
    times = [40, 0, 10, 20, 30]
    pd.DataFrame({"file": [p.name for p in paths], "t_min": times}).to_csv(tmp_path / "t.csv", index=False)
    # the command line prints warnings as one "warning: ..." line (install_warning_printer)
    res = invoke(runner, ["droplet", *paths, "--profile", prof, "--out", tmp_path / "out",
                          "--times", tmp_path / "t.csv"])
    assert res.exit_code == 0, res.output
    assert "warning: frames are not in time order: shot_1.jpg (t = 0 min) comes after shot_0.jpg" in res.output
    table = pd.read_csv(tmp_path / "out" / "droplet.csv")
    assert table["t_min"].tolist() == [0, 10, 20, 30, 40]
    assert table["file"].iloc[-1].endswith("shot_0.jpg") and table["frame"].tolist() == [0, 1, 2, 3, 4]


def test_interval_t0_and_exif(tmp_path, runner):
    paths, truths = write_series(tmp_path / "f", SMALL, name="img{i}.jpg")
    prof = write_profile(tmp_path / "p.json", SMALL.px_per_mm)
    res = invoke(runner, ["droplet", *paths, "--profile", prof, "--out", tmp_path / "o1", "--interval", "90s",
                          "--t0", "-2min", "--no-frame-figures"])
    assert res.exit_code == 0, res.output
    assert pd.read_csv(tmp_path / "o1" / "droplet.csv")["t_min"].tolist() == [2, 3.5, 5, 6.5, 8]
    # EXIF capture time (DateTime tag), read by load_image
    for k, p in enumerate(paths):
        with Image.open(p) as im:
            exif = im.getexif()
            exif[0x0132] = f"2026:03:02 09:{15 + 3 * k:02d}:00"
            im.save(p, exif=exif, quality=95)
    res = invoke(runner, ["droplet", *paths, "--profile", prof, "--out", tmp_path / "o2", "--no-frame-figures",
                          "--t0", "2026-03-02T09:10:00"])
    assert res.exit_code == 0, res.output
    table = pd.read_csv(tmp_path / "o2" / "droplet.csv")
    assert table["t_min"].tolist() == [5, 8, 11, 14, 17] and (table["time_source"] == "exif").all()


def test_no_time_source_is_a_clear_error(tmp_path, runner):
    paths, _ = write_series(tmp_path / "f", dataclasses.replace(SMALL, n_frames=2), name="img{i}.jpg")
    prof = write_profile(tmp_path / "p.json", SMALL.px_per_mm)
    res = invoke(runner, ["droplet", *paths, "--profile", prof, "--out", tmp_path / "o"])
    assert res.exit_code == 1 and "cannot tell the frame times" in res.output and "--interval" in res.output


def test_no_indicator_falls_back_loudly(tmp_path, runner):
    paths, truths = write_series(tmp_path / "f", dataclasses.replace(SMALL, n_frames=2))
    prof = write_profile(tmp_path / "p.json", SMALL.px_per_mm, with_indicator=False)
    res = invoke(runner, ["droplet", tmp_path / "f", "--profile", prof, "--out", tmp_path / "o",
                          "--no-frame-figures"])
    assert res.exit_code == 0, res.output
    assert "warning: no buffer calibration: using the generic universal-indicator table" in res.output
    assert "falling back to the generic shipped" in res.output
    summary = json.loads((tmp_path / "o" / "droplet_summary.json").read_text())
    assert summary["indicator"]["is_default"] is True


def test_no_scale_needs_px_per_mm(tmp_path, runner):
    paths, _ = write_series(tmp_path / "f", dataclasses.replace(SMALL, n_frames=2))
    prof = write_profile(tmp_path / "p.json", None)
    res = invoke(runner, ["droplet", tmp_path / "f", "--profile", prof, "--out", tmp_path / "o"])
    assert res.exit_code == 1 and "--px-per-mm" in res.output
    res = invoke(runner, ["droplet", tmp_path / "f", "--profile", prof, "--out", tmp_path / "o",
                          "--px-per-mm", "25", "--no-frame-figures"])
    assert res.exit_code == 0, res.output
    area = pd.read_csv(tmp_path / "o" / "droplet.csv")["drop_area_mm2"].iloc[0]
    assert area == pytest.approx(np.pi * 25, rel=0.03)


def test_all_frames_without_a_drop(tmp_path, runner):
    spec = dataclasses.replace(SMALL, n_frames=3, dried_after_min=-1.0)
    write_series(tmp_path / "f", spec)
    prof = write_profile(tmp_path / "p.json", spec.px_per_mm)
    res = invoke(runner, ["droplet", tmp_path / "f", "--profile", prof, "--out", tmp_path / "o"])
    assert res.exit_code == 1
    assert "no drop was found in any of the 3 readable frames" in res.output
    table = pd.read_csv(tmp_path / "o" / "droplet.csv")
    assert (~table["drop_found"]).all() and (table["status"] == "ok").all()
    assert table["note"].str.startswith("no drop").all()


def test_threshold_options_and_usage_errors(tmp_path, runner):
    res = invoke(runner, ["droplet", tmp_path, "--out", tmp_path / "o", "--acidic-below", "8", "--basic-above", "6"])
    assert res.exit_code == 2 and "below the basic" in res.output
    res = invoke(runner, ["droplet", tmp_path, "--out", tmp_path / "o", "--interval", "60"])
    assert res.exit_code == 2 and "duration with a unit" in res.output
    res = invoke(runner, ["droplet", "--help"])
    assert res.exit_code == 0 and "coupon droplet frames/" in res.output


def test_background_writes_finish_and_report_failures(tmp_path):
    # pictures written on the writer thread exist when the block ends; a failed write is reported
    import numpy as np

    from coupon.io.atomic import BackgroundWrites, defer, write_image

    pic = np.zeros((8, 8, 3), np.uint8)
    with BackgroundWrites() as w:
        p = defer(tmp_path / "a.png", write_image, tmp_path / "a.png", pic)
        defer(tmp_path / "no" / "b.png", _fail_write)
    assert p.exists() and len(w.errors) == 1 and "b.png" in w.errors[0]
    q = defer(tmp_path / "c.png", write_image, tmp_path / "c.png", pic)  # no writer active: written now
    assert q.exists()


def _fail_write():
    raise OSError("disk full")


def test_prefetch_loads_ahead_in_order_and_keeps_errors_with_their_item():
    """The next frame is loaded on a helper thread; each item gets its own load's result or error."""
    import threading

    from coupon.errors import ImageLoadError
    from coupon.io.batch import Prefetch

    seen = []

    def load(item):
        seen.append((item, threading.current_thread().name))
        if item == "bad":
            raise ImageLoadError("corrupt", item)
        return item.upper()

    items = ["a", "b", "bad", "c"]
    got = []
    with Prefetch(items, load) as ahead:
        for it in items:
            try:
                got.append(ahead(it))
            except ImageLoadError as exc:
                got.append(f"error {exc}")
    assert got == ["A", "B", "error bad: corrupt", "C"]
    assert sorted(i for i, _ in seen) == sorted(items)  # each loaded once
    assert [t.startswith("coupon-prefetch") for i, t in seen if i != "a"] == [True] * 3  # all but the first ahead


def test_a_frame_whose_ph_map_cannot_be_written_is_a_failed_frame(tmp_path, runner):
    """The pH TIFF is written with the frame's row: if it fails, that frame fails (and the rest go on)."""
    spec = dataclasses.replace(SMALL, n_frames=3)
    paths, _ = write_series(tmp_path / "f", spec)
    prof = write_profile(tmp_path / "p.json", spec.px_per_mm)
    blocked = tmp_path / "out" / "frames" / f"{paths[1].stem}_ph.tiff"
    blocked.mkdir(parents=True)  # a folder where the TIFF should go
    res = invoke(runner, ["droplet", tmp_path / "f", "--profile", prof, "--out", tmp_path / "out"])
    assert res.exit_code == 1 and "Traceback" not in res.output
    table = pd.read_csv(tmp_path / "out" / "droplet.csv").set_index("file")
    assert table.loc[str(paths[1]), "status"] != "ok"
    assert (table.drop(index=str(paths[1]))["status"] == "ok").all()
    summary = json.loads((tmp_path / "out" / "droplet_summary.json").read_text())
    assert summary["frames_failed"] == 1
