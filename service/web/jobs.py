"""Work done in the analysis processes: one upload in, its JSON and its rendered files out.

The functions here run in a worker process (or a thread when the pool is off) and return
only plain data - the analysis dict and the bytes of PNG and SVG files - so nothing heavy
or process-bound crosses back to the web process.
"""

from __future__ import annotations

import asyncio
import concurrent.futures
import concurrent.futures.process  # BrokenProcessPool, also when the pool runs threads
import multiprocessing
from typing import Any

import numpy as np

from service.analysis import AnalysisOptions
from service.cpus import usable_cpus
from service.errors import RamiformError
from service.match.library import ReferenceLibrary, process_library, start_process_library

_SOURCE_SUFFIX = {"PNG": "png", "JPEG": "jpg", "TIFF": "tif", "BMP": "bmp"}


def matcher_rows(analysis: dict[str, Any]) -> list[dict[str, Any]]:
    """The matcher's per-feature rows (``explanation.all_features``), or [] when unranked."""
    explanation = analysis.get("explanation")
    rows = explanation.get("all_features") if isinstance(explanation, dict) else None
    return rows if isinstance(rows, list) else []


def run_analysis(data: bytes, options: AnalysisOptions, library: ReferenceLibrary | None = None) -> dict[str, Any]:
    """Analyse one upload; returns ``{"analysis": dict, "files": {name: bytes}}``.

    Files: ``source.<format>`` (the upload), ``photo.png`` and ``overlay.png`` (display
    size), ``mask.png`` (full size, 1 bit), ``thumbnail.png``, ``box_counting.svg``,
    ``lacunarity.svg``, when ranked ``references.svg``, a small ``alternative_<i>.png`` per
    alternative reading the segmentation offers, and ``levels.png`` (display size), the
    picture its threshold applies to, when it has one.

    ``library`` is the reference library to rank against (default: this worker's, opened
    once per process). A set that cannot be opened leaves the specimen measured but not
    ranked, with a ``not_ranked`` warning saying why.

    Raises the pipeline's own errors (``RamiformError`` subclasses, ``ValueError``) unchanged.
    """
    from service.analysis import analyze_with
    from service.web import pictures, plots
    from service.web.formatting import family_name

    library = library or process_library(options.library_dir)
    result = analyze_with(data, options, reference_set=library)
    analysis = result.to_dict()
    rgb = result.image.rgb
    mask = result.segmentation.mask
    features = result.features
    overlay = pictures.annotated_overlay(rgb, mask, features.skeleton_mask, features.tips_rc, features.junctions_rc)
    photo = pictures.display_photo(rgb)
    files = {
        f"source.{_SOURCE_SUFFIX.get(result.image.format, 'img')}": bytes(data),
        "photo.png": pictures.png_bytes(photo),
        "overlay.png": pictures.png_bytes(overlay),
        "mask.png": pictures.png_bytes(mask),
        "thumbnail.png": pictures.png_bytes(pictures.thumbnail(overlay)),
        "box_counting.svg": plots.box_counting_svg(analysis["features"].get("box_dimension", {})),
        "lacunarity.svg": plots.lacunarity_svg(analysis["features"].get("lacunarity", {})),
    }
    files.update(reading_pictures(result.segmentation, photo.shape[:2]))
    files.update(plots.skeleton_svgs(features.skeleton, analysis["features"]))
    rows = matcher_rows(analysis)
    if rows:
        explanation = analysis["explanation"]
        files["references.svg"] = plots.reference_distributions_svg(
            rows, family_name(explanation.get("best")) or "best match", family_name(explanation.get("runner_up"))
        )
    return {"analysis": analysis, "files": files}


def reading_pictures(segmentation, display_shape: tuple[int, int]) -> dict[str, bytes]:
    """``alternative_<i>.png`` for each alternative reading and ``levels.png`` (at ``display_shape``)."""
    from service.web import pictures

    files = {f"alternative_{i}.png": pictures.png_bytes(pictures.mask_preview(alternative.preview))
             for i, alternative in enumerate(segmentation.alternatives)}
    if segmentation.levels is not None:
        files["levels.png"] = pictures.png_bytes(pictures.levels_picture(segmentation.levels, display_shape))
    return files


def matcher_distances(vectors: list[list[float]], library_dir: str | None = None,
                      library: ReferenceLibrary | None = None) -> list[list[float]]:
    """Mahalanobis distances between specimens in the matcher's feature space.

    The metric is the reference model's within-ensemble covariance pooled over its
    families, with the matcher's own variance ridge: the spread the matcher itself expects
    between clusters grown alike.
    """
    model = (library or process_library(library_dir)).model
    statistics = model.statistics
    inverse = np.linalg.inv(statistics.pooled + np.diag(statistics.floor))
    x = np.asarray(vectors, dtype=float)
    diff = x[:, None, :] - x[None, :, :]
    d2 = np.einsum("ijk,kl,ijl->ij", diff, inverse, diff)
    return np.sqrt(np.maximum(d2, 0.0)).tolist()


class AnalysisPool:
    """Runs analyses off the event loop: a pool of processes, one per usable CPU by default.

    ``processes=0`` runs them in threads of this process instead (debugging, small tests).
    Each process opens ``library``'s folder once when it starts (threads share ``library``
    itself); :meth:`run_with_library` hands the function that library. A worker that dies (out of memory, killed) breaks a process pool; the pool is then
    replaced, the one request answered with an error, and the service keeps serving.
    """

    def __init__(self, processes: int, library: ReferenceLibrary | None = None) -> None:
        self.processes = processes
        self.library = library if library is not None else ReferenceLibrary(None)
        self._executor = self._new_executor()

    def _new_executor(self) -> concurrent.futures.Executor:
        if self.processes == 0:
            return concurrent.futures.ThreadPoolExecutor(max_workers=usable_cpus())
        # spawn: a fresh interpreter per worker, never a fork of a threaded server
        return concurrent.futures.ProcessPoolExecutor(
            max_workers=self.processes, mp_context=multiprocessing.get_context("spawn"),
            initializer=start_process_library, initargs=(self.library.directory,),
        )

    async def run(self, fn, *args: Any) -> Any:
        loop = asyncio.get_running_loop()
        executor = self._executor
        try:
            return await loop.run_in_executor(executor, fn, *args)
        except concurrent.futures.process.BrokenProcessPool as exc:
            if executor is self._executor:
                self._executor = self._new_executor()
                executor.shutdown(wait=False, cancel_futures=True)
            raise WorkerLostError("the analysis worker stopped unexpectedly; please try again") from exc

    async def run_with_library(self, fn, *args: Any) -> Any:
        """``fn(*args, library)``: the pool's library in threads, None (the worker's own) in processes."""
        return await self.run(fn, *args, self.library if self.processes == 0 else None)

    def shutdown(self) -> None:
        self._executor.shutdown(wait=True, cancel_futures=True)


class WorkerLostError(RamiformError):
    """An analysis process died while working (the service itself keeps running)."""

    status_code = 503
