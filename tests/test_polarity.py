"""PNP stages, negative rails and split supplies: the polarity layer, eligibility and the
outputs that follow polarity (netlist, BOM orientation, cautions). The models themselves are
checked against ngspice in tests/test_spice_agreement.py (its polarity block)."""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pytest
import yaml

from optimizer.bom import kit
from optimizer.candidates import assess, hazard_cautions
from optimizer.catalog import load_catalog
from optimizer.cli import EXIT_OK, main
from optimizer.devices import Device
from optimizer.errors import InputError
from optimizer.netlist import spice_netlist
from optimizer.search import SearchSpace
from optimizer.spec import parse_spec
from optimizer.synthesis import HandRequirements
from optimizer.topologies import get_topology
from optimizer.topologies.base import Conditions
from optimizer.topologies.divider_ce import DividerCE
from optimizer.validation import eligibility, validate_spec

PARTS = {"r_top": 68e3, "r_bottom": 12e3, "r_collector": 4.7e3, "r_emitter": 470.0, "c_in": 1e-6, "c_out": 10e-6}
SPEC = {
    "name": "t",
    "supply": "12 V",
    "gain": {"target": -8, "tolerance": "1 dB"},
    "source_impedance": 600,
    "load_impedance": "47k",
    "band": ["20 Hz", "20 kHz"],
    "robustness": "nominal",
}
CATALOG = load_catalog("eseries_full")
NPN = Device.from_row(CATALOG.transistor("npn-general"))
PNP = replace(NPN, id="mirror", polarity="pnp")  # the same parameters, the other polarity


def _evaluate(device: Device, below: float, parts: dict = PARTS, supply: float = 12.0):
    c = Conditions(supply=supply, source_impedance=600.0, load_impedance=47e3, below_ground=below)
    return get_topology("divider_ce").evaluate({k: np.array([v]) for k, v in parts.items()}, device, c)


def test_mirror_and_shift_keep_every_metric_and_move_the_node_voltages() -> None:
    # The mirror image of a circuit (every voltage and current negated) with devices of the other
    # polarity is the same circuit: identical small-signal figures, negated DC (a fact of the
    # trade; the ngspice check of the same designs is in test_spice_agreement.py).
    npn = _evaluate(NPN, 0.0)
    for device, below in ((PNP, 1.0), (NPN, 1.0), (PNP, 0.0)):
        other = _evaluate(device, below)
        for key in (
            "gain",
            "swing_vpp",
            "input_impedance",
            "output_impedance",
            "f_low",
            "f_high",
            "noise_ein_v",
            "thd",
            "supply_current",
        ):
            assert other.metrics[key] == pytest.approx(npn.metrics[key], rel=1e-12), (device.polarity, below, key)
        sign = -1.0 if device.polarity == "pnp" else 1.0
        shift = -12.0 * below if device.polarity == "npn" else 12.0 * (1.0 - below)
        for key in ("v_base", "v_collector", "v_emitter", "v_out_q"):
            assert other.operating_point[key] == pytest.approx(sign * npn.operating_point[key] + shift, abs=1e-9)
        assert other.operating_point["vce"] == pytest.approx(npn.operating_point["vce"])  # a magnitude
    # the ripple of a mirrored stage enters as before; a shifted one takes it on its emitter side
    assert _evaluate(PNP, 1.0).metrics["psrr_db"] == pytest.approx(npn.metrics["psrr_db"], rel=1e-9)
    assert _evaluate(NPN, 1.0).metrics["psrr_db"] < npn.metrics["psrr_db"] - 10.0


