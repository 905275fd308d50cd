"""Grow reference sets on Dask: presets, deterministic seeds, one task per cluster.

A preset is data: a tuple of :class:`~service.library.storage.EnsembleSpec` (regime,
simulator parameters, cluster size, number of realisations). :func:`build_library` grows
every realisation of every ensemble as one Dask task, on a fresh ``LocalCluster`` or an
existing scheduler, and the client writes the files of :mod:`service.library.storage` in a
fixed order once everything is in, so the result does not depend on which worker finished
first.
"""

from __future__ import annotations

import hashlib
import io
import json
import os
import shutil
import sys
import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np

from service.cpus import usable_cpus
from service.errors import LibraryError, RamiformError
from service.library.storage import (
    CACHE_DIR,
    CLUSTER_DIR,
    MANIFEST,
    THUMBNAIL_DIR,
    Ensemble,
    EnsembleSpec,
    sites_from_lattice,
    write_bytes,
    write_reference_set,
)

#: Simulator parameters of every ensemble, per regime. A new regime or parameter value is
#: one more entry here and one in ``DEFAULT_SIZES`` (and a rebuild, then
#: ``service.match.build_feature_cache``); the matcher reads the grid back from the manifest,
#: and sums families that differ only in a parameter it does not estimate (a DBM outer
#: electrode's distance, say) when it estimates the others. A regime of a known universality
#: class is named in ``service.match.universality``.
DBM_ETAS = (0.5, 1.0, 1.5, 2.0, 3.0, 4.0)
PARAMETER_GRID: dict[str, tuple[dict[str, Any], ...]] = {
    # Discs of unit diameter off the lattice (Meakin's algorithm) are the DLA class as real
    # deposits grow it, with no lattice axes; they stick on first contact.
    "dla": tuple(
        {"neighborhood": neighborhood, "sticking": sticking}
        for neighborhood in ("von_neumann", "moore")
        for sticking in (1.0, 0.3, 0.1)
    ) + ({"off_lattice": True, "sticking": 1.0},),
    "eden": ({},),
    # Particles that stop at the first site beside the aggregate, and particles that pass
    # alongside branches and stop only where their line runs into one: both rules are in use
    # for lattice ballistic aggregation, and the second packs the aggregate denser.
    "ballistic": ({}, {"stop": "on_impact"}),
    # The outer electrode far away (moving out as the deposit grows), and near: fixed where
    # the deposit nearly reaches it, as a lab deposit grown up to the rim electrode.
    "dbm": tuple({"eta": eta} for eta in DBM_ETAS) + tuple({"eta": eta, "electrode": "near"} for eta in DBM_ETAS),
}


def _preset(
    sizes: dict[str, tuple[int, ...]],
    n_realisations: int,
    realisations_at: dict[tuple[str, int], int] | None = None,
) -> tuple[EnsembleSpec, ...]:
    """Every regime and parameter of ``PARAMETER_GRID`` at the regime's ``sizes``, with
    ``n_realisations`` each except the ``(regime, size)`` keys of ``realisations_at``."""
    realisations_at = realisations_at or {}
    return tuple(
        EnsembleSpec(regime, parameters, n, realisations_at.get((regime, n), n_realisations))
        for regime, grid in PARAMETER_GRID.items()
        for parameters in grid
        for n in sizes[regime]
    )


_FULL_SIZES = (1000, 3000, 10000, 30000, 100000)
#: Cluster sizes of each regime in the ``default`` preset (the bundled set): DLA, Eden and
#: ballistic to 100,000 sites, DBM to 10,000 for every eta and both electrodes, so specimens
#: hundreds of branch widths across meet references of their own size.
DEFAULT_SIZES: dict[str, tuple[int, ...]] = {
    "dla": _FULL_SIZES, "eden": _FULL_SIZES, "ballistic": _FULL_SIZES, "dbm": (1000, 3000, 10000),
}

#: Named presets. ``default`` is the bundled set; ``tiny`` grows every regime and parameter
#: at a very small size, for tests of the build itself.
#:
#: ``default`` takes about three core-hours on the development machine: each DBM growth step
#: solves the Laplace field near the cluster, which at 10,000 sites costs about 10 s a cluster
#: at eta 0.5 and 1 and one to four minutes at eta 3 and 4 (``estimated_seconds``). Clusters
#: above ``STORED_SITES_MAX`` sites are kept as seeds, digests and thumbnails and regrown on
#: demand; their matcher features are computed at build time (``ramiform library build``),
#: and an interrupted build resumes from the clusters it kept.
PRESETS: dict[str, tuple[EnsembleSpec, ...]] = {
    # DBM at 10,000 sites has 8 realisations, not 16: one cluster costs up to minutes at eta 3 and 4.
    "default": _preset(DEFAULT_SIZES, n_realisations=16, realisations_at={("dbm", 10000): 8}),
    "tiny": _preset({regime: (200,) for regime in PARAMETER_GRID}, n_realisations=2),
}

