"""Box-counting, mass-radius and sandbox dimensions against exact values.

Exact similarity dimensions log N / log(1/r): CHECK_VALUES.md "Exact (mathematics)";
a filled region has dimension 2 and a smooth curve 1.
"""

import numpy as np
import pytest
from scipy import stats

from service.errors import SpecimenError
from service.features import box_counting, mass_radius, sandbox
from service.features.dimension import COMPACT_WIDTH_FRACTION, box_scaling_range, scaling_range
from tests.features import shapes

EXACT_FRACTALS = {
    # name: (drawing, exact similarity dimension)
    "sierpinski_carpet": (lambda: shapes.sierpinski_carpet(6), shapes.SIERPINSKI_CARPET_DIMENSION),  # log 8 / log 3
    "sierpinski_triangle": (lambda: shapes.sierpinski_triangle(10), shapes.SIERPINSKI_TRIANGLE_DIMENSION),  # log 3 / log 2
    "vicsek": (lambda: shapes.vicsek(6), shapes.VICSEK_DIMENSION),  # log 5 / log 3
    "koch_curve": (lambda: shapes.koch_curve(6, 1460), shapes.KOCH_DIMENSION),  # log 4 / log 3
}


@pytest.mark.parametrize("name", sorted(EXACT_FRACTALS))
def test_box_dimension_of_exact_fractals(name):
    draw, exact = EXACT_FRACTALS[name]
    mask = draw()
    assert 700 <= max(mask.shape) <= 1500
    fit = box_counting(mask)
    # Similarity dimension, exact (CHECK_VALUES.md); tolerance 0.04 from issue 3.
    assert abs(fit.value - exact) < 0.04, (name, fit.value, exact)
    assert fit.ci95[0] < fit.value < fit.ci95[1]
    assert fit.fit_range_px[1] / fit.fit_range_px[0] >= 10  # a decade of box sizes
    assert fit.warnings == ()


INTERVAL_CASES = {
    # name: (drawing, exact dimension): a filled region 2, a smooth curve 1 (exact).
    "filled_disk": (lambda: shapes.filled_disk(801), 2.0),
    **{
        f"line_{angle:g}deg": (lambda angle=angle: shapes.straight_line(1000, angle), 1.0)
        for angle in (0.0, 20.0, 30.0, 37.0, 45.0, 60.0, 90.0, 135.0)
    },
    **EXACT_FRACTALS,
}
#: Widest 95% interval accepted on these drawings. One pixel per smallest copy is the
#: hardest case for a box count: redrawing the Vicsek cross at 1-4 px per cell moves
#: the estimate over about 0.13, so an honest interval there is about 0.27 wide. 0.3
#: still tells DLA (1.71) from compact growth (2) and from a curve (1).
MAX_INTERVAL_WIDTH = 0.3


@pytest.mark.parametrize("name", sorted(INTERVAL_CASES))
def test_box_interval_holds_the_exact_dimension(name):
    draw, exact = INTERVAL_CASES[name]
    fit = box_counting(draw())
    low, high = fit.ci95
    # Exact dimension (CHECK_VALUES.md "Exact (mathematics)") inside the 95% interval.
    assert low <= exact <= high, (name, fit.value, fit.ci95)
    assert high - low < MAX_INTERVAL_WIDTH, (name, fit.ci95)
    # Never narrower than the plain regression t-interval on the fitted points (scipy).
    in_fit = (fit.sizes_px >= fit.fit_range_px[0]) & (fit.sizes_px <= fit.fit_range_px[1])
    line = stats.linregress(np.log(fit.sizes_px[in_fit]), np.log(fit.counts[in_fit]))
    assert line.slope == pytest.approx(-fit.value)
    assert (high - low) / 2 >= stats.t.ppf(0.975, in_fit.sum() - 2) * line.stderr


@pytest.mark.parametrize("px_per_cell", [1, 2, 3, 4])
def test_box_interval_of_a_redrawn_vicsek_cross_holds_its_dimension(px_per_cell):
    # The same set drawn at 1-4 px per cell: the estimates scatter (1.37-1.50) as the box
    # grid meets the set's natural ratio 3 at other phases; each interval still holds
    # log 5 / log 3 (exact, CHECK_VALUES.md).
    mask = np.kron(shapes.vicsek(5), np.ones((px_per_cell, px_per_cell), dtype=bool))
    low, high = box_counting(mask).ci95
    assert low <= shapes.VICSEK_DIMENSION <= high, (px_per_cell, low, high)


