"""Reading films: videos written here with PyAV itself, TIFF stacks with tifffile, frames as
arrays; frame times from the container, the file, or the interval; limits and bad input."""

from __future__ import annotations

import io

import numpy as np
import pytest
import tifffile

from service.errors import ImageTooLargeError, SpecimenError, UnsupportedFormatError
from service.film import FilmLimits, film_from_frames, open_film
from service.film.synthetic import encode_video


def _frames(n: int, size: tuple[int, int] = (48, 64)) -> list[np.ndarray]:
    rng = np.random.default_rng(1)
    return [rng.integers(0, 256, size=(*size, 3), dtype=np.uint8) for _ in range(n)]


def test_mp4_frame_times_come_from_the_container():
    # Check: PyAV wrote the frames at 4 frames per second, so their presentation times are k / 4 s.
    film = open_film(encode_video(_frames(5), fps=4.0))
    assert film.format == "video (MP4/MOV)"
    assert film.times_source == "container"
    np.testing.assert_allclose(film.times_s, np.arange(5) / 4.0)
    assert film.shape == (48, 64)
    frames = list(film.frames())
    assert len(frames) == 5 and frames[0].dtype == np.float32


def test_avi_is_read_and_the_interval_replaces_the_container_times():
    film = open_film(encode_video(_frames(4), fps=2.0, container="avi"), frame_interval_s=300.0)
    assert film.format == "video (AVI)"
    assert film.times_source == "interval"
    np.testing.assert_allclose(film.times_s, [0.0, 300.0, 600.0, 900.0])


def test_tiff_stack_times_come_from_imagej_frame_interval():
    # Check: ImageJ hyperstack metadata 'finterval' (s between frames), written by tifffile.
    out = io.BytesIO()
    stack = np.stack([f[:, :, 0] for f in _frames(3)])
    tifffile.imwrite(out, stack, imagej=True, metadata={"axes": "TYX", "finterval": 90.0})
    film = open_film(out.getvalue())
    assert film.format == "TIFF" and film.times_source == "file"
    np.testing.assert_allclose(film.times_s, [0.0, 90.0, 180.0])
    assert len(list(film.frames())) == 3


def test_tiff_stack_times_come_from_each_page_datetime_tag():
    # Check: TIFF 6.0 DateTime tag (306), "YYYY:MM:DD HH:MM:SS", written per page by tifffile.
    from datetime import datetime, timedelta

    out = io.BytesIO()
    start = datetime(2026, 12, 2, 10, 0, 0)
    with tifffile.TiffWriter(out) as tif:
        for k, frame in enumerate(_frames(3)):
            tif.write(frame[:, :, 0], datetime=start + timedelta(seconds=45 * k))
    film = open_film(out.getvalue())
    assert film.times_source == "file"
    np.testing.assert_allclose(film.times_s, [0.0, 45.0, 90.0])


def test_tiff_without_times_asks_for_an_interval():
    out = io.BytesIO()
    tifffile.imwrite(out, np.stack([f[:, :, 0] for f in _frames(3)]), photometric="minisblack")
    with pytest.raises(SpecimenError, match="frame-interval"):
        open_film(out.getvalue())
    assert open_film(out.getvalue(), frame_interval_s=10.0).times_s[-1] == 20.0


def test_truncated_videos_are_refused_with_a_clear_reason():
    avi = encode_video(_frames(6), container="avi")
    with pytest.raises(SpecimenError, match="truncated") as info:
        open_film(avi[: len(avi) // 2])
    assert info.value.status_code == 422
    mp4 = encode_video(_frames(6))
    with pytest.raises(SpecimenError, match="cannot be opened"):
        open_film(mp4[: len(mp4) // 2])


def test_one_frame_is_not_a_film():
    with pytest.raises(SpecimenError, match="at least two frames"):
        open_film(encode_video(_frames(1)))
    with pytest.raises(SpecimenError, match="at least two frames"):
        film_from_frames(_frames(1), frame_interval_s=1.0)


def test_frames_of_different_sizes_are_refused():
    frames = _frames(2) + _frames(1, size=(40, 64))
    with pytest.raises(SpecimenError, match="one size"):
        film_from_frames(frames, frame_interval_s=1.0)


def test_frame_times_must_increase_and_match_the_frames():
    with pytest.raises(SpecimenError, match="increase"):
        film_from_frames(_frames(3), times_s=[0.0, 5.0, 5.0])
    with pytest.raises(SpecimenError, match="one time per frame"):
        film_from_frames(_frames(3), times_s=[0.0, 5.0])
    film = film_from_frames(_frames(3), times_s=[100.0, 160.0, 400.0])
    np.testing.assert_allclose(film.times_s, [0.0, 60.0, 300.0])


def test_limits_on_frames_pixels_and_duration_answer_413():
    with pytest.raises(ImageTooLargeError, match="frames") as info:
        open_film(encode_video(_frames(6)), limits=FilmLimits(max_frames=5))
    assert info.value.status_code == 413
    with pytest.raises(ImageTooLargeError, match="per frame"):
        film_from_frames(_frames(2), frame_interval_s=1.0, limits=FilmLimits(max_pixels_per_frame=1000))
    with pytest.raises(ImageTooLargeError, match="in all"):
        film_from_frames(_frames(3), frame_interval_s=1.0, limits=FilmLimits(max_total_pixels=2 * 48 * 64))
    with pytest.raises(ImageTooLargeError, match="spans"):
        film_from_frames(_frames(3), frame_interval_s=3600.0, limits=FilmLimits(max_duration_s=3600.0))


def test_bytes_that_are_no_film_answer_415():
    with pytest.raises(UnsupportedFormatError) as info:
        open_film(b"%PDF-1.7 not a film at all")
    assert info.value.status_code == 415
