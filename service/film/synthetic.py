"""Films of known growth, made by Ramiform itself: a simulated cluster's arrival order
rendered frame by frame as a photograph of a dish (for tests, the demo and the benchmark).

Frame ``k`` shows the sites that arrived up to its cut of the arrival order; every frame is
photographed with the same dish, light and colours (one rendering seed) and its own sensor
noise, as a camera on a stand gives. The drawn masks (``truth``) are kept, so a reading of
the film can be scored pixel by pixel.
"""

from __future__ import annotations

import io
from dataclasses import dataclass

import numpy as np

from service.imaging.render import render_specimen

__all__ = ["SyntheticFilm", "render_film", "encode_video"]


@dataclass(frozen=True, eq=False)
class SyntheticFilm:
    """Rendered frames (uint8 RGB), their times, the drawn masks and the true arrival map.

    ``arrival`` holds, per pixel, the first frame whose drawn mask covers it (-1: never).
    ``cuts`` are the arrival-order cuts of each frame (sites 1..cut shown).
    """

    frames: list[np.ndarray]
    times_s: np.ndarray
    truth: list[np.ndarray]
    arrival: np.ndarray
    cuts: np.ndarray
    center_rc: tuple[float, float]
    dish_center_rc: tuple[float, float]
    dish_radius_px: float
    thickness_px: float


def render_film(order: np.ndarray, n_frames: int, *, seed: int, size_px: int = 256, interval_s: float = 60.0,
                first_share: float = 0.15, extent: float = 0.7, polarity: str = "dark", noise: float = 0.02,
                shifts_px: dict[int, tuple[int, int]] | None = None, **render_options,
                ) -> SyntheticFilm:
    """Render ``n_frames`` frames of a cluster growing in its arrival order.

    Parameters
    ----------
    order : int array
        Arrival order (0 empty, 1..n), seed at the array centre, as the simulators give.
    n_frames : int
        Frames; frame k shows sites up to ``n * (first_share + (1 - first_share) k / (n_frames - 1))``.
    seed : int
        Seed of the dish, light and colours (shared by all frames) and of the per-frame noise.
    shifts_px : dict, optional
        Camera shift (rows, cols) of given frames, px (the whole picture moves).
    render_options :
        Passed to :func:`service.imaging.render.render_specimen` (``thickness_px``, ``blur_px``, ...).
    """
    order = np.asarray(order)
    n = int(order.max())
    cuts = np.round(n * (first_share + (1.0 - first_share) * np.arange(n_frames) / max(1, n_frames - 1))).astype(int)
    rows, cols = np.nonzero(order)
    h0, w0 = order.shape
    dist = np.sqrt((rows - h0 // 2) ** 2 + (cols - w0 // 2) ** 2)
    full_radius = float(dist.max()) + 0.5
    rng = np.random.default_rng(seed + 1)
    frames, truth = [], []
    arrival = np.full((size_px, size_px), -1, dtype=np.int32)
    geometry = None
    for k, cut in enumerate(cuts):
        shown = (order > 0) & (order <= cut)
        radius = float(dist[order[rows, cols] <= cut].max()) + 0.5
        # The same scale for every frame: render_specimen sizes the specimen by its radius.
        photo = render_specimen(shown, seed=seed, size_px=size_px, extent=extent * radius / full_radius,
                                polarity=polarity, noise=0.0, **render_options)
        image = photo.image.astype(np.float32)
        image += rng.normal(0.0, noise * 255.0, size=image.shape).astype(np.float32)
        image = np.clip(image + 0.5, 0, 255).astype(np.uint8)
        mask = photo.truth
        if shifts_px and k in shifts_px:
            dr, dc = shifts_px[k]
            image = np.roll(image, (dr, dc), axis=(0, 1))
        frames.append(image)
        truth.append(mask)
        arrival[(arrival < 0) & mask] = k
        geometry = photo
    times = np.arange(n_frames, dtype=float) * float(interval_s)
    return SyntheticFilm(frames, times, truth, arrival, cuts, geometry.center_rc, geometry.dish_center_rc,
                         geometry.dish_radius_px, geometry.thickness_px)


def encode_video(frames: list[np.ndarray], *, fps: float = 5.0, codec: str = "mpeg4", container: str = "mp4",
                 bit_rate: int = 20_000_000) -> bytes:
    """Encode uint8 RGB frames as a video with PyAV (MP4 by default), in memory."""
    import av
    from fractions import Fraction

    out = io.BytesIO()
    h, w = frames[0].shape[:2]
    with av.open(out, mode="w", format=container) as c:
        stream = c.add_stream(codec, rate=Fraction(fps).limit_denominator(1000))
        stream.width, stream.height = w, h
        stream.pix_fmt = "yuv420p"
        stream.bit_rate = int(bit_rate)
        for frame in frames:
            for packet in stream.encode(av.VideoFrame.from_ndarray(np.ascontiguousarray(frame), format="rgb24")):
                c.mux(packet)
        for packet in stream.encode():
            c.mux(packet)
    return out.getvalue()
