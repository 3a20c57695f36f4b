"""Campaign store: faithful rows, rerun idempotence, atomic replacement, a reader beside a writer."""

from __future__ import annotations

import math
import multiprocessing as mp
import sqlite3

import numpy as np
import pandas as pd
import pytest

from coupon.campaign.store import (TABLES, StoreError, match_specimen, open_store, read_table, record_results)

try:
    from campaign_rows import panel_row, pit_rows
except ImportError:  # tests collected as a package
    from tests.campaign_rows import panel_row, pit_rows


def _rows(image, n, area=0.2):
    return [panel_row(image, f"P{i:02d}", 168.0, area + 0.01 * i, 0.5) for i in range(n)]


def test_rows_round_trip_faithfully(tmp_path):
    db = tmp_path / "coupon.db"
    row = panel_row("a.jpg", "P01", 168.0, 0.25, 1.2) | {"rust_sites": np.int64(4), "x_px": np.float32(10.5),
                                                         "creep_min_mm": float("nan"), "my_extra": "kept"}
    record_results(db, "panels", "a.jpg", "abc", {"edge_mm": 5}, "prof", {"panels": [row]})
    df = read_table(db, "panels")
    assert list(df.columns[: len(TABLES["panels"])]) == list(TABLES["panels"])  # documented order first
    got = df.iloc[0]
    assert got["rust_sites"] == 4 and got["x_px"] == 10.5 and got["rust_grade"] == "7" and got["ri_degree"] == "Ri 2"
    assert bool(got["scribe_found"]) is True and math.isnan(got["creep_min_mm"]) and got["my_extra"] == "kept"
    assert got["specimen_id"] == "P01" and got["image_sha256"] == "abc" and got["profile_sha256"] == "prof"
    with open_store(db) as s:
        ins = s.inspections()
        assert s.conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"
    assert ins.loc[0, "exposure_h"] == 168.0 and ins.loc[0, "settings_json"] == '{"edge_mm":5}'
    assert ins.loc[0, "tool_version"]


def test_empty_tables_keep_their_columns(tmp_path):
    db = tmp_path / "coupon.db"
    open_store(db).close()
    for name, cols in TABLES.items():
        df = read_table(db, name)
        assert df.empty and list(df.columns[: len(cols)]) == list(cols)


def test_rerun_replaces_and_never_duplicates(tmp_path):
    db = tmp_path / "coupon.db"
    for _ in range(3):
        record_results(db, "panels", "rack_0168h.jpg", "s1", {}, None, {"panels": _rows("rack_0168h.jpg", 6)})
    record_results(db, "panels", "rack_0336h.jpg", "s2", {}, None, {"panels": _rows("rack_0336h.jpg", 6)})
    # rerun with a changed result: the image's rows are replaced, the other image's kept
    record_results(db, "panels", "rack_0168h.jpg", "s1", {}, None, {"panels": _rows("rack_0168h.jpg", 4, 0.9)})
    df = read_table(db, "panels")
    assert len(df) == 10
    assert sorted(df.loc[df["inspection_image"] == "rack_0168h.jpg", "rust_area_pct"]) == pytest.approx(
        [0.9, 0.91, 0.92, 0.93])
    with open_store(db) as s:
        assert len(s.inspections()) == 2
        assert s.conn.execute("SELECT COUNT(*) FROM results WHERE inspection_id NOT IN "
                              "(SELECT inspection_id FROM inspections)").fetchone()[0] == 0
    # the same image under another command is a separate inspection
    pits, summ = pit_rows("rack_0168h.jpg", 5, 0)
    record_results(db, "pits", "rack_0168h.jpg", "s1", {}, None, {"pits": pits, "pit_summary": [summ]})
    assert len(read_table(db, "panels")) == 10 and len(read_table(db, "pits")) == 5


