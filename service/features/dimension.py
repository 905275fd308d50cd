"""Fractal dimensions of a binary specimen: box counting, mass-radius and sandbox.

Every estimate is a straight-line fit in log-log coordinates over an automatic scaling
range: from a couple of branch widths (below that the specimen looks two-dimensional)
to a fraction of the specimen size (above that it looks like a point). The fitted
range, every size and count, and the intercept are returned so a caller can draw the
log-log plot and check the fit by eye.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
from scipy import special

from service.caveats import Caveat
from service.errors import SpecimenError
from service.features._common import (
    as_specimen_mask,
    crop_to_specimen,
    median_branch_width_px,
    specimen_center,
    summed_area_table,
)

#: Box sizes grow by this ratio; well below 2 so sets whose natural ratio is 3 (carpet,
#: Vicsek, Koch) are sampled between their own levels, not only at powers of two.
SIZE_RATIO = 2.0 ** 0.25
#: The scaling range starts at this many branch widths.
LOWER_CUTOFF_WIDTHS = 2.0
#: Boxes smaller than this see the pixel lattice more than the specimen (a one-pixel
#: line at an angle fills 2-px boxes unevenly), so fits never start below it.
MIN_BOX_PX = 4.0
#: The scaling range ends at this fraction of the specimen's extent: larger boxes cut
#: the specimen's outer edge and their counts carry a finite-size excess.
UPPER_CUTOFF_FRACTION = 1.0 / 12.0
#: Specimens narrower than this (largest extent) have too few box sizes to fit.
MIN_EXTENT_PX = 8
#: Fits over less than this ratio of sizes (one decade) carry a warning.
MIN_TRUSTED_SPAN = 10.0
#: The lower cutoff is lowered to keep at least this ratio of scales in a fit.
MIN_FIT_SPAN = 4.0
#: Sub-windows of the scaling range whose slopes measure the range-choice uncertainty
#: span at least this share of its log width, with at least ``MIN_WINDOW_POINTS`` scales.
MIN_WINDOW_SHARE = 0.75
MIN_WINDOW_POINTS = 4
#: A compact specimen is fitted up to its width over this: the boxes cut by its outline
#: then add about ``2 s / width`` ~ 3% to the count (a disk: 1.99 rather than 1.97 at /16).
COMPACT_UPPER_WIDTHS = 64.0
#: A specimen whose branch width reaches this share of its extent is compact for box
#: counting; its fit range slides from the ordinary one there to the compact one at a
#: width equal to the extent (``box_scaling_range``).
COMPACT_WIDTH_FRACTION = 0.25
#: The extent that sets the upper cutoff leaves out this share of the specimen's pixels at
#: each end of each axis (``bulk_extent``).
EXTENT_TAIL_SHARE = 0.01


@dataclass(frozen=True)
class ScalingFit:
    """A dimension fitted as the slope of ``log count`` against ``log size``.

    Attributes
    ----------
    value : float
        The fitted dimension.
    ci95 : tuple of float
        95% interval of ``value`` (see the function that made the fit for its meaning).
    sizes_px : ndarray
        Every scale measured (box side, radius...), in pixels.
    counts : ndarray
        What was measured at each scale (boxes, mass...).
    fit_range_px : tuple of float
        Smallest and largest scale used in the fit.
    intercept : float
        Intercept of the fitted line, ``log(count) = intercept + slope * log(size)``
        (natural logs; slope is ``value`` for masses and ``-value`` for box counts).
    n_fit_points : int
    warnings : tuple of str
    """

    value: float
    ci95: tuple[float, float]
    sizes_px: np.ndarray
    counts: np.ndarray
    fit_range_px: tuple[float, float]
    intercept: float
    n_fit_points: int
    warnings: tuple[str, ...] = field(default=())

    def to_dict(self, pixel_size_mm: float | None = None) -> dict:
        out = {
            "value": float(self.value),
            "ci95": [float(self.ci95[0]), float(self.ci95[1])],
            "sizes_px": [float(s) for s in self.sizes_px],
            "counts": [float(c) for c in self.counts],
            "fit_range_px": [float(self.fit_range_px[0]), float(self.fit_range_px[1])],
            "intercept": float(self.intercept),
            "n_fit_points": int(self.n_fit_points),
            "warnings": [str(w) for w in self.warnings],  # plain text; codes: service.contract
        }
        if pixel_size_mm is not None:
            out["sizes_mm"] = [float(s) * pixel_size_mm for s in self.sizes_px]
            out["fit_range_mm"] = [float(s) * pixel_size_mm for s in self.fit_range_px]
        return out


def geometric_sizes(smallest: float, largest: float, ratio: float = SIZE_RATIO) -> np.ndarray:
    """Distinct integer sizes from ``smallest`` to ``largest``, spaced by about ``ratio``."""
    if largest < smallest:
        return np.array([int(round(smallest))])
    n = int(np.floor(np.log(largest / smallest) / np.log(ratio))) + 1
    return np.unique(np.round(smallest * ratio ** np.arange(n)).astype(np.int64))


#: The analysis JSON's key of each fit, which starts the codes of its caveats.
_SUBJECTS = {"box counting": "box_dimension", "mass-radius": "mass_radius_dimension", "sandbox": "sandbox_dimension"}


def _subject(what: str) -> str:
    return _SUBJECTS.get(what, "dimension")


def scaling_range(
    width_px: float, upper_px: float, what: str, *, compact: bool = False
) -> tuple[float, float, list[str]]:
    """Automatic fit range between the branch width and an upper scale.

    Returns ``(lower, upper, warnings)``. Normally lower = ``LOWER_CUTOFF_WIDTHS``
    widths (at least ``MIN_BOX_PX``); a range narrower than ``MIN_FIT_SPAN`` is widened
    downwards. A ``compact`` specimen is measured from 1 px to ``1 / COMPACT_UPPER_WIDTHS`` of
    its width, where it is two-dimensional and its outline does not yet weigh on the
    counts. Compact cases carry a warning naming ``what`` was fitted (a short range is
    warned of by ``_fit_mask``, which knows the scales actually fitted).
    """
    warnings: list[str] = []
    upper = max(upper_px, 1.0)
    if compact:
        upper = max(MIN_FIT_SPAN, min(upper, width_px / COMPACT_UPPER_WIDTHS))
        lower = 1.0
        warnings.append(Caveat(
            f"{_subject(what)}_compact",
            f"{what}: the specimen is compact (branch width {width_px:.0f} px); "
            "it was measured below its width, where it fills the plane",
        ))
    else:
        lower = max(MIN_BOX_PX, LOWER_CUTOFF_WIDTHS * width_px)
        if upper / lower < MIN_FIT_SPAN:
            lower = max(1.0, upper / MIN_FIT_SPAN)
    return lower, upper, warnings


def box_scaling_range(width_px: float, extent_px: float) -> tuple[float, float, list[str], bool]:
    """Box counting's automatic fit range: ``(lower, upper, warnings, compact)``.

    Below ``COMPACT_WIDTH_FRACTION`` of the extent this is ``scaling_range`` up to
    ``UPPER_CUTOFF_FRACTION`` of it. From there the specimen is compact, and the range slides,
    evenly in the logarithm of the width, from that range (which by then lies below the
    width) to the compact range of ``scaling_range``, reached at a width equal to the extent.
    The median width of a thick specimen moves a lot with small changes of its outline (a few
    pinholes add skeleton loops of small width), so a switch between the two ranges at one
    width made the dimension of the same blob jump by 0.05-0.08 between two readings of it;
    sliding keeps it continuous in the width.
    """
    upper_px = UPPER_CUTOFF_FRACTION * extent_px
    start = COMPACT_WIDTH_FRACTION * extent_px
    lower, upper, warnings = scaling_range(width_px, upper_px, "box counting")
    if width_px < start:
        return lower, upper, warnings, False
    lower_c, upper_c, warnings = scaling_range(width_px, upper_px, "box counting", compact=True)
    t = min(1.0, math.log(width_px / start) / math.log(1.0 / COMPACT_WIDTH_FRACTION))
    return lower ** (1.0 - t) * lower_c**t, upper ** (1.0 - t) * upper_c**t, warnings, True


def bulk_extent(crop: np.ndarray, tail_share: float = EXTENT_TAIL_SHARE) -> float:
    """The specimen's extent in px (larger side) without ``tail_share`` of its pixels at each end
    of each axis: a speck or a stray arm far out, holding under that share, does not stretch
    the scales fitted (with all pixels, one speck in a corner of the field widened the
    box-counting range by 40% and moved the dimension of the same deposit by 0.05)."""
    sides = []
    for axis in (1, 0):
        cumulative = np.cumsum(np.count_nonzero(crop, axis=axis))
        total = float(cumulative[-1])
        first = int(np.searchsorted(cumulative, tail_share * total, side="right"))
        last = int(np.searchsorted(cumulative, (1.0 - tail_share) * total, side="left"))
        sides.append(max(1, last - first + 1))
    return float(max(sides))


def _check_extent(mask: np.ndarray) -> np.ndarray:
    """The specimen's bounding-box crop; SpecimenError if it is too small to fit."""
    crop, _ = crop_to_specimen(mask, pad_px=0)
    if max(crop.shape) < MIN_EXTENT_PX:
        raise SpecimenError(
            f"the specimen spans only {max(crop.shape)} px; a dimension needs at least {MIN_EXTENT_PX} px across"
        )
    return crop