@pytest.mark.parametrize("name, gain", [("emitter_follower", 1.0), ("bootstrap_follower", 1.0), ("feedback_pair", 5.0)])
def test_followers_and_pair_mirror_and_shift_like_the_other_stages(name: str, gain: float) -> None:
    # The same fact of the trade (a mirrored circuit with the other polarity is the same circuit)
    # for the stages written after the layer: every metric but supply rejection (which rail
    # carries the ripple changes with the shift) equal to 1e-9, every node voltage moved as
    # true_volts says; ngspice checks PNP and negative-rail designs in test_spice_agreement.py.
    topology = get_topology(name)
    req = HandRequirements(
        supply=12.0, gain=gain, load_impedance=47e3, source_impedance=10e3, f_low=20.0, collector_current=1e-3, hfe=200
    )
    parts = {k: np.array([v]) for k, v in topology.hand_design(req).items()}

    def evaluate(device: Device, below: float):
        c = Conditions(
            supply=12.0, source_impedance=10e3, load_impedance=47e3, load_capacitance=1e-9, below_ground=below
        )
        return topology.evaluate(parts, device, c, thd_solve=True)

    npn = evaluate(NPN, 0.0)
    for device, below in ((PNP, 1.0), (NPN, 1.0), (PNP, 0.0)):
        other = evaluate(device, below)
        for key, value in npn.metrics.items():
            if not key.startswith("psrr"):
                assert other.metrics[key] == pytest.approx(value, rel=1e-9, nan_ok=True), (device.polarity, below, key)
        sign = -1.0 if device.polarity == "pnp" else 1.0
        shift = -12.0 * below if device.polarity == "npn" else 12.0 * (1.0 - below)
        for key in (*topology.node_voltages.values(), "v_out_q"):
            assert other.operating_point[key] == pytest.approx(sign * npn.operating_point[key] + shift, abs=1e-9)
        for key in topology.vce_keys:
            assert other.operating_point[key] == pytest.approx(npn.operating_point[key])  # a magnitude
        assert other.ratings.keys() == npn.ratings.keys()
        for key, value in npn.ratings.items():
            assert other.ratings[key] == pytest.approx(value, rel=1e-9), (device.polarity, below, key)
    assert evaluate(PNP, 1.0).metrics["psrr_db"] == pytest.approx(npn.metrics["psrr_db"], rel=1e-9)


def test_split_supply_base_returns_to_ground_through_r_bottom_alone() -> None:
    split = {k: v for k, v in PARTS.items() if k != "r_top"} | {"r_bottom": 20e3, "r_emitter": 560.0}
    r = _evaluate(NPN, 0.2, split, supply=15.0)  # +12 V / -3 V
    op = {k: float(v[0]) for k, v in r.operating_point.items()}
    # the base sits an Ib*r_bottom below ground, the emitter a Vbe lower (true volts)
    assert op["v_base"] == pytest.approx(-op["ib"] * 20e3, rel=1e-6)
    assert op["v_emitter"] == pytest.approx(op["v_base"] - op["vbe"] - 10.0 * op["ib"], abs=1e-3)
    assert float(r.ratings["p_r_top"][0]) == 0.0 and float(r.metrics["part_count"][0]) == 6.0
    with pytest.raises(InputError) as err:
        _evaluate(NPN, 0.2, {**split, "r_top": 68e3}, supply=15.0)
    assert err.value.problems[0].where == "parts.r_top" and "split supply" in err.value.problems[0].expected
    with pytest.raises(InputError) as err:  # a decoupling RC is drawn for the rail that is not ground
        _evaluate(NPN, 1.0, {**PARTS, "r_decouple": 100.0, "c_decouple": 1e-4})
    assert err.value.problems[0].where == "parts.r_decouple"


