"""The feature vector the matcher compares, measured on a normalised (lattice) mask.

Specimens and references go through the same two steps: :func:`service.match.normalise`
(one branch width = one site), then :func:`lattice_features`. References are first drawn as
photographs would show them (:func:`reference_photo_mask`), so the normalisation they go
through is the one a specimen's segmentation goes through.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage
from skimage.morphology import skeletonize

from service.distance import distance_to_background
from service.errors import SpecimenError
from service.features.dimension import box_counting, sandbox
from service.features.lacunarity import lacunarity
from service.match.normalise import normalise
from service.match.nuisance import cluster_seed, draw_cluster, drawing_styles, style_indices

#: Bump when a feature, its definition or the reference rendering changes: cached
#: reference vectors of another version are recomputed.
FEATURE_SCHEMA = 4

#: (name, what it measures). The order is the order of the vector.
FEATURES: tuple[tuple[str, str], ...] = (
    ("box_dimension", "box-counting dimension on the lattice (box sides 2 sites to R/2)"),
    ("sandbox_dimension", "averaged sandbox dimension (mass about 200 occupied centres)"),
    ("log_lacunarity_r8", "log gliding-box lacunarity at box side R/8 (R = bounding radius)"),
    ("log_lacunarity_r4", "log gliding-box lacunarity at box side R/4"),
    ("log_lacunarity_r2", "log gliding-box lacunarity at box side R/2"),
    ("log_fill_fraction", "log of occupied sites over the area of the bounding circle"),
    ("tips_per_site", "skeleton end points per occupied site"),
    ("junctions_per_site", "skeleton junctions per occupied site"),
    ("aspect_ratio", "sqrt of the smaller over the larger eigenvalue of the gyration tensor"),
    ("log_roughness", "log of the outline length of the hole-filled specimen over that of a disc of its area"),
    ("hole_fraction", "empty fraction of the hole-filled specimen (enclosed pores)"),
)
FEATURE_NAMES: tuple[str, ...] = tuple(name for name, _ in FEATURES)
#: Specimens smaller than this on the lattice carry too little structure to compare.
MIN_SITES = 30
_LACUNARITY_FRACTIONS = (1 / 8, 1 / 4, 1 / 2)


@dataclass(frozen=True, eq=False)
class LatticeVector:
    """The compared features of one specimen and its size on the lattice.

    Attributes
    ----------
    values : ndarray of float, shape (len(FEATURE_NAMES),)
    n_sites : int
        Occupied lattice sites ``N_eq`` (the size the references are interpolated to).
    scale_px : float
        Pixels per lattice site of the normalisation (1 for a lattice cluster).
    connected_fraction : float
        Share of the sites in the largest piece (pieces less than a site apart joined).
        Every library cluster is one aggregate grown from one seed, so this is not compared
        as a Gaussian feature (its reference spread is nil) but checked against the
        references' own range.
    """

    values: np.ndarray
    n_sites: int
    scale_px: float
    connected_fraction: float

    def to_dict(self) -> dict:
        return {
            "features": {name: float(v) for name, v in zip(FEATURE_NAMES, self.values)},
            "n_sites": int(self.n_sites),
            "scale_px": float(self.scale_px),
            "connected_fraction": float(self.connected_fraction),
        }


def _lacunarity_at(window: np.ndarray, side: float) -> float:
    """Lacunarity at a fractional box side, interpolated in log-log between integer sides."""
    lo, hi = max(1, int(np.floor(side))), max(1, int(np.ceil(side)))
    curve = lacunarity(window, [lo, hi])
    if curve.scales_px.size == 1:
        return float(curve.values[0])
    t = (np.log(side) - np.log(lo)) / (np.log(hi) - np.log(lo))
    return float(np.exp((1 - t) * np.log(curve.values[0]) + t * np.log(curve.values[1])))


def _skeleton_nodes(lattice: np.ndarray) -> tuple[int, int]:
    """Tips (skeleton pixels with one 8-neighbour) and junctions (8-connected groups of
    skeleton pixels with three or more) of the lattice's skeleton."""
    skeleton = skeletonize(lattice)
    neighbours = ndimage.convolve(skeleton.astype(np.uint8), np.ones((3, 3), np.uint8), mode="constant") - 1
    tips = int(np.count_nonzero(skeleton & (neighbours == 1)))
    _, junctions = ndimage.label(skeleton & (neighbours >= 3), structure=np.ones((3, 3)))
    return tips, int(junctions)


