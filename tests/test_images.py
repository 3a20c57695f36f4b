"""Image loading: formats, conventions, EXIF, and every kind of bad file."""

from __future__ import annotations

import datetime as dt
import struct
import zlib
from pathlib import Path

import cv2
import numpy as np
import pytest
from PIL import Image

from coupon.errors import ImageLoadError
from coupon.io.images import load_image

RNG = np.random.default_rng(3)
GRADIENT = np.dstack([*np.meshgrid(np.linspace(0, 1, 40), np.linspace(0, 1, 30)), np.full((30, 40), 0.25)])


def _u8(rgb):
    return np.clip(np.rint(rgb * 255), 0, 255).astype(np.uint8)


@pytest.mark.parametrize("suffix", [".png", ".tif", ".bmp", ".webp"])
def test_lossless_8bit_formats_round_trip(tmp_path, suffix):
    path = tmp_path / f"img{suffix}"
    params = [cv2.IMWRITE_WEBP_QUALITY, 101] if suffix == ".webp" else []  # quality > 100: lossless WebP
    assert cv2.imwrite(str(path), cv2.cvtColor(_u8(GRADIENT), cv2.COLOR_RGB2BGR), params)
    img = load_image(path)
    assert img.rgb.dtype == np.float32 and img.rgb.shape == (30, 40, 3)
    assert img.bit_depth == 8
    np.testing.assert_array_equal(_u8(img.rgb), _u8(GRADIENT))


def test_jpeg_loads_close_to_source(tmp_path):
    path = tmp_path / "img.jpg"
    cv2.imwrite(str(path), cv2.cvtColor(_u8(GRADIENT), cv2.COLOR_RGB2BGR), [cv2.IMWRITE_JPEG_QUALITY, 95])
    img = load_image(path)
    assert np.abs(img.rgb - GRADIENT).mean() < 0.02


@pytest.mark.parametrize("suffix", [".png", ".tif"])
def test_16bit_precision_is_kept(tmp_path, suffix):
    ramp = (np.arange(30 * 40 * 3).reshape(30, 40, 3) * 17 % 65536).astype(np.uint16)
    path = tmp_path / f"deep{suffix}"
    assert cv2.imwrite(str(path), ramp[:, :, ::-1])
    img = load_image(path)
    assert img.bit_depth == 16
    np.testing.assert_array_equal(np.rint(img.rgb * 65535).astype(np.uint16), ramp)


def test_pixels_kept_as_decoded_and_one_float_copy_at_most(tmp_path):
    # 8-bit: the decoded pixels are kept, the float copy made once on first use and equal to pixels / 255
    p8 = tmp_path / "eight.png"
    cv2.imwrite(str(p8), cv2.cvtColor(_u8(GRADIENT), cv2.COLOR_RGB2BGR))
    img = load_image(p8)
    assert img.rgb_u8 is img.pixels and img.pixels.dtype == np.uint8
    np.testing.assert_array_equal(img.pixels, _u8(GRADIENT))
    assert "rgb" not in vars(img)  # not made until asked for
    assert img.rgb is img.rgb  # made once
    np.testing.assert_allclose(img.rgb, img.pixels / 255.0, rtol=1e-6, atol=0)
    # 16-bit: converted at load; the float array is the only copy
    p16 = tmp_path / "deep.png"
    cv2.imwrite(str(p16), (np.arange(30 * 40 * 3).reshape(30, 40, 3) * 17 % 65536).astype(np.uint16))
    deep = load_image(p16)
    assert deep.rgb_u8 is None and deep.rgb is deep.pixels and deep.pixels.dtype == np.float32


def test_greyscale_is_promoted_and_alpha_dropped(tmp_path):
    grey = tmp_path / "grey.png"
    cv2.imwrite(str(grey), _u8(GRADIENT[:, :, 0]))
    g = load_image(grey)
    assert g.rgb.shape == (30, 40, 3) and np.all(g.rgb[..., 0] == g.rgb[..., 2])
    assert any("greyscale" in n for n in g.notes)
    rgba = tmp_path / "rgba.png"
    bgra = np.dstack([cv2.cvtColor(_u8(GRADIENT), cv2.COLOR_RGB2BGR), np.full((30, 40), 128, np.uint8)])
    cv2.imwrite(str(rgba), bgra)
    a = load_image(rgba)
    assert a.rgb.shape == (30, 40, 3) and any("alpha" in n for n in a.notes)
    np.testing.assert_array_equal(_u8(a.rgb), _u8(GRADIENT))


