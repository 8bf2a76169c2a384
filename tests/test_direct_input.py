"""A ground-referenced source that passes DC wired to the base of a stage on a split supply
(spec ``input_coupling: direct``): the spec field, what `stagefit check` says, the models without
c_in, and the example spec searched end to end with its rank 1 simulated in ngspice (Debian).
The models' agreement with ngspice on 12 direct-coupled designs is in tests/test_spice_agreement.py."""

from __future__ import annotations

import shutil
import sys
from pathlib import Path

import numpy as np
import pytest

from optimizer.bom import kit
from optimizer.catalog import load_catalog
from optimizer.cli import EXIT_OK, main
from optimizer.devices import Device
from optimizer.errors import InputError
from optimizer.spec import load_spec, parse_spec, spec_json_schema
from optimizer.topologies import get_topology
from optimizer.topologies.base import Conditions
from optimizer.validation import eligibility, input_coupling_text

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "tests"))
CATALOG = load_catalog("eseries_full")
NPN = Device.from_row(CATALOG.transistor("npn-general"))
SPLIT = Conditions(supply=24.0, source_impedance=2.2e3, load_impedance=47e3, below_ground=0.5)
PARTS = {"r_bottom": 30e3, "r_collector": 6.2e3, "r_emitter": 220.0, "r_emitter_dc": 11e3, "c_out": 1e-6}
PARTS["c_emitter"] = 330e-6
BASE = {
    "name": "t",
    "supply": "+-12 V",
    "gain": {"target": -10, "tolerance": "1 dB"},
    "source_impedance": "1k",
    "load_impedance": "47k",
    "band": ["20 Hz", "20 kHz"],
    "input_coupling": "direct",
}


def test_input_coupling_defaults_to_a_capacitor_and_names_bad_values() -> None:
    assert parse_spec({k: v for k, v in BASE.items() if k != "input_coupling"}).input_coupling == "capacitor"
    assert spec_json_schema()["properties"]["input_coupling"]["enum"] == ["capacitor", "direct"]
    with pytest.raises(InputError) as error:
        parse_spec({**BASE, "input_coupling": "dc"})
    assert error.value.problems[0].where == "input_coupling"


def test_check_says_which_stages_take_the_source_directly_and_why_others_keep_c_in() -> None:
    split = parse_spec({**BASE, "gain": {"target": 1, "tolerance": "1 dB", "inverting": False}})
    text = input_coupling_text(split, eligibility(split, CATALOG))
    # non-inverting on +-12 V: the emitter follower's base sits at ground, the bootstrap's is fed through r_bootstrap
    assert "emitter_follower take the source without c_in" in text
    assert "bootstrap_follower keeps c_in (its base is fed through r_bootstrap" in text
    positive = parse_spec({**BASE, "supply": "12 V"})
    assert "every topology keeps c_in: on a positive supply the input sits at the bias divider's DC" in (
        input_coupling_text(positive, eligibility(positive, CATALOG)) or ""
    )
    assert input_coupling_text(parse_spec({**BASE, "input_coupling": "capacitor"}), []) is None


def test_check_prints_the_coupling_verdict(capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["check", str(ROOT / "specs" / "dc_coupled_sensor_split.yaml")]) == EXIT_OK
    line = next(x for x in capsys.readouterr().out.splitlines() if "input coupling" in x)
    assert "divider_ce, divider_ce_split, ce_follower take the source without c_in" in line


def test_without_c_in_the_low_corner_loses_the_input_pole_and_the_part_count_drops() -> None:
    stage = get_topology("divider_ce_split")
    with_cap = stage.evaluate({**PARTS, "c_in": 1e-6}, NPN, SPLIT)
    direct = stage.evaluate({**PARTS, "c_in": 0.0}, NPN, SPLIT)
    assert direct.metrics["part_count"][0] == with_cap.metrics["part_count"][0] - 1
    # 1 uF into ~20 kohm puts a pole near 8 Hz beside c_out's and c_emitter's: without it the corner falls
    assert direct.metrics["f_low"][0] < with_cap.metrics["f_low"][0]
    assert direct.ratings["v_c_in"][0] == 0.0
    # base current through the source: i_source = (0 V - v_base) / R_source (Ohm's law at the input node)
    op = direct.operating_point
    assert op["i_source"][0] == pytest.approx(-op["v_base"][0] / SPLIT.source_impedance, rel=1e-9)
    assert op["i_source"][0] == pytest.approx(op["ib"][0] * 30e3 / (30e3 + 2.2e3), rel=1e-4)  # current divider


def test_c_in_may_be_left_out_only_where_the_base_sits_at_ground() -> None:
    positive = Conditions(supply=24.0, source_impedance=2.2e3, load_impedance=47e3)
    with pytest.raises(InputError) as error:
        get_topology("divider_ce_split").evaluate({**PARTS, "r_top": 100e3, "c_in": 0.0}, NPN, positive)
    assert error.value.problems[0].where == "parts.c_in"
    boot = {"r_bottom": 1e6, "r_bootstrap": 1e6, "r_follower": 10e3, "c_bootstrap": 1e-6, "c_out": 1e-6}
    with pytest.raises(InputError):
        get_topology("bootstrap_follower").evaluate({**boot, "c_in": 0.0}, NPN, SPLIT)


@pytest.mark.skipif(shutil.which("ngspice") is None, reason="ngspice not installed: apt-get install ngspice")
def test_example_spec_searches_to_a_direct_coupled_rank_1_that_ngspice_confirms() -> None:
    from optimizer.candidates import design_from_record
    from optimizer.netlist import spice_netlist
    from optimizer.search import search
    from spice_harness import spice_midband, spice_operating_point, spice_response

    spec = load_spec(ROOT / "specs" / "dc_coupled_sensor_split.yaml")
    best = search(spec, top=1).candidates[0]  # the spec's own budget and seed
    assert best["feasible"] and best["topology"] in ("divider_ce", "divider_ce_split", "ce_follower")
    assert best["parts"]["c_in"]["value"] == 0.0 and best["parts"]["c_in"]["label"] == "direct"
    assert any("direct-coupled input: the base current" in c for c in best["cautions"])
    # the kit has no c_in line; the netlist wires the source to the base (a 0 V source keeps the node)
    bill = kit(best, CATALOG, 1, spec)
    assert "c_in" not in " ".join(str(x) for x in bill.lines["roles"])
    topology, parts, device, conditions = design_from_record(best)
    values = {r: float(v[0]) for r, v in parts.items()}
    card = {**device.spice_model(), "polarity": device.polarity}
    netlist = spice_netlist(topology.name, values, card, conditions, polarity=device.polarity)
    assert "Vshort_c_in src base DC 0" in netlist
    # rank 1 rebuilt from its record alone, simulated in ngspice (Debian): bias (the base current in
    # the source's 2.2 k), gain and the low corner within the agreement tolerances (3 %, 3 %, 10 %)
    op = spice_operating_point(topology.name, values, card, conditions)
    assert best["operating_point"]["ic"] == pytest.approx(op["ic"], rel=0.03)
    assert best["operating_point"]["v_base"] == pytest.approx(op["v_base"], abs=0.005)
    assert best["metrics"]["gain"] == pytest.approx(
        spice_midband(topology.name, values, card, conditions)["gain"], rel=0.03
    )
    assert best["metrics"]["f_low"] == pytest.approx(
        spice_response(topology.name, values, card, conditions)["f_low"], rel=0.1
    )
    assert np.isfinite(best["metrics"]["f_low"])
