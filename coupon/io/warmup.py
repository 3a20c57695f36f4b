"""Build OpenCV's lazily made tables before the first image needs them.

OpenCV fills its CIELAB conversion tables on the first ``cvtColor`` to or from Lab (about
0.1 s on the 2-core benchmark machine, 105 to 128 ms measured) and its Hershey font on the
first ``putText`` (about 20 ms).  A batch paid both inside its first image; a pool worker paid
them in each worker.  :func:`warm_opencv` builds them once per process; a command starts it on a
helper thread (:func:`warm_in_background`) so that it runs while the first image is read and
decoded, and the pool's server builds them before it forks its workers
(:mod:`coupon.io.pool_preload`).
"""

from __future__ import annotations

import threading

import cv2
import numpy as np

_lock = threading.Lock()
_done = False


def warm_opencv() -> None:
    """Build the tables now, or wait for the helper thread that is building them.

    Call it before the first Lab conversion of a process: OpenCV's table build is not
    guarded against two threads doing it at once, this lock is.  A one-row image keeps the
    conversion on the calling thread (OpenCV's thread pool is not started).
    """
    global _done
    with _lock:
        if _done:
            return
        cv2.cvtColor(np.zeros((1, 4, 3), np.float32), cv2.COLOR_RGB2Lab)
        cv2.putText(np.zeros((1, 16, 3), np.uint8), "0", (0, 1), cv2.FONT_HERSHEY_SIMPLEX, 0.3, (255, 255, 255), 1,
                    cv2.LINE_AA)
        _done = True


def warm_in_background() -> threading.Thread:
    """Start :func:`warm_opencv` on a helper thread and return the thread.

    Not a daemon thread: a command that ends at once (nothing left to rate, a bad option) waits the
    tenth of a second for it.  A daemon thread still inside OpenCV's table build when the interpreter
    shut down aborted the process ("terminate called without an active exception", exit code 134).
    """
    t = threading.Thread(target=warm_opencv, name="coupon-warmup", daemon=False)
    t.start()
    return t