def test_mass_radius_interval_holds_the_exact_dimension():
    # Exact: M(r) = pi r^2 in a disk, 2 r along a line; about its centre the Vicsek cross
    # has 5^k cells within 3^k / 2 (log 5 / log 3, CHECK_VALUES.md).
    cases = [
        (mass_radius(shapes.filled_disk(801)), 2.0),
        (mass_radius(shapes.straight_line(1000, 30.0)), 1.0),
        (mass_radius(shapes.vicsek(6), center_rc=(364, 364)), shapes.VICSEK_DIMENSION),
    ]
    for fit, exact in cases:
        assert fit.ci95[0] <= exact <= fit.ci95[1], (fit.value, fit.ci95, exact)
        assert fit.ci95[1] - fit.ci95[0] < MAX_INTERVAL_WIDTH


def test_box_sizes_are_finer_than_octaves():
    fit = box_counting(shapes.sierpinski_carpet(5))
    ratios = fit.sizes_px[1:] / fit.sizes_px[:-1]
    assert np.median(ratios) < 1.5
    # The log-log line reproduces the counts it was fitted to.
    in_fit = (fit.sizes_px >= fit.fit_range_px[0]) & (fit.sizes_px <= fit.fit_range_px[1])
    predicted = np.exp(fit.intercept) * fit.sizes_px[in_fit] ** -fit.value
    assert np.allclose(predicted, fit.counts[in_fit], rtol=0.25)


@pytest.mark.parametrize("name", ["sierpinski_carpet", "vicsek"])
def test_a_speck_far_out_does_not_move_the_box_dimension(name):
    # One 3 x 3 px speck 400 px beyond the set stretches its bounding box by half; it holds
    # a thousandth of the pixels and must not stretch the scales fitted with it (taking the
    # whole box moved the carpet by 0.03 and the Vicsek cross by 0.035).
    draw, exact = EXACT_FRACTALS[name]
    drawn = draw()
    h, w = drawn.shape
    canvas = np.zeros((h + 400, w + 400), dtype=bool)
    canvas[:h, :w] = drawn
    alone = box_counting(canvas)
    canvas[-3:, -3:] = True
    with_speck = box_counting(canvas)
    assert with_speck.fit_range_px == alone.fit_range_px
    assert abs(with_speck.value - alone.value) < 0.01, (alone.value, with_speck.value)
    # Similarity dimension, exact (CHECK_VALUES.md); tolerance 0.04 from issue 3.
    assert abs(with_speck.value - exact) < 0.04


def test_the_box_fit_range_slides_into_the_compact_range_without_a_jump():
    # The median width of a thick specimen moves with small changes of its outline: the
    # range fitted must move continuously with it, from the ordinary range where the
    # specimen becomes compact to the compact range (1 px up) where its width is its extent.
    extent = 400.0
    start = COMPACT_WIDTH_FRACTION * extent
    below = box_scaling_range(start * (1 - 1e-9), extent)
    above = box_scaling_range(start * (1 + 1e-9), extent)
    assert not below[3] and above[3]
    assert below[0] == pytest.approx(above[0], rel=1e-6) and below[1] == pytest.approx(above[1], rel=1e-6)
    compact_lower, compact_upper, _ = scaling_range(extent, extent / 12.0, "box counting", compact=True)
    at_extent = box_scaling_range(extent, extent)
    assert at_extent[:2] == pytest.approx((compact_lower, compact_upper))
    widths = np.geomspace(start, extent, 25)
    lowers = [box_scaling_range(w, extent)[0] for w in widths]
    assert np.all(np.diff(lowers) <= 0) and np.max(np.abs(np.diff(np.log(lowers)))) < 0.1


def test_filled_disk_is_two_dimensional():
    fit = box_counting(shapes.filled_disk(801))
    # A filled region has dimension 2 (exact); issue 3 asks for at least 1.95.
    assert fit.value >= 1.95
    assert any("compact" in w for w in fit.warnings)


