"""Skeleton graph of drawn trees with known topology."""

import numpy as np
import pytest

from service.errors import SpecimenError
from service.features import skeleton_graph
from tests.features import shapes


@pytest.fixture(scope="module")
def tree():
    mask, truth = shapes.binary_tree(6, width_px=7.0)
    return mask, truth, skeleton_graph(mask, center_rc=truth["foot_rc"])


def test_tips_junctions_and_branches_are_exact(tree):
    _, truth, graph = tree
    # Exact topology of the drawn perfect binary tree (shapes.binary_tree docstring).
    assert graph.tips == truth["tips"] == 33
    assert graph.junctions == truth["junctions"] == 31
    assert graph.branches == truth["branches"] == 63
    assert graph.tips_rc.shape == (33, 2) and graph.junctions_rc.shape == (31, 2)


def test_bare_skeleton_overcounts(tree):
    _, truth, graph = tree
    # Square stroke ends fork the bare skeleton (issue 3: about a third too many).
    assert graph.bare_tips >= 1.25 * truth["tips"]
    assert graph.bare_junctions >= 1.25 * truth["junctions"]


def test_horton_strahler_of_perfect_binary_tree(tree):
    _, truth, graph = tree
    s = graph.strahler
    # Horton-Strahler ordering of a perfect binary tree of depth k: order k, 2^(k - w)
    # streams of order w, bifurcation ratio exactly 2 (CHECK_VALUES.md, exact).
    assert s.max_order == truth["strahler_order"] == 6
    assert s.stream_counts == tuple(2 ** (6 - w) for w in range(1, 7))
    assert s.bifurcation_ratio == pytest.approx(2.0, abs=1e-9)
    # Each generation is drawn 0.6 times as long as its parent, so stream lengths grow by
    # 1 / 0.6 per order (geometry of the drawing); leaves lose their end caps to the
    # skeleton, hence the tolerance.
    assert s.length_ratio == pytest.approx(1 / 0.6, rel=0.08)


def test_angles_widths_and_tortuosity(tree):
    mask, truth, graph = tree
    # Drawn geometry: every split opens by 2 x 35 degrees; strokes 7 px wide and straight.
    assert graph.branching_angles_deg.size == truth["junctions"]
    assert np.median(graph.branching_angles_deg) == pytest.approx(truth["branching_angle_deg"], abs=4)
    assert np.median(graph.widths_px) == pytest.approx(7.0, abs=1.0)
    assert np.median(graph.tortuosity) < 1.03
    # The cleaned skeleton lies on the specimen; its length is the drawn centre-line
    # length less at most one stroke width at each of the 33 free ends, where the
    # skeleton stops short of the square cap.
    assert mask[graph.skeleton_mask].all()
    drawn = 260 * sum(2**g * 0.6**g for g in range(6))
    assert drawn - 33 * 7.0 <= graph.total_length_px <= drawn


def test_straight_bar_has_two_tips_and_no_junction():
    bar = np.zeros((60, 300), dtype=bool)
    bar[25:36, 20:280] = True  # 11 px thick, square ends: a bare skeleton forks at both
    graph = skeleton_graph(bar)
    assert (graph.tips, graph.junctions, graph.branches) == (2, 0, 1)
    assert graph.strahler.max_order == 1


def test_stubby_cross_keeps_two_arms():
    # Four arms, each shorter than the spur limit: pruning may not erase the specimen,
    # so the two longest arms survive as one branch.
    cross = np.zeros((80, 80), dtype=bool)
    cross[33:48, 14:66] = True
    cross[14:66, 33:48] = True
    graph = skeleton_graph(cross)
    assert (graph.tips, graph.junctions, graph.branches) == (2, 0, 1)


def test_ring_keeps_its_cycle():
    yy, xx = np.mgrid[:200, :200]
    r = np.hypot(yy - 100, xx - 100)
    ring = (r > 60) & (r < 70)
    graph = skeleton_graph(ring)
    # One closed branch, no tips or junctions; its length is the mid-circle's, 2 pi 65.
    assert (graph.tips, graph.junctions, graph.branches) == (0, 0, 1)
    assert graph.total_length_px == pytest.approx(2 * np.pi * 65, rel=0.02)


def test_bad_input():
    with pytest.raises(SpecimenError):
        skeleton_graph(np.zeros((10, 10), dtype=bool))
    with pytest.raises(ValueError):
        skeleton_graph(np.ones((5, 5)), prune_widths=-1)


