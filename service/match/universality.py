"""Universality classes: which library families are one answer, and the verdict a family gives.

This is the one place in the matcher that names regimes; everything else reads regimes and
parameters from the reference set's manifest.
"""

from __future__ import annotations

from typing import Any

#: Families that belong to one universality class, so either answer is right for either.
#: Members are (regime, {parameter: (low, high)}); a regime with no bounds matches any of
#: its parameter sets.
UNIVERSALITY_CLASSES: tuple[dict[str, Any], ...] = (
    {
        "name": "diffusion-limited growth",
        "members": (("dla", {}), ("dbm", {"eta": (1.0, 1.0)})),
        "note": (
            "DLA (on a lattice or off it) and the dielectric breakdown model with eta = 1 belong to one "
            "universality class (growth probability proportional to the Laplacian field; Niemeyer, "
            "Pietronero & Wiesmann, Phys. Rev. Lett. 52, 1033, 1984): either answer is right for either."
        ),
    },
    {
        "name": "compact growth",
        "members": (("eden", {}), ("dbm", {"eta": (0.0, 0.5)})),
        "note": (
            "Eden growth and the dielectric breakdown model with eta near 0 belong to one universality "
            "class (at eta = 0 every perimeter site is equally likely, which is Eden's rule; Niemeyer, "
            "Pietronero & Wiesmann 1984): either answer is right for either."
        ),
    },
)


def universality_class(regime: str, parameters: dict) -> str | None:
    """Name of the universality class (from ``UNIVERSALITY_CLASSES``) a family belongs to."""
    for entry in UNIVERSALITY_CLASSES:
        for member_regime, bounds in entry["members"]:
            if member_regime == regime and all(
                name in parameters and lo <= float(parameters[name]) <= hi for name, (lo, hi) in bounds.items()
            ):
                return entry["name"]
    return None


def class_note(name: str | None) -> str | None:
    """The sentence that explains a universality class (None for no class)."""
    return next((e["note"] for e in UNIVERSALITY_CLASSES if e["name"] == name), None)


def verdict_of(regime: str, parameters: dict) -> str:
    """The answer a family gives to "how did this grow": its universality class, else its regime.

    Families with one verdict are one answer: the matcher's confidence and its abstention
    are about verdicts, so DLA against DBM with eta = 1 is no doubt at all.
    """
    return universality_class(regime, parameters) or regime
