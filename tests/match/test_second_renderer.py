"""Freshly grown clusters of every family, photographed by a renderer of the tests' own
(``tests/match/second_renderer.py``: its own thickness law, soft edges, defocus, lighting,
noise, JPEG and segmentation), ranked against the bundled library (issue 10).

The truth is known by construction (each cluster is grown here with the stated simulator and
parameters); seeds are far from the library's SHA-256 derived ones. A few clusters have a
parameter between the library's grid values (sticking 0.5, eta 2.5), where only an honest
interval can cover the truth.
"""

from __future__ import annotations

import pytest

from service.match import match, verdict_of
from service.simulate import grow
from tests.match.second_renderer import photograph

VN, MOORE = "von_neumann", "moore"
#: (regime, parameters, sizes): one cluster per size.
CASES = (
    ("dla", {"neighborhood": VN, "sticking": 1.0}, (2000, 5000, 12000, 3000, 8000)),
    ("dla", {"neighborhood": VN, "sticking": 0.5}, (3000, 7000)),
    ("dla", {"neighborhood": VN, "sticking": 0.3}, (2000, 6000, 10000, 4000)),
    ("dla", {"neighborhood": VN, "sticking": 0.1}, (2000, 5000, 9000, 3000)),
    ("dla", {"neighborhood": MOORE, "sticking": 1.0}, (2500, 7000, 4000, 10000)),
    ("dla", {"neighborhood": MOORE, "sticking": 0.3}, (3000, 8000, 5000)),
    ("dla", {"neighborhood": MOORE, "sticking": 0.1}, (3000, 6000, 4000)),
    # Discs of unit diameter off the lattice (issue 10: 10,000-30,000 discs rank as the DLA class).
    ("dla", {"off_lattice": True, "sticking": 1.0}, (10000, 20000, 30000)),
    ("eden", {}, (2000, 6000, 15000, 4000, 9000)),
    ("ballistic", {}, (2000, 6000, 15000, 4000, 9000)),
    ("dbm", {"eta": 0.5}, (800, 1500, 1200, 1000)),
    ("dbm", {"eta": 1.0}, (800, 1500, 1200, 1000)),
    ("dbm", {"eta": 1.5}, (800, 1400, 1000, 1200)),
    ("dbm", {"eta": 2.0}, (700, 1200, 1000, 900)),
    ("dbm", {"eta": 2.5}, (700, 1000, 800)),
    ("dbm", {"eta": 3.0}, (500, 800, 600, 700)),
    ("dbm", {"eta": 4.0}, (500, 700, 600, 550)),
)
SPECIMENS = [(regime, parameters, n) for regime, parameters, sizes in CASES for n in sizes]
#: Issue 10's checks.
MIN_RIGHT_SHARE = 0.9
MAX_CONFIDENT_WRONG = 1
MIN_COVERAGE = 0.9
#: The parameter each regime's interval is checked on.
CHECKED = {"dla": "sticking", "dbm": "eta"}


@pytest.fixture(scope="module")
def ranked(reference_set):
    results = []
    for i, (regime, parameters, n) in enumerate(SPECIMENS):
        cluster = grow(regime, n, seed=91_000_007 + 7919 * i, **parameters)
        mask = photograph(cluster, seed=31_337 + i)
        results.append(match(None, reference_set=reference_set, mask=mask))
    return results


def _lines(ranked):
    lines = []
    for (regime, parameters, n), result in zip(SPECIMENS, ranked):
        verdict = result.explanation["verdict"]
        truth = verdict_of(regime, parameters)
        name = CHECKED.get(regime)
        estimate = result.parameter_estimates.get(regime, {}).get(name) if name else None
        interval = f" {name} {estimate['value']:.2f} in [{estimate['ci95'][0]:.2f}, {estimate['ci95'][1]:.2f}]" \
            if estimate else ""
        lines.append(f"{regime} {parameters} n={n}: {verdict['best']} p={verdict['probability']:.2f} "
                     f"({'ok' if verdict['best'] == truth else 'WRONG'}; {verdict['name']}){interval}")
    return lines


@pytest.mark.slow
def test_the_top_regime_is_right_and_never_confidently_wrong(ranked):
    right, confident_wrong = 0, 0
    for (regime, parameters, _), result in zip(SPECIMENS, ranked):
        verdict = result.explanation["verdict"]
        ok = verdict["best"] == verdict_of(regime, parameters)
        right += ok
        confident_wrong += (not ok) and verdict["probability"] >= 0.9
    report = "\n".join(_lines(ranked))
    print(report, f"\nright {right}/{len(SPECIMENS)}, wrong at p >= 0.9: {confident_wrong}")
    assert len(SPECIMENS) >= 60
    assert right >= MIN_RIGHT_SHARE * len(SPECIMENS), report
    assert confident_wrong <= MAX_CONFIDENT_WRONG, report


@pytest.mark.slow
def test_the_parameter_intervals_cover_the_truth(ranked):
    covered, checked = 0, 0
    for (regime, parameters, _), result in zip(SPECIMENS, ranked):
        name = CHECKED.get(regime)
        if name is None:
            continue
        lo, hi = result.parameter_estimates[regime][name]["ci95"]
        checked += 1
        covered += lo - 1e-9 <= parameters[name] <= hi + 1e-9
    report = "\n".join(_lines(ranked))
    print(report, f"\ncovered {covered}/{checked}")
    assert covered >= MIN_COVERAGE * checked, report


@pytest.mark.slow
def test_off_lattice_dla_ranks_as_the_dla_class(ranked):
    # Issue 10: an off-lattice DLA of unit discs (Tolman & Meakin, Phys. Rev. A 40, 428, 1989,
    # from memory: D = 1.715, the DLA class) must rank as DLA, not by the lattice's axes.
    verdicts = [result.explanation["verdict"]["best"] for (regime, parameters, n), result in zip(SPECIMENS, ranked)
                if parameters.get("off_lattice")]
    assert len(verdicts) == 3
    assert all(v == verdict_of("dla", {}) for v in verdicts), (verdicts, "\n".join(_lines(ranked)))
