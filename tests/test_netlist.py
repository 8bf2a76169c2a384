"""SPICE netlist export, and the ngspice harness checked against textbook facts.

The harness checks use a 9 V divider-biased common-emitter stage whose numbers are worked by
hand in any transistor-circuits text; none of them depends on stagefit's own models.
"""

from __future__ import annotations

import math
import re
import shutil
from types import SimpleNamespace

import pytest

import spice_harness as sh
from optimizer.errors import InputError
from optimizer.netlist import MODEL_KEYS, spice_netlist

MODEL = {"IS": 1e-14, "BF": 200.0, "NF": 1.0, "VAF": 100.0, "RB": 10.0, "CJE": 8e-12, "CJC": 4e-12, "TF": 4e-10}
PARTS = {"r_top": 75e3, "r_bottom": 10e3, "r_collector": 10e3, "r_emitter": 1e3, "c_in": 10e-6, "c_out": 10e-6}
K_B, Q_E = 1.380649e-23, 1.602176634e-19


def conditions(**changes: object) -> SimpleNamespace:
    base = {
        "supply": 9.0,
        "source_impedance": 0.0,
        "load_impedance": 100e3,
        "load_capacitance": 0.0,
        "temperature": 27.0,
        "band": (20.0, 20000.0),
    }
    return SimpleNamespace(**{**base, **changes})


# ---------------------------------------------------------------- netlist text


def test_every_part_appears_with_its_value_on_its_role_element() -> None:
    text = spice_netlist("divider_ce", PARTS, MODEL, conditions())
    for line in (
        "R1 vcc base 75000.0",
        "R2 base 0 10000.0",
        "R3 vcc collector 10000.0",
        "R4 emitter 0 1000.0",
        "C1 src base 1e-05",
        "C2 collector out 1e-05",
        "Q1 collector base emitter q",
        "Rload out 0 100000.0",
        "Vcc vcc 0 DC 9.0",
        ".temp 27.0",
        ".options TNOM=27",
        "Rsource sig src 0.001",
    ):  # Rs 0 -> 1 milliohm stand-in
        assert line in text.splitlines(), line
    assert re.search(r"^Vsig sig 0 DC 0 AC 1 SIN\(0 0\.01 632\.455\d*\)$", text, re.MULTILINE)
    assert "Cload" not in text
    for role in PARTS:
        assert re.search(rf"^\*\s+[RC]\d\s+{role} = ", text, re.MULTILINE), role
    assert text.rstrip().endswith(".end")


def test_model_line_carries_every_key_and_value() -> None:
    text = spice_netlist("divider_ce", PARTS, MODEL, conditions(), device_id="npn-general")
    (line,) = [ln for ln in text.splitlines() if ln.startswith(".model")]
    assert line.startswith(".model npn_general NPN(")
    for key in MODEL_KEYS:
        assert f"{key}={MODEL[key]!r}" in line
    assert "Q1 collector base emitter npn_general" in text


def test_caution_and_analyses_placement() -> None:
    text = spice_netlist(
        "divider_ce",
        PARTS,
        MODEL,
        conditions(load_capacitance=1e-10),
        analyses=".op",
        cautions=["supply 48 V is above 30 V: treat it as hazardous"],
    )
    assert "* CAUTION: supply 48 V is above 30 V: treat it as hazardous" in text.splitlines()
    assert "simulated, not built" in text.lower()
    assert "Supply 9.0 V" in text
    lines = text.splitlines()
    assert lines[-2:] == [".op", ".end"]
    assert "Cload out 0 1e-10" in lines
    assert "above 30 V" not in spice_netlist("divider_ce", PARTS, MODEL, conditions())


def test_other_topologies_wire_their_parts() -> None:
    split = {**PARTS, "r_emitter": 330.0, "r_emitter_dc": 680.0, "c_emitter": 1e-4}
    text = spice_netlist("divider_ce_split", split, MODEL, conditions())
    assert {"R4 emitter e2 330.0", "R5 e2 0 680.0", "C2 e2 0 0.0001", "C3 collector out 1e-05"} <= set(
        text.splitlines()
    )
    fb = {"r_feedback": 470e3, "r_collector": 4.7e3, "r_emitter": 0.0, "c_in": 1e-5, "c_out": 1e-5}
    text = spice_netlist("feedback_ce", fb, MODEL, conditions())
    assert {
        "R1 collector base 470000.0",
        "R2 vcc collector 4700.0",
        "Vshort_r_emitter emitter 0 DC 0",
        "C2 collector out 1e-05",
    } <= set(text.splitlines())
    follower = {**PARTS, "r_follower": 4.7e3}
    text = spice_netlist("ce_follower", follower, MODEL, conditions())
    assert {"Q2 vcc collector emitter2 q", "R5 emitter2 0 4700.0", "C2 emitter2 out 1e-05"} <= set(text.splitlines())


