"""What the report page shows, built from the stored analysis JSON (a plain dict).

Functional core of the report: no FastAPI, no templates. Every number the page shows passes
through here once, so one quantity has one value on the page, in one unit (mm when the image
is calibrated), with its interval and the range it was fitted over; a value no plane figure
can have (a dimension outside [0, 2], an interval wider than that whole range, a parameter
uncertainty finer than the library grid can resolve) is withheld or flagged with the reason,
never shown as a result.

The dict may carry warnings as plain strings or as objects ``{"code", "text"}``; both are read.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

from service.quality import UNCERTAIN, grid_limited_cell, judge_dimension, judge_parameter
from service.web import labels

#: Fits over less than this many decades of scale are flagged (common practice: at least one decade).
MIN_DECADES = 1.0
#: A fit starting closer than this many branch widths sees drawn strokes rather than the pattern.
DRAWING_SCALE_WIDTHS = 3.0
#: A fit ending beyond this share of the specimen's radius sees the specimen's own edge.
FINITE_SIZE_SHARE = 0.5
#: Below this segmentation confidence the reading is unsure (as formatting.UNCERTAIN_BELOW).
UNSURE_BELOW = 0.5

DIMENSIONS = (
    ("box_dimension", "Box-counting dimension", "box sides"),
    ("mass_radius_dimension", "Mass-radius dimension", "radii"),
    ("sandbox_dimension", "Sandbox dimension", "sandbox radii"),
)


def _number(value: Any) -> float | None:
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        return None
    value = float(value)
    return value if math.isfinite(value) else None


def num(value: Any, digits: int = 3) -> str:
    """A number in plain text with ``digits`` significant figures; "–" for none."""
    v = _number(value)
    if v is None:
        return "–"
    if float(v).is_integer() and abs(v) < 1e6:
        return str(int(v))
    text = f"{v:.{digits}g}"
    if "e" in text:
        mantissa, exponent = text.split("e")
        return f"{mantissa} × 10^{int(exponent)}"
    return text


def fixed(value: Any, decimals: int = 3) -> str:
    v = _number(value)
    return "–" if v is None else f"{v:.{decimals}f}"


def warning_text(warning: Any) -> str:
    """The words of a warning given as a string or as ``{"code", "text"}``."""
    if isinstance(warning, dict):
        return str(warning.get("text") or warning.get("message") or warning.get("code") or "")
    return str(warning)


def warning_texts(warnings: Any) -> list[str]:
    """Warnings as words, each once, in order."""
    out: list[str] = []
    for w in warnings or []:
        text = warning_text(w).strip()
        if text and text not in out:
            out.append(text)
    return out


# --- the measurements ----------------------------------------------------------------------

@dataclass(frozen=True)
class Measurement:
    """One row of the measurement table.

    ``value`` and ``interval`` are display text ("" when withheld); ``status`` is "ok",
    "flagged" (shown, with ``reason``) or "withheld" (not shown as a result; ``reason`` says why).
    """

    key: str
    label: str
    value: str
    interval: str
    fit_range: str
    unit: str
    status: str = "ok"
    reason: str = ""
    note: str = ""


@dataclass(frozen=True)
class DimensionFit:
    key: str
    label: str
    value: float | None
    ci95: tuple[float, float] | None
    fit_range_px: tuple[float, float] | None
    decades: float | None
    status: str
    reason: str


def check_dimension(value: Any, ci95: Any, fit_range_px: Any = None, n_fit_points: Any = None) -> tuple[str, str]:
    """("ok" | "flagged" | "withheld", reason) for a fractal dimension of a plane figure: the
    contract's judgement (:func:`service.quality.judge_dimension`), "uncertain" shown as flagged."""
    judged = judge_dimension(_number(value), _interval(ci95), _interval(fit_range_px),
                             n_fit_points if isinstance(n_fit_points, int) else None)
    return ("flagged" if judged.status == UNCERTAIN else judged.status), judged.reason or ""


def _interval(ci95: Any) -> tuple[float, float] | None:
    if not isinstance(ci95, (list, tuple)) or len(ci95) != 2:
        return None
    lo, hi = _number(ci95[0]), _number(ci95[1])
    if lo is None or hi is None:
        return None
    return (min(lo, hi), max(lo, hi))


