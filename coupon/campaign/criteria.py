"""Failure criteria for panel ratings: a small JSON file of thresholds.

File format (``DIR/criteria.json``; ``coupon campaign init`` writes the example below)::

    {
      "name": "example criteria (replace with those of your specification)",
      "criteria": [
        {"metric": "rust_grade",    "fails_below": 7},
        {"metric": "creep_mean_mm", "fails_above": 2.0},
        {"metric": "ri_degree",     "fails_above": 2}
      ]
    }

A specimen fails at an inspection when ANY criterion fails there.  Metrics and the
direction each may take:

=================  ===========  ==========================================  =====================
metric             direction    meaning                                      interpolated on
=================  ===========  ==========================================  =====================
rust_area_pct      fails_above  rusted area in % of the rated area           rust_area_pct
rust_grade         fails_below  ASTM D610 grade (10 best) below the value    rust_area_pct at the
                                                                             grade's upper bound
ri_degree          fails_above  ISO 4628-3 Ri degree above the value         rust_area_pct at the
                                                                             Ri's upper cut-off
creep_mean_mm      fails_above  mean creepage from the scribe, mm            creep_mean_mm
creep_max_mm       fails_above  maximum creepage, mm                         creep_max_mm
creep_rating       fails_below  ASTM D1654 rating below the value            creep_mean_mm at the
                                                                             rating's upper bound
=================  ===========  ==========================================  =====================

Comparisons are strict: ``fails_below 7`` passes grade 7 and fails grade 6;
``fails_above 2.0`` passes 2.0 mm.  The integer ratings are compared as reported
by the panels command; for the time of crossing the continuous quantity behind
the rating is interpolated, with the threshold taken from the published table
(:mod:`coupon.ratings.scales`): grade below 7 means rusted area above 0.3 %
(ASTM D610-08 Table 1), Ri above 2 means area above the Ri 2 cut-off, a D1654
rating below 7 means mean creepage above 2.0 mm.

The example thresholds are placeholders of common practice, not a standard's
acceptance limits: the contract or product specification sets them.
"""

from __future__ import annotations

import json
import math
import re
from dataclasses import dataclass
from pathlib import Path

from coupon.errors import CouponError
from coupon.ratings.scales import ASTM_D610, ASTM_D1654, ISO_4628_3

CRITERIA_FILE_NAME = "criteria.json"

#: metric -> (allowed direction, continuous column, converter from threshold to continuous threshold or None)
METRICS = {
    "rust_area_pct": ("fails_above", "rust_area_pct"),
    "rust_grade": ("fails_below", "rust_area_pct"),
    "ri_degree": ("fails_above", "rust_area_pct"),
    "creep_mean_mm": ("fails_above", "creep_mean_mm"),
    "creep_max_mm": ("fails_above", "creep_max_mm"),
    "creep_rating": ("fails_below", "creep_mean_mm"),
}

UNITS = {"rust_area_pct": "%", "rust_grade": "ASTM D610 grade", "ri_degree": "ISO 4628-3 Ri",
         "creep_mean_mm": "mm", "creep_max_mm": "mm", "creep_rating": "ASTM D1654 rating"}

EXAMPLE = {
    "name": "example criteria (replace with those of your specification)",
    "criteria": [
        {"metric": "rust_grade", "fails_below": 7},
        {"metric": "creep_mean_mm", "fails_above": 2.0},
        {"metric": "ri_degree", "fails_above": 2},
    ],
}


class CriteriaError(CouponError):
    """A criteria file or option is malformed."""


def rating_number(value) -> float:
    """The number in a rating as stored ("7", 7, "7-G", "Ri 2", "A-3"); NaN if none."""
    if value is None:
        return math.nan
    if isinstance(value, (int, float)) and not isinstance(value, bool):
        return float(value)
    m = re.search(r"(\d+(?:\.\d+)?)", str(value))
    return float(m.group(1)) if m else math.nan


