"""Helper threads compute as the main thread does (OpenCV's per-thread IPP switch)."""

from __future__ import annotations

import ast
from pathlib import Path

import cv2
import numpy as np

import coupon
from coupon.io.threads import thread_pool


def test_pool_threads_run_opencv_with_ipp_off_as_the_importing_thread():
    # OpenCV keeps cv::ipp::setUseIPP per thread: a plain new thread has IPP on again
    assert cv2.ipp.useIPP() is False
    with thread_pool(2) as pool:
        assert list(pool.map(lambda _: cv2.ipp.useIPP(), range(4))) == [False] * 4


def test_a_float_warp_in_a_pool_thread_equals_the_main_thread_bit_for_bit():
    # the call that differed: OpenCV 5.1 warps float pictures through IPP where IPP is on (3.5e-4 from
    # OpenCV's own warp).  Called here straight, not through coupon.calibrate.scale.warp_perspective
    rng = np.random.default_rng(5)
    src = cv2.GaussianBlur(rng.random((300, 240, 3)).astype(np.float32), (0, 0), 2.0)
    m = np.array([[1.03, 0.02, -4.0], [-0.01, 0.99, 6.0], [3e-5, -2e-5, 1.0]])

    def warp(_=None):
        return cv2.warpPerspective(src, m, (220, 280), flags=cv2.INTER_LINEAR, borderMode=cv2.BORDER_REPLICATE)

    here = warp()
    with thread_pool(2) as pool:
        for other in pool.map(warp, range(4)):
            np.testing.assert_array_equal(other, here)


def test_the_package_makes_its_thread_pools_in_one_place():
    # a pool made with ThreadPoolExecutor directly would run its OpenCV calls with IPP on
    root = Path(coupon.__file__).parent
    offenders = []
    for path in root.rglob("*.py"):
        if path == root / "io" / "threads.py":
            continue
        for node in ast.walk(ast.parse(path.read_text())):
            if isinstance(node, ast.Call):
                f = node.func
                name = f.id if isinstance(f, ast.Name) else f.attr if isinstance(f, ast.Attribute) else ""
                if name in ("ThreadPoolExecutor", "Thread"):
                    offenders.append(path.relative_to(root).as_posix())
    # the one plain thread builds OpenCV's lazy tables and computes no result
    assert offenders == ["io/warmup.py"], offenders