def _length(features: dict[str, Any], px: float | None, scale_mm: float | None, digits: int = 3,
            square: bool = False) -> tuple[str, str]:
    """(value text, unit) of a length (or area) in px, in mm when calibrated."""
    if px is None:
        return "–", ""
    if scale_mm:
        return num(px * (scale_mm ** 2 if square else scale_mm), digits), "mm²" if square else "mm"
    return num(px, digits), "px²" if square else "px"


def _range_text(lo_px: float, hi_px: float, scale_mm: float | None, what: str) -> str:
    if scale_mm:
        return f"{what} {num(lo_px * scale_mm, 2)}–{num(hi_px * scale_mm, 2)} mm ({num(lo_px, 3)}–{num(hi_px, 3)} px)"
    return f"{what} {num(lo_px, 3)}–{num(hi_px, 3)} px"


def dimension_fits(features: dict[str, Any]) -> list[DimensionFit]:
    out = []
    for key, label, _ in DIMENSIONS:
        fit = features.get(key)
        if not isinstance(fit, dict):
            continue
        status, reason = check_dimension(fit.get("value"), fit.get("ci95"), fit.get("fit_range_px"),
                                         fit.get("n_fit_points"))
        r = _interval(fit.get("fit_range_px"))
        decades = math.log10(r[1] / r[0]) if r and r[0] > 0 else None
        out.append(DimensionFit(key, label, _number(fit.get("value")), _interval(fit.get("ci95")), r, decades,
                                status, reason))
    return out


def measurements(analysis: dict[str, Any]) -> list[Measurement]:
    """The table a paper needs: dimensions with interval and range, sizes, counts, ratios."""
    features = analysis.get("features") or {}
    scale = calibration_mm(analysis)
    rows: list[Measurement] = []
    whats = {key: what for key, _, what in DIMENSIONS}
    for fit in dimension_fits(features):
        shown = fit.status != "withheld"
        interval = f"{fit.ci95[0]:.3f} – {fit.ci95[1]:.3f}" if (shown and fit.ci95) else ""
        fitted = _range_text(*fit.fit_range_px, scale, whats[fit.key]) if fit.fit_range_px else ""
        if fitted and fit.decades is not None:
            fitted += f", {fit.decades:.2f} decades"
        n_points = (features.get(fit.key) or {}).get("n_fit_points")
        rows.append(Measurement(fit.key, fit.label, f"{fit.value:.3f}" if shown and fit.value is not None else "",
                                interval, fitted, "", fit.status, fit.reason,
                                f"{n_points} points" if isinstance(n_points, int) else ""))
    profile = features.get("profile") or {}
    skeleton = features.get("skeleton") or {}
    sizes = (
        ("radius_of_gyration", "Radius of gyration", _number(profile.get("radius_of_gyration_px")), False),
        ("enclosing_radius", "Radius of the enclosing circle",
         _number((profile.get("bounding_circle") or {}).get("radius_px")), False),
        ("area", "Area covered", _number(profile.get("area_px")), True),
        ("total_length", "Total branch length", _number(skeleton.get("total_length_px")), False),
        ("branch_width", "Typical branch width", _number(features.get("branch_width_px")), False),
    )
    for key, label, px, square in sizes:
        if px is not None:
            value, unit = _length(features, px, scale, 4, square)
            rows.append(Measurement(key, label, value, "", "", unit))
    fraction = _number(profile.get("area_fraction"))
    if fraction is not None:
        rows.append(Measurement("area_fraction", "Share of the enclosing circle covered", f"{100 * fraction:.1f}",
                                "", "", "%"))
    for key, label in (("tips", "Branch tips"), ("junctions", "Junctions"), ("branches", "Branches")):
        v = skeleton.get(key)
        if isinstance(v, int):
            rows.append(Measurement(key, label, str(v), "", "", ""))
    strahler = skeleton.get("strahler") or {}
    orders = strahler.get("max_order")
    for key, label in (("bifurcation_ratio", "Horton bifurcation ratio"), ("length_ratio", "Horton length ratio")):
        v = _number(strahler.get(key))
        if v is None:
            continue
        if not isinstance(orders, int) or orders < 3:
            rows.append(Measurement(key, label, "", "", f"Strahler orders 1–{orders}", "", "withheld",
                                    "a ratio fitted to fewer than three orders is a single step, not a law"))
        else:
            rows.append(Measurement(key, label, f"{v:.2f}", "", f"Strahler orders 1–{orders}", ""))
    return rows