@dataclass(frozen=True)
class Criterion:
    """One threshold: the specimen fails when ``metric`` is above (or below) ``threshold``."""

    metric: str
    direction: str  # "fails_above" or "fails_below"
    threshold: float

    def __post_init__(self):
        if self.metric not in METRICS:
            raise CriteriaError(f"metric {self.metric!r} is invalid, it must be one of {sorted(METRICS)}")
        allowed = METRICS[self.metric][0]
        if self.direction != allowed:
            raise CriteriaError(f"{self.metric} takes {allowed!r}, not {self.direction!r}")
        if not math.isfinite(self.threshold):
            raise CriteriaError(f"{self.metric}: threshold must be a finite number, got {self.threshold}")

    @property
    def continuous_column(self) -> str:
        return METRICS[self.metric][1]

    @property
    def continuous_threshold(self) -> float:
        """Threshold on :attr:`continuous_column` equivalent to this criterion (from the published tables)."""
        t = self.threshold
        if self.metric == "rust_grade":
            # grade < t fails  <=>  grade <= ceil(t) - 1  <=>  area > upper bound of grade ceil(t)
            return float(ASTM_D610.bounds(str(int(math.ceil(t))))[1])
        if self.metric == "ri_degree":
            # Ri > t fails  <=>  area > upper cut-off of Ri floor(t)
            return float(ISO_4628_3.bounds(f"Ri {int(math.floor(t))}")[1])
        if self.metric == "creep_rating":
            return float(ASTM_D1654.bounds(str(int(math.ceil(t))))[1])
        return float(t)

    def fails(self, value) -> bool | None:
        """True/False for a reported value; None when the value is missing."""
        v = rating_number(value) if self.metric in ("rust_grade", "ri_degree", "creep_rating") else _float(value)
        if not math.isfinite(v):
            return None
        return v > self.threshold if self.direction == "fails_above" else v < self.threshold

    def describe(self) -> str:
        word = "above" if self.direction == "fails_above" else "below"
        unit = UNITS[self.metric]
        thr = f"{self.threshold:g}"
        if unit in ("%", "mm"):
            return f"{self.metric} {word} {thr} {unit}"
        return f"{self.metric} ({unit}) {word} {thr}"


def _float(value) -> float:
    try:
        return float(value)
    except (TypeError, ValueError):
        return math.nan


@dataclass(frozen=True)
class Criteria:
    name: str
    criteria: tuple[Criterion, ...]
    source: str = "built-in example"

    def to_dict(self) -> dict:
        return {"name": self.name,
                "criteria": [{"metric": c.metric, c.direction: c.threshold} for c in self.criteria]}


def parse_criteria(data: dict, source: str = "criteria") -> Criteria:
    if not isinstance(data, dict) or not isinstance(data.get("criteria"), list) or not data["criteria"]:
        raise CriteriaError(f"{source}: expected an object with a non-empty list 'criteria' "
                            f"(see 'coupon campaign init', which writes an example)")
    out = []
    for i, item in enumerate(data["criteria"]):
        if not isinstance(item, dict) or "metric" not in item:
            raise CriteriaError(f"{source}: criterion {i + 1} must be an object with 'metric' and "
                                f"'fails_above' or 'fails_below'")
        dirs = [k for k in ("fails_above", "fails_below") if k in item]
        if len(dirs) != 1:
            raise CriteriaError(f"{source}: criterion {i + 1} ({item.get('metric')}) needs exactly one of "
                                f"'fails_above' or 'fails_below'")
        try:
            thr = float(item[dirs[0]])
        except (TypeError, ValueError):
            raise CriteriaError(f"{source}: criterion {i + 1}: {dirs[0]} must be a number, "
                                f"got {item[dirs[0]]!r}") from None
        try:
            out.append(Criterion(str(item["metric"]), dirs[0], thr))
        except CriteriaError as exc:
            raise CriteriaError(f"{source}: criterion {i + 1}: {exc.message}") from None
    return Criteria(str(data.get("name", "unnamed criteria")), tuple(out), source)


def load_criteria(path: str | Path | None) -> Criteria:
    """Criteria from a JSON file, or the built-in example when ``path`` is None."""
    if path is None:
        return parse_criteria(EXAMPLE, "built-in example")
    path = Path(path)
    if not path.is_file():
        raise CriteriaError("criteria file not found (expected JSON; 'coupon campaign init' writes an example)",
                            path)
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise CriteriaError(f"criteria file is not valid JSON ({exc})", path) from None
    return parse_criteria(data, str(path))


def with_overrides(base: Criteria, **thresholds: float | None) -> Criteria:
    """Replace or add criteria from options (``rust_grade=7, creep_mean_mm=2.0, ri_degree=2``)."""
    given = {k: v for k, v in thresholds.items() if v is not None}
    if not given:
        return base
    kept = [c for c in base.criteria if c.metric not in given]
    added = [Criterion(k, METRICS[k][0], float(v)) for k, v in given.items()]
    return Criteria(base.name + " (with command-line thresholds)", tuple(kept + added), base.source)