def test_exception_mid_write_leaves_the_previous_state(tmp_path):
    db = tmp_path / "coupon.db"
    pits, summ = pit_rows("c01.png", 8, 1)
    record_results(db, "pits", "c01.png", "s1", {}, None, {"pits": pits, "pit_summary": [summ]})
    before_pits, before_summary = read_table(db, "pits"), read_table(db, "pit_summary")
    bad_summary = dict(summ, pit_count=object())  # cannot be stored: raises after the pit rows were prepared
    with pytest.raises(StoreError, match="pit_summary row 0.pit_count: a object cannot be stored"):
        record_results(db, "pits", "c01.png", "s2", {}, None, {"pits": pits[:3], "pit_summary": [bad_summary]})
    pd.testing.assert_frame_equal(read_table(db, "pits"), before_pits)
    pd.testing.assert_frame_equal(read_table(db, "pit_summary"), before_summary)
    # an exception inside the transaction after rows were written (a crash between statements)
    with open_store(db) as store:
        with pytest.raises(RuntimeError, match="power cut"):
            with store.transaction():
                store.replace_results("pits", "c01.png", "s3", {}, None, {"pits": pits[:2], "pit_summary": []})
                store.replace_results("pits", "c02.png", "s4", {}, None, {"pits": pits, "pit_summary": [summ]})
                assert store.count_rows("pits") == 2 + 8  # visible inside the transaction ...
                raise RuntimeError("power cut")
        assert store.count_rows("pits") == 8  # ... and gone after the rollback
        assert list(store.inspections()["image"]) == ["c01.png"]
    pd.testing.assert_frame_equal(read_table(db, "pits"), before_pits)


def test_bad_command_table_and_database(tmp_path):
    db = tmp_path / "coupon.db"
    with pytest.raises(StoreError, match="table 'pits' is invalid for 'panels'"):
        record_results(db, "panels", "a.jpg", None, {}, None, {"pits": []})
    with pytest.raises(StoreError, match="command 'rust' is invalid"):
        record_results(db, "rust", "a.jpg", None, {}, None, {})
    with pytest.raises(StoreError, match="no campaign database here"):
        open_store(tmp_path / "missing.db", create=False)
    junk = tmp_path / "junk.db"
    junk.write_bytes(b"this is not sqlite" * 100)
    with pytest.raises(StoreError, match="not a usable SQLite campaign database"):
        open_store(junk)
    with open_store(db) as s:
        s.set_meta(schema_version="99")
    with pytest.raises(StoreError, match="schema version 99 is not supported"):
        open_store(db)


def test_specimen_from_file_name():
    ids = ["C01", "C02", "P1"]
    assert match_specimen("/lab/run1/C01_after_cleaning.png", ids) == "C01"
    assert match_specimen("/lab/frames_C02/t005min.png", ids) == "C02"
    assert match_specimen("/lab/C011.png", ids) is None  # not a whole word
    assert match_specimen("/lab/C01_vs_C02.png", ids) is None  # ambiguous


# -- two processes --------------------------------------------------------------------

def _hold_open_transaction(db, written, release):
    """Writer: replace an image's rows inside a transaction and wait before committing."""
    with open_store(db) as store:
        with store.transaction():
            store.replace_results("panels", "rack.jpg", "new", {}, None, {"panels": _rows("rack.jpg", 50, 0.7)})
            written.set()
            release.wait(30)


def _write_many(db, n_images, n_rows):
    for k in range(n_images):
        record_results(db, "panels", f"img{k % 5}.jpg", str(k), {}, None,
                       {"panels": _rows(f"img{k % 5}.jpg", n_rows, 0.01 * k)})