def _jpeg_with_exif(path: Path, arr_u8: np.ndarray, orientation: int = 1, when: str | None = None):
    im = Image.fromarray(arr_u8)
    exif = Image.Exif()
    exif[0x0112] = orientation
    if when:
        exif.get_ifd(0x8769)[0x9003] = when
    im.save(path, quality=95, exif=exif.tobytes())


@pytest.mark.parametrize("orientation,op", [
    (1, lambda a: a), (3, lambda a: a[::-1, ::-1]), (6, lambda a: np.rot90(a, -1)), (8, lambda a: np.rot90(a, 1)),
])
def test_exif_orientation_applied(tmp_path, orientation, op):
    # EXIF 2.3 orientation tag: 3 = rotate 180, 6 = rotate 90 CW to view, 8 = rotate 90 CCW to view
    base = np.zeros((20, 40, 3), np.uint8)
    base[:5, :10] = 255  # a bright block in the stored top-left corner
    path = tmp_path / "o.jpg"
    _jpeg_with_exif(path, base, orientation)
    img = load_image(path)
    expected = op(base)
    assert img.rgb.shape[:2] == expected.shape[:2]
    assert np.abs(_u8(img.rgb).astype(int) - expected.astype(int)).mean() < 6


def test_capture_time_from_exif(tmp_path):
    path = tmp_path / "t.jpg"
    _jpeg_with_exif(path, np.full((8, 8, 3), 100, np.uint8), when="2026:03:14 09:26:53")
    assert load_image(path).capture_time == dt.datetime(2026, 3, 14, 9, 26, 53)


def test_sha256_of_file_bytes(tmp_path):
    import hashlib

    path = tmp_path / "a.png"
    cv2.imwrite(str(path), _u8(GRADIENT))
    assert load_image(path).sha256 == hashlib.sha256(path.read_bytes()).hexdigest()


def test_input_file_is_not_modified(tmp_path):
    path = tmp_path / "a.jpg"
    cv2.imwrite(str(path), _u8(GRADIENT))
    before, mtime = path.read_bytes(), path.stat().st_mtime_ns
    load_image(path)
    assert path.read_bytes() == before and path.stat().st_mtime_ns == mtime


# -- bad input: each refused with a one-line message naming the file -------------

