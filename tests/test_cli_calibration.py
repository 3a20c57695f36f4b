"""The calibration and phmap commands end to end, including every bad-input path."""

from __future__ import annotations

import json

import cv2
import numpy as np
import pytest

from coupon import __version__
from coupon.calibrate.profile import load_profile
from coupon.synth.indicator import buffer_strip_scene, patch_chart_scene
from coupon.synth.target import target_scene
from tests.conftest import invoke, write_rgb

BUFFERS = "3,4,5,6,7,8,9,10,11"


@pytest.fixture(scope="module")
def scenes(tmp_path_factory):
    d = tmp_path_factory.mktemp("scenes")
    img, truth = target_scene(seed=3, tilt_x_deg=15, tilt_y_deg=10, px_per_mm=10.0, cast=(1.08, 1.0, 0.88))
    chart, table = patch_chart_scene(seed=4)
    buffers, _ = buffer_strip_scene([3, 4, 5, 6, 7, 8, 9, 10, 11], seed=5)
    drops, dtruth = buffer_strip_scene([4.5, 7.5, 9.5], seed=6, per_row=3)
    table.to_csv(d / "patches.csv", index=False)
    return {
        "target": write_rgb(d / "target.jpg", img), "truth": truth,
        "chart": write_rgb(d / "chart.png", chart), "patches": d / "patches.csv",
        "buffers": write_rgb(d / "buffers.jpg", buffers), "drops": write_rgb(d / "drops_t010min.jpg", drops),
        "dir": d,
    }


@pytest.fixture
def bad_files(tmp_path):
    rng = np.random.default_rng(0)
    good = tmp_path / "good.jpg"
    cv2.imwrite(str(good), (rng.random((120, 160, 3)) * 255).astype(np.uint8))
    files = {}
    files["empty"] = tmp_path / "empty.jpg"
    files["empty"].write_bytes(b"")
    files["truncated"] = tmp_path / "truncated.jpg"
    files["truncated"].write_bytes(good.read_bytes()[:900])
    files["text"] = tmp_path / "notes.jpg"
    files["text"].write_text("not a picture")
    files["missing"] = tmp_path / "missing.jpg"
    from tests.test_images import _png_header_only

    files["huge"] = tmp_path / "huge.png"
    _png_header_only(files["huge"], 60_000, 60_000)  # 3600 megapixels claimed
    return files


def _one_line_error(result, *words):
    assert result.exit_code == 1, result.output
    assert "Traceback" not in result.output
    lines = [ln for ln in result.output.splitlines() if ln.startswith("error:")]
    assert lines, result.output
    for w in words:
        assert w in result.output
    return lines


def test_version_and_help(runner):
    r = invoke(runner, ["--version"])
    assert r.exit_code == 0 and __version__ in r.output
    r = invoke(runner, ["--help"])
    assert r.exit_code == 0
    for cmd in ("calibrate", "phmap", "demo"):
        assert cmd in r.output
    r = invoke(runner, ["calibrate", "scale", "--help"])
    assert r.exit_code == 0 and "--checker" in r.output and "--square-mm" in r.output


def test_calibrate_scale_three_public_forms(runner, scenes, tmp_path):
    prof = tmp_path / "p.json"
    r = invoke(runner, ["calibrate", "scale", scenes["target"], "--checker", "9x7", "--square-mm", "5",
                        "--profile", prof])
    assert r.exit_code == 0, r.output
    p = load_profile(prof)
    assert p.scale.method == "checkerboard"
    assert p.scale.px_per_mm == pytest.approx(scenes["truth"]["px_per_mm"], rel=0.005)
    assert p.history[-1]["files"][0]["sha256"] and p.history[-1]["step"] == "scale"

    r = invoke(runner, ["calibrate", "scale", scenes["target"], "--px-per-mm", "12.5", "--profile", prof])
    assert r.exit_code == 0 and load_profile(prof).scale.px_per_mm == 12.5

    r = invoke(runner, ["calibrate", "scale", scenes["target"], "--points", "100,100,400,500", "--distance-mm", "50",
                        "--profile", prof])
    assert r.exit_code == 0 and load_profile(prof).scale.px_per_mm == pytest.approx(10.0)
    assert len(load_profile(prof).history) == 3


