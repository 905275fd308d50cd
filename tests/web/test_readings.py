"""The overrides of a new reading: what is kept, what returns to automatic, what an alternative sets."""

from __future__ import annotations

import math

import pytest
from pydantic import ValidationError

from service.web.readings import Reanalysis, check_against_image, options_fields, resolve

_ANALYSIS = {"segmentation": {"alternatives": [
    {"label": "the specimen brighter than the solution", "overrides": {"polarity": "bright", "threshold": 0.62},
     "score": 0.41},
    {"label": "the whole frame as field", "overrides": {"roi": [50.0, 40.0, 30.0]}, "score": 0.2},
]}}


def test_left_out_fields_keep_the_last_reading_and_null_returns_to_automatic():
    previous = {"polarity": "dark", "roi": [10.0, 20.0, 30.0], "exclude": [[0, 0, 5, 5]]}
    requested, taken = resolve(Reanalysis.model_validate({"threshold": 0.3, "roi": None}), previous, _ANALYSIS)
    assert requested == {"polarity": "dark", "threshold": 0.3, "exclude": [[0, 0, 5, 5]]} and taken is None
    requested, _ = resolve(Reanalysis.model_validate({"polarity": "auto", "exclude": []}), previous, _ANALYSIS)
    assert requested == {"roi": [10.0, 20.0, 30.0]}


def test_an_alternative_sets_its_own_overrides_and_explicit_fields_win():
    requested, taken = resolve(Reanalysis.model_validate({"reading": 0}), {"roi": [1.0, 2.0, 3.0]}, _ANALYSIS)
    assert requested == {"polarity": "bright", "threshold": 0.62, "roi": [1.0, 2.0, 3.0]}
    assert taken == {"index": 0, "label": "the specimen brighter than the solution"}
    requested, _ = resolve(Reanalysis.model_validate({"reading": 0, "threshold": 0.5}), {}, _ANALYSIS)
    assert requested == {"polarity": "bright", "threshold": 0.5}
    with pytest.raises(ValueError, match=r"reading 2 is not one of .* 0 to 1"):
        resolve(Reanalysis.model_validate({"reading": 2}), {}, _ANALYSIS)
    with pytest.raises(ValueError, match="offered: none"):
        resolve(Reanalysis.model_validate({"reading": 0}), {}, {"segmentation": {}})


def test_regions_and_boxes_become_what_segment_takes():
    body = Reanalysis.model_validate({"roi": {"cx": 5, "cy": 6, "rx": 7, "ry": 4, "angle_deg": 30},
                                      "exclude": [{"x0": 1.5, "y0": 2, "x1": 3.2, "y1": 4}]})
    requested, _ = resolve(body, {}, _ANALYSIS)
    fields = options_fields(requested)
    assert fields["roi"] == (5.0, 6.0, 7.0, 4.0, 30.0)
    assert fields["exclude"] == ((1, 2, 4, 4),)  # whole pixels, outward
    assert options_fields({})["exclude"] is None and options_fields({})["polarity"] == "auto"


def test_a_region_or_box_wholly_outside_the_image_is_refused_with_the_reason():
    check_against_image({"roi": [-10.0, 50.0, 12.0]}, 100, 80)  # overlaps the left edge: fine
    with pytest.raises(ValueError, match="circle centred at x=-20, y=50.*outside the 100 x 80 px image"):
        check_against_image({"roi": [-20.0, 50.0, 12.0]}, 100, 80)
    # A long ellipse turned 90 degrees reaches 40 px up and down, 6 px across: it ends 2 px left of the image.
    tall = [-8.0, 40.0, 40.0, 6.0, 90.0]
    with pytest.raises(ValueError, match="ellipse"):
        check_against_image({"roi": tall}, 100, 80)
    check_against_image({"roi": [*tall[:4], 0.0]}, 100, 80)  # unturned it reaches 32 px into the image
    with pytest.raises(ValueError, match="area to exclude"):
        check_against_image({"exclude": [[100, 0, 120, 10]]}, 100, 80)


@pytest.mark.parametrize("body", [
    {"threshold": 3}, {"threshold": 0}, {"polarity": "purple"}, {"roi": {"cx": 1, "cy": 1}},
    {"roi": {"cx": 1, "cy": 1, "r": 2, "rx": 2, "ry": 2}}, {"roi": {"cx": math.inf, "cy": 1, "r": 2}},
    {"exclude": [{"x0": 3, "y0": 0, "x1": 3, "y1": 9}]}, {"reading": -1}, {"unknown": 1},
])
def test_malformed_overrides_fail_validation(body):
    with pytest.raises(ValidationError):
        Reanalysis.model_validate(body)


def test_painted_strokes_are_kept_like_boxes_and_become_what_segment_takes():
    stroke = {"points": [[10, 12.5], [30, 12.5]], "radius_px": 4}
    body = Reanalysis.model_validate({"paint": [stroke]})
    requested, _ = resolve(body, {"exclude": [[0, 0, 5, 5]]}, _ANALYSIS)
    plain = {"points": [[10.0, 12.5], [30.0, 12.5]], "radius_px": 4.0}
    assert requested == {"exclude": [[0, 0, 5, 5]], "paint": [plain]}
    assert options_fields(requested)["exclude_strokes"] == ((((10.0, 12.5), (30.0, 12.5)), 4.0),)
    # left out: kept; null or []: none
    assert resolve(Reanalysis.model_validate({"threshold": 0.4}), requested, _ANALYSIS)[0]["paint"] == [plain]
    assert "paint" not in resolve(Reanalysis.model_validate({"paint": None}), requested, _ANALYSIS)[0]
    assert "paint" not in resolve(Reanalysis.model_validate({"paint": []}), requested, _ANALYSIS)[0]
    assert options_fields({})["exclude_strokes"] is None


@pytest.mark.parametrize("paint", [
    [{"points": [], "radius_px": 3}],
    [{"points": [[1, 2]], "radius_px": 0}],
    [{"points": [[1, 2]], "radius_px": 501}],
    [{"points": [[1, 2, 3]], "radius_px": 2}],
    [{"points": [[1, 2]] * 1001, "radius_px": 2}],
    [{"points": [[1, 2]], "radius_px": 2}] * 65,
    [{"points": [[1, 2]], "radius_px": 2, "colour": "red"}],
    [{"points": [[2e6, 2]], "radius_px": 2}],
])
def test_bad_strokes_fail_validation(paint):
    with pytest.raises(ValidationError):
        Reanalysis.model_validate({"paint": paint})


def test_a_stroke_wholly_outside_the_image_is_refused():
    check_against_image({"paint": [{"points": [[-3.0, 40.0]], "radius_px": 4.0}]}, 100, 80)  # reaches in
    with pytest.raises(ValueError, match="painted stroke 0 .*outside the 100 x 80 px image"):
        check_against_image({"paint": [{"points": [[110.0, 40.0], [140.0, 5.0]], "radius_px": 10.0}]}, 100, 80)