def test_bad_topology_and_missing_part_are_named() -> None:
    with pytest.raises(InputError) as err:
        spice_netlist("cascode", PARTS, MODEL, conditions())
    assert "cascode" in str(err.value) and "divider_ce" in str(err.value)
    missing = {k: v for k, v in PARTS.items() if k != "r_bottom"}
    with pytest.raises(InputError) as err:
        spice_netlist("divider_ce", missing, MODEL, conditions())
    assert "parts.r_bottom" in str(err.value) and "r_top, r_bottom" in str(err.value)
    with pytest.raises(InputError, match="parts.r_top"):
        spice_netlist("divider_ce", {**PARTS, "r_top": 0.0}, MODEL, conditions())
    with pytest.raises(InputError, match="r_follower"):
        spice_netlist("divider_ce", {**PARTS, "r_follower": 1e3}, MODEL, conditions())
    with pytest.raises(InputError, match="model.VAF"):
        spice_netlist("divider_ce", PARTS, {k: v for k, v in MODEL.items() if k != "VAF"}, conditions())


# ---------------------------------------------------------------- ngspice harness

needs_ngspice = pytest.mark.skipif(not sh.ngspice_available(), reason="ngspice not installed: apt-get install ngspice")


@pytest.fixture(scope="module")
def textbook() -> dict[str, object]:
    if not sh.ngspice_available():
        pytest.skip("ngspice not installed: apt-get install ngspice")
    c = conditions()
    return {
        "op": sh.spice_operating_point("divider_ce", PARTS, MODEL, c),
        "mid": sh.spice_midband("divider_ce", PARTS, MODEL, c),
    }


@needs_ngspice
def test_operating_point_matches_hand_bias(textbook: dict) -> None:
    # common practice: Vth = 9*10/85 = 1.06 V, Rth = 8.8k, Ic = (Vth - ~0.65)/(Re + Rth/beta)
    # ~ 0.4 mA, Vce = 9 - Ic*(Rc + Re) ~ 4.5 V; supply current = Ic + divider current.
    op = textbook["op"]
    assert 0.37e-3 < op["ic"] < 0.43e-3
    assert 4.3 < op["v_collector"] - op["v_emitter"] < 4.7
    assert 0.6 < op["v_base"] - op["v_emitter"] < 0.7
    divider = (9.0 - op["v_base"]) / PARTS["r_top"]
    assert op["supply_current"] == pytest.approx(op["ic"] + divider, rel=0.01)


@needs_ngspice
def test_midband_gain_and_impedances(textbook: dict) -> None:
    # common practice: |A| ~ (Rc||RL)/(re + Re) = 9.09k/1.06k ~ 8.6 (8.4..8.9), inverting;
    # Zin = Rth || (beta+1)*Re... ~ 8.8k || 214k ~ 8.47k; Zout of a degenerated stage ~ Rc.
    mid = textbook["mid"]
    assert -8.9 < mid["gain"] < -8.4
    assert 8.4e3 < mid["input_impedance"] < 8.8e3
    assert mid["output_impedance"] == pytest.approx(PARTS["r_collector"], rel=0.05)


@needs_ngspice
def test_two_equal_coupling_corners_stack_to_31_hz(textbook: dict) -> None:
    # common practice: two first-order high-pass poles at f0 give -3 dB at
    # f0/sqrt(sqrt(2) - 1) = 1.554 f0, i.e. 31 Hz for two 20 Hz corners.
    mid = textbook["mid"]
    c_in = 1 / (2 * math.pi * 20.0 * mid["input_impedance"])
    c_out = 1 / (2 * math.pi * 20.0 * (mid["output_impedance"] + 100e3))
    response = sh.spice_response("divider_ce", {**PARTS, "c_in": c_in, "c_out": c_out}, MODEL, conditions())
    assert response["f_low"] == pytest.approx(20.0 / math.sqrt(math.sqrt(2) - 1), rel=0.05)
    assert response["f_high"] > 100e3


@needs_ngspice
def test_unloaded_swing_is_the_load_line_clip(textbook: dict) -> None:
    # common practice: unloaded, cutoff side Ic*Rc ~ 4.1 V, saturation side
    # (Vce - ~0.2)*Rc/(Rc + Re) ~ 3.9 V: clips near 8 Vpp (2 * the smaller side).
    op = textbook["op"]
    vce = op["v_collector"] - op["v_emitter"]
    hand = 2 * min(op["ic"] * 10e3, (vce - 0.2) * 10e3 / 11e3)
    swing = sh.spice_clip("divider_ce", PARTS, MODEL, conditions(load_impedance=1e9))
    assert 7.4 < swing < 8.4
    assert swing == pytest.approx(hand, rel=0.10)


