"""SVG plots of the report and compare pages (matplotlib, Agg backend, no pyplot state).

Each function takes parts of the analysis JSON and returns SVG bytes, so the same plot can
be drawn in an analysis worker or, for the compare page, from stored records.
"""

from __future__ import annotations

import base64
import functools
import io
from collections.abc import Mapping, Sequence
from typing import Any

import matplotlib

matplotlib.use("Agg")

import numpy as np  # noqa: E402
from cycler import cycler  # noqa: E402
from matplotlib.colors import LinearSegmentedColormap  # noqa: E402
from matplotlib.backends.backend_svg import FigureCanvasSVG  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402
from matplotlib.ticker import FuncFormatter, LogLocator, MaxNLocator, NullFormatter  # noqa: E402

from service.web.labels import matcher_feature_label  # noqa: E402

#: Our palette: ink, the specimen's colour, the fitted line, and a cycle for compared specimens.
INK = "#1d2a33"
MUTED = "#6b7780"
RULE = "#d9dee2"
SPECIMEN = "#b3541e"
FIT = "#1f6f8b"
CYCLE = ("#b3541e", "#1f6f8b", "#5a8f29", "#7b3f8c", "#c79a00", "#3d5a80", "#a23b72", "#4d4d4d")

#: Ramiform's colour map: pale paper through copper to deep ink-teal, monotone in lightness so
#: that it reads in grey print too. Every plot that uses it draws a colour key beside it.
HOUSE_CMAP = LinearSegmentedColormap.from_list(
    "ramiform", ["#fbf6ec", "#efc9a0", "#d98a4e", "#b3541e", "#6e3b3a", "#1f4a5c", "#10242e"])

#: The house style, in one place: every plot of the pages is drawn inside it (see ``house_style``).
HOUSE_STYLE = {
    "svg.fonttype": "none",
    "svg.hashsalt": "ramiform",
    "font.family": "sans-serif",
    "font.sans-serif": ["DejaVu Sans", "Liberation Sans"],  # metrics; the SVG names the page's own font stack
    "font.size": 9,
    "axes.titlesize": 10,
    "axes.titleweight": "bold",
    "axes.titlelocation": "left",
    "axes.titlecolor": INK,
    "axes.labelsize": 8.5,
    "axes.edgecolor": MUTED,
    "axes.labelcolor": INK,
    "axes.linewidth": 0.7,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": True,
    "axes.grid.which": "major",
    "axes.axisbelow": True,
    "axes.prop_cycle": cycler(color=list(CYCLE)),
    "grid.color": RULE,
    "grid.linewidth": 0.5,
    "xtick.color": MUTED,
    "ytick.color": MUTED,
    "xtick.labelcolor": INK,
    "ytick.labelcolor": INK,
    "xtick.direction": "in",
    "ytick.direction": "in",
    "xtick.major.size": 3.0,
    "ytick.major.size": 3.0,
    "xtick.minor.size": 1.5,
    "ytick.minor.size": 1.5,
    "xtick.labelsize": 8,
    "ytick.labelsize": 8,
    "lines.linewidth": 1.4,
    "lines.markersize": 4,
    "patch.linewidth": 0,
    "legend.frameon": False,
    "legend.fontsize": 8,
    "figure.facecolor": "none",
    "axes.facecolor": "none",
}


def house_style(draw):
    """Draw inside the house style: every plotting function of this module is wrapped once."""

    @functools.wraps(draw)
    def drawn(*args, **kwargs):
        with matplotlib.rc_context(HOUSE_STYLE):
            return draw(*args, **kwargs)

    return drawn


def _figure(width_in: float = 5.0, height_in: float = 3.4) -> Figure:
    fig = Figure(figsize=(width_in, height_in), layout="constrained")
    fig.add_subplot()
    return fig


def _svg(fig: Figure) -> bytes:
    out = io.BytesIO()
    FigureCanvasSVG(fig).print_svg(out, metadata={"Date": None, "Creator": "ramiform"})
    return out.getvalue()


_SUPERSCRIPT = str.maketrans("-0123456789", "⁻⁰¹²³⁴⁵⁶⁷⁸⁹")


