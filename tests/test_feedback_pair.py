"""feedback_pair: the series-shunt feedback pair against ngspice (Debian package) and circuit laws.

ngspice checks on the 8 hand designs of spice_designs.pair_designs (supplies 5-30 V, hFE 60-500,
load capacitances up to 2.2 nF, loop gains 5-65, phase margins 27-95 degrees): closed-loop gain
within 3 %, THD at the spec's level (1 V rms where the design swings it, else 30 % of its clip
level) within 30 %, loop gain within 5 % and phase margin within 10 degrees. ngspice's loop
gain is measured by double injection (a series voltage source and a shunt current source at
r_feedback's end on q1's emitter, after Middlebrook), with the loop closed and biased; the
model's phase margin comes from its two dominant poles. The same checks run on 8 split-supply
designs (+-12 V and +-15 V, NPN and PNP: q1's base at ground through r_bottom alone, loop gains
1.6-42, phase margins 51-128 degrees). Every other metric of the same designs is checked in
tests/test_spice_agreement.py.
"""

from __future__ import annotations

import dataclasses
import math
import shutil
from pathlib import Path

import numpy as np
import pytest

from optimizer import eseries, scoring
from optimizer.candidates import design_from_record
from optimizer.errors import InputError
from optimizer.search import search
from optimizer.spec import load_spec, parse_spec
from optimizer.synthesis import HandRequirements, rounded_designs
from optimizer.topologies import Conditions, get_topology
from spice_designs import check_device, fb_split_designs, pair_designs
from spice_harness import (
    phase_margin_of,
    spice_loop_gain,
    spice_midband,
    spice_operating_point,
    spice_swing,
    spice_thd,
)

TOPOLOGY = get_topology("feedback_pair")
DESIGNS = pair_designs()
# the pair on split supplies (+-12 V, +-15 V; NPN and PNP), by its own split hand rule
SPLIT_DESIGNS = [d for d in fb_split_designs() if d.topology == "feedback_pair"]
SPEC_LEVEL_VPP = 2.0 * math.sqrt(2.0)  # 1 V rms at the load
needs_spice = pytest.mark.skipif(
    shutil.which("ngspice") is None, reason="ngspice not installed: apt-get install ngspice"
)


def _arrays(parts: dict[str, float]) -> dict[str, np.ndarray]:
    return {k: np.array([v]) for k, v in parts.items()}


@needs_spice
@pytest.mark.parametrize("design", DESIGNS + SPLIT_DESIGNS, ids=[d.name for d in DESIGNS + SPLIT_DESIGNS])
def test_gain_thd_loop_gain_and_phase_margin_agree_with_ngspice(design) -> None:
    model = {**design.device.spice_model(), "polarity": design.device.polarity}
    args = ("feedback_pair", design.parts, model, design.conditions)
    nominal = TOPOLOGY.evaluate(_arrays(design.parts), design.device, design.conditions)
    m = {k: float(v[0]) for k, v in nominal.metrics.items()}
    # closed-loop gain, ngspice .ac at mid-band: within 3 %
    simulated_gain = spice_midband(*args)["gain"]
    assert m["gain"] == pytest.approx(simulated_gain, rel=0.03)
    # loop gain and phase margin, ngspice double injection: 5 % and 10 degrees
    f, loop = spice_loop_gain(*args)
    mid = math.sqrt(design.conditions.band[0] * design.conditions.band[1])
    assert m["loop_gain"] == pytest.approx(float(np.interp(np.log(mid), np.log(f), loop.real)), rel=0.05)
    assert abs(m["phase_margin_deg"] - phase_margin_of(f, loop, mid)) <= 10.0
    # THD reduced by the loop, at the spec's 1 V rms where the design swings it (else 30 % of its clip)
    level = SPEC_LEVEL_VPP if m["swing_vpp"] > 2.0 * SPEC_LEVEL_VPP else 0.3 * m["clip_vpp"]
    at_level = dataclasses.replace(design.conditions, signal_vpp=level)
    thd = float(
        TOPOLOGY.evaluate(_arrays(design.parts), design.device, at_level, full=False, thd_solve=True).metrics["thd"][0]
    )
    assert thd == pytest.approx(spice_thd(*args, vpp_out=level), rel=0.30)


