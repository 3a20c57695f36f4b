"""coupon: calibrated, traceable image analysis for corrosion testing labs.

Array conventions (enforced in :mod:`coupon.io.images`, the one place where
pixels enter the program):

* images are ``(rows, cols, 3)`` float32 RGB in [0, 1], sRGB-encoded;
* indexing is (row, col); OpenCV's (x, y) appears only in variables named
  ``xy`` or ``*_xy`` and is converted at the call site;
* every length carries its unit in its name (``_px``, ``_mm``, ``_mm2``).
"""

__version__ = "0.1.0"
