"""Continuous parameter estimates with 95% intervals from the posterior over the library grid.

The library grows each regime at a few parameter values (sticking 0.1, 0.3, 1; eta 0.5 to 4).
A specimen's tempered family probabilities, summed over the families that share a value
(DLA's two neighbourhoods, say), give a posterior mass at each grid value. Between grid
values the log-posterior is interpolated linearly along the parameter's axis (logarithmic
when the grid is evenly spaced in the logarithm, as sticking's is), which gives a continuous
density over the library's range; the estimate is its median and the interval its 95%
highest-density interval. A grid cannot place a parameter more finely than its own spacing,
so the interval always holds the cell of the grid value nearest the estimate (half-way to
each neighbouring grid value).
"""

from __future__ import annotations

from typing import Any

import numpy as np

#: Points of the fine grid the density is evaluated on.
N_FINE = 801
#: Posterior masses below this are treated as this (keeps the log finite).
MASS_FLOOR = 1e-12
#: Share of the posterior inside the interval.
INTERVAL_MASS = 0.95


def _numeric(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def parameter_axis(values: np.ndarray) -> str:
    """``"log"`` when the grid values are positive and more evenly spaced in the logarithm
    than linearly (coefficient of variation of the gaps), else ``"linear"``."""
    values = np.unique(values)
    if values.size < 3 or values.min() <= 0:
        return "linear"

    def unevenness(x):
        gaps = np.diff(x)
        return float(gaps.std() / gaps.mean())

    return "log" if unevenness(np.log(values)) < unevenness(values) else "linear"


def numeric_grid(families) -> list[tuple[str, np.ndarray, str]]:
    """(name, value of each family, axis) of every numeric parameter that varies among ``families``."""
    out = []
    names = dict.fromkeys(n for f in families for n, v in f.parameters.items() if _numeric(v))
    for name in names:
        if not all(name in f.parameters for f in families):
            continue
        values = np.array([float(f.parameters[name]) for f in families])
        if np.unique(values).size >= 2:
            out.append((name, values, parameter_axis(values)))
    return out


def estimate_on_axis(values: np.ndarray, weights: np.ndarray, axis: str) -> float:
    """The posterior median of a parameter, on its axis (see :func:`interval_estimate`)."""
    grid = np.unique(values)
    mass = np.array([weights[values == v].sum() for v in grid])
    estimate = interval_estimate(grid, mass)["value"]
    return float(np.log(estimate) if axis == "log" else estimate)


def interval_estimate(grid: np.ndarray, mass: np.ndarray, nuisance_range: float = 0.0) -> dict[str, Any]:
    """Median, 95% highest-density interval and spread of a parameter from grid masses.

    Parameters
    ----------
    grid : ndarray
        The distinct library values of the parameter (any order).
    mass : ndarray
        Posterior probability of each (need not sum to one).
    nuisance_range : float
        How far drawing style alone moves the estimate (on the parameter's axis): the
        interval reaches at least this far on both sides of the estimate.
    """
    order = np.argsort(grid)
    grid, mass = np.asarray(grid, float)[order], np.asarray(mass, float)[order]
    axis = parameter_axis(grid)
    forward = np.log if axis == "log" else (lambda x: x)
    back = np.exp if axis == "log" else (lambda x: x)
    u = forward(grid)
    fine = np.linspace(u[0], u[-1], N_FINE)
    log_density = np.interp(fine, u, np.log(np.maximum(mass / mass.sum(), MASS_FLOOR)))
    density = np.exp(log_density - log_density.max())
    density /= density.sum()
    cdf = np.cumsum(density)
    median_u = float(np.interp(0.5, cdf, fine))
    # Highest-density interval: the densest fine cells holding INTERVAL_MASS.
    ranked = np.argsort(-density, kind="stable")
    inside = ranked[: int(np.searchsorted(np.cumsum(density[ranked]), INTERVAL_MASS)) + 1]
    lo_u, hi_u = float(fine[inside].min()), float(fine[inside].max())
    # Never narrower than the grid can tell: the interval holds the cell of the grid value
    # nearest the estimate, half-way to each neighbouring grid value.
    g = int(np.argmin(np.abs(u - median_u)))
    if g > 0:
        lo_u = min(lo_u, u[g] - 0.5 * (u[g] - u[g - 1]))
    if g < u.size - 1:
        hi_u = max(hi_u, u[g] + 0.5 * (u[g + 1] - u[g]))
    lo_u, hi_u = min(lo_u, u[g]), max(hi_u, u[g])
    # Never narrower than what the camera alone changes.
    lo_u, hi_u = min(lo_u, median_u - nuisance_range), max(hi_u, median_u + nuisance_range)
    lo_u, hi_u = max(lo_u, u[0]), min(hi_u, u[-1])
    values = back(fine)
    mean = float(density @ values)
    tolerance = 1e-6 * max(1.0, abs(u[-1] - u[0]))
    spans = bool(lo_u <= u[0] + tolerance and hi_u >= u[-1] - tolerance)
    return {
        "value": float(back(median_u)),
        "ci95": [float(back(lo_u)), float(back(hi_u))],
        "std": float(np.sqrt(max(float(density @ (values - mean) ** 2), 0.0))),
        "axis": axis,
        "spans_library_range": spans,
    }


#: A setting of the non-numeric family parameters (a DBM outer electrode near or far) that keeps
#: at least this share of its regime's probability has its own interval joined to the estimate's:
#: eta and the electrode's distance trade off (a near electrode straightens branches as a higher
#: eta does), so the interval must hold eta under every setting still in play.
SETTING_SHARE = 0.05


def _setting_of(family) -> tuple:
    return tuple(sorted((k, v) for k, v in family.parameters.items() if not _numeric(v)))


def _unestimated_settings(families, weights: np.ndarray) -> list[tuple[tuple, float]]:
    """Each distinct setting of the families' non-numeric parameters with its share of ``weights``."""
    total = float(weights.sum()) or 1.0
    shares: dict[tuple, float] = {}
    for family, w in zip(families, weights):
        key = _setting_of(family)
        shares[key] = shares.get(key, 0.0) + float(w) / total
    return list(shares.items())


def parameter_estimates(families, probability: np.ndarray, nuisance_range: dict | None = None) -> dict[str, Any]:
    """Every numeric parameter that varies within a regime, estimated from ``probability``.

    Parameters
    ----------
    families : list of Family
        The model's families (``regime``, ``parameters``).
    probability : ndarray
        The specimen's (tempered) probability of each family.
    nuisance_range : dict, optional
        ``{(regime, parameter): range}``: how far drawing style alone moves the estimate
        (``ReferenceModel.parameter_nuisance_range``); each interval reaches at least that far
        on both sides of its estimate.
    """
    out: dict[str, Any] = {}
    for regime in dict.fromkeys(f.regime for f in families):
        members = [i for i, f in enumerate(families) if f.regime == regime]
        regime_probability = float(probability[members].sum())
        weights = probability[members] / max(regime_probability, 1e-300)
        names = dict.fromkeys(n for i in members for n, v in families[i].parameters.items() if _numeric(v))
        for name in names:
            having = [k for k, i in enumerate(members) if name in families[i].parameters]
            values = np.array([float(families[members[k]].parameters[name]) for k in having])
            grid = np.unique(values)
            if grid.size < 2:
                continue
            w = weights[having]
            mass = np.array([w[values == v].sum() for v in grid])
            reach = (nuisance_range or {}).get((regime, name), 0.0)
            estimate = interval_estimate(grid, mass, reach)
            settings = _unestimated_settings([families[members[k]] for k in having], w)
            widened_by = []
            for setting, share in settings:
                if len(settings) < 2 or share < SETTING_SHARE:
                    continue
                own = np.array([_setting_of(families[members[k]]) == setting for k in having])
                own_mass = np.array([w[own & (values == v)].sum() for v in grid])
                if own_mass.sum() <= 0 or np.count_nonzero(own_mass) == 0:
                    continue
                lo_s, hi_s = interval_estimate(grid, own_mass, reach)["ci95"]
                lo_e, hi_e = estimate["ci95"]
                if lo_s < lo_e or hi_s > hi_e:
                    estimate["ci95"] = [min(lo_e, lo_s), max(hi_e, hi_s)]
                    widened_by.append(dict(setting))
            if widened_by:
                estimate["spans_library_range"] = bool(
                    estimate["ci95"][0] <= grid.min() * (1 + 1e-9) and estimate["ci95"][1] >= grid.max() * (1 - 1e-9))
            lo, hi = estimate["ci95"]
            if estimate["spans_library_range"]:
                note = (f"the 95% interval spans the whole library range ({grid.min():g} to {grid.max():g}): "
                        f"the references do not tell {name} here")
            else:
                note = f"{name} between {lo:.3g} and {hi:.3g} (95%), estimate {estimate['value']:.3g}"
            out.setdefault(regime, {})[name] = {
                **estimate,
                "widened_for": widened_by,
                "values_in_library": grid.tolist(),
                "posterior_at_library_values": mass.tolist(),
                "regime_probability": regime_probability,
                "note": note,
                "method": (
                    "median and 95% highest-density interval of the posterior over the library's values, "
                    f"log-posterior interpolated on a {estimate['axis']} axis; always holding the cell of the "
                    "library value nearest the estimate (half-way to its neighbours), reaching on both sides "
                    "at least as far as drawing style alone moves the estimate, and holding the interval found "
                    "under each setting the library does not estimate (such as how near the outer electrode "
                    "was) that keeps at least 5% of the regime's probability"
                ),
            }
    return out