@needs_spice
def test_gain_error_is_the_finite_loop_gains() -> None:
    """The closed-loop gain falls short of the ideal (1 + r_feedback/r_emitter, through the input
    divider) by T/(1+T), T from ngspice's double injection: the asymptotic-gain relation
    A = A_ideal*T/(1+T) (feedforward through r_feedback is negligible here), within 1 %."""
    for design in DESIGNS[:3]:
        p = design.parts
        m = TOPOLOGY.evaluate(_arrays(p), design.device, design.conditions).metrics
        z_in, rs = float(m["input_impedance"][0]), design.conditions.source_impedance
        ideal = (1.0 + p["r_feedback"] / p["r_emitter"]) * z_in / (z_in + rs)
        f, loop = spice_loop_gain("feedback_pair", p, design.device.spice_model(), design.conditions)
        t = float(np.interp(np.log(math.sqrt(20.0 * 20000.0)), np.log(f), loop.real))
        assert float(m["gain"][0]) == pytest.approx(ideal * t / (1.0 + t), rel=0.01)


def test_bias_satisfies_kirchhoff_at_the_emitter_and_output_nodes() -> None:
    # KCL by hand: q1's emitter node (r_emitter to ground, r_feedback from collector2) and the
    # output node (r_collector2 from the rail, q2's collector, r_feedback), and KVL round q2's base
    design = DESIGNS[0]
    p, dev = design.parts, design.device
    op = {k: float(v[0]) for k, v in TOPOLOGY.operating_point(_arrays(p), dev, design.conditions).items()}
    i_f = (op["v_collector2"] - op["v_emitter"]) / p["r_feedback"]
    assert op["v_emitter"] / p["r_emitter"] == pytest.approx(op["ic"] + op["ib"] + i_f, rel=1e-9)
    vcc = design.conditions.supply
    assert (vcc - op["v_collector2"]) / p["r_collector2"] == pytest.approx(op["ic2"] + i_f, rel=1e-9)
    assert (vcc - op["v_collector"]) / p["r_collector"] == pytest.approx(op["ic"] + op["ib2"], rel=1e-9)
    assert op["v_collector"] == pytest.approx(op["vbe2"] + dev.RB * op["ib2"] + op["v_emitter2"], abs=1e-6)


# Pairs on 24 V with a strong loop, which a Newton step that took the Early factors from the
# previous step's nodes (linear convergence) left unconverged after 40 steps, so they were
# reported inactive; hFE 80 (invented parts, a scenario of our own)
HARD_PAIRS = [
    {
        "r_top": 30.7e3,
        "r_bottom": 2.51e3,
        "r_collector": 2.78e3,
        "r_emitter": 103.0,
        "r_feedback": 58.5e3,
        "r_collector2": 1.59e3,
        "r_emitter2": 995.0,
        "c_in": 3.54e-6,
        "c_emitter2": 474e-6,
        "c_out": 5.23e-6,
    },
    {
        "r_top": 218e3,
        "r_bottom": 28.2e3,
        "r_collector": 13.3e3,
        "r_emitter": 1.64e3,
        "r_feedback": 26.7e3,
        "r_collector2": 1.14e3,
        "r_emitter2": 1.07e3,
        "c_in": 9.01e-6,
        "c_emitter2": 75.6e-6,
        "c_out": 4.32e-6,
    },
    {
        "r_top": 419e3,
        "r_bottom": 22.4e3,
        "r_collector": 18.2e3,
        "r_emitter": 267.0,
        "r_feedback": 13.5e3,
        "r_collector2": 1.95e3,
        "r_emitter2": 1.41e3,
        "c_in": 0.523e-6,
        "c_emitter2": 14.7e-6,
        "c_out": 55.7e-6,
    },
]


