"""Loading: every accepted format round-trips, calibration follows the TIFF tags, the rest is refused."""

from __future__ import annotations

import io
import struct
import time
import zipfile
import zlib

import numpy as np
import pytest
import tifffile
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from PIL import Image

from service.errors import ImageTooLargeError, RamiformError, SpecimenError, UnsupportedFormatError
from service.imaging import LoadedImage, load_image


def _encode(array: np.ndarray, fmt: str, **options) -> bytes:
    buffer = io.BytesIO()
    Image.fromarray(array).save(buffer, format=fmt, **options)
    return buffer.getvalue()


@pytest.fixture(scope="module")
def grey8() -> np.ndarray:
    return np.random.default_rng(1).integers(0, 256, size=(40, 56), dtype=np.uint8)


@pytest.fixture(scope="module")
def rgb8() -> np.ndarray:
    return np.random.default_rng(2).integers(0, 256, size=(40, 56, 3), dtype=np.uint8)


# ----------------------------------------------------------------------------- round trips


@pytest.mark.parametrize("fmt", ["PNG", "BMP", "TIFF"])
def test_lossless_formats_round_trip_grey_and_rgb_exactly(fmt, grey8, rgb8):
    loaded = load_image(_encode(grey8, fmt))
    assert loaded.format == fmt and loaded.bit_depth == 8 and loaded.n_pages == 1 and loaded.page == 0
    assert loaded.gray.dtype == np.float32 and loaded.gray.shape == grey8.shape
    np.testing.assert_array_equal(loaded.rgb[:, :, 1], grey8)
    np.testing.assert_allclose(loaded.gray, grey8 / 255.0, atol=1e-6)

    colour = load_image(_encode(rgb8, fmt))
    np.testing.assert_array_equal(colour.rgb, rgb8)
    # BT.709 luma (ITU-R BT.709), the weights skimage.color.rgb2gray uses.
    from skimage.color import rgb2gray

    np.testing.assert_allclose(colour.gray, rgb2gray(rgb8), atol=1e-5)


def test_png_16_bit_keeps_full_depth_in_gray():
    values = np.random.default_rng(3).integers(0, 65536, size=(32, 32), dtype=np.uint16)
    loaded = load_image(_encode(values, "PNG"))
    assert loaded.bit_depth == 16
    np.testing.assert_allclose(loaded.gray, values / 65535.0, atol=1e-6)


def test_png_rgba_is_composited_over_white():
    rgba = np.zeros((20, 20, 4), dtype=np.uint8)
    rgba[..., 0] = 200
    rgba[:, :10, 3] = 255  # left opaque red, right fully transparent
    loaded = load_image(_encode(rgba, "PNG"))
    np.testing.assert_array_equal(loaded.rgb[:, :10], np.broadcast_to([200, 0, 0], (20, 10, 3)))
    np.testing.assert_array_equal(loaded.rgb[:, 10:], 255)
    assert any("transparent" in w for w in loaded.warnings)


def test_jpeg_round_trip_is_close():
    smooth = np.tile(np.linspace(0, 255, 64, dtype=np.uint8), (48, 1))
    loaded = load_image(_encode(smooth, "JPEG", quality=95))
    assert loaded.format == "JPEG" and loaded.gray.shape == (48, 64)
    assert np.abs(loaded.rgb[:, :, 0].astype(int) - smooth).max() <= 4


def test_jpeg_exif_orientation_is_applied():
    # Orientation 6 (Exif 2.3, tag 274): the stored picture must turn 90 degrees clockwise
    # to display. Stored: 40 rows x 80 columns, left half black, right half white.
    stored = np.zeros((40, 80, 3), dtype=np.uint8)
    stored[:, 40:] = 255
    exif = Image.Exif()
    exif[0x0112] = 6
    loaded = load_image(_encode(stored, "JPEG", quality=95, exif=exif.tobytes()))
    assert loaded.gray.shape == (80, 40)
    # Turned clockwise, the stored left half (black) becomes the top half.
    assert loaded.gray[:35].mean() < 0.05 and loaded.gray[45:].mean() > 0.95


