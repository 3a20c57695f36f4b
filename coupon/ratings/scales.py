"""Published rating scales, each as a data table with its source.

Every scale is a :class:`BinnedScale` (ranges with exclusive lower and inclusive
upper bounds, "more than X and up to Y") or a :class:`ChartScale` (one value
per reference chart; the tool assigns the nearest chart on a logarithmic scale,
our documented choice).  :data:`SCALES` is the registry the command line and
reports use; look a value up with :func:`rate`.

Sources and how sure each table is are stated beside it; "memory" means the
value is widely quoted but was not read in a primary text here.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class BinnedScale:
    """Ratings by ranges of a measured quantity.

    ``bins`` lists (rating, upper_bound) from the best rating down; a value v
    gets the first rating whose upper bound is >= v (lower bounds exclusive).
    The last upper bound is +inf.
    """

    name: str
    quantity: str
    unit: str
    bins: tuple[tuple[str, float], ...]
    source: str

    def rate(self, value: float) -> str | None:
        if value is None or not np.isfinite(value):
            return None
        if value < 0:
            raise ValueError(f"{self.name}: {self.quantity} cannot be negative, got {value}")
        for rating, upper in self.bins:
            if value <= upper:
                return rating
        return self.bins[-1][0]

    def bounds(self, rating: str) -> tuple[float, float]:
        """(exclusive lower, inclusive upper) bound of a rating."""
        lower = -np.inf
        for r, upper in self.bins:
            if r == rating:
                return lower, upper
            lower = upper
        raise KeyError(f"{self.name} has no rating {rating!r}; it has {[r for r, _ in self.bins]}")


@dataclass(frozen=True)
class ChartScale:
    """Ratings from reference charts: one representative value per rating.

    A value gets the chart whose value is nearest on a log scale (boundaries at
    the geometric means of neighbouring chart values; our choice, documented).
    Values of zero get no rating (None).
    """

    name: str
    quantity: str
    unit: str
    charts: tuple[tuple[str, float], ...]
    source: str

    def boundaries(self) -> np.ndarray:
        v = np.array([c for _, c in self.charts])
        return np.sqrt(v[:-1] * v[1:])

    def rate(self, value: float) -> str | None:
        if value is None or not np.isfinite(value) or value <= 0:
            return None
        k = int(np.searchsorted(self.boundaries(), value, side="left"))
        return self.charts[k][0]


# ASTM D610-08, Table 1 (also SSPC-VIS 2): rust grade by percent of surface rusted - verified.
ASTM_D610 = BinnedScale(
    name="ASTM D610 rust grade",
    quantity="rusted area",
    unit="%",
    bins=(
        ("10", 0.01), ("9", 0.03), ("8", 0.1), ("7", 0.3), ("6", 1.0), ("5", 3.0),
        ("4", 10.0), ("3", 16.0), ("2", 33.0), ("1", 50.0), ("0", np.inf),
    ),
    source="ASTM D610-08 Table 1 (verified)",
)

# ISO 4628-3 degree of rusting: point values of the reference pictures (secondary source):
# Ri 0: 0 %, Ri 1: 0.05 %, Ri 2: 0.5 %, Ri 3: 1 %, Ri 4: 8 %, Ri 5: 40-50 %.
# The cut-offs between degrees are ours: geometric means of neighbouring picture values
# (Ri 5 taken as 40 %), and Ri 0 up to 0.01 % (the smallest area the D610 scale resolves).
ISO_4628_3_POINTS = {"Ri 0": 0.0, "Ri 1": 0.05, "Ri 2": 0.5, "Ri 3": 1.0, "Ri 4": 8.0, "Ri 5": 40.0}
ISO_4628_3 = BinnedScale(
    name="ISO 4628-3 degree of rusting",
    quantity="rusted area",
    unit="%",
    bins=(
        ("Ri 0", 0.01),
        ("Ri 1", float(np.sqrt(0.05 * 0.5))),
        ("Ri 2", float(np.sqrt(0.5 * 1.0))),
        ("Ri 3", float(np.sqrt(1.0 * 8.0))),
        ("Ri 4", float(np.sqrt(8.0 * 40.0))),
        ("Ri 5", np.inf),
    ),
    source="ISO 4628-3 picture values (secondary); cut-offs: geometric means of neighbours (coupon's choice)",
)

# ASTM D1654 rating of failure at a scribe, by mean creepage in mm.
# Ends (10 = 0 mm, 0 = over 16 mm) from a secondary source; the body of the table from memory.
ASTM_D1654 = BinnedScale(
    name="ASTM D1654 scribe rating",
    quantity="mean creepage",
    unit="mm",
    bins=(
        ("10", 0.0), ("9", 0.5), ("8", 1.0), ("7", 2.0), ("6", 3.0), ("5", 5.0),
        ("4", 7.0), ("3", 10.0), ("2", 13.0), ("1", 16.0), ("0", np.inf),
    ),
    source="ASTM D1654 Table 1 (ends secondary, body from memory)",
)

# ISO 10289 protection rating by defect area percent: 10 to 5 verified, 4 to 0 from memory.
# 10 means no defect at all; any defect area > 0 rates 9 or lower.
ISO_10289 = BinnedScale(
    name="ISO 10289 protection rating",
    quantity="defect area",
    unit="%",
    bins=(
        ("10", 0.0), ("9", 0.1), ("8", 0.25), ("7", 0.5), ("6", 1.0), ("5", 2.5),
        ("4", 5.0), ("3", 10.0), ("2", 25.0), ("1", 50.0), ("0", np.inf),
    ),
    source="ISO 10289 table (10 to 5 verified, 4 to 0 from memory)",
)

# ASTM G46 standard charts for rating pitting (chart values from memory).
ASTM_G46_DENSITY = ChartScale(
    name="ASTM G46 pit density (A)",
    quantity="pit density",
    unit="pits/m2",
    charts=(("A-1", 2.5e3), ("A-2", 1e4), ("A-3", 5e4), ("A-4", 1e5), ("A-5", 5e5)),
    source="ASTM G46 Fig. (standard rating charts), values from memory",
)
ASTM_G46_SIZE = ChartScale(
    name="ASTM G46 pit size (B)",
    quantity="pit opening area",
    unit="mm2",
    charts=(("B-1", 0.5), ("B-2", 2.0), ("B-3", 8.0), ("B-4", 12.5), ("B-5", 24.5)),
    source="ASTM G46 Fig. (standard rating charts), values from memory",
)
ASTM_G46_DEPTH = ChartScale(
    name="ASTM G46 pit depth (C)",
    quantity="pit depth",
    unit="mm",
    charts=(("C-1", 0.4), ("C-2", 0.8), ("C-3", 1.6), ("C-4", 3.2), ("C-5", 6.4)),
    source="ASTM G46 Fig. (standard rating charts), values from memory",
)

#: Registry: name -> scale.  Feed ``sorted(SCALES)`` to click.Choice where a scale is chosen.
SCALES: dict[str, BinnedScale | ChartScale] = {
    "astm-d610": ASTM_D610,
    "iso-4628-3": ISO_4628_3,
    "astm-d1654": ASTM_D1654,
    "iso-10289": ISO_10289,
    "astm-g46-density": ASTM_G46_DENSITY,
    "astm-g46-size": ASTM_G46_SIZE,
    "astm-g46-depth": ASTM_G46_DEPTH,
}


def rate(scale: str, value: float) -> str | None:
    """Rating of ``value`` on a registered scale.

    Raises
    ------
    KeyError
        Unknown scale name (the message lists the valid ones).
    """
    try:
        s = SCALES[scale]
    except KeyError:
        raise KeyError(f"{scale!r} scale is invalid, it must be one of {sorted(SCALES)}") from None
    return s.rate(value)