def calibration_mm(analysis: dict[str, Any]) -> float | None:
    """The pixel size in mm when the image is calibrated, else None."""
    calibration = analysis.get("calibration") or {}
    size = _number(calibration.get("pixel_size_mm"))
    if size is None or size <= 0 or calibration.get("calibrated") is False:
        return None
    return size


# --- which dimension to report ---------------------------------------------------------------

def dimension_advice(analysis: dict[str, Any]) -> str:
    """Which dimension to report for this specimen and why the estimators differ, in words,
    from the specimen's own fits (ranges, branch width, size)."""
    features = analysis.get("features") or {}
    fits = [f for f in dimension_fits(features)]
    usable = [f for f in fits if f.status != "withheld" and f.value is not None and f.ci95]
    if not usable:
        return ("No dimension of this specimen can be reported: every estimate is withheld (see the reasons "
                "in the table).")
    preference = {"sandbox_dimension": 2, "mass_radius_dimension": 1, "box_dimension": 0}
    sound = [f for f in usable if f.status == "ok"] or usable
    chosen = max(sound, key=lambda f: ((f.decades or 0.0), preference.get(f.key, 0)))
    width = _number(features.get("branch_width_px"))
    radius = _number(((features.get("profile") or {}).get("bounding_circle") or {}).get("radius_px"))
    decades = f"{chosen.decades:.2f} decades" if chosen.decades is not None else "its range"
    text = (f"Report the {chosen.label.lower()}, {chosen.value:.3f} (95% interval {chosen.ci95[0]:.3f}–"
            f"{chosen.ci95[1]:.3f}): its fit spans {decades}"
            + (", the widest of the estimates here" if len(usable) > 1 else "")
            + (" but still less than one decade, so give it with its range" if (chosen.decades or 0) < MIN_DECADES else "")
            + ".")
    if len(usable) < 2:
        return text
    lo = min(usable, key=lambda f: f.value)
    hi = max(usable, key=lambda f: f.value)
    overlap = max(f.ci95[0] for f in usable) <= min(f.ci95[1] for f in usable)
    if overlap:
        return text + (f" The estimates agree within their intervals ({lo.value:.3f} to {hi.value:.3f}); "
                       "cite the others as a check.")
    why: dict[str, list[str]] = {}
    for f in usable:
        parts = []
        if f.decades is not None and f.decades < MIN_DECADES:
            parts.append(f"is fitted over only {f.decades:.2f} of a decade of scale")
        if f.fit_range_px and width and f.fit_range_px[0] < DRAWING_SCALE_WIDTHS * width:
            parts.append("drawing")
        if f.fit_range_px and radius and f.fit_range_px[1] > FINITE_SIZE_SHARE * radius:
            parts.append(f"reaches {num(f.fit_range_px[1])} px, past half the specimen's radius ({num(radius)} px), "
                         "where the counts feel the specimen's edge (finite size)")
        why[f.label.lower()] = parts
    drawing_all = all("drawing" in parts for parts in why.values())
    reasons = []
    for name, parts in why.items():
        own = [p for p in parts if p != "drawing" or not drawing_all]
        own = [(f"starts within {DRAWING_SCALE_WIDTHS:g} branch widths ({num(width)} px), where a drawn branch is "
                "a filled strip rather than a line" if p == "drawing" else p) for p in own]
        if own:
            reasons.append(f"the {name} " + " and ".join(own))
    text += f" The estimates range from {lo.value:.3f} to {hi.value:.3f}, more than their intervals allow"
    if reasons:
        text += ": " + "; ".join(reasons) + "."
    else:
        text += "."
    if drawing_all:
        text += (f" Every fit starts within {DRAWING_SCALE_WIDTHS:g} branch widths ({num(width)} px), where a drawn "
                 "branch is a filled strip rather than a line, which biases all three at their small end.")
    text += (" Box counting covers the pattern with a grid, mass-radius counts around one centre and the sandbox "
             "averages around many, so they weigh the inner and outer parts differently.")
    return text


# --- the verdict -------------------------------------------------------------------------------

@dataclass(frozen=True)
class Verdict:
    """The report's first words: ``headline`` and its ``doubt``.

    ``kind`` is "confident", "abstained", "outside" (nearest, but outside every reference) or
    "unranked". ``show_probabilities`` is False when the probabilities would mislead (outside the library).
    """

    kind: str
    headline: str
    doubt: str
    nearest: str = ""
    show_probabilities: bool = True