def test_tiff_16_bit_grey_and_rgba():
    values = np.random.default_rng(4).integers(0, 65536, size=(24, 30), dtype=np.uint16)
    buffer = io.BytesIO()
    tifffile.imwrite(buffer, values)
    loaded = load_image(buffer.getvalue())
    assert loaded.format == "TIFF" and loaded.bit_depth == 16
    np.testing.assert_allclose(loaded.gray, values / 65535.0, atol=1e-6)

    rgba = np.zeros((24, 30, 4), dtype=np.uint8)
    rgba[..., 2] = 180
    rgba[..., 3] = 255
    buffer = io.BytesIO()
    tifffile.imwrite(buffer, rgba, photometric="rgb", extrasamples=[2])
    np.testing.assert_array_equal(load_image(buffer.getvalue()).rgb, rgba[..., :3])


def test_tiff_multipage_reads_first_page_or_the_one_asked_for(grey8):
    pages = [grey8, 255 - grey8, grey8 // 2]
    buffer = io.BytesIO()
    with tifffile.TiffWriter(buffer) as writer:
        for p in pages:
            writer.write(p)
    data = buffer.getvalue()
    first = load_image(data)
    assert first.n_pages == 3 and first.page == 0
    np.testing.assert_array_equal(first.rgb[:, :, 0], pages[0])
    third = load_image(data, page=2)
    assert third.page == 2
    np.testing.assert_array_equal(third.rgb[:, :, 0], pages[2])
    with pytest.raises(SpecimenError, match="page 3 does not exist.*3 page"):
        load_image(data, page=3)
    with pytest.raises(SpecimenError, match="single page"):
        load_image(_encode(grey8, "PNG"), page=1)


@pytest.mark.parametrize(
    ("resolution", "unit", "expected_mm"),
    [
        # TIFF 6.0: XResolution is pixels per ResolutionUnit (2 = inch, 3 = centimetre).
        (300.0, "INCH", 25.4 / 300.0),
        (100.0, "CENTIMETER", 0.1),
    ],
)
def test_tiff_resolution_tags_give_pixel_size(grey8, resolution, unit, expected_mm):
    buffer = io.BytesIO()
    tifffile.imwrite(buffer, grey8, resolution=(resolution, resolution), resolutionunit=unit)
    loaded = load_image(buffer.getvalue())
    assert loaded.pixel_size_mm == pytest.approx(expected_mm, rel=1e-9)
    assert loaded.to_dict()["pixel_size_mm"] == pytest.approx(expected_mm, rel=1e-9)


def test_uncalibrated_files_have_no_pixel_size(grey8):
    buffer = io.BytesIO()
    tifffile.imwrite(buffer, grey8, resolution=(1, 1), resolutionunit="NONE")
    assert load_image(buffer.getvalue()).pixel_size_mm is None
    assert load_image(_encode(grey8, "PNG")).pixel_size_mm is None


def test_format_comes_from_content_not_name(tmp_path, grey8):
    path = tmp_path / "specimen.jpg"
    path.write_bytes(_encode(grey8, "PNG"))
    assert load_image(path).format == "PNG"
    assert isinstance(load_image(str(path)), LoadedImage)


# ----------------------------------------------------------------------------- refusals


def _zip_bytes() -> bytes:
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as archive:
        archive.writestr("specimen.png", b"not really")
    return buffer.getvalue()


@pytest.mark.parametrize(
    ("payload", "found"),
    [
        (b'<?xml version="1.0"?><svg xmlns="http://www.w3.org/2000/svg"><script>alert(1)</script></svg>', "SVG"),
        (b"<!DOCTYPE html><html><body><script>alert(1)</script></body></html>", "HTML"),
        (b"%PDF-1.7\n%\xe2\xe3\xcf\xd3\n1 0 obj", "PDF"),
        (_zip_bytes(), "ZIP archive"),
        (_encode(np.zeros((20, 20), dtype=np.uint8), "GIF"), "GIF"),
        (b"", "empty file"),
        (b"growth pattern, photographed on Tuesday\n", "plain text"),
        (bytes(np.random.default_rng(5).integers(0, 256, 512, dtype=np.uint8)), "unknown bytes"),
    ],
)
def test_other_content_is_refused_naming_what_it_is(payload, found):
    with pytest.raises(UnsupportedFormatError) as info:
        load_image(payload)
    message = str(info.value)
    assert found in message and "PNG" in message and "TIFF" in message
    assert info.value.status_code == 415


def test_text_named_png_is_refused(tmp_path):
    path = tmp_path / "specimen.png"
    path.write_text("this is not a picture")
    with pytest.raises(UnsupportedFormatError, match="plain text"):
        load_image(path)


def test_truncated_jpeg_is_a_clear_specimen_error(rgb8):
    data = _encode(np.repeat(np.repeat(rgb8, 8, axis=0), 8, axis=1), "JPEG", quality=90)
    for cut in (len(data) // 2, 200):
        with pytest.raises(SpecimenError, match="JPEG"):
            load_image(data[:cut])


def test_tiny_images_are_refused():
    with pytest.raises(SpecimenError, match="1 x 1 px"):
        load_image(_encode(np.zeros((1, 1), dtype=np.uint8), "PNG"))


def _png_bomb(side: int) -> bytes:
    """A valid 1-bit PNG of side x side black pixels (PNG specification: IHDR, zlib IDAT, IEND).

    Written chunk by chunk, because encoding 1.6 gigapixels through PIL takes a quarter
    of a minute; PIL's own header parser confirms the declared size below.
    """

    def chunk(kind: bytes, body: bytes) -> bytes:
        return struct.pack(">I", len(body)) + kind + body + struct.pack(">I", zlib.crc32(kind + body) & 0xFFFFFFFF)

    row = b"\x00" * (1 + side // 8)  # filter byte + packed bits
    packer = zlib.compressobj(9)
    idat = b"".join(packer.compress(row) for _ in range(side)) + packer.flush()
    header = struct.pack(">IIBBBBB", side, side, 1, 0, 0, 0, 0)
    return b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", header) + chunk(b"IDAT", idat) + chunk(b"IEND", b"")


def test_decompression_bomb_is_refused_from_the_header_fast():
    bomb = _png_bomb(40_000)
    assert len(bomb) < 300_000
    Image.MAX_IMAGE_PIXELS, saved = None, Image.MAX_IMAGE_PIXELS
    try:
        assert Image.open(io.BytesIO(bomb)).size == (40_000, 40_000)
    finally:
        Image.MAX_IMAGE_PIXELS = saved
    start = time.perf_counter()
    with pytest.raises(ImageTooLargeError, match="40000 x 40000") as info:
        load_image(bomb)
    # Decoding 1.6 gigapixels would take seconds and 1.6 GB; reading a header takes microseconds.
    assert time.perf_counter() - start < 0.5
    assert info.value.status_code == 413
    with pytest.raises(ImageTooLargeError):
        load_image(_encode(np.zeros((100, 100), dtype=np.uint8), "PNG"), max_pixels=9_999)


# ----------------------------------------------------------------------------- fuzzing


def _seed_files() -> list[bytes]:
    rng = np.random.default_rng(6)
    picture = rng.integers(0, 256, size=(24, 24, 3), dtype=np.uint8)
    tiff = io.BytesIO()
    tifffile.imwrite(tiff, picture[..., 0], resolution=(300, 300))
    return [_encode(picture, "PNG"), _encode(picture, "JPEG"), _encode(picture, "BMP"), tiff.getvalue()]


def test_tiff_with_differing_sample_depths_is_refused_with_our_error():
    # Found by the fuzz below: a header whose BitsPerSample values differ per sample
    # (8, 8, 16) made reading the page raise a bare TypeError.
    buffer = io.BytesIO()
    tifffile.imwrite(buffer, np.zeros((32, 32, 3), np.uint8), photometric="rgb")
    data = bytearray(buffer.getvalue())
    with tifffile.TiffFile(io.BytesIO(bytes(data))) as tif:
        offset = tif.pages[0].tags["BitsPerSample"].valueoffset
    data[offset + 4:offset + 6] = struct.pack("<H", 16)
    with pytest.raises(SpecimenError, match="damaged TIFF"):
        load_image(bytes(data))


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    which=st.integers(0, 3),
    edits=st.lists(st.tuples(st.integers(0, 4000), st.integers(0, 255)), max_size=8),
    cut=st.integers(8, 5000),
)
def test_damaged_files_raise_only_our_errors(which, edits, cut):
    data = bytearray(_SEEDS[which][:cut])
    for position, value in edits:
        if position < len(data):
            data[position] = value
    try:
        loaded = load_image(bytes(data))
    except RamiformError:
        return
    assert loaded.gray.dtype == np.float32 and loaded.rgb.dtype == np.uint8
    assert loaded.gray.shape == loaded.rgb.shape[:2]
    assert float(loaded.gray.min()) >= 0.0 and float(loaded.gray.max()) <= 1.0


_SEEDS = _seed_files()
