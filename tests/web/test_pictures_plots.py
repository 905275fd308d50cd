"""Pictures and plots of the report: nothing lost when downscaled, valid SVG documents."""

from __future__ import annotations

import io
import xml.etree.ElementTree as ET

import numpy as np
from PIL import Image
from scipy import ndimage

from service.web import pictures, plots

SVG = "{http://www.w3.org/2000/svg}svg"


def test_overlay_keeps_thin_lines_connected_when_downscaled():
    # A one-pixel diagonal across a 4000 px photo must stay one 8-connected line at display size.
    n = 4000
    rgb = np.full((n, n, 3), 200, dtype=np.uint8)
    line = np.eye(n, dtype=bool)
    out = pictures.annotated_overlay(rgb, np.zeros((n, n), bool), line, tips_rc=np.array([[0, 0]]),
                                     junctions_rc=None)
    assert out.shape == (pictures.DISPLAY_PX, pictures.DISPLAY_PX, 3)
    drawn = np.all(out == pictures.SKELETON_RGB, axis=2) | np.all(out == pictures.TIP_RGB, axis=2)
    _, n_parts = ndimage.label(drawn, structure=np.ones((3, 3)))
    assert n_parts == 1
    assert np.all(out[0, 0] == pictures.TIP_RGB)


def test_mask_png_round_trip():
    mask = np.random.default_rng(3).random((37, 53)) > 0.5
    back = np.asarray(Image.open(io.BytesIO(pictures.png_bytes(mask))).convert("L")) > 0
    assert np.array_equal(back, mask)


def test_plots_are_svg_documents():
    sizes = [2.0, 4.0, 8.0, 16.0, 32.0]
    # N(s) = e^9 s^-1.5 exactly: the drawn fit has slope -1.5 and a zero-width interval
    box = {"sizes_px": sizes, "counts": [np.exp(9) * s ** -1.5 for s in sizes], "fit_range_px": [2, 32],
           "intercept": 9.0, "value": 1.5, "ci95": [1.5, 1.5]}
    svg = plots.box_counting_svg(box)
    assert ET.fromstring(svg).tag == SVG and "slope −1.500" in svg.decode()
    assert ET.fromstring(plots.lacunarity_svg({"scales_px": sizes, "values": [3, 2, 1.5, 1.2, 1.0]})).tag == SVG
    compared = plots.compare_svgs([("a <&>", {"box_dimension": box}), ("b", {"box_dimension": box})])
    assert {k: ET.fromstring(v).tag for k, v in compared.items()} == {"box_counting": SVG, "lacunarity": SVG}
    rows = [{"feature": "box_dimension", "value": 1.65, "best": {"mean": 1.7, "sd": 0.05, "z": -1.0},
             "runner_up": {"mean": 1.9, "sd": 0.04, "z": -6.25}}]
    assert ET.fromstring(plots.reference_distributions_svg(rows, "dla", "eden")).tag == SVG