def _percent(p: float | None) -> str:
    if p is None:
        return "–"
    if p > 0.995:
        return "over 99%"
    if p < 0.005:
        return "under 1%"
    return f"{100 * p:.0f}%"


def _verdict_name(name: str | None) -> str:
    if not name:
        return "–"
    return labels.REGIMES.get(name, name)


def verdict(analysis: dict[str, Any]) -> Verdict:
    matches = analysis.get("matches") or []
    explanation = analysis.get("explanation") if isinstance(analysis.get("explanation"), dict) else {}
    confidence = _number((analysis.get("segmentation") or {}).get("confidence"))
    outline = ""
    if confidence is not None and confidence < UNSURE_BELOW:
        outline = (f" The outline itself is unsure (confidence {confidence:.2f} of 1): check the reading below "
                   "before citing anything here.")
    if not matches:
        return Verdict("unranked", "Not ranked against the reference library",
                       "The measurements below stand on their own; no growth regime was compared." + outline,
                       show_probabilities=False)
    best = matches[0]
    nearest = labels.family_label(best, short=True)
    if analysis.get("in_library") is False:
        novelty = explanation.get("novelty") or {}
        far = [labels.matcher_feature_label(f) for f in novelty.get("features_beyond_3_sd") or []]
        doubt = (f"The nearest simulated family is {nearest}, but the specimen lies farther from it "
                 f"(distance {num(novelty.get('nearest_distance'))}) than any reference of the library lies from its "
                 f"own family (up to {num(novelty.get('threshold_distance'))}). No growth regime in the library "
                 "describes it, so no probability is given.")
        if far:
            doubt += " Farthest out: " + ", ".join(far) + "."
        return Verdict("outside", "Nearest, but outside every reference", doubt + outline, nearest,
                       show_probabilities=False)
    v = explanation.get("verdict") if isinstance(explanation.get("verdict"), dict) else {}
    if v and not v.get("confident", True):
        reason = str(v.get("reason") or "the classes are not separated")
        return Verdict("abstained", "No confident verdict",
                       f"Ramiform withholds a verdict: {reason}. Nearest simulated family: {nearest} "
                       f"({_percent(_number(best.get('probability')))} of the probability)." + outline, nearest)
    name = _verdict_name(v.get("name")) if v else labels.family_label(best)
    p = _number(v.get("probability")) if v else _number(best.get("probability"))
    doubt = f"Probability {_percent(p)} among the growth classes of the reference library"
    runner = v.get("runner_up") if v else None
    if runner:
        doubt += f"; next: {_verdict_name(runner)}"
    doubt += (f". Closest simulated family: {nearest} ({_percent(_number(best.get('probability')))}). "
              "A verdict says which simulated growth the pattern resembles most, not how it grew.")
    return Verdict("confident", name[:1].upper() + name[1:], doubt + outline, nearest)


# --- matches, evidence, parameters ------------------------------------------------------------

@dataclass(frozen=True)
class MatchRow:
    family: str
    probability: float | None
    probability_text: str
    distance: str
    distance_words: str


def match_rows(analysis: dict[str, Any], v: Verdict) -> list[MatchRow]:
    """Families sorted by distance (nearest first), with the distance in words."""
    novelty = ((analysis.get("explanation") or {}).get("novelty") or {}) if isinstance(
        analysis.get("explanation"), dict) else {}
    typical = _number(novelty.get("inlier_distance"))
    outside = _number(novelty.get("threshold_distance"))
    rows = []
    matches = sorted(analysis.get("matches") or [], key=lambda m: _number(m.get("distance")) or math.inf)
    for m in matches:
        d = _number(m.get("distance"))
        if d is None:
            words = "–"
        elif typical is not None and d <= typical:
            words = "as near as its own members"
        elif outside is not None and d > outside:
            words = "farther than any of its members"
        else:
            words = "nearer than its farthest members"
        p = _number(m.get("probability")) if v.show_probabilities else None
        rows.append(MatchRow(labels.family_label(m, short=True), p, _percent(p) if v.show_probabilities else "not given",
                             num(d), words))
    return rows