def test_reader_sees_old_state_while_a_writer_holds_a_transaction(tmp_path):
    db = tmp_path / "coupon.db"
    record_results(db, "panels", "rack.jpg", "old", {}, None, {"panels": _rows("rack.jpg", 10)})
    ctx = mp.get_context("spawn")
    written, release = ctx.Event(), ctx.Event()
    proc = ctx.Process(target=_hold_open_transaction, args=(db, written, release))
    proc.start()
    try:
        assert written.wait(60), "writer did not start"
        # WAL: the reader is not blocked and sees the last committed state, not the half-done one
        conn = sqlite3.connect(db, timeout=1.0)
        assert conn.execute("SELECT COUNT(*) FROM results").fetchone()[0] == 10
        assert conn.execute("SELECT image_sha256 FROM inspections").fetchall() == [("old",)]
        conn.close()
        with pytest.raises(sqlite3.OperationalError, match="locked"):  # a second writer must wait
            c2 = sqlite3.connect(db, timeout=0.2, isolation_level=None)
            c2.execute("BEGIN IMMEDIATE")
        c2.close()
    finally:
        release.set()
        proc.join(60)
    assert proc.exitcode == 0
    df = read_table(db, "panels")
    assert len(df) == 50 and set(df["image_sha256"]) == {"new"}


def test_reader_never_sees_partial_images_while_another_process_writes(tmp_path):
    db = tmp_path / "coupon.db"
    open_store(db).close()
    n_rows = 40
    ctx = mp.get_context("spawn")
    proc = ctx.Process(target=_write_many, args=(db, 60, n_rows))
    proc.start()
    seen = 0
    conn = sqlite3.connect(db, timeout=30)
    while proc.is_alive() or seen == 0:
        counts = conn.execute("SELECT i.image, COUNT(r.row_id) FROM inspections i LEFT JOIN results r "
                              "ON r.inspection_id = i.inspection_id GROUP BY i.inspection_id").fetchall()
        assert all(c == n_rows for _, c in counts), counts
        assert len({img for img, _ in counts}) == len(counts)  # never two inspections of one image
        seen += 1
        if not proc.is_alive() and seen > 0:
            break
    conn.close()
    proc.join(60)
    assert proc.exitcode == 0
    assert len(read_table(db, "panels")) == 5 * n_rows
    assert seen > 1


def test_db_path_default_and_resume_check(tmp_path):
    from coupon.campaign.store import is_recorded, resolve_db_path

    out = tmp_path / "campaign" / "panels"
    assert resolve_db_path(out) == out / "coupon.db"  # nothing yet: the --out folder
    open_store(tmp_path / "campaign" / "coupon.db").close()
    assert resolve_db_path(out) == tmp_path / "campaign" / "coupon.db"  # the campaign folder's database
    assert resolve_db_path(out, tmp_path / "x.db") == tmp_path / "x.db"
    db = tmp_path / "campaign" / "coupon.db"
    assert not is_recorded(db, "panels", "a.jpg", "s1")
    record_results(db, "panels", "a.jpg", "s1", {}, None, {"panels": _rows("a.jpg", 2)})
    assert is_recorded(db, "panels", "a.jpg", "s1") and not is_recorded(db, "panels", "a.jpg", "changed")
    assert not is_recorded(db, "pits", "a.jpg", "s1") and not is_recorded(tmp_path / "none.db", "panels", "a", None)


def test_flat_row_for_nested_summaries(tmp_path):
    from coupon.campaign.store import flat_row

    ev = {"t_acidic_first_min": 10.0, "evaporation": {"rate_mm2_per_min": 0.23, "fit": {"r2": 0.99}}}
    flat = flat_row({"series": "s", **ev})
    assert flat == {"series": "s", "t_acidic_first_min": 10.0, "evaporation_rate_mm2_per_min": 0.23,
                    "evaporation_fit_r2": 0.99}
    record_results(tmp_path / "c.db", "droplet", "s#series", None, {}, None, {"droplet_summary": [flat]})
    df = read_table(tmp_path / "c.db", "droplet_summary")
    assert df.loc[0, "evaporation_fit_r2"] == 0.99 and df.loc[0, "series"] == "s"
