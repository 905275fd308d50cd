"""Reading specimen photographs: format by content, pixel limits, calibration.

The format is decided from the first bytes of the file (its magic number), never from a
file name or a declared media type. The pixel count is read from the header and checked
against a limit before any pixel is decoded, so a small file that would decode to an
enormous image (a decompression bomb) is refused without allocating it.
"""

from __future__ import annotations

import io
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from PIL import BmpImagePlugin, Image, ImageOps, JpegImagePlugin, PngImagePlugin

from service.caveats import Caveat
from service.errors import ImageTooLargeError, RamiformError, SpecimenError, UnsupportedFormatError

__all__ = ["ACCEPTED_FORMATS", "DEFAULT_MAX_PIXELS", "MIN_SIDE_PX", "LoadedImage", "load_image", "sniff_format"]

#: Formats :func:`load_image` reads, as named in :attr:`LoadedImage.format`.
ACCEPTED_FORMATS = ("PNG", "JPEG", "TIFF", "BMP")
#: Default pixel limit (width x height of the decoded page): 200 megapixels.
DEFAULT_MAX_PIXELS = 200_000_000
#: Smallest side accepted; anything smaller holds no measurable specimen.
MIN_SIDE_PX = 16

_ACCEPTED_TEXT = "accepted formats: PNG, JPEG, TIFF (8/16-bit, multi-page), BMP"

# Luma weights of ITU-R BT.709 (the ones skimage.color.rgb2gray uses).
_LUMA = np.array([0.2125, 0.7154, 0.0721], dtype=np.float32)

# Resolution units of the TIFF 6.0 specification (tag 296): 2 = inch, 3 = centimetre.
_MM_PER_RESOLUTION_UNIT = {2: 25.4, 3: 10.0}
# Resolutions that image software writes when nobody calibrated anything.
_PLACEHOLDER_DPI = (72.0, 96.0)


@dataclass(frozen=True, eq=False)
class LoadedImage:
    """One decoded page of a specimen photograph.

    Attributes
    ----------
    gray : ndarray of float32, shape (H, W)
        Brightness in [0, 1] (BT.709 luma for colour images, full bit depth kept).
    rgb : ndarray of uint8, shape (H, W, 3)
        The picture for overlays (grey pictures repeated on three channels; alpha
        composited over white).
    format : str
        ``"PNG"``, ``"JPEG"``, ``"TIFF"`` or ``"BMP"``, decided from the content.
    pixel_size_mm : float or None
        Pixel side in mm from the TIFF resolution tags; None when the file carries none.
    bit_depth : int
        Bits per sample of the stored image (1, 8, 16 or 32).
    n_pages : int
        Pages (images) in the file; 1 except for multi-page TIFF.
    page : int
        The page decoded (0-based).
    warnings : list of str
        Remarks about the file (anisotropic or placeholder resolution, dropped alpha...).
    """

    gray: np.ndarray
    rgb: np.ndarray
    format: str
    pixel_size_mm: float | None
    bit_depth: int
    n_pages: int = 1
    page: int = 0
    warnings: list[str] = field(default_factory=list)

    @property
    def shape(self) -> tuple[int, int]:
        """(height, width) in pixels."""
        return self.gray.shape  # type: ignore[return-value]

    def to_dict(self) -> dict[str, Any]:
        """Describe the image (not its pixels) for the analysis JSON."""
        h, w = self.gray.shape
        return {
            "format": self.format,
            "width_px": int(w),
            "height_px": int(h),
            "bit_depth": int(self.bit_depth),
            "n_pages": int(self.n_pages),
            "page": int(self.page),
            "pixel_size_mm": self.pixel_size_mm,
            "warnings": [str(w) for w in self.warnings],  # plain text; codes: service.contract
        }


