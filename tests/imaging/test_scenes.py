"""Automatic segmentation judged on randomized bench photographs of known deposits.

The photographs come from ``tests/imaging/scenes.py``, a renderer written for this bench
independently of ``service.imaging.render``: simulated clusters of every regime drawn in a
dish on a bench with every nuisance of issue 9 switched on or off by the seed. The
segmentation is called through the public API with everything automatic, and judged by the
overlap (IoU) with the true deposit and by the box dimension of its mask against that of
the true mask (``service.features.measure``). The targets (IoU >= 0.85 on at least 95% of
scenes; box dimension within 0.05) are the acceptance figures of issue 9.

Developers: ``python scripts/scene_check.py N --save-worst K --out DIR`` runs the same
scenes and saves the worst readings as pictures.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage

from tests.imaging.scenes import (
    SWITCH_ODDS,
    judge,
    random_deposit,
    random_scene,
    render_scene,
    report,
    scene_switches,
    summary,
)

IOU_FLOOR = 0.85
SHARE_REQUIRED = 0.95
#: What the segmentation reaches today (on seeds 0-299, measured 2026-12-03: 95.0% of scenes
#: by IoU, 95.9% of 295 by dimension, both on 92.2%), less a margin: a drop below it is a
#: regression even where issue 9's target, SHARE_REQUIRED, is still met.
SHARE_REACHED = 0.93
DIMENSION_TOLERANCE = 0.05
#: Scenes of the slow test (seeds 0 .. N-1): about four minutes on one core, rendering,
#: segmentation and two measurements included.
N_SLOW_SCENES = 300

# A handful for quick edit-test loops, one per kind of trouble (see their summaries):
# dark deposit on a solution lighter than the bench with tape, wire and a shadow (7);
# bright deposit inside a lighter ring with a wire and glare (8); the same cut by the
# frame under a shadow (28); a dense bright deposit crossed by a wire (33); a dense dark
# deposit with tape and a shadow (55); a dark deposit on a solution darker than the bench
# with tape, wire and glare (3).
QUICK_SEEDS = (3, 7, 8, 28, 33, 55)
#: Quick scenes the segmentation still reads wrong (issue 9 stays open for them).
QUICK_NOT_YET = {7: "a sharp-edged shadow band across the dish is still taken with the dark deposit: the "
                    "reading that takes both outscores the deposit alone, which looks like a part of it"}


# ----------------------------------------------------------------------------- the bench itself


def test_same_seed_same_scene_other_seed_other_scene():
    a, b, c = random_scene(3), random_scene(3), random_scene(4)
    np.testing.assert_array_equal(a.photo, b.photo)
    np.testing.assert_array_equal(a.truth, b.truth)
    assert a.description == b.description
    assert a.photo.shape != c.photo.shape or not np.array_equal(a.photo, c.photo)


def test_every_nuisance_is_drawn_in_some_scenes_and_not_in_others_independently():
    seeds = range(400)
    table = np.array([[scene_switches(s)[0][name] for name in SWITCH_ODDS] for s in seeds])
    share = table.mean(axis=0)
    assert np.all(share > 0.05) and np.all(share < 0.95), dict(zip(SWITCH_ODDS, share.round(2)))
    # Independent switches: no two of them agree on (nearly) every scene.
    for i in range(table.shape[1]):
        for j in range(i + 1, table.shape[1]):
            assert np.mean(table[:, i] == table[:, j]) < 0.9, (list(SWITCH_ODDS)[i], list(SWITCH_ODDS)[j])
    polarity = [scene_switches(s)[1] for s in seeds]
    bench = [scene_switches(s)[2] for s in seeds]
    assert 0.35 < polarity.count("dark") / len(polarity) < 0.65
    assert 0.35 < bench.count("lighter") / len(bench) < 0.65


# Scenes whose wire crosses the deposit to an electrode inside it (which scenes do depends on
# the clusters the simulators grow for them).
@pytest.mark.parametrize("seed", [5, 8])
def test_the_truth_is_the_visible_deposit_in_the_photo(seed):
    """The truth is darker (or brighter) than the solution around it, inside the dish, and
    leaves out the electrode and the wire drawn over it."""
    scene = random_scene(seed)
    d = scene.description
    h, w = scene.truth.shape
    assert 400 <= max(h, w) <= 900 and scene.photo.shape == (h, w, 3) and scene.photo.dtype == np.uint8
    assert scene.truth.sum() == d["truth_area_px"] > 500
    gray = scene.photo.astype(float) @ np.array([0.299, 0.587, 0.114])
    core = ndimage.binary_erosion(scene.truth, iterations=1)
    ring = ndimage.binary_dilation(scene.truth, iterations=8) & ~ndimage.binary_dilation(scene.truth, iterations=4)
    contrast = np.median(gray[core]) - np.median(gray[ring])
    assert (contrast < -30) if d["polarity"] == "dark" else (contrast > 30), contrast
    # Inside the dish ellipse described.
    cx, cy = d["dish"]["center_xy"]
    t = np.deg2rad(d["dish"]["angle_deg"])
    rows, cols = np.nonzero(scene.truth)
    qa = np.cos(t) * (cols - cx) + np.sin(t) * (rows - cy)
    qb = (-np.sin(t) * (cols - cx) + np.cos(t) * (rows - cy)) / d["dish"]["axes_ratio"]
    assert np.hypot(qa, qb).max() < d["dish"]["radius_px"]
    assert not (scene.truth & ~scene.parts["solution"]).any()
    # Both scenes draw an electrode and a wire to it, across the deposit: neither is truth.
    electrode, wire = scene.parts["electrode"], scene.parts["wire"]
    assert not (scene.truth & (electrode | wire)).any()
    near_deposit = ndimage.binary_dilation(scene.truth, iterations=3)
    assert (near_deposit & wire & ~ndimage.binary_dilation(electrode, iterations=3)).any()
    _, n = ndimage.label(~scene.truth)
    assert n >= 2  # the background and at least the electrode's hole


@pytest.mark.parametrize("seed", [33, 102])
def test_dense_deposits_spread_over_about_half_the_dish(seed):
    """A dense deposit spans about half the dish (or more) and covers much of what it spans."""
    sites, info = random_deposit(seed, dense=True)
    scene = render_scene(sites, seed, dense=True, deposit_info=info)
    deposit = scene.description["deposit"]
    assert 0.45 <= deposit["envelope_of_dish"] <= 0.85, summary(scene.description)
    assert deposit["fill_of_dish"] >= 0.25, summary(scene.description)


def test_branches_are_drawn_at_least_three_pixels_wide_and_not_blurred_away():
    """The bench never asks for lines a blurred, compressed photograph cannot hold."""
    for seed in (0, 5, 13, 40, 70):
        scene = random_scene(seed)
        lo, hi = scene.description["deposit"]["branch_width_px"]
        assert 3.0 <= lo <= hi
        # ... nor blurs them beyond a quarter of the narrowest branch.
        assert scene.description["nuisances"]["soft_edges_px"] <= max(0.5, 0.25 * lo)


# ----------------------------------------------------------------------------- segmentation


def _check(records, descriptions):
    text = report(records, descriptions, iou_floor=IOU_FLOOR)
    print()
    print(text)
    ious = np.array([r["iou"] for r in records])
    share = float(np.mean(ious >= IOU_FLOOR))
    usable = [r for r in records if r["d_usable"]]
    dim_ok = [r["d_seg"] is not None and abs(r["d_seg"] - r["d_true"]) <= DIMENSION_TOLERANCE for r in usable]
    dim_share = float(np.mean(dim_ok)) if usable else 1.0
    return text, share, dim_share, len(usable)


@pytest.mark.parametrize("seed", [
    pytest.param(seed, marks=pytest.mark.xfail(strict=True, reason=QUICK_NOT_YET[seed])) if seed in QUICK_NOT_YET
    else seed for seed in QUICK_SEEDS])
def test_quick_scene(seed):
    """One scene per kind of trouble; each must be read like the slow bench asks of 95%."""
    scene = random_scene(seed)
    record = judge(scene)
    where = f"IoU {record['iou']:.3f} error {record['error']}: {summary(scene.description)}"
    assert record["iou"] >= IOU_FLOOR, where  # issue 9's acceptance floor
    if record["d_usable"]:
        assert record["d_seg"] is not None, where
        assert abs(record["d_seg"] - record["d_true"]) <= DIMENSION_TOLERANCE, (
            f"D {record['d_true']:.3f} -> {record['d_seg']:.3f}; {where}")


@pytest.fixture(scope="module")
def bench_results():
    records, descriptions = [], {}
    for seed in range(N_SLOW_SCENES):
        scene = random_scene(seed)
        record = judge(scene)
        record.pop("mask")
        records.append(record)
        descriptions[seed] = scene.description
    return (*_check(records, descriptions), N_SLOW_SCENES)


@pytest.mark.slow
def test_randomized_bench_photographs_hold_the_level_reached(bench_results):
    text, share, dim_share, n_usable, n = bench_results
    assert n_usable >= 0.8 * n, f"only {n_usable} true masks have a usable dimension fit"
    assert share >= SHARE_REACHED, f"IoU >= {IOU_FLOOR} on {share:.1%} of scenes\n{text}"
    assert dim_share >= SHARE_REACHED, (
        f"box dimension within {DIMENSION_TOLERANCE} on {dim_share:.1%} of {n_usable} scenes\n{text}")


@pytest.mark.slow
def test_randomized_bench_photographs_meet_the_target(bench_results):
    text, share, dim_share, n_usable, _ = bench_results
    # Issue 9: IoU >= 0.85 on at least 95% of the scenes ...
    assert share >= SHARE_REQUIRED, f"IoU >= {IOU_FLOOR} on {share:.1%} of scenes\n{text}"
    # ... and the box dimension within 0.05 of the true mask's.
    assert dim_share >= SHARE_REQUIRED, (
        f"box dimension within {DIMENSION_TOLERANCE} on {dim_share:.1%} of {n_usable} scenes\n{text}")
