"""Open a reference set: the manifest at once, clusters only when asked for.

:func:`load_reference_set` reads ``manifest.json`` and nothing else, so it takes
milliseconds; each ensemble's cluster file is read (and its checksum checked) on first use.
An ensemble whose sites are not stored (``Ensemble.sites_stored`` false) is regrown from its
seeds when its sites are asked for, and checked against the digests of the sites as grown at
build time. A feature cache lives beside the clusters (``cache/``), tied to the exact
clusters it was computed from; reading it, the fingerprint or a thumbnail regrows nothing.
"""

from __future__ import annotations

import hashlib
import io
import json
import os
import re
import zipfile
from collections.abc import Callable, Iterable, Mapping
from pathlib import Path
from typing import Any

import numpy as np

from service.errors import LibraryError
from service.library.storage import (
    CACHE_DIR,
    Ensemble,
    decode_ensemble,
    lattice_from_sites,
    read_manifest,
    sites_digest,
    write_json,
    write_npz,
)

#: Environment variable naming the folder of the default reference set.
LIBRARY_DIR_ENV = "RAMIFORM_LIBRARY_DIR"
DEFAULT_DIR = Path(__file__).resolve().parents[2] / "reference_sets" / "default"

_CACHE_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9_.-]*")
_FINGERPRINT_KEY = "__set_fingerprint__"