@pytest.mark.parametrize("angle_deg", [0.0, 30.0, 45.0])
def test_straight_line_is_one_dimensional(angle_deg):
    fit = box_counting(shapes.straight_line(1000, angle_deg))
    # A smooth curve has dimension 1 (exact).
    assert abs(fit.value - 1.0) < 0.04


def test_grid_offsets_never_increase_counts():
    mask = shapes.vicsek(5)
    one = box_counting(mask, n_offsets=1, fit_range_px=(4, 40))
    many = box_counting(mask, n_offsets=4, fit_range_px=(4, 40))
    assert np.all(many.counts <= one.counts)


def test_narrow_scaling_range_warns():
    fit = box_counting(shapes.sierpinski_carpet(3))  # 27 px: far less than a decade
    assert any("decade" in w for w in fit.warnings)


def test_mass_radius_of_disk_and_line():
    # Exact: M(r) = pi r^2 inside a disk, 2 r along a line through the centre.
    disk = shapes.filled_disk(801)
    assert abs(mass_radius(disk).value - 2.0) < 0.03
    line = shapes.straight_line(1000, 30.0)
    assert abs(mass_radius(line).value - 1.0) < 0.03


def test_mass_radius_of_vicsek_about_its_centre():
    # About the centre, the Vicsek cross holds 5^k cells within 3^k / 2: mass-radius
    # dimension log 5 / log 3 (exact self-similarity, CHECK_VALUES.md).
    vicsek = shapes.vicsek(6)
    fit = mass_radius(vicsek, center_rc=(364, 364))
    assert abs(fit.value - shapes.VICSEK_DIMENSION) < 0.04


def test_mass_radius_about_a_given_centre():
    carpet = shapes.sierpinski_carpet(6)
    # About the centre of the carpet's central hole (243 px square, exact geometry)
    # there is no mass within 121 px.
    centred = mass_radius(carpet, center_rc=(364, 364))
    assert centred.counts[centred.sizes_px < 121].max() == 0
    with pytest.raises(ValueError):
        mass_radius(carpet, center_rc=(np.nan, 3))


def test_sandbox_of_disk_and_line_and_seed():
    # Exact: the mass in a square of side s is s^2 inside a disk and ~s along a line.
    assert abs(sandbox(shapes.filled_disk(801), seed=1).value - 2.0) < 0.03
    assert abs(sandbox(shapes.straight_line(1000, 30.0), seed=1).value - 1.0) < 0.03
    carpet = shapes.sierpinski_carpet(5)
    assert np.array_equal(sandbox(carpet, seed=7).counts, sandbox(carpet, seed=7).counts)


@pytest.mark.parametrize("function", [box_counting, mass_radius, sandbox])
def test_bad_masks(function):
    with pytest.raises(SpecimenError):
        function(np.zeros((20, 20), dtype=bool))
    with pytest.raises(ValueError):
        function(np.ones((4, 4, 4), dtype=bool))


def test_line_fit_is_scipys_linregress_to_the_last_bit():
    """The fit under every dimension: slope, intercept and slope error as scipy.stats.linregress
    (the reference library) computes them, bit for bit, and Student's t quantile as scipy.stats.t."""
    from service.features.dimension import _line_fit, _t_quantile

    rng = np.random.default_rng(5)
    for n in (2, 3, 4, 7, 12, 25):
        for _ in range(20):
            x = np.sort(rng.normal(size=n))
            y = 1.7 * x + rng.normal(size=n) * rng.uniform(0.0, 1.0)
            reference = stats.linregress(x, y)
            slope, intercept, stderr, points = _line_fit(x, y)
            assert (slope, intercept, points) == (reference.slope, reference.intercept, n)
            assert stderr == (float(reference.stderr) if n > 2 else 0.0)
    # A flat line: linregress leaves the error undefined (nan); no scatter means no error here.
    assert _line_fit(np.arange(5.0), np.ones(5)) == (0.0, 1.0, 0.0, 5)
    with pytest.raises(ValueError, match="distinct"):
        _line_fit(np.ones(4), np.arange(4.0))
    for dof in (1, 2, 5, 30, 200):
        assert _t_quantile(0.975, dof) == stats.t.ppf(0.975, dof)
    assert _t_quantile(0.975, 1) == pytest.approx(12.706, abs=5e-4)  # t table, from memory
