"""Uniform corrosion rate from mass loss (ASTM G1) and the pitting factor (ASTM G46).

The ASTM G1 formula for the average corrosion rate of a cleaned coupon is

    CR = K W / (A T D)

with W the mass loss in g, A the exposed area in cm2, T the exposure time in h
and D the metal's density in g/cm3.  The constant K picks the unit of CR
(:data:`RATE_CONSTANTS`).  Dividing the metal lost by its density and area
gives the average penetration (the thickness lost if the attack were uniform),
10 W / (A D) in mm.  The pitting factor compares the deepest metal penetration
with that average: 1 means uniform attack, large values mean localised attack.

Domain of the inputs: every quantity must be finite and positive; a zero or
negative mass loss, area, time or density raises :class:`ValueError` naming
the quantity and the value received.

References
----------
ASTM G1, "Standard Practice for Preparing, Cleaning, and Evaluating Corrosion
Test Specimens", section on calculating corrosion rates (formula and K for
mm/y from a secondary source; K for mpy and the carbon-steel density from
memory).  ASTM G46, "Standard Guide for Examination and Evaluation of Pitting
Corrosion" (pitting factor; secondary source).
"""

from __future__ import annotations

import math

#: K of CR = K W / (A T D) per output unit (W in g, A in cm2, T in h, D in g/cm3).
#: mm/y: 8.76e4 (ASTM G1, secondary source); mpy (mils per year): 3.45e6 (ASTM G1, from memory;
#: equals 8.76e4 x 39.37 mil/mm to three figures); um/y follows from mm/y.
RATE_CONSTANTS: dict[str, float] = {"mm/y": 8.76e4, "mpy": 3.45e6, "um/y": 8.76e7}

#: Density of carbon steel in g/cm3: the ASTM G1 appendix table value (from memory; handbooks give
#: 7.85 for plain carbon steel and 7.87 for pure iron, so the choice moves CR by about 0.1 %).
CARBON_STEEL_DENSITY_G_CM3 = 7.86
CARBON_STEEL_DENSITY_SOURCE = "ASTM G1 appendix density table, carbon steel (from memory)"

HOURS_PER_YEAR = 8760.0


def _positive(name: str, value: float, unit: str) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ValueError(f"{name} must be a number in {unit}, got {value!r}") from None
    if not math.isfinite(v) or v <= 0:
        raise ValueError(f"{name} must be finite and positive, got {value!r} {unit}")
    return v


def corrosion_rate(mass_loss_g: float, area_cm2: float, hours: float, density_g_cm3: float,
                   unit: str = "mm/y") -> float:
    """Average corrosion rate by the ASTM G1 formula CR = K W / (A T D).

    Parameters
    ----------
    mass_loss_g : float
        Mass lost by the coupon after cleaning (W), in g.
    area_cm2 : float
        Exposed area (A), in cm2 (all faces and edges that were exposed).
    hours : float
        Exposure time (T), in h.
    density_g_cm3 : float
        Density of the metal (D), in g/cm3.
    unit : {'mm/y', 'mpy', 'um/y'}
        Unit of the result; selects K from :data:`RATE_CONSTANTS`.

    Returns
    -------
    float
        The corrosion rate in ``unit``.

    Raises
    ------
    ValueError
        A non-positive or non-finite input, or an unknown unit.

    Examples
    --------
    >>> round(corrosion_rate(0.650, 28.5, 168, 7.86), 4)
    1.513
    """
    try:
        k = RATE_CONSTANTS[unit]
    except KeyError:
        raise ValueError(f"{unit!r} unit is invalid, it must be one of {sorted(RATE_CONSTANTS)}") from None
    w = _positive("mass loss", mass_loss_g, "g")
    a = _positive("exposed area", area_cm2, "cm2")
    t = _positive("exposure time", hours, "h")
    d = _positive("density", density_g_cm3, "g/cm3")
    return k * w / (a * t * d)


def average_penetration_mm(mass_loss_g: float, area_cm2: float, density_g_cm3: float) -> float:
    """Thickness lost if the mass loss were spread uniformly: 10 W / (A D) in mm.

    The same as the G1 rate in mm/y times the exposure in years
    (8.76e4 W / (A T D) x T / 8760 = 10 W / (A D)).
    """
    w = _positive("mass loss", mass_loss_g, "g")
    a = _positive("exposed area", area_cm2, "cm2")
    d = _positive("density", density_g_cm3, "g/cm3")
    return 10.0 * w / (a * d)  # W / (A D) is in cm; x 10 for mm


def pitting_factor(deepest_penetration_mm: float, average_penetration_mm_: float) -> float:
    """Pitting factor P / d (ASTM G46): deepest metal penetration over average penetration.

    ``deepest_penetration_mm`` is measured from the original surface.  A pit depth
    measured below the surrounding (corroded) surface is converted with
    :func:`deepest_penetration_mm` first.  A value of 1 means uniform attack.
    """
    p = float(deepest_penetration_mm)
    if not math.isfinite(p) or p < 0:
        raise ValueError(f"deepest penetration must be finite and not negative, got {deepest_penetration_mm!r} mm")
    d = _positive("average penetration", average_penetration_mm_, "mm")
    return p / d


def deepest_penetration_mm(deepest_pit_depth_mm: float, average_penetration_mm_: float) -> float:
    """Deepest metal penetration from the original surface.

    A height map measures a pit below the surface around it, and that surface has
    itself receded by the average penetration d, so P = pit depth + d (the
    coupon's documented convention; it makes a coupon without pits read P / d = 1).
    """
    depth = float(deepest_pit_depth_mm)
    if not math.isfinite(depth) or depth < 0:
        raise ValueError(f"pit depth must be finite and not negative, got {deepest_pit_depth_mm!r} mm")
    return depth + _positive("average penetration", average_penetration_mm_, "mm")