def test_calibrate_scale_usage_errors_exit_2(runner, scenes, tmp_path):
    prof = tmp_path / "p.json"
    r = invoke(runner, ["calibrate", "scale", scenes["target"], "--profile", prof])
    assert r.exit_code == 2 and "exactly one of" in r.output
    r = invoke(runner, ["calibrate", "scale", scenes["target"], "--checker", "9x7", "--profile", prof])
    assert r.exit_code == 2 and "--square-mm" in r.output
    r = invoke(runner, ["calibrate", "scale", scenes["target"], "--checker", "nine", "--square-mm", "5",
                        "--profile", prof])
    assert r.exit_code == 2 and "WxH" in r.output
    r = invoke(runner, ["calibrate", "scale", scenes["target"], "--points", "1,2,3", "--distance-mm", "5",
                        "--profile", prof])
    assert r.exit_code == 2 and "expected 4 numbers" in r.output
    assert not prof.exists()


def test_calibrate_scale_no_board_found(runner, scenes, tmp_path):
    r = invoke(runner, ["calibrate", "scale", scenes["chart"], "--checker", "9x7", "--square-mm", "5",
                        "--profile", tmp_path / "p.json"])
    _one_line_error(r, "no 9x7-square checkerboard found")
    assert not (tmp_path / "p.json").exists()


def test_calibrate_colour_and_indicator_then_phmap(runner, scenes, tmp_path, monkeypatch):
    prof = tmp_path / "p.json"
    r = invoke(runner, ["calibrate", "colour", scenes["chart"], "--patches", scenes["patches"], "--profile", prof])
    assert r.exit_code == 0, r.output
    assert "residual CIEDE2000" in r.output and load_profile(prof).colour.mean_de00 < 2
    r = invoke(runner, ["calibrate", "indicator", scenes["buffers"], "--ph", BUFFERS, "--profile", prof])
    assert r.exit_code == 0, r.output
    p = load_profile(prof)
    assert list(p.indicator.ph) == [3, 4, 5, 6, 7, 8, 9, 10, 11] and p.colour is not None
    r = invoke(runner, ["calibrate", "show", prof])
    assert r.exit_code == 0 and "indicator" in r.output and "9 points" in r.output

    out = tmp_path / "out"
    r = invoke(runner, ["phmap", scenes["drops"], "--profile", prof, "--out", out])
    assert r.exit_code == 0, r.output
    assert "median pH" in r.output
    stem = scenes["drops"].stem
    tiff = cv2.imread(str(out / f"{stem}_ph.tiff"), cv2.IMREAD_UNCHANGED)
    assert tiff.dtype == np.float32 and tiff.shape == cv2.imread(str(scenes["drops"])).shape[:2]
    assert np.isnan(tiff).any() and np.isfinite(tiff).any()
    vals = tiff[np.isfinite(tiff)]
    # the three drops (pH 4.5, 7.5, 9.5) dominate the valid pixels
    for ph in (4.5, 7.5, 9.5):
        assert (np.abs(vals - ph) < 0.4).mean() > 0.15
    assert (out / f"{stem}_ph.png").stat().st_size > 1000
    summary = (out / "phmap.csv").read_text()
    assert "ph_median" in summary and "ok" in summary

    # rerun resumes: nothing redone, no duplicate row
    r = invoke(runner, ["phmap", scenes["drops"], "--profile", prof, "--out", out])
    assert r.exit_code == 0 and "already mapped" in r.output
    assert (out / "phmap.csv").read_text().count(stem) == summary.count(stem)
    # and with the path typed relative to its folder
    monkeypatch.chdir(scenes["drops"].parent)
    r = invoke(runner, ["phmap", scenes["drops"].name, "--profile", prof, "--out", out])
    assert r.exit_code == 0 and "already mapped" in r.output, r.output
    assert (out / "phmap.csv").read_text().count(stem) == summary.count(stem)
    monkeypatch.undo()