def lattice_features(lattice: np.ndarray) -> LatticeVector:
    """The compared features of a specimen already on the lattice (see ``FEATURES``).

    Parameters
    ----------
    lattice : (h, w) bool ndarray
        A normalised specimen (``normalise(mask).lattice``) or a simulated cluster.

    Returns
    -------
    LatticeVector

    Raises
    ------
    SpecimenError
        If fewer than ``MIN_SITES`` sites are occupied.

    Notes
    -----
    Every feature is a ratio or a dimension, so none depends on the unit of length; all
    still drift with cluster size, which is why references are interpolated to the
    specimen's ``N_eq``. Lacunarity glides over the square of side ``2R`` about the centroid,
    so it reads the specimen against its own bounding circle, not the photograph's frame.

    References
    ----------
    .. [1] C. Allain, M. Cloitre, Phys. Rev. A 44, 3552 (1991) (lacunarity).
    .. [2] T. Tel, A. Fulop, T. Vicsek, Physica A 159, 155 (1989) (averaged sandbox).
    .. [3] P. Meakin, *Fractals, Scaling and Growth Far from Equilibrium*, Cambridge (1998):
       gyration tensor of aggregates, tips and side branches (from memory).
    """
    lattice = np.asarray(lattice) != 0
    points = np.argwhere(lattice)
    n = points.shape[0]
    if n < MIN_SITES:
        raise SpecimenError(
            f"the specimen covers {n} branch widths squared; at least {MIN_SITES} are needed to compare it"
        )
    center = points.mean(axis=0)
    offsets = points - center
    radius = float(np.sqrt((offsets**2).sum(axis=1).max())) + 0.5

    # Explicit ranges (2 sites to R/2), so the fit is the same for every cluster size.
    box = box_counting(lattice, fit_range_px=(2.0, max(8.0, 0.5 * radius))).value
    sandbox_d = sandbox(lattice, n_centers=200, seed=0, width_px=1.0, center_rc=tuple(center)).value

    half = int(np.ceil(radius)) + 1
    window = np.zeros((2 * half + 1, 2 * half + 1), dtype=bool)
    shift = np.rint(center).astype(int) - half
    window[points[:, 0] - shift[0], points[:, 1] - shift[1]] = True
    log_lac = [np.log(_lacunarity_at(window, max(1.0, f * radius))) for f in _LACUNARITY_FRACTIONS]

    tips, junctions = _skeleton_nodes(lattice)
    eigen = np.linalg.eigvalsh(np.cov(offsets.T, bias=True))
    aspect = float(np.sqrt(max(eigen[0], 0.0) / eigen[1])) if eigen[1] > 0 else 1.0

    filled = np.pad(ndimage.binary_fill_holes(lattice), 1)
    outline = int(np.count_nonzero(np.diff(filled, axis=0)) + np.count_nonzero(np.diff(filled, axis=1)))
    filled_area = int(filled.sum())
    roughness = outline / (2.0 * np.sqrt(np.pi * filled_area))

    values = np.array(
        [
            box,
            sandbox_d,
            *log_lac,
            np.log(n / (np.pi * radius**2)),
            tips / n,
            junctions / n,
            aspect,
            np.log(roughness),
            1.0 - n / filled_area,
        ],
        dtype=np.float64,
    )
    # Pieces less than one site apart count as one: a drawing or a photograph may part two
    # sites that touch only at a corner.
    labels, n_pieces = ndimage.label(ndimage.binary_dilation(lattice, np.ones((3, 3))), structure=np.ones((3, 3)))
    connected = float(np.bincount(labels[lattice])[1:].max() / n) if n_pieces > 1 else 1.0
    return LatticeVector(values=values, n_sites=n, scale_px=1.0, connected_fraction=connected)


def specimen_vector(mask: np.ndarray) -> tuple[LatticeVector, dict]:
    """Normalise a specimen mask and measure it; also returns the normalisation's record."""
    normalised = normalise(mask)
    vector = lattice_features(normalised.lattice)
    return (
        LatticeVector(vector.values, vector.n_sites, normalised.scale_px, vector.connected_fraction),
        normalised.to_dict(),
    )


