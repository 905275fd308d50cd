"""Reference feature vectors: computed once per reference set on Dask, cached beside it.

The cache is stored with :meth:`ReferenceSet.write_cache` under a name that carries
``FEATURE_SCHEMA``, so a change of the features invalidates it, and the set's fingerprint
ties it to the very clusters it was computed from.
"""

from __future__ import annotations

import json
import time
from dataclasses import dataclass

import numpy as np

from service.errors import LibraryError
from service.match.nuisance import THICKNESS_SITES, n_styles, nuisance_grid
from service.match.vector import FEATURE_NAMES, FEATURE_SCHEMA, reference_vectors

#: Name of the cache entry in the reference set's ``cache/`` folder.
CACHE_NAME = f"match-features-v{FEATURE_SCHEMA}"
#: Sets with at most this many clusters get their cache computed on first use, in process;
#: larger ones must be prepared with :func:`build_feature_cache`.
AUTO_BUILD_MAX_CLUSTERS = 240


@dataclass(frozen=True, eq=False)
class ReferenceTable:
    """Feature vectors of every cluster of a reference set, one row per (cluster, drawing style).

    Attributes
    ----------
    values : ndarray, shape (n_clusters, n_features)
    log_sites : ndarray, shape (n_clusters,)
        Natural log of the lattice sites ``N_eq`` after normalisation.
    scale_px : ndarray, shape (n_clusters,)
        Pixels per site the normalisation found on each cluster's drawing.
    connected_fraction : ndarray, shape (n_clusters,)
        Share of each cluster's sites in its largest connected piece after normalisation.
    ensemble : ndarray of int, shape (n_clusters,)
        Index of each cluster's ensemble in ``reference_set.ensembles``.
    realisation : ndarray of int, shape (n_clusters,)
        Index of the cluster within its ensemble.
    style : ndarray of int, shape (n_rows,)
        Index of the drawing style (:func:`service.match.nuisance.drawing_styles`) of each row.
    thickness_sites : ndarray of float, shape (n_rows,)
        Branch width, in lattice sites, the row's drawing gave the cluster.
    feature_names : tuple of str

    Every per-cluster column has one entry per row: a cluster drawn in four styles fills
    four rows with the same ``ensemble`` and ``realisation``.
    """

    values: np.ndarray
    log_sites: np.ndarray
    scale_px: np.ndarray
    connected_fraction: np.ndarray
    ensemble: np.ndarray
    realisation: np.ndarray
    style: np.ndarray
    thickness_sites: np.ndarray
    feature_names: tuple[str, ...] = FEATURE_NAMES

    @property
    def cluster(self) -> np.ndarray:
        """One integer per cluster (rows of one cluster share it), in row order."""
        _, index = np.unique(np.stack([self.ensemble, self.realisation], axis=1), axis=0, return_inverse=True)
        return index.ravel()

    def arrays(self) -> dict[str, np.ndarray]:
        return {name: getattr(self, name) for name in _COLUMNS}


_COLUMNS = (
    "values", "log_sites", "scale_px", "connected_fraction", "ensemble", "realisation", "style", "thickness_sites",
)


def _task(arrival_order: np.ndarray, ensemble):
    return reference_vectors(arrival_order)


def compute_reference_table(
    reference_set, *, scheduler: str | None = None, workers: int | None = None, progress: bool = True,
    in_process: bool = False,
) -> ReferenceTable:
    """Feature vectors of every cluster, on Dask (or serially with ``in_process``)."""
    if in_process:
        results = {
            e.id: [_task(reference_set.arrival_order(e, i), e) for i in range(e.n_realisations)]
            for e in reference_set.ensembles
        }
    else:
        results = reference_set.map_clusters(_task, scheduler=scheduler, workers=workers, progress=progress)
    rows = [
        (index, realisation, style, vector)
        for index, e in enumerate(reference_set.ensembles)
        for realisation, vectors in enumerate(results[e.id])
        for style, vector in vectors
    ]
    return ReferenceTable(
        values=np.array([v.values for *_, v in rows], dtype=np.float64).reshape(len(rows), len(FEATURE_NAMES)),
        log_sites=np.log(np.array([v.n_sites for *_, v in rows], dtype=np.float64)),
        scale_px=np.array([v.scale_px for *_, v in rows], dtype=np.float64),
        connected_fraction=np.array([v.connected_fraction for *_, v in rows], dtype=np.float64),
        ensemble=np.array([e for e, *_ in rows], dtype=np.int64),
        realisation=np.array([r for _, r, *_ in rows], dtype=np.int64),
        style=np.array([s for _, _, s, _ in rows], dtype=np.int64),
        thickness_sites=np.array([THICKNESS_SITES[s] for _, _, s, _ in rows], dtype=np.float64),
    )


