"""Impossible or over-precise numbers are flagged or withheld, never passed as results.

The values below are those the report showed as results (issue 12: a retina photograph's
mass-radius dimension 1.748 with a 95% interval -0.824 to 4.320; mass-radius dimensions
2.26 and 2.19 on a flat image; "sticking 1 +- 0.00087", "eta 1.5 +- 1.1e-09",
"0.1 +- 1.3e-25"). The bounds they are judged against are exact: a subset of the plane has
dimension between 0 and 2 (Hausdorff dimension is monotone under inclusion, and the plane's
is 2); a posterior over a grid cannot place a parameter finer than the grid's spacing.
"""

from __future__ import annotations

import pytest

from service.contract import Dimension, ParameterEstimate
from service.library import load_reference_set
from service.quality import OK, UNCERTAIN, WITHHELD, grid_cell, judge_dimension, judge_parameter, plus_minus


def _grid(regime: str, name: str) -> list[float]:
    """The parameter's values in the bundled reference set (its manifest)."""
    return sorted({float(e.parameters[name]) for e in load_reference_set().ensembles
                   if e.regime == regime and name in e.parameters})


def _dimension(value, ci95, fit_range_px=(6.0, 96.0), n=8) -> Dimension:
    return Dimension.model_validate({"value": value, "ci95": list(ci95), "fit_range_px": list(fit_range_px),
                                     "n_fit_points": n})


def test_retina_mass_radius_interval_wider_than_the_possible_range_is_withheld():
    fit = _dimension(1.748, (-0.824, 4.320))
    assert fit.status == WITHHELD
    assert "-0.82 to 4.32" in fit.reason and "0 to 2" in fit.reason


@pytest.mark.parametrize("value", [2.26, 2.19])
def test_a_dimension_above_two_on_a_flat_image_is_withheld(value):
    fit = _dimension(value, (value - 0.05, value + 0.05))
    assert fit.status == WITHHELD and "impossible for a flat picture" in fit.reason


def test_a_negative_dimension_is_withheld():
    assert judge_dimension(-0.1, (-0.2, 0.0)).status == WITHHELD


def test_a_sound_fit_is_a_result():
    # DLA in 2-D: D about 1.70 (Witten & Sander 1981; from memory), over a decade and more of box sides.
    fit = _dimension(1.70, (1.66, 1.74), fit_range_px=(4.0, 64.0))
    assert fit.status == OK and fit.reason is None


def test_a_fit_over_less_than_a_decade_is_uncertain():
    # Scaling trusted over at least one decade of sizes: common practice (CHECK_VALUES.md).
    fit = _dimension(1.70, (1.66, 1.74), fit_range_px=(6.0, 32.0))
    assert fit.status == UNCERTAIN and "less than one decade" in fit.reason


def test_an_interval_reaching_past_the_plane_is_uncertain_and_rounding_above_two_is_read_as_two():
    assert judge_dimension(1.9, (1.7, 2.2), (2, 200)).status == UNCERTAIN
    rounded = judge_dimension(2.01, (1.98, 2.04), (1, 40))
    assert rounded.status == UNCERTAIN and "read it as 2" in rounded.reason


def test_no_value_is_withheld():
    assert judge_dimension(None, None).status == WITHHELD
    assert judge_dimension(float("nan"), (1.0, 2.0)).status == WITHHELD


def test_grid_cell_is_half_way_to_the_neighbours():
    # sticking 0.1, 0.3, 1 is evenly spaced in the logarithm: the cell of 1 starts at sqrt(0.3) (geometric mean).
    lo, hi = grid_cell([0.1, 0.3, 1.0], 1.0, "log")
    assert lo == pytest.approx(0.3 ** 0.5) and hi == pytest.approx(1.0)
    assert grid_cell([0.5, 1.0, 1.5, 2.0], 1.5, "linear") == pytest.approx((1.25, 1.75))


