"""On-disk format of a reference set (schema version 2; version 1 is read too).

A reference set is one folder::

    manifest.json              what was grown, with which seeds, by which software; checksums
    clusters/<ensemble>.npz    every realisation of one ensemble, sites in order of arrival
                               (only for ensembles whose sites are stored, see below)
    thumbnails/<ensemble>.png  the first realisation, 96 px, coloured by arrival order
    cache/<name>.npz|.json     derived data (features...) written by the matcher, not checksummed

``manifest.json`` holds::

    format            "ramiform-reference-set"
    schema_version    2 (this module reads only the versions in SCHEMA_VERSIONS)
    preset            name of the preset that was grown
    software          {"ramiform", "python", "numpy", "numba"} versions of the build
    seed_rule         how each seed follows from (preset, regime, parameters, size, index)
    ensembles         list of {id, regime, parameters, n_particles, n_realisations, seeds,
                      sites_stored, clusters or sites_sha256, thumbnail}; ``clusters`` and
                      ``thumbnail`` are paths relative to the folder
    files             {relative path: sha256 hex digest} of every cluster and thumbnail file
    build             wall time, workers, scheduler: the only field that differs between two
                      builds of the same preset (compare everything else)

A cluster file holds two arrays:

``sites_rc`` (int16, shape (total sites, 2))
    Row and column offsets of each occupied site from the seed site, realisation after
    realisation, each realisation in order of arrival (its first row is the seed, (0, 0)).
``offsets`` (int64, shape (n_realisations + 1,))
    Realisation ``i`` is ``sites_rc[offsets[i]:offsets[i + 1]]``.

The arrival-order lattice is rebuilt by :func:`lattice_from_sites`: site ``k`` (0-based)
gets value ``k + 1``, the seed lands at ``(h // 2, w // 2)``. Nothing is lost: any feature of
a cluster, or its growth replayed, follows from these arrays.

Ensembles with ``sites_stored`` false (the largest clusters, which would not fit the bundled
set's size budget) have no cluster file: their sites are regrown on demand from the recorded
seed and parameters (``service.simulate.grow``), and ``sites_sha256`` holds, per realisation,
the SHA-256 of its ``sites_rc`` rows as grown at build time (the C-ordered little-endian int16
bytes of the ``(n, 2)`` array), against which every regrowth is checked. Their thumbnail is
stored as for any ensemble, and so is their feature cache (``cache/``), so nothing that only
ranks specimens regrows them. Schema 1 manifests have no ``sites_stored``: every ensemble's
sites are stored.

Every file is written byte-for-byte reproducibly: zip entries carry a fixed date, PNGs
carry no time chunk, JSON keys keep their order. Rebuilding a preset with the same seeds
gives files with the same checksums.
"""

from __future__ import annotations

import hashlib
import io
import json
import os
import re
import secrets
import zipfile
from collections.abc import Mapping
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from service.errors import LibraryError

FORMAT = "ramiform-reference-set"
#: Version 2 added ensembles whose sites are regrown rather than stored; a reader of version 1
#: would take such an ensemble for a damaged one, so it is told the set is newer instead.
SCHEMA_VERSION = 2
#: Schema versions this code reads.
SCHEMA_VERSIONS: tuple[int, ...] = (1, 2)
MANIFEST = "manifest.json"
CLUSTER_DIR = "clusters"
THUMBNAIL_DIR = "thumbnails"
CACHE_DIR = "cache"
THUMBNAIL_PX = 96

_HEX64 = re.compile(r"[0-9a-f]{64}")
# The earliest date a zip entry can carry; a fixed date keeps the archive reproducible.
_ZIP_DATE = (1980, 1, 1, 0, 0, 0)


@dataclass(frozen=True)
class EnsembleSpec:
    """One ensemble to grow: a regime, its parameters, a size, how many realisations.

    ``parameters`` are keyword arguments of the simulator
    (``service.simulate.grow(regime, n_particles, seed=..., **parameters)``).
    """

    regime: str
    parameters: Mapping[str, Any]
    n_particles: int
    n_realisations: int

    @property
    def id(self) -> str:
        """File-name-safe identifier, e.g. ``dla_neighborhood-moore_sticking-0.3_n3000``."""
        parts = [self.regime, *(f"{k}-{v}" for k, v in sorted(self.parameters.items()))]
        return "_".join(parts) + f"_n{self.n_particles}"

    @property
    def stops_early(self) -> bool:
        """Whether a realisation may hold fewer than ``n_particles`` sites: a DBM deposit grown
        towards a near outer electrode stops once it nearly touches it."""
        return self.parameters.get("electrode") == "near"

    def __hash__(self) -> int:  # parameters is a dict; equal specs share an id
        return hash(self.id)

    def to_dict(self) -> dict[str, Any]:
        return {
            "id": self.id,
            "regime": self.regime,
            "parameters": dict(sorted(self.parameters.items())),
            "n_particles": self.n_particles,
            "n_realisations": self.n_realisations,
        }


