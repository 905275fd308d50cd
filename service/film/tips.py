"""Where a deposit grows: the share of new deposit lying near the tips of the one before.

Diffusion-limited growth adds almost everything at the tips of the branches, which screen
the fjords between them (Witten & Sander, Phys. Rev. Lett. 47, 1400, 1981); Eden growth adds
to every site of the perimeter alike (Eden, Proc. 4th Berkeley Symp. 4, 223, 1961), so the
new deposit is spread over the whole front. Between two frames, the tip growth share is the
share of the new deposit within ``TIP_REACH_WIDTHS`` branch widths of the earlier frame's tips
(the tips of the skeleton graph, ``service.features.skeleton.skeleton_graph``).

The same statistic is computed for each reference family from its stored arrival order, cut
at the same stages of growth (shares of the final area) as the film's frames, so the film's
value can be set beside what each growth regime gives.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from functools import lru_cache
from typing import Any

import numpy as np

from service.distance import distance_to_background

__all__ = ["TIP_REACH_WIDTHS", "comparison_steps", "pruned_tips", "reference_shares", "tip_share"]

#: New deposit within this many branch widths of a tip counts as grown at the tip.
TIP_REACH_WIDTHS = 3.0
#: Clusters of each family used for its statistic, and the stages the comparison uses.
CLUSTERS_PER_FAMILY = 4
MAX_STEPS = 8
#: A comparison step spans at least this growth of the area (small steps are mostly noise).
MIN_STEP_GROWTH = 1.25
_FRACTION_GRID = 0.02


def pruned_tips(mask: np.ndarray) -> np.ndarray:
    """Tips (row, col) of a mask's skeleton graph, the same tips ``skeleton_graph`` counts.

    The same steps as :func:`service.features.skeleton.skeleton_graph` up to its tips
    (Zhang-Suen skeleton, spurs shorter than 1.5 local widths pruned, close junctions merged),
    without the lengths, angles and Horton-Strahler ordering a film's every frame does not need.
    """
    from skimage.morphology import skeletonize

    from service.features._common import local_width_px
    from service.features.skeleton import MERGE_WIDTHS, PRUNE_WIDTHS, _bare_graph

    rows, cols = np.nonzero(mask)
    if rows.size == 0:
        return np.empty((0, 2), dtype=np.int64)
    r0, c0 = rows.min() - 1, cols.min() - 1
    crop = np.zeros((rows.max() - r0 + 2, cols.max() - c0 + 2), dtype=bool)
    crop[rows - r0, cols - c0] = True
    skel = skeletonize(crop)
    graph, _, _ = _bare_graph(skel, local_width_px(distance_to_background(crop)))
    while True:
        changed = graph.prune_spurs(PRUNE_WIDTHS)
        changed += graph.merge_close_junctions(MERGE_WIDTHS)
        changed += graph.merge_chains()
        if not changed:
            break
    tips = [graph.node_pixels[n][0] for n in graph.incident if graph.degree(n) == 1]
    return np.array(tips, dtype=np.int64).reshape(-1, 2) + np.array([r0, c0])


def near_tips(shape: tuple[int, int], tips_rc: np.ndarray, reach_px: float) -> np.ndarray:
    """Pixels within ``reach_px`` of any tip."""
    seeds = np.zeros(shape, dtype=bool)
    if len(tips_rc):
        rc = np.clip(np.rint(np.asarray(tips_rc)).astype(int), 0, np.array(shape) - 1)
        seeds[rc[:, 0], rc[:, 1]] = True
    else:
        return seeds
    return distance_to_background(~seeds) <= reach_px


def tip_share(before: np.ndarray, after: np.ndarray, tips_rc: np.ndarray, reach_px: float) -> tuple[int, int]:
    """New deposit (in ``after``, not ``before``) near ``before``'s tips, and all new deposit (px)."""
    new = after & ~before
    n_new = int(np.count_nonzero(new))
    if n_new == 0:
        return 0, 0
    rows, cols = np.nonzero(before | after)
    r0, r1 = max(0, rows.min() - 1), rows.max() + 2
    c0, c1 = max(0, cols.min() - 1), cols.max() + 2
    near = near_tips((r1 - r0, c1 - c0), np.asarray(tips_rc).reshape(-1, 2) - [r0, c0], reach_px)
    return int(np.count_nonzero(new[r0:r1, c0:c1] & near)), n_new