@needs_spice
@pytest.mark.parametrize("parts", HARD_PAIRS, ids=["deep-q1", "q2-near-saturation", "high-loop"])
def test_strong_loop_bias_converges_and_agrees_with_ngspice(parts) -> None:
    device, conditions = check_device(80), Conditions(supply=24.0, source_impedance=600.0, load_impedance=10e3)
    op = {k: float(v[0]) for k, v in TOPOLOGY.operating_point(_arrays(parts), device, conditions).items()}
    assert op["active"]
    simulated = spice_operating_point("feedback_pair", parts, {**device.spice_model(), "polarity": "npn"}, conditions)
    assert op["ic"] == pytest.approx(simulated["ic"], rel=1e-3)
    assert op["ic2"] == pytest.approx(simulated["ic2"], rel=1e-3)
    for node in ("v_base", "v_collector", "v_emitter"):
        assert op[node] == pytest.approx(simulated[node], abs=0.005), node


def test_a_pairs_solve_does_not_depend_on_its_batch() -> None:
    # Newton stops moving an element once its step is below STEP_TOL, and ends when every element
    # has: a design's bias and static solves are the same alone as beside designs that need more steps
    rng = np.random.default_rng(3)
    batch = {k: v * np.exp(rng.uniform(-2.3, 2.3, 400)) for k, v in HARD_PAIRS[2].items()}
    batch = {k: np.concatenate([[v], batch[k]]) for k, v in HARD_PAIRS[0].items()}
    device, conditions = check_device(80), Conditions(supply=24.0, source_impedance=600.0, load_impedance=10e3)
    together = TOPOLOGY.evaluate(batch, device, conditions, full=False)
    alone = TOPOLOGY.evaluate({k: v[:1] for k, v in batch.items()}, device, conditions, full=False)
    for key in ("ic", "ic2", "vbe", "vbe2", "v_collector2"):
        assert alone.operating_point[key][0] == together.operating_point[key][0], key
    for key in ("gain", "swing_vpp", "thd"):
        assert alone.metrics[key][0] == together.metrics[key][0], key


# x12 on 15 V from a 2.2k source into 22k, hFE 400: a pair whose emitter2 bypass sits inside the loop
BYPASS_RESISTORS = {
    "r_top": 470e3,
    "r_bottom": 82e3,
    "r_collector": 18e3,
    "r_emitter": 1.3e3,
    "r_emitter2": 680.0,
    "r_collector2": 2.4e3,
    "r_feedback": 15e3,
}
BYPASS_CONDITIONS = Conditions(supply=15.0, source_impedance=2.2e3, load_impedance=22e3, band=(25.0, 25e3))


@needs_spice
def test_the_emitter2_bypass_is_sized_to_be_a_short_at_the_band_centre() -> None:
    # Inside the loop, leaving emitter2 unbypassed costs the closed-loop gain less than 3 dB, so
    # the bypass has no -3 dB corner of its own and the low corner alone sized it at the smallest
    # value (10 pF): the model, which takes it as a short at mid-band, then read +11.85 where
    # ngspice gives +9.09. The sizing now keeps each capacitor's cost at the band's centre within
    # MIDBAND_LOSS / 3, and the mid-band gain agrees with ngspice (15 V, 2.2k source, 22k load)
    from optimizer.sizing import MIDBAND_LOSS, size_capacitors

    resistors, device, conditions = BYPASS_RESISTORS, check_device(400), BYPASS_CONDITIONS
    allowed = np.array(sorted(v for v in eseries.series_values("E6", 1e-11, 1e-2)))
    caps = size_capacitors(TOPOLOGY, _arrays(resistors), device, conditions, allowed)
    parts = {**resistors, **{c: float(v[0]) for c, v in caps.items()}}
    assert parts["c_emitter2"] > 1e-6
    model = float(TOPOLOGY.evaluate(_arrays(parts), device, conditions).metrics["gain"][0])
    simulated = spice_midband("feedback_pair", parts, {**device.spice_model(), "polarity": "npn"}, conditions)
    assert model == pytest.approx(simulated["gain"], rel=MIDBAND_LOSS)


