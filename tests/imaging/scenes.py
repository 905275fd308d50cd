"""Bench photographs of known deposits, drawn with the nuisances of a real dish on a real bench.

This is the test bench for automatic segmentation. It is written independently of
``service.imaging.render`` (it neither imports nor follows it): its own geometry, its own
light and its own nuisance model, so a segmenter tuned to one renderer is still judged by
another.

A scene is a copper electrodeposit grown in a round dish and photographed from above:

- the deposit is a simulated cluster (``service.simulate``: DLA with von Neumann or Moore
  neighbourhoods and sticking 1, 0.3 or 0.1, Eden, ballistic, DBM at eta 0.5-4), scaled to
  1-4 px per site and thickened by a random thickness law (uniform, older branches thicker,
  thicker towards the centre, or a smooth random field); or a dense deposit filling about
  half the dish;
- the dish is a disc of solution inside a wall band, seen at a slant (an ellipse), anywhere
  in the frame and sometimes cut by it, on a bench lighter or darker than the solution;
- each nuisance is switched on or off by the seed, independently of the others: a lighter
  ring around a dark solution, copper tape along part of the rim, a centre electrode and a
  wire from the frame edge to it across the deposit, a glass-wall highlight and a shadow arc,
  a soft-edged shadow over part of the dish, glare spots, uneven light, soft deposit edges,
  a tint of the deposit, sensor noise, JPEG compression, a scale bar and a label on the bench.

The truth is the visible deposit only: not the electrode, the wire, the tape or the rim.
Everything is drawn from one ``numpy.random.default_rng(seed)``: same seed, same photo.
"""

from __future__ import annotations

import functools
import io
import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from PIL import Image, ImageDraw, ImageFont
from scipy import ndimage

__all__ = ["CLUSTER_KINDS", "Scene", "box_dimension", "cluster", "iou", "judge", "random_deposit", "random_scene",
           "render_scene", "report", "scene_switches", "summary", "taken"]

#: Cluster families the scenes draw from: (regime, parameters, particle counts). DBM is slow
#: (a Laplace solve per site) and grows ever more linear with eta, so its clusters stay small.
CLUSTER_KINDS: tuple[tuple[str, dict[str, Any], tuple[int, ...]], ...] = (
    ("dla", {"neighborhood": "von_neumann", "sticking": 1.0}, (1200, 2500, 5000)),
    ("dla", {"neighborhood": "moore", "sticking": 1.0}, (1200, 2500, 5000)),
    ("dla", {"neighborhood": "von_neumann", "sticking": 0.3}, (1200, 2500, 5000)),
    ("dla", {"neighborhood": "moore", "sticking": 0.3}, (1200, 2500, 5000)),
    ("dla", {"neighborhood": "von_neumann", "sticking": 0.1}, (1200, 2500, 5000)),
    ("dla", {"neighborhood": "moore", "sticking": 0.1}, (1200, 2500, 5000)),
    ("eden", {}, (1500, 4000)),
    ("ballistic", {}, (1500, 4000)),
    ("dbm", {"eta": 0.5}, (800, 1500)),
    ("dbm", {"eta": 1.0}, (800, 1500)),
    ("dbm", {"eta": 2.0}, (400, 700)),
    ("dbm", {"eta": 3.0}, (300, 450)),
    ("dbm", {"eta": 4.0}, (250, 350)),
)
#: Families used for dense deposits (filling about half the dish).
_DENSE_KINDS = (4, 5, 6, 7)  # DLA with sticking 0.1, Eden, ballistic
_CLUSTER_SEEDS = 3
_LONG_SIDE_PX = (400, 900)
_SCALE_PX_PER_SITE = (1.0, 4.0)
#: Narrowest branch drawn (px): thinner lines do not survive a 2 px blur and JPEG in any
#: photograph, so a bench that asked for them would judge the camera, not the segmenter.
_MIN_WIDTH_PX = 3.0
_LUMA = np.array([0.299, 0.587, 0.114])


@dataclass(frozen=True, eq=False)
class Scene:
    """One bench photograph and what it shows.

    Attributes
    ----------
    photo : ndarray of uint8, shape (H, W, 3)
    truth : ndarray of bool, shape (H, W)
        The visible deposit (without electrode, wire, tape, rim).
    description : dict
        Every random choice made (JSON-serialisable); ``summary`` turns it into one line.
    parts : dict of str to ndarray of bool
        Where the other things were drawn, for diagnosis: ``solution`` (inside the dish),
        and when drawn ``rim``, ``tape``, ``electrode``, ``wire``, ``glare``.
    """

    photo: np.ndarray
    truth: np.ndarray
    description: dict[str, Any]
    parts: dict[str, np.ndarray] = field(default_factory=dict)


# ----------------------------------------------------------------------------- deposits


@functools.lru_cache(maxsize=None)
def cluster(kind: int, n_particles: int, cluster_seed: int) -> np.ndarray:
    """The occupied sites of one simulated cluster (bool, seed site at the array centre), cached."""
    from service.simulate import grow

    regime, params, _ = CLUSTER_KINDS[kind]
    return grow(regime, n_particles, seed=cluster_seed, **params) != 0