def distance_explained(analysis: dict[str, Any]) -> str:
    explanation = analysis.get("explanation") if isinstance(analysis.get("explanation"), dict) else {}
    novelty = explanation.get("novelty") or {}
    n = novelty.get("n_features")
    text = ("Distance: how far the specimen lies from each simulated family across the "
            f"{n if isinstance(n, int) else 'compared'} features the matcher compares, counted in the spread "
            "that family shows between its own clusters (Mahalanobis distance). Smaller is nearer.")
    typical, outside = _number(novelty.get("inlier_distance")), _number(novelty.get("threshold_distance"))
    if typical is not None and outside is not None:
        text += (f" Up to {typical:.1f} is as near as a family's own clusters usually are; beyond {outside:.1f} "
                 "is farther than any reference lies from its own family.")
    return text


def _odds(weight: float) -> str:
    ratio = math.exp(min(abs(weight), 50.0))
    if ratio >= 1000:
        return "more than 1,000 to 1"
    return f"{ratio:.1f} to 1" if ratio < 10 else f"{ratio:,.0f} to 1"


def evidence(analysis: dict[str, Any]) -> list[str]:
    """What decided between the best and the runner-up family, one sentence per feature."""
    explanation = analysis.get("explanation") if isinstance(analysis.get("explanation"), dict) else {}
    best = labels.family_label(explanation.get("best"), short=True)
    runner = labels.family_label(explanation.get("runner_up"), short=True) if explanation.get("runner_up") else None
    out = []
    for row in explanation.get("deciding_features") or []:
        b, r = row.get("best") or {}, row.get("runner_up") or {}
        text = (f"{labels.matcher_feature_label(str(row.get('feature')))}: {num(row.get('value'))} here; "
                f"{best} expects {num(b.get('mean'))} ± {num(b.get('sd'), 2)}")
        if runner and r:
            text += f", {runner} {num(r.get('mean'))} ± {num(r.get('sd'), 2)}"
        w = _number(row.get("weight_of_evidence"))
        if w is not None and runner:
            if abs(w) < 0.05:
                text += "; it barely tells them apart"
            else:
                text += f"; on its own it favours {best if w > 0 else runner} about {_odds(w)}"
        out.append(text + ".")
    return out


@dataclass(frozen=True)
class Estimate:
    family: str
    parameter: str
    value: str
    interval: str
    library_values: str
    probability: str
    status: str = "ok"
    reason: str = ""


def parameter_estimates(analysis: dict[str, Any], v: Verdict) -> list[Estimate]:
    """Parameter estimates with their 95% interval; an interval or spread finer than the library
    grid is not shown as a result: the estimate is given as the grid cell it falls in."""
    if not v.show_probabilities:
        return []
    out = []
    for regime, params in (analysis.get("parameter_estimates") or {}).items():
        if not isinstance(params, dict):
            continue
        for name, est in params.items():
            if not isinstance(est, dict):
                continue
            value = _number(est.get("value"))
            grid = [x for x in est.get("values_in_library") or [] if _number(x) is not None]
            axis = "log" if est.get("axis") == "log" else "linear"
            interval = _interval(est.get("ci95"))
            std = _number(est.get("std"))
            label = labels.PARAMETERS.get(name, name.replace("_", " "))
            # The contract's rule (service.quality), so the page and the JSON judge alike.
            judged = judge_parameter(label, value, interval, std, grid,
                                     axis=axis, spans_library_range=bool(est.get("spans_library_range")),
                                     regime_probability=_number(est.get("regime_probability")), regime=regime)
            status = "flagged" if judged.status == UNCERTAIN else judged.status
            reason, shown_interval = judged.reason, ""
            cell = grid_limited_cell(value, std, grid, axis)
            if cell is not None:
                # Known only to lie in the grid cell: show the cell (and the interval, if wider).
                lo = min(cell[0], interval[0]) if interval else cell[0]
                hi = max(cell[1], interval[1]) if interval else cell[1]
                shown_interval = f"{num(lo)} – {num(hi)}"
            elif interval is not None and status != "withheld":
                shown_interval = f"{num(interval[0])} – {num(interval[1])}"
            out.append(Estimate(labels.regime_label(regime), label,
                                num(value) if status != "withheld" else "", shown_interval,
                                ", ".join(num(x) for x in grid), _percent(_number(est.get("regime_probability"))),
                                status, reason))
    return out


# --- branch statistics --------------------------------------------------------------------------

@dataclass(frozen=True)
class Distribution:
    label: str
    unit: str
    n: int
    median: str
    middle80: str
    mean_sd: str