def test_followers_on_a_split_supply_return_the_divider_tap_to_ground() -> None:
    # +-6 V, r_top absent: the tap (the base, or a bootstrap's mid node) sits Ib*r_bottom below
    # ground (Kirchhoff: r_bottom carries the base current alone), r_bootstrap drops Ib again
    c = Conditions(supply=12.0, source_impedance=1e6, load_impedance=100e3, below_ground=0.5)
    base = {"r_bottom": 100e3, "r_follower": 27e3, "c_in": 100e-9, "c_out": 10e-6}
    for name, extra in (("emitter_follower", {}), ("bootstrap_follower", {"r_bootstrap": 100e3, "c_bootstrap": 1e-6})):
        parts = {k: np.array([v]) for k, v in {**base, **extra}.items()}
        r = get_topology(name).evaluate(parts, NPN, c)
        op = {k: float(v[0]) for k, v in r.operating_point.items()}
        tap = op.get("v_mid", op["v_base"])
        assert tap == pytest.approx(-op["ib"] * 100e3, rel=1e-6), name
        assert op["v_base"] == pytest.approx(tap - op["ib"] * extra.get("r_bootstrap", 0.0), rel=1e-6), name
        assert op["v_emitter"] == pytest.approx(-6.0 + op["ic"] * (1 + 1 / NPN.hfe_typ) * 27e3, rel=0.01), name
        assert float(r.ratings["p_r_top"][0]) == 0.0
        assert float(r.ratings["p_r_bottom"][0]) == pytest.approx(tap**2 / 100e3, rel=1e-6)
    floors = get_topology("bootstrap_follower").capacitor_floors({"r_bottom": np.array([100e3])}, c, 20.0)
    assert floors["c_bootstrap"] == pytest.approx(1.0 / (2 * np.pi * 20.0 * 100e3))


def test_netlist_writes_pnp_models_and_true_rails() -> None:
    c = Conditions(supply=12.0, source_impedance=600.0, load_impedance=47e3, below_ground=1.0)
    model = NPN.spice_model()
    negative_npn = spice_netlist("divider_ce", PARTS, model, c).splitlines()
    assert "Vee vee 0 DC -12.0" in negative_npn and not any(ln.startswith("Vcc ") for ln in negative_npn)
    assert "R1 0 base 68000.0" in negative_npn and "R2 base vee 12000.0" in negative_npn  # r_top to ground
    positive_pnp = spice_netlist("divider_ce", PARTS, model, replace(c, below_ground=0.0), polarity="pnp").splitlines()
    assert "Vcc vcc 0 DC 12.0" in positive_pnp and "R4 emitter vcc 470.0" in positive_pnp
    assert any(ln.startswith(".model q PNP(") for ln in positive_pnp)
    split = {k: v for k, v in PARTS.items() if k != "r_top"}
    text = spice_netlist("divider_ce", split, model, replace(c, supply=24.0, below_ground=0.5)).splitlines()
    assert "Vcc vcc 0 DC 12.0" in text and "Vee vee 0 DC -12.0" in text
    assert "R1 base 0 12000.0" in text and not any("r_top" in ln and not ln.startswith("*") for ln in text)


def test_electrolytic_plus_side_flips_with_the_rail() -> None:
    # common practice: + toward the more positive DC node. On a positive rail c_in's + goes to
    # the base (above ground); on a negative rail the base is below ground, so + goes to the source.
    spec = parse_spec({**SPEC, "supply": "-12 V"})
    record = assess(
        spec, CATALOG, "divider_ce", {k: v for k, v in PARTS.items() if k.startswith("r_")}, "npn-general", samples=20
    )
    assert record["conditions"]["rails"] == [0.0, -12.0] and record["operating_point"]["v_base"] < 0
    lines = {ln["roles"]: ln for ln in kit(record, CATALOG, 1).to_dict()["lines"]}
    assert lines["c_in"]["polarised"]
    assert lines["c_in"]["orientation"].startswith(
        "C1: + toward the input (source side) (0.00 V DC), - toward Q1's base"
    ), lines["c_in"]["orientation"]


def test_split_supply_span_above_30_v_is_cautioned() -> None:
    notes = hazard_cautions(parse_spec({**SPEC, "supply": "+-15 V"}))
    assert any("split supply +15 V / -15 V spans up to 31.5 V" in n and "local electrical codes" in n for n in notes)
    assert not hazard_cautions(parse_spec({**SPEC, "supply": "+-12 V"}))