#: Largest cluster whose sites a build stores; larger ones are regrown from their seeds when
#: their sites are needed (checked against the SHA-256 of the sites as grown). Stored sites
#: compress to 2.7-2.9 bytes a site (measured on Eden, ballistic and DLA clusters of 100,000
#: sites), so in ``default`` the 16 realisations of the ten DLA, Eden and ballistic families
#: would take about 12 MB at 30,000 sites and 41 MB at 100,000, against about 12 MB for
#: every ensemble up to 10,000 sites: only the latter fits the bundled set's 25 MB.
STORED_SITES_MAX = 10_000

#: How seeds follow from an ensemble and a realisation index (recorded in the manifest).
#: Four bytes, since the simulators take seeds in [0, 2**32).
SEED_RULE = (
    "seed = first 4 bytes (big-endian) of SHA-256 of the compact sorted-key JSON of "
    '{"preset", "regime", "parameters", "n_particles", "realisation"}'
)


def realisation_seed(preset: str, spec: EnsembleSpec, index: int) -> int:
    """The seed of realisation ``index`` of ``spec`` in ``preset`` (see ``SEED_RULE``)."""
    key = {
        "preset": preset,
        "regime": spec.regime,
        "parameters": dict(spec.parameters),
        "n_particles": spec.n_particles,
        "realisation": index,
    }
    digest = hashlib.sha256(json.dumps(key, sort_keys=True, separators=(",", ":")).encode()).digest()
    return int.from_bytes(digest[:4], "big")


def estimated_seconds(regime: str, parameters: dict[str, Any], n_particles: int) -> float:
    """Rough single-core time to grow one cluster (measured on the development machine).

    Used to start the longest tasks first (so no worker idles at the end) and to weight
    the progress bar's estimate of the time left; it decides nothing about the result.
    """
    n = float(n_particles)
    if regime == "dbm":
        # Measured at 3,000 and 10,000 sites on the two shared cores of the development
        # machine (2026-12-02): eta 0.5 1.9 s / 8.9 s, eta 1 2.3 / 10.5, eta 2 3.9 / 21,
        # eta 3 8.7 / 91, eta 4 12.9 s / about 3 minutes (from the default build); the cost
        # grows like n^exponent in between. A near electrode stops the deposit early (about
        # half the sites at 10,000), which this overestimates.
        eta = parameters.get("eta", 1.0)
        at_10000 = np.interp(eta, [0.5, 1.0, 2.0, 3.0, 4.0], [8.9, 10.5, 21.0, 91.0, 180.0])
        exponent = np.interp(eta, [0.5, 1.0, 2.0, 3.0, 4.0], [1.28, 1.26, 1.39, 1.95, 2.2])
        return float(at_10000 * (n / 10000.0) ** exponent)
    return SECONDS_PER_SITE.get(regime, 1e-5) * n


#: Single-core seconds per grown site of the regimes whose cost grows linearly (DBM is modelled
#: in ``estimated_seconds``).
SECONDS_PER_SITE: dict[str, float] = {"dla": 7e-6, "eden": 4e-7, "ballistic": 1.3e-6}


# --------------------------------------------------------------------------- Dask


@contextmanager
def dask_client(scheduler: str | None = None, workers: int | None = None) -> Iterator[Any]:
    """A ``distributed.Client`` on ``scheduler``, or on a LocalCluster closed on exit.

    The LocalCluster has ``workers`` single-threaded worker processes (default: one per
    usable CPU, ``service.cpus.usable_cpus``); its status server takes a free port, so builds never clash over one.
    """
    from distributed import Client, LocalCluster

    if scheduler is not None:
        with Client(scheduler) as client:
            yield client
        return
    if workers is not None and workers < 1:
        raise ValueError(f"workers must be at least 1, got {workers}")
    n_workers = workers or usable_cpus()
    with LocalCluster(
        n_workers=n_workers, threads_per_worker=1, processes=True, dashboard_address=":0"
    ) as cluster, Client(cluster) as client:
        yield client


