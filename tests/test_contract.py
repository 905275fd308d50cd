"""The analysis contract: warnings with stable codes, one builder, stored records read alike."""

from __future__ import annotations

import io
import pickle

import numpy as np
import pytest
import tifffile
from scipy import ndimage

from service.analysis import analyze
from service.caveats import UNCLASSIFIED, Caveat, caveat
from service.contract import AnalysisModel, analysis_json, analysis_model, analysis_view, stored_analysis


def _tree_tiff(dpi: float) -> bytes:
    """A dark binary tree of thick strokes on a pale ground (an invented demo scene), as TIFF at ``dpi``."""
    from skimage.draw import line

    size = 300
    mask = np.zeros((size, size), bool)

    def branch(r, c, angle, length, level):
        r2, c2 = r - length * np.cos(angle), c + length * np.sin(angle)
        rr, cc = line(int(r), int(c), int(r2), int(c2))
        mask[rr.clip(0, size - 1), cc.clip(0, size - 1)] = True
        if level < 5:
            branch(r2, c2, angle - 0.45, length * 0.7, level + 1)
            branch(r2, c2, angle + 0.45, length * 0.7, level + 1)

    branch(size * 0.92, size / 2, 0.0, size * 0.28, 1)
    picture = np.full((size, size), 225, np.uint8)
    picture[ndimage.binary_dilation(mask, iterations=2)] = 40
    out = io.BytesIO()
    tifffile.imwrite(out, picture, resolution=(dpi, dpi), resolutionunit="INCH")
    return out.getvalue()


@pytest.fixture(scope="module")
def placeholder_analysis():
    # 72 dpi: a common software default (the loader's placeholder list), not a calibration.
    return analyze(_tree_tiff(72.0), filename="tree.tif", match=False)


def test_a_caveat_is_its_text_with_a_code_and_survives_a_process_boundary():
    warning = Caveat("low_contrast", "low contrast: the specimen stands 2.1 noise levels from the background")
    assert "low contrast" in warning and warning.text == str(warning)
    again = pickle.loads(pickle.dumps(warning))
    assert again == warning and again.code == "low_contrast"
    with pytest.raises(ValueError):
        Caveat("Not Snake", "text")
    with pytest.raises(AttributeError):
        warning.code = "other"


def test_tiff_calibration_warnings_reach_the_analysis_json(placeholder_analysis):
    data = analysis_json(placeholder_analysis)
    codes = [w["code"] for w in data["warnings"]]
    assert "resolution_placeholder" in codes
    assert [w["code"] for w in data["image"]["warnings"]] == ["resolution_placeholder"]
    # 72 dpi: 25.4 mm / 72 per pixel (TIFF 6.0, ResolutionUnit 2 = inch).
    assert data["image"]["pixel_size_mm"] == pytest.approx(25.4 / 72)
    assert data["calibration"]["source"] == "tiff-resolution-tags"


def test_every_warning_has_a_snake_case_code(placeholder_analysis):
    data = analysis_json(placeholder_analysis)
    warnings = data["warnings"] + data["features"]["warnings"] + data["features"]["box_dimension"]["warnings"]
    assert warnings and all(w["code"] != UNCLASSIFIED and w["code"].islower() for w in warnings)


def test_one_builder_and_the_stored_copy_agree(placeholder_analysis):
    built = analysis_model(placeholder_analysis)
    assert placeholder_analysis.to_dict() == built.json_dict()
    # Stored (JSON) and read back through the contract: the same object, statuses included.
    assert stored_analysis(built.json_dict()).json_dict() == built.json_dict()
    for key in ("box_dimension", "mass_radius_dimension", "sandbox_dimension"):
        assert getattr(built.features, key).status in ("ok", "uncertain", "withheld")


def test_a_record_stored_before_codes_gets_unclassified_warnings(placeholder_analysis):
    old = analysis_json(placeholder_analysis)
    old["warnings"] = [w["text"] for w in old["warnings"]]
    for key in ("status", "reason"):
        old["features"]["box_dimension"].pop(key)
    read = stored_analysis(old)
    assert [w.code for w in read.warnings] == [UNCLASSIFIED] * len(old["warnings"])
    assert read.features.box_dimension.status in ("ok", "uncertain", "withheld")


def test_a_partial_record_is_still_listed_with_its_judgements():
    partial = {"features": {"box_dimension": {"value": 2.26, "ci95": [2.2, 2.3], "fit_range_px": [4, 64]}},
               "warnings": ["=formula"]}
    view = analysis_view(partial)
    assert view["warnings"] == [{"code": UNCLASSIFIED, "text": "=formula"}]
    assert view["features"]["box_dimension"]["status"] == "withheld"
    assert caveat({"code": "touches_frame", "text": "t"}).code == "touches_frame"


def test_the_model_names_the_stable_keys():
    fields = AnalysisModel.model_fields
    for key in ("ramiform_version", "source", "image", "calibration", "segmentation", "features", "matches",
                "in_library", "parameter_estimates", "explanation", "warnings"):
        assert key in fields


def test_outside_every_reference_the_probabilities_are_marked_relative(placeholder_analysis):
    data = analysis_json(placeholder_analysis)
    best = {"regime": "dla", "parameters": {"sticking": 1.0}, "probability": 1.0, "distance": 12.0}
    data.update(matches=[best], in_library=False, explanation={"summary": "nearest, but outside every reference",
                                                               "best": best})
    read = stored_analysis(data)
    assert read.matches[0].status == "uncertain" and "outside every reference" in read.matches[0].reason
    assert read.explanation.best.status == "uncertain"
    data["in_library"] = True
    assert stored_analysis(data).matches[0].status == "ok"
