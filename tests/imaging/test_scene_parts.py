"""Scene parts a bench photograph adds round a deposit, each drawn here by hand, with numpy
alone, where it is known exactly: a dish on a grained bench, a glare spot's halo, a lead
whose colour differs from the rim's but not its grey. Independent of the scene renderer
in ``scenes.py`` and of the product's own renderer."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import ndimage

from service.imaging import segment
from tests.imaging.masks import random_tree


def _ellipse(shape, cx, cy, a, b, theta_deg):
    yy, xx = np.mgrid[: shape[0], : shape[1]].astype(np.float64)
    t = math.radians(theta_deg)
    u = (xx - cx) * math.cos(t) + (yy - cy) * math.sin(t)
    v = -(xx - cx) * math.sin(t) + (yy - cy) * math.cos(t)
    return (u / a) ** 2 + (v / b) ** 2


def _place(canvas_shape, tree: np.ndarray, cy: int, cx: int, scale: int) -> np.ndarray:
    big = np.kron(tree, np.ones((scale, scale), dtype=bool))
    out = np.zeros(canvas_shape, dtype=bool)
    h, w = big.shape
    out[cy - h // 2: cy - h // 2 + h, cx - w // 2: cx - w // 2 + w] = big
    return out


def _to_uint8(rgb: np.ndarray) -> np.ndarray:
    return (np.clip(rgb, 0.0, 1.0) * 255.0 + 0.5).astype(np.uint8)


def test_a_dish_on_a_grained_bench_is_found():
    """Brushed metal: streaks one or two pixels wide, stronger than the dish wall's edge is
    anywhere (the wall is a faint grey line on a lilac solution). The dish is still the
    ellipse that bounds the region of colours the bench does not have."""
    rng = np.random.default_rng(5)
    h, w = 600, 800
    streak = rng.normal(0.0, 0.22, (h, 1)) * np.ones((1, w)) + rng.normal(0.0, 0.05, (h, w))
    bench = np.stack([0.62 + streak, 0.52 + streak, 0.30 + streak], axis=-1)
    rho = _ellipse((h, w), 420, 290, 250, 190, 20)
    photo = bench.copy()
    inside = rho <= 1.0
    photo[inside] = (0.80, 0.76, 0.86)
    wall = (rho > 0.97) & (rho <= 1.0)
    photo[wall] = (0.70, 0.68, 0.74)
    deposit = _place((h, w), random_tree(128, seed=4), 290, 420, 2) & (rho < 0.8)
    photo[deposit] = (0.18, 0.16, 0.15)
    photo += rng.normal(0.0, 0.01, photo.shape)
    seg = segment(_to_uint8(photo))

    assert seg.settings["field_of_view"]["source"] == "dish rim", seg.settings["field_of_view"]
    # The field found against the ellipse drawn: their areas overlap by IoU >= 0.85.
    roi = seg.settings["reading"]["roi"]
    cx, cy, rx, ry, angle = roi if len(roi) == 5 else (roi[0], roi[1], roi[2], roi[2], 0.0)
    found = _ellipse((h, w), cx, cy, rx, ry, angle) <= 1.0
    assert np.count_nonzero(found & inside) / np.count_nonzero(found | inside) >= 0.85
    # ... and the deposit, not the solution, is the specimen.
    assert np.count_nonzero(seg.mask & deposit) / np.count_nonzero(seg.mask | deposit) >= 0.85


def test_a_glare_spots_halo_is_not_taken_for_deposit():
    """A glare spot clipped white at its centre and fading over its own radius, on a dark
    solution beside a bright deposit: neither the spot nor the ring of its halo that a
    threshold would keep belongs to the specimen."""
    rng = np.random.default_rng(8)
    h, w = 600, 600
    rho = _ellipse((h, w), 300, 300, 280, 280, 0)
    photo = np.empty((h, w, 3))
    photo[:] = (0.35, 0.33, 0.30)
    photo[rho <= 1.0] = (0.12, 0.15, 0.20)
    photo[(rho > 0.95) & (rho <= 1.0)] = (0.55, 0.55, 0.55)
    deposit = _place((h, w), random_tree(128, seed=6), 300, 300, 2) & (rho < 0.6)
    photo[deposit] = (0.85, 0.55, 0.25)
    # The spot: white out to 14 px, then a Gaussian fall to the solution over about 20 px more.
    gy, gx = 130, 430
    r = np.hypot(*np.mgrid[:h, :w] - np.array([gy, gx])[:, None, None])
    glow = np.where(r <= 14.0, 1.0, np.exp(-0.5 * ((r - 14.0) / 9.0) ** 2))
    photo += glow[..., None] * (1.0 - photo)
    photo += rng.normal(0.0, 0.008, photo.shape)
    assert not np.any(deposit & (r <= 40.0))  # the spot stands apart from the deposit
    seg = segment(_to_uint8(photo))

    assert np.count_nonzero(seg.mask & (r <= 40.0)) == 0
    assert np.count_nonzero(seg.mask & deposit) / np.count_nonzero(seg.mask | deposit) >= 0.85


def test_a_round_glare_spot_is_glare_whatever_branch_width_the_reading_measured():
    """A reading that took a glare spot measures the spot's own width as the branch width, so
    "much wider than a branch" cannot tell it; roundness can (the disc's area is pi r^2 of
    its inscribed radius r, a stroke's is 4 L / (pi w) times that). A white stroke as wide
    as the spot, and far longer, is not glare."""
    from service.imaging.segmentation.scene import glare_mask

    h, w = 200, 300
    yy, xx = np.mgrid[:h, :w]
    rgb = np.full((h, w, 3), 40, dtype=np.uint8)
    spot = np.hypot(yy - 60, xx - 60) <= 9.0
    stroke = (np.abs(yy - 150) <= 4) & (xx >= 40) & (xx <= 260)
    rgb[spot | stroke] = 255
    for width in (None, 1.0, 9.0, 18.0):  # no width yet, thin branches, the spot's own width, wider
        assert glare_mask(rgb, width)[spot].all()
    for width in (None, 9.0, 18.0):  # a stroke as wide as the branches measured
        assert not glare_mask(rgb, width)[stroke].any()


def test_a_dish_cut_by_the_frame_under_a_deep_shadow_is_found_by_its_hue():
    """A light blue solution in a dish cut by the frame, on a wooden bench with a strong
    grain, a deep shadow over the left part of the picture. In the shade the solution is
    as near the bench's colour as the grain comes, but its hue stays blue."""
    rng = np.random.default_rng(21)
    h, w = 600, 450
    yy, xx = np.mgrid[:h, :w].astype(np.float64)
    grain = 0.12 * np.sin(xx / 3.1 + 2.0 * np.sin(yy / 40.0)) + 0.05 * rng.normal(size=(1, w))
    photo = np.empty((h, w, 3))
    for ch, base in enumerate((0.64, 0.50, 0.36)):
        photo[..., ch] = base * (1.0 + grain)
    rho = _ellipse((h, w), 190, 250, 215, 165, 5)
    photo[rho <= 1.0] = (0.50, 0.69, 0.85)
    photo[(rho > 0.96) & (rho <= 1.0)] = (0.50, 0.53, 0.63)
    deposit = _place((h, w), random_tree(96, seed=4), 250, 190, 3) & (rho < 0.6)
    photo[deposit] = (0.33, 0.19, 0.11)
    shade = 1.0 - 0.7 / (1.0 + np.exp((xx - 170.0) / 30.0))
    photo *= shade[..., None]
    photo += rng.normal(0.0, 0.012, photo.shape)
    assert (rho[:, 0] <= 1.0).any()  # the frame cuts the dish

    seg = segment(_to_uint8(photo))
    assert seg.settings["field_of_view"]["source"] == "dish rim"
    assert np.count_nonzero(seg.mask & deposit) / np.count_nonzero(seg.mask | deposit) >= 0.85


def test_a_red_lead_over_a_green_rim_is_left_out():
    """A lead from the frame to the centre electrode, red on a teal rim of nearly the same
    grey: it runs on past the dish, which a deposit never does, so it is not specimen."""
    rng = np.random.default_rng(3)
    h, w = 700, 700
    rho = _ellipse((h, w), 350, 350, 300, 300, 0)
    photo = np.empty((h, w, 3))
    photo[:] = (0.45, 0.45, 0.47)
    photo[rho <= 1.08] = (0.10, 0.50, 0.42)  # the rim, teal
    photo[rho <= 1.0] = (0.62, 0.78, 0.95)  # the solution
    deposit = _place((h, w), random_tree(128, seed=9), 350, 350, 2) & (rho < 0.65)
    photo[deposit] = (0.20, 0.18, 0.18)
    yy, xx = np.mgrid[:h, :w]
    electrode = np.hypot(yy - 350, xx - 350) <= 8
    photo[electrode] = (0.05, 0.05, 0.05)
    # A straight lead, 4 px wide, from the electrode to the bottom-right corner.
    d = np.array([1.0, 1.0]) / math.sqrt(2.0)
    along = (yy - 350) * d[0] + (xx - 350) * d[1]
    across = np.abs(-(yy - 350) * d[1] + (xx - 350) * d[0])
    lead = (along >= 0) & (across <= 2.0)
    photo[lead] = (0.72, 0.12, 0.10)  # red: grey 0.37 against the rim's 0.36
    photo += rng.normal(0.0, 0.01, photo.shape)
    seg = segment(_to_uint8(photo))

    # Away from the deposit's reach, what of the lead lies inside the dish is left out.
    free_lead = lead & (rho < 0.97) & (along > 0.7 * 300)
    assert np.count_nonzero(free_lead) > 100
    assert np.count_nonzero(seg.mask & free_lead) <= 0.1 * np.count_nonzero(free_lead)


def test_a_lead_is_followed_to_its_electrode_and_no_further():
    """The deposit grew off the dish's centre: its electrode sits 25 px left of it, with an
    arm running from the electrode past the centre and the rest of the deposit below. A red
    lead comes from the rim on the left, level with the arm, to the electrode. The arm
    beyond the electrode is deposit, not lead, and is kept."""
    rng = np.random.default_rng(4)
    h, w = 700, 700
    rho = _ellipse((h, w), 350, 350, 300, 300, 0)
    photo = np.empty((h, w, 3))
    photo[:] = (0.45, 0.45, 0.47)
    photo[rho <= 1.08] = (0.10, 0.50, 0.42)
    photo[rho <= 1.0] = (0.62, 0.78, 0.95)
    yy, xx = np.mgrid[:h, :w]
    below = _place((h, w), random_tree(128, seed=9), 480, 325, 2) & (rho < 0.65) & (yy >= 370)
    trunk = (np.abs(xx - 325) <= 2) & (yy >= 350) & (yy <= 480)
    arm = (np.abs(yy - 350) <= 2) & (xx >= 325) & (xx <= 375)
    deposit = below | trunk | arm
    photo[deposit] = (0.20, 0.18, 0.18)
    photo[np.hypot(yy - 350, xx - 325) <= 8] = (0.05, 0.05, 0.05)
    lead = (np.abs(yy - 350) <= 2) & (xx <= 325)
    photo[lead] = (0.72, 0.12, 0.10)
    photo += rng.normal(0.0, 0.01, photo.shape)
    seg = segment(_to_uint8(photo))

    assert seg.settings["scene"]["leads"] == 1
    free_lead = lead & (rho < 0.97) & (xx < 250)
    assert np.count_nonzero(seg.mask & free_lead) <= 0.1 * np.count_nonzero(free_lead)
    arm_beyond = arm & (xx >= 340)  # clear of the electrode
    assert np.count_nonzero(seg.mask & arm_beyond) >= 0.8 * np.count_nonzero(arm_beyond)


def _dish_cut_by_the_frame_with_a_lead(lead_colour, seed=5):
    """A dish whose left part the frame cuts, a dark deposit at its centre and a straight
    lead, 5 px wide, from the left edge of the picture to the centre electrode."""
    rng = np.random.default_rng(seed)
    h, w = 600, 600
    rho = _ellipse((h, w), 230, 300, 320, 320, 0)
    photo = np.empty((h, w, 3))
    photo[:] = (0.55, 0.45, 0.35)  # a wooden bench
    photo[rho <= 1.08] = (0.85, 0.85, 0.88)  # the rim
    photo[rho <= 1.0] = (0.70, 0.80, 0.90)  # the solution
    deposit = _place((h, w), random_tree(112, seed=12), 300, 230, 3) & (rho < 0.55)
    photo[deposit] = (0.30, 0.20, 0.12)
    yy, xx = np.mgrid[:h, :w]
    photo[np.hypot(yy - 300, xx - 230) <= 7] = (0.08, 0.08, 0.08)
    lead = (np.abs(yy - 300 - 0.2 * (xx - 230)) <= 2.5) & (xx <= 230)
    photo[lead] = lead_colour
    photo += rng.normal(0.0, 0.01, photo.shape)
    assert (rho[:, 0] <= 1.0).any()  # the frame cuts the dish
    return segment(_to_uint8(photo)), deposit, lead, xx


def test_a_coloured_lead_entering_from_the_frame_is_left_out():
    """Where the frame cuts the dish nothing shows beyond it, so a lead from the frame's
    edge is told from the deposit by its colour: a red one is left out of the mask."""
    seg, deposit, lead, xx = _dish_cut_by_the_frame_with_a_lead((0.75, 0.10, 0.10))
    free_lead = lead & (xx < 60)  # beyond the deposit's reach
    assert np.count_nonzero(free_lead) > 100
    assert np.count_nonzero(seg.mask & free_lead) <= 0.1 * np.count_nonzero(free_lead)
    assert np.count_nonzero(seg.mask & deposit) >= 0.85 * np.count_nonzero(deposit)


def test_a_straight_arm_of_the_deposits_colour_reaching_the_frame_is_kept():
    """The same scene with the straight stroke in the deposit's own colour: nothing tells it
    from a branch cut by the frame, so it stays in the mask."""
    seg, deposit, lead, xx = _dish_cut_by_the_frame_with_a_lead((0.30, 0.20, 0.12))
    arm = lead & (xx < 60)
    assert np.count_nonzero(seg.mask & arm) >= 0.8 * np.count_nonzero(arm)


def test_reduced_copies_are_scikit_images_block_means():
    """Every reading is scored on a reduced copy: its block means must be those of
    scikit-image's ``downscale_local_mean`` (the reference library) on the whole blocks, for
    an RGB photograph, a grey float picture and a mask."""
    from skimage.transform import downscale_local_mean

    from service.imaging.segmentation._common import block_mean

    rng = np.random.default_rng(5)
    rgb = rng.integers(0, 256, size=(103, 77, 3), dtype=np.uint8)
    gray = rng.random((103, 77), dtype=np.float32)
    mask = rng.random((103, 77)) < 0.3
    for a, factor in ((rgb, 4), (rgb, 3), (gray, 4), (gray, 1), (mask, 8)):
        got = block_mean(a, factor)
        h, w = a.shape[0] // factor, a.shape[1] // factor
        blocks = (factor, factor, 1) if a.ndim == 3 else (factor, factor)
        want = downscale_local_mean(a.astype(np.float64), blocks)[:h, :w]
        assert got.dtype == np.float32 and got.shape == want.shape
        np.testing.assert_allclose(got, want, rtol=1e-5, atol=1e-4)


def test_medians_of_uint8_greys_from_histograms_are_numpys():
    """The deposit's contrast takes its medians of 8-bit greys (and the noise from their
    neighbour differences) from histograms: they must be numpy's ``median`` of the same values
    as float32 exactly, for odd and even counts, narrow and wide spreads."""
    from service.imaging.segmentation._common import median_uint8, robust_sigma, robust_sigma_uint8_steps

    rng = np.random.default_rng(11)
    for trial in range(400):
        h, w = int(rng.integers(1, 30)), int(rng.integers(2, 30))
        if trial % 2:
            levels = rng.normal(128.0, rng.uniform(0.2, 40.0), (h, w)).clip(0, 255).astype(np.uint8)
        else:
            levels = rng.integers(int(rng.integers(0, 250)), 256, (h, w)).astype(np.uint8)
        grey = levels.astype(np.float32)
        assert median_uint8(levels) == float(np.median(grey))
        assert robust_sigma_uint8_steps(levels) == robust_sigma(grey[:, 1:] - grey[:, :-1])


def test_square_closing_is_scipys_iterated_closing():
    """Reading envelopes are closed by separable running extrema: the same pixels as scipy's
    ``binary_closing`` with the 3 x 3 square iterated (the reference library), masks touching
    the frame included."""
    from service.imaging.segmentation._common import EIGHT, square_closing

    rng = np.random.default_rng(3)
    for _ in range(100):
        shape = (int(rng.integers(3, 70)), int(rng.integers(3, 70)))
        mask = ndimage.binary_dilation(rng.random(shape) < rng.uniform(0.002, 0.2), iterations=int(rng.integers(0, 3)))
        radius = int(rng.integers(1, 6))
        assert np.array_equal(square_closing(mask, radius),
                              ndimage.binary_closing(mask, structure=EIGHT, iterations=radius))


def test_window_median_is_scipys_median_filter():
    """The local lighting's windowed median must equal scipy's ``median_filter`` with edges
    continued (the reference library), on noise, on a picture with many equal greys, and on
    pictures narrower than the window or taken in several bands of rows."""
    from service.imaging.segmentation.threshold import window_median

    rng = np.random.default_rng(8)
    pictures = [rng.random((61, 47), dtype=np.float32),
                (rng.integers(0, 4, (40, 90)) / 3.0).astype(np.float32),
                rng.random((3, 30), dtype=np.float32),
                rng.random((200, 400), dtype=np.float32)]  # several bands of rows
    for picture in pictures:
        for size in (5, 11, 23):
            assert np.array_equal(window_median(picture, size),
                                  ndimage.median_filter(picture, size=size, mode="nearest"))
    with pytest.raises(ValueError, match="odd"):
        window_median(pictures[0], 6)


def test_cleanup_branch_width_is_twice_the_median_ridge_distance_less_one():
    """The width that sizes the cleanup, by its definition written with scipy alone (the
    reference library): ``2 * median - 1`` of the Euclidean distance transform where it is a
    3 x 3 local maximum inside the mask. Exact objects first: a straight stroke 7 px wide is
    7 px wide; then random strokes, and a mask over 1024 px that is measured in tiles."""
    from service.imaging.segmentation.cleanup import branch_width_px

    def by_definition(mask: np.ndarray) -> float:
        dist = ndimage.distance_transform_edt(np.pad(mask, 1))[1:-1, 1:-1].astype(np.float32)
        ridge = mask & (dist >= ndimage.maximum_filter(dist, size=3))
        return max(1.0, 2.0 * float(np.median(dist[ridge])) - 1.0)

    stroke = np.zeros((40, 200), dtype=bool)
    stroke[10:17, 20:180] = True
    assert branch_width_px(stroke) == 7.0
    rng = np.random.default_rng(6)
    for shape in ((120, 90), (300, 260), (1300, 1100)):
        mask = ndimage.binary_dilation(rng.random(shape) < 0.004, iterations=int(rng.integers(1, 4)))
        assert branch_width_px(mask) == by_definition(mask)


def _electrode_in_a_dense_core(electrode_grey: float, seed: int):
    """A dark deposit on a pale solution: a tree with a dense core 22 px across round a centre
    electrode of 9 px radius, so the thick disc by the mask's shape alone is the core's.
    Returns the photograph, the electrode drawn and the deposit drawn (without it)."""
    rng = np.random.default_rng(seed)
    h, w = 600, 600
    rho = _ellipse((h, w), 300, 300, 270, 270, 0)
    photo = np.empty((h, w, 3))
    photo[:] = (0.40, 0.38, 0.35)
    photo[rho <= 1.0] = (0.78, 0.86, 0.92)
    yy, xx = np.mgrid[:h, :w]
    r = np.hypot(yy - 300, xx - 300)
    deposit = (_place((h, w), random_tree(128, seed=seed), 300, 300, 3) & (rho < 0.85)) | (r <= 22)
    electrode = r <= 9
    photo[deposit] = (0.30, 0.24, 0.22)
    photo[electrode] = electrode_grey
    photo = np.stack([ndimage.gaussian_filter(photo[..., k], 0.8) for k in range(3)], axis=-1)
    photo += rng.normal(0.0, 0.012, photo.shape)
    return _to_uint8(photo), electrode, deposit & ~electrode


@pytest.mark.parametrize("electrode_grey", [0.06, 0.52], ids=["darker", "lighter"])
def test_an_electrode_of_its_own_grey_is_left_out_of_the_mask(electrode_grey):
    """A graphite rod darker than the copper, or a polished one lighter (still darker than the
    solution): its outline is where its grey meets the deposit's, not the thick disc of the
    dense core round it. The mask keeps the core; what is measured keeps the electrode too."""
    photo, electrode, deposit = _electrode_in_a_dense_core(electrode_grey, seed=6)
    seg = segment(photo)

    assert seg.electrode is not None
    assert np.count_nonzero(seg.electrode & electrode) / np.count_nonzero(seg.electrode | electrode) >= 0.8
    core = deposit & ~ndimage.binary_dilation(electrode, iterations=2)
    assert np.count_nonzero(seg.mask & core) >= 0.95 * np.count_nonzero(core)
    assert not (seg.mask & ndimage.binary_erosion(electrode, iterations=2)).any()
    np.testing.assert_array_equal(seg.measured_mask, seg.mask | seg.electrode)


def test_an_electrode_of_the_deposits_grey_stays_in_the_mask():
    """The same scene with the electrode the deposit's own grey: nothing tells them apart, so
    nothing is cut out of the deposit."""
    photo, electrode, deposit = _electrode_in_a_dense_core(0.26, seed=6)
    seg = segment(photo)

    assert seg.electrode is None
    assert np.count_nonzero(seg.mask & electrode) >= 0.95 * np.count_nonzero(electrode)
    np.testing.assert_array_equal(seg.measured_mask, seg.mask)


def test_a_wide_piece_beside_the_deposit_is_not_taken_for_a_broken_arm():
    """A cross of 4 px strokes, one arm broken by a 12 px gap (three widths), and a dark band
    20 px thick (a shadow cast by the wall, say) 14 px beyond another arm's tip: both lie
    within the eight widths that join broken arms, but only the arm is as thin as the
    deposit's strokes, so only it is kept."""
    rng = np.random.default_rng(8)
    h = w = 600
    rho = _ellipse((h, w), 300, 300, 285, 285, 0)
    photo = np.empty((h, w, 3))
    photo[:] = (0.35, 0.33, 0.30)
    photo[rho <= 1.0] = (0.80, 0.84, 0.86)
    cross = np.zeros((h, w), bool)
    cross[298:302, 180:421] = True
    cross[180:421, 298:302] = True
    arm = np.zeros((h, w), bool)
    arm[298:302, 433:481] = True
    band = np.zeros((h, w), bool)
    band[150:170, 310:461] = True
    photo[cross | arm] = (0.22, 0.18, 0.16)
    photo[band] = (0.30, 0.30, 0.32)
    photo = np.stack([ndimage.gaussian_filter(photo[..., k], 0.7) for k in range(3)], axis=-1)
    photo += rng.normal(0.0, 0.01, photo.shape)
    seg = segment(_to_uint8(photo))

    assert np.count_nonzero(seg.mask & cross) >= 0.9 * np.count_nonzero(cross)
    assert np.count_nonzero(seg.mask & arm) >= 0.9 * np.count_nonzero(arm)
    assert np.count_nonzero(seg.mask & band) <= 0.05 * np.count_nonzero(band)


def test_field_masks_are_the_ellipse_tested_pixel_by_pixel():
    """The field of view, cleared outside row by row from where the ellipse crosses each row,
    against the ellipse's own inequality (u / a)^2 + (v / b)^2 <= 1 at every pixel centre of
    full and reduced grids (a reduced pixel's centre lies at ``i * factor + (factor - 1) / 2``).
    Pixels within rounding of the outline may go either way."""
    from service.imaging.segmentation._common import Field, field_mask

    rng = np.random.default_rng(4)
    for _ in range(200):
        h, w = (int(v) for v in rng.integers(5, 160, 2))
        factor = int(rng.integers(1, 5))
        fov = Field(cy=float(rng.uniform(-20, h * factor + 20)), cx=float(rng.uniform(-20, w * factor + 20)),
                    a=float(rng.uniform(1.0, 200.0)), b=float(rng.uniform(1.0, 200.0)),
                    theta=float(rng.uniform(-math.pi, math.pi)), source="test")
        yy, xx = np.mgrid[:h, :w].astype(np.float64) * factor + (factor - 1) / 2.0
        u = (xx - fov.cx) * math.cos(fov.theta) + (yy - fov.cy) * math.sin(fov.theta)
        v = -(xx - fov.cx) * math.sin(fov.theta) + (yy - fov.cy) * math.cos(fov.theta)
        rho = (u / fov.a) ** 2 + (v / fov.b) ** 2
        got = field_mask((h, w), fov, factor)
        differ = got != (rho <= 1.0)
        assert not (differ & (np.abs(rho - 1.0) > 1e-9)).any()