def _fit_mask(scales: np.ndarray, lower: float, upper: float, what: str, warnings: list[str]) -> np.ndarray:
    """Scales within ``[lower, upper]``; the three nearest its middle if fewer (warned)."""
    in_fit = (scales >= lower * (1 - 1e-9)) & (scales <= upper * (1 + 1e-9))
    if in_fit.sum() < 3:
        nearest = np.argsort(np.abs(np.log(scales / np.sqrt(lower * upper))))[:3]
        in_fit = np.zeros(scales.size, dtype=bool)
        in_fit[nearest] = True
        warnings.append(Caveat(f"{_subject(what)}_few_scales", f"{what}: fewer than three scales in the scaling range"))
    # Said of the scales actually fitted, so the warning names the range the result shows.
    fitted = scales[in_fit]
    if fitted.max() / fitted.min() < MIN_TRUSTED_SPAN:
        warnings.append(Caveat(
            f"{_subject(what)}_short_range",
            f"{what}: the scales fitted, {fitted.min():g}-{fitted.max():g} px, span less than one decade; "
            "the dimension is uncertain",
        ))
    return in_fit


def _line_fit(log_x: np.ndarray, log_y: np.ndarray) -> tuple[float, float, float, int]:
    """Least-squares line: slope, intercept, standard error of the slope, number of points.

    The arithmetic of ``scipy.stats.linregress``, step for step (so the numbers agree to
    the last bit), without importing ``scipy.stats``, which costs a third of a second at
    every start of the command line.
    """
    x, y = np.asarray(log_x, dtype=float), np.asarray(log_y, dtype=float)
    n = x.size
    if n == 0 or (n > 1 and np.amax(x) == np.amin(x)):
        raise ValueError("a line fit needs at least two distinct scales")
    ssxm, ssxym, _, ssym = np.cov(x, y, bias=1).flat
    slope = ssxym / ssxm
    intercept = np.mean(y) - slope * np.mean(x)
    stderr = 0.0
    if n > 2 and ssym != 0.0:
        r = min(max(ssxym / np.sqrt(ssxm * ssym), -1.0), 1.0)
        stderr = float(np.sqrt((1 - r**2) * ssym / ssxm / (n - 2)))
        stderr = stderr if np.isfinite(stderr) else 0.0
    return float(slope), float(intercept), stderr, n


