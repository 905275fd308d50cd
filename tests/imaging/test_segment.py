"""Segmentation against masks known exactly, and on a real fundus photograph nobody here made."""

from __future__ import annotations

import io
import json

import numpy as np
import pytest
from PIL import Image

from service.errors import SpecimenError
from service.features.dimension import box_counting
from service.imaging import load_image, render_specimen, segment
from tests.imaging.masks import filled_disk, random_tree, sierpinski_triangle, vicsek


def iou(a: np.ndarray, b: np.ndarray) -> float:
    return float(np.count_nonzero(a & b) / np.count_nonzero(a | b))


# Known masks, each rendered as a photograph of a specimen in a dish: thickened, blurred,
# tinted, unevenly lit, with a rim, a centre electrode, sensor noise and (mostly) JPEG.
RENDERINGS = {
    "tree-dark-jpeg": (lambda: random_tree(256, seed=11), dict(polarity="dark", thickness_px=7.0, jpeg_quality=85)),
    "tree-bright": (lambda: random_tree(256, seed=12), dict(polarity="bright", thickness_px=7.0, noise=0.035)),
    "vicsek-dark-jpeg": (lambda: vicsek(4), dict(polarity="dark", jpeg_quality=80, blur_px=1.5)),
    "vicsek-bright-jpeg": (lambda: vicsek(4), dict(polarity="bright", jpeg_quality=70, uneven_light=0.5)),
    "sierpinski-bright-jpeg": (lambda: sierpinski_triangle(6), dict(polarity="bright", jpeg_quality=90,
                                                                   seed_rc=(42, 21))),
}


@pytest.fixture(scope="module", params=sorted(RENDERINGS))
def rendered_case(request):
    make_mask, options = RENDERINGS[request.param]
    rendered = render_specimen(make_mask(), seed=len(request.param), size_px=1024, **options)
    return request.param, rendered, segment(rendered.image)


def test_recovered_mask_overlaps_the_drawn_one(rendered_case):
    name, rendered, seg = rendered_case
    # Issue 3 asks for IoU >= 0.85 against the mask drawn.
    assert iou(seg.mask, rendered.truth) >= 0.85, name
    assert seg.settings["mode"] == "threshold"
    assert seg.settings["polarity"] == rendered.polarity  # detected, not given
    assert seg.settings["field_of_view"]["source"] == "dish rim"
    assert seg.warnings == []


def test_box_dimension_survives_the_photograph(rendered_case):
    name, rendered, seg = rendered_case
    truth_d = box_counting(rendered.truth).value
    found_d = box_counting(seg.mask).value
    # Issue 3: the box dimension moves by less than 0.05 from the truth's.
    assert abs(found_d - truth_d) < 0.05, (name, truth_d, found_d)


def test_rim_and_outside_are_excluded_and_the_electrode_is_the_seed(rendered_case):
    name, rendered, seg = rendered_case
    rows, cols = np.nonzero(seg.mask)
    dish = np.hypot(rows - rendered.dish_center_rc[0], cols - rendered.dish_center_rc[1])
    assert dish.max() < rendered.dish_radius_px  # nothing of the rim, nothing outside
    electrode = seg.settings["electrode"]
    assert electrode is not None, name
    assert np.hypot(*(np.array(seg.center_rc) - np.array(rendered.center_rc))) < 2.0
    assert 0.7 * 15.4 < electrode["radius_px"] < 1.3 * 15.4  # drawn at 1.5% of 1024 px


def test_plain_background_without_dish_or_electrode():
    tree = random_tree(256, seed=21)
    rendered = render_specimen(tree, seed=5, size_px=800, thickness_px=7.0, dish_rim=False, electrode=False,
                               jpeg_quality=85)
    seg = segment(rendered.image)
    assert seg.settings["field_of_view"] == {"source": "whole image"}
    assert seg.settings["electrode"] is None
    assert iou(seg.mask, rendered.truth) >= 0.85
    rows, cols = np.nonzero(seg.mask)
    np.testing.assert_allclose(seg.center_rc, (rows.mean(), cols.mean()))


