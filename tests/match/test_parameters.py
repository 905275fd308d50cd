"""Parameter estimates with intervals from the posterior over the library grid."""

from __future__ import annotations

import numpy as np
import pytest

from service.match.parameters import interval_estimate, parameter_axis

ETA = np.array([0.5, 1.0, 1.5, 2.0, 3.0, 4.0])
STICKING = np.array([0.1, 0.3, 1.0])


def test_the_axis_follows_the_grid_spacing():
    assert parameter_axis(STICKING) == "log"  # 0.1, 0.3, 1: a factor ~3 apart
    assert parameter_axis(np.array([1.0, 2.0, 3.0, 4.0])) == "linear"  # evenly spaced
    assert parameter_axis(np.array([0.0, 1.0, 2.0])) == "linear"  # a zero has no logarithm


def test_equal_masses_give_the_whole_range_and_say_so():
    # Exact: a flat posterior over the grid is flat along the axis; its median is the
    # middle of the axis and no interval shorter than the range holds 95% of it... at the
    # resolution of the fine grid (a 95% interval of a flat density is 95% of the range).
    estimate = interval_estimate(ETA, np.ones(ETA.size))
    assert estimate["value"] == pytest.approx(2.25, abs=0.01)  # (0.5 + 4) / 2
    lo, hi = estimate["ci95"]
    assert hi - lo == pytest.approx(0.95 * 3.5, abs=0.02)


def test_a_gaussian_likelihood_is_recovered():
    # Exact for a symmetric likelihood: the posterior median under a flat prior is its
    # centre, and the 95% interval is about +-1.96 sd (the interpolation is piecewise
    # linear in the log, which a parabola sampled every 0.5-1 units follows closely).
    centre, sd = 2.4, 0.5
    mass = np.exp(-0.5 * ((ETA - centre) / sd) ** 2)
    estimate = interval_estimate(ETA, mass)
    assert estimate["value"] == pytest.approx(centre, abs=0.1)
    lo, hi = estimate["ci95"]
    assert lo == pytest.approx(centre - 1.96 * sd, abs=0.25)
    assert hi == pytest.approx(centre + 1.96 * sd, abs=0.25)
    assert not estimate["spans_library_range"]


@pytest.mark.parametrize("index", range(ETA.size))
def test_a_certain_grid_value_still_gets_an_interval_as_wide_as_the_grid(index):
    mass = np.full(ETA.size, 1e-30)
    mass[index] = 1.0
    estimate = interval_estimate(ETA, mass)
    lo, hi = estimate["ci95"]
    assert lo <= ETA[index] <= hi
    assert estimate["value"] == pytest.approx(ETA[index], abs=0.15)
    # The interval holds the value's cell: half-way to each neighbouring grid value.
    if index > 0:
        assert lo <= 0.5 * (ETA[index] + ETA[index - 1]) + 1e-9
    if index < ETA.size - 1:
        assert hi >= 0.5 * (ETA[index] + ETA[index + 1]) - 1e-9
    assert ETA[0] <= lo <= hi <= ETA[-1]


def test_a_sticking_of_one_keeps_one_inside_its_interval():
    estimate = interval_estimate(STICKING, np.array([0.01, 0.1, 0.89]))
    lo, hi = estimate["ci95"]
    assert hi == pytest.approx(1.0)
    assert 0.3 < estimate["value"] <= 1.0


def _dbm_families():
    from service.match.model import Family

    etas = (1.0, 2.0, 3.0, 4.0)
    return [Family("dbm", {"eta": eta, **near}, (0,)) for near in ({}, {"electrode": "near"}) for eta in etas]


def test_the_interval_holds_eta_under_every_electrode_setting_still_in_play():
    # Worked example: 88% of the probability on (near electrode, eta 3), 12% on (far, eta 4).
    # Under the far setting alone eta is 4, so the joined 95% interval must reach 4.
    from service.match.parameters import parameter_estimates

    families = _dbm_families()
    probability = np.zeros(len(families))
    probability[families.index(next(f for f in families if f.parameters == {"eta": 3.0, "electrode": "near"}))] = 0.88
    probability[families.index(next(f for f in families if f.parameters == {"eta": 4.0}))] = 0.12
    eta = parameter_estimates(families, probability)["dbm"]["eta"]
    assert eta["ci95"][1] == pytest.approx(4.0)
    assert eta["widened_for"] == [{}]
    # A setting holding under 5% of the probability does not widen the interval.
    probability[families.index(next(f for f in families if f.parameters == {"eta": 4.0}))] = 0.01
    eta = parameter_estimates(families, probability)["dbm"]["eta"]
    assert eta["widened_for"] == [] and eta["ci95"][1] < 4.0
