"""Capacitor sizing (joint, not one corner each), worst case and Monte Carlo yield,
and the hand method used as seeds and baseline."""

from __future__ import annotations

import shutil

import numpy as np
import pytest

from check_devices import check_npn
from optimizer import eseries
from optimizer.sizing import _LowCorner, size_capacitors
from optimizer.synthesis import HandRequirements, rounded_designs
from optimizer.tolerance import monte_carlo_yield, worst_case
from optimizer.topologies import get_topology
from optimizer.topologies.base import Conditions, _source_resistance, frame_conditions

DEVICE = check_npn("t-npn", vceo_max=45)
# The common-practice 9 V stage: 75k/10k divider, Rc 10k, Re 1k unbypassed.
STAGE = {
    "r_top": np.array([75e3]),
    "r_bottom": np.array([10e3]),
    "r_collector": np.array([10e3]),
    "r_emitter": np.array([1e3]),
}
CONDITIONS = Conditions(supply=9.0, source_impedance=600.0, load_impedance=100e3, band=(20.0, 20e3))
E6_CAPS = eseries.series_values("E6", 1e-9, 1e-3)


def _f_low(parts: dict[str, np.ndarray]) -> np.ndarray:
    return get_topology("divider_ce").evaluate(parts, DEVICE, CONDITIONS, full=True).metrics["f_low"]


def test_joint_sizing_meets_the_corner_that_one_corner_each_misses() -> None:
    topology = get_topology("divider_ce")
    sized = size_capacitors(topology, STAGE, DEVICE, CONDITIONS, E6_CAPS)
    assert _f_low({**STAGE, **sized})[0] <= 20.0
    # Textbook: each capacitor alone at 20 Hz with the resistance it sees (common practice);
    # the stacked corners then land near 20 * 1.55 = 31 Hz, missing the band.
    z_in, r_out = 8.5e3 + 600.0, 10e3 + 100e3
    alone = {"c_in": np.array([1 / (2 * np.pi * 20 * z_in)]), "c_out": np.array([1 / (2 * np.pi * 20 * r_out)])}
    assert _f_low({**STAGE, **alone})[0] > 28.0
    # Minimal: no capacitor can go one E6 value lower and still meet the corner.
    for cap in topology.capacitors:
        index = np.searchsorted(E6_CAPS, sized[cap][0] * (1 - 1e-9))
        if index > 0:
            lower = {**sized, cap: np.array([E6_CAPS[index - 1]])}
            assert _f_low({**STAGE, **lower})[0] > 20.0


def test_sizing_is_vectorised_over_candidates() -> None:
    topology = get_topology("divider_ce")
    many = {role: np.repeat(v, 3) * np.array([1.0, 1.5, 2.0]) for role, v in STAGE.items()}
    together = size_capacitors(topology, many, DEVICE, CONDITIONS, E6_CAPS)
    for k in range(3):
        one = size_capacitors(topology, {r: v[k : k + 1] for r, v in many.items()}, DEVICE, CONDITIONS, E6_CAPS)
        for cap in topology.capacitors:
            assert together[cap][k] == one[cap][0]


@pytest.mark.parametrize("name", ["divider_ce", "emitter_follower", "bootstrap_follower"])
def test_sizing_low_corner_matches_the_full_evaluation(name: str) -> None:
    # The sizing solves each candidate's bias once and reuses it for every capacitor variant
    # (and takes the low crossing alone): the f_low of evaluate(full=True) on the same parts.
    topology = get_topology(name)
    rng = np.random.default_rng(5)
    hand = topology.hand_design(
        HandRequirements(
            supply=9.0,
            gain=1.0 if "follower" in name else 5.0,
            load_impedance=100e3,
            source_impedance=600.0,
            f_low=20.0,
            collector_current=1e-3,
        )
    )
    resistors = {r: hand[r] * rng.uniform(0.7, 1.4, 4) for r in topology.resistors}
    rows = np.array([0, 1, 2, 3, 3, 1, 0, 2, 2])
    caps = {c: rng.choice(E6_CAPS[(E6_CAPS > 1e-8) & (E6_CAPS < 1e-4)], rows.size) for c in topology.capacitors}
    sized = _LowCorner(topology, {**resistors, **{c: 1.0 for c in caps}}, DEVICE, CONDITIONS)(rows, caps)
    full = topology.evaluate({**{r: v[rows] for r, v in resistors.items()}, **caps}, DEVICE, CONDITIONS)
    np.testing.assert_allclose(sized, full.metrics["f_low"], rtol=1e-12)
    assert np.all((sized > 0.1) & (sized < 1e8))  # crossings found inside the sweep, not its ends