def _log_label(value: float, _position=None) -> str:
    """Plain numbers from 0.01 to 99999, powers of ten (10⁻⁵) beyond."""
    if 0.01 <= value < 1e5:
        return f"{value:g}"
    exponent = int(np.round(np.log10(value)))
    return "10" + str(exponent).translate(_SUPERSCRIPT)


def _style(ax) -> None:
    for axis, limits in ((ax.xaxis, ax.get_xlim()), (ax.yaxis, ax.get_ylim())):
        if axis.get_scale() == "log":
            lo, hi = sorted(limits)
            decades = np.log10(hi / lo) if lo > 0 else 0
            # 1-2-5 steps on a short axis so it still gets labels; decades only on a long one
            subs = (1.0, 2.0, 5.0) if decades <= 3 else (1.0,)
            axis.set_major_locator(LogLocator(base=10, subs=subs))
            axis.set_major_formatter(FuncFormatter(_log_label))
            axis.set_minor_formatter(NullFormatter())


def _legend_below(fig: Figure, ax) -> None:
    """The key under the plot, never over the curves."""
    handles, names = ax.get_legend_handles_labels()
    if handles:
        fig.legend(handles, names, loc="outside lower center", ncols=min(len(names), 2))


def _positive_pairs(xs: Sequence[float], ys: Sequence[float]) -> tuple[np.ndarray, np.ndarray]:
    x = np.asarray(xs, dtype=float)
    y = np.asarray(ys, dtype=float)
    keep = (x > 0) & (y > 0) & np.isfinite(x) & np.isfinite(y)
    return x[keep], y[keep]


@house_style
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
    ax.set_title("Box counting")
    _style(ax)
    _legend_below(fig, ax)
    return _svg(fig)


@house_style
def lacunarity_svg(lacunarity: Mapping[str, Any]) -> bytes:
    """Gliding-box lacunarity against box side (log-log); 1 is a uniformly filled image."""
    fig = _figure()
    ax = fig.axes[0]
    scales, values = _positive_pairs(lacunarity.get("scales_px", []), lacunarity.get("values", []))
    ax.loglog(scales, values, "o-", color=SPECIMEN, markersize=4, linewidth=1.2)
    ax.axhline(1.0, color="#8a949c", linewidth=0.8, linestyle=":")
    ax.set_xlabel("box side (px)")
    ax.set_ylabel("lacunarity Λ(r)")
    ax.set_title("Lacunarity")
    _style(ax)
    return _svg(fig)


@house_style
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
        ax.set_title(matcher_feature_label(str(row["feature"])), fontsize=7.5, fontweight="normal")
        ax.grid(False)
        ax.tick_params(labelsize=7)
    for ax in axes[len(rows):]:
        ax.set_visible(False)
    if rows:
        handles, labels = axes[0].get_legend_handles_labels()
        fig.legend(handles, labels, loc="outside lower center", ncols=len(labels))
    return _svg(fig)


@house_style
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
    box_ax.set_title("Box counting")
    lac_ax.axhline(1.0, color="#8a949c", linewidth=0.8, linestyle=":")
    lac_ax.set_xlabel("box side (px)")
    lac_ax.set_ylabel("lacunarity Λ(r)")
    lac_ax.set_title("Lacunarity")
    for fig, ax in ((box_fig, box_ax), (lac_fig, lac_ax)):
        _style(ax)
        _legend_below(fig, ax)
    return {"box_counting": _svg(box_fig), "lacunarity": _svg(lac_fig)}


_BRANCH_PANELS = (
    ("branch_lengths", "Branch length", "length"),
    ("widths", "Branch width", "width"),
    ("angles_deg", "Branching angle", "angle (°)"),
    ("tortuosity", "Tortuosity", "path over straight length"),
)


