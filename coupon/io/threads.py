"""Helper threads for OpenCV work: each starts as the importing thread does, with Intel IPP off.

``coupon/__init__.py`` switches OpenCV's IPP paths off for repeatable numbers, but OpenCV keeps that
switch per thread (``cv::ipp::setUseIPP`` stores it in thread-local data): a thread started later
has IPP on again.  Every thread pool of the package is made here, so that its threads compute as
the main thread does and a result does not depend on which thread ran a call.
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

import cv2


def exact_opencv() -> None:
    """Switch OpenCV's Intel IPP paths off for the calling thread."""
    cv2.ipp.setUseIPP(False)


def thread_pool(max_workers: int, name: str = "coupon") -> ThreadPoolExecutor:
    """A thread pool whose threads run OpenCV with IPP off (:func:`exact_opencv`)."""
    return ThreadPoolExecutor(max_workers=max_workers, thread_name_prefix=name, initializer=exact_opencv)
