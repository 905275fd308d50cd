"""SVG plots of the report and compare pages (matplotlib, Agg backend, no pyplot state).

Each function takes parts of the analysis JSON and returns SVG bytes, so the same plot can
be drawn in an analysis worker or, for the compare page, from stored records.
"""

from __future__ import annotations

import io
from collections.abc import Mapping, Sequence
from typing import Any

import matplotlib

matplotlib.use("Agg")

import numpy as np  # noqa: E402
from matplotlib.backends.backend_svg import FigureCanvasSVG  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter  # noqa: E402

#: Our palette: ink, the specimen's colour, the fitted line, and a cycle for compared specimens.
INK = "#1d2a33"
SPECIMEN = "#b3541e"
FIT = "#1f6f8b"
CYCLE = ("#b3541e", "#1f6f8b", "#5a8f29", "#7b3f8c", "#c79a00", "#3d5a80", "#a23b72", "#4d4d4d")

_RC = {
    "svg.fonttype": "none",
    "svg.hashsalt": "ramiform",
    "font.size": 9,
    "axes.edgecolor": INK,
    "axes.labelcolor": INK,
    "xtick.color": INK,
    "ytick.color": INK,
    "axes.spines.top": False,
    "axes.spines.right": False,
}


def _figure(width_in: float = 5.0, height_in: float = 3.4) -> Figure:
    with matplotlib.rc_context(_RC):
        fig = Figure(figsize=(width_in, height_in), layout="constrained")
        fig.add_subplot()
    return fig


def _svg(fig: Figure) -> bytes:
    out = io.BytesIO()
    with matplotlib.rc_context(_RC):
        FigureCanvasSVG(fig).print_svg(out, metadata={"Date": None, "Creator": "ramiform"})
    return out.getvalue()


def _style(ax) -> None:
    ax.grid(True, which="major", color="#d9dee2", linewidth=0.6)
    ax.set_axisbelow(True)
    for axis in (ax.xaxis, ax.yaxis):
        if axis.get_scale() == "log":  # plain numbers at 1-2-5 steps; a short axis still gets labels
            axis.set_major_locator(LogLocator(base=10, subs=(1.0, 2.0, 5.0)))
            axis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
            axis.set_minor_formatter(NullFormatter())


def _positive_pairs(xs: Sequence[float], ys: Sequence[float]) -> tuple[np.ndarray, np.ndarray]:
    x = np.asarray(xs, dtype=float)
    y = np.asarray(ys, dtype=float)
    keep = (x > 0) & (y > 0) & np.isfinite(x) & np.isfinite(y)
    return x[keep], y[keep]


def box_counting_svg(box: Mapping[str, Any]) -> bytes:
    """Boxes occupied against box size (log-log), the fitted range and the fitted slope.

    ``box`` is ``features.box_dimension``: ``sizes_px``, ``counts``, ``fit_range_px``,
    ``intercept`` (natural logs), ``value`` and ``ci95``. The band shows the slopes of the
    95% interval pivoting on the middle of the fitted range.
    """
    fig = _figure()
    ax = fig.axes[0]
    sizes, counts = _positive_pairs(box.get("sizes_px", []), box.get("counts", []))
    ax.loglog(sizes, counts, "o", color=SPECIMEN, markersize=4, label="occupied boxes")
    lo, hi = box.get("fit_range_px", (None, None))
    value = box.get("value")
    if lo and hi and value is not None and box.get("intercept") is not None:
        ax.axvspan(lo, hi, color=FIT, alpha=0.08, linewidth=0, label="fitted range")
        s = np.geomspace(lo, hi, 50)
        ax.loglog(s, np.exp(box["intercept"]) * s ** (-value), color=FIT, linewidth=1.5,
                  label=f"slope −{value:.3f}")
        ci = box.get("ci95")
        if ci and all(np.isfinite(ci)):
            pivot = np.sqrt(lo * hi)
            n_pivot = np.exp(box["intercept"]) * pivot ** (-value)
            band = [n_pivot * (s / pivot) ** (-d) for d in ci]
            ax.fill_between(s, np.minimum(*band), np.maximum(*band), color=FIT, alpha=0.2, linewidth=0,
                            label=f"95% interval {ci[0]:.3f}–{ci[1]:.3f}")
    ax.set_xlabel("box side (px)")
    ax.set_ylabel("boxes occupied")
    ax.set_title("Box counting", loc="left", color=INK)
    _style(ax)
    ax.legend(frameon=False, fontsize=8)
    return _svg(fig)


def lacunarity_svg(lacunarity: Mapping[str, Any]) -> bytes:
    """Gliding-box lacunarity against box side (log-log); 1 is a uniformly filled image."""
    fig = _figure()
    ax = fig.axes[0]
    scales, values = _positive_pairs(lacunarity.get("scales_px", []), lacunarity.get("values", []))
    ax.loglog(scales, values, "o-", color=SPECIMEN, markersize=4, linewidth=1.2)
    ax.axhline(1.0, color="#8a949c", linewidth=0.8, linestyle=":")
    ax.set_xlabel("box side (px)")
    ax.set_ylabel("lacunarity Λ(r)")
    ax.set_title("Lacunarity", loc="left", color=INK)
    _style(ax)
    return _svg(fig)