def test_eligibility_names_who_can_and_why_the_others_cannot(capsys: pytest.CaptureFixture[str], tmp_path) -> None:
    spec = parse_spec({**SPEC, "supply": "+-12 V"})
    verdicts = {v.topology: v for v in eligibility(spec, CATALOG)}
    reasons = verdicts["jfet_common_source"].reasons
    assert not verdicts["jfet_common_source"].eligible and "no split supply: runs on positive" in reasons[0]
    assert verdicts["divider_ce"].eligible and verdicts["divider_ce"].devices == ("npn-general",)
    # feedback_ce spans the two rails as it is (split_bias "span")
    assert verdicts["feedback_ce"].eligible and get_topology("feedback_ce").split_omitted() == ()
    space = SearchSpace.build(spec, CATALOG)
    assert "jfet_common_source" not in space.topologies  # the space holds eligible ones only
    assert "feedback_ce.r_feedback" in space.distributions({"topology": "feedback_ce"})
    path = tmp_path / "s.yaml"
    path.write_text(yaml.safe_dump({**SPEC, "supply": "+-12 V"}))
    assert main(["check", str(path)]) == EXIT_OK
    out = capsys.readouterr().out
    assert (
        "gain -8 is inverting, split supply: divider_ce, divider_ce_split, feedback_ce, ce_follower can; "
        "emitter_follower cannot (non-inverting)" in out
    )
    # a positive gain fails check at once, naming the sign (no non-inverting stage in this set)
    with pytest.raises(InputError) as err:
        validate_spec(
            parse_spec({**SPEC, "gain": {"target": 10}, "topologies": ["divider_ce", "feedback_ce"]}), CATALOG
        )
    assert err.value.problems[0].where == "gain.target" and "non-inverting" in err.value.problems[0].expected


