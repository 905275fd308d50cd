"""The demo study: a made-up voltage series of simulated deposits, made by Ramiform itself.

The scenario is invented and labelled as such wherever it is shown: six 'copper deposits'
from a fictional cell, each in fact a dielectric breakdown model (DBM) cluster whose exponent
eta we set from a made-up 'voltage' (eta rising with it), with a made-up 'concentration'
alternating between two values and no effect. Each is rendered as a photograph
(:func:`service.imaging.render_photo`) and analysed like an upload, so the study page shows
how the box dimension falls as eta rises (Niemeyer, Pietronero & Wiesmann 1984) and how
the ranked regime changes along the series.
"""

from __future__ import annotations

import io
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from PIL import Image

from service.store import write_durably

DEMO_STUDY_NAME = "DEMO study (simulated voltage series, not real specimens)"
DEMO_STORY = (
    "Demo data, made up: a 'voltage series' from a fictional cell, Demo cell 2. Each 'deposit' is in fact "
    "a DBM cluster of 1500 sites that Ramiform grew with its exponent eta set by the made-up voltage "
    "(eta = 0 at 1 V up to 4 at 6 V), rendered as a photograph and analysed like an upload; the "
    "'concentration' alternates between two made-up values and changes nothing."
)
_N_SITES = 1500
_SIZE_PX = 420
#: Bump when the recipe changes, so cached renderings are not reused.
DEMO_STUDY_VERSION = 2


@dataclass(frozen=True)
class DemoMember:
    voltage_v: float
    concentration_mol_per_l: float
    eta: float
    seed: int

    def conditions(self) -> dict[str, str]:
        return {"voltage": f"{self.voltage_v:g} V", "concentration": f"{self.concentration_mol_per_l:g} mol/L",
                "electrolyte": "made-up (simulation)"}


DEMO_MEMBERS = tuple(
    DemoMember(voltage, concentration, eta, seed)
    for voltage, concentration, eta, seed in (
        (1.0, 0.05, 0.0, 301), (2.0, 0.2, 0.5, 302), (3.0, 0.05, 1.0, 303),
        (4.0, 0.2, 2.0, 304), (5.0, 0.05, 3.0, 305), (6.0, 0.2, 4.0, 306),
    )
)


def member_label(index: int) -> str:
    member = DEMO_MEMBERS[index]
    return f"DEMO {member.voltage_v:g} V (simulated DBM, eta {member.eta:g})"


def member_filename(index: int) -> str:
    return f"ramiform-demo-study-{index + 1}.png"


def make_member_png(index: int) -> bytes:
    """Grow and render one member (deterministic: fixed seeds; a second or two of CPU)."""
    from service.imaging import render_photo
    from service.simulate import grow

    member = DEMO_MEMBERS[index]
    cluster = grow("dbm", _N_SITES, eta=member.eta, seed=member.seed)
    rgb = render_photo(cluster > 0, seed=member.seed, size_px=_SIZE_PX, polarity="dark")
    out = io.BytesIO()
    Image.fromarray(np.asarray(rgb, dtype=np.uint8)).save(out, format="PNG")
    return out.getvalue()


def ensure_member_png(data_dir: Path, index: int) -> bytes:
    """The member's picture from the data folder, made and stored durably on first use."""
    path = Path(data_dir) / "demo" / f"demo-study-v{DEMO_STUDY_VERSION}-{index + 1}.png"
    if path.is_file():
        return path.read_bytes()
    data = make_member_png(index)
    write_durably(path, data)
    return data
