"""Analytic stage models: bias, mid-band, corners, swing, noise, distortion, vectorisation.

Each check names what it is checked against, beside it.
"""

from __future__ import annotations

import dataclasses
import math
import re
import shutil
import subprocess

import numpy as np
import pytest

from check_devices import check_npn
from optimizer import physics
from optimizer.devices import Device, hfe_temperature_factor, saturation_current, thermal_voltage
from optimizer.errors import InputError
from optimizer.topologies import TOPOLOGIES, Conditions, get_topology
from spice_designs import check_designs, follower_designs, jfet_check_designs, pair_ac_designs, pair_designs

DEVICE = check_npn("npn-bench-a")
NINE_VOLT = dict(r_top=75e3, r_bottom=10e3, r_collector=10e3, r_emitter=1e3, c_in=10e-6, c_out=10e-6)
DESIGNS = {
    "divider_ce": NINE_VOLT,
    "divider_ce_split": dict(
        r_top=47e3,
        r_bottom=10e3,
        r_collector=4.7e3,
        r_emitter=220,
        r_emitter_dc=820,
        c_in=2.2e-6,
        c_out=2.2e-6,
        c_emitter=47e-6,
    ),
    "feedback_ce": dict(r_feedback=220e3, r_collector=4.7e3, r_emitter=470, c_in=1e-6, c_out=1e-6),
    "ce_follower": dict(
        r_top=68e3, r_bottom=10e3, r_collector=10e3, r_emitter=1e3, r_follower=2.2e3, c_in=1e-6, c_out=10e-6
    ),
}


def one(result, key):
    return float(result.metrics[key][0])


def test_nine_volt_stage_common_practice():
    c = Conditions(supply=9.0, source_impedance=0.0, load_impedance=100e3)
    r = get_topology("divider_ce").evaluate(NINE_VOLT, DEVICE, c)
    op = r.operating_point
    assert 0.38e-3 < op["ic"][0] < 0.43e-3  # common practice: Ic near 0.4 mA
    assert 4.3 < op["vce"][0] < 4.7  # common practice: Vce near 4.5 V
    assert op["active"][0]
    # common practice: Rt||Rb = 8.8k shunted by ~(hFE+1)*Re; 8.5-8.8k at hFE ~200-250
    assert 8.3e3 < one(r, "input_impedance") < 8.8e3
    assert 8.4 < -one(r, "gain") < 8.9  # common practice: 8.4-8.9 into 100k, not the hand estimate Rc/Re = 10
    unloaded = get_topology("divider_ce").evaluate(NINE_VOLT, DEVICE, Conditions(9.0, 0.0, math.inf))
    assert 7.4 < one(unloaded, "clip_vpp") < 8.2  # common practice: clips near 8 Vpp unloaded


def test_degenerated_bias_point_against_an_independent_solve():
    # Our own numbers: Vcc 15 V, 47k/8.2k divider, Rc 6.8k, Re 1k, hFE 180. Reference solved here
    # independently with scipy.optimize.brentq (a general-purpose root finder) on the base loop
    # Vth = Ib (Rth + RB) + VT ln(Ic/IS) + (Ic + Ib) Re, Ib = Ic/hFE (Thevenin divider, Shockley
    # junction): Ic = 1.496 mA, Vce = 3.32 V. The model also carries the Early effect, worth a
    # few tenths of a percent here.
    from scipy.optimize import brentq

    vcc, rt, rb, rc, re, hfe = 15.0, 47e3, 8.2e3, 6.8e3, 1.0e3, 180.0
    vt, vth, rth = thermal_voltage(27.0), vcc * rb / (rt + rb), rt * rb / (rt + rb)
    ic_ref = brentq(
        lambda ic: vth - ic / hfe * (rth + DEVICE.RB) - vt * math.log(ic / DEVICE.IS) - ic * (1 + 1 / hfe) * re,
        1e-9,
        vcc / re,
    )
    vce_ref = vcc - ic_ref * rc - ic_ref * (1 + 1 / hfe) * re
    parts = dict(r_top=rt, r_bottom=rb, r_collector=rc, r_emitter=re, c_in=10e-6, c_out=10e-6)
    op = get_topology("divider_ce").operating_point(parts, DEVICE, Conditions(vcc, 0.0, math.inf), hfe=hfe)
    assert op["ic"][0] == pytest.approx(ic_ref, rel=0.01)
    assert op["vce"][0] == pytest.approx(vce_ref, rel=0.01)


def test_bias_is_not_the_fixed_vbe_or_stiff_divider_shortcut():
    # common practice: Vbe ~ NF*VT*ln(Ic/IS), about 0.63 V at 0.4 mA for IS = 1e-14 A
    op = get_topology("divider_ce").operating_point(NINE_VOLT, DEVICE, Conditions(9.0, 0.0, 1e5))
    assert op["vbe"][0] == pytest.approx(thermal_voltage(27.0) * math.log(op["ic"][0] / 1e-14), abs=2e-3)
    assert op["v_base"][0] < 9.0 * 10 / 85 - 0.005  # base current loads the divider