def test_shared_skeleton_is_scikit_images_and_never_shared_by_reference():
    """skeleton_of keeps the last thinning for the next caller with the same mask; the
    answer must stay skimage.morphology.skeletonize's (the reference library) for every mask."""
    from scipy import ndimage
    from skimage.morphology import skeletonize

    from service.features._common import skeleton_of

    rng = np.random.default_rng(3)
    masks = [ndimage.binary_dilation(rng.random((60, 80)) < 0.05, iterations=2) for _ in range(3)]
    for mask in (*masks, masks[0], masks[0]):
        np.testing.assert_array_equal(skeleton_of(mask), skeletonize(mask))
    first = skeleton_of(masks[1])
    first[:] = True  # a caller changing its copy must not change what the next one gets
    np.testing.assert_array_equal(skeleton_of(masks[1]), skeletonize(masks[1]))
    changed = masks[1].copy()
    changed[30, 40] = ~changed[30, 40]
    np.testing.assert_array_equal(skeleton_of(changed), skeletonize(changed))


@pytest.mark.parametrize("seed", range(4))
def test_traced_branches_cover_every_chain_pixel_once_and_step_between_neighbours(seed):
    """The branch walk, checked against the definition of a skeleton graph rather than its
    own method: on a thinned random pattern (a ring across it, junction clusters), every
    pixel with two skeleton neighbours lies inside exactly one branch, every other skeleton
    pixel only at branch ends, each branch steps between 8-neighbours from a node to a node,
    and the node ids are those of its end pixels (a ring without a node gets one new node at
    one of its pixels, a lone pixel no branch). The step count is the number of skeleton
    adjacencies: each adjacency is walked once, except those between two pixels of one
    junction, which no branch walks."""
    from scipy import ndimage
    from skimage.morphology import skeletonize

    from service.features.skeleton import _NEIGHBOURS, _trace_branches

    rng = np.random.default_rng(seed)
    skel = skeletonize(ndimage.binary_dilation(rng.random((90, 110)) < 0.03 + 0.02 * seed, iterations=seed % 2))
    yy, xx = np.mgrid[:90, :110]
    skel |= np.abs(np.hypot(yy - 45, xx - 55) - 30) < 0.6  # a ring through the pattern
    skel[:22, :22] = False
    corner = np.hypot(yy[:22, :22] - 11, xx[:22, :22] - 11)
    skel[:22, :22] = skeletonize((corner > 4) & (corner < 8))  # a ring alone
    skel[80:, 100:] = False
    skel[84, 104] = True  # a lone pixel
    skel[0], skel[-1], skel[:, 0], skel[:, -1] = False, False, False, False
    count = ndimage.convolve(skel.astype(np.uint8), np.array([[1, 1, 1], [1, 0, 1], [1, 1, 1]]), mode="constant")
    degree = np.where(skel, count, 0)
    junction, n_junction = ndimage.label(degree >= 3, structure=np.ones((3, 3)))
    labels = junction.astype(np.int32)
    tips = skel & (degree == 1)
    labels[tips] = n_junction + 1 + np.arange(np.count_nonzero(tips))
    given = labels.copy()
    indptr, rows, cols, start, end = _trace_branches(skel.view(np.uint8), labels, _NEIGHBOURS)

    inside = np.zeros(skel.shape, dtype=int)
    placed = np.zeros(skel.shape, dtype=bool)
    steps = 0
    for k in range(start.size):
        r, c = rows[indptr[k]: indptr[k + 1]], cols[indptr[k]: indptr[k + 1]]
        assert r.size >= 2
        assert np.all(np.maximum(np.abs(np.diff(r)), np.abs(np.diff(c))) == 1)
        np.add.at(inside, (r[1:-1], c[1:-1]), 1)
        for end_rc, node in ((0, start[k]), (-1, end[k])):
            here = given[r[end_rc], c[end_rc]]
            assert here == node or (here == 0 and node > given.max())  # a node placed on a cycle
            placed[r[end_rc], c[end_rc]] |= here == 0
        steps += r.size - 1
    chain = skel & (degree == 2) & ~placed
    assert np.count_nonzero(placed) >= 1 and not placed[84, 104]
    assert np.all(inside[chain] == 1) and not inside[skel & ~chain].any() and not inside[~skel].any()
    junction_px = junction > 0
    pairs = 0
    for step in ((0, 1), (1, -1), (1, 0), (1, 1)):  # each adjacency once; the border is empty, nothing wraps
        there = np.roll(skel, (-step[0], -step[1]), axis=(0, 1))
        both_junction = junction_px & np.roll(junction_px, (-step[0], -step[1]), axis=(0, 1))
        pairs += np.count_nonzero(skel & there & ~both_junction)
    assert steps == pairs