@dataclass(frozen=True)
class Ensemble(EnsembleSpec):
    """A built ensemble: its spec, the seed of every realisation, and where its files are.

    ``sites_stored`` says whether the sites are in the cluster file ``clusters``; if not, they
    are regrown from the seeds and checked against ``sites_sha256`` (one digest per
    realisation, :func:`sites_digest`).
    """

    seeds: tuple[int, ...] = ()
    clusters: str = ""
    thumbnail: str = ""
    sites_stored: bool = True
    sites_sha256: tuple[str, ...] = ()

    __hash__ = EnsembleSpec.__hash__

    def to_dict(self) -> dict[str, Any]:
        where = {"clusters": self.clusters} if self.sites_stored else {"sites_sha256": list(self.sites_sha256)}
        return {
            **super().to_dict(),
            "seeds": list(self.seeds),
            "sites_stored": self.sites_stored,
            **where,
            "thumbnail": self.thumbnail,
        }

    @classmethod
    def from_dict(cls, entry: Mapping[str, Any]) -> Ensemble:
        try:
            stored = entry.get("sites_stored", True)  # schema 1: always stored
            if not isinstance(stored, bool):
                raise TypeError(f"sites_stored must be true or false, got {stored!r}")
            ensemble = cls(
                regime=str(entry["regime"]),
                parameters=dict(entry["parameters"]),
                n_particles=int(entry["n_particles"]),
                n_realisations=int(entry["n_realisations"]),
                seeds=tuple(int(s) for s in entry["seeds"]),
                clusters=str(entry["clusters"]) if stored else "",
                thumbnail=str(entry["thumbnail"]),
                sites_stored=stored,
                sites_sha256=() if stored else tuple(str(d) for d in entry["sites_sha256"]),
            )
        except (KeyError, TypeError, ValueError) as exc:
            raise LibraryError(f"manifest ensemble entry is incomplete or malformed ({exc!r}): {entry!r:.200}") from exc
        if len(ensemble.seeds) != ensemble.n_realisations:
            raise LibraryError(
                f"manifest ensemble {ensemble.id}: {len(ensemble.seeds)} seeds for {ensemble.n_realisations} realisations"
            )
        if not stored and (
            len(ensemble.sites_sha256) != ensemble.n_realisations
            or not all(_HEX64.fullmatch(d) for d in ensemble.sites_sha256)
        ):
            raise LibraryError(
                f"manifest ensemble {ensemble.id}: its sites are regrown, so it needs one SHA-256 digest "
                f"per realisation in sites_sha256"
            )
        return ensemble


# --------------------------------------------------------------------------- clusters


def sites_from_lattice(lattice: np.ndarray) -> np.ndarray:
    """Offsets (int16, shape (n, 2)) of the occupied sites from the seed, in order of arrival.

    Raises
    ------
    LibraryError
        If the lattice does not hold arrival orders exactly 1..n, or is too wide for int16.
    """
    lattice = np.asarray(lattice)
    if lattice.ndim != 2:
        raise LibraryError(f"a cluster must be a 2-D lattice, got shape {lattice.shape}")
    rows, cols = np.nonzero(lattice)
    order = lattice[rows, cols].astype(np.int64)
    n = order.size
    if n == 0 or not np.array_equal(np.sort(order), np.arange(1, n + 1)):
        raise LibraryError(f"a cluster's non-zero values must be the arrival orders 1..n, each once (n = {n})")
    by_arrival = np.argsort(order)
    rows, cols = rows[by_arrival], cols[by_arrival]
    offsets = np.stack([rows - rows[0], cols - cols[0]], axis=1)
    if np.abs(offsets).max() >= 2**15:
        raise LibraryError("a cluster wider than 32767 sites from its seed cannot be stored as int16")
    return offsets.astype(np.int16)