class ReferenceSet:
    """A reference set on disk: ensembles of simulated clusters with their seeds.

    Attributes
    ----------
    path : Path
        The set's folder.
    manifest : dict
        The parsed ``manifest.json`` (see :mod:`service.library.storage`).
    ensembles : tuple of Ensemble
        Every ensemble in manifest order: ``regime``, ``parameters``, ``n_particles``,
        ``n_realisations``, ``seeds``, ``id``.
    """

    def __init__(self, path: Path, manifest: dict[str, Any]):
        self.path = Path(path)
        self.manifest = manifest
        self.ensembles = tuple(Ensemble.from_dict(entry) for entry in manifest["ensembles"])
        self._by_id = {e.id: e for e in self.ensembles}
        if len(self._by_id) != len(self.ensembles):
            raise LibraryError(f"{self.path}: the manifest lists an ensemble twice")
        self._sites: dict[str, list[np.ndarray]] = {}
        self._regrown: dict[tuple[str, int], np.ndarray] = {}

    def __repr__(self) -> str:
        return f"ReferenceSet({str(self.path)!r}, preset={self.preset!r}, {len(self.ensembles)} ensembles)"

    @property
    def preset(self) -> str:
        return self.manifest["preset"]

    @property
    def fingerprint(self) -> str:
        """SHA-256 over the checksums of the cluster files, and of the regrown ensembles' site
        digests: changes iff any cluster does (and is the same as before for a set that stores
        every ensemble)."""
        clusters = sorted(
            (e.clusters, self._checksum(e.clusters)) if e.sites_stored
            else (f"{e.id} (regrown)", hashlib.sha256(json.dumps(list(e.sites_sha256)).encode()).hexdigest())
            for e in self.ensembles
        )
        return hashlib.sha256(json.dumps(clusters).encode()).hexdigest()

    def ensemble(self, ensemble: Ensemble | str) -> Ensemble:
        """The ensemble with this id (an ``Ensemble`` passes through after a check)."""
        key = ensemble.id if isinstance(ensemble, Ensemble) else ensemble
        try:
            return self._by_id[key]
        except KeyError:
            raise LibraryError(f"no ensemble {key!r} in {self.path}") from None

    # ----------------------------------------------------------------------- clusters

    def sites(self, ensemble: Ensemble | str) -> list[np.ndarray]:
        """Each realisation's sites as int16 ``(n, 2)`` offsets from the seed, in arrival order.

        An ensemble whose sites are not stored is regrown (every realisation; see
        :func:`regrow_sites`), which costs what growing it costs.
        """
        ensemble = self.ensemble(ensemble)
        if not ensemble.sites_stored:
            return [self._site(ensemble, index) for index in range(ensemble.n_realisations)]
        if ensemble.id not in self._sites:
            data = self._read_checked(ensemble.clusters)
            try:
                with np.load(io.BytesIO(data), allow_pickle=False) as arrays:
                    sites = decode_ensemble(arrays)
            except (OSError, ValueError, KeyError) as exc:
                raise LibraryError(f"{self.path / ensemble.clusters} is damaged: {exc}") from exc
            expected = (lambda n: 0 < n <= ensemble.n_particles) if ensemble.stops_early else (
                lambda n: n == ensemble.n_particles)
            if len(sites) != ensemble.n_realisations or not all(expected(len(s)) for s in sites):
                raise LibraryError(f"{self.path / ensemble.clusters} does not hold the clusters its manifest lists")
            self._sites[ensemble.id] = sites
        return self._sites[ensemble.id]

    def arrival_order(self, ensemble: Ensemble | str, index: int, *, margin: int = 2) -> np.ndarray:
        """Realisation ``index`` as an int32 lattice: 0 empty, k the k-th site to join.

        The seed (1) sits at ``(h // 2, w // 2)``; ``margin`` empty sites border the cluster.
        Of an ensemble that is regrown, only this realisation is.
        """
        return lattice_from_sites(self._site(self.ensemble(ensemble), index), margin=margin)

    def arrival_orders(self, ensemble: Ensemble | str, *, margin: int = 2) -> list[np.ndarray]:
        return [lattice_from_sites(s, margin=margin) for s in self.sites(ensemble)]

    def mask(self, ensemble: Ensemble | str, index: int, *, margin: int = 2) -> np.ndarray:
        """Realisation ``index`` as a boolean occupancy mask (same frame as ``arrival_order``)."""
        return self.arrival_order(ensemble, index, margin=margin) > 0

    def thumbnail_path(self, ensemble: Ensemble | str) -> Path:
        return self.path / self.ensemble(ensemble).thumbnail

    def thumbnail_bytes(self, ensemble: Ensemble | str) -> bytes:
        """The PNG thumbnail (first realisation, coloured by arrival order), checksum checked."""
        return self._read_checked(self.ensemble(ensemble).thumbnail)

    def verify(self) -> None:
        """Check every file against the manifest's checksums; raise ``LibraryError`` if one differs.

        Regrown ensembles have no cluster file: their sites are checked each time they are regrown.
        """
        for relative in self.manifest["files"]:
            self._read_checked(relative)

    def map_clusters(
        self,
        fn: Callable[[np.ndarray, Ensemble], Any],
        *,
        ensembles: Iterable[Ensemble | str] | None = None,
        scheduler: str | None = None,
        workers: int | None = None,
        progress: bool = True,
        margin: int = 2,
    ) -> dict[str, list[Any]]:
        """Apply ``fn(arrival_order, ensemble)`` to every cluster, on Dask.

        Parameters
        ----------
        fn : callable
            Picklable (a module-level function or a ``functools.partial`` of one); receives
            the arrival-order lattice of one realisation (as from :meth:`arrival_order`) and
            its :class:`Ensemble`. A regrown ensemble's realisations are regrown (and
            checked) on the workers.
        ensembles : iterable, optional
            Only these ensembles (default: all, in manifest order).
        scheduler, workers, progress :
            As for :func:`service.library.build_library`.

        Returns
        -------
        dict
            ``{ensemble id: [fn result of realisation 0, 1, ...]}`` in manifest order,
            whatever order the workers finished in.
        """
        from service.library.build import run_tasks

        chosen = self.ensembles if ensembles is None else tuple(self.ensemble(e) for e in ensembles)
        tasks = [
            (fn, sites, e, margin, index)
            for e in chosen
            for index, sites in enumerate(self.sites(e) if e.sites_stored else [None] * e.n_realisations)
        ]
        results = run_tasks(
            _apply_to_cluster,
            tasks,
            costs=[float(e.n_particles) for e in chosen for _ in range(e.n_realisations)],
            scheduler=scheduler,
            workers=workers,
            progress=progress,
            label=f"mapping {getattr(fn, '__name__', 'fn')} over {self.preset}",
        )
        grouped: dict[str, list[Any]] = {}
        for (_, _, e, _, _), result in zip(tasks, results):
            grouped.setdefault(e.id, []).append(result)
        return grouped

    # ----------------------------------------------------------------------- cache

    def read_cache(self, name: str) -> dict[str, np.ndarray] | Any | None:
        """Data stored by :meth:`write_cache` for these very clusters, or None.

        None when nothing is cached under ``name``, when the file is damaged, or when it
        was computed from other clusters (the set was rebuilt differently since):
        recompute and write again.
        """
        npz, js = self._cache_paths(name)
        try:
            if npz.is_file():
                with np.load(npz, allow_pickle=False) as data:
                    arrays = {key: data[key] for key in data.files}
                return arrays if str(arrays.pop(_FINGERPRINT_KEY, "")) == self.fingerprint else None
            if js.is_file():
                stored = json.loads(js.read_text(encoding="utf-8"))
                fresh = isinstance(stored, dict) and stored.get("set_fingerprint") == self.fingerprint
                return stored.get("data") if fresh else None
        except (OSError, ValueError, zipfile.BadZipFile):
            return None  # a damaged cache is as good as none: it is recomputed
        return None

    def write_cache(self, name: str, data: Mapping[str, np.ndarray] | Any) -> Path:
        """Store derived data under ``cache/<name>``, tied to this set's clusters.

        A mapping of numpy arrays is stored as ``.npz``; anything else must be JSON
        serialisable and is stored as ``.json``. Returns the file written.
        """
        npz, js = self._cache_paths(name)
        if isinstance(data, Mapping) and data and all(isinstance(v, np.ndarray) for v in data.values()):
            if _FINGERPRINT_KEY in data:
                raise ValueError(f"{_FINGERPRINT_KEY!r} is reserved in cache arrays")
            write_npz(npz, {**data, _FINGERPRINT_KEY: np.array(self.fingerprint)})
            js.unlink(missing_ok=True)
            return npz
        try:
            write_json(js, {"set_fingerprint": self.fingerprint, "data": data})
        except (TypeError, ValueError) as exc:
            raise ValueError(f"cache {name!r} must be a dict of numpy arrays or JSON-serialisable: {exc}") from exc
        npz.unlink(missing_ok=True)
        return js

    # ----------------------------------------------------------------------- internals

    def _site(self, ensemble: Ensemble, index: int) -> np.ndarray:
        if not 0 <= index < ensemble.n_realisations:
            raise IndexError(f"{ensemble.id} has {ensemble.n_realisations} realisations, not an index {index}")
        if ensemble.sites_stored:
            return self.sites(ensemble)[index]
        key = (ensemble.id, index)
        if key not in self._regrown:
            self._regrown[key] = regrow_sites(ensemble, index)
        return self._regrown[key]

    def _cache_paths(self, name: str) -> tuple[Path, Path]:
        if not isinstance(name, str) or not _CACHE_NAME.fullmatch(name):
            raise ValueError(f"cache name must be letters, digits, '_', '.', '-', got {name!r}")
        folder = self.path / CACHE_DIR
        return folder / f"{name}.npz", folder / f"{name}.json"

    def _checksum(self, relative: str) -> str:
        try:
            return self.manifest["files"][relative]
        except KeyError:
            raise LibraryError(f"{self.path}: the manifest has no checksum for {relative}") from None

    def _read_checked(self, relative: str) -> bytes:
        expected = self._checksum(relative)
        if Path(relative).is_absolute() or ".." in Path(relative).parts:
            raise LibraryError(f"{self.path}: the manifest names a file outside the set: {relative}")
        try:
            data = (self.path / relative).read_bytes()
        except OSError as exc:
            raise LibraryError(f"{self.path}: cannot read {relative}: {exc}") from exc
        if hashlib.sha256(data).hexdigest() != expected:
            raise LibraryError(f"{self.path / relative} is damaged: its checksum differs from the manifest's")
        return data


