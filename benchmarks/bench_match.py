"""Cost of ranking a specimen against the reference library, beside the cost of measuring it.

Prints: fitting the matcher's model on a reference set (once per process), then for one
photograph-like specimen mask, ``measure`` alone and ``match_features`` alone, in one run.
The feature cache of the set must exist (``build_feature_cache``); pass a set's folder as
the first argument, default the bundled set.
"""

from __future__ import annotations

import sys
import time

from service.features import measure
from service.library import load_reference_set
from service.match import match_features, reference_model
from service.match.cache import load_reference_table
from service.match.vector import reference_photo_mask
from service.simulate import grow


def _best_of(fn, repeats: int = 3) -> float:
    times = []
    for _ in range(repeats):
        started = time.perf_counter()
        fn()
        times.append(time.perf_counter() - started)
    return min(times)


def main() -> None:
    reference_set = load_reference_set(sys.argv[1] if len(sys.argv) > 1 else None)
    started = time.perf_counter()
    table = load_reference_table(reference_set, build_if_missing=False)
    load_s = time.perf_counter() - started
    started = time.perf_counter()
    model = reference_model(reference_set)
    fit_s = time.perf_counter() - started
    print(f"reference set {reference_set.path}: {table.values.shape[0]} clusters, {len(model.families)} families")
    print(f"  load feature cache {load_s * 1e3:.0f} ms, fit + leave-one-out calibration {fit_s:.2f} s")
    for n in (3000, 10000):
        mask = reference_photo_mask(grow("dla", n, seed=31), seed=1)
        measure_s = _best_of(lambda: measure(mask))
        match_s = _best_of(lambda: match_features(None, reference_set=reference_set, mask=mask))
        print(f"  DLA {n} drawn {mask.shape[0]}x{mask.shape[1]} px: measure {measure_s:.2f} s, "
              f"match_features {match_s:.2f} s ({match_s / measure_s:.2f}x)")


if __name__ == "__main__":
    main()