def lattice_from_sites(sites_rc: np.ndarray, *, margin: int = 2) -> np.ndarray:
    """Arrival-order lattice (int32, 0 = empty, k = k-th arrival) from seed offsets.

    The lattice is symmetric about the seed, which lands at ``(h // 2, w // 2)``, with
    ``margin`` empty sites beyond the farthest site on each side.
    """
    sites_rc = np.asarray(sites_rc, dtype=np.int64)
    half = np.abs(sites_rc).max(axis=0) + margin
    lattice = np.zeros((2 * half[0] + 1, 2 * half[1] + 1), dtype=np.int32)
    lattice[sites_rc[:, 0] + half[0], sites_rc[:, 1] + half[1]] = np.arange(1, len(sites_rc) + 1, dtype=np.int32)
    return lattice


def sites_digest(sites_rc: np.ndarray) -> str:
    """SHA-256 (hex) of one realisation's seed offsets: its C-ordered little-endian int16 bytes."""
    return hashlib.sha256(np.ascontiguousarray(sites_rc, dtype="<i2").tobytes()).hexdigest()


def encode_ensemble(sites: list[np.ndarray]) -> dict[str, np.ndarray]:
    """The arrays of one cluster file from each realisation's ``sites_from_lattice`` output."""
    offsets = np.zeros(len(sites) + 1, dtype=np.int64)
    offsets[1:] = np.cumsum([len(s) for s in sites])
    return {"sites_rc": np.concatenate(sites).astype(np.int16), "offsets": offsets}


def decode_ensemble(arrays: Mapping[str, np.ndarray]) -> list[np.ndarray]:
    """Each realisation's seed offsets, in order, from the arrays of one cluster file."""
    sites, offsets = arrays["sites_rc"], arrays["offsets"]
    return [sites[offsets[i] : offsets[i + 1]] for i in range(len(offsets) - 1)]


# --------------------------------------------------------------------------- files


def write_npz(path: Path, arrays: Mapping[str, np.ndarray]) -> None:
    """Deflate-compressed ``.npz`` readable by ``np.load``, identical bytes for identical arrays.

    ``np.savez_compressed`` stamps each entry with the current time; this writer does not.
    """
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w") as archive:
        for name, array in arrays.items():
            info = zipfile.ZipInfo(f"{name}.npy", date_time=_ZIP_DATE)
            info.compress_type = zipfile.ZIP_DEFLATED
            info.external_attr = 0o644 << 16
            payload = io.BytesIO()
            np.lib.format.write_array(payload, np.asarray(array, order="C"), allow_pickle=False)
            archive.writestr(info, payload.getvalue(), compresslevel=9)
    write_bytes(path, buffer.getvalue())


def write_bytes(path: Path, data: bytes) -> None:
    """Write through a temporary file and rename, so a reader never sees half a file.

    The temporary name is unique to the writer: several processes refreshing the same
    cache entry at once each rename a whole file of their own, and the last one stays.
    """
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.{os.getpid()}.{secrets.token_hex(4)}.tmp")
    try:
        with open(tmp, "xb") as handle:
            handle.write(data)
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise


def write_json(path: Path, value: Any) -> None:
    write_bytes(path, (json.dumps(value, indent=1, allow_nan=False) + "\n").encode())


