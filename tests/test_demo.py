"""The demo end to end (small size), its recovered numbers compared with its ground truth."""

from __future__ import annotations

import json

import pytest

from tests.conftest import invoke


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    from click.testing import CliRunner

    out = tmp_path_factory.mktemp("demo")
    result = invoke(CliRunner(), ["demo", out, "--small"])
    return out, result


@pytest.mark.slow
def test_demo_runs_and_writes_its_summary(demo_run):
    out, result = demo_run
    assert result.exit_code == 0, result.output
    summary = json.loads((out / "results" / "demo_summary.json").read_text())
    assert "calibration" in summary
    # every generated image has its ground truth beside it
    images = [p for p in (out / "images").iterdir() if p.suffix in (".jpg", ".png")]
    assert images and all(p.with_suffix(".truth.json").exists() for p in images)


@pytest.mark.slow
def test_demo_calibration_matches_its_ground_truth(demo_run):
    out, _ = demo_run
    cal = json.loads((out / "results" / "demo_summary.json").read_text())["calibration"]
    assert cal["px_per_mm"] == pytest.approx(cal["px_per_mm_truth"], rel=0.005)
    assert cal["colour_mean_de00"] < 2.0
    assert cal["indicator_buffers"] == 9
