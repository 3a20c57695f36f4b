"""The specimen layout CSV of a campaign.

Columns (header names, any order; case-insensitive):

``specimen_id`` (or ``panel_id`` or ``coupon_id``)
    Unique ID of the panel, coupon or droplet sample (text, e.g. ``P07``).
``system``
    Coating system or surface treatment ID (text).
``replicate`` (optional)
    Replicate number within the system (whole number).
``row``, ``col`` (optional)
    Position in the tray, from the top left, 1-based; the same file can serve as
    ``coupon panels --layout`` (which reads row, col, panel_id, system, replicate).
``kind`` (optional)
    ``panel`` (default), ``coupon`` or ``droplet``.
``system_name``, ``notes`` (optional)
    Free text.
"""

from __future__ import annotations

import math
from pathlib import Path

import pandas as pd

from coupon.campaign.store import SPECIMEN_KINDS
from coupon.errors import CouponError

ID_ALIASES = ("specimen_id", "panel_id", "coupon_id")


class LayoutError(CouponError):
    """The layout CSV is malformed."""


def read_layout(path: str | Path) -> tuple[list[dict], list[dict]]:
    """(specimens, systems) from a layout CSV, validated.

    Raises
    ------
    LayoutError
        Missing file or columns, empty or duplicated IDs, a position named twice,
        a replicate or position that is not a whole number, an unknown kind.
    """
    path = Path(path)
    if not path.is_file():
        raise LayoutError("layout CSV not found", path)
    try:
        df = pd.read_csv(path, dtype=str, keep_default_na=False, skipinitialspace=True)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise LayoutError(f"not a readable CSV ({exc})", path) from None
    df.columns = [str(c).strip().lower() for c in df.columns]
    id_col = next((c for c in ID_ALIASES if c in df.columns), None)
    if id_col is None or "system" not in df.columns:
        raise LayoutError(f"expected columns specimen_id (or panel_id / coupon_id) and system, found "
                          f"{list(df.columns)}", path)
    if df.empty:
        raise LayoutError("the layout has no specimens (only a header)", path)
    df = df.apply(lambda s: s.str.strip())
    specimens, seen, positions = [], {}, {}
    for i, r in enumerate(df.to_dict("records"), start=2):  # line 1 is the header
        sid, system = r[id_col], r["system"]
        if not sid or not system:
            raise LayoutError(f"line {i}: {id_col} and system must not be empty", path)
        if sid in seen:
            raise LayoutError(f"line {i}: {id_col} {sid!r} already given on line {seen[sid]}", path)
        seen[sid] = i
        spec = {"specimen_id": sid, "system": system, "kind": (r.get("kind") or "panel").lower(),
                "notes": r.get("notes") or None}
        if spec["kind"] not in SPECIMEN_KINDS:
            raise LayoutError(f"line {i}: kind {spec['kind']!r} is invalid, it must be one of "
                              f"{list(SPECIMEN_KINDS)}", path)
        for key in ("replicate", "row", "col"):
            text = r.get(key, "")
            if text == "":
                spec[key] = None
                continue
            try:
                val = float(text)
            except ValueError:
                val = math.nan
            if not math.isfinite(val) or val != int(val) or val < (0 if key == "replicate" else 1):
                raise LayoutError(f"line {i}: {key} must be a whole number"
                                  f"{'' if key == 'replicate' else ' from 1'}, got {text!r}", path)
            spec[key] = int(val)
        if spec["row"] is not None and spec["col"] is not None and spec["kind"] == "panel":
            pos = (spec["row"], spec["col"])
            if pos in positions:
                raise LayoutError(f"line {i}: position row {pos[0]}, col {pos[1]} already given to "
                                  f"{positions[pos]!r}", path)
            positions[pos] = sid
        specimens.append(spec)
    systems = []
    if "system_name" in df.columns:
        for system, g in df.groupby("system"):
            name = next((n for n in g["system_name"] if n), None)
            systems.append({"system_id": system, "name": name or system})
    return specimens, systems