def _parts_with_caps() -> dict[str, np.ndarray]:
    return {**STAGE, "c_in": np.array([10e-6]), "c_out": np.array([10e-6])}


def test_worst_case_brackets_the_nominal_design() -> None:
    topology = get_topology("divider_ce")
    parts = _parts_with_caps()
    nominal = topology.evaluate(parts, DEVICE, CONDITIONS).metrics
    spread = worst_case(topology, parts, DEVICE, CONDITIONS, {r: 0.05 for r in parts}, (0.0, 50.0))
    for metric in ("gain", "supply_current", "swing_vpp", "input_impedance"):
        low, high = spread[metric]
        assert low[0] <= nominal[metric][0] <= high[0]
        assert high[0] > low[0]
    # A 5 % divider and hFE 100..300 move the collector current by well over 5 % (common practice).
    low, high = spread["supply_current"]
    assert high[0] / low[0] > 1.1


def test_yield_is_seeded_and_responds_to_the_limit() -> None:
    topology = get_topology("divider_ce")
    parts = {role: np.repeat(v, 2) for role, v in _parts_with_caps().items()}
    tolerances = {r: 0.05 for r in parts}
    nominal_gain = abs(topology.evaluate(parts, DEVICE, CONDITIONS).metrics["gain"][0])

    def within(fraction: float):
        return lambda m, rows: np.abs(np.abs(m["gain"]) / nominal_gain - 1) <= fraction

    loose = monte_carlo_yield(topology, parts, DEVICE, CONDITIONS, tolerances, (0, 50), within(0.5), 400, seed=3)
    tight = monte_carlo_yield(topology, parts, DEVICE, CONDITIONS, tolerances, (0, 50), within(0.01), 400, seed=3)
    again = monte_carlo_yield(topology, parts, DEVICE, CONDITIONS, tolerances, (0, 50), within(0.01), 400, seed=3)
    assert loose[0] == 1.0 and 0.0 < tight[0] < 0.6
    np.testing.assert_array_equal(tight, again)


@pytest.mark.parametrize("topology", ["divider_ce", "divider_ce_split", "feedback_ce", "ce_follower"])
def test_hand_design_rounds_to_the_series(topology: str) -> None:
    req = HandRequirements(supply=12.0, gain=10.0, load_impedance=47e3, source_impedance=600.0)
    parts = get_topology(topology).hand_design(req)
    model = get_topology(topology)
    assert set(parts) == set(model.resistors) | set(model.capacitors)
    designs = rounded_designs(parts, "E24", "E6")
    assert 1 < len(designs) <= 16
    for design in designs:
        for role, value in design.items():
            series = "E6" if role.startswith("c_") else "E24"
            assert eseries.nearest(series, value) == value


def _one_design_per_topology() -> list:
    """One ngspice check design of each topology the check sets cover (tests/spice_designs.py)."""
    import spice_designs

    sets = (
        spice_designs.check_designs,
        spice_designs.pair_designs,
        spice_designs.jfet_check_designs,
        spice_designs.follower_designs,
    )
    return list({d.topology: d for make in sets for d in make()}.values())