def _png_header_only(path: Path, width: int, height: int):
    """A valid PNG header claiming a huge size, followed by a few bytes of pixel data."""

    def chunk(kind: bytes, body: bytes) -> bytes:
        return struct.pack(">I", len(body)) + kind + body + struct.pack(">I", zlib.crc32(kind + body))

    ihdr = struct.pack(">IIBBBBB", width, height, 8, 2, 0, 0, 0)
    idat = zlib.compress(b"\x00" * 64)
    path.write_bytes(b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", ihdr) + chunk(b"IDAT", idat) + chunk(b"IEND", b""))


def _check_refused(path: Path, *words: str, **kw):
    with pytest.raises(ImageLoadError) as info:
        load_image(path, **kw)
    msg = str(info.value)
    assert "\n" not in msg and str(path) in msg
    for w in words:
        assert w in msg.lower()
    return msg


def test_missing_file(tmp_path):
    _check_refused(tmp_path / "nope.jpg", "not found")


def test_empty_file(tmp_path):
    p = tmp_path / "empty.jpg"
    p.write_bytes(b"")
    _check_refused(p, "empty")


def test_text_named_jpg(tmp_path):
    p = tmp_path / "notes.jpg"
    p.write_text("panel P07 looked fine\n")
    _check_refused(p, "not an image")


def test_truncated_jpeg(tmp_path):
    p = tmp_path / "cut.jpg"
    cv2.imwrite(str(p), (RNG.random((200, 300, 3)) * 255).astype(np.uint8))
    data = p.read_bytes()
    p.write_bytes(data[: len(data) // 2])
    _check_refused(p, "truncated")


def test_truncated_png(tmp_path):
    p = tmp_path / "cut.png"
    cv2.imwrite(str(p), (RNG.random((200, 300, 3)) * 255).astype(np.uint8))
    data = p.read_bytes()
    p.write_bytes(data[: len(data) // 2])
    _check_refused(p)


def test_decompression_bomb_header(tmp_path):
    p = tmp_path / "bomb.png"
    _png_header_only(p, 100_000, 100_000)  # 10 000 megapixels claimed
    _check_refused(p, "megapixels", "limit")


def test_pixel_limit_is_configurable(tmp_path):
    p = tmp_path / "a.png"
    cv2.imwrite(str(p), _u8(GRADIENT))
    _check_refused(p, "exceeds", max_pixels=100)
    assert load_image(p, max_pixels=30 * 40).rgb.shape == (30, 40, 3)


def test_unreadable_permissions(tmp_path, monkeypatch):
    # simulated: CI runs as root, where chmod cannot deny a read
    p = tmp_path / "locked.jpg"
    p.write_bytes(b"\xff\xd8\xff")
    real_open = open

    def deny(file, *a, **k):
        if Path(file) == p:
            raise PermissionError(13, "Permission denied")
        return real_open(file, *a, **k)

    monkeypatch.setattr("builtins.open", deny)
    _check_refused(p, "permission denied")


def test_folder_is_not_an_image(tmp_path):
    _check_refused(tmp_path, "folder")


def test_colour_jpeg_decoded_straight_to_rgb_equals_opencv_bgr_decode(tmp_path):
    # reference: OpenCV's own BGR decode of the same file, channels swapped
    rng = np.random.default_rng(9)
    arr = cv2.GaussianBlur(rng.integers(0, 256, (240, 320, 3), dtype=np.uint8), (0, 0), 2)
    path = tmp_path / "c.jpg"
    cv2.imwrite(str(path), arr, [cv2.IMWRITE_JPEG_QUALITY, 90])
    ref = cv2.cvtColor(cv2.imread(str(path), cv2.IMREAD_UNCHANGED), cv2.COLOR_BGR2RGB)
    img = load_image(path)
    assert img.rgb_u8.dtype == np.uint8 and np.array_equal(img.rgb_u8, ref)
    assert img.notes == ()


@pytest.mark.parametrize("name, flag, pil_code", [
    ("4:4:4", cv2.IMWRITE_JPEG_SAMPLING_FACTOR_444, 0), ("4:2:2", cv2.IMWRITE_JPEG_SAMPLING_FACTOR_422, 1),
    ("4:2:0", cv2.IMWRITE_JPEG_SAMPLING_FACTOR_420, 2)])
def test_jpeg_chroma_subsampling_is_read_from_the_frame_header(tmp_path, name, flag, pil_code):
    # reference: Pillow's own reading of the same header (JpegImagePlugin.get_sampling: 0 = 4:4:4,
    # 1 = 4:2:2, 2 = 4:2:0; the sampling factors of ITU-T T.81's frame header)
    from PIL import JpegImagePlugin

    path = tmp_path / "img.jpg"
    cv2.imwrite(str(path), cv2.cvtColor(_u8(GRADIENT), cv2.COLOR_RGB2BGR), [cv2.IMWRITE_JPEG_SAMPLING_FACTOR, flag])
    with Image.open(path) as im:
        assert JpegImagePlugin.get_sampling(im) == pil_code
    assert load_image(path).chroma_subsampling == name


def test_no_chroma_subsampling_for_other_files_and_grey_jpegs(tmp_path):
    png, grey = tmp_path / "img.png", tmp_path / "grey.jpg"
    cv2.imwrite(str(png), _u8(GRADIENT))
    cv2.imwrite(str(grey), _u8(GRADIENT)[..., 0])
    assert load_image(png).chroma_subsampling is None
    assert load_image(grey).chroma_subsampling is None
