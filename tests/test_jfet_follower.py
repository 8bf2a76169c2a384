"""jfet_follower: the self-biased, bootstrapped JFET source follower against ngspice (Debian);
the search pairs JFET stages only with JFETs; a 10 Mohm sensor spec finds a feasible JFET buffer."""

from __future__ import annotations

import dataclasses
import math
import shutil
from pathlib import Path

import numpy as np
import optuna
import pytest

from jfet_checks import CORNER_ID_TOLERANCE, corner_errors, designs_of, outside_tolerance
from optimizer.candidates import design_from_record
from optimizer.devices import BOLTZMANN, ELEMENTARY_CHARGE, KELVIN_OFFSET
from optimizer.errors import InputError
from optimizer.search import SearchSpace, search
from optimizer.spec import load_spec, parse_spec
from optimizer.topologies import get_topology
from spice_agreement import TOLERANCES
from spice_harness import spice_midband, spice_noise, spice_operating_point

TOPOLOGY = get_topology("jfet_follower")
DESIGNS = designs_of("jfet_follower")
SPEC = Path(__file__).resolve().parent.parent / "specs" / "geophone_jfet_buffer.yaml"
needs_ngspice = pytest.mark.skipif(
    shutil.which("ngspice") is None, reason="ngspice not installed: apt-get install ngspice"
)


@needs_ngspice
@pytest.mark.parametrize("design", DESIGNS, ids=[d.name for d in DESIGNS])
def test_model_agrees_with_ngspice(design) -> None:
    """Every figure of spice_agreement.TOLERANCES within tolerance, reference: ngspice's NJF model."""
    outside = outside_tolerance(design)
    assert not outside, "\n".join(outside)


def test_bootstrap_raises_the_input_impedance_above_r_gate() -> None:
    """The gate resistor returns to the tap, which follows the output: Zin = r_gate/(1 - A_tap)
    in band, above r_gate itself on every design (and megohms wherever r_gate is 1 Mohm or
    more; ngspice agrees on each: test_model_agrees_with_ngspice)."""
    for d in DESIGNS:
        parts = {k: np.array([v]) for k, v in d.parts.items()}
        z_in = TOPOLOGY.evaluate(parts, d.device, d.conditions, full=False).metrics["input_impedance"][0]
        assert z_in > 2 * d.parts["r_gate"] >= 2e6


@needs_ngspice
@pytest.mark.parametrize("design", DESIGNS[:3], ids=[d.name for d in DESIGNS[:3]])
def test_idss_vp_corners_agree_with_ngspice(design) -> None:
    """Drain current within 5 % of ngspice at each IDSS/VP corner and temperature (see
    tests/test_jfet_common_source.py), corners out of saturation flagged alike."""
    rows = corner_errors(design)
    assert not [r for r in rows if r[5] and abs(r[4]) > CORNER_ID_TOLERANCE], rows
    assert all(r[5] == r[6] for r in rows), rows


@needs_ngspice
def test_gate_current_shot_noise_agrees_with_ngspice() -> None:
    """With a leaky gate (IS 2.5 nA: 10 nA of gate current at 27 degC, a hot part) behind a 10 Mohm source,
    the gate current's shot noise 2q*Ig/2 across each gate junction dominates; ngspice's JFET
    has no gate shot noise, so the check adds it as a resistor of the same thermal noise,
    4kT/R = q*Ig, across each junction, its conductance cancelled by a noiseless negative twin
    (ngspice's noisy=0)."""
    design = next(d for d in DESIGNS if d.conditions.source_impedance >= 1e6)
    leaky = dataclasses.replace(design.device, IS=2.5e-9, KF=0.0)
    ig = float(leaky.gate_leakage(27.0))
    r_eq = 4 * BOLTZMANN * (27.0 + KELVIN_OFFSET) / (ELEMENTARY_CHARGE * ig)
    extra = "\n".join(
        f"Rshot{i} gate {node} {r_eq!r}\nRcancel{i} gate {node} {-r_eq!r} noisy=0"
        for i, node in ((1, "source"), (2, "vcc"))
    )
    parts = {k: np.array([v]) for k, v in design.parts.items()}
    model = float(TOPOLOGY.evaluate(parts, leaky, design.conditions).metrics["noise_ein_v"][0])
    quiet = float(TOPOLOGY.evaluate(parts, design.device, design.conditions).metrics["noise_ein_v"][0])
    spice = spice_noise(design.topology, design.parts, leaky.spice_model(), design.conditions, elements=extra)
    tolerance, _ = TOLERANCES["noise_ein_v"]
    assert abs(20 * math.log10(model / spice)) <= tolerance
    assert 20 * math.log10(model / quiet) > 3 * tolerance  # the term matters: the check can fail


def test_search_pairs_jfet_stages_only_with_jfets() -> None:
    """Every trial of a space holding both kinds draws a device of its topology's kind."""
    space = SearchSpace.build(load_spec(SPEC))  # a non-inverting spec: the JFET follower and bipolar stages
    assert "jfet_follower" in space.topologies
    assert any(get_topology(t).device_kind == "bjt" for t in space.topologies)
    study = optuna.create_study(sampler=optuna.samplers.RandomSampler(seed=2))
    kinds = set()
    for _ in range(200):
        design = space.suggest(study.ask())
        kind = get_topology(design.topology).device_kind
        assert space.devices[design.device].kind == kind
        kinds.add(kind)
    assert kinds == {"bjt", "jfet"}
    assert all(space.devices[s.device].kind == get_topology(s.topology).device_kind for s in space.seeds())


def test_jfet_stages_without_a_jfet_are_refused() -> None:
    """A spec naming only JFET stages and only bipolar devices is refused before any trial, naming the devices."""
    spec = parse_spec(
        {
            "name": "x",
            "supply": "12 V",
            "gain": {"target": 0.9, "tolerance": "1 dB"},
            "source_impedance": "10M",
            "load_impedance": "10k",
            "band": ["5 Hz", "5 kHz"],
            "devices": ["npn-general"],
            "topologies": ["jfet_follower"],
        }
    )
    with pytest.raises(InputError) as caught:
        SearchSpace.build(spec)
    assert any(
        p.where == "topologies" and "jfet" in p.expected and "npn-general" in p.expected for p in caught.value.problems
    )  # names the stage's device kind and the spec's devices


@needs_ngspice
def test_ten_megohm_sensor_spec_finds_a_feasible_jfet_buffer() -> None:
    """The invented 10 Mohm sensor spec, JFET and bipolar stages eligible: rank 1 meets the spec
    (yield basis), is a JFET stage, and its gain, input impedance and drain current agree with
    ngspice within the metrics' tolerances (Id 3 %)."""
    result = search(load_spec(SPEC), trials=300, seed=1)
    best = result.candidates[0]
    assert best["feasible"] and best["topology"].startswith("jfet_")
    topology, parts, device, conditions = design_from_record(best)
    flat = {k: float(v[0]) for k, v in parts.items()}
    model = device.spice_model()
    mid = spice_midband(topology.name, flat, model, conditions)
    for key in ("gain", "input_impedance"):
        tolerance, _ = TOLERANCES[key]
        assert abs(best["metrics"][key] / mid[key] - 1) <= tolerance, (key, best["metrics"][key], mid[key])
    i_d = float(topology.operating_point(parts, device, conditions)["ic"][0])
    assert abs(i_d / spice_operating_point(topology.name, flat, model, conditions)["ic"] - 1) <= TOLERANCES["ic"][0]
    assert best["metrics"]["input_impedance"] >= 47e6