def reference_photo_mask(lattice: np.ndarray, *, seed: int) -> np.ndarray:
    """A lattice cluster drawn as a segmented photograph of it would show it.

    Each site becomes a block of ``s`` pixels (``s`` uniform in 3-6), branches are widened
    to ``s`` times 1-1.4, a centre electrode disc (radius 1-8 sites, log-uniform; a
    photograph at 3 px per site with the electrode 1.5% of its side shows one of 8 sites)
    is added at the seed in 60% of the drawings, and the outline is softened by a Gaussian
    blur (sigma 0.5-1.5 px) thresholded at one half, as optics and a threshold soften it.
    The same recipe as :func:`service.imaging.render_specimen` draws its truth mask, with
    its settings varied.

    Parameters
    ----------
    lattice : (h, w) array
        Non-zero sites are occupied; the seed is at ``(h // 2, w // 2)``.
    seed : int
        Seed of the drawing's random settings.
    """
    occupied = np.asarray(lattice) != 0
    rng = np.random.default_rng(seed)
    scale = rng.uniform(3.0, 6.0)
    thickness = scale * rng.uniform(1.0, 1.4)
    electrode_sites = float(np.exp(rng.uniform(0.0, np.log(8.0)))) if rng.random() < 0.6 else 0.0
    blur = rng.uniform(0.5, 1.5)
    h, w = occupied.shape
    pad = int(np.ceil(thickness + 3 * blur)) + 2
    size_h, size_w = int(np.ceil(h * scale)) + 2 * pad, int(np.ceil(w * scale)) + 2 * pad
    row_site = np.floor((np.arange(size_h) - pad) / scale).astype(np.intp)
    col_site = np.floor((np.arange(size_w) - pad) / scale).astype(np.intp)
    row_ok = (row_site >= 0) & (row_site < h)
    col_ok = (col_site >= 0) & (col_site < w)
    drawn = np.zeros((size_h, size_w), dtype=bool)
    drawn[np.ix_(row_ok, col_ok)] = occupied[np.ix_(row_site[row_ok], col_site[col_ok])]
    grow_px = 0.5 * (thickness - scale)
    if grow_px >= 0.5:
        drawn = distance_to_background(~drawn) <= grow_px
    if electrode_sites > 0:
        cy, cx = pad + (h // 2 + 0.5) * scale, pad + (w // 2 + 0.5) * scale
        yy, xx = np.ogrid[:size_h, :size_w]
        drawn |= (yy - cy) ** 2 + (xx - cx) ** 2 <= (electrode_sites * scale) ** 2
    return ndimage.gaussian_filter(drawn.astype(np.float32), blur) >= 0.5


def reference_vectors(
    arrival_order: np.ndarray, styles: tuple[int, ...] | None = None
) -> list[tuple[int, LatticeVector]]:
    """Features of one library cluster through the specimens' path, once per drawing style
    (the feature-cache task).

    The cluster is drawn in its styles among those of :func:`service.match.nuisance.drawing_styles`
    (branch thickness 0.7 to 3 sites, blur, threshold level, JPEG), and each drawing is
    normalised and measured exactly as a specimen's mask is. The styles' seed is the CRC-32
    of the cluster's arrival-order lattice mixed with ``FEATURE_SCHEMA``, so the same
    cluster always gets the same drawings.

    Parameters
    ----------
    arrival_order : (h, w) int array
    styles : tuple of int, optional
        Indices of the styles to draw (default: the cluster's own,
        :func:`service.match.nuisance.style_indices`).

    Returns
    -------
    list of (int, LatticeVector)
        Each drawing's style index and vector.
    """
    lattice = np.ascontiguousarray(arrival_order, dtype=np.int32)
    seed = cluster_seed(lattice, FEATURE_SCHEMA)
    all_styles = drawing_styles(seed)
    chosen = style_indices(seed, int(np.count_nonzero(lattice))) if styles is None else styles
    return [(i, specimen_vector(draw_cluster(lattice, all_styles[i]))[0]) for i in chosen]
