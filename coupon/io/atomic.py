"""Atomic output files: a reader never sees a half-written file.

Each writer writes to a temporary file in the destination folder and renames it
into place with :func:`os.replace`, which is atomic on POSIX and Windows.
"""

from __future__ import annotations

import json
import os
import tempfile
from contextlib import contextmanager
from pathlib import Path
from typing import Iterator

import numpy as np
import pandas as pd


def _current_umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


_UMASK = _current_umask()


@contextmanager
def atomic_path(dest: str | os.PathLike, suffix: str | None = None) -> Iterator[Path]:
    """Yield a temporary path beside ``dest``; on success rename it to ``dest``.

    The temporary name keeps the destination's suffix so that writers that pick a
    format from the file name (OpenCV, matplotlib, tifffile) still do so.
    """
    dest = Path(dest)
    dest.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{dest.stem}.", suffix=suffix or dest.suffix, dir=dest.parent)
    os.close(fd)
    tmp_path = Path(tmp)
    try:
        yield tmp_path
        os.chmod(tmp_path, 0o666 & ~_UMASK)  # mkstemp makes 0600; outputs get the usual mode
        os.replace(tmp_path, dest)
    finally:
        if tmp_path.exists():
            tmp_path.unlink()


def write_text(dest: str | os.PathLike, text: str) -> Path:
    with atomic_path(dest) as tmp:
        tmp.write_text(text, encoding="utf-8")
    return Path(dest)


def _json_default(obj):
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(f"cannot write {type(obj).__name__} to JSON")


def to_json_text(obj) -> str:
    """JSON text with NaN written as null (JSON has no NaN)."""

    def clean(o):
        if isinstance(o, float) and not np.isfinite(o):
            return None
        if isinstance(o, np.floating) and not np.isfinite(o):
            return None
        if isinstance(o, dict):
            return {k: clean(v) for k, v in o.items()}
        if isinstance(o, (list, tuple)):
            return [clean(v) for v in o]
        if isinstance(o, np.ndarray):
            return clean(o.tolist())
        return o

    return json.dumps(clean(obj), indent=2, default=_json_default, allow_nan=False) + "\n"


def write_json(dest: str | os.PathLike, obj) -> Path:
    return write_text(dest, to_json_text(obj))


def write_csv(dest: str | os.PathLike, table: pd.DataFrame) -> Path:
    with atomic_path(dest) as tmp:
        table.to_csv(tmp, index=False, float_format="%.6g")
    return Path(dest)


def write_image(dest: str | os.PathLike, rgb_u8: np.ndarray, jpeg_quality: int = 95) -> Path:
    """Write an (M, N, 3) uint8 RGB picture (PNG or JPEG by suffix; ``jpeg_quality`` for JPEG)."""
    import cv2

    params = [cv2.IMWRITE_JPEG_QUALITY, int(jpeg_quality)] if Path(dest).suffix.lower() in (".jpg", ".jpeg") else []
    with atomic_path(dest) as tmp:
        if not cv2.imwrite(str(tmp), cv2.cvtColor(np.ascontiguousarray(rgb_u8), cv2.COLOR_RGB2BGR), params):
            raise OSError(f"{dest}: could not write image")
    return Path(dest)


def write_float_tiff(dest: str | os.PathLike, values: np.ndarray) -> Path:
    """Write an (M, N) float32 array as a single-channel float TIFF (NaN preserved)."""
    import cv2

    arr = np.ascontiguousarray(values, dtype=np.float32)
    with atomic_path(dest) as tmp:
        if not cv2.imwrite(str(tmp), arr):
            raise OSError(f"{dest}: could not write float TIFF")
    return Path(dest)


def save_figure(fig, dest: str | os.PathLike, **kwargs) -> Path:
    """Save a matplotlib figure atomically and close it."""
    import matplotlib.pyplot as plt

    with atomic_path(dest) as tmp:
        fig.savefig(tmp, **kwargs)
    plt.close(fig)
    return Path(dest)


class BackgroundWrites:
    """Run output writes on a second thread while the next input is analysed.

    Encoders (OpenCV, zlib) release the GIL, so a picture is written on the
    second core while the first analyses the next frame.  Used as a context
    manager around an in-process batch; :func:`defer` runs a write at once
    when no writer is active (in worker processes, for instance).
    """

    _active: "BackgroundWrites | None" = None

    def __init__(self):
        from coupon.io.threads import thread_pool

        self._pool = thread_pool(1, "coupon-writes")
        self._pending: list = []
        self.errors: list[str] = []

    def __enter__(self) -> "BackgroundWrites":
        BackgroundWrites._active = self
        return self

    def __exit__(self, *exc) -> None:
        BackgroundWrites._active = None
        for dest, fut in self._pending:
            err = fut.exception()
            if err is not None:
                self.errors.append(f"{dest}: could not be written ({err})")
        self._pool.shutdown(wait=True)

    def submit(self, dest, fn, *args) -> None:
        self._pending.append((dest, self._pool.submit(fn, *args)))


def defer(dest, fn, *args):
    """Write ``dest`` with ``fn(*args)`` on the active :class:`BackgroundWrites`, or now; returns ``dest``."""
    writer = BackgroundWrites._active
    if writer is None:
        fn(*args)
    else:
        writer.submit(dest, fn, *args)
    return Path(dest)