@needs_ngspice
def test_noise_matches_the_hand_sum(textbook: dict) -> None:
    # textbook noise sum (from memory), source noiseless and ~0 ohm: input-referred white
    # density 4kT(rbb' + 1/(2 gm) + Re) plus Rc's 4kT*Rc divided by the base-to-collector gain^2.
    op = textbook["op"]
    kt = K_B * 300.15
    gm = op["ic"] / (kt / Q_E)
    gain_c = gm * (PARTS["r_collector"] * 100e3 / 110e3) / (1 + gm * PARTS["r_emitter"])
    density = 4 * kt * (MODEL["RB"] + 1 / (2 * gm) + PARTS["r_emitter"] + PARTS["r_collector"] / gain_c**2)
    hand = math.sqrt(density * (20000.0 - 20.0))
    ein = sh.spice_noise("divider_ce", PARTS, MODEL, conditions())
    assert ein == pytest.approx(hand, rel=0.08)
    # with a 10k source (its own noise excluded) the hand sum refers en at the base, in into
    # Rs||Rth and Rth's thermal noise to the source EMF through the divider Rth/(Rs + Rth).
    rs, rth = 10e3, PARTS["r_top"] * PARTS["r_bottom"] / (PARTS["r_top"] + PARTS["r_bottom"])
    ib = op["ic"] / MODEL["BF"]
    at_base = density + 2 * Q_E * ib * (rs * rth / (rs + rth)) ** 2
    referred = at_base * ((rs + rth) / rth) ** 2 + 4 * kt * rth * (rs / rth) ** 2
    with_source = sh.spice_noise("divider_ce", PARTS, MODEL, conditions(source_impedance=rs))
    assert with_source == pytest.approx(math.sqrt(referred * (20000.0 - 20.0)), rel=0.08)


@needs_ngspice
def test_thd_matches_second_harmonic_formula(textbook: dict) -> None:
    # textbook (from memory): a degenerated stage's HD2 ~ v_b/(4 n VT (1 + gm Re)^2), with v_b
    # the peak signal at the base; at 1 Vpp out this dominates the THD.
    op, mid = textbook["op"], textbook["mid"]
    vt = K_B * 300.15 / Q_E
    gm = op["ic"] / vt
    v_b = 0.5 / abs(mid["gain"])
    hd2 = v_b / (4 * vt * (1 + gm * PARTS["r_emitter"]) ** 2)
    thd = sh.spice_thd("divider_ce", PARTS, MODEL, conditions(), 1.0)
    assert thd == pytest.approx(hd2, rel=0.15)
    assert sh.spice_thd("divider_ce", PARTS, MODEL, conditions(), 4.0) > 2 * thd


@needs_ngspice
def test_harness_reports_a_failed_run(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(sh, "NGSPICE", shutil.which("false"))  # a simulator that always fails
    with pytest.raises(sh.SpiceError, match="ngspice failed"):
        sh.spice_operating_point("divider_ce", PARTS, MODEL, conditions())


#: the parts of the four stages, written out from their circuit descriptions (the design notes' role names)
STAGE_PARTS = {
    "divider_ce": {"r_top", "r_bottom", "r_collector", "r_emitter", "c_in", "c_out"},
    "divider_ce_split": {"r_top", "r_bottom", "r_collector", "r_emitter", "r_emitter_dc", "c_in", "c_out", "c_emitter"},
    "feedback_ce": {"r_feedback", "r_collector", "r_emitter", "c_in", "c_out"},
    "ce_follower": {"r_top", "r_bottom", "r_collector", "r_emitter", "r_follower", "c_in", "c_out"},
}


@pytest.mark.parametrize("name", sorted(STAGE_PARTS))
def test_netlist_and_model_parts_are_the_circuits_parts(name: str) -> None:
    """The netlist wires, and the model declares, exactly the parts of the circuit, input to output."""
    from optimizer.netlist import required_parts
    from optimizer.topologies import get_topology

    wired = required_parts(name)
    topology = get_topology(name)
    assert set(wired) == STAGE_PARTS[name]
    assert set(topology.resistors) | set(topology.capacitors) == STAGE_PARTS[name]
    assert (wired[0], wired[-1]) == ("c_in", "c_out")  # signal order: the input coupling first, the output last