@needs_spice
def test_a_given_bypass_too_small_for_the_midband_figures_misses_the_midband_limit() -> None:
    # The same stage with c_emitter2 given at 10 pF (as `stagefit evaluate --set` or a search over
    # capacitor values may give it): the mid-band figures still take it as a short, so the design
    # says how far the gain at the band's centre is from them, and that agrees with ngspice there;
    # past MIDBAND_DEVIATION_MAX it misses the "midband" limit. The sized bypass does not.
    resistors, device, conditions = BYPASS_RESISTORS, check_device(400), BYPASS_CONDITIONS
    spec = parse_spec(
        {
            "name": "midband",
            "supply": "15 V",
            "gain": {"target": 12, "tolerance": "3 dB"},
            "source_impedance": "2.2k",
            "load_impedance": "22k",
            "band": ["25 Hz", "25 kHz"],
        }
    )
    deviation = {}
    for c_emitter2 in (10e-12, 100e-6):
        parts = {**resistors, "c_in": 1e-6, "c_out": 10e-6, "c_emitter2": c_emitter2}
        result = TOPOLOGY.evaluate(_arrays(parts), device, conditions, full=True)
        m = {k: np.asarray(v) for k, v in result.metrics.items()}
        simulated = spice_midband("feedback_pair", parts, {**device.spice_model(), "polarity": "npn"}, conditions)
        deviation[c_emitter2] = float(m["midband_deviation"][0])
        assert deviation[c_emitter2] == pytest.approx(abs(abs(simulated["gain"] / m["gain"][0]) - 1.0), abs=1e-3)
        violations = scoring.limit_violations(spec, m, result.ratings, {}, result.operating_point["active"])
        assert (violations["midband"][0] > 0) == (deviation[c_emitter2] > scoring.MIDBAND_DEVIATION_MAX)
    assert deviation[10e-12] > 0.1  # ngspice: +9.09 against +11.85 at mid-band
    assert deviation[100e-6] < 1e-3


@needs_spice
@pytest.mark.parametrize(
    "resistors, vce1",
    [
        (
            {
                "r_bottom": 24e3,
                "r_collector": 4.7e3,
                "r_emitter": 3.6e3,
                "r_emitter2": 4.7e3,
                "r_collector2": 2.7e3,
                "r_feedback": 13e3,
            },
            0.49,
        ),
        (
            {
                "r_bottom": 16e3,
                "r_collector": 4.7e3,
                "r_emitter": 3.9e3,
                "r_emitter2": 4.3e3,
                "r_collector2": 2.2e3,
                "r_feedback": 15e3,
            },
            1.31,
        ),
    ],
    ids=["q1-at-0.49-V", "q1-at-1.31-V"],
)
def test_the_swing_follows_q1_into_saturation(resistors, vce1) -> None:
    # On +-15 V (the bundled catalog's PNP, a +4 insert return into 10k: a scenario of our own) q1's
    # emitter follows the fed-back output, so a large swing takes q1's collector down to its emitter:
    # q1's base-collector junction then carries it into saturation, the loop breaks and the output
    # folds back. With forward-active junctions alone these read 11.6 and 11.9 V p-p against
    # ngspice's 2.77 and 9.96; with the swing ended where Vce1 < 0, 3.02 and 10.51; now 2.771 and
    # 9.960 (ngspice 2.771, 9.959)
    spec = parse_spec(
        {
            "name": "insert_return",
            "supply": "+-15 V",
            "gain": {"target": 4, "tolerance": "1 dB"},
            "source_impedance": 600,
            "load_impedance": "10k",
            "band": ["20 Hz", "40 kHz"],
            "devices": ["SF-P1"],
        }
    )
    from optimizer.search import SearchSpace

    device = SearchSpace.build(spec).devices["SF-P1"]
    conditions = scoring.conditions_from_spec(spec)
    parts = {**resistors, "c_in": 1.5e-6, "c_emitter2": 47e-6, "c_out": 2.2e-6}
    result = TOPOLOGY.evaluate(_arrays(parts), device, conditions)
    assert float(result.operating_point["vce"][0]) == pytest.approx(vce1, abs=0.01)
    simulated = spice_swing("feedback_pair", parts, {**device.spice_model(), "polarity": "pnp"}, conditions)
    assert float(result.metrics["swing_vpp"][0]) == pytest.approx(simulated, rel=0.01)


