"""emitter_follower: bias, mid-band, swing, distortion, hand design; each check names its reference."""

from __future__ import annotations

import math
import shutil

import numpy as np
import pytest

from check_devices import check_npn
from optimizer import eseries, physics
from optimizer.devices import thermal_voltage
from optimizer.synthesis import HandRequirements, rounded_designs
from optimizer.topologies import Conditions, get_topology

DEVICE = check_npn("npn-follow-a")
# our own numbers: 12 V, 100k/120k divider, 5.6k emitter, 1 uF in, 10 uF out
PARTS = dict(r_top=100e3, r_bottom=120e3, r_follower=5.6e3, c_in=1e-6, c_out=10e-6)
TOPO = get_topology("emitter_follower")
needs_ngspice = pytest.mark.skipif(
    shutil.which("ngspice") is None, reason="ngspice not installed: apt-get install ngspice"
)


def one(result, key):
    return float(np.asarray(result.metrics[key])[0])


def test_bias_against_an_independent_solve():
    # reference: scipy.optimize.brentq (a general-purpose root finder) on the base loop
    # Vth = Ib (Rth + RB) + Vbe + (Ic + Ib) Re, Ic = IS exp(Vbe/VT) (1 + Vcb/VAF), Ib = IS exp(Vbe/VT)/BF,
    # with Vcb = Vcc - Ve - Vbe (collector on the rail): Thevenin divider, Gummel-Poon forward active
    from scipy.optimize import brentq

    vcc, rt, rb, re = 12.0, 100e3, 120e3, 5.6e3
    vth, rth, vt = vcc * rb / (rt + rb), rt * rb / (rt + rb), thermal_voltage(27.0)

    def loop(vbe: float) -> float:
        i_f = 1e-14 * math.expm1(vbe / vt)
        ib = i_f / 200.0
        ve_guess = vth - ib * (rth + 10.0) - vbe
        ic = i_f * (1.0 + (vcc - ve_guess - vbe) / 100.0)
        return vth - ib * (rth + 10.0) - vbe - (ic + ib) * re

    vbe = brentq(loop, 0.3, 0.9, xtol=1e-12)
    i_f = 1e-14 * math.expm1(vbe / vt)
    ib = i_f / 200.0
    ve = vth - ib * (rth + 10.0) - vbe
    op = TOPO.operating_point(PARTS, DEVICE, Conditions(vcc, 600.0, 10e3))
    assert op["v_emitter"][0] == pytest.approx(ve, rel=1e-6)
    assert op["ic"][0] == pytest.approx(i_f * (1.0 + (vcc - ve - vbe) / 100.0), rel=1e-6)
    # circuit laws: KVL base to emitter, KCL at the rail (collector plus divider)
    assert op["v_base"][0] - op["v_emitter"][0] == pytest.approx(op["vbe"][0] + 10.0 * op["ib"][0], rel=1e-9)
    assert op["supply_current"][0] == pytest.approx(op["ic"][0] + (vcc - op["v_base"][0]) / rt, rel=1e-12)


def test_follower_common_practice():
    c = Conditions(supply=12.0, source_impedance=600.0, load_impedance=10e3)
    r = TOPO.evaluate(dict(PARTS, c_in=100e-6, c_out=1e-3), DEVICE, c)  # coupling reactances negligible
    op = r.operating_point
    # common practice: gain just under +1; Zin = Rt||Rb shunted by about beta*(Re||RL);
    # Zout about (Rs||Rth + rbb' + r_pi)/(beta+1) = 1/gm + (Rs||Rth + rbb')/(beta+1)
    assert 0.95 < one(r, "gain") < 1.0
    rth = 1 / (1 / 100e3 + 1 / 120e3)
    z_base = 201 * (1 / (1 / 5.6e3 + 1 / 10e3))
    assert one(r, "input_impedance") == pytest.approx(1 / (1 / rth + 1 / z_base), rel=0.03)
    gm = op["ic"][0] / thermal_voltage(27.0)
    zout = 1 / gm + (1 / (1 / 600 + 1 / rth) + 10.0) / 201
    assert one(r, "output_impedance") == pytest.approx(zout, rel=0.05)
    assert not TOPO.inverting and TOPO.transistors == 1


def test_closed_form_equals_the_nodal_network():
    # the closed forms against the full nodal network of the same circuit at the band's geometric
    # mean (device capacitances, c_in, c_out and the load capacitance included in both)
    c = Conditions(supply=12.0, source_impedance=47e3, load_impedance=2.2e3, load_capacitance=4.7e-9)
    fast = TOPO.evaluate(dict(PARTS, c_in=10e-9, c_out=1e-6), DEVICE, c, full=False).metrics
    nodal = TOPO.midband_network(dict(PARTS, c_in=10e-9, c_out=1e-6), DEVICE, c)
    for key in ("gain", "input_impedance", "output_impedance"):
        assert fast[key][0] == pytest.approx(nodal[key][0], rel=1e-6), key


