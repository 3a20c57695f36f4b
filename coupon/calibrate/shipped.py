"""Calibration data shipped with the tool (the top-level ``calibration/`` folder).

A source checkout reads ``calibration/`` beside the package; an installed wheel
reads ``<prefix>/share/coupon/calibration``; ``COUPON_CALIBRATION_DIR`` overrides both.
"""

from __future__ import annotations

import os
import sys
import warnings
from pathlib import Path

from coupon.errors import CouponError

DEFAULT_INDICATOR = "indicators/universal_generic.csv"


def calibration_dir() -> Path:
    candidates = []
    if os.environ.get("COUPON_CALIBRATION_DIR"):
        candidates.append(Path(os.environ["COUPON_CALIBRATION_DIR"]))
    candidates.append(Path(__file__).resolve().parents[2] / "calibration")
    candidates.append(Path(sys.prefix) / "share" / "coupon" / "calibration")
    for c in candidates:
        if (c / DEFAULT_INDICATOR).is_file():
            return c
    raise CouponError(
        "the shipped calibration data was not found (looked in "
        + ", ".join(str(c) for c in candidates)
        + "); reinstall coupon or set COUPON_CALIBRATION_DIR"
    )


class DefaultIndicatorWarning(UserWarning):
    """A measurement uses the generic indicator table, not a buffer calibration."""


def default_indicator(warn: bool = True):
    """The generic universal-indicator model from the shipped table (approximate)."""
    from coupon.calibrate.indicator import build_model, read_indicator_table

    path = calibration_dir() / DEFAULT_INDICATOR
    ph, lab, meta = read_indicator_table(path)
    if warn:
        warnings.warn(
            "no buffer calibration: using the generic universal-indicator table shipped with coupon; "
            "pH values are approximate (about +/-1 pH). Calibrate with photos of buffer drops "
            "(coupon calibrate indicator) for measurements you report.",
            DefaultIndicatorWarning,
            stacklevel=2,
        )
    return build_model(ph, lab, name="generic universal indicator (shipped table)", is_default=True,
                       max_distance=25.0, details={"source": str(path), **meta})