def build_feature_cache(
    reference_set, *, scheduler: str | None = None, workers: int | None = None, progress: bool = True
) -> ReferenceTable:
    """Compute the matcher's feature vector of every reference cluster and cache it.

    Each cluster is drawn in its styles of the nuisance grid
    (:mod:`service.match.nuisance`: branch thickness 0.7 to 3 sites, blur, threshold level,
    JPEG), and each drawing normalised and measured exactly as a specimen is; one Dask task
    per cluster (``ReferenceSet.map_clusters``). The grid is stored beside the vectors.

    Parameters
    ----------
    reference_set : ReferenceSet or path
        The set to prepare (a path is opened with ``load_reference_set``).
    scheduler : str, optional
        Address of an existing Dask scheduler; by default a LocalCluster is started.
    workers : int, optional
        Worker processes of the LocalCluster (default: one per usable CPU, ``service.cpus``).
    progress : bool
        Show a progress bar on stderr.

    Returns
    -------
    ReferenceTable
        What was cached (also readable later with :func:`load_reference_table`).
    """
    reference_set = _as_reference_set(reference_set)
    started = time.perf_counter()
    table = compute_reference_table(reference_set, scheduler=scheduler, workers=workers, progress=progress)
    _write(reference_set, table, time.perf_counter() - started)
    return table


def _write(reference_set, table: ReferenceTable, wall_s: float) -> None:
    reference_set.write_cache(
        CACHE_NAME,
        {
            **table.arrays(),
            "feature_names": np.array(FEATURE_NAMES),
            "nuisance_grid": np.array(json.dumps(nuisance_grid(), sort_keys=True)),
            "wall_s": np.array(wall_s),
        },
    )


def load_reference_table(reference_set, *, build_if_missing: bool | None = None) -> ReferenceTable:
    """The cached feature vectors of a reference set.

    Parameters
    ----------
    reference_set : ReferenceSet
    build_if_missing : bool, optional
        Compute (in process) and cache the vectors when there is no valid cache. Default:
        only for sets of at most ``AUTO_BUILD_MAX_CLUSTERS`` clusters.

    Raises
    ------
    LibraryError
        If there is no valid cache and it is not to be built here.
    """
    cached = reference_set.read_cache(CACHE_NAME)
    if (
        cached is not None
        and all(name in cached for name in (*_COLUMNS, "feature_names"))
        and tuple(str(n) for n in cached["feature_names"]) == FEATURE_NAMES
        and str(cached.get("nuisance_grid", "")) == json.dumps(nuisance_grid(), sort_keys=True)
    ):
        n = len(cached["ensemble"])
        if np.array_equal(
            np.bincount(cached["ensemble"], minlength=len(reference_set.ensembles)),
            [e.n_realisations * n_styles(e.n_particles) for e in reference_set.ensembles],
        ) and cached["values"].shape == (n, len(FEATURE_NAMES)):
            return ReferenceTable(**{name: cached[name] for name in _COLUMNS})
    n_clusters = sum(e.n_realisations for e in reference_set.ensembles)
    if build_if_missing is None:
        build_if_missing = n_clusters <= AUTO_BUILD_MAX_CLUSTERS
    if not build_if_missing:
        raise LibraryError(
            f"the reference set at {reference_set.path} has no matcher feature cache ({CACHE_NAME}) for its "
            f"{n_clusters} clusters; prepare it once with: python -c \"from service.match import "
            f"build_feature_cache; build_feature_cache('{reference_set.path}')\""
        )
    started = time.perf_counter()
    table = compute_reference_table(reference_set, in_process=True)
    _write(reference_set, table, time.perf_counter() - started)
    return table


def cache_discrepancy(reference_set, table: ReferenceTable, n_checks: int = 3) -> float:
    """Largest difference between cached vectors and the same clusters measured afresh.

    The first realisation of ``n_checks`` ensembles spread through the set is drawn again in
    its thickest cached style (the cheapest drawing) and measured;
    a difference means the measurement code changed since the cache was built (rebuild it
    with :func:`build_feature_cache`). Only ensembles whose sites are stored are picked
    (when there are any), so nothing is regrown. Costs a fraction of a second.
    """
    stored = [i for i, e in enumerate(reference_set.ensembles) if e.sites_stored]
    candidates = np.array(stored or range(len(reference_set.ensembles)))
    picks = np.unique(candidates[np.linspace(0, len(candidates) - 1, n_checks).round().astype(int)])
    worst = 0.0
    for index in picks:
        rows = np.flatnonzero((table.ensemble == index) & (table.realisation == 0))
        row = int(rows[np.argmax(table.style[rows])])
        fresh = reference_vectors(reference_set.arrival_order(reference_set.ensembles[index], 0),
                                  (int(table.style[row]),))[0][1]
        worst = max(worst, float(np.max(np.abs(fresh.values - table.values[row]))),
                    abs(float(np.log(fresh.n_sites)) - float(table.log_sites[row])))
    return worst


def _as_reference_set(reference_set):
    if reference_set is None or isinstance(reference_set, (str, bytes)) or hasattr(reference_set, "__fspath__"):
        from service.library.load import load_reference_set

        return load_reference_set(reference_set)
    return reference_set
