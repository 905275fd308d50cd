"""Fuzzing the image loader: damaged or random bytes raise our own errors, nothing else.

Any exception that is not a ``RamiformError`` would surface as a 500 from the upload route,
so the loader must translate every decoder failure. Inputs are valid small PNG, JPEG, TIFF
and BMP files with bytes overwritten, cut, inserted or deleted, and plain random bytes.
"""

from __future__ import annotations

import io

import numpy as np
import pytest
import tifffile
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from service.errors import RamiformError
from service.imaging import load_image
from tests.reliability.conftest import encode

#: Small enough that any mutated header declaring a huge image is refused before decoding.
MAX_PIXELS = 4_000_000


def _seeds() -> dict[str, bytes]:
    rng = np.random.default_rng(7)
    rgb = rng.integers(0, 256, (40, 48, 3), dtype=np.uint8)
    gray16 = rng.integers(0, 65536, (40, 48), dtype=np.uint16)
    tiff = io.BytesIO()
    with tifffile.TiffWriter(tiff) as writer:
        writer.write(gray16, resolution=(100.0, 100.0), resolutionunit="CENTIMETER")
        writer.write(rgb, photometric="rgb")
    return {
        "PNG": encode(rgb),
        "PNG grey 16-bit": encode(gray16),
        "JPEG": encode(rgb, "JPEG", quality=80),
        "TIFF": tiff.getvalue(),
        "BMP": encode(rgb, "BMP"),
    }


SEEDS = _seeds()


def _check(data: bytes) -> None:
    try:
        image = load_image(data, max_pixels=MAX_PIXELS)
    except RamiformError as exc:
        assert str(exc), f"{type(exc).__name__} without a message"
        return
    # Some mutations leave a decodable image (a changed pixel): it must still be well formed.
    assert image.gray.ndim == 2 and image.gray.dtype == np.float32
    assert np.isfinite(image.gray).all() and image.gray.min() >= 0.0 and image.gray.max() <= 1.0
    assert image.rgb.shape == (*image.gray.shape, 3) and image.rgb.dtype == np.uint8


@st.composite
def mutated(draw) -> bytes:
    data = bytearray(SEEDS[draw(st.sampled_from(sorted(SEEDS)))])
    for _ in range(draw(st.integers(1, 6))):
        action = draw(st.sampled_from(["overwrite", "truncate", "insert", "delete"]))
        # Past the 8-byte signature, so mutations reach the decoders (the sniffer is tested below).
        at = draw(st.integers(min(8, len(data)), max(len(data) - 1, 8)))
        if action == "overwrite":
            data[at:at + 4] = draw(st.binary(min_size=1, max_size=4))
        elif action == "truncate":
            del data[at:]
        elif action == "insert":
            data[at:at] = draw(st.binary(min_size=1, max_size=16))
        else:
            del data[at:at + draw(st.integers(1, 64))]
    return bytes(data)


def test_seeds_load():
    # Guard: the unmutated seeds are valid files of each format, so mutations start from real ones.
    for name, data in SEEDS.items():
        assert load_image(data).format == name.split()[0]


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow], derandomize=True)
@given(mutated())
def test_mutated_images_raise_only_ramiform_errors(data):
    _check(data)


@settings(max_examples=200, deadline=None, derandomize=True)
@given(st.one_of(
    st.binary(max_size=2048),
    # Random tails behind each format's signature reach the decoders rather than the sniffer.
    st.tuples(st.sampled_from([b"\x89PNG\r\n\x1a\n", b"\xff\xd8\xff", b"II*\x00", b"MM\x00*", b"BM"]),
              st.binary(max_size=512)).map(b"".join),
))
def test_random_bytes_raise_only_ramiform_errors(data):
    _check(data)


@pytest.mark.parametrize("name", sorted(SEEDS))
def test_every_prefix_of_the_header_is_refused_cleanly(name):
    """Each file cut after 0..200 bytes: a truncated header is a clean refusal."""
    data = SEEDS[name]
    for cut in range(0, min(200, len(data))):
        _check(data[:cut])