@pytest.mark.parametrize("name", sorted(DESIGNS))
def test_vectorised_equals_one_by_one(name):
    topo = get_topology(name)
    rng = np.random.default_rng(7)
    base = DESIGNS[name]
    batch = {k: v * rng.uniform(0.8, 1.25, 4) for k, v in base.items()}
    hfe = rng.uniform(120, 280, 4)
    c = Conditions(supply=12.0, source_impedance=600.0, load_impedance=10e3, load_capacitance=100e-12)
    together = topo.evaluate(batch, DEVICE, c, hfe)
    for i in range(4):
        alone = topo.evaluate({k: v[i] for k, v in batch.items()}, DEVICE, c, hfe[i])
        for key, value in together.metrics.items():
            assert value[i] == pytest.approx(alone.metrics[key][0], rel=1e-6, nan_ok=True), key
        for key, value in together.ratings.items():
            assert value[i] == pytest.approx(alone.ratings[key][0], rel=1e-6), key


def test_chunked_evaluation_matches_small_batches():
    topo = get_topology("divider_ce")
    rng = np.random.default_rng(3)
    n = 20000  # more than one block of the fast path
    batch = {k: v * rng.uniform(0.8, 1.25, n) for k, v in NINE_VOLT.items()}
    c = Conditions(9.0, 600.0, 47e3)
    fast = topo.evaluate(batch, DEVICE, c, full=False).metrics
    picks = [0, 16384, n - 1]
    small = topo.evaluate({k: v[picks] for k, v in batch.items()}, DEVICE, c, full=False).metrics
    np.testing.assert_allclose(fast["gain"][picks], small["gain"], rtol=1e-12)
    assert np.isnan(fast["f_low"]).all()


@pytest.mark.parametrize("name", sorted(DESIGNS))
def test_threads_evaluating_at_once_get_the_serial_results(name):
    # the nodal solver keeps a per-thread workspace: concurrent evaluations (e.g. the REST
    # service's worker threads) must not see each other's numbers (common practice: a
    # thread-safe result equals the serial one bit for bit)
    from concurrent.futures import ThreadPoolExecutor

    topo = get_topology(name)
    c = Conditions(9.0, 600.0, 47e3)
    batches = [
        {k: v * np.random.default_rng(seed).uniform(0.8, 1.25, 3000) for k, v in DESIGNS[name].items()}
        for seed in range(4)
    ]
    serial = [topo.evaluate(b, DEVICE, c).metrics for b in batches]
    with ThreadPoolExecutor(max_workers=4) as pool:
        threaded = list(pool.map(lambda b: topo.evaluate(b, DEVICE, c).metrics, batches * 2))
    for i, metrics in enumerate(threaded):
        for key in ("gain", "f_low", "f_high", "noise_ein_v", "input_impedance"):
            np.testing.assert_array_equal(metrics[key], serial[i % 4][key])


def test_two_equal_coupling_poles_stack_to_31_hz():
    # common practice: two identical first-order high-pass corners at f0 give -3 dB at f0*sqrt(1+sqrt(2))
    topo = get_topology("divider_ce")
    c = Conditions(supply=9.0, source_impedance=600.0, load_impedance=47e3)
    mid = topo.evaluate(NINE_VOLT, DEVICE, c, full=False).metrics
    parts = dict(
        NINE_VOLT,
        c_in=1 / (2 * math.pi * 20 * (600 + mid["input_impedance"][0])),
        c_out=1 / (2 * math.pi * 20 * (47e3 + mid["output_impedance"][0])),
    )
    f_low = one(topo.evaluate(parts, DEVICE, c), "f_low")
    assert f_low == pytest.approx(20 * math.sqrt(1 + math.sqrt(2)), rel=0.01)  # about 31.1 Hz


@pytest.mark.parametrize("name", sorted(DESIGNS))
def test_closed_form_midband_matches_nodal_solve(name):
    # the fast closed forms against the full nodal network of the same circuit at the band's
    # geometric mean (the residual is the coupling capacitors' and the bypass's small effect there)
    topo = get_topology(name)
    c = Conditions(supply=12.0, source_impedance=600.0, load_impedance=10e3)
    fast = topo.evaluate(DESIGNS[name], DEVICE, c, full=False).metrics
    nodal = topo.midband_network(DESIGNS[name], DEVICE, c)
    for key in ("gain", "input_impedance", "output_impedance"):
        assert fast[key][0] == pytest.approx(nodal[key][0], rel=0.01), key


def test_impedances_include_coupling_capacitors_at_mid_band():
    # circuit law: c_out in series with the resistive output impedance, |Z| = hypot(R, 1/(w C))
    topo = get_topology("divider_ce")
    c = Conditions(supply=9.0, source_impedance=600.0, load_impedance=100e3)
    big = topo.evaluate(NINE_VOLT, DEVICE, c, full=False).metrics
    small = topo.evaluate(dict(NINE_VOLT, c_out=80e-9), DEVICE, c, full=False).metrics
    x = 1 / (2 * math.pi * math.sqrt(20 * 20e3) * 80e-9)
    resistive = math.sqrt(big["output_impedance"][0] ** 2 - (1 / (2 * math.pi * math.sqrt(20 * 20e3) * 10e-6)) ** 2)
    assert small["output_impedance"][0] == pytest.approx(math.hypot(resistive, x), rel=1e-9)


