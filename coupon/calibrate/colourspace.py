"""Colour maths: sRGB <-> linear RGB <-> CIE XYZ <-> CIELAB (D65, 2 degree), CIEDE2000.

Domains and ranges
==================

===================  ===========================  ==========================
function             input                        output
===================  ===========================  ==========================
srgb_to_linear       sRGB-encoded [0, 1]          linear RGB [0, 1]
linear_to_srgb       linear RGB [0, 1]            sRGB-encoded [0, 1]
linear_to_xyz        linear RGB [0, 1]            XYZ, Y of white = 1
xyz_to_lab           XYZ, Y of white = 1          L* [0, 100], a*, b* ~[-128, 127]
srgb_to_lab          sRGB-encoded [0, 1]          CIELAB
lab_to_srgb          CIELAB                       sRGB-encoded (unclipped)
delta_e_2000         two CIELAB arrays            CIEDE2000, kL = kC = kH = 1
===================  ===========================  ==========================

All functions take arrays of any shape with the colour in the last axis.

Why not ``skimage.color.rgb2lab``: it uses the 1990s matrix (0.412453 ...) and
the white (0.95047, 1, 1.08883), which differ from IEC 61966-2-1 and from the
D65 chromaticity (0.3127, 0.3290) by about 1e-3 in L*a*b*.  We use the
matrices as published in IEC 61966-2-1 (four decimals) and the white from
the D65 chromaticity, as colour-science does, so the two agree to 1e-6.
CIEDE2000 is scikit-image's :func:`skimage.color.deltaE_ciede2000`.

References
----------
IEC 61966-2-1:1999, sRGB.  CIE 015:2018, Colorimetry (CIELAB).
G. Sharma, W. Wu, E. N. Dalal, "The CIEDE2000 color-difference formula",
Color Research and Application 30(1), 2005.
"""

from __future__ import annotations

import numpy as np

#: D65 white point, CIE 1931 2 degree observer, from its chromaticity (0.3127, 0.3290).
D65_XY = (0.3127, 0.3290)
D65_XYZ = np.array([D65_XY[0] / D65_XY[1], 1.0, (1.0 - D65_XY[0] - D65_XY[1]) / D65_XY[1]])


#: Linear sRGB to XYZ and back, as published in IEC 61966-2-1:1999 (four decimals).
RGB_TO_XYZ = np.array([[0.4124, 0.3576, 0.1805], [0.2126, 0.7152, 0.0722], [0.0193, 0.1192, 0.9505]])
XYZ_TO_RGB = np.array([[3.2406, -1.5372, -0.4986], [-0.9689, 1.8758, 0.0415], [0.0557, -0.2040, 1.0570]])

_EPS = 216.0 / 24389.0
_KAPPA = 24389.0 / 27.0


def srgb_to_linear(rgb: np.ndarray) -> np.ndarray:
    """Decode sRGB (IEC 61966-2-1 transfer function) to linear light."""
    rgb = np.asarray(rgb, dtype=np.float64)
    return np.where(rgb <= 0.04045, rgb / 12.92, ((np.abs(rgb) + 0.055) / 1.055) ** 2.4 * np.sign(rgb))


def linear_to_srgb(lin: np.ndarray) -> np.ndarray:
    """Encode linear light with the sRGB transfer function."""
    lin = np.asarray(lin, dtype=np.float64)
    return np.where(lin <= 0.0031308, lin * 12.92, 1.055 * np.abs(lin) ** (1 / 2.4) * np.sign(lin) - 0.055)


def linear_to_xyz(lin: np.ndarray) -> np.ndarray:
    return np.asarray(lin, dtype=np.float64) @ RGB_TO_XYZ.T


def xyz_to_linear(xyz: np.ndarray) -> np.ndarray:
    return np.asarray(xyz, dtype=np.float64) @ XYZ_TO_RGB.T


def xyz_to_lab(xyz: np.ndarray, white: np.ndarray = D65_XYZ) -> np.ndarray:
    """CIE XYZ (Y of white = 1) to CIELAB."""
    t = np.asarray(xyz, dtype=np.float64) / white
    f = np.where(t > _EPS, np.cbrt(t), (_KAPPA * t + 16.0) / 116.0)
    lab = np.empty_like(f)
    lab[..., 0] = 116.0 * f[..., 1] - 16.0
    lab[..., 1] = 500.0 * (f[..., 0] - f[..., 1])
    lab[..., 2] = 200.0 * (f[..., 1] - f[..., 2])
    return lab


def lab_to_xyz(lab: np.ndarray, white: np.ndarray = D65_XYZ) -> np.ndarray:
    """CIELAB to CIE XYZ (Y of white = 1)."""
    lab = np.asarray(lab, dtype=np.float64)
    fy = (lab[..., 0] + 16.0) / 116.0
    fx = fy + lab[..., 1] / 500.0
    fz = fy - lab[..., 2] / 200.0
    f = np.stack([fx, fy, fz], axis=-1)
    t = np.where(f**3 > _EPS, f**3, (116.0 * f - 16.0) / _KAPPA)
    return t * white


def srgb_to_lab(rgb: np.ndarray) -> np.ndarray:
    """sRGB-encoded [0, 1] to CIELAB (D65)."""
    return xyz_to_lab(linear_to_xyz(srgb_to_linear(rgb)))


def lab_to_srgb(lab: np.ndarray) -> np.ndarray:
    """CIELAB (D65) to sRGB-encoded values (not clipped: out-of-gamut colours leave [0, 1])."""
    return linear_to_srgb(xyz_to_linear(lab_to_xyz(lab)))


def delta_e_2000(lab1: np.ndarray, lab2: np.ndarray) -> np.ndarray:
    """CIEDE2000 colour difference (kL = kC = kH = 1), via scikit-image."""
    from skimage.color import deltaE_ciede2000  # imported on first use: skimage.color costs 0.2 s

    return deltaE_ciede2000(np.asarray(lab1, dtype=np.float64), np.asarray(lab2, dtype=np.float64))
