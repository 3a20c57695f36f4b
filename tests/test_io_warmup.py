"""OpenCV's lazily built tables: built once, safely from several threads, and right."""

from __future__ import annotations

import subprocess
import sys
import threading

import numpy as np


def test_warm_up_from_several_threads_gives_correct_lab():
    # reference: colour-science's sRGB -> CIELAB (D65, 2 degree observer); OpenCV's float conversion
    # uses its own rounded constants, 0.24 apart at most on these colours (measured), so 0.5 is kept
    import colour
    import cv2

    from coupon.io import warmup

    threads = [warmup.warm_in_background() for _ in range(3)]
    threads += [threading.Thread(target=warmup.warm_opencv) for _ in range(3)]
    for t in threads[3:]:
        t.start()
    for t in threads:
        t.join(timeout=30)
    assert warmup._done
    rgb = np.random.default_rng(7).random((1, 200, 3)).astype(np.float32)
    got = cv2.cvtColor(rgb, cv2.COLOR_RGB2Lab)[0]
    white = colour.CCS_ILLUMINANTS["CIE 1931 2 Degree Standard Observer"]["D65"]
    want = colour.XYZ_to_Lab(colour.sRGB_to_XYZ(rgb[0].astype(np.float64)), white)
    assert np.abs(got - want).max() < 0.5


def test_pool_preload_module_imports_and_sets_one_thread():
    # the pool's server imports it (coupon.io.batch); it must import cleanly and leave OpenCV on one thread
    code = ("import cv2, coupon.io.pool_preload, coupon.io.warmup as w; "
            "print(cv2.getNumThreads(), w._done)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.split()
    assert out == ["1", "True"]



def test_a_command_that_ends_at_once_exits_with_its_own_code(tmp_path):
    # a real interpreter shutdown (CliRunner never shuts down): with nothing to rate the command ends while
    # the warm-up thread may still be inside OpenCV; it used to abort there with exit code 134
    code = "import sys; from coupon.cli.main import main; sys.argv = ['coupon'] + sys.argv[1:]; main()"
    for _ in range(3):
        res = subprocess.run([sys.executable, "-c", code, "panels", str(tmp_path / "missing.jpg"), "--out",
                              str(tmp_path / "out")], capture_output=True, text=True)
        assert res.returncode == 1, (res.returncode, res.stderr)
        assert "file not found" in res.stderr and "terminate called" not in res.stderr
