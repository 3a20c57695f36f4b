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
# OpenCV keeps this switch per thread: it holds for the thread that imports coupon, and every thread pool of
# the package switches it off in its threads too (coupon.io.threads); another program's own threads keep IPP.
_cv2.ipp.setUseIPP(False)