@needs_spice
@pytest.mark.parametrize(
    "resistors, simulated",
    [
        (
            {
                "r_top": 168.6e3,
                "r_bottom": 136.9e3,
                "r_collector": 16.2e3,
                "r_emitter": 7176.0,
                "r_emitter2": 4085.0,
                "r_collector2": 2039.0,
                "r_feedback": 22.21e3,
            },
            2.648,
        ),
        (
            {
                "r_top": 186.2e3,
                "r_bottom": 212.6e3,
                "r_collector": 8096.0,
                "r_emitter": 6296.0,
                "r_emitter2": 4544.0,
                "r_collector2": 4497.0,
                "r_feedback": 17.1e3,
            },
            1.400,
        ),
    ],
)
def test_the_swing_where_q1_sits_near_saturation_agrees_with_ngspice(resistors, simulated) -> None:
    # Two of 3,000 random pairs on 12 V (600 ohm source, 47k load) whose q1 sits at 0.50 and 0.35 V
    # Vce: their transfer folds back once q1 saturates, and the swing's false position, three
    # steps then more for the estimates still moving, finds the 10 % point on it. The forward-
    # active solve with three steps read 1.09 and 0.79 V p-p
    parts = {**resistors, "c_in": 1e-6, "c_emitter2": 100e-6, "c_out": 1e-6}
    device = check_device(200)
    conditions = Conditions(supply=12.0, source_impedance=600.0, load_impedance=47e3)
    result = TOPOLOGY.evaluate(_arrays(parts), device, conditions)
    swing = spice_swing("feedback_pair", parts, {**device.spice_model(), "polarity": "npn"}, conditions)
    assert swing == pytest.approx(simulated, rel=0.01)  # the design is the one recorded
    assert float(result.metrics["swing_vpp"][0]) == pytest.approx(swing, rel=0.01)


def test_small_signal_thd_is_the_quasi_static_one_at_low_level() -> None:
    """Second-order perturbation theory is exact as the level goes to zero: the estimate (nonlinear
    collector and base currents and the Early product, through the closed loop) meets the
    quasi-static solve + FFT within 2 % at 50 mV p-p, where higher orders are negligible."""
    for design in DESIGNS:
        low = dataclasses.replace(design.conditions, signal_vpp=0.05)
        estimate = TOPOLOGY.evaluate(_arrays(design.parts), design.device, low, full=False).metrics["thd"]
        solved = TOPOLOGY.thd_quasistatic(_arrays(design.parts), design.device, low, samples=256)
        assert float(estimate[0]) == pytest.approx(float(solved[0]), rel=0.02), design.name


def test_gain_bound_holds_over_random_designs() -> None:
    rng = np.random.default_rng(5)
    base = DESIGNS[0]
    n = 4000
    parts = {
        k: v * np.exp(rng.uniform(-1.0, 1.0, n)) if k.startswith("r_") else np.full(n, v) for k, v in base.parts.items()
    }
    result = TOPOLOGY.evaluate(parts, base.device, base.conditions, full=False)
    ok = result.operating_point["active"].astype(bool)
    bound = TOPOLOGY.gain_bound(parts, base.conditions.load_impedance)
    assert ok.sum() > 500
    assert np.all(np.abs(result.metrics["gain"][ok]) <= bound[ok])


def test_hand_design_rounds_to_an_active_stage_near_its_gain() -> None:
    req = HandRequirements(
        supply=15.0, gain=10.0, load_impedance=47e3, source_impedance=1e3, collector_current=2e-3, hfe=400
    )
    device = check_device(400)
    conditions = Conditions(supply=15.0, source_impedance=1e3, load_impedance=47e3)
    for parts in rounded_designs(TOPOLOGY.hand_design(req), "E24", "E6", limit=4):
        r = TOPOLOGY.evaluate(_arrays(parts), device, conditions, full=False)
        assert bool(r.operating_point["active"][0])
        assert 8.0 < float(r.metrics["gain"][0]) < 10.5  # non-inverting, near 1 + Rf/Re
    with pytest.raises(InputError, match="gain"):
        TOPOLOGY.hand_design(dataclasses.replace(req, gain=1.6))


