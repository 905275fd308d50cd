"""Euclidean distance to the background: the one distance transform every measure uses.

scipy's ``distance_transform_edt`` builds a full feature transform (two int32 index arrays)
before it takes any distance; the ``edt`` package (Felzenszwalb-Huttenlocher passes) gives the
squared distances directly, six times faster on a 1,100 x 1,100 px deposit here. The squared
distances between pixel centres are integers, exact in float32 up to 2**24, so their float64
square roots are scipy's values bit for bit (``tests/features/test_distance.py``).
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage

#: Largest squared distance float32 holds exactly (every integer up to it).
_EXACT_SQUARED = float(2**24)


def distance_to_background(mask: np.ndarray) -> np.ndarray:
    """Distance (float64, px) from each pixel of ``mask`` to the nearest pixel outside it; 0 outside.

    Same values as ``scipy.ndimage.distance_transform_edt(mask)``, including its reading of a
    mask without any background (then scipy's own answer is returned).
    """
    import edt

    mask = np.ascontiguousarray(mask, dtype=bool)
    if mask.ndim != 2 or mask.all():
        return ndimage.distance_transform_edt(mask)
    squared = edt.edtsq(mask, black_border=False, parallel=1)
    if squared.size and float(squared.max()) > _EXACT_SQUARED:
        return ndimage.distance_transform_edt(mask)
    return np.sqrt(squared, dtype=np.float64)
