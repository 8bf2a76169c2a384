"""Spread checked in ngspice (Debian package): corners, Monte Carlo builds and the supply range.

The model's figures at a corner (parts at their tolerance edges, hFE at an end of its range,
temperature and supply at an end of theirs) are compared with ngspice simulating the very same
corner values; the model's Monte Carlo yield with ngspice judging the same builds; a design near
its headroom limit must fail at the spec's lowest supply in both. Skipped only where ngspice is
absent.
"""

from __future__ import annotations

import shutil
from dataclasses import replace

import numpy as np
import pytest

from optimizer import scoring
from optimizer.devices import Device, hfe_temperature_factor
from optimizer.spec import parse_spec
from optimizer.tolerance import Builds, bias_spread
from optimizer.topologies import get_topology
from spice_designs import check_designs
from spice_harness import spice_midband, spice_operating_point, spice_swing

pytestmark = pytest.mark.skipif(
    shutil.which("ngspice") is None, reason="ngspice not installed: apt-get install ngspice"
)

TOLERANCE = 0.05  # every resistor and capacitor at +-5 %
CORNER_AGREEMENT = 0.03  # gain and Ic within 3 % of ngspice at each corner (the bound)


def _spread_device(hfe: float) -> Device:
    """The check device with an hFE range of hfe/2 .. 1.5*hfe around its typical value."""
    base = check_designs()[0].device
    return replace(base, id=f"spread-{hfe:g}", hfe_min=hfe / 2, hfe_typ=hfe, hfe_max=1.5 * hfe, BF=hfe)


def _corners(design) -> list[tuple[float, float, float, dict[str, float]]]:
    """Four corners of a design: (hFE, °C, supply V, parts), the low env corner (hFE min, 0 °C,
    -10 % supply) and the high one (hFE max, 50 °C, +10 %), each with the resistors at the
    tolerance edges that raise Ic and at those that lower it (the directed corners of
    tolerance.bias_spread)."""
    topology = get_topology(design.topology)
    device = _spread_device(design.device.BF)
    parts = {k: np.array([v]) for k, v in design.parts.items()}
    nominal = topology.operating_point(parts, device, design.conditions)["ic"][0]
    direction = {}
    for r in topology.resistors:
        if design.parts[r] > 0:
            raised = topology.operating_point({**parts, r: parts[r] * (1 + TOLERANCE)}, device, design.conditions)
            direction[r] = np.sign(raised["ic"][0] - nominal)
    out = []
    supply = design.conditions.supply
    for hfe, temperature, s in ((device.hfe_min, 0.0, 0.9 * supply), (device.hfe_max, 50.0, 1.1 * supply)):
        for sign in (1.0, -1.0):
            values = {k: v * (1 + sign * direction.get(k, 0.0) * TOLERANCE) for k, v in design.parts.items()}
            out.append((hfe * hfe_temperature_factor(temperature), temperature, s, values))
    return out


CORNER_DESIGNS = [d for d in check_designs() if not d.name.endswith("hfe50") and not d.name.endswith("hfe60")][:24]


@pytest.mark.parametrize("design", CORNER_DESIGNS, ids=lambda d: d.name)
def test_corner_figures_agree_with_ngspice(design) -> None:
    """24 designs over all four topologies, 4 corners each: gain and Ic within 3 % (ngspice)."""
    topology = get_topology(design.topology)
    device = _spread_device(design.device.BF)
    off = []
    for hfe, temperature, supply, values in _corners(design):
        conditions = replace(design.conditions, temperature=temperature, supply=supply)
        result = topology.evaluate({k: np.array([v]) for k, v in values.items()}, device, conditions, hfe=hfe)
        if not result.operating_point["active"][0]:
            continue  # a corner where the stage saturates reports no gain; the screen rejects it
        model = {**device.spice_model(), "BF": hfe}
        ic = spice_operating_point(design.topology, values, model, conditions)["ic"]
        gain = spice_midband(design.topology, values, model, conditions)["gain"]
        for name, ours, theirs in (
            ("ic", result.operating_point["ic"][0], ic),
            ("gain", result.metrics["gain"][0], gain),
        ):
            if abs(ours - theirs) > CORNER_AGREEMENT * abs(theirs):
                off.append((name, temperature, supply, hfe, ours, theirs))
    assert not off, f"{design.name}: model vs ngspice at corners {off}"