def test_clip_level_and_swing():
    # AC load line of a follower: the negative peak is Ie*(Re||RL) (cutoff), the positive one
    # Vce - Vce_sat (common practice); the usable swing lies between 0.8 and 1.1 of the clip
    c = Conditions(supply=12.0, source_impedance=600.0, load_impedance=10e3)
    r = TOPO.evaluate(PARTS, DEVICE, c, full=False)
    op = r.operating_point
    cut = (op["ic"][0] + op["ib"][0]) / (1 / 5.6e3 + 1 / 10e3)
    assert one(r, "clip_vpp") == pytest.approx(2 * min(cut, op["vce"][0] - 0.2), rel=0.02)
    assert 0.8 < one(r, "swing_vpp") / one(r, "clip_vpp") < 1.1


def test_thd_from_a_low_source_is_the_static_fft():
    # from a low source the nonlinear-current method reduces to the static transfer's FFT
    # (physics.thd_quasistatic, the shared solve every stage uses): the collector-base charge's
    # currents are lost in 600 ohm
    c = Conditions(supply=12.0, source_impedance=600.0, load_impedance=10e3, signal_vpp=4.0)
    p, b, nvt, c = TOPO._checked_solve(PARTS, DEVICE, c, None)
    gain = one(TOPO.evaluate(PARTS, DEVICE, c, full=False), "gain")
    static = physics.thd_quasistatic(TOPO._static_fn(p, DEVICE, c, b, nvt, b.beta), np.array([2.0 / gain]))
    assert TOPO.thd_quasistatic(PARTS, DEVICE, c)[0] == pytest.approx(static[0], rel=0.03)
    # and the small-signal estimate the search screens with is of the same size at a low level
    low = Conditions(supply=12.0, source_impedance=600.0, load_impedance=10e3, signal_vpp=0.5)
    estimate = one(TOPO.evaluate(PARTS, DEVICE, low, full=False), "thd")
    assert TOPO.thd_quasistatic(PARTS, DEVICE, low)[0] == pytest.approx(estimate, rel=0.3)


def test_hand_design_rounds_to_the_series_and_is_active():
    req = HandRequirements(
        supply=9.0, gain=1.0, load_impedance=10e3, source_impedance=1e3, f_low=20.0, collector_current=1e-3, hfe=200.0
    )
    hand = TOPO.hand_design(req)
    assert hand["r_follower"] == pytest.approx(4.5e3)  # emitter at half the supply at 1 mA
    for design in rounded_designs(hand, "E24", "E6")[:4]:
        for role in TOPO.resistors:
            assert eseries.nearest("E24", design[role]) == pytest.approx(design[role])
        op = TOPO.operating_point(design, DEVICE, Conditions(9.0, 1e3, 10e3))
        assert op["active"][0] and 4.0 < op["v_emitter"][0] < 5.0


def test_gain_bound_prunes_gains_above_one():
    bound = TOPO.gain_bound({"r_follower": np.array([1e3, 100e3])}, 10e3)
    assert np.all(bound == 1.0)
    rng = np.random.default_rng(3)
    parts = {
        "r_top": rng.uniform(10e3, 1e6, 200),
        "r_bottom": rng.uniform(10e3, 1e6, 200),
        "r_follower": rng.uniform(1e3, 50e3, 200),
        "c_in": 1e-6,
        "c_out": 10e-6,
    }
    gain = TOPO.evaluate(parts, DEVICE, Conditions(12.0, 600.0, 10e3), full=False).metrics["gain"]
    assert np.all(np.abs(gain) < 1.0)


def test_ratings_name_every_part():
    r = TOPO.evaluate(PARTS, DEVICE, Conditions(12.0, 600.0, 10e3, supply_max=13.2))
    for role in TOPO.resistors:
        assert r.ratings[f"p_{role}"][0] > 0
    for role in TOPO.capacitors:
        assert r.ratings[f"v_{role}"][0] == 13.2  # coupling capacitors see the highest rail at power-up


@needs_ngspice
def test_operating_point_and_midband_against_ngspice():
    # ngspice (Debian) on the exported netlist: this also checks the netlist template
    from spice_harness import spice_midband, spice_operating_point

    c = Conditions(supply=12.0, source_impedance=600.0, load_impedance=10e3)
    model = DEVICE.spice_model()
    op = spice_operating_point("emitter_follower", PARTS, model, c)
    ours = TOPO.operating_point(PARTS, DEVICE, c)
    assert ours["ic"][0] == pytest.approx(op["ic"], rel=0.005)
    assert ours["v_emitter"][0] == pytest.approx(op["v_emitter"], abs=2e-3)
    mid = spice_midband("emitter_follower", PARTS, model, c)
    r = TOPO.evaluate(PARTS, DEVICE, c, full=False)
    for key in ("gain", "input_impedance", "output_impedance"):
        assert one(r, key) == pytest.approx(mid[key], rel=0.01), key
