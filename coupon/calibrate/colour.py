"""Colour correction: white balance and a colour correction matrix.

Both act on *linear* RGB (light adds linearly there; sRGB encoding is undone
first and redone after).  The correction is

    linear_out = M @ [g * linear_in, 1]       (affine, M is 3 x 4)
    linear_out = M @ (g * linear_in)          (linear, M is 3 x 3)

with ``g`` the per-channel white-balance gains.  A matrix is fitted by least
squares from reference patches of known colour; residuals are reported as
CIEDE2000 per patch.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from coupon.calibrate import colourspace as cs
from coupon.errors import CalibrationError

MATRIX_KINDS = ("affine", "linear")


@dataclass(frozen=True)
class ColourCorrection:
    """White balance gains and an optional colour matrix, in linear RGB.

    Attributes
    ----------
    gains : (3,) ndarray
        Per-channel white-balance gains (1, 1, 1 for none).
    matrix : (3, 3) or (3, 4) ndarray or None
        Colour correction matrix applied after the gains.
    residual_de00 : dict
        Patch name to CIEDE2000 between corrected and reference colour.
    details : dict
        Where the gains and the matrix came from.
    """

    gains: np.ndarray = field(default_factory=lambda: np.ones(3))
    matrix: np.ndarray | None = None
    residual_de00: dict = field(default_factory=dict)
    details: dict = field(default_factory=dict)

    @property
    def mean_de00(self) -> float | None:
        return float(np.mean(list(self.residual_de00.values()))) if self.residual_de00 else None

    @property
    def is_identity(self) -> bool:
        return np.allclose(self.gains, 1.0) and self.matrix is None

    def to_dict(self) -> dict:
        return {
            "white_balance_gains": np.asarray(self.gains, dtype=float).tolist(),
            "matrix": None if self.matrix is None else np.asarray(self.matrix).tolist(),
            "matrix_kind": None if self.matrix is None else ("affine" if self.matrix.shape[1] == 4 else "linear"),
            "residual_de00": {k: float(v) for k, v in self.residual_de00.items()},
            "mean_de00": self.mean_de00,
            "details": self.details,
        }

    @classmethod
    def from_dict(cls, d: dict) -> "ColourCorrection":
        gains = np.asarray(d.get("white_balance_gains", [1, 1, 1]), dtype=np.float64)
        m = d.get("matrix")
        matrix = None if m is None else np.asarray(m, dtype=np.float64)
        if gains.shape != (3,) or not np.all(np.isfinite(gains)) or np.any(gains <= 0):
            raise CalibrationError(f"white_balance_gains must be three positive numbers, got {gains.tolist()}")
        if matrix is not None and (matrix.shape not in ((3, 3), (3, 4)) or not np.all(np.isfinite(matrix))):
            raise CalibrationError(f"colour matrix must be 3x3 or 3x4 finite numbers, got shape {matrix.shape}")
        return cls(gains, matrix, dict(d.get("residual_de00", {})), dict(d.get("details", {})))


def apply_linear(lin: np.ndarray, corr: ColourCorrection) -> np.ndarray:
    """Apply gains and matrix to linear RGB (any shape, colour last)."""
    out = lin * np.asarray(corr.gains, dtype=lin.dtype)
    if corr.matrix is not None:
        m = np.asarray(corr.matrix, dtype=lin.dtype)
        out = out @ m[:, :3].T
        if m.shape[1] == 4:
            out = out + m[:, 3]
    return out


def apply_correction(rgb: np.ndarray, corr: ColourCorrection | None) -> np.ndarray:
    """Colour-correct an sRGB image (float [0, 1]); returns float32 sRGB in [0, 1].

    Uses a 4096-level lookup table for the sRGB decode, so a 12-megapixel photo
    takes a fraction of a second.
    """
    if corr is None or corr.is_identity:
        return rgb
    levels = 4096
    grid = np.linspace(0.0, 1.0, levels)
    decode = cs.srgb_to_linear(grid).astype(np.float32)
    idx = np.clip(np.rint(rgb * (levels - 1)), 0, levels - 1).astype(np.int32)
    lin = decode[idx]
    lin = apply_linear(lin, corr)
    np.clip(lin, 0.0, 1.0, out=lin)
    # encode through a finer table (linear light crowds near black)
    enc_levels = 16384
    enc_grid = np.linspace(0.0, 1.0, enc_levels)
    encode = cs.linear_to_srgb(enc_grid).astype(np.float32)
    return encode[np.rint(lin * (enc_levels - 1)).astype(np.int32)]


def robust_colour(rgb_pixels: np.ndarray) -> np.ndarray:
    """Median colour of (K, 3) pixels after rejecting outliers (glare, specks).

    Pixels farther than 3 robust standard deviations (1.4826 MAD) from the
    channel medians are dropped before the final median.
    """
    px = np.asarray(rgb_pixels, dtype=np.float64).reshape(-1, 3)
    if len(px) == 0:
        raise CalibrationError("an empty region has no colour")
    med = np.median(px, axis=0)
    mad = np.median(np.abs(px - med), axis=0) * 1.4826 + 1e-6
    keep = np.all(np.abs(px - med) <= 3 * mad, axis=1)
    return np.median(px[keep], axis=0) if keep.sum() >= 5 else med


def box_pixels(rgb: np.ndarray, box_xywh: tuple[int, int, int, int]) -> np.ndarray:
    """Pixels of an (x, y, w, h) box, checked against the image size."""
    x, y, w, h = (int(round(v)) for v in box_xywh)
    rows, cols = rgb.shape[:2]
    if w <= 0 or h <= 0 or x < 0 or y < 0 or x + w > cols or y + h > rows:
        raise CalibrationError(
            f"box x={x}, y={y}, w={w}, h={h} is not inside the {cols}x{rows} image"
        )
    return rgb[y : y + h, x : x + w].reshape(-1, 3)


def white_balance_gains(neutral_srgb: np.ndarray) -> np.ndarray:
    """Gains that make a neutral reference grey, keeping its luminance.

    Parameters
    ----------
    neutral_srgb : (3,) sRGB colour of a region known to be neutral (grey or white).
    """
    lin = cs.srgb_to_linear(np.asarray(neutral_srgb, dtype=np.float64))
    if np.any(lin <= 1e-4):
        raise CalibrationError(
            f"the neutral reference is too dark or clipped (linear RGB {np.round(lin, 4).tolist()}); "
            "pick a brighter grey or white region"
        )
    y = float(cs.RGB_TO_XYZ[1] @ lin)
    return y / lin


def fit_colour_matrix(
    measured_srgb: np.ndarray, reference_lab: np.ndarray, kind: str = "affine",
    gains: np.ndarray | None = None, names: list[str] | None = None,
) -> ColourCorrection:
    """Least-squares colour correction matrix from patches of known colour.

    Parameters
    ----------
    measured_srgb : (K, 3) measured patch colours, sRGB [0, 1].
    reference_lab : (K, 3) their reference CIELAB (D65) values.
    kind : "affine" (3 x 4, needs K >= 4) or "linear" (3 x 3, needs K >= 3).
    gains : white-balance gains applied before the matrix (default none).
    names : patch names for the residual report.
    """
    if kind not in MATRIX_KINDS:
        raise CalibrationError(f"matrix kind {kind!r} is invalid; it must be one of {MATRIX_KINDS}")
    measured = np.asarray(measured_srgb, dtype=np.float64).reshape(-1, 3)
    ref_lab = np.asarray(reference_lab, dtype=np.float64).reshape(-1, 3)
    need = 4 if kind == "affine" else 3
    if len(measured) != len(ref_lab):
        raise CalibrationError(f"{len(measured)} measured patches but {len(ref_lab)} reference colours")
    if len(measured) < need + 1:
        raise CalibrationError(
            f"a {kind} colour matrix needs at least {need + 1} patches for a checked fit, got {len(measured)}"
        )
    g = np.ones(3) if gains is None else np.asarray(gains, dtype=np.float64)
    src = cs.srgb_to_linear(measured) * g
    dst = cs.xyz_to_linear(cs.lab_to_xyz(ref_lab))
    design = np.column_stack([src, np.ones(len(src))]) if kind == "affine" else src
    sv = np.linalg.svd(design, compute_uv=False)
    if sv.min() < 0.005 * sv.max():  # near-collinear: greys only, or one hue
        raise CalibrationError("the patches do not span enough colours (add coloured patches, not only greys)")
    sol, *_ = np.linalg.lstsq(design, dst, rcond=None)
    matrix = sol.T
    corr = ColourCorrection(g, matrix)
    fitted_lab = cs.srgb_to_lab(np.clip(cs.linear_to_srgb(np.clip(apply_linear(src / g, corr), 0, 1)), 0, 1))
    de = cs.delta_e_2000(fitted_lab, ref_lab)
    names = names or [f"patch{i + 1}" for i in range(len(de))]
    return ColourCorrection(g, matrix, dict(zip(names, map(float, de))), {"kind": kind, "patches": len(de)})


def table_lab(table: pd.DataFrame, what: str, path) -> np.ndarray:
    """CIELAB (D65) of a table's colour columns: ``L, a, b``, or ``R, G, B`` as 8-bit sRGB."""
    from coupon.errors import CouponError
    from coupon.io.tables import numeric_columns

    if {"L", "a", "b"} <= set(table.columns):
        return numeric_columns(table, ["L", "a", "b"], what, path).to_numpy()
    if {"R", "G", "B"} <= set(table.columns):
        return cs.srgb_to_lab(numeric_columns(table, ["R", "G", "B"], what, path).to_numpy() / 255.0)
    raise CouponError(f"{what} needs colour columns L,a,b (CIELAB D65) or R,G,B (sRGB 0-255)", path)


def read_patch_table(path) -> pd.DataFrame:
    """Read a patch CSV: ``name, x_px, y_px, w_px, h_px`` and ``L, a, b`` or ``R, G, B`` (8-bit sRGB).

    Returns the table with reference CIELAB in columns ``L, a, b``.
    """
    from coupon.errors import CouponError
    from coupon.io.tables import numeric_columns, read_user_csv

    table = read_user_csv(path, "patch table")
    box = ["x_px", "y_px", "w_px", "h_px"]
    missing = [c for c in box if c not in table.columns]
    if missing:
        raise CouponError(f"patch table lacks columns {missing}; expected name,x_px,y_px,w_px,h_px and L,a,b or R,G,B", path)
    lab = table_lab(table, "patch table", path)
    boxes = numeric_columns(table, box, "patch table", path)
    out = table.copy()
    out[box] = boxes.round().astype(int)
    if "name" not in out.columns:
        out["name"] = [f"patch{i + 1}" for i in range(len(out))]
    out[["L", "a", "b"]] = lab
    return out
