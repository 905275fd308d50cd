"""Films of simulated growth, rendered frame by frame: the film analysis must give back what
was drawn (arrival order, areas, the time the front reaches a radius), tell tip growth from
growth all over the front, and survive a camera shift and a corrupted frame."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import spearmanr

from service.film import FilmOptions, analyze_film
from service.film.synthetic import render_film
from tests.film.conftest import INTERVAL_S, true_max_radius


@pytest.fixture(scope="module")
def dla_result(dla_film):
    # the first 9 of 12 frames: the last three are the future the time to rim is checked against
    return analyze_film(dla_film.frames[:9], FilmOptions(frame_interval_s=INTERVAL_S), match=True)


def test_arrival_map_ranks_pixels_as_they_were_drawn(dla_film, dla_result):
    # Check: Spearman rank correlation (scipy.stats.spearmanr) between the recovered arrival
    # map and the frame each pixel was first drawn in, over pixels deposit in both; the
    # acceptance level 0.95 is the issue's.
    truth = np.where(dla_film.arrival <= 8, dla_film.arrival, -1)
    recovered = dla_result.arrival
    both = (recovered >= 0) & (truth >= 0)
    assert both.sum() > 0.9 * (truth >= 0).sum()
    rho = spearmanr(recovered[both], truth[both]).statistic
    assert rho >= 0.95, rho


def test_area_follows_the_drawn_masks_within_three_percent(dla_film, dla_result):
    # Check: the known drawn masks (the cluster's sites up to each frame's cut of the
    # arrival order, thickened to the drawn branch width, electrode included) pixel counted.
    growth = dla_result.to_dict()["growth"]
    assert growth["frame_index"] == list(range(9))
    assert growth["times_s"] == pytest.approx([k * INTERVAL_S for k in range(9)])
    drawn = np.array([int(m.sum()) for m in dla_film.truth[:9]])
    np.testing.assert_allclose(growth["area_px"], drawn, rtol=0.03)


def test_largest_radius_follows_the_drawn_masks(dla_film, dla_result):
    # Check: largest distance of a drawn pixel from the drawn seed; within a pixel and a half
    # (the seed is found as the electrode's centre, the outline read to the nearest pixel).
    growth = dla_result.to_dict()["growth"]
    drawn = [true_max_radius(m, dla_film.center_rc) for m in dla_film.truth[:9]]
    np.testing.assert_allclose(growth["max_radius_px"], drawn, atol=1.5)


@pytest.mark.parametrize("future_frame", [9, 11])
def test_time_to_rim_interval_holds_the_true_frame(dla_film, future_frame):
    # Check: a rim placed at the radius the drawn deposit reaches in a frame the film does not
    # show; the extrapolated time's 95% interval must hold that frame's time.
    pixel_size_mm = 0.05
    rim_px = true_max_radius(dla_film.truth[future_frame], dla_film.center_rc)
    result = analyze_film(dla_film.frames[:9], FilmOptions(frame_interval_s=INTERVAL_S, pixel_size_mm=pixel_size_mm,
                                                           rim_radius_mm=rim_px * pixel_size_mm), match=False)
    rim = result.to_dict()["time_to_rim_s"]
    lo, hi = rim["ci95"]
    assert lo <= future_frame * INTERVAL_S <= hi, rim
    assert hi - lo < 6 * INTERVAL_S  # an interval that says something
    body = result.to_dict()
    velocity = body["front_velocity_px_per_s"]
    assert velocity["ci95"][0] < velocity["value"] < velocity["ci95"][1]
    assert velocity["value_mm_per_s"] == pytest.approx(velocity["value"] * pixel_size_mm)


def test_short_circuit_caution_when_the_front_is_near_the_rim(dla_film):
    rim_px = true_max_radius(dla_film.truth[9], dla_film.center_rc)
    near = analyze_film(dla_film.frames[:9], FilmOptions(frame_interval_s=INTERVAL_S, pixel_size_mm=1.0,
                                                         rim_radius_mm=rim_px), match=False).to_dict()
    assert near["short_circuit_caution"] and near["short_circuit_caution"] in [w["text"] for w in near["warnings"]]
    far = analyze_film(dla_film.frames[:9], FilmOptions(frame_interval_s=INTERVAL_S, pixel_size_mm=1.0,
                                                        rim_radius_mm=10 * rim_px), match=False).to_dict()
    assert far["short_circuit_caution"] is None
    assert far["time_to_rim_s"]["value"] > near["time_to_rim_s"]["value"]


def test_time_to_rim_is_null_with_a_reason_without_a_pixel_size(dla_film):
    body = analyze_film(dla_film.frames[:4], FilmOptions(frame_interval_s=INTERVAL_S, rim_radius_mm=20.0),
                        match=False).to_dict()
    assert body["time_to_rim_s"]["value"] is None
    assert "pixel size" in body["time_to_rim_s"]["reason"]


def _nearer(value: float, family: float, other: float) -> bool:
    return abs(value - family) < abs(value - other)


def test_dla_film_grows_at_its_tips_and_eden_film_all_over_the_front(dla_result, eden_film):
    # Check: diffusion-limited growth adds at the tips (Witten & Sander, Phys. Rev. Lett. 47,
    # 1400, 1981), Eden growth all over the perimeter (Eden 1961); each film's tip growth share
    # must lie nearer the statistic of its own family, computed from the reference library's
    # stored arrival order at the same stages of growth, than to the other's.
    dla_key, eden_key = "dla neighborhood=von_neumann, sticking=1.0", "eden"
    dla_tip = dla_result.to_dict()["tip_growth_share"]
    eden_tip = analyze_film(eden_film.frames, FilmOptions(frame_interval_s=INTERVAL_S),
                            match=True).to_dict()["tip_growth_share"]
    for tip in (dla_tip, eden_tip):
        assert {dla_key, eden_key} <= set(tip["references"])
    assert _nearer(dla_tip["value"], dla_tip["references"][dla_key]["value"], dla_tip["references"][eden_key]["value"])
    assert _nearer(eden_tip["value"], eden_tip["references"][eden_key]["value"],
                   eden_tip["references"][dla_key]["value"])
    assert dla_tip["value"] > 2 * eden_tip["value"]


def test_final_frame_is_analysed_like_a_photograph(dla_result):
    final = dla_result.to_dict()["final"]
    assert {"features", "segmentation", "matches", "warnings"} <= set(final)
    assert final["features"]["box_dimension"]["value"] == pytest.approx(
        dla_result.final.features.box_dimension.value)


def test_camera_shift_and_a_corrupted_frame_are_registered_flagged_and_nothing_is_lost(dla_order, dla_film):
    # Check: the drawn masks again; frames 3..7 moved by (3, -2) px as a nudged camera does,
    # frame 4 replaced by noise. Registration must find the shift exactly (phase correlation,
    # skimage.registration), frame 4 must be flagged and left out, the rest read as before.
    film = render_film(dla_order, 8, seed=5, size_px=512, interval_s=INTERVAL_S, first_share=0.3,
                       shifts_px={k: (3, -2) for k in range(3, 8)})
    frames = list(film.frames)
    frames[4] = np.random.default_rng(0).integers(0, 256, size=frames[4].shape, dtype=np.uint8)
    body = analyze_film(frames, FilmOptions(frame_interval_s=INTERVAL_S), match=False).to_dict()
    growth = body["growth"]
    assert body["frames"] == 8
    assert growth["frame_index"] == [0, 1, 2, 3, 5, 6, 7]
    assert [item["frame"] for item in growth["left_out"]] == [4]
    assert any(w["code"] == "frame_left_out" and w["text"].startswith("frame 4 ") for w in body["warnings"])
    assert growth["registration_shift_rc_px"][3:] == [[-3.0, 2.0]] * 4
    assert growth["registration_shift_rc_px"][:3] == [[0.0, 0.0]] * 3
    drawn = np.array([int(film.truth[k].sum()) for k in growth["frame_index"]])
    np.testing.assert_allclose(growth["area_px"], drawn, rtol=0.03)


def test_a_frame_where_the_deposit_shrinks_is_flagged(dla_film):
    # frame 5 shows frame 1 again: deposit cannot shrink, so it is left out, not used
    frames = list(dla_film.frames[:8])
    frames[5] = dla_film.frames[1]
    body = analyze_film(frames, FilmOptions(frame_interval_s=INTERVAL_S), match=False).to_dict()
    left = body["growth"]["left_out"]
    assert [item["frame"] for item in left] == [5]
    assert "shrank" in left[0]["reason"]
    assert np.all(np.diff(body["growth"]["area_px"]) > 0)


def test_a_bright_deposit_on_a_dark_solution_is_followed_alike(dla_order):
    # Check: the drawn masks of a deposit lit from the side (bright on dark solution).
    film = render_film(dla_order, 5, seed=5, size_px=512, interval_s=INTERVAL_S, first_share=0.3, polarity="bright")
    body = analyze_film(film.frames, FilmOptions(frame_interval_s=INTERVAL_S), match=False).to_dict()
    assert body["scene"]["levels_compare"] == "above"
    assert body["growth"]["frame_index"] == list(range(5))
    np.testing.assert_allclose(body["growth"]["area_px"], [int(m.sum()) for m in film.truth], rtol=0.03)


def test_a_camera_that_sets_its_own_exposure_is_followed(dla_film):
    # Check: the drawn masks again, with the earlier frames darker by up to 20% as a camera
    # that brightens its exposure while a dark deposit spreads gives them.
    frames = [np.clip(f.astype(np.float32) * (0.8 + 0.025 * k), 0, 255).astype(np.uint8)
              for k, f in enumerate(dla_film.frames[:9])]
    body = analyze_film(frames, FilmOptions(frame_interval_s=INTERVAL_S), match=False).to_dict()
    growth = body["growth"]
    assert growth["frame_index"] == list(range(9))
    np.testing.assert_allclose(growth["exposure_vs_last_frame"], [(0.8 + 0.025 * k) / 1.0 for k in range(9)],
                               atol=0.02)
    np.testing.assert_allclose(growth["area_px"], [int(m.sum()) for m in dla_film.truth[:9]], rtol=0.03)


def test_frames_before_growth_starts_are_left_out_without_alarm(dla_order):
    # No deposit yet (the dish painted over where the deposit will be, no electrode) is no fault
    # of the frame; a blank frame later on is.
    from scipy import ndimage

    film = render_film(dla_order, 6, seed=5, size_px=384, interval_s=INTERVAL_S, first_share=0.3, electrode=False)
    empty = film.frames[0].copy()
    cover = ndimage.binary_dilation(film.truth[-1], iterations=6)
    ring = ndimage.binary_dilation(cover, iterations=6) & ~cover
    empty[cover] = np.median(empty[ring], axis=0).astype(np.uint8)
    frames = [empty, empty] + list(film.frames[1:])
    frames[4] = np.zeros_like(frames[4])
    body = analyze_film(frames, FilmOptions(frame_interval_s=INTERVAL_S), match=False).to_dict()
    left = {item["frame"]: item for item in body["growth"]["left_out"]}
    assert set(left) == {0, 1, 4}
    assert not left[0]["flagged"] and not left[1]["flagged"] and left[4]["flagged"]
    assert [w["text"].split(" ")[1] for w in body["warnings"] if w["code"] == "frame_left_out"] == ["4"]
    assert body["growth"]["frame_index"] == [2, 3, 5, 6]
