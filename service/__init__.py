"""Ramiform: measure photographed branching specimens and rank them against simulated growth."""

__version__ = "0.1.0"