def test_a_design_below_the_phase_margin_limit_is_infeasible_with_that_reason() -> None:
    design = next(d for d in DESIGNS if "CL1n" in d.name and "A3" in d.name)  # about 27 degrees
    r = TOPOLOGY.evaluate(_arrays(design.parts), design.device, design.conditions, full=False)
    assert float(r.metrics["phase_margin_deg"][0]) < 45.0
    spec = parse_spec(
        {
            "name": "pm",
            "supply": "15 V",
            "gain": {"target": 3, "tolerance": "3 dB"},
            "source_impedance": 600,
            "load_impedance": "47k",
            "band": ["20 Hz", "20 kHz"],
        }
    )
    assert spec.limits.phase_margin_min_deg == 45.0  # default, common practice
    v = scoring.limit_violations(spec, r.metrics, r.ratings, {}, r.operating_point["active"], core_only=True)
    assert v["phase_margin_min_deg"][0] > 0 and scoring.binding_limit(v)[0] == "phase_margin_min_deg"
    # a stage without an overall loop reports no phase margin, and the limit does not judge it
    other = get_topology("divider_ce").evaluate(
        {
            "r_top": np.array([68e3]),
            "r_bottom": np.array([10e3]),
            "r_collector": np.array([10e3]),
            "r_emitter": np.array([1e3]),
            "c_in": np.array([1e-6]),
            "c_out": np.array([1e-6]),
        },
        design.device,
        design.conditions,
        full=False,
    )
    assert np.isnan(other.metrics["phase_margin_deg"][0])
    v = scoring.limit_violations(
        spec, other.metrics, other.ratings, {}, other.operating_point["active"], core_only=True
    )
    assert v["phase_margin_min_deg"][0] == 0.0


@needs_spice
@pytest.mark.parametrize("name", ["synth_line_boost", "split_rail_send_amp"])
def test_search_on_a_non_inverting_example_spec_ranks_a_feasible_pair_that_ngspice_confirms(name: str) -> None:
    """specs/synth_line_boost.yaml (+10, THD < 0.05 % at 1 V rms on 24 V) and
    specs/split_rail_send_amp.yaml (+6 on +-12 V, THD < 0.3 % at 1 V rms) over every topology:
    rank 1 is a feasible feedback_pair (the one-loop stages all invert; on the split supply its
    base at ground, r_top left out); ngspice (the netlist with its true rails) agrees on its bias
    (3 %), gain (3 %), its THD at the spec's 1 V rms (30 %, and under the limit) and its phase
    margin (10 degrees)."""
    spec = load_spec(Path(__file__).resolve().parent.parent / "specs" / f"{name}.yaml")
    best = search(spec, trials=800, seed=11, top=1).candidates[0]
    assert best["topology"] == "feedback_pair" and best["feasible"], best.get("violations")
    _, parts, device, conditions = design_from_record(best)
    if spec.supply_arrangement == "split":
        assert "r_top" not in parts and 0 < conditions.below_ground < 1
    values = {role: float(v[0]) for role, v in parts.items()}
    args = ("feedback_pair", values, {**device.spice_model(), "polarity": device.polarity}, conditions)
    metrics = best["metrics"]
    assert best["operating_point"]["ic"] == pytest.approx(spice_operating_point(*args)["ic"], rel=0.03)
    assert metrics["gain"] == pytest.approx(spice_midband(*args)["gain"], rel=0.03)
    simulated_thd = spice_thd(*args, vpp_out=spec.limits.thd_level)
    assert metrics["thd"] == pytest.approx(simulated_thd, rel=0.30) and simulated_thd < spec.limits.thd_max
    f, loop = spice_loop_gain(*args)
    mid = math.sqrt(spec.band[0] * spec.band[1])
    assert abs(metrics["phase_margin_deg"] - phase_margin_of(f, loop, mid)) <= 10.0


