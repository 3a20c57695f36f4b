"""``coupon panels`` end to end: outputs, identities, exposure times, bad input, resume."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from coupon.cli.panels import PANEL_COLUMNS, hours_from_name
from coupon.synth.panels import PanelSpec, TraySettings, tray_scene
from tests.conftest import invoke, write_rgb

SMALL = TraySettings(image_wh=(1400, 1200), cols=2, tilt_x_deg=8, tilt_y_deg=-5)
SPECS = [PanelSpec("white", ("general",), qr_text="BW-2-C"), PanelSpec("grey", ("spots",), scribe="line", creep_mm=1.5)]


@pytest.fixture(scope="module")
def tray_file(tmp_path_factory):
    d = tmp_path_factory.mktemp("trays")
    img, truth = tray_scene(SPECS, seed=21, settings=SMALL)
    return write_rgb(d / "rack2_0240h.jpg", img), truth


def test_hours_from_file_name():
    from pathlib import Path

    assert hours_from_name(Path("rack2_0240h.jpg")) == 240.0
    assert hours_from_name(Path("tray_168h_b.png")) == 168.0
    assert hours_from_name(Path("rack2.jpg")) is None


@pytest.mark.slow
def test_end_to_end_outputs(runner, tray_file, tmp_path):
    path, truth = tray_file
    layout = tmp_path / "layout.csv"
    layout.write_text("row,col,panel_id,system,replicate\n1,1,X-1,BW-9,1\n1,2,BW-1-B,BW-1,2\n")
    res = invoke(runner, ["panels", path, "--out", tmp_path / "out", "--layout", layout])
    assert res.exit_code == 0, res.output
    table = pd.read_csv(tmp_path / "out" / "panels.csv", dtype={"panel_id": str})
    assert list(table.columns) == PANEL_COLUMNS
    assert len(table) == 2
    assert (table["status"] == "ok").all()
    # QR overrides the layout (the slot's system stays, and a warning names the disagreement); the layout
    # names the other panel
    assert table["panel_id"].tolist() == ["BW-2-C", "BW-1-B"]
    assert "QR code BW-2-C is not in the layout, which names X-1 at R1C1" in res.output
    assert table["id_source"].tolist() == ["qr", "layout"]
    assert table["system"].fillna("").tolist() == ["BW-9", "BW-1"]
    assert (table["exposure_h"] == 240).all()
    assert table["scribe_found"].tolist() == [False, True]
    centre = truth["panels"][1]["centre_img_xy"]
    assert abs(table.loc[1, "x_px"] - centre[0]) < 2 and abs(table.loc[1, "y_px"] - centre[1]) < 2
    # the panel's resolution in the photo: the painted quadrilateral's shoelace area over the nominal area
    for i in (0, 1):
        x, y = np.asarray(truth["panels"][i]["corners_img_xy"], float).T
        area = 0.5 * abs(np.dot(x, np.roll(y, -1)) - np.dot(y, np.roll(x, -1)))
        assert table.loc[i, "photo_px_per_mm"] == pytest.approx(np.sqrt(area / (75 * 150)), rel=0.01)
    # written by OpenCV's JPEG encoder with its default 4:2:0 chroma: said once, with what to do
    assert (table["chroma_subsampling"] == "4:2:0").all()
    assert res.output.count("chroma subsampling") == 1 and "save 4:4:4 JPEG, TIFF or PNG" in res.output
    js = json.loads((tmp_path / "out" / "panels" / "rack2_0240h_BW-1-B.json").read_text())
    assert js["coupon_version"] and "settings" in js and "profile_sha256" in js
    assert len(js["creep_stations"]) > 50
    # the corridor reaches past the widest zone seen at any station, on each side (plus its 1 mm margin)
    (reach_neg, reach_pos), = js["scribe_corridor_mm"]
    assert reach_neg >= max(-x["left_edge_mm"] for x in js["creep_stations"]) + 1.0 - 1e-3  # rounded to 0.001
    assert reach_pos >= max(x["right_edge_mm"] for x in js["creep_stations"]) + 1.0 - 1e-3
    assert (tmp_path / "out" / "overlays" / "rack2_0240h_BW-1-B.png").exists()
    # resume: a second run skips the image; --force redoes it
    res2 = invoke(runner, ["panels", path, "--out", tmp_path / "out", "--layout", layout])
    assert "already rated" in res2.output and res2.exit_code == 0
    res3 = invoke(runner, ["panels", path, "--out", tmp_path / "out", "--layout", layout, "--force", "--hours", "96"])
    assert "already rated" not in res3.output and res3.exit_code == 0, res3.output
    # the manifest beats --hours
    man = tmp_path / "m.csv"
    man.write_text(f"image,exposure_h\n{path.name},504\n")
    res4 = invoke(runner, ["panels", path, "--out", tmp_path / "out", "--manifest", man, "--hours", "96", "--no-qr"])
    assert res4.exit_code == 0, res4.output
    t2 = pd.read_csv(tmp_path / "out" / "panels.csv")
    assert (t2["exposure_h"] == 504).all()
    assert t2["panel_id"].tolist() == ["R1C1", "R1C2"]
    # the IDs changed (no layout, no QR): the files of the old IDs are gone, one JSON and overlay per panel
    assert sorted(p.name for p in (tmp_path / "out" / "panels").glob("*.json")) == \
        ["rack2_0240h_R1C1.json", "rack2_0240h_R1C2.json"]
    assert sorted(p.name for p in (tmp_path / "out" / "overlays").glob("*.png")) == \
        ["rack2_0240h_R1C1.png", "rack2_0240h_R1C2.png"]
    # the next inspection's photo added to the manifest: this image keeps its time, so it is not redone
    man.write_text(f"image,exposure_h\n{path.name},504\nrack2_0672h.jpg,672\n")
    res5 = invoke(runner, ["panels", path, "--out", tmp_path / "out", "--manifest", man, "--no-qr"])
    assert res5.exit_code == 0 and "already rated" in res5.output, res5.output


# a position named twice; a panel_id named twice (two positions with one ID would write one overlay and one
# JSON for two panels)
@pytest.mark.parametrize("text, message", [
    ("row,col,panel_id\n1,1,A\n1,2,B\n1,1,C\n", "position row 1, col 1 is named twice (lines 2 and 4)"),
    ("row,col,panel_id\n1,1,C-01\n1,2,C-02\n2,1,C-01\n", "panel_id 'C-01' is named twice (lines 2 and 4)"),
])
def test_layout_naming_a_position_or_a_panel_id_twice(runner, tmp_path, text, message):
    layout = tmp_path / "layout.csv"
    layout.write_text(text)
    img = tmp_path / "a.png"
    img.write_bytes(b"")
    res = invoke(runner, ["panels", img, "--out", tmp_path / "out", "--layout", layout])
    assert res.exit_code == 2 and message in res.output


@pytest.mark.slow
def test_bad_inputs_in_a_batch(runner, tray_file, tmp_path):
    good, _ = tray_file
    broken = tmp_path / "broken.jpg"
    broken.write_bytes(b"\xff\xd8\xff\xe0 not really a jpeg")
    empty = write_rgb(tmp_path / "empty_tray.png", np.full((400, 500, 3), 0.3, np.float32))
    img, _ = tray_scene([PanelSpec("white", ("general",))], seed=5,
                        settings=TraySettings(image_wh=(600, 700), cols=1, shift_mm=(-110, 0)))
    cut = write_rgb(tmp_path / "cut_off.jpg", img)
    res = invoke(runner, ["panels", broken, good, empty, cut, "--out", tmp_path / "out"])
    assert res.exit_code == 1
    table = pd.read_csv(tmp_path / "out" / "panels.csv")
    status = dict(zip(table["image"].map(lambda s: s.split("/")[-1]), table["status"]))
    assert "broken.jpg" in res.output and "Traceback" not in res.output
    assert status["empty_tray.png"].endswith("no panel found: nothing stands out from the tray; check that the "
                                             "panels are in the frame and differ in colour from the tray")
    assert status["cut_off.jpg"].startswith("panel partly outside the frame (touches the left edge)")
    assert (table[table["image"] == str(good)]["status"] == "ok").all()
    assert len(table[table["image"] == str(good)]) == 2


@pytest.mark.slow
def test_wrong_panel_size(runner, tray_file, tmp_path):
    good, _ = tray_file
    res = invoke(runner, ["panels", good, "--out", tmp_path / "out", "--panel-size", "100x100"])
    assert res.exit_code == 1
    table = pd.read_csv(tmp_path / "out" / "panels.csv")
    assert table["status"].str.contains("panel sides are in ratio 1.9|panel sides are in ratio 2.0").all()


def test_bad_mask_option(runner, tmp_path):
    res = invoke(runner, ["panels", tmp_path / "x.jpg", "--out", tmp_path / "o", "--mask", "1,2"])
    assert res.exit_code == 2
    assert "give 4 numbers (x,y,w,h) for a rectangle or 3 (x,y,d) for a hole" in res.output


def test_layout_and_manifest_that_cannot_be_read(runner, tray_file, tmp_path):
    path, _ = tray_file
    layout = tmp_path / "layout.csv"
    layout.write_bytes(b"\xff\xfe\x00r\x00o\x00w\x81")
    res = invoke(runner, ["panels", path, "--out", tmp_path / "out", "--layout", layout])
    assert res.exit_code == 2 and "UTF-8" in res.output and "Traceback" not in res.output
    man = tmp_path / "m.csv"
    man.write_text(f"image,exposure_h\n{path.name},two hundred\n")
    res = invoke(runner, ["panels", path, "--out", tmp_path / "out", "--manifest", man])
    assert res.exit_code == 2 and "line 2, column exposure_h is not a number" in res.output


def test_qr_precheck_counts_finder_patterns():
    import cv2

    from coupon.segment.panels.detect import find_panels, qr_finder_count

    # reference: a code drawn by OpenCV's QRCodeEncoder has three finder patterns (ISO/IEC 18004 layout)
    code = cv2.resize(cv2.QRCodeEncoder.create().encode("BW-2-C"), None, fx=3, fy=3,
                      interpolation=cv2.INTER_NEAREST)
    page = np.full((400, 300), 170, np.uint8)
    page[40:40 + code.shape[0], 30:30 + code.shape[1]] = code
    assert qr_finder_count(page) == 3
    # a rusted, scribed panel with camera noise and JPEG but no code: the decoder is skipped
    img, _ = tray_scene([PanelSpec("dark", ("general", "spots"), scribe="x", creep_mm=2.0)], seed=5,
                        settings=TraySettings(image_wh=(600, 800), cols=1))
    c = find_panels(img)[0].corners_xy
    x0, y0 = np.floor(c.min(axis=0)).astype(int)
    x1, y1 = np.ceil(c.max(axis=0)).astype(int)
    grey = cv2.cvtColor(np.ascontiguousarray(img[y0:y1, x0:x1]), cv2.COLOR_RGB2GRAY)
    assert qr_finder_count(np.clip(np.rint(grey * 255), 0, 255).astype(np.uint8)) == 0


def test_panel_threads_give_the_rows_of_one_thread(tray_file, tmp_path, monkeypatch):
    # the panels of a photo are rated side by side (panel_threads); the reference is the same photo
    # rated one panel after the other: the same rows in tray order, the same overlays and JSON
    from pathlib import Path

    import cv2

    import coupon.cli.panels as cli
    from coupon.segment.panels import PanelSettings

    path, _ = tray_file
    out = {}
    for n in (1, 2):
        monkeypatch.setattr(cli, "panel_threads", lambda n=n: n)
        out[n] = cli.rate_image(path, PanelSettings(), None, tmp_path / f"t{n}")
    assert [r["position"] for r in out[2]] == [r["position"] for r in out[1]] == ["R1C1", "R1C2"]
    for a, b in zip(out[1], out[2]):
        for k in PANEL_COLUMNS:
            if k in ("overlay", "json"):
                assert str(b[k]).replace("t2", "t1") == str(a[k])
                continue
            assert (a[k] == b[k]) or (pd.isna(a[k]) and pd.isna(b[k])), k
        np.testing.assert_array_equal(cv2.imread(b["overlay"]), cv2.imread(a["overlay"]))
        ja, jb = (json.loads(Path(r["json"]).read_text()) for r in (a, b))
        assert {k: v for k, v in jb.items() if k not in ("overlay", "json")} == \
               {k: v for k, v in ja.items() if k not in ("overlay", "json")}


@pytest.mark.slow
def test_one_worker_and_two_workers_give_the_same_panels(runner, tray_file, tmp_path):
    # --workers 2 rates the photos in a pool of two processes (forked from a server that built
    # OpenCV's tables first, coupon.io.pool_preload); the table must equal the in-process one
    import shutil

    path, _ = tray_file
    photos = [shutil.copy(path, tmp_path / f"rack{k}_0240h.jpg") for k in range(3)]
    tables = []
    for workers in (1, 2):
        r = invoke(runner, ["panels", *photos, "--out", tmp_path / f"o{workers}", "--workers", workers])
        assert r.exit_code == 0, r.output
        t = pd.read_csv(tmp_path / f"o{workers}" / "panels.csv", dtype={"panel_id": str})
        tables.append(t.drop(columns=["overlay", "json"]))
    assert len(tables[0]) == 6 and (tables[0]["status"] == "ok").all()
    pd.testing.assert_frame_equal(tables[0], tables[1])


def test_limit_warnings_name_the_lowest_resolution_the_chroma_and_dark_coatings():
    from coupon.cli.panels import limit_warnings

    rows = [{"image": "a/t1.jpg", "position": "R1C1", "photo_px_per_mm": 7.2, "chroma_subsampling": "4:4:4"},
            {"image": "a/t2.jpg", "position": "R1C1", "photo_px_per_mm": 3.1, "chroma_subsampling": "4:2:0"},
            {"image": "a/t2.jpg", "position": "R1C2", "photo_px_per_mm": 3.3, "chroma_subsampling": "4:2:0",
             "coating_darker_than_rust": True},
            {"image": "a/t3.png", "position": "R1C1", "photo_px_per_mm": float("nan"), "chroma_subsampling": ""}]
    low, chroma, dark = limit_warnings(rows)
    assert low.startswith("1 photo(s) show panels at under 4 px/mm (lowest 3.1 px/mm, t2.jpg)")
    assert chroma.startswith("1 photo(s) are JPEGs with 4:2:0 chroma subsampling")
    assert dark.startswith("1 panel(s) on dark coatings, darker than the rust colours (t2.jpg R1C2)")
    assert limit_warnings(rows[:1] + rows[3:]) == []  # 4:4:4 at 7.2 px/mm and a PNG: nothing to say


def test_manifest_refuses_negative_and_conflicting_hours(runner, tmp_path):
    img = tmp_path / "a.png"
    img.write_bytes(b"")
    man = tmp_path / "m.csv"
    man.write_text("image,exposure_h\na.png,-3\n")
    res = invoke(runner, ["panels", img, "--out", tmp_path / "out", "--manifest", man])
    assert res.exit_code == 2 and "line 2: exposure_h of a.png is -3" in res.output
    man.write_text("image,exposure_h\na.png,168\nb.png,5\na.png,336\n")
    res = invoke(runner, ["panels", img, "--out", tmp_path / "out", "--manifest", man])
    assert res.exit_code == 2 and "line 4: a.png is listed again with another exposure_h (168 and 336 h)" in res.output
    man.write_text("image,exposure_h\nday1/a.png,168\nday1\\a.png,336\n")  # the same file, typed two ways
    res = invoke(runner, ["panels", img, "--out", tmp_path / "out", "--manifest", man])
    assert res.exit_code == 2 and "line 3: day1/a.png is listed again (as day1/a.png)" in res.output


def test_manifest_entries_with_folders_and_windows_separators(tmp_path, monkeypatch):
    from pathlib import Path

    from coupon.cli.panels import read_manifest

    for d in ("day1", "day2"):
        (tmp_path / d).mkdir()
    man = tmp_path / "m.csv"
    man.write_text("image,exposure_h\nday1/tray.jpg,168\nday2\\tray.jpg,336\n"
                   "C:\\lab\\photos\\rack3_final.jpg,1000\nother.jpg,48\n")
    m = read_manifest(man)
    monkeypatch.chdir(tmp_path / "day2")  # entries are relative to the manifest's folder, not the working one
    # one file name in two folders: each folder's own time, never the other's
    assert m.hours_for(Path("../day1/tray.jpg")) == 168 and m.hours_for(Path("tray.jpg")) == 336
    assert m.hours_for(tmp_path / "elsewhere" / "tray.jpg") is None  # tray.jpg alone is ambiguous
    # a Windows path from the computer that wrote the manifest: matched by its file name
    assert m.hours_for(tmp_path / "rack3_final.jpg") == 1000
    assert m.hours_for(tmp_path / "x" / "other.jpg") == 48  # a bare name matches in any folder
    # a folder entry that is a file here matches that file only: another folder's photo of that name is
    # another photo (its time comes from --hours or its file name)
    (tmp_path / "day1" / "only.jpg").write_bytes(b"")
    man.write_text("image,exposure_h\nday1/only.jpg,168\n")
    m = read_manifest(man)
    assert m.hours_for(tmp_path / "day1" / "only.jpg") == 168 and m.hours_for(tmp_path / "day2" / "only.jpg") is None


def test_empty_folder_and_an_edge_band_that_leaves_nothing(runner, tmp_path):
    (tmp_path / "empty").mkdir()
    res = invoke(runner, ["panels", tmp_path / "empty", "--out", tmp_path / "out"])
    assert res.exit_code == 2 and "no image files in" in res.output and ".jpg" in res.output
    res = invoke(runner, ["panels", tmp_path / "x.jpg", "--out", tmp_path / "out", "--edge-mm", "40"])
    assert res.exit_code == 2 and "leaves nothing of a 75x150 mm panel to rate; give less than 37.5 mm" in res.output


@pytest.mark.slow
def test_same_file_name_in_two_folders_and_a_path_typed_another_way(runner, tray_file, tmp_path, monkeypatch):
    import shutil
    from pathlib import Path

    path, _ = tray_file
    for d in ("dayA", "dayB"):
        (tmp_path / d).mkdir()
    shutil.copy(path, tmp_path / "dayA" / "tray_0168h.jpg")
    # another photo under the same name: a different file (one byte of JPEG comment changes its hash)
    data = path.read_bytes()
    (tmp_path / "dayB" / "tray_0168h.jpg").write_bytes(data[:2] + b"\xff\xfe\x00\x03B" + data[2:])
    out = tmp_path / "out"
    # every path relative to the working folder, as a lab types them
    monkeypatch.chdir(tmp_path)
    res = invoke(runner, ["panels", "dayA/tray_0168h.jpg", "dayB/tray_0168h.jpg", "--out", "out"])
    assert res.exit_code == 0, res.output
    table = pd.read_csv(out / "panels.csv")
    assert len(table) == 4 and table["json"].nunique() == 4 and table["overlay"].nunique() == 4
    for _, r in table.iterrows():  # each JSON belongs to its own image
        assert json.loads(Path(r["json"]).read_text())["image"] == r["image"]
    # the same images typed from another working folder (image and --out both relative to it):
    # already rated, no second set of rows, and the other day's rows are kept
    monkeypatch.chdir(tmp_path / "dayA")
    res = invoke(runner, ["panels", "tray_0168h.jpg", "../dayB/tray_0168h.jpg", "--out", "../out"])
    assert res.exit_code == 0 and res.output.count("already rated") == 2, res.output
    again = pd.read_csv(out / "panels.csv")
    assert len(again) == 4 and sorted(again["image"]) == sorted(table["image"])
    # one image redone from there: its rows replace its own, not the other day's
    res = invoke(runner, ["panels", "tray_0168h.jpg", "--out", "../out", "--force"])
    assert res.exit_code == 0 and "already rated" not in res.output
    redone = pd.read_csv(out / "panels.csv")
    assert len(redone) == 4 and sorted(redone["image"]) == sorted(["dayB/tray_0168h.jpg"] * 2 + ["tray_0168h.jpg"] * 2)


def test_identity_of_a_qr_code_against_the_layout_and_empty_layout_positions():
    from coupon.cli.panels import _qr_identity, identity_warnings

    layout = {(1, 1): {"panel_id": "A-01", "system": "SysA", "replicate": "1"},
              (2, 1): {"panel_id": "B-02", "system": "SysB", "replicate": "2"}}
    # the code names a panel of the layout placed in another slot: its own system and replicate
    moved = _qr_identity("A-01", (2, 1), layout)
    assert (moved["panel_id"], moved["system"], moved["replicate"]) == ("A-01", "SysA", "1")
    assert "where the layout names B-02" in moved["id_note"]
    # a code the layout does not know (a serial number): the slot's system and replicate, with a note
    other = _qr_identity("P-QR-007", (2, 1), layout)
    assert (other["panel_id"], other["system"], other["replicate"]) == ("P-QR-007", "SysB", "2")
    assert "not in the layout" in other["id_note"]
    # no layout: the code alone
    assert _qr_identity("P-QR-007", (2, 1), None)["system"] == ""
    # the planned panel: no note
    assert _qr_identity("B-02", (2, 1), layout)["id_note"] == ""
    rows = [{"position": "R2C1", "row": 2, "col": 1, "id_note": other["id_note"]}]
    notes = identity_warnings("t.jpg", rows, layout)
    assert notes[0].startswith("t.jpg R2C1: QR code P-QR-007 is not in the layout")
    assert notes[1] == "t.jpg: no panel found where the layout names R1C1 (A-01)"
    assert identity_warnings("t.jpg", [{"position": float("nan"), "row": float("nan")}], layout) == []


def test_no_panel_id_or_file_name_is_given_twice_in_a_photo():
    from coupon.cli.panels import panel_identities

    layout = {(1, 1): {"panel_id": "A-01", "system": "SysA", "replicate": "1"},
              (1, 2): {"panel_id": "B-02", "system": "SysB", "replicate": "2"},
              (1, 3): {"panel_id": "C/3", "system": "SysC", "replicate": "3"}}
    pos = [(1, 1), (1, 2), (1, 3), (2, 1)]
    # the QR code of A-01 is read in B-02's slot (panels swapped, B-02's own code unreadable): A-01 is the
    # panel at R1C2; the panel at R1C1 keeps its position ID instead of a second A-01
    ids = panel_identities(pos, {1: "A-01"}, layout)
    assert [x["panel_id"] for x in ids] == ["R1C1", "A-01", "C/3", "R2C1"]
    assert ids[0]["id_source"] == "position" and "read at R1C2" in ids[0]["id_note"]
    assert (ids[1]["system"], ids[1]["id_source"]) == ("SysA", "qr")
    # one label copied onto two panels: each keeps the code plus its position, with a note
    ids = panel_identities(pos, {0: "X-9", 3: "X-9"}, None)
    assert [x["panel_id"] for x in ids] == ["X-9@R1C1", "R1C2", "R1C3", "X-9@R2C1"]
    assert "read on 2 panels (also R2C1)" in ids[0]["id_note"]
    # IDs that differ only in case or in characters a file name cannot hold: distinct file names
    ids = panel_identities(pos, {0: "c_3", 3: "c/3"}, layout)
    stems = [x["stem"] for x in ids]
    assert len({t.lower() for t in stems}) == 4 and stems[1] == "B-02", stems
    assert ids[2]["panel_id"] == "C/3" and ids[2]["stem"] == "C_3_R1C3"


@pytest.mark.slow
def test_an_image_without_exposure_time_is_named(runner, tray_file, tmp_path):
    import shutil

    path, _ = tray_file
    photo = shutil.copy(path, tmp_path / "rack2_12h_24h.jpg")  # two numbers with h: ambiguous, not guessed
    res = invoke(runner, ["panels", photo, "--out", tmp_path / "out"])
    assert res.exit_code == 0, res.output
    assert "1 image(s) have no exposure time (first: " in res.output and "rack2_0240h.jpg" in res.output
    assert pd.read_csv(tmp_path / "out" / "panels.csv")["exposure_h"].isna().all()