def test_phmap_without_indicator_warns_and_uses_generic_table(runner, scenes, tmp_path):
    prof = tmp_path / "p.json"
    assert invoke(runner, ["calibrate", "scale", "--px-per-mm", "10", "--profile", prof]).exit_code == 0
    r = invoke(runner, ["phmap", scenes["drops"], "--profile", prof, "--out", tmp_path / "o"])
    assert r.exit_code == 0, r.output
    assert "warning: no buffer calibration" in r.output


def test_calibrate_indicator_bad_buffer_sets(runner, scenes, tmp_path):
    prof = tmp_path / "p.json"
    r = invoke(runner, ["calibrate", "indicator", scenes["buffers"], "--ph", "3,4,5", "--profile", prof])
    _one_line_error(r, "found", "3 pH values")
    r = invoke(runner, ["calibrate", "indicator", scenes["buffers"], "--ph", "3,4,5,10,7,8,9,6,11", "--profile", prof])
    _one_line_error(r, "not monotone")
    t = tmp_path / "two.csv"
    t.write_text("ph,R,G,B\n4,240,90,30\n9,40,110,190\n")
    r = invoke(runner, ["calibrate", "indicator", "--table", t, "--profile", prof])
    _one_line_error(r, "at least 3 buffers")
    assert not prof.exists()


def test_calibrate_indicator_from_table(runner, tmp_path):
    prof = tmp_path / "p.json"
    t = tmp_path / "chart.csv"
    t.write_text("# our own chart\nph,R,G,B\n4,235,90,30\n7,110,180,60\n10,55,60,165\n")
    r = invoke(runner, ["calibrate", "indicator", "--table", t, "--profile", prof])
    assert r.exit_code == 0, r.output
    assert load_profile(prof).indicator.details["comments"] == ["our own chart"]


@pytest.mark.parametrize("kind", ["empty", "truncated", "text", "missing", "huge"])
@pytest.mark.parametrize("command", ["scale", "colour", "indicator"])
def test_bad_images_in_every_calibrate_command(runner, bad_files, tmp_path, kind, command, scenes):
    f = bad_files[kind]
    prof = tmp_path / "p.json"
    args = {
        "scale": ["calibrate", "scale", f, "--checker", "9x7", "--square-mm", "5", "--profile", prof],
        "colour": ["calibrate", "colour", f, "--patches", scenes["patches"], "--profile", prof],
        "indicator": ["calibrate", "indicator", f, "--ph", BUFFERS, "--profile", prof],
    }[command]
    r = invoke(runner, args)
    lines = _one_line_error(r, str(f))
    assert len(lines) == 1
    assert not prof.exists()


def test_phmap_batch_goes_on_after_bad_files(runner, bad_files, scenes, tmp_path):
    prof = tmp_path / "p.json"
    assert invoke(runner, ["calibrate", "indicator", scenes["buffers"], "--ph", BUFFERS, "--profile", prof]).exit_code == 0
    out = tmp_path / "out"
    files = [bad_files["empty"], scenes["drops"], bad_files["text"], bad_files["truncated"]]
    r = invoke(runner, ["phmap", *files, "--profile", prof, "--out", out])
    assert r.exit_code == 1
    assert "Traceback" not in r.output
    assert "median pH" in r.output  # the good one was mapped
    assert (out / f"{scenes['drops'].stem}_ph.tiff").exists()
    import pandas as pd

    table = pd.read_csv(out / "phmap.csv")
    assert len(table) == 4
    assert (table["status"] == "ok").sum() == 1
    assert table.loc[table["image"] == str(bad_files["truncated"]), "status"].str.contains("truncated").all()