# one design of every topology (the ngspice agreement's), first of each in their lists
EVERY_TOPOLOGY = list(
    {
        d.topology: d
        for d in reversed(
            check_designs() + pair_designs() + jfet_check_designs() + follower_designs() + pair_ac_designs()
        )
    }.values()
)


@pytest.mark.parametrize("design", EVERY_TOPOLOGY, ids=lambda d: d.topology)
def test_full_metrics_read_the_impedances_off_the_network_at_the_band_centre(design):
    # one solve of the source-and-load network, the source resistance and the load then taken back
    # out of the nodes' impedances, against the network solved with them removed (midband_network,
    # as ngspice measures them); c_in also a hundredth of its value, where it matters
    topo = get_topology(design.topology)
    assert {d.topology for d in EVERY_TOPOLOGY} == set(TOPOLOGIES)
    for scale in (1.0, 0.01):
        parts = {k: np.array([v * (scale if k == "c_in" else 1.0)]) for k, v in design.parts.items()}
        full = topo.evaluate(parts, design.device, design.conditions).metrics
        nodal = topo.midband_network(parts, design.device, design.conditions)
        for key in ("input_impedance", "output_impedance"):
            assert full[key][0] == pytest.approx(nodal[key][0], rel=1e-9), (key, scale)


def test_corner_search_matches_dense_sweep():
    topo = get_topology("divider_ce_split")
    c = Conditions(supply=12.0, source_impedance=600.0, load_impedance=10e3, load_capacitance=220e-12)
    r = topo.evaluate(DESIGNS["divider_ce_split"], DEVICE, c)
    f = np.geomspace(1.0, 1e8, 4001)
    h = np.abs(topo.frequency_response(DESIGNS["divider_ce_split"], DEVICE, c, f))[0]
    level = abs(one(r, "gain")) / math.sqrt(2)
    inside = f[h >= level]
    assert one(r, "f_low") == pytest.approx(inside[0], rel=0.01)
    assert one(r, "f_high") == pytest.approx(inside[-1], rel=0.01)


def test_swing_follows_ac_load_line():
    # DESIGN.md load-line relation: 2*min(Ic*Rac, (Vce-Vce_sat)*Rac/(Rac+Re_ac))
    topo = get_topology("divider_ce")
    c = Conditions(supply=9.0, source_impedance=600.0, load_impedance=22e3)
    r = topo.evaluate(NINE_VOLT, DEVICE, c, full=False)
    op = r.operating_point
    rac = 1 / (1 / 10e3 + 1 / 22e3)
    expect = 2 * min(op["ic"][0] * rac, (op["vce"][0] - 0.2) * rac / (rac + 1e3))
    assert one(r, "clip_vpp") == pytest.approx(expect, rel=1e-9)


def test_second_harmonic_of_nearly_plain_junction():
    # common practice (also DESIGN.md): HD2 ~ v_b/(4 NF VT (1+gm*Re)^2) for v_b peak at the base;
    # here the emitter is almost fully bypassed, so it is close to the plain-junction v_be/(4 VT).
    # No Early effect here: the formula is for the bare exponential.
    device = dataclasses.replace(DEVICE, VAF=0.0)
    parts = dict(
        r_top=47e3,
        r_bottom=10e3,
        r_collector=4.7e3,
        r_emitter=2.2,
        r_emitter_dc=1e3,
        c_in=10e-6,
        c_out=10e-6,
        c_emitter=1e-3,
    )
    topo = get_topology("divider_ce_split")
    c = Conditions(supply=12.0, source_impedance=0.0, load_impedance=math.inf, signal_vpp=0.2)
    r = topo.evaluate(parts, device, c, full=False)
    assert r.operating_point["active"][0]
    vt = thermal_voltage(27.0)
    gm_re = r.operating_point["ic"][0] / vt * 2.2
    expect = 0.1 / abs(one(r, "gain")) / (4 * vt * (1 + gm_re) ** 2)
    assert one(r, "thd") == pytest.approx(expect, rel=0.05)
    assert topo.thd_quasistatic(parts, device, c)[0] == pytest.approx(expect, rel=0.03)


@pytest.mark.parametrize("name, rel", [("divider_ce", 0.1), ("divider_ce_split", 0.1), ("ce_follower", 0.6)])
def test_quasistatic_thd_agrees_with_estimate_at_low_level(name, rel):
    # the quasi-static FFT agreed with ngspice .tran/.four to 0.1 % on these designs (checked by
    # hand); the follower's estimate is looser: its q1 and q2 second harmonics partly cancel.
    topo = get_topology(name)
    c = Conditions(supply=12.0, source_impedance=600.0, load_impedance=10e3, signal_vpp=0.5)
    estimate = one(topo.evaluate(DESIGNS[name], DEVICE, c, full=False), "thd")
    assert topo.thd_quasistatic(DESIGNS[name], DEVICE, c)[0] == pytest.approx(estimate, rel=rel)


