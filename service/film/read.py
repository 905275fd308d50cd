"""Reading a growth film: a video, a multi-page TIFF, or several still frames with their times.

Every reader gives the same thing, a :class:`FilmSource`: the frame count, the frame times
in seconds from the first frame, the frame size, and a way to walk the frames one at a time
as grey pictures (float32 in [0, 1]), so a long film is never held in memory whole. Videos
are decoded with PyAV, which ships its own FFmpeg; nothing is fetched at run time.

Limits (frames, pixels per frame, pixels in all, duration) are checked before any frame is
analysed; beyond them the film is refused with ``ImageTooLargeError`` (413). A film that
cannot be read (a truncated video, frames of different sizes, one frame only, no times)
raises ``SpecimenError`` (422); bytes that are no film at all ``UnsupportedFormatError`` (415).
"""

from __future__ import annotations

import io
import math
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass

import numpy as np

from service.errors import ImageTooLargeError, SpecimenError, UnsupportedFormatError

__all__ = ["FilmLimits", "FilmSource", "open_film", "film_from_frames"]

# Containers recognised from their first bytes (the name the user gave is only data).
_VIDEO_SIGNATURES = (
    (4, b"ftyp", "MP4/MOV"),  # ISO base media (MP4, MOV, M4V) at offset 4
    (0, b"RIFF", "AVI"),
    (0, b"\x1aE\xdf\xa3", "MKV/WebM"),
)
_TIFF_SIGNATURES = (b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+")


@dataclass(frozen=True)
class FilmLimits:
    """The largest film accepted; beyond any of these the film is refused (413)."""

    max_frames: int = 400
    max_pixels_per_frame: int = 40_000_000
    max_total_pixels: int = 800_000_000
    max_duration_s: float = 30 * 24 * 3600.0  # a month of time-lapse

    def check(self, n_frames: int, shape: tuple[int, int], duration_s: float) -> None:
        pixels = int(shape[0]) * int(shape[1])
        if n_frames > self.max_frames:
            raise ImageTooLargeError(f"the film has {n_frames} frames; at most {self.max_frames} are analysed "
                                     "(keep every n-th frame, or cut the film)")
        if pixels > self.max_pixels_per_frame:
            raise ImageTooLargeError(f"a frame has {pixels} pixels ({shape[1]} x {shape[0]}); at most "
                                     f"{self.max_pixels_per_frame} per frame are accepted")
        if n_frames * pixels > self.max_total_pixels:
            raise ImageTooLargeError(f"the film holds {n_frames * pixels} pixels in all; at most "
                                     f"{self.max_total_pixels} are accepted (fewer frames or a smaller size)")
        if duration_s > self.max_duration_s:
            raise ImageTooLargeError(f"the film spans {duration_s:.0f} s; at most {self.max_duration_s:.0f} s "
                                     "are accepted (check the frame times or the interval given)")


@dataclass(frozen=True, eq=False)
class FilmSource:
    """A film ready to be walked frame by frame.

    Attributes
    ----------
    format : str
        ``"video (MP4/MOV)"``, ``"video (AVI)"``, ``"TIFF"`` or ``"frames"``.
    times_s : ndarray of float
        Time of each frame from the first, s (strictly increasing).
    times_source : str
        Where the times came from: ``container``, ``file``, ``interval`` or ``given``.
    shape : (int, int)
        Frame height and width, px.
    pixel_size_mm : float or None
        Calibration the file carries (TIFF resolution tags), else None.
    """

    format: str
    times_s: np.ndarray
    times_source: str
    shape: tuple[int, int]
    pixel_size_mm: float | None
    _frames: Callable[[], Iterator[np.ndarray]]
    _last_rgb: np.ndarray

    @property
    def n_frames(self) -> int:
        return int(self.times_s.size)

    def frames(self) -> Iterator[np.ndarray]:
        """The frames in order, each a grey float32 (H, W) picture in [0, 1]."""
        yield from self._frames()

    def last_rgb(self) -> np.ndarray:
        """The last frame in colour (uint8 H x W x 3), read like a photograph."""
        return self._last_rgb


def _gray(rgb_or_gray: np.ndarray) -> np.ndarray:
    a = np.asarray(rgb_or_gray)
    if a.dtype == np.uint8:
        scale = np.float32(1.0 / 255.0)
    elif a.dtype == np.uint16:
        scale = np.float32(1.0 / 65535.0)
    elif a.dtype == bool:
        a, scale = a.astype(np.float32), np.float32(1.0)
    else:
        a = a.astype(np.float32)
        top = float(a.max()) if a.size else 1.0
        scale = np.float32(1.0 / top) if top > 1.0 else np.float32(1.0)
    if a.ndim == 3:
        channels = a[..., :3].astype(np.float32)
        gray = channels @ np.array([0.2125, 0.7154, 0.0721], dtype=np.float32)  # ITU-R BT.709 luma
        return gray * scale
    if a.ndim != 2:
        raise SpecimenError(f"a frame must be a grey or colour picture, got an array of shape {a.shape}")
    return a.astype(np.float32) * scale


def _rgb(a: np.ndarray) -> np.ndarray:
    a = np.asarray(a)
    if a.dtype != np.uint8:
        a = (np.clip(_gray(a) if a.ndim == 2 else a.astype(np.float32) / max(1.0, float(a.max())), 0, 1)
             * 255 + 0.5).astype(np.uint8)
    if a.ndim == 2:
        a = np.repeat(a[:, :, None], 3, axis=2)
    return np.ascontiguousarray(a[..., :3])


def _times(n: int, found: np.ndarray | None, found_source: str, frame_interval_s: float | None,
           ) -> tuple[np.ndarray, str]:
    if frame_interval_s is not None:
        if not (math.isfinite(frame_interval_s) and frame_interval_s > 0):
            raise SpecimenError(f"the frame interval must be a positive number of seconds, got {frame_interval_s!r}")
        return np.arange(n, dtype=float) * float(frame_interval_s), "interval"
    if found is None:
        raise SpecimenError("the film carries no frame times: give the interval between frames in seconds "
                            "(--frame-interval, or frame_interval_s)")
    times = np.asarray(found, dtype=float)
    if times.size != n or not np.all(np.isfinite(times)):
        raise SpecimenError("the frame times are incomplete: give the interval between frames in seconds")
    times = times - times[0]
    if np.any(np.diff(times) <= 0):
        raise SpecimenError("the frame times do not increase from frame to frame: give the interval between "
                            "frames in seconds instead")
    return times, found_source


def _check_count(n: int) -> None:
    if n < 2:
        raise SpecimenError(f"a film needs at least two frames to show growth; this one has {n}")


# ----------------------------------------------------------------------------- video


def _open_video(data: bytes, label: str, frame_interval_s: float | None, limits: FilmLimits) -> FilmSource:
    import av

    def container():
        try:
            return av.open(io.BytesIO(data), mode="r")
        except (av.FFmpegError, ValueError, OSError) as exc:
            raise SpecimenError(f"the video cannot be opened ({label}): {exc}") from exc

    times: list[float] = []
    shape: tuple[int, int] | None = None
    last_rgb = None
    # Pass 1: count the frames, read their times (PTS), keep the last frame; the frames
    # themselves are decoded again when walked, so a long film never sits in memory whole.
    with container() as c:
        if not c.streams.video:
            raise UnsupportedFormatError(f"the {label} file holds no video stream")
        stream = c.streams.video[0]
        stream.thread_type = "AUTO"
        height, width = int(stream.codec_context.height or 0), int(stream.codec_context.width or 0)
        if height and width:
            limits.check(0, (height, width), 0.0)  # refuse a huge frame size before decoding any
        try:
            for frame in c.decode(stream):
                if shape is None:
                    shape = (frame.height, frame.width)
                    limits.check(0, shape, 0.0)
                elif (frame.height, frame.width) != shape:
                    raise SpecimenError(f"the video changes frame size ({shape[1]} x {shape[0]} px, then "
                                        f"{frame.width} x {frame.height} px); all frames must have one size")
                times.append(float(frame.time) if frame.time is not None else math.nan)
                if len(times) > limits.max_frames:
                    limits.check(len(times), shape, 0.0)
                last = frame
        except av.FFmpegError as exc:
            raise SpecimenError(f"the video is damaged or truncated after {len(times)} frames: {exc}") from exc
        if times:
            last_rgb = last.to_ndarray(format="rgb24")
        declared = stream.frames
    n = len(times)
    if n == 0:
        raise SpecimenError("the video holds no frame that can be decoded (damaged or truncated)")
    # A long video's header may count one frame its decoder drops; more missing is a cut file.
    if declared and n < declared - (1 if declared >= 10 else 0):
        raise SpecimenError(f"the video is truncated: its header lists {declared} frames, only {n} decode")
    _check_count(n)
    found = None if any(math.isnan(t) for t in times) else np.asarray(times)
    times_s, source = _times(n, found, "container", frame_interval_s)
    limits.check(n, shape, float(times_s[-1]))

    def frames() -> Iterator[np.ndarray]:
        from service.imaging.load import _luma

        # Colour, then the luma a photograph's loader takes, so that every frame's grey is the
        # grey of the last frame the scene model was decided on.
        with container() as c:
            stream = c.streams.video[0]
            stream.thread_type = "AUTO"
            for frame in c.decode(stream):
                yield _luma(frame.to_ndarray(format="rgb24"), 255.0)

    return FilmSource(f"video ({label})", times_s, source, shape, None, frames, last_rgb)


# ----------------------------------------------------------------------------- TIFF


def _tiff_times(tif) -> np.ndarray | None:
    """Frame times a TIFF stack records: ImageJ's ``finterval``, else each page's DateTime tag."""
    from datetime import datetime

    meta = tif.imagej_metadata or {}
    interval = meta.get("finterval")
    n = len(tif.pages)
    if interval is not None:
        try:
            interval = float(interval)
        except (TypeError, ValueError):
            interval = None
        if interval and interval > 0:
            return np.arange(n, dtype=float) * interval
    stamps = []
    for page in tif.pages:
        tag = page.tags.get("DateTime")
        if tag is None:
            return None
        try:
            stamps.append(datetime.strptime(str(tag.value).strip(), "%Y:%m:%d %H:%M:%S").timestamp())
        except ValueError:
            return None
    return np.asarray(stamps, dtype=float)


def _open_tiff(data: bytes, frame_interval_s: float | None, limits: FilmLimits) -> FilmSource:
    import tifffile

    try:
        tif = tifffile.TiffFile(io.BytesIO(data))
        pages = tif.pages
        n = len(pages)
        shapes = [tuple(int(v) for v in page.shape[:2]) for page in pages]
    except Exception as exc:  # tifffile raises many kinds for damaged files
        raise SpecimenError(f"the TIFF stack cannot be read: {exc}") from exc
    _check_count(n)
    shape = shapes[0]
    if any(s != shape for s in shapes):
        other = next(s for s in shapes if s != shape)
        raise SpecimenError(f"the TIFF pages differ in size ({shape[1]} x {shape[0]} px and {other[1]} x {other[0]} "
                            "px); all frames must have one size")
    limits.check(n, shape, 0.0)
    times_s, source = _times(n, _tiff_times(tif), "file", frame_interval_s)
    limits.check(n, shape, float(times_s[-1]))
    pixel_size_mm = None
    try:
        from service.imaging.load import load_image

        pixel_size_mm = load_image(data, page=0).pixel_size_mm
    except Exception:  # the calibration is a bonus; the frames are read below either way
        pixel_size_mm = None

    def page_array(i: int) -> np.ndarray:
        try:
            return tif.pages[i].asarray()
        except Exception as exc:
            raise SpecimenError(f"page {i} of the TIFF stack cannot be decoded: {exc}") from exc

    def frames() -> Iterator[np.ndarray]:
        for i in range(n):
            yield _gray(page_array(i))

    return FilmSource("TIFF", times_s, source, shape, pixel_size_mm, frames, _rgb(page_array(n - 1)))


# ----------------------------------------------------------------------------- entry points


def open_film(data: bytes, *, frame_interval_s: float | None = None, limits: FilmLimits | None = None
              ) -> FilmSource:
    """Open a film from its bytes; the format is decided from the content.

    Parameters
    ----------
    data : bytes
        An MP4, MOV, AVI (or MKV/WebM) video, or a multi-page TIFF.
    frame_interval_s : float, optional
        Seconds between frames; replaces the times the file carries (container PTS, ImageJ
        ``finterval``, or the pages' DateTime tags). Needed when the file carries none.
    limits : FilmLimits, optional

    Raises
    ------
    UnsupportedFormatError (415), SpecimenError (422), ImageTooLargeError (413)
    """
    limits = limits or FilmLimits()
    head = bytes(data[:16])
    if any(head.startswith(sig) for sig in _TIFF_SIGNATURES):
        return _open_tiff(bytes(data), frame_interval_s, limits)
    for offset, signature, label in _VIDEO_SIGNATURES:
        if head[offset:offset + len(signature)] == signature:
            return _open_video(bytes(data), label, frame_interval_s, limits)
    raise UnsupportedFormatError("not a film Ramiform reads: give an MP4, MOV or AVI video, a multi-page TIFF, "
                                 "or several frames with their times")


def film_from_frames(frames: Sequence[bytes | np.ndarray], *, times_s: Sequence[float] | None = None,
                     frame_interval_s: float | None = None, limits: FilmLimits | None = None) -> FilmSource:
    """A film from still frames (encoded images or arrays) and their times.

    ``times_s`` gives each frame's time (s; any origin); else ``frame_interval_s`` spaces them evenly.
    Frames must share one size.
    """
    from service.imaging.load import load_image

    limits = limits or FilmLimits()
    n = len(frames)
    _check_count(n)
    if n > limits.max_frames:
        limits.check(n, (1, 1), 0.0)
    if times_s is not None and frame_interval_s is None and len(times_s) != n:
        raise SpecimenError(f"{n} frames but {len(times_s)} frame times; give one time per frame")
    grays: list[np.ndarray] = []
    last_rgb = None
    pixel_size_mm = None
    for i, frame in enumerate(frames):
        if isinstance(frame, np.ndarray):
            gray = _gray(frame)
            rgb = frame
        else:
            try:
                loaded = load_image(bytes(frame), max_pixels=limits.max_pixels_per_frame)
            except SpecimenError as exc:
                raise SpecimenError(f"frame {i}: {exc}") from exc
            gray, rgb = loaded.gray.astype(np.float32), loaded.rgb
            if i == 0:
                pixel_size_mm = loaded.pixel_size_mm
        if grays and gray.shape != grays[0].shape:
            raise SpecimenError(f"frame {i} is {gray.shape[1]} x {gray.shape[0]} px but frame 0 is "
                                f"{grays[0].shape[1]} x {grays[0].shape[0]} px; all frames must have one size")
        limits.check(0, gray.shape, 0.0)
        grays.append(gray)
        if i == n - 1:
            last_rgb = _rgb(rgb)
    found = None if times_s is None else np.asarray([float(t) for t in times_s])
    times, source = _times(n, found, "given", frame_interval_s)
    limits.check(n, grays[0].shape, float(times[-1]))
    return FilmSource("frames", times, source, grays[0].shape, pixel_size_mm, lambda: iter(grays), last_rgb)
