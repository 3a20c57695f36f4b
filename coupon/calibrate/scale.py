"""Scale calibration: pixels to millimetres.

Four methods give one result type, :class:`ScaleCalibration`:

* :func:`scale_given` - a px/mm the user knows;
* :func:`scale_from_checkerboard` - a printed checkerboard of known square size
  (OpenCV's chessboard detector), with a homography to the target plane in mm;
* :func:`scale_from_points` - two points a known distance apart;
* :func:`scale_from_rectangle` - the four corners of a rectangle of known size.

Coordinates: OpenCV's (x, y) = (col, row) order is used for every point array
here, which is why they are named ``*_xy``.  A homography maps image ``xy`` in
pixels to plane ``xy`` in millimetres.  ``px_per_mm`` is the areal mean scale
over the reference object: sqrt(area in px^2 / area in mm^2).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import cv2
import numpy as np

from coupon.errors import CalibrationError

#: Method names of :class:`ScaleCalibration`, for the profile and the command line.
SCALE_METHODS = ("given", "checkerboard", "two-points", "rectangle")


@dataclass(frozen=True)
class ScaleCalibration:
    """Pixels-to-millimetres calibration of one camera set-up.

    Attributes
    ----------
    px_per_mm : float
        Mean scale over the reference object (areal mean under perspective).
    uncertainty_px_per_mm : float
        One standard uncertainty of ``px_per_mm``.
    method : str
        One of :data:`SCALE_METHODS`.
    homography : (3, 3) ndarray or None
        Image xy (px) to plane xy (mm); None when the method gives no perspective.
    reprojection_error_mm : float or None
        RMS distance between the detected and the ideal target points, in mm.
    details : dict
        Method-specific numbers (corner count, spread of the local scale, ...).
    """

    px_per_mm: float
    uncertainty_px_per_mm: float
    method: str
    homography: np.ndarray | None = None
    reprojection_error_mm: float | None = None
    details: dict = field(default_factory=dict)

    def __post_init__(self):
        check_px_per_mm(self.px_per_mm)
        if self.method not in SCALE_METHODS:
            raise CalibrationError(f"unknown scale method {self.method!r}; expected one of {SCALE_METHODS}")

    def to_dict(self) -> dict:
        return {
            "method": self.method,
            "px_per_mm": float(self.px_per_mm),
            "uncertainty_px_per_mm": float(self.uncertainty_px_per_mm),
            "homography_px_to_mm": None if self.homography is None else np.asarray(self.homography).tolist(),
            "reprojection_error_mm": self.reprojection_error_mm,
            "details": self.details,
        }

    @classmethod
    def from_dict(cls, d: dict) -> "ScaleCalibration":
        h = d.get("homography_px_to_mm")
        return cls(
            px_per_mm=float(d["px_per_mm"]),
            uncertainty_px_per_mm=float(d.get("uncertainty_px_per_mm", 0.0)),
            method=str(d["method"]),
            homography=None if h is None else np.asarray(h, dtype=np.float64).reshape(3, 3),
            reprojection_error_mm=d.get("reprojection_error_mm"),
            details=dict(d.get("details", {})),
        )


def check_px_per_mm(px_per_mm: float) -> float:
    """Validate a scale: finite and positive; quoted back when wrong."""
    try:
        value = float(px_per_mm)
    except (TypeError, ValueError):
        raise CalibrationError(f"px_per_mm must be a number, got {px_per_mm!r}") from None
    if not np.isfinite(value) or value <= 0:
        raise CalibrationError(f"px_per_mm must be finite and positive, got {px_per_mm!r}")
    return value


def scale_given(px_per_mm: float, uncertainty_px_per_mm: float = 0.0) -> ScaleCalibration:
    """A scale the user knows (from a microscope's calibration, a scanner's dpi...)."""
    return ScaleCalibration(check_px_per_mm(px_per_mm), float(uncertainty_px_per_mm), "given")


def scale_from_points(
    p1_xy: tuple[float, float], p2_xy: tuple[float, float], distance_mm: float, point_unc_px: float = 0.5
) -> ScaleCalibration:
    """Scale from two image points a known distance apart.

    ``point_unc_px`` is the standard uncertainty of placing each point; the
    scale's uncertainty follows from sqrt(2) * point_unc_px over the distance.
    """
    if not (np.isfinite(distance_mm) and distance_mm > 0):
        raise CalibrationError(f"distance must be finite and positive, got {distance_mm!r} mm")
    d_px = float(np.hypot(p2_xy[0] - p1_xy[0], p2_xy[1] - p1_xy[1]))
    if d_px < 2:
        raise CalibrationError(f"the two points are {d_px:.1f} px apart; pick points farther apart")
    px_per_mm = d_px / distance_mm
    unc = np.sqrt(2) * point_unc_px / distance_mm
    return ScaleCalibration(
        px_per_mm, unc, "two-points", details={"distance_px": d_px, "distance_mm": float(distance_mm)}
    )


def _order_quad_xy(corners_xy: np.ndarray) -> np.ndarray:
    """Order four points top-left, top-right, bottom-right, bottom-left (image xy)."""
    c = np.asarray(corners_xy, dtype=np.float64).reshape(4, 2)
    centre = c.mean(axis=0)
    ang = np.arctan2(c[:, 1] - centre[1], c[:, 0] - centre[0])
    c = c[np.argsort(ang)]  # counter-clockwise in math terms = clockwise on screen (y down)
    start = np.argmin(c.sum(axis=1))  # top-left has the smallest x + y
    return np.roll(c, -start, axis=0)


def quad_area_px2(corners_xy: np.ndarray) -> float:
    """Area of a quadrilateral in px^2 (shoelace formula via OpenCV)."""
    return float(abs(cv2.contourArea(np.asarray(corners_xy, dtype=np.float32).reshape(-1, 1, 2))))


def scale_from_rectangle(corners_xy: np.ndarray, width_mm: float, height_mm: float) -> ScaleCalibration:
    """Scale and homography from the four corners of a rectangle of known size.

    The corners may come in any order; the longer image side is matched to the
    longer of ``width_mm`` and ``height_mm`` so that a portrait panel photographed
    in landscape still rectifies.
    """
    if not (width_mm > 0 and height_mm > 0):
        raise CalibrationError(f"rectangle size must be positive, got {width_mm} x {height_mm} mm")
    quad = _order_quad_xy(corners_xy)
    top = np.linalg.norm(quad[1] - quad[0]) + np.linalg.norm(quad[2] - quad[3])
    side = np.linalg.norm(quad[3] - quad[0]) + np.linalg.norm(quad[2] - quad[1])
    w_mm, h_mm = (max(width_mm, height_mm), min(width_mm, height_mm))
    if side > top:
        w_mm, h_mm = h_mm, w_mm
    dst = np.array([[0, 0], [w_mm, 0], [w_mm, h_mm], [0, h_mm]], dtype=np.float64)
    hom = cv2.getPerspectiveTransform(quad.astype(np.float32), dst.astype(np.float32))
    area = quad_area_px2(quad)
    if area <= 0:
        raise CalibrationError("the four corners enclose no area; check their order and values")
    px_per_mm = float(np.sqrt(area / (w_mm * h_mm)))
    # corner placement of 0.5 px on each of 4 corners, propagated to the area scale
    unc = px_per_mm * 0.5 / np.sqrt(area) * np.sqrt(2)
    return ScaleCalibration(
        px_per_mm, float(unc), "rectangle", homography=hom, reprojection_error_mm=0.0,
        details={"corners_xy": quad.tolist(), "width_mm": float(w_mm), "height_mm": float(h_mm)},
    )


def _find_chessboard(grey: np.ndarray, inner: tuple[int, int]) -> np.ndarray | None:
    """Detect inner corners (N, 2) xy on a downscaled copy, refine at full size."""
    max_side = 1600
    scale = min(1.0, max_side / max(grey.shape))
    small = cv2.resize(grey, None, fx=scale, fy=scale, interpolation=cv2.INTER_AREA) if scale < 1 else grey
    found, corners = cv2.findChessboardCornersSB(small, inner, flags=cv2.CALIB_CB_NORMALIZE_IMAGE)
    if not found:
        flags = cv2.CALIB_CB_ADAPTIVE_THRESH | cv2.CALIB_CB_NORMALIZE_IMAGE
        found, corners = cv2.findChessboardCorners(small, inner, flags=flags)
    if not found:
        return None
    corners = corners.reshape(-1, 1, 2).astype(np.float32) / np.float32(scale)
    # refine at full resolution; the window is about a quarter of a square
    spacing = np.median(np.linalg.norm(np.diff(corners.reshape(-1, 2), axis=0), axis=1))
    win = int(np.clip(spacing / 4, 3, 25))
    criteria = (cv2.TERM_CRITERIA_EPS + cv2.TERM_CRITERIA_MAX_ITER, 50, 1e-3)
    corners = cv2.cornerSubPix(grey, corners, (win, win), (-1, -1), criteria)
    return corners.reshape(-1, 2).astype(np.float64)


def scale_from_checkerboard(
    rgb: np.ndarray, squares: tuple[int, int], square_mm: float
) -> ScaleCalibration:
    """Scale and homography from a photo of a printed checkerboard.

    Parameters
    ----------
    rgb : (M, N, 3) ndarray of float32
        The photo, package convention.
    squares : (int, int)
        Squares of the board, columns x rows, as a person counts them on the sheet.
    square_mm : float
        Printed side of one square (measure the printout).

    Returns
    -------
    ScaleCalibration
        ``homography`` maps image px to board mm with the origin at the first
        inner corner; ``reprojection_error_mm`` is the RMS corner residual.
    """
    cols, rows = squares
    if cols < 3 or rows < 3:
        raise CalibrationError(f"a checkerboard needs at least 3x3 squares, got {cols}x{rows}")
    if not (square_mm > 0):
        raise CalibrationError(f"square size must be positive, got {square_mm} mm")
    inner = (cols - 1, rows - 1)
    grey = cv2.cvtColor(np.clip(rgb * 255 + 0.5, 0, 255).astype(np.uint8), cv2.COLOR_RGB2GRAY)
    img_xy = _find_chessboard(grey, inner)
    if img_xy is None:
        raise CalibrationError(
            f"no {cols}x{rows}-square checkerboard found; check --checker (squares as counted on the "
            "sheet, columns x rows), that the whole board is in the frame, sharp and evenly lit"
        )
    jj, ii = np.meshgrid(np.arange(inner[0]), np.arange(inner[1]))
    board_mm = np.column_stack([jj.ravel(), ii.ravel()]).astype(np.float64) * square_mm
    hom, _ = cv2.findHomography(img_xy, board_mm, method=0)
    if hom is None:
        raise CalibrationError("the checkerboard corners give no homography (degenerate view)")
    proj = cv2.perspectiveTransform(img_xy.reshape(-1, 1, 2), hom).reshape(-1, 2)
    resid_mm = np.linalg.norm(proj - board_mm, axis=1)
    rms_mm = float(np.sqrt(np.mean(resid_mm**2)))

    grid = img_xy.reshape(inner[1], inner[0], 2)
    outer = np.array([grid[0, 0], grid[0, -1], grid[-1, -1], grid[-1, 0]])
    area_mm2 = (inner[0] - 1) * (inner[1] - 1) * square_mm**2
    px_per_mm = float(np.sqrt(quad_area_px2(outer) / area_mm2))
    # local scale of every cell: sqrt of its area in px^2 over the square's mm^2
    cells = np.stack([grid[:-1, :-1], grid[:-1, 1:], grid[1:, 1:], grid[1:, :-1]], axis=2)
    x, y = cells[..., 0], cells[..., 1]
    cell_area = 0.5 * np.abs(np.sum(x * np.roll(y, -1, axis=2) - np.roll(x, -1, axis=2) * y, axis=2))
    local = np.sqrt(cell_area / square_mm**2).ravel()
    spread = float(np.std(local))
    # uncertainty of the mean scale: corner noise (from the fit residual) over the board extent
    extent_mm = np.sqrt(area_mm2)
    unc = float(np.hypot(px_per_mm * rms_mm / extent_mm, spread / np.sqrt(local.size)))
    return ScaleCalibration(
        px_per_mm, unc, "checkerboard", homography=hom, reprojection_error_mm=rms_mm,
        details={
            "squares": [cols, rows],
            "square_mm": float(square_mm),
            "corners": int(len(img_xy)),
            "local_px_per_mm_min": float(local.min()),
            "local_px_per_mm_max": float(local.max()),
            "local_px_per_mm_std": spread,
            "board_outer_corners_xy": outer.tolist(),
        },
    )


def warp_perspective(src: np.ndarray, m: np.ndarray, out_wh: tuple[int, int], *, flags: int = cv2.INTER_LINEAR,
                     border: int = cv2.BORDER_REPLICATE, border_value: float = 0.0,
                     dst: np.ndarray | None = None) -> np.ndarray:
    """``cv2.warpPerspective`` by OpenCV's own code, never by Intel IPP's.

    OpenCV 5.1 warps float pictures through IPP where it can: a result 3.5e-4 away from OpenCV's
    own (IPP maps coordinates exactly, OpenCV to 1/32 px), and one whose last bit depends on how
    the call was split over threads, so a panel's rust area changed in the fourth digit with
    ``--workers``.  OpenCV 5.0 and earlier, and machines without IPP (ARM), always use OpenCV's own
    code: switching IPP off here gives every version, machine and thread count the same warp.
    The switch is per thread in OpenCV (``cv::ipp::setUseIPP``) and is put back after the call.
    """
    ipp = cv2.ipp.useIPP()
    cv2.ipp.setUseIPP(False)
    try:
        # dst=None: OpenCV allocates the output
        return cv2.warpPerspective(src, m, out_wh, dst=dst, flags=flags, borderMode=border, borderValue=border_value)
    finally:
        cv2.ipp.setUseIPP(ipp)


def warp_to_mm_grid(
    rgb: np.ndarray, homography_px_to_mm: np.ndarray, size_mm: tuple[float, float], out_px_per_mm: float,
    origin_mm: tuple[float, float] = (0.0, 0.0), dst: np.ndarray | None = None,
) -> np.ndarray:
    """Rectify an image region to a millimetre grid at a fixed resolution.

    Parameters
    ----------
    size_mm : (width_mm, height_mm)
        Extent of the output on the plane.
    out_px_per_mm : float
        Resolution of the output grid.
    origin_mm : (x_mm, y_mm)
        Plane point that lands on the output's top-left pixel corner.
    dst : ndarray, optional
        Output array of the grid's shape and the input's type and channels (a numpy-allocated
        array: one that OpenCV allocates itself faults in 4 kB pages, about 5 ms for a 13.5 MB panel).
    """
    check_px_per_mm(out_px_per_mm)
    s = float(out_px_per_mm)
    # output pixel (u, v) has its centre at plane point ((u + 0.5) / s, (v + 0.5) / s) + origin
    to_grid = np.array(
        [[s, 0, -origin_mm[0] * s - 0.5], [0, s, -origin_mm[1] * s - 0.5], [0, 0, 1]], dtype=np.float64
    )
    m = to_grid @ np.asarray(homography_px_to_mm, dtype=np.float64)
    out_wh = (int(round(size_mm[0] * s)), int(round(size_mm[1] * s)))
    return warp_perspective(rgb, m, out_wh, flags=cv2.INTER_AREA if s < 1 else cv2.INTER_LINEAR, dst=dst)