def branch_distributions(analysis: dict[str, Any]) -> list[Distribution]:
    """Lengths, widths, angles and tortuosity as distributions (median, 10th–90th percentile, mean ± sd)."""
    features = analysis.get("features") or {}
    skeleton = features.get("skeleton") or {}
    mm = calibration_mm(analysis) is not None
    rows = []
    for key_px, key_mm, label, unit_px in (
        ("branch_length_px", "branch_length_mm", "Branch length", "px"),
        ("width_px", "width_mm", "Branch width", "px"),
        ("branching_angle_deg", None, "Branching angle", "°"),
        ("tortuosity", None, "Tortuosity (path over straight length)", ""),
    ):
        summary, unit = skeleton.get(key_px), unit_px
        if mm and key_mm and isinstance(skeleton.get(key_mm), dict):
            summary, unit = skeleton[key_mm], "mm"
        if not isinstance(summary, dict) or not summary.get("n"):
            continue
        rows.append(Distribution(label, unit, int(summary["n"]), num(summary.get("median")),
                                 f"{num(summary.get('p10'))} – {num(summary.get('p90'))}",
                                 f"{num(summary.get('mean'))} ± {num(summary.get('std'), 2)}"))
    return rows


def strahler_orders(analysis: dict[str, Any]) -> list[dict[str, str]]:
    """Per Strahler order: number of streams and their mean length (mm when calibrated)."""
    strahler = ((analysis.get("features") or {}).get("skeleton") or {}).get("strahler") or {}
    counts = strahler.get("stream_counts") or []
    lengths = strahler.get("mean_stream_length_mm") if calibration_mm(analysis) else None
    unit = "mm" if lengths else "px"
    lengths = lengths or strahler.get("mean_stream_length_px") or []
    return [{"order": str(i + 1), "streams": str(c), "mean_length": num(lengths[i]) if i < len(lengths) else "–",
             "unit": unit} for i, c in enumerate(counts)]


# --- how this was measured ----------------------------------------------------------------------

def _flat(prefix: str, value: Any):
    if isinstance(value, dict):
        for k, v in value.items():
            yield from _flat(f"{prefix}.{k}" if prefix else str(k), v)
    else:
        yield prefix, value


def _setting_value(key: str, value: Any) -> str:
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, (int, float)):
        text = num(value, 3)
        if key.endswith("_px"):
            text += " px"
        elif key == "reduced_resolution_factor":
            text = f"{text}×"
        return text
    if isinstance(value, (list, tuple)):
        return ", ".join(_setting_value(key, v) for v in value)
    if value is None:
        return "automatic"
    return labels.value_words(str(value))


def settings_rows(analysis: dict[str, Any], kind: str | None = None) -> list[tuple[str, str]]:
    """The segmentation as it was used, in words; positions and bookkeeping left out, and scene
    parts that do not belong to this kind of specimen (an electrode on a vessel tree) not shown."""
    segmentation = analysis.get("segmentation") or {}
    field = segmentation.get("field_of_view") if isinstance(segmentation.get("field_of_view"), dict) else {}
    in_a_cell = kind == "electrodeposit" or (kind in (None, "other") and "dish" in str(field.get("source", "")))
    rows = []
    for key, value in _flat("", segmentation):
        if any(key == h or key.startswith(h + ".") for h in labels.HIDDEN_SETTINGS) or key.startswith("alternatives"):
            continue
        if (key.startswith("electrode") or key == "scene.leads") and not in_a_cell:
            continue  # an "electrode" found on a river map or a vessel tree is a blob, not a finding
        if key == "polarity_source" and isinstance(value, str) and "vessels" in value and kind != "vessel":
            value = "assumed darker (thin-line reading)"
        if key == "contrast_to_noise" and _number(value) is not None and value >= 1e5:
            rows.append((labels.setting_label(key), "no measurable noise (a drawn or synthetic image)"))
            continue
        rows.append((labels.setting_label(key), _setting_value(key, value)))
    calibration = analysis.get("calibration") or {}
    scale = calibration_mm(analysis)
    rows.append(("scale", f"{num(scale, 4)} mm per pixel ({labels.value_words(str(calibration.get('source') or 'given'))})"
                 if scale else "not given: lengths in pixels"))
    return rows


