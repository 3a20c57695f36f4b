"""Frame times of a time-lapse: from the file name, a fixed interval, a table, or EXIF.

All times are minutes.  Sources, in the order ``auto`` tries them:

1. ``table``: a CSV with a ``file`` column (file name or path) and a time column
   ``t_min``, ``t_s`` or ``t_h`` (a number in that unit), or ``time`` (a number with
   a unit, e.g. ``35min``, ``90s``, ``1.5h``);
2. ``interval``: frame i (in the order given) is at i x interval;
3. ``name``: a number with a unit in the file name, e.g. ``drop_t035min.jpg``,
   ``A1_0065s.png``, ``run_2.5h.tif`` (units s, sec, min, h, hr);
4. ``exif``: the camera's capture time (EXIF DateTimeOriginal).

``t0`` shifts the clock: t = raw - t0 (default: the earliest frame is t = 0).
"""

from __future__ import annotations

import datetime as _dt
import re
from pathlib import Path

import pandas as pd

from coupon.errors import CouponError

UNITS_MIN = {"s": 1 / 60, "sec": 1 / 60, "min": 1.0, "h": 60.0, "hr": 60.0}
_DURATION = re.compile(r"^\s*([-+]?\d+(?:\.\d+)?)\s*(s|sec|min|h|hr)\s*$", re.IGNORECASE)
# a number with a unit, set off from the rest of the name by _ - . space or the start
_IN_NAME = re.compile(r"(?:^|[_\-\s.])t?(\d+(?:\.\d+)?)(s|sec|min|h|hr)(?=$|[_\-\s.])", re.IGNORECASE)
SOURCES = ("auto", "table", "interval", "name", "exif")


def parse_duration(text: str) -> float:
    """'60s' -> 1.0, '35min' -> 35.0, '1.5h' -> 90.0 (minutes).  Raises ValueError."""
    m = _DURATION.match(str(text))
    if not m:
        raise ValueError(f"{text!r} is not a duration with a unit (e.g. 60s, 5min, 1.5h)")
    return float(m.group(1)) * UNITS_MIN[m.group(2).lower()]


def time_from_name(name: str) -> float | None:
    """Minutes encoded in a file name (last number with a unit in the stem), or None."""
    stem = Path(name).stem
    hits = _IN_NAME.findall(stem)
    if not hits:
        return None
    value, unit = hits[-1]
    return float(value) * UNITS_MIN[unit.lower()]


def read_time_table(path: str | Path) -> dict[str, float]:
    """{file name: minutes} from a CSV (see the module notes)."""
    path = Path(path)
    try:
        table = pd.read_csv(path, comment="#")
    except (OSError, pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise CouponError(f"cannot read the frame-time table ({exc})", path) from None
    table.columns = [str(c).strip().lower() for c in table.columns]
    if "file" not in table.columns:
        raise CouponError(f"frame-time table needs a 'file' column and a time column; it has {list(table.columns)}",
                          path)
    out: dict[str, float] = {}
    for col, factor in (("t_min", 1.0), ("t_s", 1 / 60), ("t_h", 60.0)):
        if col in table.columns:
            vals = pd.to_numeric(table[col], errors="coerce")
            if vals.isna().any():
                bad = table.loc[vals.isna(), "file"].tolist()[:3]
                raise CouponError(f"column {col!r} has missing or non-numeric times (files {bad})", path)
            return {Path(str(f)).name: float(v) * factor for f, v in zip(table["file"], vals)}
    if "time" in table.columns:
        for f, v in zip(table["file"], table["time"]):
            try:
                out[Path(str(f)).name] = parse_duration(str(v))
            except ValueError as exc:
                raise CouponError(f"file {f}: {exc}", path) from None
        return out
    raise CouponError("frame-time table needs a time column: t_min, t_s, t_h (numbers) or time (e.g. 35min)", path)


def raw_time(path: Path, index: int, source: str, *, interval_min: float | None = None,
             table: dict[str, float] | None = None, capture: _dt.datetime | None = None):
    """Raw time of one frame from one source: minutes (float), a datetime (EXIF), or None if unknown."""
    if source == "table":
        return (table or {}).get(path.name)
    if source == "interval":
        return index * float(interval_min)
    if source == "name":
        return time_from_name(path.name)
    if source == "exif":
        return capture
    raise ValueError(f"unknown time source {source!r}; expected one of {SOURCES}")


def choose_source(paths: list[Path], *, interval_min=None, table=None, captures=None) -> str:
    """The source ``auto`` uses: table, interval, names (if every frame has one), EXIF (if every frame has one)."""
    if table is not None:
        return "table"
    if interval_min is not None:
        return "interval"
    if paths and all(time_from_name(p.name) is not None for p in paths):
        return "name"
    if captures is not None and paths and all(c is not None for c in captures):
        return "exif"
    raise CouponError(
        "cannot tell the frame times: not every file name carries a time (e.g. _t035min) and not every frame "
        "has an EXIF capture time; give --interval (e.g. 60s) or --times TABLE.csv")


def to_minutes(raw: list, t0=None) -> list[float | None]:
    """Raw times (minutes or datetimes; None for unknown) to minutes since t0 (default: the earliest)."""
    known = [r for r in raw if r is not None]
    if not known:
        return [None] * len(raw)
    if isinstance(known[0], _dt.datetime):
        if t0 is None:
            t0 = min(known)
        elif not isinstance(t0, _dt.datetime):
            raise CouponError("with EXIF times, --t0 must be a date and time (e.g. 2026-03-02T09:15:00)")
        return [None if r is None else (r - t0).total_seconds() / 60.0 for r in raw]
    if isinstance(t0, _dt.datetime):
        raise CouponError("--t0 is a date and time but the frame times are durations; give --t0 as e.g. 5min")
    base = min(known) if t0 is None else float(t0)
    return [None if r is None else float(r) - base for r in raw]


def parse_t0(text: str | None):
    """--t0 as a duration (minutes) or an ISO date-time; None stays None."""
    if text is None:
        return None
    try:
        return parse_duration(text)
    except ValueError:
        pass
    try:
        return _dt.datetime.fromisoformat(text.strip())
    except ValueError:
        raise ValueError(f"{text!r} is neither a duration (e.g. 5min) nor a date-time (e.g. 2026-03-02T09:15:00)") \
            from None
