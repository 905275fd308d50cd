"""Which reported numbers are results, which are doubtful, and which are no result at all.

Plain functions on the numbers of the analysis JSON (no arrays, no web): each answers a
:class:`Judgement`, ``status`` ``"ok"``, ``"uncertain"`` (shown with its doubt said) or
``"withheld"`` (not a result: shown only as withheld, with the reason), and the reason in words.
:mod:`service.contract` attaches one to every fitted dimension and parameter estimate, so
the CLI, the API, the CSV and the pages judge a number alike.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

OK, UNCERTAIN, WITHHELD = "ok", "uncertain", "withheld"
_RANK = {OK: 0, UNCERTAIN: 1, WITHHELD: 2}

#: A flat picture's dimensions lie in [0, 2] (exact: a subset of the plane).
PLANE_DIMENSION = 2.0
#: A compact specimen's fit may come out this far above 2 by rounding of its outline alone
#: (a disc measures 1.99-2.02 on box sides up to its width / 64; see ``features.dimension``).
ROUNDING_ABOVE_PLANE = 0.05
#: An interval wider than half the possible range [0, 2] does not determine the dimension.
WITHHELD_INTERVAL_WIDTH = 1.0
#: Wider than this, a dimension says little (DLA and Eden classes, 1.7 and 2, differ by 0.3).
UNCERTAIN_INTERVAL_WIDTH = 0.4
#: Scaling is trusted over at least one decade of scales (common practice; see CHECK_VALUES.md).
TRUSTED_SPAN = 10.0
#: A parameter estimate of a regime less probable than this holds only if the regime did.
LIKELY_REGIME = 0.5


@dataclass(frozen=True)
class Judgement:
    status: str = OK
    reason: str | None = None

    def worst(self, other: Judgement) -> Judgement:
        """The graver of two judgements, reasons of equal gravity joined."""
        if _RANK[other.status] > _RANK[self.status]:
            return other
        if _RANK[other.status] == _RANK[self.status] and other.reason:
            return Judgement(self.status, f"{self.reason}; {other.reason}" if self.reason else other.reason)
        return self


def _finite(x) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool) and math.isfinite(x)


def judge_dimension(value, ci95: Sequence | None, fit_range_px: Sequence | None = None,
                    n_fit_points: int | None = None) -> Judgement:
    """Judge a fractal dimension fitted on a flat (2-D) picture.

    Withheld: no finite value; a value below 0 or above 2 (beyond outline rounding); a 95%
    interval wider than half the possible range; fewer than three scales fitted.
    Uncertain: an interval reaching past 0 or 2, wider than ``UNCERTAIN_INTERVAL_WIDTH``,
    or missing; a fit over less than a decade of scales; a value just above 2.
    """
    if not _finite(value):
        return Judgement(WITHHELD, "the fit gave no finite value")
    out = Judgement()
    if value < 0 or value > PLANE_DIMENSION + ROUNDING_ABOVE_PLANE:
        out = out.worst(Judgement(WITHHELD, f"{value:.2f} is impossible for a flat picture, whose dimensions lie "
                                            "between 0 and 2: the scales fitted do not follow one power law"))
    elif value > PLANE_DIMENSION:
        out = out.worst(Judgement(UNCERTAIN, f"{value:.3f} lies above 2, the dimension of a filled plane, by "
                                             "rounding of the outline: read it as 2"))
    if n_fit_points is not None and n_fit_points < 3:
        out = out.worst(Judgement(WITHHELD, f"only {n_fit_points} scales were fitted"))
    if ci95 is None or len(ci95) != 2 or not all(_finite(v) for v in ci95):
        out = out.worst(Judgement(UNCERTAIN, "no 95% interval could be computed"))
    else:
        lo, hi = float(ci95[0]), float(ci95[1])
        width = hi - lo
        if width > WITHHELD_INTERVAL_WIDTH:
            out = out.worst(Judgement(WITHHELD, f"its 95% interval {lo:.2f} to {hi:.2f} is wider than half the "
                                                "possible range 0 to 2: the fit does not determine the dimension"))
        elif lo < 0 or hi > PLANE_DIMENSION + ROUNDING_ABOVE_PLANE:
            out = out.worst(Judgement(UNCERTAIN, f"its 95% interval {lo:.2f} to {hi:.2f} reaches beyond the "
                                                 "possible range 0 to 2"))
        elif width > UNCERTAIN_INTERVAL_WIDTH:
            out = out.worst(Judgement(UNCERTAIN, f"its 95% interval {lo:.2f} to {hi:.2f} is wide"))
    if fit_range_px is not None and len(fit_range_px) == 2 and all(_finite(v) for v in fit_range_px):
        a, b = float(fit_range_px[0]), float(fit_range_px[1])
        if a > 0 and b / a < TRUSTED_SPAN:
            out = out.worst(Judgement(UNCERTAIN, f"fitted over {a:.0f}-{b:.0f} px, less than one decade of scales"))
    return out


def grid_cell(grid: Sequence[float], value: float, axis: str = "linear") -> tuple[float, float] | None:
    """The cell of the library value nearest ``value``: half-way to each neighbour on ``axis``.

    A posterior over a grid places a parameter no finer than this cell.
    """
    points = sorted(float(g) for g in grid if _finite(g))
    if len(points) < 2 or not _finite(value):
        return None
    log = axis == "log" and points[0] > 0 and value > 0
    u = [math.log(p) for p in points] if log else points
    v = math.log(value) if log else value
    k = min(range(len(u)), key=lambda i: abs(u[i] - v))
    lo = u[k] - 0.5 * (u[k] - u[k - 1]) if k > 0 else u[k]
    hi = u[k] + 0.5 * (u[k + 1] - u[k]) if k < len(u) - 1 else u[k]
    return (math.exp(lo), math.exp(hi)) if log else (lo, hi)


def grid_limited_cell(value, std, grid: Sequence[float] | None, axis: str = "linear") -> tuple[float, float] | None:
    """The library grid cell holding ``value`` when the posterior spread ``std`` is narrower
    than half that cell (or missing): the spread then reflects the grid, not the specimen,
    and the estimate is known only to lie in the cell. None otherwise."""
    if not _finite(value):
        return None
    cell = grid_cell(grid or [], float(value), axis)
    if cell is None or (_finite(std) and std >= 0.5 * (cell[1] - cell[0])):
        return None
    return cell


def judge_parameter(name: str, value, ci95: Sequence | None, std, grid: Sequence[float] | None, *,
                    axis: str = "linear", spans_library_range: bool = False,
                    regime_probability: float | None = None, regime: str | None = None) -> Judgement:
    """Judge a growth parameter estimated from the posterior over the library's grid.

    Withheld: no finite value, or a 95% interval over the whole library range (the
    references do not tell the parameter). Uncertain: a spread narrower than the grid can
    resolve (e.g. "sticking 1 +- 0.00087": the spread is the grid's, not the specimen's; the
    95% interval, which holds the grid cell, is the figure to read); a regime that is itself
    unlikely.
    """
    if not _finite(value):
        return Judgement(WITHHELD, "no estimate")
    out = Judgement()
    if spans_library_range:
        out = out.worst(Judgement(WITHHELD, f"the 95% interval spans the whole library range: the references do "
                                            f"not tell {name} for this specimen"))
    cell = grid_limited_cell(value, std, grid, axis)
    if cell is not None:
        shown = f"{std:.2g}" if _finite(std) else "none"
        out = out.worst(Judgement(UNCERTAIN, f"the library holds {name} only at a few values, so the estimate "
                                             f"is no finer than {cell[0]:.3g} to {cell[1]:.3g}; the posterior "
                                             f"spread ({shown}) reflects that grid, not the specimen: quote the "
                                             "95% interval"))
    if regime_probability is not None and _finite(regime_probability) and regime_probability < LIKELY_REGIME:
        out = out.worst(Judgement(UNCERTAIN, f"holds only if the specimen grew as {regime or 'this regime'}, whose "
                                             f"probability is {regime_probability:.2f}"))
    return out


#: The fitted dimensions, in the order one is preferred for reporting when all are sound, and
#: what each measures, in words.
ESTIMATORS = {
    "box_dimension": "box counting covers the whole specimen, counting the boxes it touches at each box side",
    "sandbox_dimension": "the sandbox method averages the mass in squares about many points inside the specimen",
    "mass_radius_dimension": "the mass-radius method counts the mass within growing circles about one centre, "
                             "so it weighs the dense core and stops at half the specimen's reach",
}
_NAMES = {"box_dimension": "box-counting dimension", "sandbox_dimension": "sandbox dimension",
          "mass_radius_dimension": "mass-radius dimension"}


def dimension_to_report(fits: dict[str, dict]) -> dict | None:
    """Which fitted dimension to report for this specimen, and why the estimators differ.

    The sound fit (status ok) first in :data:`ESTIMATORS` order (box counting is the most
    widely reported and uses the whole specimen); without one, the uncertain fit with the
    narrowest interval, said to be uncertain; none when every fit is withheld. ``fits`` maps
    the keys of :data:`ESTIMATORS` to their dicts (value, ci95, fit_range_px, status, reason).
    """
    judged = {k: fits[k] for k in ESTIMATORS if isinstance(fits.get(k), dict)}
    if not judged:
        return None

    def width(fit):
        ci = fit.get("ci95") or [None, None]
        return (ci[1] - ci[0]) if all(_finite(v) for v in ci) else math.inf

    sound = [k for k in judged if judged[k].get("status") == OK]
    usable = sound or sorted((k for k in judged if judged[k].get("status") == UNCERTAIN), key=lambda k: width(judged[k]))
    if not usable:
        return {"key": None, "value": None, "ci95": None, "status": WITHHELD,
                "reason": "every estimator's fit is withheld: this picture gives no dimension to report"}
    key = usable[0]
    fit = judged[key]
    lo_hi = fit.get("fit_range_px") or [None, None]
    scales = (f" over {lo_hi[0]:.0f}-{lo_hi[1]:.0f} px" if all(_finite(v) for v in lo_hi) else "")
    if sound:
        reason = f"report the {_NAMES[key]}{scales}: its fit is sound"
    else:
        reason = (f"no estimator's fit is sound; the {_NAMES[key]}{scales} has the narrowest interval, "
                  f"but {fit.get('reason') or 'it is uncertain'}")
    ranges = {k: judged[k].get("ci95") for k in judged if judged[k].get("status") != WITHHELD}
    apart = [(a, b) for a in ranges for b in ranges if a < b and all(_finite(v) for v in (ranges[a] or []) + (ranges[b] or []))
             and len(ranges[a]) == 2 and len(ranges[b]) == 2
             and (ranges[a][1] < ranges[b][0] or ranges[b][1] < ranges[a][0])]
    differences = None
    if apart:
        names = sorted({k for pair in apart for k in pair}, key=list(ESTIMATORS).index)
        differences = ("the estimators disagree beyond their intervals: " + "; ".join(ESTIMATORS[k] for k in names)
                       + ". They agree only on a specimen that scales alike over every range and about every point; "
                         "a small specimen, one drawn a few pixels thick, or a dense core make them differ")
    return {"key": key, "value": fit.get("value"), "ci95": fit.get("ci95"), "status": fit.get("status"),
            "reason": reason, "differences": differences}


def plus_minus(judgement: Judgement, std) -> float | None:
    """The ``+-`` a page may print beside a parameter: the spread when it is a result, else None."""
    return float(std) if judgement.status == OK and _finite(std) else None
