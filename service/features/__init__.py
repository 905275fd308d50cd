"""Measurements of a binary specimen: dimensions, lacunarity, skeleton graph, profiles."""

from service.features.dimension import ScalingFit, box_counting, mass_radius, sandbox
from service.features.lacunarity import LacunarityCurve, lacunarity

__all__ = ["LacunarityCurve", "ScalingFit", "box_counting", "lacunarity", "mass_radius", "sandbox"]