def test_split_hand_seeds_are_feasible_and_the_oracle_leaves_r_top_out() -> None:
    """On specs/split_rail_send_amp.yaml (+6 on +-12 V) the pair's seeds come from its own split
    rule (no r_top; q1's emitter near -Vbe in true volts) and a rounded hand design already
    meets the spec's limits at nominal; the exhaustive oracle of a split space enumerates the six
    resistors the design chooses (r_top left out), 4^6 combinations on E3 4.7k..47k."""
    from optimizer.exhaustive import exhaustive
    from optimizer.search import SearchSpace, evaluate_designs

    spec = load_spec(Path(__file__).resolve().parent.parent / "specs" / "split_rail_send_amp.yaml")
    space = SearchSpace.build(spec)
    assert space.resistor_roles("feedback_pair") == TOPOLOGY.resistors[1:]
    seeds = [d for d in space.seeds() if d.topology == "feedback_pair"]
    assert seeds and all("r_top" not in dict(d.parts) for d in seeds)
    records = evaluate_designs(space, seeds)
    # every limit met at nominal (the Monte Carlo builds' yield aside: where hFE and the tolerances
    # take q1's collector below its emitter over the swing, some builds fall short of swing_min,
    # as ngspice confirms on such builds)
    assert any(not set(r["violations"]) - {"yield"} for r in records), [r["violations"] for r in records][:3]
    hand = space.hand_parts("feedback_pair", "SF-N2")
    assert hand is not None and "r_top" not in hand
    device = space.devices["SF-N2"]
    conditions = scoring.conditions_from_spec(spec)
    op = TOPOLOGY.operating_point(_arrays(hand), device, conditions)
    # q1's emitter at -Vbe less the base current's drop across r_bottom (half of Vbe by the rule)
    assert -1.1 < float(op["v_emitter"][0]) < -0.6 and bool(op["active"][0])

    small = parse_spec(
        {
            **{k: v for k, v in spec.model_dump().items() if k in ("name", "gain", "band", "limits", "devices")},
            "supply": "+-12 V",
            "source_impedance": 600,
            "load_impedance": "47k",
            "topologies": ["feedback_pair"],
            "devices": ["SF-N2"],
            "parts": {"resistor_series": "E3", "resistor_range": ["4.7k", "47k"]},
            "robustness": "nominal",
        }
    )
    oracle = exhaustive(small)
    assert oracle.combinations == 4**6 and "r_top" not in oracle.best["parts"]


@pytest.mark.parametrize("name", ["feedback_pair", "feedback_pair_ac"])
def test_the_usable_swing_is_that_of_the_converged_transfer(name: str, monkeypatch: pytest.MonkeyPatch) -> None:
    """The static transfer's solves (each drive warm-started from the last call's nearest drive,
    at most STATIC_ITERATIONS steps) give the usable swing that solves run to convergence give
    (200 steps each), on random designs within x0.5..x2 of the hand design (12 V, 5 V/V, 1 mA,
    600 ohm into 47 kohm). With 12 steps from the quiescent point some large drives were left
    unsettled and counted as deviating: pair_ac swings up to 4 % low on 0.5 % of such designs."""
    from optimizer.topologies import feedback_pair

    stage = get_topology(name)
    hand = stage.hand_design(
        HandRequirements(
            supply=12.0, gain=5.0, load_impedance=47e3, source_impedance=600.0, f_low=20.0, collector_current=1e-3
        )
    )
    rng = np.random.default_rng(7)
    parts = {
        role: hand.get(role, 0.0) * np.exp(rng.uniform(np.log(0.5), np.log(2.0), 3000))
        for role in stage.resistors + stage.capacitors
    }
    device = check_device(200.0)
    conditions = Conditions(supply=12.0, source_impedance=600.0, load_impedance=47e3)
    swing = stage.evaluate(parts, device, conditions, full=False).metrics["swing_vpp"]
    solve_pair = feedback_pair.solve_pair
    monkeypatch.setattr(
        feedback_pair, "solve_pair", lambda *args, **kwargs: solve_pair(*args, **{**kwargs, "iterations": 200})
    )
    converged = stage.evaluate(parts, device, conditions, full=False).metrics["swing_vpp"]
    assert np.count_nonzero(converged > 0) > 1000
    np.testing.assert_allclose(swing, converged, rtol=1e-6, atol=1e-9)
