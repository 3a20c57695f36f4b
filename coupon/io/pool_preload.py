"""Imported by the process pool's server only (``coupon.io.batch``), never by the package.

Importing it builds OpenCV's lazy tables (:func:`coupon.io.warmup.warm_opencv`) in the server,
so every worker forked from it starts with them instead of building them in its first image.
The server itself runs no image work; OpenCV is set to one thread there, as in the workers.
"""

import cv2

from coupon.io.warmup import warm_opencv

cv2.setNumThreads(1)
warm_opencv()
