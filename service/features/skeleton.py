"""Skeleton graph of a branching specimen: tips, junctions, branches and their orders.

The skeleton of a thick stroke grows spurs wherever the outline has a corner or a
bump, and a thick junction can show as a little cluster of junction pixels or as two
junctions joined by a sliver. A bare skeleton therefore overcounts tips and
junctions; the graph here is cleaned at the scale of the local branch width first.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numba
import numpy as np
from scipy import ndimage, sparse
from scipy.sparse import csgraph
from skimage.morphology import skeletonize

from service.features._common import (
    as_specimen_mask,
    crop_to_specimen,
    local_width_px,
    paste_crop,
    window_of,
)

#: A terminal branch shorter than this many local widths (at its junction) is a spur.
PRUNE_WIDTHS = 1.5
#: Two adjacent junctions whose centres are closer than this many local widths are one.
MERGE_WIDTHS = 0.5

_NEIGHBOURS = np.array([(-1, 0), (0, -1), (0, 1), (1, 0), (-1, -1), (-1, 1), (1, -1), (1, 1)], dtype=np.int64)


@numba.njit(cache=True)
def _walk(r, c, qr, qc, skeleton, node_label, visited, neighbours, rows, cols, n_px):  # pragma: no cover
    """Follow one branch from node pixel (r, c) through its first pixel (qr, qc).

    Caller guarantees: as ``_trace_branches``; (qr, qc) is an unvisited non-node
    skeleton pixel next to (r, c) and the buffers have room. Writes the path into
    ``rows/cols`` from ``n_px`` on; returns the new ``n_px`` and the end node id (0 if
    the walk ran out on a cycle without meeting a node).
    """
    rows[n_px] = r
    cols[n_px] = c
    n_px += 1
    cur_r = qr
    cur_c = qc
    steps = 1
    while True:
        visited[cur_r, cur_c] = 1
        rows[n_px] = cur_r
        cols[n_px] = cur_c
        n_px += 1
        next_r = -1
        next_c = -1
        for j in range(8):
            nr = cur_r + neighbours[j, 0]
            nc = cur_c + neighbours[j, 1]
            if skeleton[nr, nc] and node_label[nr, nc] == 0 and not visited[nr, nc]:
                next_r = nr
                next_c = nc
                break
        if next_r >= 0:
            cur_r = next_r
            cur_c = next_c
            steps += 1
            continue
        for j in range(8):
            nr = cur_r + neighbours[j, 0]
            nc = cur_c + neighbours[j, 1]
            if skeleton[nr, nc] and node_label[nr, nc] > 0 and not (steps == 1 and nr == r and nc == c):
                rows[n_px] = nr
                cols[n_px] = nc
                return n_px + 1, node_label[nr, nc]
        if steps > 1:
            for j in range(8):
                if cur_r + neighbours[j, 0] == r and cur_c + neighbours[j, 1] == c:
                    # Only the start pixel is left: a loop back to it.
                    rows[n_px] = r
                    cols[n_px] = c
                    return n_px + 1, node_label[r, c]
        return n_px, 0


@numba.njit(cache=True)
def _trace_branches(skeleton, node_label, neighbours):  # pragma: no cover - compiled
    """Walk every branch of a skeleton from node to node.

    Caller guarantees: ``skeleton`` is a 2-D uint8 array, zero on its one-pixel
    border; ``node_label`` is an int32 array of the same shape, 0 on pixels with
    exactly two skeleton neighbours and a positive node id elsewhere on the skeleton
    (the pixels of one junction cluster share an id; ids below ``2 ** 30``), and is
    modified: each cycle without a node gets a new node at its first pixel.
    ``neighbours`` lists the 8 offsets, 4-neighbours first. Returns
    ``(indptr, rows, cols, start_node, end_node)``: branch ``k`` is the pixel path
    ``rows/cols[indptr[k]:indptr[k + 1]]`` from a node pixel to a node pixel.
    """
    h, w = skeleton.shape
    n_skel = 0
    n_node_px = 0
    next_id = 1
    for r in range(h):
        for c in range(w):
            if skeleton[r, c]:
                n_skel += 1
                if node_label[r, c] > 0:
                    n_node_px += 1
                    next_id = max(next_id, node_label[r, c] + 1)
    capacity = 2 * n_skel + 16 * n_node_px + 16
    n_max = 8 * n_node_px + n_skel + 1
    rows = np.empty(capacity, dtype=np.int32)
    cols = np.empty(capacity, dtype=np.int32)
    indptr = np.zeros(n_max + 1, dtype=np.int64)
    start_node = np.empty(n_max, dtype=np.int32)
    end_node = np.empty(n_max, dtype=np.int32)
    visited = np.zeros((h, w), dtype=np.uint8)
    n_branches = 0
    n_px = 0
    for sweep in range(2):
        for r in range(h):
            for c in range(w):
                if not skeleton[r, c]:
                    continue
                if sweep == 1:
                    # Second sweep: what is left unvisited lies on cycles without nodes.
                    if node_label[r, c] > 0 or visited[r, c]:
                        continue
                    node_label[r, c] = next_id
                    next_id += 1
                a = node_label[r, c]
                if a == 0:
                    continue
                for k in range(8):
                    qr = r + neighbours[k, 0]
                    qc = c + neighbours[k, 1]
                    if not skeleton[qr, qc]:
                        continue
                    b = node_label[qr, qc]
                    if b > 0:
                        # Two nodes side by side: one branch of two pixels, recorded once.
                        if b == a or (r * w + c) > (qr * w + qc):
                            continue
                        rows[n_px] = r
                        cols[n_px] = c
                        rows[n_px + 1] = qr
                        cols[n_px + 1] = qc
                        n_px += 2
                        end = b
                    elif visited[qr, qc]:
                        continue
                    else:
                        n_px, end = _walk(r, c, qr, qc, skeleton, node_label, visited, neighbours, rows, cols, n_px)
                    start_node[n_branches] = a
                    end_node[n_branches] = end
                    n_branches += 1
                    indptr[n_branches] = n_px
    return indptr[: n_branches + 1], rows[:n_px], cols[:n_px], start_node[:n_branches], end_node[:n_branches]


#: Pixel paths are smoothed over this many pixels before their length is taken.
_LENGTH_SMOOTHING_PX = 5


@numba.njit(cache=True)
def _smoothed_length(path, window):  # pragma: no cover - compiled
    """Length of the polyline through the running means of ``window`` path pixels.

    Caller guarantees: ``path`` is an (N, 2) integer array, N >= 1; ``window`` >= 1.
    The first and last pixels are kept as they are.
    """
    n = path.shape[0]
    if n < 2:
        return 0.0
    if n <= window:
        total = 0.0
        for i in range(1, n):
            total += np.hypot(path[i, 0] - path[i - 1, 0], path[i, 1] - path[i - 1, 1])
        return total
    sum_r = 0.0
    sum_c = 0.0
    for i in range(window):
        sum_r += path[i, 0]
        sum_c += path[i, 1]
    prev_r = float(path[0, 0])
    prev_c = float(path[0, 1])
    total = 0.0
    for i in range(window, n + 1):
        mr = sum_r / window
        mc = sum_c / window
        total += np.hypot(mr - prev_r, mc - prev_c)
        prev_r = mr
        prev_c = mc
        if i < n:
            sum_r += path[i, 0] - path[i - window, 0]
            sum_c += path[i, 1] - path[i - window, 1]
    total += np.hypot(path[n - 1, 0] - prev_r, path[n - 1, 1] - prev_c)
    return total


def _path_length_px(path: np.ndarray) -> float:
    """Arc length of a pixel path, free of most of the staircase excess.

    Summing unit and diagonal steps overestimates a straight line by up to 8% (at
    22.5 degrees); a moving average of the coordinates over ``_LENGTH_SMOOTHING_PX``
    pixels (ends kept) turns the staircase back into a line before measuring.

    References
    ----------
    .. [1] Z. Kulpa, "Area and perimeter measurement of blobs in discrete binary
       pictures", Comput. Graph. Image Process. 6, 434 (1977).
    """
    return float(_smoothed_length(path, _LENGTH_SMOOTHING_PX))


@dataclass
class _Branch:
    a: int
    b: int
    path: np.ndarray  # (N, 2) int pixel path from node a to node b
    length_px: float = field(init=False)

    def __post_init__(self) -> None:
        self.length_px = _path_length_px(self.path)


def _node_width(width: np.ndarray, px: np.ndarray) -> float:
    if len(px) == 1:  # a tip: most nodes, where the fancy-indexing path costs more than the value
        return float(width[px[0, 0], px[0, 1]])
    return float(width[px[:, 0], px[:, 1]].max())


def _node_center(px: np.ndarray) -> np.ndarray:
    # One pixel: its own coordinates, as the mean of one row would give them exactly.
    return px[0].astype(np.float64) if len(px) == 1 else px.mean(axis=0)


class _Graph:
    """Mutable node/branch graph used while cleaning the skeleton (private)."""

    def __init__(self, branches: list[_Branch], node_pixels: dict[int, np.ndarray], width: np.ndarray):
        self.branches = dict(enumerate(branches))
        self.node_pixels = node_pixels
        # Width at a node: the widest point of its own pixels, fixed at creation (merged
        # nodes keep the larger), so merging cannot make a junction swallow its neighbours.
        self.node_width = {n: _node_width(width, px) for n, px in node_pixels.items()}
        self.node_center = {n: _node_center(px) for n, px in node_pixels.items()}
        self.incident: dict[int, list[int]] = {n: [] for n in node_pixels}
        for k, br in self.branches.items():
            self.incident[br.a].append(k)
            self.incident[br.b].append(k)
        self._next_id = len(branches)

    def add_branch(self, branch: _Branch) -> None:
        k = self._next_id
        self._next_id += 1
        self.branches[k] = branch
        self.incident[branch.a].append(k)
        self.incident[branch.b].append(k)

    def degree(self, node: int) -> int:
        return len(self.incident[node])

    def node_width_px(self, node: int) -> float:
        return self.node_width[node]

    def remove_branch(self, k: int) -> None:
        br = self.branches.pop(k)
        self.incident[br.a].remove(k)
        self.incident[br.b].remove(k)

    def remove_node(self, node: int) -> None:
        del self.incident[node]
        del self.node_pixels[node]
        del self.node_width[node]
        del self.node_center[node]

    def prune_spurs(self, prune_widths: float) -> int:
        """Drop terminal branches shorter than ``prune_widths`` widths of their junction.

        At most ``degree - 2`` spurs go from one junction per pass (the shortest), so a
        short stubby specimen keeps its two longest arms instead of vanishing.
        """
        spurs_at: dict[int, list[tuple[float, int, int]]] = {}
        for k, br in self.branches.items():
            for tip, base in ((br.a, br.b), (br.b, br.a)):
                if self.degree(tip) == 1 and self.degree(base) >= 3:
                    if br.length_px < prune_widths * self.node_width_px(base):
                        spurs_at.setdefault(base, []).append((br.length_px, k, tip))
                    break
        pruned = 0
        for base, spurs in spurs_at.items():
            for _, k, tip in sorted(spurs)[: self.degree(base) - 2]:
                self.remove_branch(k)
                self.remove_node(tip)
                pruned += 1
        return pruned

    def merge_close_junctions(self, merge_widths: float) -> int:
        """Fuse each junction into a wider neighbour whose centre is within reach.

        A junction is fused into an adjacent, wider junction when its centre lies within
        ``merge_widths`` widths of the wider one's (with the default half width: inside
        its largest inscribed disc), i.e. both are one thick junction drawn twice by
        thinning. The wider junction keeps its place and width, so fusions cannot chain
        across a mesh of small pores.
        """
        merged = 0
        candidates = []
        for k, br in self.branches.items():
            if br.a == br.b:
                if br.length_px < 2 * merge_widths * self.node_width_px(br.a):
                    candidates.append((np.inf, k))  # a pixel loop inside one junction
                continue
            if self.degree(br.a) >= 3 and self.degree(br.b) >= 3:
                candidates.append((max(self.node_width_px(br.a), self.node_width_px(br.b)), k))
        for _, k in sorted(candidates, reverse=True):
            br = self.branches.get(k)
            if br is None:
                continue
            if br.a == br.b:
                self.remove_branch(k)
                merged += 1
                continue
            keep, gone = (br.a, br.b) if self.node_width_px(br.a) >= self.node_width_px(br.b) else (br.b, br.a)
            gap = float(np.hypot(*(self.node_center[keep] - self.node_center[gone])))
            if gap >= merge_widths * self.node_width_px(keep):
                continue
            self.remove_branch(k)
            for j in self.incident[gone]:
                other = self.branches[j]
                if other.a == gone:
                    other.a = keep
                if other.b == gone:
                    other.b = keep
                self.incident[keep].append(j)
            self.remove_node(gone)
            merged += 1
        return merged

    def merge_chains(self) -> int:
        """Join the two branches at every node of degree 2 into one branch."""
        merged = 0
        for node in list(self.incident):
            ks = self.incident.get(node)
            if ks is None or len(ks) != 2 or ks[0] == ks[1]:
                continue
            first, second = self.branches[ks[0]], self.branches[ks[1]]
            p1 = first.path if first.b == node else first.path[::-1]
            p2 = second.path if second.a == node else second.path[::-1]
            start = first.a if first.b == node else first.b
            end = second.b if second.a == node else second.a
            k1, k2 = ks
            self.remove_branch(k1)
            self.remove_branch(k2)
            self.remove_node(node)
            self.add_branch(_Branch(start, end, np.vstack([p1, p2])))
            merged += 1
        return merged


def _summary(values: np.ndarray, scale: float | None = None) -> dict:
    """Plain summary of a distribution (optionally multiplied by ``scale``)."""
    v = np.asarray(values, dtype=float)
    if scale is not None:
        v = v * scale
    if v.size == 0:
        return {"n": 0, "mean": None, "median": None, "std": None, "p10": None, "p90": None}
    return {
        "n": int(v.size),
        "mean": float(v.mean()),
        "median": float(np.median(v)),
        "std": float(v.std()),
        "p10": float(np.percentile(v, 10)),
        "p90": float(np.percentile(v, 90)),
    }


@dataclass(frozen=True)
class HortonStrahler:
    """Horton-Strahler ordering of the skeleton tree.

    Attributes
    ----------
    max_order : int
    stream_counts : tuple of int
        Number of streams of order 1, 2, ... ``max_order``.
    mean_stream_length_px : tuple of float
        Mean length of the streams of each order.
    bifurcation_ratio, length_ratio : float or None
        ``R_B = N_w / N_{w+1}`` and ``R_L = Lbar_{w+1} / Lbar_w`` from the slopes of
        ``log N_w`` and ``log Lbar_w`` against ``w`` (Horton's laws); None with fewer
        than two orders.
    """

    max_order: int
    stream_counts: tuple[int, ...]
    mean_stream_length_px: tuple[float, ...]
    bifurcation_ratio: float | None
    length_ratio: float | None

    def to_dict(self, pixel_size_mm: float | None = None) -> dict:
        out = {
            "max_order": self.max_order,
            "stream_counts": list(self.stream_counts),
            "mean_stream_length_px": list(self.mean_stream_length_px),
            "bifurcation_ratio": self.bifurcation_ratio,
            "length_ratio": self.length_ratio,
        }
        if pixel_size_mm is not None:
            out["mean_stream_length_mm"] = [v * pixel_size_mm for v in self.mean_stream_length_px]
        return out


@dataclass(frozen=True)
class SkeletonGraph:
    """The cleaned skeleton graph of a specimen.

    Counts are of graph nodes: a tip has one branch, a junction three or more. Arrays
    are in the coordinates of the mask given to ``skeleton_graph``.
    """

    tips: int
    junctions: int
    branches: int
    bare_tips: int
    bare_junctions: int
    branch_lengths_px: np.ndarray
    tortuosity: np.ndarray
    branching_angles_deg: np.ndarray
    widths_px: np.ndarray
    strahler: HortonStrahler
    skeleton_mask: np.ndarray = field(repr=False)
    tips_rc: np.ndarray = field(repr=False)
    junctions_rc: np.ndarray = field(repr=False)

    @property
    def total_length_px(self) -> float:
        return float(self.branch_lengths_px.sum())

    def to_dict(self, pixel_size_mm: float | None = None) -> dict:
        out = {
            "tips": self.tips,
            "junctions": self.junctions,
            "branches": self.branches,
            "bare_skeleton": {"tips": self.bare_tips, "junctions": self.bare_junctions},
            "total_length_px": self.total_length_px,
            "branch_length_px": _summary(self.branch_lengths_px),
            "tortuosity": _summary(self.tortuosity),
            "branching_angle_deg": _summary(self.branching_angles_deg),
            "width_px": _summary(self.widths_px),
            "strahler": self.strahler.to_dict(pixel_size_mm),
        }
        if pixel_size_mm is not None:
            out["total_length_mm"] = self.total_length_px * pixel_size_mm
            out["branch_length_mm"] = _summary(self.branch_lengths_px, pixel_size_mm)
            out["width_mm"] = _summary(self.widths_px, pixel_size_mm)
        return out


def _bare_graph(skeleton: np.ndarray, width: np.ndarray) -> tuple[_Graph, int, int]:
    """Nodes and branches of a skeleton as drawn; also its bare tip and junction counts."""
    kernel = np.ones((3, 3), dtype=np.uint8)
    kernel[1, 1] = 0
    degree = ndimage.convolve(skeleton.view(np.uint8), kernel, mode="constant") * skeleton
    junction_px = degree >= 3
    junction_label, n_junctions = ndimage.label(junction_px, structure=np.ones((3, 3)))
    node_label = junction_label.astype(np.int32)
    tip_r, tip_c = np.nonzero(skeleton & (degree == 1))
    node_label[tip_r, tip_c] = n_junctions + 1 + np.arange(tip_r.size, dtype=np.int32)
    indptr, rows, cols, start, end = _trace_branches(skeleton.view(np.uint8), node_label, _NEIGHBOURS)
    node_pixels: dict[int, np.ndarray] = {}
    objects = ndimage.find_objects(junction_label)
    for i, box in enumerate(objects, start=1):
        rr, cc = np.nonzero(junction_label[box] == i)
        node_pixels[i] = np.column_stack([rr + box[0].start, cc + box[1].start])
    for i, (r, c) in enumerate(zip(tip_r, tip_c), start=n_junctions + 1):
        node_pixels[i] = np.array([[r, c]])
    path_rc = np.column_stack([rows, cols]).astype(np.int64)
    branches = [
        _Branch(int(start[k]), int(end[k]), path_rc[indptr[k] : indptr[k + 1]])
        for k in range(start.size)
        if end[k] > 0
    ]
    for br in branches:  # nodes the tracer placed on cycles
        node_pixels.setdefault(br.a, br.path[:1])
    return _Graph(branches, node_pixels, width), int(tip_r.size), int(n_junctions)


def _direction(path: np.ndarray, from_px: float, to_px: float) -> np.ndarray:
    """Unit vector along ``path`` between two arc lengths from its start (clipped)."""
    steps = np.diff(path, axis=0).astype(float)
    arc = np.concatenate([[0.0], np.cumsum(np.hypot(steps[:, 0], steps[:, 1]))])
    to_px = min(to_px, arc[-1])
    from_px = min(from_px, 0.5 * to_px)
    i0 = int(np.searchsorted(arc, from_px))
    i1 = int(np.searchsorted(arc, to_px))
    v = (path[min(i1, len(path) - 1)] - path[min(i0, len(path) - 1)]).astype(float)
    norm = np.hypot(v[0], v[1])
    return v / norm if norm > 0 else v


def _horton_strahler(
    graph: _Graph, node_rc: dict[int, np.ndarray], root_rc: np.ndarray
) -> tuple[HortonStrahler, np.ndarray]:
    """Strahler orders on a spanning tree of each component, plus bifurcation angles.

    Strategy: a breadth-first spanning tree of each connected component, rooted at its
    node nearest ``root_rc`` (cycles are broken where the search meets them); orders
    from the leaves up (a node takes its children's largest order, plus one when two or
    more children share it); streams are maximal runs of one order, followed top-down.
    """
    shortest: dict[tuple[int, int], int] = {}
    for k, br in graph.branches.items():
        if br.a == br.b:
            continue
        pair = (min(br.a, br.b), max(br.a, br.b))
        if pair not in shortest or br.length_px < graph.branches[shortest[pair]].length_px:
            shortest[pair] = k
    # Parallel branches and loops only close cycles: one edge per pair of nodes (the shortest).
    ids = list(graph.incident)
    index = {node: i for i, node in enumerate(ids)}
    pairs = np.array([(index[a], index[b]) for a, b in shortest], dtype=np.int64).reshape(-1, 2)
    adjacency = sparse.coo_matrix((np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])),
                                  shape=(len(ids), len(ids))).tocsr()
    n_components, component_of = csgraph.connected_components(adjacency, directed=False)
    coords = np.array([node_rc[n] for n in ids]).reshape(-1, 2)
    stream_lengths: dict[int, list[float]] = {}
    angles: list[float] = []
    for component in range(n_components):
        members = np.flatnonzero(component_of == component)
        if members.size < 2:
            continue
        root = int(members[np.argmin(((coords[members] - root_rc) ** 2).sum(axis=1))])
        # Breadth-first order is top-down; each node's predecessor is its parent in the tree.
        visited, parent = csgraph.breadth_first_order(adjacency, root, directed=False, return_predecessors=True)
        top_down = [ids[i] for i in visited]
        children: dict[int, list[int]] = {node: [] for node in top_down}
        for i in visited[1:]:
            children[ids[parent[i]]].append(ids[i])
        order: dict[int, int] = {}
        for node in reversed(top_down):
            child_orders = [order[c] for c in children[node]]
            if not child_orders:
                order[node] = 1
            else:
                top = max(child_orders)
                order[node] = top + 1 if child_orders.count(top) >= 2 else top
        stream_of: dict[int, int] = {}  # node -> index of the stream ending at it (its parent edge)
        streams: list[list[float]] = []
        for node in top_down:
            for child in children[node]:
                br = graph.branches[shortest[(min(node, child), max(node, child))]]
                parent_stream = stream_of.get(node)
                if parent_stream is not None and streams[parent_stream][0] == order[child]:
                    streams[parent_stream][1] += br.length_px
                    stream_of[child] = parent_stream
                else:
                    streams.append([order[child], br.length_px])
                    stream_of[child] = len(streams) - 1
            if len(children[node]) == 2:
                width = graph.node_width_px(node)
                vectors = []
                for child in children[node]:
                    br = graph.branches[shortest[(min(node, child), max(node, child))]]
                    path = br.path if br.a == node else br.path[::-1]
                    vectors.append(_direction(path, width, 3 * width))
                cosine = float(np.clip(vectors[0] @ vectors[1], -1.0, 1.0))
                angles.append(float(np.degrees(np.arccos(cosine))))
        for w, length in streams:
            stream_lengths.setdefault(int(w), []).append(length)
    if not stream_lengths:
        return HortonStrahler(0, (), (), None, None), np.array(angles)
    max_order = max(stream_lengths)
    counts = [len(stream_lengths.get(w, [])) for w in range(1, max_order + 1)]
    means = [float(np.mean(stream_lengths[w])) if w in stream_lengths else 0.0 for w in range(1, max_order + 1)]
    bifurcation = length_ratio = None
    if max_order >= 2:
        w = np.arange(1, max_order + 1, dtype=float)
        ok = np.array(counts) > 0
        bifurcation = float(np.exp(-np.polyfit(w[ok], np.log(np.array(counts)[ok]), 1)[0]))
        length_ratio = float(np.exp(np.polyfit(w[ok], np.log(np.array(means)[ok]), 1)[0]))
    strahler = HortonStrahler(max_order, tuple(counts), tuple(means), bifurcation, length_ratio)
    return strahler, np.array(angles)


def skeleton_graph(
    mask: np.ndarray,
    *,
    center_rc: tuple[float, float] | None = None,
    edt: np.ndarray | None = None,
    skeleton_mask: np.ndarray | None = None,
    prune_widths: float = PRUNE_WIDTHS,
    merge_widths: float = MERGE_WIDTHS,
) -> SkeletonGraph:
    """Skeletonise a specimen and reduce the skeleton to a clean branch graph.

    Steps: skeletonise (Zhang-Suen thinning via scikit-image); nodes are the tips
    (one skeleton neighbour) and the 8-connected clusters of junction pixels (three or
    more); a compiled walk traces every branch between nodes. Then, until nothing
    changes: drop terminal branches shorter than ``prune_widths`` local widths at their
    junction (spurs from corners and bumps of the outline), fuse junctions joined by a
    branch shorter than ``merge_widths`` widths, and join the two branches at each node
    left with two. The local width is ``2 * EDT - 1`` (see ``local_width_px``).

    Parameters
    ----------
    mask : (H, W) array
    center_rc : (row, col), optional
        Root of the Horton-Strahler ordering (the graph node nearest it). Default: the
        centroid of the mask.
    edt, skeleton_mask : ndarray, optional
        Distance transform and skeleton of ``mask`` if the caller already has them.
    prune_widths, merge_widths : float

    Returns
    -------
    SkeletonGraph
        Counts, lengths (arc length along the skeleton, diagonal steps sqrt 2),
        tortuosity (arc length / end-to-end distance, loops excluded), bifurcation
        angles (between the two child branches, each taken between one and three
        widths from the junction), widths along the cleaned skeleton, and the
        Horton-Strahler ordering.

    References
    ----------
    .. [1] T. Y. Zhang, C. Y. Suen, "A fast parallel algorithm for thinning digital
       patterns", Commun. ACM 27, 236 (1984).
    .. [2] A. N. Strahler, "Quantitative analysis of watershed geomorphology", Trans.
       Am. Geophys. Union 38, 913 (1957); R. E. Horton, "Erosional development of
       streams and their drainage basins", Geol. Soc. Am. Bull. 56, 275 (1945).
    .. [3] J. Nunez-Iglesias et al., "A new Python library to analyse skeleton images
       confirms malaria parasite remodelling of the red blood cell membrane skeleton",
       PeerJ 6, e4312 (2018) (skeleton graphs from pixel neighbourhoods).
    """
    mask = as_specimen_mask(mask)
    if prune_widths < 0 or merge_widths < 0:
        raise ValueError("prune_widths and merge_widths must be non-negative")
    crop, (r0, c0) = crop_to_specimen(mask, pad_px=1)
    h, w = crop.shape
    if edt is None:
        edt_crop = ndimage.distance_transform_edt(crop)
    else:
        edt_crop = window_of(np.asarray(edt, dtype=float), (r0, c0), (h, w))
    if skeleton_mask is None:
        skel = skeletonize(crop)
    else:
        skel = window_of(np.asarray(skeleton_mask, dtype=bool), (r0, c0), (h, w)) & crop
    skel[0, :] = skel[-1, :] = skel[:, 0] = skel[:, -1] = False
    width = local_width_px(edt_crop)
    graph, bare_tips, bare_junctions = _bare_graph(skel, width)
    while True:
        changed = graph.prune_spurs(prune_widths)
        changed += graph.merge_close_junctions(merge_widths)
        changed += graph.merge_chains()
        if not changed:
            break

    offset = np.array([r0, c0])
    node_rc = graph.node_center
    degrees = {n: graph.degree(n) for n in graph.incident}
    tips_rc = np.array([graph.node_pixels[n][0] for n, d in degrees.items() if d == 1], dtype=np.int64).reshape(-1, 2)
    junctions_rc = np.array(
        [np.round(node_rc[n]) for n, d in degrees.items() if d >= 3], dtype=np.int64
    ).reshape(-1, 2)
    paths = [br.path for br in graph.branches.values()]
    lengths = np.array([br.length_px for br in graph.branches.values()])
    chords = np.array([np.hypot(*(p[-1] - p[0])) for p in paths])
    tortuosity = lengths[chords > 0] / chords[chords > 0]
    cleaned = np.zeros_like(skel)
    if paths:
        all_px = np.vstack(paths)
        cleaned[all_px[:, 0], all_px[:, 1]] = True
    root = (np.asarray(center_rc, dtype=float) - offset) if center_rc is not None else np.argwhere(crop).mean(axis=0)
    strahler, angles = _horton_strahler(graph, node_rc, root)

    return SkeletonGraph(
        tips=int(tips_rc.shape[0]),
        junctions=int(junctions_rc.shape[0]),
        branches=len(paths),
        bare_tips=bare_tips,
        bare_junctions=bare_junctions,
        branch_lengths_px=lengths,
        tortuosity=tortuosity,
        branching_angles_deg=angles,
        widths_px=width[cleaned],
        strahler=strahler,
        skeleton_mask=paste_crop(cleaned, (r0, c0), mask.shape),
        tips_rc=tips_rc + offset,
        junctions_rc=junctions_rc + offset,
    )