def comparison_steps(areas: Sequence[int]) -> list[tuple[int, int]]:
    """Pairs of positions in ``areas`` (one per accepted frame) to compare: each step grows the
    area by at least ``MIN_STEP_GROWTH``, from a tenth of the final area on, at most ``MAX_STEPS``."""
    areas = np.asarray(areas, dtype=float)
    if areas.size < 2 or areas[-1] <= 0:
        return []
    final = areas[-1]
    start = int(np.argmax(areas >= 0.1 * final))
    ratio = max(MIN_STEP_GROWTH, (final / max(areas[start], 1.0)) ** (1.0 / MAX_STEPS))
    steps, i = [], start
    for j in range(start + 1, areas.size):
        if areas[j] >= ratio * areas[i] or (j == areas.size - 1 and areas[j] > areas[i]):
            steps.append((i, j))
            i = j
    return steps


def _grid(fraction: float) -> float:
    return round(min(1.0, max(_FRACTION_GRID, round(fraction / _FRACTION_GRID) * _FRACTION_GRID)), 4)


@lru_cache(maxsize=4096)
def _cluster_step(library_dir: str, ensemble_id: str, index: int, f_before: float, f_after: float,
                  reach_fraction: float) -> tuple[int, int]:
    order = _order(library_dir, ensemble_id, index)
    n = int(order.max())
    before = (order > 0) & (order <= math.ceil(f_before * n))
    after = (order > 0) & (order <= math.ceil(f_after * n))
    tips = pruned_tips(before)
    rows, cols = np.nonzero(order)
    h, w = order.shape
    radius = float(np.sqrt((rows - h // 2) ** 2 + (cols - w // 2) ** 2).max())
    return tip_share(before, after, tips, max(1.0, reach_fraction * radius))


@lru_cache(maxsize=256)
def _order(library_dir: str, ensemble_id: str, index: int) -> np.ndarray:
    return _reference_set(library_dir).arrival_order(ensemble_id, index)


def _reference_set(library_dir: str):
    """The process's reference set (the one ``ReferenceLibrary`` kept for this folder)."""
    from service.match.library import process_library

    return process_library(library_dir or None).reference_set


def families(reference_set) -> list[tuple[str, Any]]:
    """One ensemble per family (regime and parameters), the one nearest 3000 sites."""
    from service.library.storage import Ensemble  # noqa: F401 - the type the set hands out

    chosen: dict[str, Any] = {}
    for e in reference_set.ensembles:
        key = e.regime + (" " + ", ".join(f"{k}={v}" for k, v in sorted(e.parameters.items())) if e.parameters else "")
        best = chosen.get(key)
        if best is None or abs(math.log(e.n_particles / 3000)) < abs(math.log(best.n_particles / 3000)):
            chosen[key] = e
    return sorted(chosen.items())


def reference_shares(fraction_steps: Sequence[tuple[float, float]], reach_fraction: float, *,
                     library_dir: str | None = None, clusters: int = CLUSTERS_PER_FAMILY) -> dict[str, dict[str, Any]]:
    """The tip growth share of each reference family over the same growth stages.

    ``fraction_steps`` are (area before, area after) as shares of the final area. Each family's
    first ``clusters`` clusters are cut at those shares of their arrival order (snapped to a
    grid of 0.02, so results are cached across films). ``reach_fraction`` is the film's reach
    as a share of its final largest radius: a lattice cluster has no photographed branch
    width, so the reach is scaled to the same share of the cluster's own radius (to 0.005).
    The answer per family is the pooled share (new sites near tips / new sites), the
    clusters' range, and the family's regime.
    """
    reach_fraction = round(max(0.005, round(float(reach_fraction) / 0.005) * 0.005), 4)
    reference_set = _reference_set(str(library_dir or ""))
    out: dict[str, dict[str, Any]] = {}
    steps = [(_grid(a), _grid(b)) for a, b in fraction_steps]
    steps = [(a, b) for a, b in steps if b > a]
    if not steps:
        return out
    for key, ensemble in families(reference_set):
        values = []
        for index in range(min(clusters, ensemble.n_realisations)):
            near = total = 0
            for a, b in steps:
                n_near, n_new = _cluster_step(str(library_dir or ""), ensemble.id, index, a, b,
                                              reach_fraction)
                near, total = near + n_near, total + n_new
            if total:
                values.append(near / total)
        if values:
            out[key] = {"regime": ensemble.regime, "parameters": dict(ensemble.parameters),
                        "ensemble": ensemble.id, "value": float(np.mean(values)),
                        "range": [float(min(values)), float(max(values))], "clusters": len(values)}
    return out