def _t_quantile(p: float, dof: int) -> float:
    """Quantile ``p`` of Student's t law with ``dof`` degrees of freedom (as ``scipy.stats.t.ppf``)."""
    return float(special.stdtrit(dof, p))


def _t95(n_points: int) -> float:
    return _t_quantile(0.975, max(n_points - 2, 1))


def _window_slopes(log_x: np.ndarray, log_y: np.ndarray) -> np.ndarray:
    """Slopes over every run of consecutive scales spanning at least ``MIN_WINDOW_SHARE``
    of the fitted log range (and at least ``MIN_WINDOW_POINTS`` scales).

    Strategy: slopes of all runs come from cumulative sums of x, y, x^2 and xy, so the
    ``O(n^2)`` runs cost no more than a handful of array operations.
    """
    n = log_x.size
    if n < MIN_WINDOW_POINTS + 1 or log_x[-1] <= log_x[0]:
        return np.empty(0)
    zero = np.zeros(1)
    sx, sy = np.concatenate([zero, np.cumsum(log_x)]), np.concatenate([zero, np.cumsum(log_y)])
    sxx = np.concatenate([zero, np.cumsum(log_x * log_x)])
    sxy = np.concatenate([zero, np.cumsum(log_x * log_y)])
    start, stop = np.triu_indices(n + 1, k=MIN_WINDOW_POINTS)  # run = [start, stop)
    share = (log_x[stop - 1] - log_x[start]) / (log_x[-1] - log_x[0])
    start, stop = start[share >= MIN_WINDOW_SHARE], stop[share >= MIN_WINDOW_SHARE]
    m = stop - start
    mx, my = (sx[stop] - sx[start]) / m, (sy[stop] - sy[start]) / m
    var_x = (sxx[stop] - sxx[start]) / m - mx * mx
    cov = (sxy[stop] - sxy[start]) / m - mx * my
    return cov / var_x