@pytest.mark.parametrize(
    ("regime", "name", "value", "std", "axis"),
    [
        ("dla", "sticking", 1.0, 0.00087, "log"),  # "sticking 1 +- 0.00087"
        ("dbm", "eta", 1.5, 1.1e-09, "linear"),  # "eta 1.5 +- 1.1e-09"
        ("dla", "sticking", 0.1, 1.3e-25, "log"),  # "0.1 +- 1.3e-25"
    ],
)
def test_a_spread_finer_than_the_library_grid_is_not_a_result(regime, name, value, std, axis):
    grid = _grid(regime, name)
    assert value in grid
    judged = judge_parameter(name, value, [value, value], std, grid, axis=axis, regime_probability=0.9, regime=regime)
    assert judged.status == UNCERTAIN and "95% interval" in judged.reason
    assert plus_minus(judged, std) is None  # no "+-" to print
    estimate = ParameterEstimate.model_validate({"value": value, "ci95": [value, value], "std": std,
                                                 "values_in_library": grid, "axis": axis,
                                                 "regime_probability": 0.9}).judged(regime, name)
    assert estimate.status == UNCERTAIN and estimate.plus_minus is None and estimate.std == std


def test_a_spread_wider_than_the_grid_is_a_result():
    grid = _grid("dbm", "eta")
    judged = judge_parameter("eta", 1.6, [1.0, 2.2], 0.4, grid, regime_probability=0.9, regime="dbm")
    assert judged.status == OK and plus_minus(judged, 0.4) == 0.4


def test_an_interval_over_the_whole_library_is_withheld():
    grid = _grid("dbm", "eta")
    judged = judge_parameter("eta", 2.0, [min(grid), max(grid)], 1.0, grid, spans_library_range=True)
    assert judged.status == WITHHELD and "do not tell eta" in judged.reason


def test_a_parameter_of_an_unlikely_regime_says_so():
    judged = judge_parameter("sticking", 0.5, [0.17, 1.0], 0.3, _grid("dla", "sticking"), axis="log",
                             regime_probability=0.04, regime="dla")
    assert judged.status == UNCERTAIN and "0.04" in judged.reason


def _fit(value, ci95, fit_range_px=(4.0, 64.0)) -> dict:
    judged = judge_dimension(value, ci95, fit_range_px, 8)
    return {"value": value, "ci95": list(ci95), "fit_range_px": list(fit_range_px), "status": judged.status,
            "reason": judged.reason}


def test_the_dimension_to_report_is_the_sound_one():
    from service.quality import dimension_to_report

    # Every fit sound and agreeing: box counting, the most widely reported, and no disagreement to explain.
    agreeing = {"box_dimension": _fit(1.70, (1.65, 1.75)), "sandbox_dimension": _fit(1.72, (1.68, 1.76)),
                "mass_radius_dimension": _fit(1.69, (1.62, 1.76))}
    chosen = dimension_to_report(agreeing)
    assert chosen["key"] == "box_dimension" and chosen["differences"] is None
    # The demo DLA of issue 12: box and mass-radius fitted over less than a decade, sandbox sound.
    demo = {"box_dimension": _fit(1.562, (1.50, 1.62), (4, 13)), "mass_radius_dimension": _fit(1.443, (1.35, 1.54), (6, 54)),
            "sandbox_dimension": _fit(1.726, (1.68, 1.77), (7, 109))}
    chosen = dimension_to_report(demo)
    assert chosen["key"] == "sandbox_dimension" and chosen["value"] == 1.726
    assert "disagree" in chosen["differences"] and "mass-radius" in chosen["differences"]


def test_no_dimension_is_reported_when_every_fit_is_withheld():
    from service.quality import dimension_to_report

    withheld = {key: _fit(2.26, (2.2, 2.3)) for key in ("box_dimension", "sandbox_dimension", "mass_radius_dimension")}
    chosen = dimension_to_report(withheld)
    assert chosen["key"] is None and chosen["status"] == WITHHELD