@pytest.mark.parametrize("text,match", [("{oops", "not valid JSON"), ('{"schema": "x"}', "not a coupon profile")])
def test_malformed_profile_on_the_command_line(runner, scenes, tmp_path, text, match):
    prof = tmp_path / "p.json"
    prof.write_text(text)
    for args in (["calibrate", "show", prof], ["phmap", scenes["drops"], "--profile", prof, "--out", tmp_path / "o"],
                 ["calibrate", "scale", "--px-per-mm", "3", "--profile", prof]):
        r = invoke(runner, args)
        _one_line_error(r, match)
    assert prof.read_text() == text  # never overwritten


def test_debug_shows_the_traceback(runner, bad_files, tmp_path):
    r = invoke(runner, ["--debug", "calibrate", "scale", bad_files["text"], "--checker", "9x7", "--square-mm", "5",
                        "--profile", tmp_path / "p.json"])
    assert r.exit_code == 1 and "Traceback" in r.output


def test_calibrate_target_writes_true_scale_png_and_pdf(runner, tmp_path):
    r = invoke(runner, ["calibrate", "target", tmp_path / "sheet", "--dpi", "300"])
    assert r.exit_code == 0, r.output
    pdf, png = tmp_path / "sheet.pdf", tmp_path / "sheet.png"
    assert pdf.read_bytes().startswith(b"%PDF")
    from PIL import Image

    from coupon.calibrate.target import TargetLayout

    w_mm, h_mm = TargetLayout().sheet_size_mm
    with Image.open(png) as im:
        dpi = im.info["dpi"]
        assert dpi[0] == pytest.approx(300, abs=0.5)
        assert im.size[0] == pytest.approx(w_mm / 25.4 * 300, abs=1.5)
    # the PDF's page is the sheet at true size (1 pt = 1/72 in)
    import re

    box = re.search(rb"/MediaBox \[ *0 0 ([\d.]+) ([\d.]+) *\]", pdf.read_bytes())
    assert float(box.group(1)) == pytest.approx(w_mm / 25.4 * 72, abs=0.5)
    assert float(box.group(2)) == pytest.approx(h_mm / 25.4 * 72, abs=0.5)
    # and our own scale command reads the printed PNG at its dpi: 300 / 25.4 px per mm
    prof = tmp_path / "p.json"
    r = invoke(runner, ["calibrate", "scale", png, "--checker", "9x7", "--square-mm", "5", "--profile", prof])
    assert r.exit_code == 0, r.output
    assert load_profile(prof).scale.px_per_mm == pytest.approx(300 / 25.4, rel=0.005)
    # white balance from the printed target's grey patch
    r = invoke(runner, ["calibrate", "colour", png, "--target", "--profile", prof])
    assert r.exit_code == 0, r.output
    np.testing.assert_allclose(load_profile(prof).colour.gains, 1.0, atol=0.02)


def test_calibrate_target_rejects_even_boards(runner, tmp_path):
    r = invoke(runner, ["calibrate", "target", tmp_path / "s", "--checker", "8x6"])
    assert r.exit_code == 2 and "odd" in r.output


def test_shipped_target_is_current(tmp_path):
    """calibration/targets holds a copy made by the command (same geometry)."""
    from coupon.calibrate.shipped import calibration_dir

    shipped = calibration_dir() / "targets" / "coupon_target_9x7_5mm.png"
    assert shipped.exists()
    from coupon.calibrate.scale import scale_from_checkerboard
    from coupon.io.images import load_image

    img = load_image(shipped)
    sc = scale_from_checkerboard(img.rgb, (9, 7), 5.0)
    assert sc.px_per_mm == pytest.approx(600 / 25.4, rel=0.005)
    meta = json.loads((calibration_dir() / "targets" / "README.json").read_text())
    assert meta["squares"] == [9, 7] and meta["square_mm"] == 5.0


def test_patch_table_with_a_text_cell_names_line_and_column(runner, scenes, tmp_path):
    bad = tmp_path / "patches.csv"
    lines = scenes["patches"].read_text().splitlines()
    head = lines[0].split(",")
    row = lines[2].split(",")
    row[head.index("L")] = "abc"
    bad.write_text("\n".join([lines[0], lines[1], ",".join(row), *lines[3:]]) + "\n")
    r = invoke(runner, ["calibrate", "colour", scenes["chart"], "--patches", bad, "--profile", tmp_path / "p.json"])
    _one_line_error(r, "line 3, column L is not a number", str(bad))