def test_thd_solve_opts_into_the_quasistatic_solve():
    # thd_solve=True reports the quasi-static FFT (which agreed with ngspice .four within ~3 % on the
    # shared check designs); without it thd is the second-harmonic estimate, full or not, and at a
    # low level the two meet
    for name in sorted(DESIGNS):
        topo = get_topology(name)
        c = Conditions(supply=12.0, source_impedance=600.0, load_impedance=10e3, signal_vpp=0.3)
        solved = one(topo.evaluate(DESIGNS[name], DEVICE, c, thd_solve=True), "thd")
        assert solved == pytest.approx(float(topo.thd_quasistatic(DESIGNS[name], DEVICE, c)[0]), rel=0.02), name
        estimate = one(topo.evaluate(DESIGNS[name], DEVICE, c, full=False), "thd")
        assert one(topo.evaluate(DESIGNS[name], DEVICE, c), "thd") == estimate, name
        # the estimate is looser for shunt feedback (its base-side nonlinearity is not in it);
        # the follower's is checked above (its two stages' second harmonics partly cancel)
        rel = {"divider_ce": 0.15, "divider_ce_split": 0.15, "feedback_ce": 0.5}.get(name)
        if rel:
            assert solved == pytest.approx(estimate, rel=rel), name


def test_noise_figure_rises_as_source_impedance_falls():
    # common practice: with a bipolar input, NF is lowest near Rs_opt = en/in and rises for a low Rs
    topo = get_topology("divider_ce_split")
    nf = [
        one(topo.evaluate(DESIGNS["divider_ce_split"], DEVICE, Conditions(12.0, rs, 10e3)), "noise_figure_db")
        for rs in (10.0, 1e3)
    ]
    assert nf[0] > nf[1] + 6.0


def test_temperature_relations():
    assert thermal_voltage(27.0) == pytest.approx(0.025865, rel=1e-3)  # common practice: kT/q at 300 K
    assert saturation_current(1e-14, 27.0) == pytest.approx(1e-14)
    assert hfe_temperature_factor(37.0) == pytest.approx(1.05, rel=0.01)  # common practice: ~+0.5 %/K
    # common practice: Vbe at fixed current moves about -2 mV/K
    i = 1e-3
    vbe = [thermal_voltage(t) * math.log(i / saturation_current(1e-14, t)) for t in (17.0, 37.0)]
    assert -2.4e-3 < (vbe[1] - vbe[0]) / 20.0 < -1.6e-3


def test_feedback_stage_with_grounded_emitter():
    topo = get_topology("feedback_ce")
    parts = dict(DESIGNS["feedback_ce"], r_emitter=0.0)
    r = topo.evaluate(parts, DEVICE, Conditions(9.0, 600.0, 10e3))
    op = r.operating_point
    # circuit law: the collector sits one Vbe plus Ib*Rf (+ Ib*RB) above the grounded emitter
    assert op["vce"][0] == pytest.approx(op["vbe"][0] + op["ib"][0] * (220e3 + 10.0), rel=1e-9)
    assert one(r, "part_count") == 5  # r_feedback, r_collector, c_in, c_out, q1


def test_registry_and_input_errors():
    # the four stages DESIGN.md names are registered (a new module adds to them), in listing order
    assert list(TOPOLOGIES)[:4] == ["divider_ce", "divider_ce_split", "feedback_ce", "ce_follower"]
    with pytest.raises(InputError) as err:
        get_topology("cascode")
    assert "divider_ce" in str(err.value)
    with pytest.raises(InputError) as err:
        get_topology("divider_ce").evaluate({"r_top": 1e3}, DEVICE, Conditions(9.0, 0.0, 1e4))
    assert "r_bottom" in str(err.value)
    with pytest.raises(InputError):
        Device.from_row({"id": "x", "polarity": "npn"})
    row = dict(DEVICE.__dict__)
    assert Device.from_row(row) == DEVICE
    assert DEVICE.spice_model()["VAF"] == 100.0


NGSPICE = shutil.which("ngspice")


@pytest.mark.skipif(NGSPICE is None, reason="ngspice not installed")
def test_a_feedback_stage_s_output_impedance_sees_the_source_through_c_in():
    # reference: ngspice (Debian), a 1 A AC test current into the output at the band's centre
    # (tests/spice_harness.spice_midband). Collector-to-base feedback with a 22 nF c_in: at 632 Hz
    # the source reaches the base through 11 kohm of reactance, which lowers the loop gain; the
    # closed form takes c_in as a short and reads the output impedance 18 % high
    from spice_harness import spice_midband

    topo = get_topology("feedback_ce")
    parts = dict(r_feedback=470e3, r_collector=8.2e3, r_emitter=560, c_in=22e-9, c_out=150e-9)
    c = Conditions(supply=12.0, source_impedance=600.0, load_impedance=47e3)
    simulated = spice_midband("feedback_ce", parts, {**DEVICE.spice_model(), "polarity": "npn"}, c)
    arrays = {k: np.array([v]) for k, v in parts.items()}
    full = one(topo.evaluate(arrays, DEVICE, c), "output_impedance")
    closed_form = one(topo.evaluate(arrays, DEVICE, c, full=False), "output_impedance")
    assert full == pytest.approx(simulated["output_impedance"], rel=1e-3)
    assert closed_form > 1.1 * simulated["output_impedance"]
    assert one(topo.evaluate(arrays, DEVICE, c), "input_impedance") == pytest.approx(
        simulated["input_impedance"], rel=1e-3
    )


