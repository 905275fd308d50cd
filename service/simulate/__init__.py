"""Growth simulators: one module per regime, each a plain function returning a lattice.

Every simulator takes the number of particles (occupied sites) and an explicit seed and
returns a 2-D ``int32`` array whose non-zero cells are the occupied sites, numbered in
order of arrival 1..n, so growth can be replayed. Same seed, same array, bit for bit.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from service.simulate.ballistic import ballistic
from service.simulate.dbm import dbm
from service.simulate.dla import dla
from service.simulate.eden import eden
from service.simulate.offlattice import dla_offlattice

#: Regime name -> growth function (off-lattice DLA is ``dla`` with ``off_lattice=True``, one
#: regime with the lattice ones). The library builder and the matcher iterate over this;
#: a new regime is one module plus one line here. (numba compiles each kernel on first call,
#: so importing all of them costs nothing.)
SIMULATORS: dict[str, Callable[..., np.ndarray]] = {
    "dla": dla,
    "eden": eden,
    "ballistic": ballistic,
    "dbm": dbm,
}
REGIMES: tuple[str, ...] = tuple(SIMULATORS)


def simulator(regime: str) -> Callable[..., np.ndarray]:
    """The growth function of ``regime``."""
    try:
        return SIMULATORS[regime]
    except KeyError:
        raise ValueError(f"unknown regime {regime!r}; known: {list(REGIMES)}") from None


def grow(regime: str, n_particles: int, *, seed: int, **parameters) -> np.ndarray:
    """Grow one cluster of ``regime`` with its ``parameters`` (e.g. ``eta=1.0`` for DBM)."""
    return simulator(regime)(n_particles, seed=seed, **parameters)


__all__ = ["REGIMES", "SIMULATORS", "ballistic", "dbm", "dla", "dla_offlattice", "eden", "grow", "simulator"]