def _cluster_radius_sites(sites: np.ndarray) -> float:
    rows, cols = np.nonzero(sites)
    h, w = sites.shape
    return float(np.hypot(rows - h // 2, cols - w // 2).max()) + 0.5


def random_deposit(seed: int, *, dense: bool | None = None) -> tuple[np.ndarray, dict[str, Any]]:
    """A seeded choice of cluster: its sites and a description (regime, parameters, size, seed)."""
    rng = np.random.default_rng([seed, 1])
    if dense is None:
        dense = bool(rng.random() < 0.15)
    kind = int(rng.choice(_DENSE_KINDS)) if dense else int(rng.integers(len(CLUSTER_KINDS)))
    regime, params, sizes = CLUSTER_KINDS[kind]
    n = int(sizes[-1]) if dense and regime == "dla" else int(rng.choice(sizes))
    cluster_seed = int(rng.integers(_CLUSTER_SEEDS))
    info = {"regime": regime, "params": dict(params), "n_particles": n, "cluster_seed": cluster_seed, "dense": dense}
    return cluster(kind, n, cluster_seed), info


def _smooth_field(rng: np.random.Generator, shape: tuple[int, int], scale_px: float) -> np.ndarray:
    """Smooth random field with unit standard deviation, features about ``scale_px`` across."""
    field = ndimage.gaussian_filter(rng.standard_normal(shape), max(scale_px, 0.5), mode="wrap")
    return field / max(float(field.std()), 1e-9)


def _thick_deposit(rng: np.random.Generator, sites: np.ndarray, scale: float,
                   dense: bool) -> tuple[np.ndarray, tuple[float, float], dict[str, Any]]:
    """The deposit drawn in the dish plane at ``scale`` px per site, thickened by a random law.

    Returns the mask (1 unit = 1 dish-plane px), the position of the seed site in it, and a
    description of the thickness drawn.
    """
    h, w = sites.shape
    pad = 12
    out_h, out_w = int(math.ceil(h * scale)) + 2 * pad, int(math.ceil(w * scale)) + 2 * pad
    rr = ((np.arange(out_h) - pad) / scale).astype(int)
    cc = ((np.arange(out_w) - pad) / scale).astype(int)
    ok_r = (rr >= 0) & (rr < h)
    ok_c = (cc >= 0) & (cc < w)
    blocks = np.zeros((out_h, out_w), dtype=bool)
    blocks[np.ix_(ok_r, ok_c)] = sites[np.ix_(rr[ok_r], cc[ok_c])]
    seed_rc = (pad + (h // 2 + 0.5) * scale - 0.5, pad + (w // 2 + 0.5) * scale - 0.5)
    distance = ndimage.distance_transform_edt(~blocks)

    # The narrowest branch is the block width plus twice the smallest thickening.
    floor_px = max(0.0, (_MIN_WIDTH_PX - scale) / 2.0) + 0.01
    yy, xx = np.mgrid[:out_h, :out_w]
    radius = np.hypot(yy - seed_rc[0], xx - seed_rc[1])
    reach = float(radius[blocks].max())
    laws = ("uniform", "older_thicker", "thicker_inside", "random")
    law = str(rng.choice(laws))
    base = floor_px + rng.uniform(0.0, 1.5)
    extra = rng.uniform(0.5, 2.5)
    if law == "uniform":
        thickness = np.full((out_h, out_w), base)
    elif law == "thicker_inside":
        thickness = base + extra * np.clip(1.0 - radius / reach, 0.0, 1.0)
    elif law == "older_thicker":
        # Arrival order of the nearest site is not kept in a boolean mask; the distance from
        # the seed along the cluster is its stand-in (the deposit grows outwards).
        thickness = base + extra * np.clip(1.0 - radius / reach, 0.0, 1.0) ** 2
    else:
        thickness = base + extra * np.clip(0.5 + 0.35 * _smooth_field(rng, (out_h, out_w), 6.0 * scale), 0.0, 1.0)
    if dense:
        # Thicken until the deposit covers 50-70% of the disc it spans (its envelope), the
        # branches staying branches (at most 2.5 sites thicker each side): a dense deposit
        # spread over most of the dish, with fjords between its arms.
        envelope = radius <= reach
        target_px = rng.uniform(0.5, 0.7) * np.count_nonzero(envelope)
        order = np.sort(distance[envelope])
        k = min(order.size - 1, int(target_px))
        thickness = np.maximum(thickness, min(float(order[k]), 2.5 * scale + 1.5))
        law = law + "+dense"
    mask = distance <= thickness
    rows = np.nonzero(mask.any(axis=1))[0]
    cols = np.nonzero(mask.any(axis=0))[0]
    mask = mask[rows[0]:rows[-1] + 1, cols[0]:cols[-1] + 1]
    seed_rc = (seed_rc[0] - rows[0], seed_rc[1] - cols[0])
    widths = scale + 2.0 * thickness[blocks]
    info = {"thickness_law": law, "branch_width_px": [round(float(widths.min()), 2), round(float(widths.max()), 2)]}
    return mask, seed_rc, info


# ----------------------------------------------------------------------------- colours


def _luma(rgb: np.ndarray) -> float:
    return float(np.asarray(rgb) @ _LUMA)


def _grey(level: float, tint: float, rng: np.random.Generator) -> np.ndarray:
    colour = level + tint * rng.uniform(-1.0, 1.0, 3)
    return np.clip(colour, 0.0, 1.0)


def _with_luma(colour: np.ndarray, luma: float) -> np.ndarray:
    """``colour`` rescaled to the luminance ``luma`` (clipped to the gamut)."""
    colour = np.asarray(colour, float)
    return np.clip(colour * (luma / max(_luma(colour), 1e-6)), 0.0, 1.0)


_COPPER_BRIGHT = np.array([0.93, 0.58, 0.30])
_COPPER_ORANGE = np.array([0.98, 0.50, 0.18])
_SHINY = np.array([0.92, 0.84, 0.72])
_BROWN = np.array([0.36, 0.21, 0.12])
_DARK_GREY = np.array([0.22, 0.22, 0.23])
_SOLUTION_BLUE = np.array([0.55, 0.75, 0.92])
_TAPE = np.array([0.85, 0.52, 0.26])


# ----------------------------------------------------------------------------- drawing


def _mix(img: np.ndarray, colour: np.ndarray, alpha: np.ndarray) -> None:
    img += alpha[..., None] * (np.asarray(colour)[None, None, :] - img)


def _soft(signed_inside_px: np.ndarray, width_px: float = 0.7) -> np.ndarray:
    """Antialiased coverage from a signed distance (positive inside)."""
    return np.clip(signed_inside_px / (2.0 * width_px) + 0.5, 0.0, 1.0)


def _arc_window(angle: np.ndarray, centre: float, half_width: float, soft: float = 0.15) -> np.ndarray:
    """1 on the arc of angles within ``half_width`` of ``centre`` (radians), soft at the ends."""
    d = np.abs((angle - centre + math.pi) % (2 * math.pi) - math.pi)
    return np.clip((half_width - d) / soft + 0.5, 0.0, 1.0)


def _text_mask(shape: tuple[int, int], boxes: list[tuple[str, Any]]) -> np.ndarray:
    canvas = Image.new("L", (shape[1], shape[0]), 0)
    draw = ImageDraw.Draw(canvas)
    for kind, item in boxes:
        if kind == "rect":
            draw.rectangle(item, fill=255)
        else:
            xy, text, size = item
            draw.text(xy, text, fill=255, font=ImageFont.load_default(size=size))
    return np.asarray(canvas, dtype=np.float64) / 255.0


#: Each nuisance and the chance that a scene draws it; drawn one after the other from the
#: scene's generator, so every switch is independent of the others.
SWITCH_ODDS: dict[str, float] = {
    "slant": 0.6, "off_centre": 0.6, "cut_by_frame": 0.25, "rim_band": 0.8, "light_ring": 0.5,
    "copper_tape": 0.4, "electrode": 0.7, "wire": 0.5, "wire_shadow": 0.5, "glass_highlight": 0.4,
    "shadow_arc": 0.4, "shadow": 0.3, "glare": 0.35, "uneven_light": 0.6, "soft_edges": 0.7,
    "deposit_texture": 0.6, "noise": 0.8, "jpeg": 0.75, "scale_bar": 0.4, "label": 0.4,
}


def _switches(rng: np.random.Generator) -> tuple[dict[str, bool], str, str]:
    on = {name: bool(rng.random() < p) for name, p in SWITCH_ODDS.items()}
    polarity = "dark" if rng.random() < 0.5 else "bright"
    solution_vs_bench = "lighter" if rng.random() < 0.5 else "darker"
    on["light_ring"] = on["light_ring"] and polarity == "bright"  # a lighter ring around a dark solution
    on["wire"] = on["wire"] and on["electrode"]  # the wire runs to the electrode
    on["wire_shadow"] = on["wire_shadow"] and on["wire"]
    return on, polarity, solution_vs_bench


def scene_switches(seed: int) -> tuple[dict[str, bool], str, str]:
    """The nuisances scene ``seed`` switches on, its polarity and solution-vs-bench, without drawing it."""
    return _switches(np.random.default_rng([seed, 2]))


def render_scene(deposit: np.ndarray, seed: int, *, dense: bool = False,
                 deposit_info: dict[str, Any] | None = None) -> Scene:
    """Draw the deposit ``deposit`` (bool sites, seed at the centre) as a bench photograph.

    Parameters
    ----------
    deposit : ndarray of bool
        Occupied lattice sites; the growth seed (where the electrode sits) is the array
        centre ``(h // 2, w // 2)``, as ``service.simulate`` returns them.
    seed : int
        Every random choice (scale, thickness, dish, light, nuisances) follows from it.
    dense : bool
        Thicken the deposit until it covers about half the dish.
    deposit_info : dict, optional
        Description of the cluster, copied into the scene's description.
    """
    deposit = np.asarray(deposit) != 0
    if deposit.ndim != 2 or not deposit.any():
        raise ValueError("deposit must be a non-empty 2-D mask")
    rng = np.random.default_rng([seed, 2])
    on, polarity, solution_vs_bench = _switches(rng)

    # --- geometry: frame, dish, deposit scale -------------------------------------------
    sites_radius = _cluster_radius_sites(deposit)
    aspect = float(rng.choice([1.0, 4.0 / 3.0, 1.5]))
    portrait = bool(rng.random() < 0.3)
    dish_fill = rng.uniform(0.78, 1.05) if on["cut_by_frame"] else rng.uniform(0.62, 0.92)
    extent = rng.uniform(0.72, 0.88) if dense else rng.uniform(0.38, 0.85)
    scale = rng.uniform(*_SCALE_PX_PER_SITE)
    # Long side from the scale; then bring the long side into range by moving the scale
    # (within 1-4 px per site) and, last, the deposit's extent within the dish.
    for _ in range(3):
        radius_px = scale * sites_radius / extent
        long_side = 2.0 * radius_px / dish_fill * aspect
        if long_side > _LONG_SIDE_PX[1]:
            scale = max(_SCALE_PX_PER_SITE[0], scale * _LONG_SIDE_PX[1] / long_side)
        elif long_side < _LONG_SIDE_PX[0]:
            scale = min(_SCALE_PX_PER_SITE[1], scale * _LONG_SIDE_PX[0] / long_side)
        else:
            break
        radius_px = scale * sites_radius / extent
        long_side = 2.0 * radius_px / dish_fill * aspect
        if long_side > _LONG_SIDE_PX[1]:
            extent = min(0.9, extent * long_side / _LONG_SIDE_PX[1])
        elif long_side < _LONG_SIDE_PX[0]:
            extent = max(0.3, extent * long_side / _LONG_SIDE_PX[0])
    radius_px = scale * sites_radius / extent
    long_side = int(np.clip(round(2.0 * radius_px / dish_fill * aspect), *_LONG_SIDE_PX))
    short_side = int(round(long_side / aspect))
    h, w = (long_side, short_side) if portrait else (short_side, long_side)
    dish_fill = 2.0 * radius_px / short_side

    axes_ratio = rng.uniform(0.75, 1.0) if on["slant"] else 1.0
    tilt = rng.uniform(0.0, math.pi)
    # Dish centre: where the deposit stays inside the frame with a margin, whatever its shift
    # from the dish centre (below 0.08 radius) and its thickening (below 3 sites and 2 px).
    margin = 8.0 + 0.08 * radius_px + 3.0 * scale + 2.0
    reach_x = extent * radius_px * math.hypot(math.cos(tilt), axes_ratio * math.sin(tilt)) + margin
    reach_y = extent * radius_px * math.hypot(math.sin(tilt), axes_ratio * math.cos(tilt)) + margin
    spread = 0.35 if on["off_centre"] or on["cut_by_frame"] else 0.04
    cx = (w - 1) / 2.0 + rng.uniform(-spread, spread) * max(0.0, w / 2.0 - reach_x) * 2
    cy = (h - 1) / 2.0 + rng.uniform(-spread, spread) * max(0.0, h / 2.0 - reach_y) * 2
    if on["cut_by_frame"]:
        # Push the dish towards one side until its edge leaves the frame there.
        side = int(rng.integers(4))
        if side in (0, 1):
            room = max(0.0, w / 2.0 - reach_x)
            cx = (w - 1) / 2.0 + (room if side == 0 else -room) * rng.uniform(0.6, 1.0)
        else:
            room = max(0.0, h / 2.0 - reach_y)
            cy = (h - 1) / 2.0 + (room if side == 2 else -room) * rng.uniform(0.6, 1.0)

    # Dish-plane coordinates of every pixel (the slant foreshortens across ``tilt``).
    yy, xx = np.mgrid[:h, :w].astype(np.float64)
    dx, dy = xx - cx, yy - cy
    qa = math.cos(tilt) * dx + math.sin(tilt) * dy
    qb = (-math.sin(tilt) * dx + math.cos(tilt) * dy) / axes_ratio
    rho = np.hypot(qa, qb)
    psi = np.arctan2(qb, qa)

    # --- the deposit in the dish plane -----------------------------------------------------
    local, seed_local, thick_info = _thick_deposit(rng, deposit, scale, dense)
    spin = rng.uniform(0.0, 2 * math.pi)
    shift = rng.uniform(0.0, 0.08) * radius_px
    shift_angle = rng.uniform(0.0, 2 * math.pi)
    q0a, q0b = shift * math.cos(shift_angle), shift * math.sin(shift_angle)
    la = math.cos(spin) * (qa - q0a) + math.sin(spin) * (qb - q0b)
    lb = -math.sin(spin) * (qa - q0a) + math.cos(spin) * (qb - q0b)
    deposit_img = ndimage.map_coordinates(local.astype(np.uint8), [lb + seed_local[0], la + seed_local[1]],
                                          order=0, mode="constant", cval=0).astype(bool)
    deposit_img &= rho < radius_px * 0.97
    seed_rho = np.hypot(qa - q0a, qb - q0b)

    # --- colours -----------------------------------------------------------------------------
    if polarity == "dark":
        solution = _with_luma(_SOLUTION_BLUE if rng.random() < 0.5 else _grey(1.0, 0.05, rng), rng.uniform(0.55, 0.9))
        tint = str(rng.choice(["dark_grey", "brown"]))
        deposit_colour = _with_luma(_DARK_GREY if tint == "dark_grey" else _BROWN, rng.uniform(0.06, 0.3))
    else:
        dark_solution = _SOLUTION_BLUE * 0.5 if rng.random() < 0.5 else _grey(0.2, 0.03, rng)
        solution = _with_luma(dark_solution, rng.uniform(0.04, 0.22))
        tint = str(rng.choice(["copper", "orange", "shiny"]))
        deposit_colour = _with_luma({"copper": _COPPER_BRIGHT, "orange": _COPPER_ORANGE, "shiny": _SHINY}[tint],
                                    rng.uniform(0.5, 0.85))
    if abs(_luma(deposit_colour) - _luma(solution)) < 0.25:
        # Keep a contrast any photographer would accept (about 64 grey levels).
        target = _luma(solution) + (0.25 if polarity == "bright" else -0.25)
        deposit_colour = _with_luma(deposit_colour, float(np.clip(target, 0.03, 0.95)))
    sol_l = _luma(solution)
    if solution_vs_bench == "lighter" and sol_l < 0.12:
        solution_vs_bench = "darker"
    if solution_vs_bench == "darker" and sol_l > 0.85:
        solution_vs_bench = "lighter"
    bench_l = (sol_l - rng.uniform(0.08, min(0.5, sol_l - 0.02)) if solution_vs_bench == "lighter"
               else sol_l + rng.uniform(0.08, min(0.5, 0.97 - sol_l)))
    bench_tone = str(rng.choice(["grey", "wood", "blue"]))
    bench_base = {"grey": np.ones(3), "wood": np.array([0.8, 0.62, 0.45]),
                  "blue": np.array([0.5, 0.6, 0.8])}[bench_tone]
    bench = _with_luma(bench_base, float(np.clip(bench_l, 0.03, 0.97)))

    img = np.empty((h, w, 3))
    img[:] = bench
    # Bench texture: grain along one direction, faint.
    grain = ndimage.gaussian_filter(rng.standard_normal((h, w)), (0.8, 12.0) if rng.random() < 0.5 else (12.0, 0.8))
    img *= (1.0 + 0.05 * grain / max(float(grain.std()), 1e-9))[..., None]

    description: dict[str, Any] = {
        "seed": seed,
        "size_hw": [h, w],
        "deposit": {**(deposit_info or {}), "scale_px_per_site": round(scale, 3), **thick_info,
                    "extent_of_dish": round(extent, 3), "spin_deg": round(math.degrees(spin), 1)},
        "dish": {"center_xy": [round(cx, 1), round(cy, 1)], "radius_px": round(radius_px, 1),
                 "axes_ratio": round(axes_ratio, 3), "angle_deg": round(math.degrees(tilt), 1),
                 "fill_of_frame": round(dish_fill, 3)},
        "polarity": polarity,
        "solution_vs_bench": solution_vs_bench,
        "colours": {"solution": [round(v, 3) for v in solution], "deposit": [round(v, 3) for v in deposit_colour],
                    "bench": [round(v, 3) for v in bench], "deposit_tint": tint, "bench_tone": bench_tone},
        "nuisances": {},
        "switches": dict(on),
    }
    nuis = description["nuisances"]
    parts: dict[str, np.ndarray] = {}

    # --- dish wall (rim band) and solution ----------------------------------------------------
    if on["rim_band"] or on["light_ring"]:
        wall_width = rng.uniform(0.02, 0.09) * radius_px
        wobble = rng.uniform(0.0, 0.6)
        wobble_at = rng.uniform(0.0, 2 * math.pi)
        width_here = wall_width * (1.0 + wobble * np.cos(psi - wobble_at))
        if on["light_ring"]:
            wall = _with_luma(_grey(1.0, 0.05, rng), rng.uniform(0.45, 0.9))
        else:
            wall = _with_luma(rng.uniform(0.2, 1.0, 3), rng.uniform(0.1, 0.9))
        wall_alpha = _soft(np.minimum(radius_px + width_here - rho, rho - radius_px + 2.0))
        _mix(img, wall, wall_alpha)
        parts["rim"] = (wall_alpha >= 0.5) & (rho >= radius_px)
        nuis["rim_band"] = {"width_px": round(wall_width, 1), "wobble": round(wobble, 2),
                            "colour": [round(v, 3) for v in wall], "lighter_ring": on["light_ring"]}
    _mix(img, solution, _soft(radius_px - rho))
    parts["solution"] = rho < radius_px

    if on["copper_tape"]:
        tape_width = rng.uniform(0.02, 0.06) * radius_px
        tape_at, tape_half = rng.uniform(0.0, 2 * math.pi), rng.uniform(0.4, 2.6)
        alpha = (_soft(np.minimum(radius_px - rho, rho - (radius_px - tape_width)))
                 * _arc_window(psi, tape_at, tape_half))
        tape = _with_luma(_TAPE, rng.uniform(0.45, 0.8))
        _mix(img, tape, alpha)
        parts["tape"] = alpha >= 0.5
        nuis["copper_tape"] = {"width_px": round(tape_width, 1), "arc_deg": round(math.degrees(2 * tape_half), 0)}

    # --- the deposit ---------------------------------------------------------------------------
    # Soft edges up to 2 px, but never beyond a quarter of the narrowest branch: there the
    # branch still reaches 95% of its contrast at its centre (erf(2 / sqrt 2)), so its outline
    # is in the photo; a blur that wipes a branch out asks the camera, not the segmenter.
    blur_max = min(2.0, max(0.5, 0.25 * float(thick_info["branch_width_px"][0])))
    blur = rng.uniform(0.5, blur_max) if on["soft_edges"] else 0.35
    alpha = ndimage.gaussian_filter(deposit_img.astype(np.float64), blur)
    if on["deposit_texture"]:
        texture = 1.0 + 0.12 * _smooth_field(rng, (h, w), rng.uniform(1.0, 4.0))
        colour_img = np.clip(deposit_colour[None, None, :] * texture[..., None], 0.0, 1.0)
        img += alpha[..., None] * (colour_img - img)
        nuis["deposit_texture"] = True
    else:
        _mix(img, deposit_colour, alpha)
    nuis["soft_edges_px"] = round(blur, 2)

    # --- centre electrode and wire ---------------------------------------------------------
    truth = deposit_img.copy()
    if on["electrode"]:
        el_radius = max(4.0, rng.uniform(0.02, 0.05) * radius_px)
        brighter = bool(rng.random() < 0.5)
        el_l = (np.clip(_luma(deposit_colour) + rng.uniform(0.15, 0.35), 0.3, 0.98) if brighter
                else np.clip(_luma(deposit_colour) - rng.uniform(0.15, 0.35), 0.02, 0.7))
        el_colour = _with_luma(_grey(1.0, 0.03, rng), float(el_l))
        el_alpha = _soft(el_radius - seed_rho)
        _mix(img, el_colour, el_alpha)
        truth &= el_alpha < 0.5
        parts["electrode"] = el_alpha >= 0.5
        nuis["electrode"] = {"radius_px": round(el_radius, 1), "brighter_than_deposit": brighter}
        # where the electrode sits in the image
        sa, sb = q0a, q0b
        el_x = cx + math.cos(tilt) * sa - math.sin(tilt) * sb * axes_ratio
        el_y = cy + math.sin(tilt) * sa + math.cos(tilt) * sb * axes_ratio
        if on["wire"]:
            side = int(rng.integers(4))
            t = rng.uniform(0.1, 0.9)
            start = [(t * (w - 1), -5.0), (t * (w - 1), h + 4.0), (-5.0, t * (h - 1)), (w + 4.0, t * (h - 1))][side]
            bend = rng.uniform(-0.15, 0.15)
            mid = ((start[0] + el_x) / 2 - bend * (el_y - start[1]), (start[1] + el_y) / 2 + bend * (el_x - start[0]))
            steps = np.linspace(0.0, 1.0, 400)[:, None]
            curve = ((1 - steps) ** 2 * np.array(start) + 2 * (1 - steps) * steps * np.array(mid)
                     + steps**2 * np.array([el_x, el_y]))
            wire_width = rng.uniform(2.0, 7.0)
            canvas = Image.new("L", (w, h), 0)
            ImageDraw.Draw(canvas).line([tuple(p) for p in curve], fill=255, width=max(1, int(round(wire_width))))
            wire_line = np.asarray(canvas) > 0
            wire_alpha = np.clip(ndimage.gaussian_filter(wire_line.astype(np.float64), 0.6) * 1.3, 0.0, 1.0)
            if on["wire_shadow"]:
                length, towards = rng.uniform(3.0, 10.0), rng.uniform(0.0, 2 * math.pi)
                soft_line = ndimage.gaussian_filter(wire_line.astype(np.float64), 2.5)
                shadow = ndimage.shift(soft_line, (length * math.sin(towards), length * math.cos(towards)), order=1)
                img *= (1.0 - 0.45 * np.clip(shadow * 1.5, 0.0, 1.0))[..., None]
            wire_colour = {"black": np.array([0.06, 0.06, 0.07]), "red": np.array([0.75, 0.1, 0.08]),
                           "white": np.array([0.9, 0.9, 0.88]), "copper": _COPPER_BRIGHT * 0.85}
            wire_kind = str(rng.choice(list(wire_colour)))
            _mix(img, wire_colour[wire_kind], wire_alpha)
            truth &= wire_alpha < 0.5
            parts["wire"] = wire_alpha >= 0.5
            nuis["wire"] = {"width_px": round(wire_width, 1), "colour": wire_kind, "from_side": side,
                            "shadow": on["wire_shadow"]}

    # --- glass wall: highlight and shadow arcs -----------------------------------------------------
    if on["glass_highlight"]:
        at, half = rng.uniform(0.0, 2 * math.pi), rng.uniform(0.2, 1.1)
        r_arc = radius_px * rng.uniform(0.94, 1.0)
        width = rng.uniform(1.0, 3.5)
        ridge = np.exp(-0.5 * ((rho - r_arc) / width) ** 2) * _arc_window(psi, at, half, 0.3)
        img += rng.uniform(0.5, 0.9) * ridge[..., None]
        nuis["glass_highlight"] = {"arc_deg": round(math.degrees(2 * half), 0), "width_px": round(width, 1)}
    if on["shadow_arc"]:
        at, half = rng.uniform(0.0, 2 * math.pi), rng.uniform(0.3, 1.3)
        r_arc = radius_px * rng.uniform(0.9, 0.99)
        width = rng.uniform(2.0, 0.05 * radius_px + 3.0)
        band = np.exp(-0.5 * ((rho - r_arc) / width) ** 2) * _arc_window(psi, at, half, 0.3)
        img *= (1.0 - rng.uniform(0.3, 0.6) * band)[..., None]
        nuis["shadow_arc"] = {"arc_deg": round(math.degrees(2 * half), 0), "width_px": round(width, 1)}

    # --- scale bar and label on the bench ----------------------------------------------------------
    marks: list[tuple[str, Any]] = []
    corners = [(0, 0), (0, 1), (1, 0), (1, 1)]
    rng.shuffle(corners)
    outer = radius_px * 1.12
    free_corner = None
    for corner in corners:
        y0 = 6 if corner[0] == 0 else h - 50
        x0 = 6 if corner[1] == 0 else w - 160
        box_y, box_x = np.mgrid[y0:y0 + 44:4, x0:x0 + 154:4]
        bqa = math.cos(tilt) * (box_x - cx) + math.sin(tilt) * (box_y - cy)
        bqb = (-math.sin(tilt) * (box_x - cx) + math.cos(tilt) * (box_y - cy)) / axes_ratio
        if np.hypot(bqa, bqb).min() > outer:
            free_corner = (y0, x0)
            break
    mark_l = 0.05 if _luma(bench) > 0.5 else 0.95
    if free_corner is not None and (on["scale_bar"] or on["label"]):
        y0, x0 = free_corner
        if on["scale_bar"]:
            bar_len = int(rng.integers(40, 140))
            marks.append(("rect", [x0 + 4, y0 + 34, x0 + 4 + bar_len, y0 + 34 + int(rng.integers(2, 6))]))
            marks.append(("text", ((x0 + 4, y0 + 18), f"{int(rng.integers(1, 20))} mm", 12)))
            nuis["scale_bar"] = {"length_px": bar_len, "corner_yx": [y0, x0]}
        if on["label"]:
            label = f"CuSO4 {rng.uniform(0.1, 1.0):.1f} M  {rng.uniform(2, 12):.0f} V  #{int(rng.integers(1, 99))}"
            marks.append(("text", ((x0 + 4, y0 + 2), label, 13)))
            nuis["label"] = {"text": label, "corner_yx": [y0, x0]}
        _mix(img, np.full(3, mark_l), _text_mask((h, w), marks))

    # --- light ----------------------------------------------------------------------------------
    light = np.ones((h, w))
    if on["uneven_light"]:
        angle = rng.uniform(0.0, 2 * math.pi)
        slope = rng.uniform(0.1, 0.45)
        proj = ((xx - w / 2) * math.cos(angle) + (yy - h / 2) * math.sin(angle)) / max(h, w)
        vignette = rng.uniform(0.0, 0.35)
        r2 = ((xx - w / 2) ** 2 + (yy - h / 2) ** 2) / ((w / 2) ** 2 + (h / 2) ** 2)
        light *= (1.0 + slope * proj) * (1.0 - vignette * r2)
        nuis["uneven_light"] = {"gradient": round(slope, 2), "vignette": round(vignette, 2)}
    if on["shadow"]:
        angle = rng.uniform(0.0, 2 * math.pi)
        # Half-plane edge somewhere across the dish, soft.
        offset = rng.uniform(-0.6, 0.6) * radius_px
        soft = rng.uniform(3.0, 40.0)
        depth = rng.uniform(0.2, 0.5)
        signed = (xx - cx) * math.cos(angle) + (yy - cy) * math.sin(angle) - offset
        light *= 1.0 - depth / (1.0 + np.exp(-signed / soft))
        nuis["shadow"] = {"depth": round(depth, 2), "softness_px": round(soft, 1),
                          "edge_offset_of_radius": round(offset / radius_px, 2)}
    img *= light[..., None]

    if on["glare"]:
        near_deposit = ndimage.binary_dilation(deposit_img, iterations=2)
        spots = []
        for _ in range(int(rng.integers(1, 5))):
            for _try in range(30):
                spot_r = rng.uniform(3.0, 18.0)
                a, r = rng.uniform(0, 2 * math.pi), radius_px * math.sqrt(rng.uniform(0.0, 0.95))
                gx = cx + r * (math.cos(tilt) * math.cos(a) - math.sin(tilt) * math.sin(a) * axes_ratio)
                gy = cy + r * (math.sin(tilt) * math.cos(a) + math.cos(tilt) * math.sin(a) * axes_ratio)
                if not (0 <= gx < w and 0 <= gy < h):
                    continue
                # Work in a window around the spot: the blob is negligible beyond 5 radii.
                r0, r1 = max(0, int(gy - 5 * spot_r)), min(h, int(gy + 5 * spot_r) + 1)
                c0, c1 = max(0, int(gx - 5 * spot_r)), min(w, int(gx + 5 * spot_r) + 1)
                d2 = (xx[r0:r1, c0:c1] - gx) ** 2 + (yy[r0:r1, c0:c1] - gy) ** 2
                if not (near_deposit[r0:r1, c0:c1] & (d2 <= (1.3 * spot_r) ** 2)).any():
                    img[r0:r1, c0:c1] += 1.6 * np.exp(-0.5 * d2 / (0.6 * spot_r) ** 2)[..., None]
                    glare_part = parts.setdefault("glare", np.zeros((h, w), dtype=bool))
                    glare_part[r0:r1, c0:c1] |= d2 <= spot_r**2
                    spots.append([round(gx, 1), round(gy, 1), round(spot_r, 1)])
                    break
        nuis["glare"] = {"spots_xyr": spots}

    if on["noise"]:
        sigma = rng.uniform(0.004, 0.025)
        img += sigma * rng.standard_normal((h, w, 1)) + 0.4 * sigma * rng.standard_normal((h, w, 3))
        nuis["noise_sigma"] = round(sigma, 4)
    photo = np.clip(np.rint(img * 255.0), 0, 255).astype(np.uint8)
    if on["jpeg"]:
        quality = int(rng.integers(60, 96))
        buf = io.BytesIO()
        Image.fromarray(photo).save(buf, format="JPEG", quality=quality)
        photo = np.asarray(Image.open(io.BytesIO(buf.getvalue())).convert("RGB")).copy()
        nuis["jpeg_quality"] = quality
    for name in ("slant", "off_centre", "cut_by_frame"):
        description["dish"][name] = on[name]
    description["dish"]["cut_by_frame"] = bool(
        rho[0, :].min() < radius_px or rho[-1, :].min() < radius_px or rho[:, 0].min() < radius_px
        or rho[:, -1].min() < radius_px)
    description["truth_area_px"] = int(truth.sum())
    dish_area = math.pi * radius_px**2 * axes_ratio
    description["deposit"]["fill_of_dish"] = round(float(deposit_img.sum()) / dish_area, 3)
    description["deposit"]["envelope_of_dish"] = round(
        float(np.count_nonzero(seed_rho <= float(seed_rho[deposit_img].max()))) / dish_area, 3)
    return Scene(photo=photo, truth=truth, description=description, parts=parts)


def random_scene(seed: int) -> Scene:
    """A scene with everything drawn from ``seed``: cluster, scale, dish, nuisances."""
    sites, info = random_deposit(seed)
    return render_scene(sites, seed, dense=info["dense"], deposit_info=info)


# ----------------------------------------------------------------------------- judging


def iou(a: np.ndarray, b: np.ndarray) -> float:
    """Intersection over union of two masks (1.0 when both are empty)."""
    a, b = np.asarray(a, bool), np.asarray(b, bool)
    union = int(np.count_nonzero(a | b))
    return 1.0 if union == 0 else int(np.count_nonzero(a & b)) / union


def summary(description: dict[str, Any]) -> str:
    """One line naming the deposit, the polarity and every nuisance drawn."""
    d = description
    dep = d["deposit"]
    params = ",".join(f"{k}={v}" for k, v in dep.get("params", {}).items())
    parts = [f"seed={d['seed']}", f"{dep.get('regime', '?')}({params}) n={dep.get('n_particles', '?')}"
             + (" DENSE" if dep.get("dense") else ""),
             f"{dep['scale_px_per_site']}px/site {dep['thickness_law']} w={dep['branch_width_px']}",
             f"{d['polarity']} deposit, solution {d['solution_vs_bench']} than bench",
             f"{d['size_hw'][1]}x{d['size_hw'][0]}"]
    dish = d["dish"]
    if dish["slant"]:
        parts.append(f"slant {dish['axes_ratio']}@{dish['angle_deg']}")
    if dish["cut_by_frame"]:
        parts.append("dish cut by frame")
    for name, value in d["nuisances"].items():
        if name == "rim_band" and value.get("lighter_ring"):
            parts.append("lighter ring")
        elif isinstance(value, (dict, bool)):
            parts.append(name)
        else:
            parts.append(f"{name}={value}")
    return "; ".join(parts)


def box_dimension(mask: np.ndarray) -> tuple[float, bool]:
    """Box dimension of ``mask`` as the analysis reports it, and whether the fit is usable.

    Usable: at least five box sizes in the fit, and neither too few scales nor a compact
    specimen measured below its width (whose value says nothing of the branching).
    """
    from service.features import measure

    fit = measure(mask).to_dict()["box_dimension"]
    usable = fit["n_fit_points"] >= 5 and not any("compact" in w or "fewer than" in w for w in fit["warnings"])
    return float(fit["value"]), bool(usable)


def taken(mask: np.ndarray, scene: Scene) -> dict[str, float]:
    """What a reading took besides the deposit, and what it missed, as fractions of the truth's area.

    Keys: each drawn part (``electrode``, ``wire``, ``tape``, ``rim``, ``glare``), ``solution``
    (the rest of the dish), ``bench`` (outside the dish), and ``missed`` (deposit left out).
    Only the non-zero ones are returned.
    """
    area = max(1, int(np.count_nonzero(scene.truth)))
    extra = np.asarray(mask, bool) & ~scene.truth
    out: dict[str, float] = {}
    for name in ("electrode", "wire", "tape", "glare", "rim"):
        if name in scene.parts:
            out[name] = np.count_nonzero(extra & scene.parts[name]) / area
            extra = extra & ~scene.parts[name]
    out["solution"] = np.count_nonzero(extra & scene.parts["solution"]) / area
    out["bench"] = np.count_nonzero(extra & ~scene.parts["solution"]) / area
    out["missed"] = np.count_nonzero(scene.truth & ~np.asarray(mask, bool)) / area
    return {k: round(float(v), 3) for k, v in out.items() if v > 0}


def judge(scene: Scene, *, dimension: bool = True) -> dict[str, Any]:
    """Segment the scene's photo automatically (public API only) and compare with the truth.

    Returns ``seed``, ``iou``, ``error`` (the exception text when segmentation refused),
    ``iou_without_electrode`` (the same with the drawn electrode's pixels left out of both),
    ``taken`` (see ``taken``), ``mask`` (the reading, or None), and with ``dimension``:
    ``d_true``, ``d_seg``, ``d_usable`` (the true mask's fit is usable).
    """
    from service.imaging import segment

    record: dict[str, Any] = {"seed": scene.description["seed"], "error": None, "mask": None}
    try:
        mask = segment(scene.photo).mask
    except Exception as exc:  # a refusal is a failed reading of this scene, not a crash of the bench
        record.update(iou=0.0, error=f"{type(exc).__name__}: {exc}")
        mask = None
    else:
        record["iou"] = iou(mask, scene.truth)
        # The reading leaves the electrode out only where its grey outlines it; the drawn
        # electrode's pixels left out of both masks show what the rest still costs.
        beside = ~scene.parts["electrode"] if "electrode" in scene.parts else True
        record["iou_without_electrode"] = iou(mask & beside, scene.truth & beside)
        record["mask"] = mask
        record["taken"] = taken(mask, scene)
    if dimension:
        d_true, usable = box_dimension(scene.truth)
        record.update(d_true=d_true, d_usable=usable, d_seg=None)
        if mask is not None and mask.any():
            from service.errors import SpecimenError

            try:
                d_seg = box_dimension(mask)[0]
            except (ValueError, SpecimenError):  # too small a reading to measure: no dimension
                d_seg = math.nan
            record["d_seg"] = d_seg if math.isfinite(d_seg) else None
    return record


def report(records: list[dict[str, Any]], descriptions: dict[int, dict[str, Any]], *, iou_floor: float = 0.85,
           worst: int = 10) -> str:
    """The IoU distribution, the pass rate, a breakdown by nuisance, and the worst scenes."""
    values = np.array([r["iou"] for r in records])
    beside = np.array([r.get("iou_without_electrode", r["iou"]) for r in records])
    lines = [f"{len(values)} scenes; IoU >= {iou_floor}: {np.mean(values >= iou_floor):.1%} "
             f"({np.mean(beside >= iou_floor):.1%} with the electrode's pixels left out of both masks)",
             "IoU quantiles: " + "  ".join(f"q{int(q * 100):02d}={np.quantile(values, q):.3f}"
                                          for q in (0.0, 0.05, 0.1, 0.25, 0.5, 0.75, 0.9))]
    dims = [r for r in records if r.get("d_usable")]
    if dims:
        err = np.array([abs(r["d_seg"] - r["d_true"]) if r["d_seg"] is not None else np.inf for r in dims])
        both = np.array([r["iou"] >= iou_floor for r in dims]) & (err <= 0.05)
        lines.append(f"box dimension on {len(dims)} scenes with a usable true fit: |D_seg - D_true| <= 0.05 on "
                     f"{np.mean(err <= 0.05):.1%}; median error {np.median(err):.3f}; IoU and dimension both pass "
                     f"on {np.mean(both):.1%}")
    # Which nuisance goes with failures: pass rate with it drawn, against without.
    keys: dict[str, list[bool]] = {}
    for r in records:
        for key in _features(descriptions[r["seed"]]):
            keys.setdefault(key, [])
    lines.append("pass rate by what was drawn (with / without, scenes with it):")
    rows = []
    for key in sorted(keys):
        with_it = [r["iou"] >= iou_floor for r in records if key in _features(descriptions[r["seed"]])]
        without = [r["iou"] >= iou_floor for r in records if key not in _features(descriptions[r["seed"]])]
        if with_it and without:
            rows.append((np.mean(with_it) - np.mean(without), key, np.mean(with_it), np.mean(without), len(with_it)))
    for delta, key, a, b, n in sorted(rows):
        lines.append(f"  {key:28s} {a:6.1%} / {b:6.1%}  (n={n})")
    lines.append(f"worst {min(worst, len(records))}:")
    for r in sorted(records, key=lambda r: r["iou"])[:worst]:
        extra = f" [{r['error']}]" if r.get("error") else ""
        if r.get("taken"):
            extra += " took " + ", ".join(f"{k} {v:.2f}" for k, v in r["taken"].items())
        lines.append(f"  IoU {r['iou']:.3f}{extra}  {summary(descriptions[r['seed']])}")
    return "\n".join(lines)


def _features(description: dict[str, Any]) -> set[str]:
    """Labels of what a scene drew, for the breakdown."""
    dep = description["deposit"]
    out = {f"regime={dep.get('regime')}", f"polarity={description['polarity']}",
           f"solution {description['solution_vs_bench']} than bench", f"law={dep['thickness_law'].split('+')[0]}"}
    if dep.get("dense"):
        out.add("dense deposit")
    if dep["branch_width_px"][0] < 4.0:
        out.add("branches < 4 px")
    for name in ("slant", "off_centre", "cut_by_frame"):
        if description["dish"].get(name):
            out.add(name)
    for name, value in description["nuisances"].items():
        if name == "rim_band" and value.get("lighter_ring"):
            out.add("lighter ring")
        if name == "soft_edges_px":
            if value >= 1.0:
                out.add("blur >= 1 px")
        elif name == "jpeg_quality":
            if value < 75:
                out.add("jpeg < 75")
            out.add("jpeg")
        elif name == "noise_sigma":
            if value > 0.015:
                out.add("noise > 0.015")
        elif name == "glare" and not value.get("spots_xyr"):
            continue
        else:
            out.add(name)
    return out


if __name__ == "__main__":  # pragma: no cover - a quick look: python -m tests.imaging.scenes SEED OUT.png
    import sys

    scene = random_scene(int(sys.argv[1]) if len(sys.argv) > 1 else 0)
    print(summary(scene.description))
    if len(sys.argv) > 2:
        Image.fromarray(np.concatenate([scene.photo, np.repeat(scene.truth[..., None] * 255, 3, 2).astype(np.uint8)],
                                       axis=1)).save(sys.argv[2])