def _curvature_drift(log_x: np.ndarray, log_y: np.ndarray) -> float:
    """How far the local slope at the small end of the range lies from the mean slope.

    A parabola through the log-log points gives the local slope ``b + 2 c x`` (``x``
    centred on the range); its distance from ``b`` at the smallest scale is returned
    when the curvature ``c`` is significant (beyond its own 95% t-interval), else 0.
    Oscillating residuals (log-periodic counts of exact fractals) leave ``c`` small
    against its error and are covered by the window slopes instead.
    """
    n = log_x.size
    if n < 5:
        return 0.0
    x = log_x - log_x.mean()
    coef, cov = np.polyfit(x, log_y, 2, cov="unscaled")
    residual = log_y - np.polyval(coef, x)
    se_c = float(np.sqrt(cov[0, 0] * (residual @ residual) / (n - 3)))
    drift = abs(2.0 * coef[0] * x[0])
    return float(drift) if drift > _t_quantile(0.975, n - 3) * abs(2.0 * x[0]) * se_c else 0.0


def _honest_fit(
    log_x: np.ndarray,
    log_y: np.ndarray,
    grid_log_y: np.ndarray | None = None,
    *,
    pixel_lattice: bool = False,
) -> tuple[float, tuple[float, float], float, int]:
    """Slope, its 95% interval, intercept and number of points (``box_counting`` Notes).

    ``grid_log_y`` (scales x grids), when given, holds the same curve measured on each
    grid placement; the spread of their slopes joins the interval. ``pixel_lattice``
    adds the slope a count error of half a pixel row per box side would cause.
    """
    slope, intercept, stderr, n = _line_fit(log_x, log_y)
    regression = _t95(n) * stderr
    grids = 0.0
    if grid_log_y is not None and grid_log_y.shape[1] > 1:
        per_grid = [_line_fit(log_x, grid_log_y[:, j])[0] for j in range(grid_log_y.shape[1])]
        grids = 1.96 * float(np.std(per_grid, ddof=1))
    windows = _window_slopes(log_x, log_y)
    window_part = float(np.abs(windows - slope).max()) if windows.size else 0.0
    range_part = max(window_part, _curvature_drift(log_x, log_y))
    lattice = abs(_line_fit(log_x, np.log1p(0.5 * np.exp(-log_x)))[0]) if pixel_lattice else 0.0
    half = float(np.sqrt(regression**2 + grids**2 + range_part**2 + lattice**2))
    return slope, (slope - half, slope + half), intercept, n


