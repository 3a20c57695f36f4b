"""The batch runner's progress bar on a terminal."""

from __future__ import annotations


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