def test_indicator_table_that_is_not_text(runner, tmp_path):
    t = tmp_path / "chart.csv"
    t.write_bytes(b"\xff\xfe\x00\x81\x92 binary")
    r = invoke(runner, ["calibrate", "indicator", "--table", t, "--profile", tmp_path / "p.json"])
    _one_line_error(r, "not a text CSV")
    t.write_text("ph,R,G,B\n4,235,90,30\nseven,110,180,60\n10,55,60,165\n")
    r = invoke(runner, ["calibrate", "indicator", "--table", t, "--profile", tmp_path / "p.json"])
    _one_line_error(r, "line 3, column ph is not a number")


def test_phmap_redoes_a_damaged_summary_with_a_warning(runner, scenes, tmp_path):
    prof = tmp_path / "p.json"
    assert invoke(runner, ["calibrate", "indicator", scenes["buffers"], "--ph", BUFFERS, "--profile", prof]).exit_code == 0
    out = tmp_path / "out"
    out.mkdir()
    (out / "phmap.csv").write_text("")  # e.g. truncated by a full disk
    r = invoke(runner, ["phmap", scenes["drops"], "--profile", prof, "--out", out])
    assert r.exit_code == 0, r.output
    assert "warning:" in r.output and "cannot be read back" in r.output
    assert "ph_median" in (out / "phmap.csv").read_text()


def test_resume_ledger_is_written_at_the_end_and_every_few_seconds(tmp_path, monkeypatch):
    from coupon.io.batch import ResumeLedger

    led = ResumeLedger(tmp_path, "x")
    monkeypatch.setattr(ResumeLedger, "FLUSH_EVERY_S", 3600.0)
    led.record(tmp_path / "a.jpg", "ab", "s1", [])
    assert not led.path.exists()  # not rewritten after every item
    led.flush()
    again = ResumeLedger(tmp_path, "x")
    assert again.is_done(tmp_path / "a.jpg", "ab", "s1") and not again.is_done(tmp_path / "a.jpg", "ab", "s2")
    monkeypatch.setattr(ResumeLedger, "FLUSH_EVERY_S", 0.0)
    led.record(tmp_path / "b.jpg", "cd", "s1", [])
    assert ResumeLedger(tmp_path, "x").is_done(tmp_path / "b.jpg", "cd", "s1")  # written when due


def test_commands_are_imported_when_asked_for():
    """Every listed command loads; a job's command imports its own modules only (start-up time)."""
    import subprocess
    import sys

    import click

    from coupon.cli.main import COMMANDS, cli

    ctx = click.Context(cli)
    assert cli.list_commands(ctx) == sorted({attr for _, attr in COMMANDS})
    from coupon.cli.main import SUMMARIES

    # 'coupon --help' lists the commands from SUMMARIES without importing them: the same lines as theirs
    listing = cli.get_help(ctx)
    for _, attr in COMMANDS:
        cmd = cli.get_command(ctx, attr)
        assert cmd.name == attr
        assert SUMMARIES[attr] == cmd.get_short_help_str(limit=1000), attr
    assert cli.get_help(ctx) == listing  # with every command imported, the same help
    assert all(f"  {attr} " in listing for _, attr in COMMANDS)
    code = ("import sys\nfrom coupon.cli.main import cli\ntry:\n    cli(['pits', '--help'], standalone_mode=False)\n"
            "except SystemExit:\n    pass\nprint(sorted(m for m in ('coupon.cli.panels', 'coupon.cli.droplet', "
            "'coupon.cli.report', 'matplotlib') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip().splitlines()[-1] == "[]"
    code = code.replace("['pits', '--help']", "['--help']")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip().splitlines()[-1] == "[]" and "Commands:" in out