def sniff_format(data: bytes) -> str:
    """Name the format of ``data`` from its first bytes.

    Returns one of :data:`ACCEPTED_FORMATS`, or a description of what was found for
    anything else ("PDF", "ZIP archive", "SVG/XML text", "HTML", "GIF", "empty file",
    "plain text", "unknown bytes", ...).
    """
    head = bytes(data[:16])
    if not head:
        return "empty file"
    if head.startswith(b"\x89PNG\r\n\x1a\n"):
        return "PNG"
    if head.startswith(b"\xff\xd8\xff"):
        return "JPEG"
    if head[:4] in (b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+"):
        return "TIFF"
    if head.startswith(b"BM") and len(data) >= 26:
        return "BMP"
    binary = {
        b"GIF87a": "GIF", b"GIF89a": "GIF", b"%PDF": "PDF", b"PK\x03\x04": "ZIP archive",
        b"PK\x05\x06": "ZIP archive (empty)", b"\x1f\x8b": "gzip archive", b"7z\xbc\xaf\x27\x1c": "7-Zip archive",
        b"Rar!": "RAR archive", b"BZh": "bzip2 archive", b"\xfd7zXZ": "xz archive", b"%!PS": "PostScript",
        b"\x00\x00\x00\x0cjP  ": "JPEG 2000", b"\xff\x4f\xff\x51": "JPEG 2000", b"8BPS": "Photoshop document",
        b"\x00\x00\x01\x00": "ICO icon", b"\x7fELF": "executable",
    }
    for magic, name in binary.items():
        if head.startswith(magic):
            return name
    if head[:4] == b"RIFF" and head[8:12] == b"WEBP":
        return "WebP"
    if head[4:12] in (b"ftypheic", b"ftypheix", b"ftypmif1", b"ftypavif"):
        return "HEIF/AVIF"
    text = bytes(data[:2048]).lstrip(b"\xef\xbb\xbf \t\r\n").lower()
    if b"<svg" in text:
        return "SVG/XML text"
    if text.startswith((b"<!doctype html", b"<html", b"<head", b"<body", b"<script")) or b"<html" in text:
        return "HTML"
    if text.startswith(b"<?xml") or text.startswith(b"<"):
        return "XML text"
    sample = bytes(data[:2048])
    try:
        sample.decode("utf-8")
        is_text = all(32 <= b or b in (9, 10, 13) for b in sample)
    except UnicodeDecodeError:
        is_text = False
    return "plain text" if is_text else "unknown bytes"


def load_image(
    source: bytes | bytearray | memoryview | str | Path,
    *,
    page: int | None = None,
    max_pixels: int = DEFAULT_MAX_PIXELS,
) -> LoadedImage:
    """Decode a specimen photograph into grey levels and an RGB picture.

    Parameters
    ----------
    source : bytes or str or Path
        The file content, or a path to it. A path's suffix is ignored.
    page : int, optional
        Page of a multi-page TIFF (0-based). Default: the first page. Other formats
        have only page 0.
    max_pixels : int
        Largest width x height accepted; checked from the header before decoding.

    Returns
    -------
    LoadedImage

    Raises
    ------
    UnsupportedFormatError
        The content is not PNG, JPEG, TIFF or BMP (the message names what it is).
    ImageTooLargeError
        The header declares more than ``max_pixels`` pixels.
    SpecimenError
        The file is truncated or damaged, the page does not exist, or the image is
        smaller than 16 x 16 pixels.

    Notes
    -----
    JPEG orientation follows the EXIF Orientation tag (TIFF/EP and Exif 2.3, tag 274).
    TIFF calibration follows the TIFF 6.0 specification: XResolution/YResolution are
    pixels per ResolutionUnit (2 = inch, 3 = cm), so the pixel side is
    ``25.4 / XResolution`` mm for inches and ``10 / XResolution`` mm for centimetres.
    """
    if max_pixels < 1:
        raise ValueError(f"max_pixels must be positive, got {max_pixels}")
    if page is not None and (not isinstance(page, (int, np.integer)) or page < 0):
        raise ValueError(f"page must be a non-negative integer, got {page!r}")
    data = Path(source).read_bytes() if isinstance(source, (str, Path)) else bytes(source)
    kind = sniff_format(data)
    if kind not in ACCEPTED_FORMATS:
        raise UnsupportedFormatError(f"unsupported content: found {kind}; {_ACCEPTED_TEXT}")
    if kind == "TIFF":
        loaded = _load_tiff(data, page, max_pixels)
    else:
        if page not in (None, 0):
            raise SpecimenError(f"page {page} does not exist: a {kind} file has a single page (page 0)")
        loaded = _load_with_pil(data, kind, max_pixels)
    h, w = loaded.gray.shape
    if h < MIN_SIDE_PX or w < MIN_SIDE_PX:
        raise SpecimenError(
            f"image is {w} x {h} px; at least {MIN_SIDE_PX} x {MIN_SIDE_PX} px is needed to measure a specimen"
        )
    return loaded


def _check_pixels(width: int, height: int, max_pixels: int, kind: str) -> None:
    if width <= 0 or height <= 0:
        raise SpecimenError(f"damaged {kind} header: declared size {width} x {height} px")
    if width * height > max_pixels:
        raise ImageTooLargeError(
            f"{kind} declares {width} x {height} = {width * height:,} pixels, over the limit of {max_pixels:,}"
        )


_PIL_CLASSES = {
    "PNG": PngImagePlugin.PngImageFile,
    "JPEG": JpegImagePlugin.JpegImageFile,
    "BMP": BmpImagePlugin.BmpImageFile,
}
_PIL_DECODE_ERRORS = (OSError, SyntaxError, ValueError, EOFError, IndexError, KeyError, TypeError, ZeroDivisionError)


def _load_with_pil(data: bytes, kind: str, max_pixels: int) -> LoadedImage:
    # Strategy: instantiate the format's plugin class directly. That parses the header
    # only (no decoding) and skips PIL's process-wide decompression-bomb setting, so the
    # limit is ours, per call, and checked before ``load()`` allocates anything.
    notes: list[str] = []
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            im = _PIL_CLASSES[kind](io.BytesIO(data))
    except _PIL_DECODE_ERRORS as exc:
        raise SpecimenError(f"damaged {kind} header: {exc}") from None
    _check_pixels(im.size[0], im.size[1], max_pixels, kind)
    bit_depth = _pil_bit_depth(data, kind, im)
    try:
        im.load()
        if kind == "JPEG":
            im = ImageOps.exif_transpose(im)
    except _PIL_DECODE_ERRORS as exc:
        raise SpecimenError(f"truncated or damaged {kind} file: {exc}") from None

    mode = im.mode
    if mode in ("I;16", "I;16B", "I;16L", "I", "F"):
        arr = np.asarray(im)
        if mode == "F" or arr.dtype.kind == "f":
            gray = _rescale_float(arr.astype(np.float32))
        else:
            gray = (arr.astype(np.float32) / np.float32(65535.0 if bit_depth == 16 else max(1, int(arr.max()))))
        np.clip(gray, 0.0, 1.0, out=gray)
        rgb = np.repeat((gray * 255.0 + 0.5).astype(np.uint8)[:, :, None], 3, axis=2)
        return LoadedImage(gray, rgb, kind, None, bit_depth, 1, 0, notes)

    if mode == "P":
        im = im.convert("RGBA" if "transparency" in im.info else "RGB")
    elif mode == "CMYK" or mode == "YCbCr":
        im = im.convert("RGB")
    elif mode == "1":
        im = im.convert("L")
    elif mode not in ("L", "LA", "RGB", "RGBA", "PA", "La", "RGBa"):
        im = im.convert("RGBA" if "A" in mode else "RGB")
    arr = np.asarray(im)
    return _from_uint8(arr, kind, bit_depth, notes)


def _pil_bit_depth(data: bytes, kind: str, im: Image.Image) -> int:
    if kind == "PNG":
        return int(data[24])  # IHDR bit depth (PNG specification, section 11.2.2)
    if kind == "BMP":
        return 1 if im.mode == "1" else 8
    return int(im.bits) if hasattr(im, "bits") else 8


def _from_uint8(arr: np.ndarray, kind: str, bit_depth: int, notes: list[str],
                pixel_size_mm: float | None = None, n_pages: int = 1, page: int = 0) -> LoadedImage:
    """Build a LoadedImage from uint8 grey (H, W), grey+alpha (H, W, 2), RGB or RGBA."""
    if arr.ndim == 3 and arr.shape[2] in (2, 4):
        colour, alpha = arr[:, :, :-1], arr[:, :, -1]
        if alpha.min() < 255:
            notes.append(Caveat("alpha_composited", "transparent pixels were composited over white"))
            a = alpha.astype(np.float32)[:, :, None] / np.float32(255.0)
            arr = (colour * a + np.float32(255.0) * (1.0 - a) + 0.5).astype(np.uint8)
        else:
            arr = colour
        if arr.shape[2] == 1:
            arr = arr[:, :, 0]
    if arr.ndim == 2:
        gray = arr.astype(np.float32)
        gray *= np.float32(1.0 / 255.0)
        rgb = np.repeat(arr[:, :, None], 3, axis=2)
    else:
        rgb = np.ascontiguousarray(arr[:, :, :3], dtype=np.uint8)
        gray = _luma(rgb, 255.0)
    return LoadedImage(gray, rgb, kind, pixel_size_mm, bit_depth, n_pages, page, notes)


def _luma(rgb: np.ndarray, full_scale: float) -> np.ndarray:
    """BT.709 luma in [0, 1] as float32, one channel at a time (no float64 H x W x 3 copy)."""
    w = _LUMA / np.float32(full_scale)
    gray = rgb[:, :, 0].astype(np.float32)
    gray *= w[0]
    for c in (1, 2):
        gray += rgb[:, :, c].astype(np.float32) * w[c]
    np.clip(gray, 0.0, 1.0, out=gray)
    return gray


def _rescale_float(arr: np.ndarray) -> np.ndarray:
    finite = np.isfinite(arr)
    if not finite.all():
        arr = np.where(finite, arr, np.float32(0.0)).astype(np.float32)
    lo, hi = float(arr.min()), float(arr.max())
    if lo >= 0.0 and hi <= 1.0:
        return arr.astype(np.float32, copy=False)
    return ((arr - lo) / np.float32(hi - lo if hi > lo else 1.0)).astype(np.float32)


def _load_tiff(data: bytes, page: int | None, max_pixels: int) -> LoadedImage:
    import tifffile

    try:
        tif = tifffile.TiffFile(io.BytesIO(data))
    except Exception as exc:  # tifffile raises many kinds on damaged headers
        raise SpecimenError(f"damaged TIFF header: {exc}") from None
    with tif:
        try:
            pages = tif.pages
            n_pages = len(pages)
            index = 0 if page is None else int(page)
            if n_pages == 0:
                raise SpecimenError("TIFF file holds no image")
            if index >= n_pages:
                raise SpecimenError(
                    f"page {index} does not exist: the TIFF file has {n_pages} page(s), numbered 0 to {n_pages - 1}"
                )
            tp = pages[index]
            if hasattr(tp, "aspage"):
                tp = tp.aspage()
            # A damaged header can hold anything in these tags (a tuple of differing sample
            # depths, say), so reading them belongs to the guarded part too.
            width, height = int(tp.imagewidth), int(tp.imagelength)
            _check_pixels(width, height, max_pixels, "TIFF")
            if int(getattr(tp, "imagedepth", 1)) > 1:
                raise UnsupportedFormatError("TIFF page is a volume (image depth > 1); 2-D pages only")
            notes: list[str] = []
            pixel_size_mm = _tiff_pixel_size_mm(tp, notes)
            bits = int(tp.bitspersample)
            photometric = int(tp.photometric)
        except RamiformError:
            raise
        except Exception as exc:
            raise SpecimenError(f"damaged TIFF page table or header: {exc}") from None
        try:
            arr = tp.asarray()
        except Exception as exc:
            arr = _tiff_page_with_pil(data, index, exc)
    return _tiff_array_to_image(arr, photometric, tp, bits, pixel_size_mm, n_pages, index, notes)


def _tiff_page_with_pil(data: bytes, index: int, first_error: Exception) -> np.ndarray:
    """Decode a page tifffile cannot (e.g. LZW without imagecodecs) with PIL instead."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            from PIL import TiffImagePlugin

            im = TiffImagePlugin.TiffImageFile(io.BytesIO(data))
            im.seek(index)
            im.load()
            return np.asarray(im)
    except Exception:
        raise SpecimenError(f"truncated or damaged TIFF file: {first_error}") from None


def _tiff_array_to_image(arr: np.ndarray, photometric: int, tp: Any, bits: int, pixel_size_mm: float | None,
                         n_pages: int, index: int, notes: list[str]) -> LoadedImage:
    # Photometric interpretations, TIFF 6.0: 0 min-is-white, 1 min-is-black, 2 RGB, 3 palette.
    arr = np.asarray(arr)
    if arr.ndim == 3 and arr.shape[0] in (2, 3, 4) and arr.shape[2] not in (2, 3, 4):
        arr = np.moveaxis(arr, 0, -1)  # planar configuration 2 (separate planes)
    if photometric == 3 and getattr(tp, "colormap", None) is not None and arr.ndim == 2:
        cmap = np.asarray(tp.colormap)  # 3 x 2**bits, 16-bit entries
        arr = (cmap[:, arr.astype(np.intp)] >> 8).astype(np.uint8).transpose(1, 2, 0)
        return _from_uint8(arr, "TIFF", bits, notes, pixel_size_mm, n_pages, index)
    if photometric not in (0, 1, 2) and not (arr.ndim == 3 and arr.shape[2] in (3, 4)):
        raise UnsupportedFormatError(
            f"TIFF photometric interpretation {photometric} is not read; grey, RGB, RGBA and palette pages are"
        )
    if arr.ndim not in (2, 3) or (arr.ndim == 3 and arr.shape[2] not in (2, 3, 4)):
        raise UnsupportedFormatError(f"TIFF page of shape {arr.shape} is not a grey, RGB or RGBA picture")
    if arr.dtype == bool:
        arr = arr.astype(np.uint8) * np.uint8(255)
    if arr.dtype == np.uint8:
        if photometric == 0:
            arr = 255 - arr
        return _from_uint8(arr, "TIFF", bits, notes, pixel_size_mm, n_pages, index)
    # 16-bit and float pages: keep the full depth in ``gray``, reduce to 8 bits for ``rgb``.
    if arr.dtype.kind in "ui":
        full = float(np.iinfo(arr.dtype).max) if arr.dtype.itemsize <= 2 else float(max(1, arr.max()))
        scaled = arr.astype(np.float32) / np.float32(full)
    elif arr.dtype.kind == "f":
        scaled = _rescale_float(arr.astype(np.float32))
    else:
        raise UnsupportedFormatError(f"TIFF sample type {arr.dtype} is not read")
    np.clip(scaled, 0.0, 1.0, out=scaled)
    if photometric == 0:
        scaled = 1.0 - scaled
    if scaled.ndim == 3 and scaled.shape[2] in (2, 4):
        colour, alpha = scaled[:, :, :-1], scaled[:, :, -1:]
        if alpha.min() < 1.0:
            notes.append(Caveat("alpha_composited", "transparent pixels were composited over white"))
            colour = colour * alpha + (1.0 - alpha)
        scaled = colour[:, :, 0] if colour.shape[2] == 1 else colour
    if scaled.ndim == 2:
        gray = scaled.astype(np.float32, copy=False)
        rgb = np.repeat((gray * 255.0 + 0.5).astype(np.uint8)[:, :, None], 3, axis=2)
    else:
        gray = _luma(scaled, 1.0)
        rgb = (scaled * 255.0 + 0.5).astype(np.uint8)
    return LoadedImage(gray, rgb, "TIFF", pixel_size_mm, bits, n_pages, index, notes)


def _tiff_pixel_size_mm(tp: Any, notes: list[str]) -> float | None:
    """Pixel side in mm from XResolution/YResolution/ResolutionUnit (TIFF 6.0, tags 282, 283, 296)."""
    tags = tp.tags
    if "XResolution" not in tags:
        return None
    unit_tag = tags.get("ResolutionUnit")
    unit = int(unit_tag.value) if unit_tag is not None else 2  # TIFF 6.0 default: inch
    mm_per_unit = _MM_PER_RESOLUTION_UNIT.get(unit)

    def per_unit(tag: Any) -> float:
        value = tag.value
        if isinstance(value, tuple):
            num, den = value[0], value[1]
            return float(num) / float(den) if den else 0.0
        return float(value)

    xres = per_unit(tags["XResolution"])
    yres = per_unit(tags["YResolution"]) if "YResolution" in tags else xres
    if mm_per_unit is None or xres <= 0 or yres <= 0:
        return None
    if abs(xres - yres) > 1e-3 * max(xres, yres):
        notes.append(Caveat(
            "pixels_not_square",
            f"pixels are not square (XResolution {xres:g}, YResolution {yres:g}); the horizontal pixel size is used",
        ))
    if unit == 2 and any(abs(xres - d) < 1e-6 for d in _PLACEHOLDER_DPI):
        notes.append(Caveat("resolution_placeholder",
                             f"resolution {xres:g} dpi is a common software default and may not be a calibration"))
    return mm_per_unit / xres