@pytest.mark.skipif(NGSPICE is None, reason="ngspice not installed")
@pytest.mark.parametrize("temp", [27.0, 70.0])
def test_divider_stage_against_ngspice(temp):
    # reference simulator: ngspice (.op, .ac, .noise) on an independently written netlist
    net = f"""ngspice check
.temp {temp}
.options TNOM=27
Vcc vcc 0 12
Vs sig 0 dc 0 ac 1
Rs sig src 600
Cin src base 2.2u
Rt vcc base 47k
Rb base 0 10k
Rc vcc collector 4.7k
Re emitter e2 220
Rd e2 0 820
Ce e2 0 47u
Cout collector out 2.2u
RL out 0 10k
Q1 collector base emitter qn
.model qn npn IS=1e-14 BF=200 NF=1 VAF=100 RB=10 CJE=8p CJC=4p TF=0.4n
.control
op
print @q1[ic]
ac dec 20 100 10k
meas ac g find vr(out) at=1000
noise v(out) Vs dec 40 20 20k
print inoise_total
.endc
.end
"""
    out = subprocess.run([NGSPICE, "-b"], input=net, capture_output=True, text=True, timeout=60).stdout

    def value(key):
        return float(re.search(rf"^{re.escape(key)}\s*=\s*(\S+)", out, re.M).group(1))

    c = Conditions(supply=12.0, source_impedance=600.0, load_impedance=10e3, temperature=temp)
    r = get_topology("divider_ce_split").evaluate(DESIGNS["divider_ce_split"], DEVICE, c)
    assert r.operating_point["ic"][0] == pytest.approx(value("@q1[ic]"), rel=0.005)
    assert one(r, "gain") == pytest.approx(value("g"), rel=0.01)
    source = 4 * 1.380649e-23 * (temp + 273.15) * 600 * (20e3 - 20)  # ngspice includes Rs's own noise
    assert math.sqrt(one(r, "noise_ein_v") ** 2 + source) == pytest.approx(value("inoise_total"), rel=0.03)


@pytest.mark.parametrize("name", sorted(DESIGNS))
def test_capacitor_ratings_see_the_highest_rail(name):
    # common practice: coupling and decoupling capacitors are rated for the full rail (at power-up,
    # uncharged, with the output shorted); a bypass capacitor for the highest its node can reach,
    # here the divider's open-circuit voltage at the highest supply
    topo = get_topology(name)
    c = Conditions(supply=9.0, source_impedance=600.0, load_impedance=100e3, supply_max=9.9)
    r = topo.evaluate({**DESIGNS[name], "r_decouple": 220.0, "c_decouple": 220e-6}, DEVICE, c, full=False)
    for cap in ("c_in", "c_out", "c_decouple"):
        assert r.ratings[f"v_{cap}"][0] == pytest.approx(9.9)
    if name == "divider_ce_split":
        p = DESIGNS[name]
        assert r.ratings["v_c_emitter"][0] == pytest.approx(9.9 * p["r_bottom"] / (p["r_top"] + p["r_bottom"]))
        assert r.ratings["v_c_emitter"][0] > r.operating_point["v_e2"][0]
    op = r.operating_point
    assert r.ratings["p_r_decouple"][0] == pytest.approx(op["supply_current"][0] ** 2 * 220.0)


@pytest.mark.parametrize("name", sorted(DESIGNS))
def test_decoupling_drop_is_counted_in_the_bias(name):
    # Ohm's law at the local supply node: Vloc = Vcc - r_decouple * (the stage's current), and the
    # stage then biases as if powered from Vloc directly
    topo = get_topology(name)
    c = Conditions(supply=9.0, source_impedance=600.0, load_impedance=100e3)
    op = topo.operating_point({**DESIGNS[name], "r_decouple": 470.0, "c_decouple": 100e-6}, DEVICE, c)
    v_loc = op["v_supply_local"][0]
    assert v_loc == pytest.approx(9.0 - 470.0 * op["supply_current"][0], abs=1e-4)  # the secant's 0.1 mV
    direct = topo.operating_point(DESIGNS[name], DEVICE, dataclasses.replace(c, supply=v_loc))
    assert op["ic"][0] == pytest.approx(direct["ic"][0], rel=1e-9)
    assert op["v_out_q"][0] == pytest.approx(direct["v_out_q"][0], rel=1e-9)


@pytest.mark.parametrize("name", sorted(DESIGNS))
def test_usable_swing_is_the_ten_percent_point_of_the_static_transfer(name):
    # the definition (DESIGN.md) applied by brute force: a dense sweep of the drive on the model's own
    # static transfer, the first amplitude where either peak is 10 % off the linear gain times the drive;
    # the search by scan and false position must land on it (ngspice agreement: tests/spice_agreement.py)
    topo = get_topology(name)
    c = Conditions(supply=12.0, source_impedance=600.0, load_impedance=10e3)
    r = topo.evaluate(DESIGNS[name], DEVICE, c, full=False)
    gain, clip = one(r, "gain"), one(r, "clip_vpp")
    a = np.linspace(0.02, 3.0, 30001) * clip / abs(gain)
    up = topo.static_transfer(DESIGNS[name], DEVICE, c, a)[0]
    down = topo.static_transfer(DESIGNS[name], DEVICE, c, -a)[0]
    deviation = np.maximum(np.abs(up / (gain * a) - 1.0), np.abs(down / (-gain * a) - 1.0))
    first = int(np.argmax(deviation > 0.1))
    assert one(r, "swing_vpp") == pytest.approx(abs(up[first] - down[first]), rel=2e-3)


