"""The batch runner: its progress bar on a terminal, the resume ledger."""

from __future__ import annotations

from pathlib import Path


def test_result_lines_start_on_a_line_of_their_own_under_the_progress_bar(monkeypatch):
    # a terminal shows the bar (stderr) and the caller's lines (stdout) in one place: every line the caller
    # writes between two items must begin at the start of a cleared line, not after the bar
    import io
    import sys

    from coupon.io.batch import run_batch

    class Terminal(io.StringIO):
        def isatty(self):
            return True

    term = Terminal()
    monkeypatch.setattr(sys, "stderr", term)
    for out in run_batch([1, 2, 3], lambda x: x * 2, label="Rating"):
        term.write(f"result {out.result}\n")
    text = term.getvalue()
    for k in (2, 4, 6):
        before = text[:text.index(f"result {k}\n")]
        assert before.endswith("\r\033[K"), repr(before[-40:])
    assert "Rating" in text


def test_replace_outputs_deletes_only_the_commands_own_stale_files(tmp_path):
    from coupon.io.batch import ResumeLedger

    out = tmp_path / "out"
    out.mkdir()
    old_a, old_b, keep = out / "t_R1C1.json", out / "t_R1C2.json", out / "t_A-01.json"
    outside = tmp_path / "mine.json"  # a file the ledger lists but that lies outside the output folder
    for f in (old_a, old_b, keep, outside):
        f.write_text("{}")
    ledger = ResumeLedger(out, "panels")
    ledger.record(tmp_path / "t.jpg", "sha", "s", [old_a, old_b, outside])
    gone = ledger.replace_outputs(tmp_path / "t.jpg", [keep, old_b], out)
    assert gone == [old_a.resolve()]
    assert not old_a.exists() and old_b.exists() and keep.exists() and outside.exists()
    assert ledger.replace_outputs(tmp_path / "other.jpg", [], out) == []  # nothing recorded: nothing deleted


def test_resume_ledger_does_not_depend_on_the_working_folder(tmp_path, monkeypatch):
    """Outputs are stored relative to the output folder and CSV paths map back to their input: a rerun
    from another working folder (both paths typed relative to it) finds what the first run did."""
    from coupon.io.batch import ResumeLedger

    (tmp_path / "day" / "out" / "overlays").mkdir(parents=True)
    (tmp_path / "day" / "t.jpg").write_bytes(b"x")
    monkeypatch.chdir(tmp_path)
    led = ResumeLedger("day/out", "panels")
    png = Path("day/out/overlays/t_R1C1.png")
    png.write_bytes(b"png")
    led.record("day/t.jpg", "sha", "s", [png])
    led.flush()
    assert led.entries[str(tmp_path / "day" / "t.jpg")]["outputs"] == ["overlays/t_R1C1.png"]
    monkeypatch.chdir(tmp_path / "day")
    again = ResumeLedger("out", "panels")
    assert again.is_done("t.jpg", "sha", "s")
    assert again.row_key("day/t.jpg") == str(tmp_path / "day" / "t.jpg")  # the text the first run wrote
    assert again.row_key("t.jpg") == str(tmp_path / "day" / "t.jpg")  # not recorded: resolved here
    (tmp_path / png).unlink()
    assert not again.is_done("t.jpg", "sha", "s")  # an output gone: redo


def test_resume_ledger_keeps_the_texts_it_loaded_and_reads_entries_of_earlier_versions(tmp_path, monkeypatch):
    import json

    from coupon.io.batch import ResumeLedger

    (tmp_path / "proj" / "imgs").mkdir(parents=True)
    (tmp_path / "proj" / "out").mkdir()
    monkeypatch.chdir(tmp_path / "proj")
    led = ResumeLedger("out", "pits")
    led.record("imgs/c.png", "sha", "s", [])
    led.flush()
    # a redo from the image folder records the image under its new text; the rows already in the CSV still
    # carry the old text and must map to the same input (found in review: pits.csv kept both sets of rows)
    monkeypatch.chdir(tmp_path / "proj" / "imgs")
    again = ResumeLedger("../out", "pits")
    again.record("c.png", "sha2", "s", [])
    assert again.row_key("imgs/c.png") == again.key("c.png") == str(tmp_path / "proj" / "imgs" / "c.png")
    # an entry written before the ledger recorded the image text: its outputs are relative to the working folder
    monkeypatch.chdir(tmp_path / "proj")
    (tmp_path / "proj" / "out" / "c_pits.png").write_bytes(b"png")
    legacy = {str(tmp_path / "proj" / "imgs" / "c.png"): {"sha256": "sha", "settings": "s",
                                                          "outputs": ["out/c_pits.png"], "status": "ok"}}
    (tmp_path / "proj" / "out" / ".coupon" / "pits_done.json").write_text(json.dumps(legacy))
    assert ResumeLedger("out", "pits").is_done("imgs/c.png", "sha", "s")