def run_tasks(
    fn: Callable[..., Any],
    tasks: Sequence[tuple[Any, ...]],
    *,
    costs: Sequence[float],
    scheduler: str | None = None,
    workers: int | None = None,
    progress: bool = True,
    label: str = "tasks",
    on_result: Callable[[int, Any], None] | None = None,
) -> list[Any]:
    """``[fn(*task) for task in tasks]``, computed on Dask, returned in the order of ``tasks``.

    Tasks start in decreasing order of ``costs`` (longest first keeps every worker busy to
    the end); the progress bar counts done/total and estimates the time left from the
    costs already done. ``on_result(i, result)``, if given, is called in this process as
    each task ``i`` finishes (to keep results of a long run as they come).
    """
    from distributed import as_completed
    from tqdm import tqdm

    if not tasks:
        return []
    results: list[Any] = [None] * len(tasks)
    weights = [max(1, round(1000 * c)) for c in costs]  # integers: the bar ends exactly at its total
    start_order = sorted(range(len(tasks)), key=lambda i: -weights[i])
    with dask_client(scheduler, workers) as client:
        futures = {}
        for rank, i in enumerate(start_order):
            futures[client.submit(fn, *tasks[i], pure=False, priority=len(tasks) - rank)] = i
        with tqdm(
            total=sum(weights),
            disable=not progress,
            bar_format="{desc} |{bar}| {percentage:3.0f}% [{elapsed} elapsed, {remaining} left]",
            desc=f"{label}: 0/{len(tasks)}",
            file=sys.stderr,
        ) as bar:
            for done, future in enumerate(as_completed(futures), start=1):
                i = futures[future]
                try:
                    results[i] = future.result()
                except Exception as exc:
                    for other in futures:
                        other.cancel()
                    raise LibraryError(f"{label}: task {tasks[i]!r:.200} failed: {exc}") from exc
                future.release()
                if on_result is not None:
                    on_result(i, results[i])
                bar.set_description_str(f"{label}: {done}/{len(tasks)}", refresh=False)
                bar.update(weights[i])
    return results


def grow_sites(regime: str, parameters: dict[str, Any], n_particles: int, seed: int) -> np.ndarray:
    """One cluster as seed offsets in order of arrival (the task each worker runs)."""
    from service.simulate import grow

    return sites_from_lattice(grow(regime, n_particles, seed=seed, **parameters))


# --------------------------------------------------------------------------- build


def build_library(
    preset: str,
    out_dir: str | Path,
    *,
    scheduler: str | None = None,
    workers: int | None = None,
    progress: bool = True,
    stored_sites_max: int = STORED_SITES_MAX,
) -> Path:
    """Grow every ensemble of ``preset`` on Dask and write a reference set to ``out_dir``.

    Parameters
    ----------
    preset : str
        A key of ``PRESETS`` (``"default"``, ``"tiny"``).
    out_dir : path
        Destination folder; an existing reference set there is replaced (only once the new
        one is complete). A non-empty folder that is not a reference set is refused.
    scheduler : str, optional
        Address of an existing Dask scheduler; by default a LocalCluster is started.
    workers : int, optional
        Worker processes of the LocalCluster (default: one per usable CPU, ``service.cpus``).
    progress : bool
        Show a progress bar on stderr.
    stored_sites_max : int
        Ensembles of at most this many sites store their sites; larger ones are written as
        seeds, per-realisation digests and a thumbnail, and regrown when read
        (:mod:`service.library.storage`).

    Returns
    -------
    Path
        The folder written.

    Notes
    -----
    Same preset, same software: byte-identical cluster and thumbnail files, and a manifest
    that differs only in its ``build`` entry (wall time and machinery used).

    A long build can be interrupted and resumed: each cluster is kept as it arrives in
    ``<out_dir>.grown/`` (see :class:`GrownClusters`), and a build of the same preset into
    the same folder grows only those not kept yet. The folder is removed once the set is
    written, and ignored if the simulators' source changed since it was filled.
    """
    if preset not in PRESETS:
        raise ValueError(f"unknown preset {preset!r}; known presets: {sorted(PRESETS)}")
    out_dir = Path(out_dir)
    if out_dir.exists() and any(out_dir.iterdir()) and not (out_dir / MANIFEST).is_file():
        raise LibraryError(f"{out_dir} is not empty and holds no reference set; refusing to overwrite it")
    specs = PRESETS[preset]
    ensembles = [
        Ensemble(
            **vars(spec),
            seeds=tuple(realisation_seed(preset, spec, i) for i in range(spec.n_realisations)),
            clusters=f"{CLUSTER_DIR}/{spec.id}.npz" if spec.n_particles <= stored_sites_max else "",
            thumbnail=f"{THUMBNAIL_DIR}/{spec.id}.png",
            sites_stored=spec.n_particles <= stored_sites_max,
        )
        for spec in specs
    ]
    tasks = [(e.regime, dict(e.parameters), e.n_particles, seed) for e in ensembles for seed in e.seeds]
    grown = GrownClusters(out_dir.with_name(out_dir.name + ".grown"))
    sites: list[np.ndarray | None] = [grown.get(task) for task in tasks]
    missing = [i for i, s in enumerate(sites) if s is None]
    costs = [estimated_seconds(*tasks[i][:3]) for i in missing]
    if progress:
        kept = f" ({len(tasks) - len(missing)} kept from an interrupted build)" if len(missing) < len(tasks) else ""
        print(
            f"growing {preset!r}: {len(tasks)} clusters in {len(ensembles)} ensembles{kept}, "
            f"roughly {sum(costs) / 60:.0f} core-minutes",
            file=sys.stderr,
        )
    started = time.perf_counter()
    fresh = run_tasks(
        grow_sites,
        [tasks[i] for i in missing],
        costs=costs,
        scheduler=scheduler,
        workers=workers,
        progress=progress,
        label=f"growing {preset}",
        on_result=lambda j, result: grown.put(tasks[missing[j]], result),
    )
    for i, result in zip(missing, fresh):
        sites[i] = result
    wall_s = time.perf_counter() - started

    staging = out_dir.with_name(out_dir.name + ".partial")
    shutil.rmtree(staging, ignore_errors=True)
    build = {
        "wall_s": round(wall_s, 1),
        "scheduler": scheduler or "LocalCluster",
        "workers": workers or (None if scheduler else usable_cpus()),
    }
    write_reference_set(
        staging, preset=preset, ensembles=ensembles, sites=sites, seed_rule=SEED_RULE, build=build
    )
    _replace_folder(staging, out_dir)
    grown.remove()
    return out_dir