@pytest.mark.parametrize("name", sorted(DESIGNS))
def test_per_candidate_supply_matches_one_supply_at_a_time(name):
    # supply corners arrive as one supply per candidate: each must give what that supply alone gives
    topo = get_topology(name)
    supplies = np.array([8.5, 9.0, 9.5])
    parts = {
        **{k: np.full(3, v) for k, v in DESIGNS[name].items()},
        "r_decouple": np.array([0.0, 330.0, 330.0]),
        "c_decouple": np.full(3, 220e-6),
    }
    batch = topo.evaluate(parts, DEVICE, Conditions(supplies, 600.0, 10e3, supply_max=9.5))
    for i, s in enumerate(supplies):
        alone = topo.evaluate(
            {k: v[i : i + 1] for k, v in parts.items()}, DEVICE, Conditions(s, 600.0, 10e3, supply_max=9.5)
        )
        for k in ("swing_vpp", "gain", "psrr_db", "noise_figure_db", "emitter_voltage"):
            # rel 1e-6: a batch holding a decoupling RC puts r_decouple = 0 in as physics.G_SHORT
            assert batch.metrics[k][i] == pytest.approx(alone.metrics[k][0], rel=1e-6)
    assert np.allclose(batch.ratings["v_c_in"], 9.5)


@pytest.mark.parametrize("design", check_designs(), ids=lambda d: d.name)
def test_swing_search_keeps_half_a_percent_of_the_brute_force_point(design):
    # The usable-swing search (a scan and a few false-position steps) must stay within 0.5 % of the
    # definition applied by brute force on every ngspice check design: a dense drive sweep of the
    # static transfer, the first amplitude whose peaks leave the 10 % band, refined by bisection
    # (DESIGN.md's rule; ngspice agreement: tests/spice_agreement.py)
    topo = get_topology(design.topology)
    r = topo.evaluate(design.parts, design.device, design.conditions, full=False)
    gain, clip = one(r, "gain"), one(r, "clip_vpp")

    def deviation(a: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        up = topo.static_transfer(design.parts, design.device, design.conditions, a)[0]
        down = topo.static_transfer(design.parts, design.device, design.conditions, -a)[0]
        return np.maximum(np.abs(up / (gain * a) - 1.0), np.abs(down / (-gain * a) - 1.0)), np.abs(up - down)

    a = np.linspace(0.05, 3.0, 1001) * clip / abs(gain)
    over = deviation(a)[0] > 0.1
    assert over.any()
    lo, hi = a[np.argmax(over) - 1], a[np.argmax(over)]
    for _ in range(20):
        mid = 0.5 * (lo + hi)
        lo, hi = (lo, mid) if deviation(np.array([mid]))[0][0] > 0.1 else (mid, hi)
    assert one(r, "swing_vpp") == pytest.approx(deviation(np.array([hi]))[1][0], rel=5e-3)


def _one_per_topology() -> list:
    """The first ngspice check design of every registered topology."""
    designs: dict = {}
    for d in check_designs() + follower_designs() + jfet_check_designs() + pair_designs() + pair_ac_designs():
        designs.setdefault(d.topology, d)
    assert sorted(designs) == sorted(TOPOLOGIES)
    return list(designs.values())


@pytest.mark.parametrize("design", _one_per_topology(), ids=lambda d: d.topology)
def test_a_swing_floor_tells_reached_and_short_as_the_solved_swing_does(design):
    # evaluate's swing_floor (the Monte Carlo builds judged against a spec's swing_min) against the
    # solved swing of the same designs: on which side of the floor each lies must agree; where the
    # floor decides it the figure is a lower bound at or above the floor (reached: the peak-to-peak
    # of a drive within 10 %, no more than the solved swing within its 0.5 %) or NaN (short); the
    # others (two drives cannot tell: a swing near the floor) keep the solved figure. 300 random
    # designs around each topology's ngspice check design (more than physics.WHOLE_SWING_BATCH: the
    # subset paths) at floors across the spread of their swings
    topo, c = get_topology(design.topology), design.conditions
    rng = np.random.default_rng(7)
    parts = {k: float(v) * np.exp(rng.uniform(np.log(0.7), np.log(1.4), 300)) for k, v in design.parts.items()}
    solved = topo.evaluate(parts, design.device, c, full=False).metrics["swing_vpp"]
    kept = 0
    for floor in np.quantile(solved[solved > 0.1], [0.1, 0.5, 0.9]):  # the active designs' swings
        judged = topo.evaluate(parts, design.device, c, full=False, swing_floor=float(floor)).metrics["swing_vpp"]
        np.testing.assert_array_equal(judged >= floor, solved >= floor)
        same = judged == solved
        kept += np.count_nonzero(same)
        bound = ~same & (judged >= floor)
        assert np.all(judged[bound] <= solved[bound] * 1.005)
        assert np.all(np.isnan(judged[~same & ~bound]))
    assert 0 < kept < 900  # some solved, some told by the floor


def test_swing_reaches_a_floor_by_hand_on_a_hard_clip():
    # A transfer of gain 1 that clips hard at +-3 V: its usable swing is 6 V p-p (the drive of 3.33 V
    # where the clipped peak falls 10 % short). By hand, at the drives floor/(2*0.9) and floor/(2*1.1):
    # a 5 V floor is reached (the first drive, 2.78 V, is still linear: 5.56 V p-p, over 1.01 x 5 V);
    # 6.5 V falls short (the first drive, 3.61 V, deviates 17 % and gives 6 V p-p, under 0.99 x 6.5 V),
    # and so does 8 V; 6 V itself is left to the solve (no drive gives more than 6 V p-p within the
    # tolerance, none past it less)
    gain, clip_peak = np.ones(3), np.full(3, 3.0)

    def transfer(vs: np.ndarray) -> np.ndarray:
        return np.clip(vs, -3.0, 3.0)

    assert physics.usable_swing(transfer, gain[:1], clip_peak[:1]) == pytest.approx(6.0, rel=5e-3)
    for floor, verdict in ((5.0, 1), (6.0, 0), (6.5, -1), (8.0, -1)):
        got, at_least = physics.swing_reaches(transfer, gain, clip_peak, floor)
        assert list(got) == [verdict] * 3
        if verdict > 0:
            assert at_least == pytest.approx(np.full(3, 5.0 / 0.9), rel=1e-12)
        else:
            assert np.all(np.isnan(at_least))


def test_usable_swing_takes_no_figure_from_a_transfer_without_an_output():
    # A static transfer that is linear (gain 2) up to 0.9 of the clip-level drive and has no output
    # beyond (NaN: a solve that did not settle) must give the swing of a drive that passed, between
    # 0.8 and 0.9 of the clip-level drive, not a figure interpolated towards the NaN (nor zero)
    gain, clip_peak = np.array([2.0]), np.array([1.8])
    a_clip = clip_peak / (0.9 * gain)

    def transfer(vs: np.ndarray) -> np.ndarray:
        return np.where(np.abs(vs) <= 0.9 * a_clip[:, None], gain[:, None] * vs, np.nan)

    swing = physics.usable_swing(transfer, gain, clip_peak)
    assert 2.0 * gain * 0.8 * a_clip <= swing <= 2.0 * gain * 0.9 * a_clip


def test_usable_swing_scans_on_where_the_static_curve_clips_after_the_load_line():
    # A stage whose static curve clips at 3 V peak while its AC load line says 1 V (a follower whose
    # bootstrap lifts the clip): the scan (to 1.6x the clip-level drive) sees no deviation, so it
    # goes on at doubling drives and finds the 10 % point, 6 V p-p; it used to stop at the scan's
    # end (3.56 V p-p). The same search in ngspice terms: a 30 V bootstrap follower read 19.2
    # against ngspice's 24.1 V p-p; now 23.8
    gain, clip_peak = np.array([1.0]), np.array([1.0])

    def transfer(vs: np.ndarray) -> np.ndarray:
        return np.clip(vs, -3.0, 3.0)

    assert physics.usable_swing(transfer, gain, clip_peak) == pytest.approx(6.0, rel=0.01)


def test_power_law_segments_integrate_power_laws_exactly():
    # the noise integral's segments against the closed-form integral of c*f^k (calculus: c*(f1^(k+1) -
    # f0^(k+1))/(k+1), and c*ln(f1/f0) at k = -1), over the band's log-spaced points
    f = np.geomspace(20.0, 20e3, 6)[:, None]
    for k in (-2.0, -1.0, -0.5, 0.0, 1.0, 2.0):
        psd = 3e-18 * f**k + 0.0 * np.ones((1, 2))
        got = physics.power_law_segments(f, psd, axis=0).sum(axis=0)
        exact = 3e-18 * (
            math.log(f[-1, 0] / f[0, 0]) if k == -1.0 else (f[-1, 0] ** (k + 1) - f[0, 0] ** (k + 1)) / (k + 1)
        )
        assert got == pytest.approx(np.full(2, exact), rel=1e-9)


@pytest.mark.parametrize("name", sorted(DESIGNS))
def test_corners_do_not_depend_on_the_batch_and_are_converged(name):
    # A design's corners are the same evaluated alone or beside designs that need more refinement
    # steps (a peaking response, a slowly converging bracket), and lie within 1e-4 of the crossing
    # that 40 false-position steps on every candidate find (the definition: |H| = |gain|/sqrt(2);
    # ngspice agreement of the corners: tests/spice_agreement.py)
    topo = get_topology(name)
    c = Conditions(supply=12.0, source_impedance=600.0, load_impedance=10e3)
    rng = np.random.default_rng(5)
    batch = {k: v * np.exp(rng.uniform(-0.7, 0.7, 64)) for k, v in DESIGNS[name].items()}
    together = topo.evaluate(batch, DEVICE, c).metrics
    alone = topo.evaluate({k: v[:1] for k, v in batch.items()}, DEVICE, c).metrics
    for k in ("f_low", "f_high"):
        assert alone[k][0] == pytest.approx(together[k][0], rel=1e-12)
    p, b, _, frame = topo._checked_solve(batch, DEVICE, c, None)
    rs = np.maximum(np.full(64, c.source_impedance), physics.R_FLOOR)
    gain = topo.evaluate(batch, DEVICE, c, full=False).metrics["gain"]
    net = topo._network(p, frame, b.small_signal, True, rs, True)
    plain = topo._response(net, rs).__call__  # a plain callable: every candidate takes every step
    f_low, f_high = physics.minus_3db_corners(plain, gain, 40)
    active = b.op["active"]
    assert together["f_low"][active] == pytest.approx(f_low[active], rel=1e-4)
    assert together["f_high"][active] == pytest.approx(f_high[active], rel=1e-4)


def test_network_solve_reuses_its_plan_only_while_the_network_is_unchanged():
    # Ohm's law on a divider (2k over 1k from a 1 mA injection): 1 mA into node a through 2k to b,
    # b to ground through 1k; a second 1k from b to ground after the first solve must count
    net = physics.Network(["a", "b"])
    net.resistor("a", "b", np.array([2e3, 4e3]))
    net.resistor("b", None, np.array([1e3, 1e3]))
    assert net.solve({"a": np.full(2, 1e-3)}, ["a", "b"])["a"] == pytest.approx([3.0, 5.0])
    net.resistor("b", None, np.array([1e3, 1e3]))
    v = net.solve({"a": np.full(2, 1e-3)}, ["a", "b"])
    assert v["a"] == pytest.approx([2.5, 4.5])
    assert v["b"] == pytest.approx([0.5, 0.5])
    # the network of the second candidate alone gives its voltages
    assert net.take(np.array([1]), 2).solve({"a": np.full(1, 1e-3)}, ["a"])["a"] == pytest.approx([4.5])


@pytest.mark.parametrize("name", sorted(DESIGNS))
def test_network_solve_in_frequency_blocks_equals_one_frequency_at_a_time(name, monkeypatch):
    # A solve over many frequencies runs a few rows at a time (physics.SOLVE_BLOCK elements), so its
    # workspace stays in cache: every element's elimination is its own, so the values are the same
    # bit for bit as solving each frequency alone, whatever the block
    topo = get_topology(name)
    c = Conditions(supply=12.0, source_impedance=600.0, load_impedance=10e3)
    rng = np.random.default_rng(11)
    batch = {k: v * np.exp(rng.uniform(-0.7, 0.7, 300)) for k, v in DESIGNS[name].items()}
    p, b, _, frame = topo._checked_solve(batch, DEVICE, c, None)
    rs = np.maximum(np.full(300, c.source_impedance), physics.R_FLOOR)
    net = topo._network(p, frame, b.small_signal, True, rs, True)
    f = np.geomspace(0.1, 1e8, 10)
    one_by_one = np.concatenate([topo._response(net, rs)(f[i : i + 1, None]) for i in range(f.size)])
    for block in (300, 700, 1 << 20):  # one row, two rows (the last block shorter), all rows at once
        monkeypatch.setattr(physics, "SOLVE_BLOCK", block)
        np.testing.assert_array_equal(topo._response(net, rs)(f[:, None]), one_by_one)
        # the adjoint solve of every node (the noise integral's), frequencies per candidate
        s = 2j * np.pi * np.broadcast_to(f[:, None], (10, 300))
        z = net.at(s).transposed().solve({"out": np.ones(1)})
        z1 = [net.at(s[i : i + 1]).transposed().solve({"out": np.ones(1)}) for i in range(10)]
        for node in z:
            np.testing.assert_array_equal(z[node], np.concatenate([v[node] for v in z1]))


@pytest.mark.parametrize("name", ["divider_ce_split", "ce_follower"])
def test_corner_steps_on_the_whole_batch_match_the_steps_on_a_taken_network(name, monkeypatch):
    # The corners' further steps solve a small batch whole and keep the wanted columns, a large one
    # on a network of those candidates alone (Network.take): both ways give the same values (every
    # column's solve is its own), so a design's corners do not depend on its batch's size. The
    # capacitors span 0.1 nF..1 F (as the sizing's probes), where some corners need further steps.
    topo = get_topology(name)
    c = Conditions(supply=12.0, source_impedance=600.0, load_impedance=10e3)
    rng = np.random.default_rng(7)
    batch = {k: v * np.exp(rng.uniform(-0.7, 0.7, 48)) for k, v in DESIGNS[name].items()}
    batch.update({cap: np.exp(rng.uniform(np.log(1e-10), 0.0, 48)) for cap in topo.capacitors})
    whole = topo.evaluate(batch, DEVICE, c).metrics
    monkeypatch.setattr(physics, "WHOLE_BATCH", 0)
    taken_columns = []
    take = physics.Response.take
    monkeypatch.setattr(physics.Response, "take", lambda self, cols: taken_columns.append(cols) or take(self, cols))
    taken = topo.evaluate(batch, DEVICE, c).metrics
    assert taken_columns  # the further steps ran, on taken networks
    for k in ("f_low", "f_high"):
        np.testing.assert_allclose(taken[k], whole[k], rtol=1e-12)
