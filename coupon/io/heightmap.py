"""Height maps (profilometer or focus-variation scans) registered pixel for pixel to an image.

Accepted files:

* TIFF (``.tif``, ``.tiff``): one channel of float32/float64 (or integer counts
  already in the stated unit), read with tifffile (installed with scikit-image);
* CSV or text (``.csv``, ``.txt``): a grid of numbers, comma, semicolon, tab or
  space separated, one image row per line, no header; empty cells or ``nan``
  mean missing data.

Values are surface heights in micrometres (``unit="um"``) or millimetres
(``unit="mm"``); :func:`load_height_map` returns millimetres, float32, NaN where
missing.  A plausibility check catches the commonest mistake, a wrong unit: the
spread of heights over the scan must look like a coupon surface.  A scan that
includes the table around the coupon can pass this check in the wrong unit (the
table's step dominates the spread); the pit analysis therefore checks the
coupon's own surface too (:func:`coupon.segment.pits.check_height_relief`).
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from coupon.errors import ImageLoadError

#: Unit name -> millimetres per unit.
HEIGHT_UNITS = {"um": 1e-3, "mm": 1.0}
#: Robust spread (1st to 99th percentile) in mm that a height map of a coupon may show.
PLAUSIBLE_SPREAD_MM = (1e-4, 20.0)


def _read_tiff(path: Path) -> np.ndarray:
    import tifffile

    try:
        arr = tifffile.imread(path)
    except Exception as exc:  # noqa: BLE001 - tifffile raises many types for bad files
        raise ImageLoadError(f"cannot read the height map as TIFF ({type(exc).__name__}: {exc})", path) from None
    arr = np.squeeze(np.asarray(arr))
    if arr.ndim != 2:
        raise ImageLoadError(f"height map must have one channel (rows x cols), got shape {arr.shape}; "
                             "export heights as a single-channel float TIFF", path)
    if not (np.issubdtype(arr.dtype, np.floating) or np.issubdtype(arr.dtype, np.integer)):
        raise ImageLoadError(f"height map pixels must be numbers, got {arr.dtype}", path)
    return arr.astype(np.float32, copy=False)  # a float32 TIFF is used as read, without a copy


def _read_text(path: Path) -> np.ndarray:
    """A CSV (or whitespace-separated) grid of heights, no header; empty or 'nan' cells are missing."""
    import io

    import pandas as pd

    try:
        text = path.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError:
        raise ImageLoadError("height map CSV is not a text file", path) from None
    first = text.split("\n", 1)[0]
    sep = next((c for c in (",", ";", "\t") if c in first), r"\s+")
    if not text.strip():
        raise ImageLoadError("height map CSV is empty", path)
    lines = [ln for ln in text.splitlines() if ln.strip()]
    widths = {len(ln.split()) if sep == r"\s+" else ln.count(sep) + 1 for ln in lines}  # per line, not per value
    if len(widths) != 1:
        raise ImageLoadError(f"height map CSV rows have different lengths {sorted(widths)[:5]}; "
                             "expected one image row per line", path)
    try:
        table = pd.read_csv(io.StringIO(text), sep=sep, header=None, skip_blank_lines=True,
                            na_values=["nan", "NaN", "NAN"], engine="c" if len(sep) == 1 else "python")
    except pd.errors.ParserError as exc:
        raise ImageLoadError(f"height map CSV rows have different lengths ({exc}); expected one image row "
                             "per line", path) from None
    values = table.apply(pd.to_numeric, errors="coerce")
    bad = values.isna() & table.notna()
    if bad.to_numpy().any():
        r, c = np.argwhere(bad.to_numpy())[0]
        raise ImageLoadError(f"height map CSV holds a value that is not a number ({table.iat[r, c]!r} on line "
                             f"{r + 1}); expected a grid of heights with no header", path)
    return values.to_numpy(dtype=np.float32)


def load_height_map(path: str | os.PathLike, unit: str, shape_rc: tuple[int, int] | None = None) -> np.ndarray:
    """Read a height map and return it in millimetres.

    Parameters
    ----------
    path : path-like
        TIFF or CSV file.
    unit : {'um', 'mm'}
        Unit of the stored values.
    shape_rc : (rows, cols), optional
        The image's size; the height map must match it exactly.

    Returns
    -------
    (M, N) ndarray of float32
        Heights in mm, NaN where missing.

    Raises
    ------
    ImageLoadError
        Missing or unreadable file, wrong layout, wrong size, no valid values, or a
        spread of heights implausible for the stated unit (a likely unit mix-up).
    """
    return height_map_to_mm(read_height_map(path, unit), path, unit, shape_rc)


def read_height_map(path: str | os.PathLike, unit: str) -> np.ndarray:
    """The stored values of a height map, as read (the slow part of :func:`load_height_map`).

    ``coupon pits`` reads and converts the map on a second thread while the image
    decodes (:func:`read_height_map_mm`).

    Raises
    ------
    ImageLoadError
        Missing or unreadable file, wrong layout.
    """
    path = Path(path)
    if unit not in HEIGHT_UNITS:
        raise ValueError(f"{unit!r} height unit is invalid, it must be one of {sorted(HEIGHT_UNITS)}")
    if not path.is_file():
        raise ImageLoadError("height map not found; check the path (or the {stem} pattern)", path)
    suffix = path.suffix.lower()
    if suffix in (".tif", ".tiff"):
        arr = _read_tiff(path)
    elif suffix in (".csv", ".txt"):
        arr = _read_text(path)
    else:
        raise ImageLoadError(f"height map must be a .tif/.tiff or .csv/.txt file, got {suffix or 'no suffix'!r}", path)
    return arr


def check_height_shape(shape: tuple[int, ...], path: str | os.PathLike, shape_rc: tuple[int, int] | None) -> None:
    """Refuse a height map whose size is not the image's (``shape_rc``; None checks nothing).

    Raises
    ------
    ImageLoadError
    """
    if shape_rc is not None and tuple(shape) != tuple(shape_rc):
        raise ImageLoadError(
            f"height map is {shape[1]}x{shape[0]} values but the image is {shape_rc[1]}x{shape_rc[0]} px "
            "(width x height); it must be registered pixel for pixel to the image", Path(path))


def read_height_map_mm(path: str | os.PathLike, unit: str) -> tuple[tuple[int, ...], np.ndarray | None,
                                                                     ImageLoadError | None]:
    """Read a height map and convert it to mm before the image's size is known (for a helper thread).

    Returns the stored size, the map in mm (or None) and the error its values
    gave (or None): the caller checks the size with :func:`check_height_shape`
    first, so errors come in the order :func:`load_height_map` gives them.
    Reading errors are raised.
    """
    arr = read_height_map(path, unit)
    try:
        return arr.shape, height_map_to_mm(arr, path, unit), None
    except ImageLoadError as exc:
        return arr.shape, None, exc


def height_map_to_mm(arr: np.ndarray, path: str | os.PathLike, unit: str,
                     shape_rc: tuple[int, int] | None = None) -> np.ndarray:
    """Check the values :func:`read_height_map` returned and convert them to mm (see :func:`load_height_map`)."""
    path = Path(path)
    check_height_shape(arr.shape, path, shape_rc)
    if not arr.flags.writeable:
        arr = arr.copy()
    finite = np.isfinite(arr)
    n_bad = arr.size - int(np.count_nonzero(finite))
    if n_bad:
        np.copyto(arr, np.float32(np.nan) if arr.dtype == np.float32 else np.nan, where=~finite)  # infinities too
    del finite
    valid = 1.0 - n_bad / max(arr.size, 1)
    if valid < 0.5:
        raise ImageLoadError(f"height map has valid values on only {100 * valid:.0f} % of its pixels "
                             "(at least 50 % expected)", path)
    mm = arr
    if HEIGHT_UNITS[unit] != 1.0:
        mm *= np.float32(HEIGHT_UNITS[unit])  # in place: a 24-megapixel map is 96 MB
    step = max(1, int(np.sqrt(mm.size / 2.5e5)))  # a quarter of a million samples fix the percentiles
    sub = mm[::step, ::step]
    sub = sub[np.isfinite(sub)]
    lo, hi = np.percentile(sub, [1, 99]) if sub.size else (np.nan, np.nan)
    spread = float(hi - lo)
    if spread > PLAUSIBLE_SPREAD_MM[1]:
        hint = " (are the values in micrometres? use --height-unit um)" if unit == "mm" else ""
        raise ImageLoadError(f"height map spans {spread:.4g} mm between its 1st and 99th percentiles, more than "
                             f"{PLAUSIBLE_SPREAD_MM[1]:g} mm a coupon can show{hint}", path)
    if spread < PLAUSIBLE_SPREAD_MM[0]:
        hint = " (are the values in millimetres? use --height-unit mm)" if unit == "um" else ""
        raise ImageLoadError(f"height map spans only {spread * 1000:.3g} um between its 1st and 99th percentiles; "
                             f"a flat scan cannot show pits{hint}", path)
    return mm.astype(np.float32, copy=False)
