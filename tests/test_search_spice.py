"""The search's top designs re-checked in ngspice (Debian package) through their netlists.

For each example spec the rank-1 design of a short seeded search is simulated; its gain,
clipping swing, input impedance and supply current must agree with the model within the
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
from spice_harness import spice_midband, spice_operating_point, spice_swing

pytestmark = pytest.mark.skipif(shutil.which("ngspice") is None,
                                reason="ngspice not installed: apt-get install ngspice")

SPECS = sorted(Path(__file__).resolve().parent.parent.joinpath("specs").glob("*.yaml"))


@pytest.mark.parametrize("path", SPECS, ids=lambda p: p.stem)
def test_rank_one_agrees_with_ngspice(path: Path) -> None:
    best = search(load_spec(path), trials=512, seed=11, top=1).candidates[0]
    _, parts, _, conditions = design_from_record(best)
    values = {role: float(v[0]) for role, v in parts.items()}
    model = best["transistor"]["model"]
    mid = spice_midband(best["topology"], values, model, conditions)
    simulated = {"gain": mid["gain"], "input_impedance": mid["input_impedance"],
                 "swing_vpp": spice_swing(best["topology"], values, model, conditions),
                 "supply_current": spice_operating_point(best["topology"], values, model, conditions)["supply_current"]}
    tolerance = {**{k: TOLERANCES[k][0] for k in ("gain", "input_impedance", "swing_vpp")},
                 "supply_current": TOLERANCES["ic"][0]}
    off = {k: (best["metrics"][k], v) for k, v in simulated.items()
           if abs(best["metrics"][k] - v) > tolerance[k] * abs(v)}
    assert not off, f"{best['topology']} {values}: model vs ngspice {off}"
