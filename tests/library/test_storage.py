"""The on-disk format: exact round trips, reproducible bytes, refusal of malformed clusters."""

import io
import zipfile

import numpy as np
import pytest

from service.errors import LibraryError
from service.library.storage import (
    decode_ensemble,
    encode_ensemble,
    lattice_from_sites,
    sites_from_lattice,
    thumbnail_png,
    write_npz,
)


def _lattice() -> np.ndarray:
    # A hand-made 5-site cluster grown from the centre of a 7 x 7 lattice (seed at (3, 3)).
    lattice = np.zeros((7, 7), dtype=np.int32)
    for order, (r, c) in enumerate([(3, 3), (3, 4), (2, 4), (4, 3), (1, 4)], start=1):
        lattice[r, c] = order
    return lattice


def test_sites_are_seed_offsets_in_arrival_order():
    sites = sites_from_lattice(_lattice())
    assert sites.dtype == np.int16
    assert sites.tolist() == [[0, 0], [0, 1], [-1, 1], [1, 0], [-2, 1]]


def test_lattice_round_trip_is_exact_and_centred():
    lattice = _lattice()
    rebuilt = lattice_from_sites(sites_from_lattice(lattice), margin=1)
    # Farthest site is 2 rows and 1 column from the seed: (2 + 1) * 2 + 1 by (1 + 1) * 2 + 1.
    assert rebuilt.shape == (7, 5)
    assert rebuilt[7 // 2, 5 // 2] == 1
    assert np.array_equal(rebuilt, lattice[:, 1:6])


@pytest.mark.parametrize(
    "values",
    [[1, 2, 2], [1, 3], [2, 3], [0, 0]],
    ids=["repeated order", "gap", "no seed", "empty"],
)
def test_lattice_without_orders_one_to_n_is_refused(values):
    lattice = np.zeros((3, 3), dtype=np.int32)
    lattice.flat[: len(values)] = values
    with pytest.raises(LibraryError, match="arrival orders"):
        sites_from_lattice(lattice)


def test_ensemble_encoding_round_trip():
    a = sites_from_lattice(_lattice())
    b = a[:2].copy()
    decoded = decode_ensemble(encode_ensemble([a, b]))
    assert [d.tolist() for d in decoded] == [a.tolist(), b.tolist()]


def test_npz_bytes_are_reproducible_and_readable_by_numpy(tmp_path):
    arrays = {**encode_ensemble([sites_from_lattice(_lattice())]), "label": np.array("dla")}
    write_npz(tmp_path / "a.npz", arrays)
    write_npz(tmp_path / "b.npz", arrays)
    assert (tmp_path / "a.npz").read_bytes() == (tmp_path / "b.npz").read_bytes()
    with zipfile.ZipFile(tmp_path / "a.npz") as archive:
        assert {info.date_time for info in archive.infolist()} == {(1980, 1, 1, 0, 0, 0)}
    with np.load(tmp_path / "a.npz") as data:
        assert np.array_equal(data["sites_rc"], arrays["sites_rc"])
        assert np.array_equal(data["offsets"], arrays["offsets"])
        assert data["label"].shape == () and str(data["label"]) == "dla"


def test_thumbnail_is_a_square_png_showing_the_sites():
    from PIL import Image

    png = thumbnail_png(_lattice(), 16)
    assert png == thumbnail_png(_lattice(), 16)
    image = np.asarray(Image.open(io.BytesIO(png)))
    assert image.shape == (16, 16, 4)
    assert 0 < (image[..., 3] > 0).sum() < 16 * 16
    # Down-sampling a wide cluster keeps a thin line visible: a 1-site-wide bar across 301 sites.
    bar = np.zeros((301, 301), dtype=np.int32)
    bar[150, :] = np.arange(1, 302)
    image = np.asarray(Image.open(io.BytesIO(thumbnail_png(bar, 32))))
    assert (image[..., 3] > 0).sum(axis=1).max() == 32