@house_style
def branch_distributions_svg(arrays: Mapping[str, Sequence[float]], *, pixel_size_mm: float | None = None) -> bytes:
    """Histograms of the skeleton's branch lengths, widths, branching angles and tortuosity.

    ``arrays`` holds ``branch_lengths`` and ``widths`` (px), ``angles_deg`` and ``tortuosity``
    (each per branch or per junction, as ``service.features.skeleton.SkeletonGraph`` gives them).
    Lengths and widths are drawn in mm when ``pixel_size_mm`` is given. The median is marked.
    """
    fig = Figure(figsize=(7.2, 4.4), layout="constrained")
    axes = fig.subplots(2, 2).ravel()
    unit = "mm" if pixel_size_mm else "px"
    for ax, (key, title, xlabel) in zip(axes, _BRANCH_PANELS):
        values = np.asarray(arrays.get(key, []), dtype=float)
        values = values[np.isfinite(values)]
        if key in ("branch_lengths", "widths"):
            values = values * pixel_size_mm if pixel_size_mm else values
            xlabel = f"{xlabel} ({unit})"
        ax.set_title(title)
        ax.set_xlabel(xlabel)
        if values.size == 0:
            ax.text(0.5, 0.5, "none measured", transform=ax.transAxes, ha="center", va="center", color=MUTED)
            ax.set_yticks([])
            continue
        if key == "tortuosity":  # a long tail of looped paths would squeeze the bulk into one bar
            values = values[values <= np.percentile(values, 98)]
        bins = np.histogram_bin_edges(values, bins="fd") if values.size > 3 else 5
        if np.ndim(bins) and len(bins) > 40:
            bins = 40
        ax.hist(values, bins=bins, color=SPECIMEN, alpha=0.85, edgecolor="white", linewidth=0.4)
        median = float(np.median(values))
        ax.axvline(median, color=INK, linewidth=1.0, linestyle="--")
        ax.text(median, 1.0, f" median {median:.3g}", transform=ax.get_xaxis_transform(), va="top", ha="left",
                fontsize=7.5, color=INK)
        ax.set_ylabel("count")
        ax.yaxis.set_major_locator(MaxNLocator(integer=True, nbins=4))
        ax.text(1.0, 1.02, f"n = {values.size}", transform=ax.transAxes, ha="right", va="bottom", fontsize=7.5,
                color=MUTED)
    return _svg(fig)


@house_style
def branch_summary_svg(skeleton: Mapping[str, Any], *, calibrated: bool = False) -> bytes:
    """For a stored reading without the branch arrays: each distribution's 10th-90th percentile
    span, median and mean, from the summaries of ``features.skeleton``."""
    fig = Figure(figsize=(7.2, 2.8), layout="constrained")
    axes = fig.subplots(1, 4)
    for ax, (px_key, mm_key, title) in zip(axes, (
        ("branch_length_px", "branch_length_mm", "Branch length"), ("width_px", "width_mm", "Branch width"),
        ("branching_angle_deg", None, "Branching angle"), ("tortuosity", None, "Tortuosity"),
    )):
        key = mm_key if calibrated and mm_key and mm_key in skeleton else px_key
        summary = skeleton.get(key) or {}
        ax.set_title(title, fontsize=8.5)
        ax.set_xticks([])
        if not summary.get("n"):
            continue
        ax.vlines(0, summary["p10"], summary["p90"], color=SPECIMEN, linewidth=6, alpha=0.5)
        ax.plot([0], [summary["median"]], "_", color=INK, markersize=16, markeredgewidth=2)
        ax.plot([0], [summary["mean"]], "o", color=FIT, markersize=4)
        unit = "mm" if key.endswith("_mm") else "px" if key.endswith("_px") else "°" if key.endswith("deg") else ""
        ax.set_ylabel(unit)
        ax.set_xlim(-1, 1)
    fig.text(0.5, 0.0, "bar: 10th to 90th percentile · line: median · dot: mean", ha="center", va="bottom",
             fontsize=7.5, color=MUTED)
    return _svg(fig)