@pytest.mark.parametrize("design", _one_design_per_topology(), ids=lambda d: d.topology)
def test_the_sizing_solves_the_midband_gain_once_only_where_the_capacitors_leave_it_alone(design, monkeypatch) -> None:
    # _LowCorner takes each candidate's mid-band gain from one solve for every capacitor variant
    # where Topology.core_is_bound says the mid-band figures do not see the capacitors: there the
    # gain is the same at any capacitor values, and the f_low of the variants is the plain path's
    # (the gain solved per variant; to rounding: a network's mid-band solve runs on other batch sizes)
    topology = get_topology(design.topology)
    sized = [c for c in topology.capacitors if design.parts[c] > 0]
    scales = np.array([0.01, 1.0, 100.0])
    varied = {k: v * scales if k in sized else np.full(3, v) for k, v in design.parts.items()}
    frame = frame_conditions(design.conditions, design.device)
    p, b, _, _ = topology._checked_solve(varied, design.device, design.conditions, None)
    with np.errstate(all="ignore"):
        gain = topology._midband(p, frame, b, _source_resistance(b, frame))["gain"]
    if topology.core_is_bound:
        assert np.all(gain == gain[1])

    def f_low() -> np.ndarray:
        held = {k: v for k, v in design.parts.items() if k not in sized}
        low = _LowCorner(topology, {**held, **{c: 1.0 for c in sized}}, design.device, design.conditions)
        return low(np.zeros(3, dtype=int), {c: varied[c] for c in sized})

    once = f_low()
    monkeypatch.setattr(type(topology), "core_is_bound", False)
    np.testing.assert_allclose(once, f_low(), rtol=1e-12)


@pytest.mark.parametrize("design", _one_design_per_topology(), ids=lambda d: d.topology)
def test_the_sizing_reads_whether_a_variant_meets_the_target_from_the_response_there(design) -> None:
    # The common factors and the step-downs only ask whether f_low <= target: _LowCorner.meets
    # answers from the response at the target frequency alone. It must give the answer of the
    # crossing's search (evaluate(full=True)'s f_low) wherever that f_low is not within the
    # search's tolerance of the target; the capacitors scaled together over 400x span the target.
    topology = get_topology(design.topology)
    sized = [c for c in topology.capacitors if design.parts[c] > 0]
    scales = np.geomspace(0.05, 20.0, 25)
    varied = {k: v * scales if k in sized else np.full(scales.size, v) for k, v in design.parts.items()}
    target = design.conditions.band[0]
    f_low = topology.evaluate(varied, design.device, design.conditions, full=True).metrics["f_low"]
    held = {k: v for k, v in design.parts.items() if k not in sized}
    low = _LowCorner(topology, {**held, **{c: 1.0 for c in sized}}, design.device, design.conditions)
    meets = low.meets(np.zeros(scales.size, dtype=int), {c: varied[c] for c in sized}, target)
    clear = np.abs(np.log10(f_low / target)) > 1e-3
    np.testing.assert_array_equal(meets[clear], (f_low <= target)[clear])
    assert meets.any() and not meets.all()


@pytest.mark.parametrize("design", _one_design_per_topology(), ids=lambda d: d.topology)
def test_the_worst_case_solves_the_swing_once_per_corner_of_the_other_parts(design, monkeypatch) -> None:
    # In a stage whose core does not see its capacitors (core_is_bound), worst_case solves the
    # usable swing on the corners of the resistors alone (the capacitors at their values), not
    # on every capacitor corner too: every figure must be the one the whole enumeration gives
    topology = get_topology(design.topology)
    parts = {k: np.array([v, v * 1.1]) for k, v in design.parts.items()}
    tolerances = {k: 0.2 if k in topology.capacitors else 0.05 for k in parts}

    def spread() -> dict:
        return worst_case(topology, parts, design.device, design.conditions, tolerances, (0.0, 50.0))

    fewer = spread()
    monkeypatch.setattr(type(topology), "core_is_bound", False)
    every = spread()
    assert fewer.keys() == every.keys()
    for key in every:
        for a, b in zip(fewer[key], every[key]):
            np.testing.assert_array_equal(a, b, err_msg=key)
    assert np.all(np.isfinite(fewer["swing_vpp"][0]))