def _occupied_boxes(table: np.ndarray, size: int, offsets: list[tuple[int, int]]) -> dict[tuple[int, int], int]:
    """Occupied boxes of side ``size`` on each grid shifted up-left by ``(offset_r, offset_c)``.

    Strategy: box edges along each axis are ``-offset + k * size`` clipped to the image;
    the summed-area table read at all edge crossings gives every box's mass from four
    corners at once, so a count costs one pass over the boxes, not over the pixels. The
    differences between box rows are taken once for each row offset and serve every
    column offset; a grid asked for twice is counted once.
    """
    h, w = table.shape[0] - 1, table.shape[1] - 1
    out: dict[tuple[int, int], int] = {}
    for offset_r in dict.fromkeys(r for r, _ in offsets):
        rows = np.clip(np.arange(-offset_r, h + size, size), 0, h)
        strips = table[rows[1:]] - table[rows[:-1]]  # each row of boxes, summed down to it
        for offset_c in dict.fromkeys(c for r, c in offsets if r == offset_r):
            cols = np.clip(np.arange(-offset_c, w + size, size), 0, w)
            out[offset_r, offset_c] = int(np.count_nonzero(strips[:, cols[1:]] - strips[:, cols[:-1]]))
    return out


def box_counting(
    mask: np.ndarray,
    *,
    width_px: float | None = None,
    sizes_px: np.ndarray | None = None,
    fit_range_px: tuple[float, float] | None = None,
    n_offsets: int = 3,
) -> ScalingFit:
    """Box-counting (Minkowski-Bouligand) dimension of a binary specimen.

    Parameters
    ----------
    mask : (H, W) array
        Non-zero pixels are the specimen.
    width_px : float, optional
        Branch width; the fit starts at ``LOWER_CUTOFF_WIDTHS`` widths. Default: the
        median width on the skeleton (``2 * EDT - 1``), computed here.
    sizes_px : array of int, optional
        Box sides to count. Default: a geometric series of ratio ``2 ** 0.25`` from 1 px
        to the specimen extent.
    fit_range_px : (float, float), optional
        Fit only sizes within this range. Default: automatic (``box_scaling_range``), up
        to ``UPPER_CUTOFF_FRACTION`` of the extent (``bulk_extent``); compact from a width of
        ``COMPACT_WIDTH_FRACTION`` of the extent.
    n_offsets : int
        Grid shifts per axis (``n_offsets ** 2`` grids, shifts ``k * size / n_offsets``,
        plus grids flush with the far edges of the bounding box); each size keeps the
        smallest count over the grids, which removes most of the excess of boxes that a
        badly placed grid cuts across.

    Returns
    -------
    ScalingFit
        ``value`` = minus the slope of ``log N(s)`` against ``log s`` over the fit range;
        ``counts`` = the minimum count per size; ``ci95`` as in the Notes.

    Raises
    ------
    SpecimenError
        If the mask is empty or spans fewer than ``MIN_EXTENT_PX`` pixels.

    Notes
    -----
    The scaling range follows the picture: it runs from ``LOWER_CUTOFF_WIDTHS`` branch
    widths to ``UPPER_CUTOFF_FRACTION`` of the extent (``bulk_extent``), both lengths that scale with the
    resolution, so the same specimen photographed at 600 or 2000 px is fitted over the
    same part of its structure. Sizes are spaced by ``2 ** 0.25``.

    Log-log points of a box count are not independent samples around a line: counts at
    neighbouring sizes share boxes, exact fractals oscillate log-periodically about the
    line (their natural ratio against the box sizes) [3]_, and the result moves with the
    choice of scaling range [4]_. A regression t-interval alone is therefore too narrow
    (it excluded 2 for a disk and 1 for straight lines). ``ci95`` is ``value +- h`` with
    ``h = sqrt(r^2 + g^2 + s^2 + p^2)``:

    - ``r``: the regression half-width, ``t(0.975, n - 2)`` times the slope's standard error;
    - ``g``: grid placement, 1.96 times the standard deviation of the slopes fitted to
      each of the ``n_offsets ** 2`` grids on its own;
    - ``s``: scaling range, the larger of (a) the largest distance between ``value`` and
      the slope over any run of consecutive sizes spanning at least ``MIN_WINDOW_SHARE``
      of the fitted log range, and (b) when the log-log curve bends significantly (a
      parabola's curvature beyond its 95% interval), the distance between ``value`` and
      the parabola's local slope at the smallest fitted size; (b) catches the smooth
      drift that the outline of a disk or the ends of a line add at large boxes, which
      every sub-window shares;
    - ``p``: pixel lattice, the slope that a count error of half a pixel row per box
      side, ``log(1 + 1 / (2 s))``, adds over the fitted sizes; one-pixel strokes at an
      angle lose boxes to the lattice near ``MIN_BOX_PX``. Left out for compact
      specimens, whose boxes near 1 px lie inside the specimen.

    On exact drawings (one pixel per smallest copy) the interval holds the similarity
    dimension of the carpet, triangle, Vicsek cross and Koch curve, 2 for a disk and 1
    for lines at every angle tried, at widths 0.03 (disk) to 0.27 (Vicsek). The count per
    size stays the minimum over grids: averaging the counts over grids (even over every
    placement) smooths the log-periodic oscillation but adds the boxes the outline
    cuts, which biased the carpet and Vicsek cross by -0.05 and a 45-degree line by
    -0.055.

    References
    ----------
    .. [1] B. B. Mandelbrot, *The Fractal Geometry of Nature*, Freeman, 1982.
    .. [2] K. Foroutan-pour, P. Dutilleul, D. L. Smith, "Advances in the implementation
       of the box-counting method of fractal dimension estimation", Appl. Math. Comput.
       105, 195 (1999) (grid offsets, minimum count per size).
    .. [3] D. Sornette, "Discrete scale invariance and complex dimensions", Phys. Rep.
       297, 239 (1998) (log-periodic corrections to scaling).
    .. [4] J. Theiler, "Estimating fractal dimension", J. Opt. Soc. Am. A 7, 1055 (1990)
       (scaling range, correlated log-log points).
    """
    mask = as_specimen_mask(mask)
    if n_offsets < 1:
        raise ValueError(f"n_offsets must be at least 1, got {n_offsets}")
    crop = _check_extent(mask)
    extent = float(max(crop.shape))
    warnings: list[str] = []
    compact = False
    if fit_range_px is None:
        if width_px is None:
            width_px = median_branch_width_px(np.pad(crop, 1))
        lower, upper, warnings, compact = box_scaling_range(width_px, bulk_extent(crop))
    else:
        lower, upper = (float(v) for v in fit_range_px)
        if not 0 < lower < upper:
            raise ValueError(f"fit_range_px must be (low, high) with 0 < low < high, got {fit_range_px}")
    if sizes_px is None:
        sizes = geometric_sizes(1, extent)
    else:
        sizes = np.unique(np.asarray(sizes_px, dtype=np.int64))
        if sizes.size == 0 or sizes[0] < 1:
            raise ValueError("sizes_px must be positive integers")

    in_fit = _fit_mask(sizes, lower, upper, "box counting", warnings)

    table = summed_area_table(crop)
    h, w = crop.shape
    per_offset = np.empty((int(in_fit.sum()), n_offsets * n_offsets), dtype=np.float64)
    counts = np.empty(sizes.size, dtype=np.float64)
    j = 0
    for i, size in enumerate(sizes):
        s = int(size)
        if not in_fit[i]:
            # Sizes outside the fit only draw the log-log plot: one grid is enough.
            counts[i] = _occupied_boxes(table, s, [(0, 0)])[0, 0]
            continue
        shifts = [(k * s) // n_offsets for k in range(n_offsets)]
        grids = [(sr, sc) for sr in shifts for sc in shifts]
        # Grids flush with the bottom or right edge of the bounding box as well: a
        # specimen that ends there (an anti-diagonal stroke) fits them best.
        flush = [(sr, sc) for sr in (0, (-h) % s) for sc in (0, (-w) % s) if (sr, sc) != (0, 0)]
        occupied = _occupied_boxes(table, s, grids + flush)
        per_offset[j] = [occupied[grid] for grid in grids]
        counts[i] = min([per_offset[j].min(), *(occupied[grid] for grid in flush)])
        j += 1

    log_s = np.log(sizes[in_fit].astype(float))
    slope, (low, high), intercept, n = _honest_fit(
        log_s, np.log(counts[in_fit]), np.log(per_offset), pixel_lattice=not compact
    )
    return ScalingFit(
        value=-slope,
        ci95=(-high, -low),
        sizes_px=sizes.astype(float),
        counts=counts,
        fit_range_px=(float(sizes[in_fit].min()), float(sizes[in_fit].max())),
        intercept=intercept,
        n_fit_points=n,
        warnings=tuple(warnings),
    )


def mass_radius(
    mask: np.ndarray,
    *,
    center_rc: tuple[float, float] | None = None,
    width_px: float | None = None,
    radii_px: np.ndarray | None = None,
    max_radius_fraction: float = 0.5,
) -> ScalingFit:
    """Mass-radius dimension: slope of ``log M(r)`` against ``log r`` about one centre.

    ``M(r)`` counts occupied pixels within Euclidean distance ``r`` of ``center_rc``
    (default: the centroid, use the seed for grown specimens). The fit runs from
    ``LOWER_CUTOFF_WIDTHS`` branch widths to ``max_radius_fraction`` of the largest
    occupied distance; beyond that the disc of radius ``r`` reaches past the tips.
    ``ci95`` joins the regression t-interval, the scaling-range spread and the pixel
    lattice term (a pixel's distance is known to half a pixel), as in ``box_counting``
    (Notes; no grid term).

    References
    ----------
    .. [1] T. A. Witten, L. M. Sander, "Diffusion-limited aggregation, a kinetic critical
       phenomenon", Phys. Rev. Lett. 47, 1400 (1981).
    """
    mask = as_specimen_mask(mask)
    _check_extent(mask)
    if not 0 < max_radius_fraction <= 1:
        raise ValueError(f"max_radius_fraction must be in (0, 1], got {max_radius_fraction}")
    points = np.argwhere(mask)
    center = specimen_center(points, center_rc)
    distance = np.hypot(points[:, 0] - center[0], points[:, 1] - center[1])
    r_max = float(distance.max())
    if width_px is None:
        width_px = median_branch_width_px(np.pad(mask, 1))
    lower, upper, warnings = scaling_range(width_px, max_radius_fraction * r_max, "mass-radius")
    radii = geometric_sizes(1, max(r_max, 2.0)).astype(float) if radii_px is None else np.asarray(radii_px, float)
    # M(r) for every integer r from one histogram of ceil(distance), no sort needed.
    cumulative = np.cumsum(np.bincount(np.ceil(distance).astype(np.int64)))
    masses = cumulative[np.clip(np.floor(radii).astype(np.int64), 0, cumulative.size - 1)].astype(float)
    in_fit = _fit_mask(radii, lower, upper, "mass-radius", warnings) & (masses > 0)
    slope, ci95, intercept, n = _honest_fit(np.log(radii[in_fit]), np.log(masses[in_fit]), pixel_lattice=True)
    return ScalingFit(
        value=slope,
        ci95=ci95,
        sizes_px=radii,
        counts=masses,
        fit_range_px=(float(radii[in_fit].min()), float(radii[in_fit].max())),
        intercept=intercept,
        n_fit_points=n,
        warnings=tuple(warnings),
    )


def sandbox(
    mask: np.ndarray,
    *,
    n_centers: int = 200,
    seed: int = 0,
    width_px: float | None = None,
    center_rc: tuple[float, float] | None = None,
) -> ScalingFit:
    """Averaged sandbox dimension: mass in squares about many random occupied centres.

    Strategy: ``n_centers`` occupied pixels are drawn (seeded) among those within half
    the radius of gyration of ``center_rc`` (default centroid), so the squares rarely
    reach past the specimen; the mass in each square of half-side ``r`` is read from
    a summed-area table for all centres and radii at once; ``<M(r)>`` over centres is
    fitted against the side ``2r + 1`` from ``LOWER_CUTOFF_WIDTHS`` widths up to twice
    the radius of gyration. ``ci95`` joins the regression t-interval and the
    scaling-range spread, as in ``box_counting`` (Notes).

    References
    ----------
    .. [1] T. Tel, A. Fulop, T. Vicsek, "Determination of fractal dimensions for
       geometrical multifractals", Physica A 159, 155 (1989).
    """
    mask = as_specimen_mask(mask)
    _check_extent(mask)
    if n_centers < 1:
        raise ValueError(f"n_centers must be at least 1, got {n_centers}")
    points = np.argwhere(mask)
    center = specimen_center(points, center_rc)
    d2 = ((points - center) ** 2).sum(axis=1)
    r_gyr = float(np.sqrt(d2.mean()))
    if width_px is None:
        width_px = median_branch_width_px(np.pad(mask, 1))
    pool = points[d2 <= (0.5 * r_gyr) ** 2]
    if pool.shape[0] == 0:
        pool = points
    rng = np.random.default_rng(seed)
    centers = pool[rng.choice(pool.shape[0], size=min(n_centers, pool.shape[0]), replace=False)]
    lower, upper, warnings = scaling_range(width_px, 2.0 * r_gyr, "sandbox")
    half_sides = geometric_sizes(1, max(r_gyr, 2.0))
    table = summed_area_table(mask)
    h, w = mask.shape
    r = half_sides[None, :]
    r0 = np.clip(centers[:, :1] - r, 0, h)
    r1 = np.clip(centers[:, :1] + r + 1, 0, h)
    c0 = np.clip(centers[:, 1:] - r, 0, w)
    c1 = np.clip(centers[:, 1:] + r + 1, 0, w)
    box_mass = table[r1, c1] - table[r0, c1] - table[r1, c0] + table[r0, c0]
    masses = box_mass.mean(axis=0, dtype=np.float64)
    sides = (2 * half_sides + 1).astype(float)
    in_fit = _fit_mask(sides, lower, upper, "sandbox", warnings)
    slope, ci95, intercept, n = _honest_fit(np.log(sides[in_fit]), np.log(masses[in_fit]))
    return ScalingFit(
        value=slope,
        ci95=ci95,
        sizes_px=sides,
        counts=masses,
        fit_range_px=(float(sides[in_fit].min()), float(sides[in_fit].max())),
        intercept=intercept,
        n_fit_points=n,
        warnings=tuple(warnings),
    )
