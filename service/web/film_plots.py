"""Pictures of a film's report: the arrival map with its colour key, and the growth curves.

matplotlib on the Agg backend, no pyplot state; each function takes the film JSON (and the
arrival map) and returns file bytes, so it runs in the analysis worker.
"""

from __future__ import annotations

import io
from typing import Any

import matplotlib

matplotlib.use("Agg")

import numpy as np  # noqa: E402
from matplotlib.backends.backend_agg import FigureCanvasAgg  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

from service.web.plots import FIT, HOUSE_CMAP, HOUSE_STYLE, INK, SPECIMEN, _style, _svg  # noqa: E402

_MINUTE = 60.0


def _time_unit(times_s: list[float]) -> tuple[float, str]:
    span = max(times_s) if times_s else 0.0
    if span >= 3 * 3600:
        return 3600.0, "h"
    if span >= 3 * _MINUTE:
        return _MINUTE, "min"
    return 1.0, "s"


def arrival_png(arrival: np.ndarray, times_s: list[float], *, longest_px: int = 900) -> bytes:
    """The arrival map (when each deposit pixel first appeared) with a colour key in time."""
    rows, cols = np.nonzero(arrival >= 0)
    if rows.size == 0:
        crop = arrival
    else:
        pad = max(4, int(0.05 * max(np.ptp(rows), np.ptp(cols))))
        r0, r1 = max(0, rows.min() - pad), min(arrival.shape[0], rows.max() + pad + 1)
        c0, c1 = max(0, cols.min() - pad), min(arrival.shape[1], cols.max() + pad + 1)
        crop = arrival[r0:r1, c0:c1]
    unit, label = _time_unit(times_s)
    times = np.asarray(times_s, dtype=float) / unit
    shown = np.ma.masked_less(np.where(crop >= 0, times[np.clip(crop, 0, len(times) - 1)], -1.0), 0.0 - 1e-12)
    shown = np.ma.masked_where(crop < 0, shown)
    h, w = crop.shape
    aspect = h / max(w, 1)
    with matplotlib.rc_context(HOUSE_STYLE):
        fig = Figure(figsize=(6.0, max(3.0, 5.2 * aspect)), layout="constrained")
        ax = fig.add_subplot()
        cmap = HOUSE_CMAP.with_extremes(bad="#f4f1ea")
        image = ax.imshow(shown, cmap=cmap, vmin=float(times.min()), vmax=float(times.max()), interpolation="nearest")
        ax.set_xticks([])
        ax.set_yticks([])
        key = fig.colorbar(image, ax=ax, shrink=0.85)
        key.set_label(f"first seen at ({label} from the first frame)")
        out = io.BytesIO()
        fig.set_dpi(min(150, int(longest_px / 6.0)))
        FigureCanvasAgg(fig).print_png(out)
    return out.getvalue()


def growth_svg(film: dict[str, Any]) -> bytes:
    """Four panels against time: area, radii (with the front's fitted line and the rim),
    box dimension with its 95% intervals, and tips."""
    growth = film["growth"]
    unit, label = _time_unit(growth["times_s"])
    t = np.asarray(growth["times_s"], dtype=float) / unit
    with matplotlib.rc_context(HOUSE_STYLE):
        fig = Figure(figsize=(8.0, 5.6), layout="constrained")
        axes = fig.subplots(2, 2, sharex=True)
        a_area, a_radius, a_dim, a_tips = axes.ravel()
        a_area.plot(t, growth["area_px"], "o-", color=SPECIMEN, ms=3)
        a_area.set_ylabel("deposit area (px)")
        a_radius.plot(t, growth["max_radius_px"], "o-", color=SPECIMEN, ms=3, label="largest radius from the seed")
        a_radius.plot(t, growth["radius_of_gyration_px"], "s-", color=INK, ms=3, label="radius of gyration")
        velocity = film.get("front_velocity_px_per_s") or {}
        rim = film.get("time_to_rim_s") or {}
        if velocity.get("value") is not None:
            t0, t1 = velocity["fitted_from_s"], velocity["fitted_to_s"]
            end = rim.get("value") if rim.get("value") is not None else t1
            span = np.array([t0, max(t1, min(end, t1 + 3 * (t1 - t0 + 1e-9)))])
            r = np.asarray(growth["max_radius_px"], dtype=float)
            times = np.asarray(growth["times_s"], dtype=float)
            sel = times >= t0
            intercept = float(np.mean(r[sel] - velocity["value"] * times[sel]))
            a_radius.plot(span / unit, intercept + velocity["value"] * span, "--", color=FIT,
                          label="front, fitted line")
        if rim.get("rim_radius_px") is not None:
            a_radius.axhline(rim["rim_radius_px"], color="#a23b72", lw=1.0, label="rim electrode")
        a_radius.set_ylabel("radius (px)")
        a_radius.legend(fontsize=7, frameon=False)
        values = growth["box_dimension"]["values"]
        ci = growth["box_dimension"]["ci95"]
        keep = [i for i, v in enumerate(values) if v is not None and ci[i] is not None]
        if keep:
            v = np.array([values[i] for i in keep])
            lo = np.array([ci[i][0] for i in keep])
            hi = np.array([ci[i][1] for i in keep])
            a_dim.errorbar(t[keep], v, yerr=[v - lo, hi - v], fmt="o", color=SPECIMEN, ms=3, capsize=2)
        a_dim.set_ylabel("box dimension (95% interval)")
        tips = [(ti, n) for ti, n in zip(t, growth["tips"]) if n is not None]
        if tips:
            a_tips.plot([p[0] for p in tips], [p[1] for p in tips], "o-", color=INK, ms=3)
        a_tips.set_ylabel("tips")
        for ax in axes.ravel():
            _style(ax)
        for ax in axes[1]:
            ax.set_xlabel(f"time ({label})")
        return _svg(fig)
