"""The search's top designs re-checked in ngspice (Debian package) through their netlists.

For each example spec the rank-1 design of a short seeded search is simulated; its gain,
usable swing, input impedance, supply current and supply rejection must agree with the model within the
tolerances of the stage models' ngspice agreement (tests/spice_agreement.TOLERANCES; the
supply current is held to the operating-point tolerance). Skipped only where ngspice is
absent.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

from optimizer.candidates import design_from_record
from optimizer.search import search
from optimizer.spec import load_spec
from spice_agreement import TOLERANCES
from spice_harness import spice_midband, spice_operating_point, spice_psrr, spice_swing

pytestmark = pytest.mark.skipif(
    shutil.which("ngspice") is None, reason="ngspice not installed: apt-get install ngspice"
)

SPECS = sorted(Path(__file__).resolve().parent.parent.joinpath("specs").glob("*.yaml"))


@pytest.mark.parametrize("path", SPECS, ids=lambda p: p.stem)
def test_rank_one_agrees_with_ngspice(path: Path) -> None:
    best = search(load_spec(path), seed=11, top=1).candidates[0]  # the spec's own budget
    _, parts, _, conditions = design_from_record(best)
    values = {role: float(v[0]) for role, v in parts.items()}
    model = {**best["transistor"]["model"], "polarity": best["transistor"]["polarity"]}  # a PNP's card and rails
    mid = spice_midband(best["topology"], values, model, conditions)
    simulated = {
        "gain": mid["gain"],
        "input_impedance": mid["input_impedance"],
        "swing_vpp": spice_swing(best["topology"], values, model, conditions),
        "supply_current": spice_operating_point(best["topology"], values, model, conditions)["supply_current"],
    }
    tolerance = {
        **{k: TOLERANCES[k][0] for k in ("gain", "input_impedance", "swing_vpp")},
        "supply_current": TOLERANCES["ic"][0],
    }
    off = {
        k: (best["metrics"][k], v) for k, v in simulated.items() if abs(best["metrics"][k] - v) > tolerance[k] * abs(v)
    }
    assert not off, f"{best['topology']} {values}: model vs ngspice {off}"
    # supply rejection at the ripple frequency and at mid-band, within 2 dB (ngspice AC on each rail)
    mid_f = (conditions.band[0] * conditions.band[1]) ** 0.5
    ripple, midband = spice_psrr(best["topology"], values, model, conditions, (conditions.ripple_frequency, mid_f))
    psrr = (best["metrics"]["psrr_ripple_db"], ripple, best["metrics"]["psrr_mid_db"], midband)
    assert abs(psrr[0] - psrr[1]) <= 2.0 and abs(psrr[2] - psrr[3]) <= 2.0, psrr
    # the rank-1 design meets the spec on the default basis: every limit in >= 95 % of 2,000 builds
    assert best["feasible"] and best["basis"]["kind"] == "yield" and best["metrics"]["yield"] >= 0.95, best["basis"]