@house_style
def horton_svg(strahler: Mapping[str, Any], *, calibrated: bool = False) -> bytes:
    """Horton's laws: log number of streams and log mean stream length against Strahler order,
    with the fitted ratios ``bifurcation_ratio`` (R_B = N_w / N_w+1) and ``length_ratio``."""
    counts = np.asarray(strahler.get("stream_counts") or [], dtype=float)
    key = "mean_stream_length_mm" if calibrated and strahler.get("mean_stream_length_mm") else "mean_stream_length_px"
    lengths = np.asarray(strahler.get(key) or [], dtype=float)
    unit = "mm" if key.endswith("_mm") else "px"
    fig = Figure(figsize=(7.2, 3.0), layout="constrained")
    left, right = fig.subplots(1, 2)
    orders = np.arange(1, counts.size + 1)
    for ax, values, ratio, title, ylabel, sign in (
        (left, counts, strahler.get("bifurcation_ratio"), "Streams per order", "number of streams", -1),
        (right, lengths, strahler.get("length_ratio"), "Mean stream length", f"mean length ({unit})", 1),
    ):
        ax.set_title(title)
        ax.set_xlabel("Strahler order")
        ax.set_ylabel(ylabel)
        ax.set_yscale("log")
        keep = values > 0
        ax.plot(orders[: values.size][keep], values[keep], "o", color=SPECIMEN)
        if ratio and np.count_nonzero(keep) >= 2:
            o = orders[: values.size][keep]
            # Horton's law through the points' geometric centre with the fitted ratio as slope.
            centre = np.mean(np.log(values[keep]))
            line = np.exp(centre + sign * np.log(ratio) * (o - o.mean()))
            name = "bifurcation ratio" if sign < 0 else "length ratio"
            ax.plot(o, line, color=FIT, linewidth=1.2)
            ax.text(0.98, 0.95 if sign > 0 else 0.95, f"{name} = {ratio:.2f}", transform=ax.transAxes, ha="right",
                    va="top", color=FIT, fontsize=8.5)
        ax.xaxis.set_major_locator(MaxNLocator(integer=True))
        _style(ax)
    return _svg(fig)


@house_style
def distance_matrix_svg(names: Sequence[str], matrix: Sequence[Sequence[float | None]], *, title: str) -> bytes:
    """The compare page's distances as a picture in the house colour map, with its colour key."""
    m = np.array([[np.nan if v is None else float(v) for v in row] for row in matrix], dtype=float)
    n = len(names)
    fig = Figure(figsize=(1.6 + 0.55 * n, 1.0 + 0.5 * n), layout="constrained")
    ax = fig.add_subplot()
    image = ax.imshow(np.ma.masked_invalid(m), cmap=HOUSE_CMAP, vmin=0)
    ax.grid(False)
    short = [s if len(s) <= 14 else s[:13] + "…" for s in names]
    ax.set_xticks(range(n), short, rotation=40, ha="right")
    ax.set_yticks(range(n), short)
    ax.tick_params(length=0)
    for i in range(n):
        for j in range(n):
            if np.isfinite(m[i, j]):
                dark = image.norm(m[i, j]) > 0.55
                ax.text(j, i, f"{m[i, j]:.1f}", ha="center", va="center", fontsize=7.5,
                        color="white" if dark else INK)
    key = fig.colorbar(image, ax=ax, shrink=0.85)
    key.set_label(title)
    key.outline.set_visible(False)
    return _svg(fig)


def skeleton_svgs(skeleton, features: Mapping[str, Any]) -> dict[str, bytes]:
    """``branches.svg`` (histograms) and ``horton.svg`` of one analysis, from the skeleton graph's
    per-branch arrays (``service.features.skeleton.SkeletonGraph``) and the ``features`` dict."""
    scale = features.get("pixel_size_mm") if features.get("calibrated") else None
    arrays = {"branch_lengths": skeleton.branch_lengths_px, "widths": skeleton.widths_px,
              "angles_deg": skeleton.branching_angles_deg, "tortuosity": skeleton.tortuosity}
    strahler = (features.get("skeleton") or {}).get("strahler") or {}
    return {"branches.svg": branch_distributions_svg(arrays, pixel_size_mm=scale),
            "horton.svg": horton_svg(strahler, calibrated=scale is not None)}


def svg_data_uri(svg: bytes) -> str:
    return "data:image/svg+xml;base64," + base64.b64encode(svg).decode("ascii")


def report_plots_or_files(analysis: Mapping[str, Any], files: Mapping[str, str]) -> dict[str, str]:
    """``branch_plot`` and ``horton_plot`` for the report: the stored files when the reading has
    them, else drawn now from the summaries in the analysis (readings stored before these plots)."""
    features = analysis.get("features") or {}
    skeleton = features.get("skeleton") or {}
    calibrated = bool(features.get("calibrated"))
    branch = files.get("branches.svg") or svg_data_uri(branch_summary_svg(skeleton, calibrated=calibrated))
    horton = files.get("horton.svg") or svg_data_uri(horton_svg(skeleton.get("strahler") or {}, calibrated=calibrated))
    return {"branch_plot": branch, "horton_plot": horton}