def reference_distributions_svg(rows: Sequence[Mapping[str, Any]], best: str, runner_up: str | None) -> bytes:
    """One panel per matcher feature: the best and runner-up families as the matcher models
    them (Gaussian, mean and sd at the specimen's size) and the specimen's value as a line.

    ``rows`` are ``explanation.all_features`` of the analysis JSON: ``feature``, ``value``,
    ``best`` and ``runner_up`` (each ``{"mean", "sd", "z"}``).
    """
    rows = [r for r in rows if r.get("value") is not None and r.get("best")]
    n = max(len(rows), 1)
    cols = min(n, 4)
    n_rows = -(-n // cols)
    with matplotlib.rc_context(_RC):
        fig = Figure(figsize=(2.6 * cols, 1.9 * n_rows + 0.4), layout="constrained")
        axes = fig.subplots(n_rows, cols, squeeze=False).ravel()
    for ax, row in zip(axes, rows):
        families = [(best, row["best"], FIT)]
        if runner_up and row.get("runner_up"):
            families.append((runner_up, row["runner_up"], "#8a949c"))
        spans = [(f["mean"], f["sd"]) for _, f, _ in families if f.get("sd") and np.isfinite(f["sd"]) and f["sd"] > 0]
        lo = min([m - 4 * sd for m, sd in spans] + [row["value"]])
        hi = max([m + 4 * sd for m, sd in spans] + [row["value"]])
        x = np.linspace(lo - 0.05 * (hi - lo + 1e-9), hi + 0.05 * (hi - lo + 1e-9), 200)
        for name, family, colour in families:
            sd = family.get("sd")
            if sd and np.isfinite(sd) and sd > 0:
                pdf = np.exp(-0.5 * ((x - family["mean"]) / sd) ** 2) / (sd * np.sqrt(2 * np.pi))
                ax.fill_between(x, pdf, color=colour, alpha=0.25, linewidth=0)
                ax.plot(x, pdf, color=colour, linewidth=1, label=name)
        ax.axvline(row["value"], color=SPECIMEN, linewidth=2, label="this specimen")
        ax.set_yticks([])
        ax.spines["left"].set_visible(False)
        ax.set_title(row["feature"], loc="left", color=INK, fontsize=8)
        ax.tick_params(labelsize=7)
    for ax in axes[len(rows):]:
        ax.set_visible(False)
    if rows:
        handles, labels = axes[0].get_legend_handles_labels()
        fig.legend(handles, labels, loc="outside lower center", ncols=len(labels), frameon=False, fontsize=8)
    return _svg(fig)


def compare_svgs(specimens: Sequence[tuple[str, Mapping[str, Any]]]) -> dict[str, bytes]:
    """Overlaid box-counting and lacunarity curves of several specimens.

    ``specimens`` is ``[(name, features), ...]``; returns ``{"box_counting": svg, "lacunarity": svg}``.
    Box counts are divided by each specimen's count at its smallest box so that images of
    different sizes share one axis; the slopes, which are the dimensions, are unchanged.
    """
    box_fig, lac_fig = _figure(6.0, 3.8), _figure(6.0, 3.8)
    box_ax, lac_ax = box_fig.axes[0], lac_fig.axes[0]
    for i, (name, features) in enumerate(specimens):
        colour = CYCLE[i % len(CYCLE)]
        box = features.get("box_dimension", {})
        sizes, counts = _positive_pairs(box.get("sizes_px", []), box.get("counts", []))
        if sizes.size:
            d = box.get("value")
            label = f"{name} (D = {d:.3f})" if d is not None else name
            box_ax.loglog(sizes, counts / counts[np.argmin(sizes)], "o-", color=colour, markersize=3,
                          linewidth=1, label=label)
        lac = features.get("lacunarity", {})
        scales, values = _positive_pairs(lac.get("scales_px", []), lac.get("values", []))
        if scales.size:
            lac_ax.loglog(scales, values, "o-", color=colour, markersize=3, linewidth=1, label=name)
    box_ax.set_xlabel("box side (px)")
    box_ax.set_ylabel("boxes occupied / boxes at the smallest side")
    box_ax.set_title("Box counting", loc="left", color=INK)
    lac_ax.axhline(1.0, color="#8a949c", linewidth=0.8, linestyle=":")
    lac_ax.set_xlabel("box side (px)")
    lac_ax.set_ylabel("lacunarity Λ(r)")
    lac_ax.set_title("Lacunarity", loc="left", color=INK)
    for ax in (box_ax, lac_ax):
        _style(ax)
        if ax.get_legend_handles_labels()[0]:
            ax.legend(frameon=False, fontsize=8)
    return {"box_counting": _svg(box_fig), "lacunarity": _svg(lac_fig)}