def test_loaded_image_and_array_give_the_same_mask():
    rendered = render_specimen(random_tree(200, seed=2), seed=2, size_px=512, thickness_px=6.0)
    buffer = io.BytesIO()
    Image.fromarray(rendered.image).save(buffer, format="PNG")
    from_file = segment(load_image(buffer.getvalue()))
    from_array = segment(rendered.image)
    np.testing.assert_array_equal(from_file.mask, from_array.mask)
    assert from_file.overlay.shape == rendered.image.shape and from_file.overlay.dtype == np.uint8
    outline = np.all(from_file.overlay == (255, 0, 255), axis=2)
    assert outline.any() and not (outline & ~from_file.mask).any()  # the outline lies on the mask
    json.dumps(from_file.to_dict())  # settings are plain data


def test_compact_specimen_is_kept_whole_and_flagged():
    rendered = render_specimen(filled_disk(128), seed=2, size_px=600, polarity="bright")
    seg = segment(rendered.image)
    assert iou(seg.mask, rendered.truth) >= 0.95
    assert any("compact blob" in w for w in seg.warnings)


def test_coins_on_a_table_are_several_objects_and_the_ranking_says_none_of_them_is_in_the_library():
    # scikit-image's coins photograph (an open image the package ships): two dozen separate
    # coins of one size, not one aggregate. The reading keeps the coin nearest the centre and
    # says how many others of its size it left out; the ranking then puts it outside the
    # library of clusters that each grew alone from one seed, however round the coin is.
    from skimage import data

    from service.analysis import analyze

    buffer = io.BytesIO()
    Image.fromarray(data.coins()).save(buffer, format="PNG")
    result = analyze(buffer.getvalue()).to_dict()
    assert result["segmentation"]["cleanup"]["left_out_comparable"] >= 10
    codes = {w["code"] for w in result["warnings"]}
    assert {"several_objects", "one_of_several"} <= codes
    assert result["in_library"] is False
    assert not result["explanation"]["verdict"]["confident"]