def matcher_rows(analysis: dict[str, Any]) -> list[tuple[str, str, str, str]]:
    """Every feature the matcher compared: (label, value on the redrawn specimen, best family, z)."""
    explanation = analysis.get("explanation") if isinstance(analysis.get("explanation"), dict) else {}
    out = []
    for row in explanation.get("all_features") or []:
        b = row.get("best") or {}
        out.append((labels.matcher_feature_label(str(row.get("feature"))), num(row.get("value")),
                    f"{num(b.get('mean'))} ± {num(b.get('sd'), 2)}",
                    f"{_number(b.get('z')):+.1f}" if _number(b.get("z")) is not None else "–"))
    return out


def all_features(analysis: dict[str, Any]) -> list[tuple[str, str, str]]:
    """Every scalar measurement, labelled, with its unit (for the collapsed full table)."""
    from service.store.export import flatten

    out = []
    for key, value in flatten("", analysis.get("features") or {}):
        if value is None or key.endswith("intercept") or key in ("calibrated", "pixel_size_mm"):
            continue
        out.append((labels.feature_label(key), num(value, 4) if not isinstance(value, bool) else
                    labels.value_words(value), labels.unit_of(key)))
    return out


def _report_warnings(analysis: dict[str, Any]) -> list[str]:
    """The analysis warnings, less those of the dimension fits: the measurement table flags
    those rows itself, with the range actually fitted."""
    features = analysis.get("features") or {}
    own = set()
    for fit in dimension_fits(features):
        if fit.status != "ok":
            own.update(warning_texts((features.get(fit.key) or {}).get("warnings")))
    return [w for w in warning_texts(analysis.get("warnings")) if w not in own]


@dataclass(frozen=True)
class ReportView:
    verdict: Verdict
    measurements: list[Measurement]
    advice: str
    matches: list[MatchRow]
    distance_words: str
    evidence: list[str]
    estimates: list[Estimate]
    distributions: list[Distribution]
    orders: list[dict[str, str]]
    settings: list[tuple[str, str]]
    matcher: list[tuple[str, str, str, str]]
    features: list[tuple[str, str, str]]
    warnings: list[str]
    calibrated: bool
    scale_text: str
    notes: list[str] = field(default_factory=list)


def build_report(analysis: dict[str, Any], kind: str | None = None) -> ReportView:
    v = verdict(analysis)
    scale = calibration_mm(analysis)
    return ReportView(
        verdict=v,
        measurements=measurements(analysis),
        advice=dimension_advice(analysis),
        matches=match_rows(analysis, v),
        distance_words=distance_explained(analysis),
        evidence=evidence(analysis),
        estimates=parameter_estimates(analysis, v),
        distributions=branch_distributions(analysis),
        orders=strahler_orders(analysis),
        settings=settings_rows(analysis, kind),
        matcher=matcher_rows(analysis),
        features=all_features(analysis),
        warnings=_report_warnings(analysis),
        calibrated=scale is not None,
        scale_text=f"{num(scale, 4)} mm per pixel" if scale else "no scale given: lengths in pixels",
    )


def list_marks(analysis: dict[str, Any]) -> dict[str, Any]:
    """What the specimen list shows beside the best match: ``best_words`` (family and
    probability, or the nearest family marked as outside or without a verdict) and ``mark``."""
    matches = analysis.get("matches") or []
    v = verdict(analysis)
    confidence = _number((analysis.get("segmentation") or {}).get("confidence"))
    box = (analysis.get("features") or {}).get("box_dimension") or {}
    box_status, _ = check_dimension(box.get("value"), box.get("ci95"))
    box_words = "withheld" if box_status == "withheld" else fixed(box.get("value"))
    box_interval = _interval(box.get("ci95")) if box_status != "withheld" else None
    mark = ""
    if v.kind == "outside":
        mark = "outside the library"
    elif v.kind == "abstained":
        mark = "no confident verdict"
    if confidence is not None and confidence < UNSURE_BELOW:
        mark = (mark + "; " if mark else "") + "unsure outline"
    out = {"box_words": box_words, "box_interval": f"{box_interval[0]:.3f}–{box_interval[1]:.3f}" if box_interval else "",
           "mark": mark}
    if not matches:
        return out | {"best_words": "not ranked"}
    best = labels.family_label(matches[0], short=True)
    words = best if not v.show_probabilities else f"{best} {_percent(_number(matches[0].get('probability')))}"
    return out | {"best_words": words}