def regrow_sites(ensemble: Ensemble, index: int) -> np.ndarray:
    """Realisation ``index`` of an ensemble whose sites are not stored, grown again from its seed.

    Raises
    ------
    LibraryError
        If the sites differ from those grown when the set was built (their digest is not the
        manifest's): the simulator no longer grows that seed the same way, so the set must be
        rebuilt with this Ramiform (``ramiform library build``).
    """
    from service.library.build import grow_sites

    seed = ensemble.seeds[index]
    sites = grow_sites(ensemble.regime, dict(ensemble.parameters), ensemble.n_particles, seed)
    if sites_digest(sites) != ensemble.sites_sha256[index]:
        raise LibraryError(
            f"{ensemble.id}, realisation {index}: regrown from seed {seed}, its sites differ from those grown "
            "when the reference set was built (SHA-256 differs from the manifest's); this Ramiform's simulator "
            "grows that seed differently, so rebuild the set with `ramiform library build`"
        )
    return sites


def _apply_to_cluster(fn: Callable, sites: np.ndarray | None, ensemble: Ensemble, margin: int, index: int) -> Any:
    if sites is None:
        sites = regrow_sites(ensemble, index)
    return fn(lattice_from_sites(sites, margin=margin), ensemble)


def default_library_dir() -> Path:
    """``$RAMIFORM_LIBRARY_DIR`` if set, else ``reference_sets/default`` of this checkout."""
    override = os.environ.get(LIBRARY_DIR_ENV)
    return Path(override) if override else DEFAULT_DIR


def load_reference_set(path: str | Path | None = None) -> ReferenceSet:
    """Open the reference set at ``path`` (default: :func:`default_library_dir`).

    Reads only the manifest; clusters load on first use.

    Raises
    ------
    LibraryError
        If there is no set there, its manifest is damaged, or its schema version is unknown.
    """
    folder = Path(path) if path is not None else default_library_dir()
    return ReferenceSet(folder, read_manifest(folder))