def test_bias_spread_brackets_the_simulated_corners() -> None:
    """bias_spread's Ic range contains every corner ngspice simulates (and reaches its ends)."""
    design = check_designs()[0]
    topology = get_topology(design.topology)
    device = _spread_device(design.device.BF)
    parts = {k: np.array([v]) for k, v in design.parts.items()}
    supply = design.conditions.supply
    spread = bias_spread(
        topology,
        parts,
        device,
        design.conditions,
        {k: TOLERANCE for k in parts},
        (0.0, 50.0),
        (0.9 * supply, 1.1 * supply),
    )
    simulated = [
        spice_operating_point(
            design.topology,
            values,
            {**device.spice_model(), "BF": hfe},
            replace(design.conditions, temperature=t, supply=s),
        )["ic"]
        for hfe, t, s, values in _corners(design)
    ]
    assert spread["ic_low"][0] <= min(simulated) * (1 + 1e-3)
    assert spread["ic_high"][0] >= max(simulated) * (1 - 1e-3)
    assert spread["ic_spread"][0] == pytest.approx(max(simulated) / min(simulated), rel=0.03)


def _mc_spec(design, gain_tolerance_db: float, zin_min: float) -> object:
    c = design.conditions
    return parse_spec(
        {
            "name": "mc check",
            "supply": {"nominal": c.supply, "min": 0.95 * c.supply, "max": 1.05 * c.supply},
            "gain": {"target": design.hand_gain * 0.9, "tolerance_db": gain_tolerance_db},
            "source_impedance": c.source_impedance,
            "load_impedance": c.load_impedance,
            "band": list(c.band),
            "limits": {"input_impedance_min": zin_min},
        }
    )


@pytest.mark.parametrize("index", [0, 19])
def test_monte_carlo_yield_agrees_with_ngspice(index: int) -> None:
    """100 builds judged by the model and by ngspice on the limits one operating point and one
    mid-band AC run measure (gain window, input impedance, supply current, active): the two
    yields lie within 7 points."""
    design = check_designs()[index]
    topology = get_topology(design.topology)
    device = _spread_device(design.device.BF)
    conditions = design.conditions
    nominal = topology.evaluate({k: np.array([v]) for k, v in design.parts.items()}, device, conditions)
    spec = _mc_spec(design, 0.6, 0.93 * float(nominal.metrics["input_impedance"][0]))
    target = abs(float(nominal.metrics["gain"][0]))
    spec = spec.model_copy(update={"gain": spec.gain.model_copy(update={"target": target})})
    builds = Builds.draw(
        100, seed=5, temperature_range=tuple(spec.temperature), supply_range=(spec.supply_min, spec.supply_max)
    )
    hfe = builds.hfe(device)
    ours = theirs = 0
    for k in range(builds.samples):
        values = {role: v * (1 + TOLERANCE * builds.part_position(role)[k]) for role, v in design.parts.items()}
        at = replace(conditions, temperature=float(builds.temperature[k]), supply=float(builds.supply[k]))
        result = topology.evaluate({r: np.array([v]) for r, v in values.items()}, device, at, hfe=hfe[k])
        metrics = {m: np.asarray(v) for m, v in result.metrics.items()}
        v = scoring.limit_violations(
            spec, metrics, result.ratings, {}, result.operating_point["active"], core_only=True
        )
        ours += int(scoring.total_violation(v)[0] == 0)
        model = {**device.spice_model(), "BF": float(hfe[k])}
        op = spice_operating_point(design.topology, values, model, at)
        mid = spice_midband(design.topology, values, model, at)
        simulated = {
            **metrics,  # each (1,): the model's, where ngspice does not replace it
            "gain": np.array([mid["gain"]]),
            "input_impedance": np.array([mid["input_impedance"]]),
            "supply_current": np.array([op["supply_current"]]),
        }
        vs = scoring.limit_violations(
            spec, simulated, result.ratings, {}, result.operating_point["active"], core_only=True
        )
        theirs += int(scoring.total_violation(vs)[0] == 0)
    assert 0 < ours < builds.samples or 0 < theirs < builds.samples, "the limits should make the yield partial"
    assert abs(ours - theirs) <= 7, f"model yield {ours} % vs ngspice {theirs} % of 100 builds"