def test_pieces_left_out_are_counted_against_the_specimens_size():
    # keep_specimen on drawn masks: a tree at the centre with one block of half its area far
    # off (a label) leaves out one comparable piece; a grid of equal discs leaves out all
    # but the one at the seed; specks under a quarter of the specimen are not counted.
    from service.imaging.segmentation.cleanup import SEVERAL_OBJECTS, keep_specimen

    mask = np.zeros((600, 600), dtype=bool)
    tree = random_tree(200, seed=3)
    mask[200:400, 200:400] = tree
    side = int(np.sqrt(0.5 * mask.sum()))
    mask[5:5 + side // 4, 5:5 + 4 * side] = True
    mask[590:594, 590:594] = True  # a speck
    _, info = keep_specimen(mask, (300.0, 300.0), 3.0, keep_all=False)
    assert info["left_out_comparable"] == 1 < SEVERAL_OBJECTS

    discs = np.zeros((600, 600), dtype=bool)
    yy, xx = np.mgrid[:600, :600]
    for cy in range(60, 600, 120):
        for cx in range(60, 600, 120):
            discs |= (yy - cy) ** 2 + (xx - cx) ** 2 <= 30 ** 2
    kept, info = keep_specimen(discs, (300.0, 300.0), 3.0, keep_all=False)
    assert info["components_kept"] == 1 and kept[300, 300]
    assert info["left_out_comparable"] == 24


def test_warnings_for_frame_rim_and_low_contrast():
    frame = np.full((300, 300), 0.8, dtype=np.float32)
    frame[145:155, :] = 0.3
    frame[:, 145:155] = 0.3
    frame += np.random.default_rng(0).normal(0.0, 0.02, frame.shape).astype(np.float32)
    assert any("image frame" in w for w in segment(np.clip(frame, 0, 1)).warnings)

    tree = random_tree(256, seed=11)
    to_rim = render_specimen(tree, seed=3, size_px=600, thickness_px=7.0, extent=1.0)
    assert any("dish rim" in w for w in segment(to_rim.image).warnings)


def test_a_specimen_lost_in_noise_is_flagged_as_low_contrast():
    """The reading takes the darker electrode alone, a little off the field's centre: the few
    of its rim pixels beyond the disc left out round the centre must not vouch for a deposit."""
    faint = render_specimen(random_tree(256, seed=11), seed=3, size_px=600, thickness_px=7.0, noise=0.03,
                            tint={"specimen": (0.64, 0.74, 0.82)})
    assert any("low contrast" in w for w in segment(faint.image).warnings)


def test_overrides_are_used_and_reported():
    rendered = render_specimen(random_tree(256, seed=11), seed=3, size_px=600, thickness_px=7.0)
    given = segment(rendered.image, threshold=0.5, polarity="dark")
    assert given.settings["threshold"] == 0.5 and given.settings["threshold_method"] == "given"
    assert given.settings["polarity_source"] == "given"

    roi = segment(rendered.image, roi=(300.0, 300.0, 150.0))
    assert roi.settings["field_of_view"]["source"] == "roi"
    rows, cols = np.nonzero(roi.mask)
    assert np.hypot(rows - 300.0, cols - 300.0).max() <= 150.0
    assert any("field edge" in w for w in roi.warnings)  # the tree reaches beyond the circle

    ridge = segment(rendered.image, mode="ridge")
    assert ridge.settings["mode"] == "ridge" and ridge.settings["mode_requested"] == "ridge"
    assert iou(ridge.mask, rendered.truth) >= 0.7  # vesselness works on dark branches too


def test_bad_input_is_refused_clearly():
    with pytest.raises(SpecimenError, match="uniform"):
        segment(np.full((64, 64), 0.5, dtype=np.float32))
    with pytest.raises(SpecimenError, match="16 x 16"):
        segment(np.zeros((8, 8), dtype=np.uint8))
    image = np.zeros((64, 64), dtype=np.uint8)
    with pytest.raises(ValueError, match="mode"):
        segment(image, mode="watershed")
    with pytest.raises(ValueError, match="threshold"):
        segment(image, threshold=1.5)
    with pytest.raises(ValueError, match="roi"):
        segment(image, roi=(10.0, 10.0, -1.0))
    with pytest.raises(ValueError, match="float image"):
        segment(np.full((64, 64), 2.0))


@pytest.mark.slow
def test_peak_memory_on_4096_photo_stays_small():
    import tracemalloc

    mask = np.kron(random_tree(256, seed=2), np.ones((16, 16), dtype=bool))
    gray = np.where(mask | np.roll(mask, 4, 0) | np.roll(mask, 4, 1), np.float32(0.3), np.float32(0.8))
    gray += np.random.default_rng(1).normal(0.0, 0.02, gray.shape).astype(np.float32)
    np.clip(gray, 0.0, 1.0, out=gray)
    tracemalloc.start()
    segment(gray)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    # The whole analysis of a 4096 x 4096 photo must stay under 1.5 GB (issue 3).
    assert peak < 700e6, peak


# ----------------------------------------------------------------------------- a real photograph


@pytest.fixture(scope="module")
def retina():
    from skimage import data

    photo = data.retina()  # fundus photograph bundled with scikit-image (retina.jpg), no download
    return photo, segment(photo)


def test_fundus_photograph_is_segmented_in_ridge_mode_inside_its_field(retina):
    photo, seg = retina
    assert seg.settings["mode"] == "ridge"
    assert seg.settings["mode_requested"] == "auto"
    assert seg.settings["field_of_view"]["source"] == "dark surround"
    # Inside the field of view: nothing on the black surround of the fundus camera.
    assert photo[..., 0][seg.mask].min() > 40
    fov = seg.settings["field_of_view"]
    rows, cols = np.nonzero(seg.mask)
    assert np.hypot(rows - fov["center_rc"][0], cols - fov["center_rc"][1]).max() <= fov["radius_px"]
    # Vessels cover about an eighth of the field in manual annotations of fundus photographs
    # (DRIVE database, Staal et al., IEEE Trans. Med. Imaging 23, 501, 2004; from memory).
    share = seg.mask.sum() / (np.pi * fov["radius_px"] ** 2)
    assert 0.05 < share < 0.2, share


def test_fundus_vessel_box_dimension_in_the_published_range(retina):
    _, seg = retina
    d = box_counting(seg.mask).value
    # Box dimension of vessels segmented from ordinary fundus photographs: about 1.4-1.5 in
    # population studies (from memory); about 1.7 for angiograms by density correlation
    # (Family, Masters & Platt, Physica D 38, 98, 1989; from memory). A tolerant band
    # around both, which a blob (2), a line (1) or speckle would miss.
    assert 1.35 <= d <= 1.75, d
