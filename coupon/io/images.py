"""Image loading: the one place where pixels enter ``coupon``.

Every command loads images through :func:`load_image`, which returns a
:class:`LoadedImage` whose ``rgb`` array follows the package convention:

============  ==============================================================
shape         ``(rows, cols, 3)``, channels last, RGB order
dtype/range   float32 in [0, 1], sRGB-encoded (not linear)
precision     16-bit sources keep their 65 536 levels (float32 holds them)
orientation   EXIF orientation applied, so row 0 is the top as a person sees it
============  ==============================================================

Files are read once: the bytes are hashed (SHA-256, for the audit trail), the
header is read with Pillow (size check before any decoding, EXIF tags) and the
pixels are decoded by OpenCV.  Input files are never written.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import io
import os
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path

import cv2
import numpy as np
from PIL import Image, UnidentifiedImageError

from coupon.errors import ImageLoadError

#: Default limit on width x height, against decompression bombs (250 megapixels).
DEFAULT_MAX_PIXELS = 250_000_000

#: File endings that :func:`load_image` accepts (case-insensitive).
IMAGE_SUFFIXES = (".jpg", ".jpeg", ".png", ".tif", ".tiff", ".bmp", ".webp")

# We check the pixel count ourselves before decoding, with our own limit and message.
Image.MAX_IMAGE_PIXELS = None
# Our messages replace OpenCV's own stderr warnings about bad files.
cv2.utils.logging.setLogLevel(cv2.utils.logging.LOG_LEVEL_SILENT)

_EXIF_ORIENTATION = 0x0112
_EXIF_IFD = 0x8769
_EXIF_DATETIME_ORIGINAL = 0x9003
_EXIF_DATETIME = 0x0132


@dataclass(frozen=True)
class LoadedImage:
    """A decoded image and what is known about its file.

    Attributes
    ----------
    path : Path
        The file it came from.
    pixels : (M, N, 3) ndarray of uint8 or float32
        The decoded pixels, RGB order, orientation applied: uint8 as decoded for an
        8-bit file, float32 sRGB in [0, 1] for a 16-bit or float file (then the same
        array as ``rgb``).
    rgb : (M, N, 3) ndarray of float32 (property)
        sRGB-encoded colour in [0, 1], the package convention: converted from
        ``pixels`` at the first access and kept (a job that can work on the 8-bit
        pixels, such as ``coupon pits``, never pays for the float copy).
    bit_depth : int
        Bits per channel of the source (8, 16 or 32 for float TIFF).
    sha256 : str
        Hex digest of the file's bytes.
    capture_time : datetime or None
        EXIF DateTimeOriginal (or DateTime) when present, as naive local time.
    notes : tuple of str
        What was done to fit the convention (orientation, alpha dropped, grey promoted).
    chroma_subsampling : str or None
        A colour JPEG's chroma sampling ("4:4:4", "4:2:2", "4:2:0", ...), None for other files.
        With 4:2:0 (most camera JPEGs) colour is stored per 2 x 2 pixels, which colours a speck's
        neighbours (see the panels command's warning).
    """

    path: Path
    pixels: np.ndarray = field(repr=False)
    bit_depth: int
    sha256: str
    capture_time: _dt.datetime | None = None
    notes: tuple[str, ...] = ()
    chroma_subsampling: str | None = None

    @cached_property
    def rgb(self) -> np.ndarray:
        """Float32 sRGB in [0, 1] (see the class notes)."""
        return float01(self.pixels)  # pixels are uint8 or already float32 (see load_image)

    @property
    def rgb_u8(self) -> np.ndarray | None:
        """The 8-bit RGB pixels as decoded, or None for a 16-bit or float image."""
        return self.pixels if self.pixels.dtype == np.uint8 else None

    @property
    def shape_rc(self) -> tuple[int, int]:
        """(rows, cols) of the image."""
        return self.pixels.shape[0], self.pixels.shape[1]


def _read_bytes(path: Path) -> bytes:
    if not path.exists():
        raise ImageLoadError("file not found; check the path", path)
    if path.is_dir():
        raise ImageLoadError("is a folder, not an image file", path)
    try:
        with open(path, "rb") as fh:
            data = fh.read()
    except PermissionError:
        raise ImageLoadError("permission denied; make the file readable (chmod +r)", path) from None
    except OSError as exc:
        raise ImageLoadError(f"cannot be read ({exc.strerror or exc})", path) from None
    if not data:
        raise ImageLoadError("file is empty (0 bytes)", path)
    return data


def _jpeg_truncated(data: bytes) -> bool:
    """True when a JPEG stream has no end-of-image marker after its last scan.

    Inside entropy-coded data 0xFF is always followed by 0x00 (byte stuffing), so
    an end-of-image marker FF D9 after the last start-of-scan FF DA means the
    scan is complete; an embedded EXIF thumbnail ends before the main scan.
    """
    sos = data.rfind(b"\xff\xda")
    eoi = data.rfind(b"\xff\xd9")
    return sos < 0 or eoi < sos


def _parse_exif_time(text: object) -> _dt.datetime | None:
    if not isinstance(text, str):
        return None
    text = text.strip().rstrip("\x00")
    for fmt in ("%Y:%m:%d %H:%M:%S", "%Y-%m-%d %H:%M:%S", "%Y:%m:%d %H:%M:%S.%f"):
        try:
            return _dt.datetime.strptime(text, fmt)
        except ValueError:
            continue
    return None


def _read_exif(im: Image.Image) -> Image.Exif:
    """EXIF tags without decoding pixels.

    Pillow's ``getexif`` decodes a whole PNG to look for a late eXIf chunk, so
    for PNG only the EXIF found before the pixel data is read.
    """
    if im.format == "PNG":
        exif = Image.Exif()
        raw = im.info.get("exif")
        if raw:
            exif.load(raw)
        return exif
    return im.getexif()


def _chroma_subsampling(im) -> str | None:
    """J:a:b notation of a three-component JPEG's sampling factors (from its frame header), else None."""
    layer = getattr(im, "layer", None)
    if not layer or len(layer) != 3:
        return None
    (_, hy, vy, _), (_, hc, vc, _) = layer[0], layer[1]
    if (hc, vc) != tuple(layer[2][1:3]) or hc <= 0 or vc <= 0 or hy % hc or vy % vc:
        return None
    a = 4 * hc // hy
    return f"4:{a}:{a if vy == vc else 0}"


def _header(data: bytes, path: Path, max_pixels: int) -> tuple[int, _dt.datetime | None, bool, str | None]:
    """Check the header before decoding; return (EXIF orientation, capture time, whether the file is an
    8-bit three-channel JPEG, its chroma subsampling)."""
    try:
        with Image.open(io.BytesIO(data)) as im:
            width, height = im.size
            fmt = im.format
            rgb_jpeg = fmt in ("JPEG", "MPO") and im.mode == "RGB"  # MPO: a camera JPEG with extra pictures
            chroma = _chroma_subsampling(im) if rgb_jpeg else None
            if width > 0 and height > 0 and width * height <= max_pixels:
                exif = _read_exif(im)
    except UnidentifiedImageError:
        raise ImageLoadError(
            "not an image in a supported format (JPEG, PNG, TIFF, BMP, WebP)", path
        ) from None
    except (OSError, ValueError, SyntaxError) as exc:
        raise ImageLoadError(f"corrupt image header ({exc})", path) from None
    if width <= 0 or height <= 0:
        raise ImageLoadError(f"image header gives an empty size {width}x{height}", path)
    if width * height > max_pixels:
        raise ImageLoadError(
            f"{width}x{height} = {width * height / 1e6:.0f} megapixels exceeds the limit of "
            f"{max_pixels / 1e6:.0f} megapixels (raise it with --max-megapixels if the file is genuine)",
            path,
        )
    if fmt == "JPEG" and _jpeg_truncated(data):
        raise ImageLoadError("truncated JPEG (no end-of-image marker); copy the file again", path)
    orientation = int(exif.get(_EXIF_ORIENTATION, 1) or 1)
    capture = None
    try:
        capture = _parse_exif_time(exif.get_ifd(_EXIF_IFD).get(_EXIF_DATETIME_ORIGINAL))
    except Exception:  # a malformed EXIF block is not a reason to refuse the pixels
        capture = None
    if capture is None:
        capture = _parse_exif_time(exif.get(_EXIF_DATETIME))
    return orientation, capture, rgb_jpeg, chroma


def _apply_orientation(arr: np.ndarray, orientation: int) -> np.ndarray:
    """Apply an EXIF orientation tag (1..8) so that row 0 is the visual top."""
    ops = {
        2: lambda a: a[:, ::-1],
        3: lambda a: a[::-1, ::-1],
        4: lambda a: a[::-1, :],
        5: lambda a: np.swapaxes(a, 0, 1),
        6: lambda a: np.swapaxes(a, 0, 1)[:, ::-1],
        7: lambda a: np.swapaxes(a, 0, 1)[::-1, ::-1],
        8: lambda a: np.swapaxes(a, 0, 1)[::-1, :],
    }
    op = ops.get(orientation)
    return arr if op is None else np.ascontiguousarray(op(arr))


def to_rgb3(arr: np.ndarray) -> tuple[np.ndarray, int]:
    """A decoded array (any of OpenCV's layouts, RGB order) as three channels, its pixel type kept.

    Parameters
    ----------
    arr : (M, N) or (M, N, C) ndarray of uint8, uint16 or float
        C may be 1, 2 (grey and alpha), 3 or 4 (alpha is dropped).

    Returns
    -------
    rgb : (M, N, 3) ndarray of the input's type
    bit_depth : int
        8, 16, or 32 for float.

    Raises
    ------
    ValueError
        Another pixel type.
    """
    if arr.dtype == np.uint8:
        depth = 8
    elif arr.dtype == np.uint16:
        depth = 16
    elif arr.dtype in (np.float32, np.float64):
        depth = 32
    else:
        raise ValueError(f"unsupported pixel type {arr.dtype}; expected uint8, uint16 or float")
    if arr.ndim == 2:
        arr = arr[:, :, None]
    if arr.shape[2] == 1:
        arr = np.repeat(arr, 3, axis=2)
    elif arr.shape[2] == 4:
        arr = arr[:, :, :3]
    elif arr.shape[2] == 2:  # grey + alpha
        arr = np.repeat(arr[:, :, :1], 3, axis=2)
    return arr, depth


def to_float_rgb(arr: np.ndarray) -> tuple[np.ndarray, int]:
    """Convert a decoded array (any of OpenCV's layouts, RGB order) to the package convention.

    Parameters
    ----------
    arr : (M, N) or (M, N, C) ndarray of uint8, uint16 or float
        C may be 1, 3 or 4 (alpha is dropped).

    Returns
    -------
    rgb : (M, N, 3) ndarray of float32 in [0, 1]
    bit_depth : int
    """
    arr, depth = to_rgb3(arr)
    scale = {8: 1.0 / 255.0, 16: 1.0 / 65535.0, 32: 1.0}[depth]
    rgb = arr.astype(np.float32) * np.float32(scale)
    if depth == 32:
        np.clip(rgb, 0.0, 1.0, out=rgb)
    return rgb, depth


def float01(pixels: np.ndarray) -> np.ndarray:
    """8-bit pixels as float32 in [0, 1], exactly as ``LoadedImage.rgb`` converts them; other input as it is.

    For the jobs that take either type and convert only the part they need (a crop,
    a reduced copy, a sampled profile).
    """
    if pixels.dtype != np.uint8:
        return pixels
    return np.multiply(pixels, np.float32(1.0 / 255.0), dtype=np.float32)  # one new array, no uint8->float temporary


def to_uint8(rgb: np.ndarray) -> np.ndarray:
    """Float [0, 1] image to uint8 [0, 255], rounding (the one converter for writing pictures)."""
    return np.clip(np.rint(np.asarray(rgb, dtype=np.float32) * 255.0), 0, 255).astype(np.uint8)


#: OpenCV's flags for decoding straight to 8-bit RGB without applying EXIF orientation (None before 4.10).
_IMREAD_RGB = (cv2.IMREAD_COLOR_RGB | cv2.IMREAD_IGNORE_ORIENTATION) if hasattr(cv2, "IMREAD_COLOR_RGB") else None


def load_image(path: str | os.PathLike, max_pixels: int = DEFAULT_MAX_PIXELS) -> LoadedImage:
    """Load an image file into the package convention.

    Parameters
    ----------
    path : path-like
        JPEG, PNG, TIFF (8 or 16 bit), BMP or WebP file.
    max_pixels : int
        Refuse images with more pixels than this (decompression-bomb guard).

    Returns
    -------
    LoadedImage

    Raises
    ------
    ImageLoadError
        Missing, empty, unreadable, truncated, corrupt, not an image, too large.
    """
    path = Path(path)
    data = _read_bytes(path)
    orientation, capture, rgb_jpeg, chroma = _header(data, path, max_pixels)
    buf = np.frombuffer(data, dtype=np.uint8)
    # a colour JPEG is decoded straight to RGB (OpenCV 4.10 or later): no BGR-to-RGB pass over the frame
    # and no second frame-sized array; EXIF orientation is applied below, as for every other file
    direct = rgb_jpeg and _IMREAD_RGB is not None
    decoded = cv2.imdecode(buf, _IMREAD_RGB if direct else cv2.IMREAD_UNCHANGED)
    if decoded is None or decoded.size == 0:
        raise ImageLoadError("corrupt or truncated image data (decoder gave no pixels)", path)
    notes: list[str] = []
    channels = 1 if decoded.ndim == 2 else decoded.shape[2]
    if direct:
        pass
    elif channels == 1:
        notes.append("greyscale promoted to RGB")
    elif channels == 2:
        notes.append("greyscale promoted to RGB; alpha channel dropped")
    elif channels == 3:
        decoded = cv2.cvtColor(decoded, cv2.COLOR_BGR2RGB)
    elif channels == 4:
        decoded = cv2.cvtColor(decoded, cv2.COLOR_BGRA2RGB)
        notes.append("alpha channel dropped")
    if orientation != 1:
        decoded = _apply_orientation(decoded, orientation)
        notes.append(f"EXIF orientation {orientation} applied")
    try:
        pixels, depth = to_rgb3(decoded)
        if pixels.dtype != np.uint8:
            pixels = to_float_rgb(pixels)[0]  # 16-bit and float files: the float copy is the only copy
    except ValueError as exc:
        raise ImageLoadError(str(exc), path) from None
    return LoadedImage(
        path=path,
        pixels=pixels,
        bit_depth=depth,
        sha256=hashlib.sha256(data).hexdigest(),
        capture_time=capture,
        notes=tuple(notes),
        chroma_subsampling=chroma,
    )


def file_sha256(path: str | os.PathLike) -> str:
    """SHA-256 of a file's bytes, read in blocks.

    Raises
    ------
    CouponError
        The file is missing or cannot be read.
    """
    from coupon.errors import CouponError

    h = hashlib.sha256()
    try:
        with open(path, "rb") as fh:
            for block in iter(lambda: fh.read(1 << 20), b""):
                h.update(block)
    except FileNotFoundError:
        raise CouponError("file not found; check the path", path) from None
    except OSError as exc:
        raise CouponError(f"cannot be read ({exc.strerror or exc})", path) from None
    return h.hexdigest()


def try_sha256(path: str | os.PathLike) -> str:
    """SHA-256 of a file, or "" when it is missing or unreadable (the batch then reports it)."""
    from coupon.errors import CouponError

    try:
        return file_sha256(path) if Path(path).is_file() else ""
    except CouponError:
        return ""


def expand_image_paths(items: list[str | os.PathLike]) -> list[Path]:
    """Expand folders into their image files (sorted by name); keep files as given."""
    out: list[Path] = []
    for item in items:
        p = Path(item)
        if p.is_dir():
            out.extend(sorted(q for q in p.iterdir() if q.suffix.lower() in IMAGE_SUFFIXES))
        else:
            out.append(p)
    return out
