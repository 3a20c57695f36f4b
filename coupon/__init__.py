"""coupon: calibrated, traceable image analysis for corrosion testing labs.

Array conventions (enforced in :mod:`coupon.io.images`, the one place where
pixels enter the program):

* images are ``(rows, cols, 3)`` float32 RGB in [0, 1], sRGB-encoded;
* indexing is (row, col); OpenCV's (x, y) appears only in variables named
  ``xy`` or ``*_xy`` and is converted at the call site;
* every length carries its unit in its name (``_px``, ``_mm``, ``_mm2``).
"""

__version__ = "0.1.0"

import cv2 as _cv2

# Reproducible numbers: OpenCV's Intel IPP paths can give results that differ in the last float digits
# from one call to the next on the same input, depending on buffer alignment (the precise distance
# transform did, OpenCV issue 24082: a touching pair of pits then split one way or the other between
# runs).  Without IPP the same calls are exact and repeatable, and on the benchmarks no slower.
# This setting is process-wide: it also applies to other OpenCV work in a program that imports coupon.
_cv2.ipp.setUseIPP(False)