# An emitter follower (hand design: 9 V, 2 mA) driving a 100k load: its own output impedance is
# some tens of ohms, but c_out sized for the low corner alone is some 0.1 uF, a reactance of
# kilohms at the band's centre (632 Hz) that the load sees in series.
FOLLOWER = {"r_top": np.array([33e3]), "r_bottom": np.array([51e3]), "r_follower": np.array([2.2e3])}
ZOUT_LIMIT = 100.0  # ohm
LOW_EDGE = 0.8  # c_out at its low tolerance edge (20 %)


def _z_out(parts: dict[str, np.ndarray]) -> float:
    return float(get_topology("emitter_follower").evaluate(parts, DEVICE, CONDITIONS).metrics["output_impedance"][0])


def test_an_output_impedance_limit_raises_c_out_to_the_least_value_that_keeps_it() -> None:
    topology = get_topology("emitter_follower")
    plain = size_capacitors(topology, FOLLOWER, DEVICE, CONDITIONS, E6_CAPS)
    limited = size_capacitors(
        topology, FOLLOWER, DEVICE, CONDITIONS, E6_CAPS, output_impedance_max=ZOUT_LIMIT, capacitor_low_edge=LOW_EDGE
    )
    assert _z_out({**FOLLOWER, **plain}) > 10 * ZOUT_LIMIT  # the low corner alone: c_out's reactance dominates
    assert limited["c_in"][0] == plain["c_in"][0]  # only c_out moves
    assert _z_out({**FOLLOWER, **limited, "c_out": LOW_EDGE * limited["c_out"]}) <= ZOUT_LIMIT
    lower = E6_CAPS[np.searchsorted(E6_CAPS, limited["c_out"][0] * (1 - 1e-9)) - 1]
    assert _z_out({**FOLLOWER, **limited, "c_out": np.array([LOW_EDGE * lower])}) > ZOUT_LIMIT  # the least that does
    # a limit no capacitor can meet (below the stage's own output impedance): c_out as the corner sizes it
    own = size_capacitors(
        topology, FOLLOWER, DEVICE, CONDITIONS, E6_CAPS, output_impedance_max=1.0, capacitor_low_edge=LOW_EDGE
    )
    assert own["c_out"][0] == plain["c_out"][0]


@pytest.mark.skipif(shutil.which("ngspice") is None, reason="ngspice not installed: apt-get install ngspice")
def test_the_sized_follower_s_output_impedance_holds_in_ngspice() -> None:
    """Reference: ngspice (Debian), a 1 A AC test current into the output node behind c_out at
    the band's centre (tests/spice_harness.spice_midband), with c_out at its low edge."""
    from spice_agreement import TOLERANCES
    from spice_harness import spice_midband

    topology = get_topology("emitter_follower")
    limited = size_capacitors(
        topology, FOLLOWER, DEVICE, CONDITIONS, E6_CAPS, output_impedance_max=ZOUT_LIMIT, capacitor_low_edge=LOW_EDGE
    )
    values = {role: float(v[0]) for role, v in {**FOLLOWER, **limited}.items()}
    values["c_out"] *= LOW_EDGE
    model = {**DEVICE.spice_model(), "polarity": "npn"}
    simulated = spice_midband("emitter_follower", values, model, CONDITIONS)["output_impedance"]
    tolerance, _ = TOLERANCES["output_impedance"]
    assert simulated <= ZOUT_LIMIT * (1 + tolerance)
    assert abs(_z_out({k: np.array([v]) for k, v in values.items()}) / simulated - 1) <= tolerance