def test_a_design_near_its_headroom_fails_at_the_lowest_supply() -> None:
    """The clip level shrinks with the supply: a swing limit just under the nominal figure is met
    at the nominal supply and missed at supply.min, in the model and in ngspice alike."""
    design = next(d for d in check_designs() if d.topology == "divider_ce" and d.conditions.supply == 9.0)
    topology = get_topology(design.topology)
    parts = {k: np.array([v]) for k, v in design.parts.items()}
    low = replace(design.conditions, supply=0.85 * design.conditions.supply)

    def clip(conditions) -> tuple[float, float]:
        metrics = topology.evaluate(parts, design.device, conditions).metrics
        ours = float(metrics["clip_vpp"][0] if "clip_vpp" in metrics else metrics["swing_vpp"][0])
        return ours, spice_swing(design.topology, design.parts, design.device.spice_model(), conditions)

    nominal_model, nominal_spice = clip(design.conditions)
    low_model, low_spice = clip(low)
    limit = 0.97 * min(nominal_model, nominal_spice)
    assert nominal_model >= limit and nominal_spice >= limit
    assert low_model < limit and low_spice < limit, (low_model, low_spice, limit)


@pytest.mark.parametrize("name", ["bench_stock_preamp", "battery_sensor_3v3"])
def test_rank_one_yield_agrees_with_ngspice_monte_carlo(name: str) -> None:
    """The rank-1 design of a seeded search, 100 builds (the spec's own tolerances, hFE range,
    temperature and supply ranges; tolerance.Builds) judged by the model and by ngspice on the
    limits an operating point and a mid-band AC run measure (gain window, input and output
    impedance, supply current): the two yields lie within 7 points of each other."""
    from pathlib import Path

    from optimizer.candidates import design_from_record
    from optimizer.catalog import load_catalog
    from optimizer.search import search
    from optimizer.spec import load_spec

    spec = load_spec(Path(__file__).resolve().parent.parent / "specs" / f"{name}.yaml")
    best = search(spec, trials=400, seed=3, top=1).candidates[0]
    topology, parts, device, conditions = design_from_record(best)
    catalog = load_catalog(spec.parts.catalog)
    tolerance = {
        role: float(catalog.part_for("capacitor" if role.startswith("c_") else "resistor", float(v[0]))["tolerance"])
        for role, v in parts.items()
        if v[0] > 0
    }
    measured = {
        k: v
        for k, v in spec.limits.model_dump().items()
        if k in ("input_impedance_min", "output_impedance_max", "supply_current_max")
    }
    judged = spec.model_copy(
        update={
            "limits": spec.limits.model_copy(
                update={
                    k: (v if k in measured else None)
                    for k, v in spec.limits.model_dump().items()
                    if k not in ("yield_min", "thd_level")
                }
            )
        }
    )
    builds = Builds.draw(
        100, seed=9, temperature_range=tuple(spec.temperature), supply_range=(spec.supply_min, spec.supply_max)
    )
    hfe = builds.hfe(device)
    ours = theirs = 0
    for k in range(builds.samples):
        values = {
            role: float(v[0]) * (1 + tolerance.get(role, 0.0) * builds.part_position(role)[k])
            for role, v in parts.items()
        }
        at = replace(conditions, temperature=float(builds.temperature[k]), supply=float(builds.supply[k]))
        result = topology.evaluate({r: np.array([v]) for r, v in values.items()}, device, at, hfe=hfe[k])
        metrics = {m: np.asarray(v) for m, v in result.metrics.items()}
        ok = (
            scoring.total_violation(
                scoring.limit_violations(
                    judged, metrics, result.ratings, {}, result.operating_point["active"], core_only=True
                )
            )[0]
            == 0
        )
        ours += int(ok)
        model = {**device.spice_model(), "BF": float(hfe[k])}
        spice_values = {r: v for r, v in values.items() if v > 0}
        op = spice_operating_point(topology.name, spice_values, model, at)
        mid = spice_midband(topology.name, spice_values, model, at)
        simulated = {
            **metrics,
            "gain": np.array([mid["gain"]]),
            "input_impedance": np.array([mid["input_impedance"]]),
            "output_impedance": np.array([mid["output_impedance"]]),
            "supply_current": np.array([op["supply_current"]]),
        }
        theirs += int(
            scoring.total_violation(
                scoring.limit_violations(
                    judged, simulated, result.ratings, {}, result.operating_point["active"], core_only=True
                )
            )[0]
            == 0
        )
    assert abs(ours - theirs) <= 7, f"{name}: model yield {ours} % vs ngspice {theirs} % of 100 builds"