def sha256_file(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


# --------------------------------------------------------------------------- thumbnails


def thumbnail_png(lattice: np.ndarray, size_px: int = THUMBNAIL_PX) -> bytes:
    """A square RGBA PNG of a cluster, transparent background, sites coloured by arrival.

    Strategy: the square lattice centred on the seed is mapped onto ``size_px`` pixels;
    when it is larger, each pixel takes the earliest arrival among the sites it covers (so
    thin early branches stay visible rather than fading in an average); when it is smaller,
    each pixel samples its nearest site.
    """
    from matplotlib import colormaps
    from PIL import Image

    half = max(lattice.shape) // 2
    square = np.zeros((2 * half + 1, 2 * half + 1), dtype=np.int64)
    r0, c0 = half - lattice.shape[0] // 2, half - lattice.shape[1] // 2
    square[r0 : r0 + lattice.shape[0], c0 : c0 + lattice.shape[1]] = lattice
    side = square.shape[0]
    n = int(square.max())
    if side > size_px:
        empty = np.iinfo(np.int64).max
        pooled = np.full(size_px * size_px, empty, dtype=np.int64)
        rows, cols = np.nonzero(square)
        pixel = (rows * size_px // side) * size_px + cols * size_px // side
        np.minimum.at(pooled, pixel, square[rows, cols])
        image = np.where(pooled == empty, 0, pooled).reshape(size_px, size_px)
    else:
        index = np.arange(size_px) * side // size_px
        image = square[np.ix_(index, index)]
    rgba = colormaps["viridis"](image / max(n, 1), bytes=True)
    rgba[image == 0] = 0
    buffer = io.BytesIO()
    Image.fromarray(rgba, mode="RGBA").save(buffer, format="PNG", optimize=True)
    return buffer.getvalue()


# --------------------------------------------------------------------------- manifest


def read_manifest(folder: Path) -> dict[str, Any]:
    """Parse and check ``manifest.json`` of a reference set folder.

    Raises
    ------
    LibraryError
        If the folder or manifest is missing, the JSON is damaged, the format is not ours,
        or the schema version is one this code does not read.
    """
    path = folder / MANIFEST
    if not path.is_file():
        raise LibraryError(f"no reference set at {folder}: {MANIFEST} is missing (build one with `ramiform library build`)")
    try:
        manifest = json.loads(path.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise LibraryError(f"{path} is damaged: not valid JSON ({exc})") from exc
    if not isinstance(manifest, dict) or manifest.get("format") != FORMAT:
        raise LibraryError(f"{path} is not a Ramiform reference-set manifest (expected format {FORMAT!r})")
    version = manifest.get("schema_version")
    if version not in SCHEMA_VERSIONS:
        raise LibraryError(
            f"{path} has schema version {version!r}; this Ramiform reads schema "
            f"{', '.join(map(str, SCHEMA_VERSIONS))}: rebuild the set with `ramiform library build` "
            "or upgrade Ramiform"
        )
    for key, kind in (("ensembles", list), ("files", dict), ("preset", str)):
        if not isinstance(manifest.get(key), kind):
            raise LibraryError(f"{path} is damaged: {key!r} is missing or not a {kind.__name__}")
    return manifest


def write_reference_set(
    folder: Path,
    *,
    preset: str,
    ensembles: list[Ensemble],
    sites: list[np.ndarray],
    seed_rule: str,
    build: dict[str, Any],
) -> None:
    """Write a complete reference set into the new folder ``folder``.

    ``sites`` holds every realisation's :func:`sites_from_lattice` output, ensemble after
    ensemble in the order of ``ensembles``; ``seed_rule`` says in words how the seeds were
    derived; ``build`` becomes the manifest's ``build`` entry. An ensemble with
    ``sites_stored`` false gets no cluster file but each realisation's :func:`sites_digest`
    in the manifest (any ``sites_sha256`` it brings is replaced).
    The manifest is written last, so a folder with a manifest is a complete set.
    """
    import platform

    import numba

    from service import __version__

    folder = Path(folder)
    if folder.exists() and any(folder.iterdir()):
        raise LibraryError(f"{folder} is not empty; a reference set is written into a new folder")
    if len(sites) != sum(e.n_realisations for e in ensembles):
        raise LibraryError(f"{len(sites)} clusters for {sum(e.n_realisations for e in ensembles)} realisations")
    files: dict[str, str] = {}
    written: list[Ensemble] = []
    position = 0
    for ensemble in ensembles:
        members = sites[position : position + ensemble.n_realisations]
        position += ensemble.n_realisations
        if ensemble.sites_stored:
            write_npz(folder / ensemble.clusters, encode_ensemble(members))
            files[ensemble.clusters] = sha256_file(folder / ensemble.clusters)
        else:
            ensemble = replace(ensemble, clusters="", sites_sha256=tuple(sites_digest(s) for s in members))
        write_bytes(folder / ensemble.thumbnail, thumbnail_png(lattice_from_sites(members[0])))
        files[ensemble.thumbnail] = sha256_file(folder / ensemble.thumbnail)
        written.append(ensemble)
    manifest = {
        "format": FORMAT,
        "schema_version": SCHEMA_VERSION,
        "preset": preset,
        "software": {
            "ramiform": __version__,
            "python": platform.python_version(),
            "numpy": np.__version__,
            "numba": numba.__version__,
        },
        "seed_rule": seed_rule,
        "thumbnail_px": THUMBNAIL_PX,
        "ensembles": [e.to_dict() for e in written],
        "files": files,
        "build": build,
    }
    write_json(folder / MANIFEST, manifest)
