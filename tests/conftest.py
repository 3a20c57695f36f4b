"""Shared fixtures: a CLI runner and writers for synthetic images on disk."""

from __future__ import annotations

import warnings
from pathlib import Path

import cv2
import numpy as np
import pytest
from click.testing import CliRunner

from coupon.io.images import to_uint8

DATA = Path(__file__).parent / "data"


@pytest.fixture
def runner() -> CliRunner:
    return CliRunner()


def invoke(runner: CliRunner, args: list, **kw):
    """Invoke the coupon CLI in-process with string arguments."""
    from coupon.cli.main import cli

    return runner.invoke(cli, [str(a) for a in args], catch_exceptions=False, **kw)


def write_rgb(path: Path, rgb: np.ndarray, quality: int = 92) -> Path:
    """Write float RGB [0, 1] as the file type of its suffix (JPEG quality for .jpg)."""
    bgr = cv2.cvtColor(to_uint8(rgb), cv2.COLOR_RGB2BGR)
    params = [cv2.IMWRITE_JPEG_QUALITY, quality] if path.suffix.lower() in (".jpg", ".jpeg") else []
    assert cv2.imwrite(str(path), bgr, params)
    return path


@pytest.fixture(autouse=True)
def _no_default_indicator_warning_leak():
    # tests that expect the default-indicator warning assert it explicitly with pytest.warns
    with warnings.catch_warnings():
        yield