def test_search_space_pairs_each_topology_with_its_polarity(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(DividerCE, "polarities", ("npn",))
    spec = parse_spec({**SPEC, "devices": ["npn-general", "pnp-general"], "topologies": ["divider_ce", "feedback_ce"]})
    space = SearchSpace.build(spec, CATALOG)
    assert space.devices_of("divider_ce") == ("npn-general",)
    assert space.devices_of("feedback_ce") == ("npn-general", "pnp-general")
    assert "device" not in space.distributions({"topology": "divider_ce"})
    assert space.distributions({"topology": "feedback_ce"})["device:feedback_ce"].choices == (
        "npn-general",
        "pnp-general",
    )
    assert all(d.device == "npn-general" for d in space.seeds() if d.topology == "divider_ce")
    assert {d.device for d in space.seeds() if d.topology == "feedback_ce"} == {"npn-general", "pnp-general"}


# ---- the example specs: a +-12 V stage and a -9 V rail stage -------------------------------


@pytest.mark.skipif(not __import__("shutil").which("ngspice"), reason="ngspice not installed: apt-get install ngspice")
@pytest.mark.parametrize(
    "name, arrangement", [("split_rail_synth_input", "split"), ("negative_rail_sensor_amp", "negative")]
)
def test_example_spec_searches_to_a_feasible_rank_1_that_ngspice_confirms(name: str, arrangement: str) -> None:
    import sys
    from pathlib import Path

    from optimizer.candidates import design_from_record
    from optimizer.search import search
    from optimizer.spec import load_spec

    root = Path(__file__).resolve().parent.parent
    sys.path.insert(0, str(root / "tests"))
    from spice_harness import spice_midband, spice_operating_point, spice_psrr

    spec = load_spec(root / "specs" / f"{name}.yaml")
    assert spec.supply_arrangement == arrangement
    best = search(spec, trials=300, top=1).candidates[0]
    eligible = {v.topology: v.devices for v in eligibility(spec, CATALOG) if v.eligible}
    assert best["feasible"] and best["transistor"]["id"] in eligible[best["topology"]]
    # rank 1 rebuilt from its record alone and simulated in ngspice (Debian): bias and gain within
    # the agreement tolerances (3 %), node voltages in true volts, supply rejection within 2 dB
    topology, parts, device, conditions = design_from_record(best)
    card = {**device.spice_model(), "polarity": device.polarity}
    values = {r: float(v[0]) for r, v in parts.items()}
    op = spice_operating_point(topology.name, values, card, conditions)
    assert best["operating_point"]["ic"] == pytest.approx(op["ic"], rel=0.03)
    assert best["operating_point"]["v_base"] == pytest.approx(op["v_base"], abs=0.05)
    assert best["metrics"]["gain"] == pytest.approx(
        spice_midband(topology.name, values, card, conditions)["gain"], rel=0.03
    )
    model_psrr = topology.psrr(parts, device, conditions)
    ripple, mid = spice_psrr(topology.name, values, card, conditions, (100.0, 632.4555320336759))
    assert float(model_psrr["psrr_ripple_db"][0]) == pytest.approx(ripple, abs=2.0)
    assert float(model_psrr["psrr_mid_db"][0]) == pytest.approx(mid, abs=2.0)


def test_feedback_ce_spans_a_split_supply_with_its_emitter_on_the_negative_rail() -> None:
    # split_bias "span": nothing is left out; r_emitter returns to Vee, r_collector to Vcc, the
    # source and the load to ground; the base and emitter sit near the negative rail (true volts)
    parts = {"r_feedback": 330e3, "r_collector": 5.6e3, "r_emitter": 470.0, "c_in": 1e-6, "c_out": 10e-6}
    c = Conditions(supply=24.0, source_impedance=600.0, load_impedance=47e3, below_ground=0.5)
    text = spice_netlist("feedback_ce", parts, NPN.spice_model(), c).splitlines()
    assert "Vcc vcc 0 DC 12.0" in text and "Vee vee 0 DC -12.0" in text
    assert any(ln.startswith("R3 emitter vee ") for ln in text) and any(
        ln.startswith("R2 vcc collector ") for ln in text
    )
    spec = parse_spec({**SPEC, "supply": "+-12 V", "topologies": ["feedback_ce"]})
    record = assess(spec, CATALOG, "feedback_ce", {k: v for k, v in parts.items() if k.startswith("r_")}, "npn-general")
    assert record["operating_point"]["v_emitter"] < -10.0 and record["operating_point"]["v_base"] < -9.0
    assert any(d.topology == "feedback_ce" for d in SearchSpace.build(spec, CATALOG).seeds())  # the span's hand seed


@pytest.mark.parametrize(
    "supply, device, rail",
    [("+-12 V", "npn-general", "the negative rail"), ("12 V", "pnp-general", "the positive rail")],
)
def test_a_bypass_capacitor_names_the_rail_it_returns_to(supply: str, device: str, rail: str) -> None:
    # c_emitter returns to the emitter-side rail of the stage as drawn: on +-12 V that is -12 V, not
    # ground; for a PNP stage on +12 V it is the positive rail
    spec = parse_spec({**SPEC, "supply": supply})
    resistors = {"r_top": 56e3, "r_bottom": 10e3, "r_collector": 4.7e3, "r_emitter": 220.0, "r_emitter_dc": 820.0}
    if supply.startswith("+-"):
        resistors = {k: v for k, v in resistors.items() if k != "r_top"}
    record = assess(spec, CATALOG, "divider_ce_split", resistors, device, samples=20)
    note = {ln["roles"]: ln for ln in kit(record, CATALOG, 1).to_dict()["lines"]}["c_emitter"]["orientation"]
    assert f"toward {rail} (" in note and "ground (-" not in note and "ground (12" not in note, note