class GrownClusters:
    """Clusters of an unfinished build, one ``.npy`` file each, keyed by what grew them.

    A file's name is the SHA-256 of the task (regime, parameters, size, seed); the folder's
    ``simulators.txt`` holds a digest of the simulators' source, and a folder written by other
    simulators is emptied on opening rather than trusted. Files are written whole (through a
    temporary file and a rename), so an interrupted build leaves no half cluster.
    """

    def __init__(self, folder: Path):
        self.folder = Path(folder)
        stamp = self.folder / "simulators.txt"
        digest = _simulator_digest()
        if self.folder.is_dir() and (not stamp.is_file() or stamp.read_text() != digest):
            shutil.rmtree(self.folder)
        if not self.folder.is_dir():
            self.folder.mkdir(parents=True)
            write_bytes(stamp, digest.encode())

    def _path(self, task: tuple[Any, ...]) -> Path:
        key = json.dumps(list(task), sort_keys=True, separators=(",", ":")).encode()
        return self.folder / f"{hashlib.sha256(key).hexdigest()}.npy"

    def get(self, task: tuple[Any, ...]) -> np.ndarray | None:
        try:
            return np.load(self._path(task), allow_pickle=False)
        except (OSError, ValueError):
            return None

    def put(self, task: tuple[Any, ...], sites: np.ndarray) -> None:
        payload = io.BytesIO()
        np.save(payload, sites, allow_pickle=False)
        write_bytes(self._path(task), payload.getvalue())

    def remove(self) -> None:
        shutil.rmtree(self.folder, ignore_errors=True)


def _simulator_digest() -> str:
    """SHA-256 over the source of ``service.simulate`` (what a kept cluster was grown by)."""
    folder = Path(__file__).resolve().parents[1] / "simulate"
    digest = hashlib.sha256()
    for path in sorted(folder.rglob("*.py")):
        digest.update(path.relative_to(folder).as_posix().encode() + b"\0" + path.read_bytes() + b"\0")
    return digest.hexdigest()


def _replace_folder(new: Path, target: Path) -> None:
    """Move the complete ``new`` folder to ``target``, removing what was there.

    A feature cache of the old set moves along: each cache file records which clusters it
    was computed from, so a stale one is recognised and ignored on reading.
    """
    old = target.with_name(target.name + ".old")
    shutil.rmtree(old, ignore_errors=True)
    if (target / CACHE_DIR).is_dir():
        shutil.move(target / CACHE_DIR, new / CACHE_DIR)
    if target.exists():
        os.replace(target, old)
    os.replace(new, target)
    shutil.rmtree(old, ignore_errors=True)


def run_build_command(args) -> int:
    """Entry point of ``ramiform library build``; prints where the set went."""
    out = Path(args.out) if args.out else Path(__file__).resolve().parents[2] / "reference_sets" / args.preset
    try:
        path = build_library(args.preset, out, scheduler=args.scheduler, workers=args.workers)
    except (RamiformError, ValueError) as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 1
    print(f"reference set {args.preset!r} written to {path}")
    return 0
