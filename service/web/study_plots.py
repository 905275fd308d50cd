"""SVG plots of a study page (matplotlib, Agg backend, no pyplot state).

Three plots, each from the plain data of :mod:`service.study.table`: a measured quantity
against a condition with 95% intervals, each regime's probability against a condition,
and the morphology diagram over two conditions, drawn in the pages' house style
(:mod:`service.web.plots`).
"""

from __future__ import annotations

from collections.abc import Sequence

import matplotlib

matplotlib.use("Agg")

from matplotlib.figure import Figure  # noqa: E402
from matplotlib.lines import Line2D  # noqa: E402

from service.study.table import Axis, DiagramPoint, Series  # noqa: E402
from service.web.plots import CYCLE, INK, house_style  # noqa: E402
from service.web.plots import _figure as plain_figure  # noqa: E402
from service.web.plots import _svg as plain_svg  # noqa: E402
from service.web.plots import SPECIMEN as POINTS  # noqa: E402

#: Marker and colour of each regime (shape and colour both, so the key reads in grey too).
REGIME_STYLE = {
    "dla": ("o", CYCLE[1]),
    "dbm": ("s", CYCLE[0]),
    "eden": ("^", CYCLE[2]),
    "ballistic": ("D", CYCLE[3]),
}
_OTHER_STYLES = tuple(zip(("v", "P", "X", "h"), CYCLE[4:]))
_UNRANKED = ("x", "#8a8f94")

_house_figure = house_style(plain_figure)
_svg = house_style(plain_svg)


def _figure(width_in: float = 5.6, height_in: float = 3.6) -> Figure:
    return _house_figure(width_in, height_in)


def regime_style(regime: str | None, known: Sequence[str] = ()) -> tuple[str, str]:
    """(marker, colour) of a regime; regimes outside the four families take the next free style."""
    if regime is None:
        return _UNRANKED
    if regime in REGIME_STYLE:
        return REGIME_STYLE[regime]
    others = sorted(r for r in known if r not in REGIME_STYLE)
    index = others.index(regime) if regime in others else 0
    return _OTHER_STYLES[index % len(_OTHER_STYLES)]


def _condition_axis(ax, axis: Axis, which: str = "x") -> None:
    setter = ax.set_xlabel if which == "x" else ax.set_ylabel
    setter(axis.title)
    if not axis.is_number:
        ticks = range(len(axis.categories))
        if which == "x":
            ax.set_xticks(list(ticks), list(axis.categories))
        else:
            ax.set_yticks(list(ticks), list(axis.categories))


def _empty(ax, message: str) -> None:
    ax.text(0.5, 0.5, message, ha="center", va="center", transform=ax.transAxes, color=INK)


def quantity_svg(series: Series, quantity_label: str) -> bytes:
    """Each specimen's value of a quantity against a condition, with its 95% interval as a bar."""
    fig = _figure()
    ax = fig.axes[0]
    _condition_axis(ax, series.axis)
    ax.set_ylabel(quantity_label)
    if not series.points:
        _empty(ax, "no specimen carries both")
        return _svg(fig)
    with_ci = [p for p in series.points if p.ci95]
    if with_ci:
        lower = [p.y - p.ci95[0] for p in with_ci]
        upper = [p.ci95[1] - p.y for p in with_ci]
        ax.errorbar([p.x for p in with_ci], [p.y for p in with_ci], yerr=[lower, upper], fmt="none",
                    ecolor=POINTS, elinewidth=1.0, capsize=3, alpha=0.8, label="95% interval")
    ax.plot(series.xs(), series.ys(), linestyle="none", marker="o", color=POINTS, markersize=5, label="specimen")
    ax.legend(loc="best", frameon=False, fontsize=8)
    return _svg(fig)


def regimes_svg(axis: Axis, curves: dict[str, list[tuple[float, float]]]) -> bytes:
    """Each regime's probability against a condition (one line and marker per regime)."""
    fig = _figure()
    ax = fig.axes[0]
    _condition_axis(ax, axis)
    ax.set_ylabel("probability of the regime")
    ax.set_ylim(-0.02, 1.02)
    drawn = False
    for regime, points in curves.items():
        if not points:
            continue
        marker, colour = regime_style(regime, list(curves))
        ax.plot([x for x, _ in points], [p for _, p in points], marker=marker, color=colour, linewidth=1.2,
                markersize=5, label=regime)
        drawn = True
    if drawn:
        ax.legend(loc="best", frameon=False, fontsize=8, title="regime", title_fontsize=8)
    else:
        _empty(ax, "no ranked specimen carries this condition")
    return _svg(fig)


def diagram_svg(x_axis: Axis, y_axis: Axis, points: Sequence[DiagramPoint]) -> bytes:
    """The morphology diagram: every specimen a point at its two conditions, shaped and
    coloured by its top regime; hollow when the matcher's verdict was not confident."""
    fig = _figure(6.2, 4.0)
    ax = fig.axes[0]
    _condition_axis(ax, x_axis, "x")
    _condition_axis(ax, y_axis, "y")
    regimes = sorted({p.regime for p in points if p.regime is not None})
    for point in points:
        marker, colour = regime_style(point.regime, regimes)
        face = "none" if point.uncertain or point.regime is None else colour
        ax.plot([point.x], [point.y], linestyle="none", marker=marker, markersize=9, markeredgewidth=1.5,
                markeredgecolor=colour, markerfacecolor=face)
    if not points:
        _empty(ax, "no specimen carries both conditions")
        return _svg(fig)
    handles = []
    for regime in regimes + ([None] if any(p.regime is None for p in points) else []):
        marker, colour = regime_style(regime, regimes)
        handles.append(Line2D([], [], linestyle="none", marker=marker, markersize=8, markeredgecolor=colour,
                              markerfacecolor=colour, label=regime or "not ranked"))
    if any(p.uncertain and p.regime is not None for p in points):
        handles.append(Line2D([], [], linestyle="none", marker="o", markersize=8, markeredgecolor=INK,
                              markerfacecolor="none", label="hollow: not confident"))
    ax.legend(handles=handles, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False, fontsize=8,
              title="top regime", title_fontsize=8)
    ax.margins(0.12)
    return _svg(fig)
