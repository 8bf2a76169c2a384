"""`stagefit evaluate` on every example spec, with the hand method's design."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest

from optimizer.catalog import load_catalog
from optimizer.cli import EXIT_BAD_INPUT, EXIT_OK, main
from optimizer.devices import Device
from optimizer.spec import load_spec
from optimizer.synthesis import hand_requirements, rounded_designs
from optimizer.topologies import get_topology
from optimizer.units import format_rkm, parse_quantity

SPECS = sorted(Path(__file__).resolve().parent.parent.joinpath("specs").glob("*.yaml"))


def _hand_settings(path: Path) -> tuple[str, list[str]]:
    spec = load_spec(path)
    device = Device.from_row(load_catalog(spec.parts.catalog).transistor(spec.devices[0]))
    topology = spec.topologies[0]
    if spec.supply_arrangement == "split" and "divider_ce_split" in spec.topologies:
        topology = "divider_ce_split"  # its bypassed r_emitter_dc carries the negative rail's DC
    req = hand_requirements(spec, device)
    below = spec.supply_below_ground
    parts = (
        get_topology(topology).split_hand_design(req, below if device.polarity == "npn" else 1.0 - below)
        if spec.supply_arrangement == "split"
        else get_topology(topology).hand_design(req)
    )
    assert parts is not None
    resistors = {role: v for role, v in parts.items() if not role.startswith("c_")}
    design = rounded_designs(resistors, spec.parts.resistor_series, spec.parts.capacitor_series)[0]
    return topology, [f"{role}={format_rkm(value)}" for role, value in design.items()]


@pytest.mark.parametrize("path", SPECS, ids=lambda p: p.name)
def test_evaluate_every_example_spec(path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    topology, settings = _hand_settings(path)
    args = ["evaluate", str(path), "--topology", topology, "--samples", "200", "--format", "json"]
    assert main(args + [a for s in settings for a in ("--set", s)]) == EXIT_OK
    record = json.loads(capsys.readouterr().out)
    assert record["topology"] == topology
    assert {"gain", "swing_vpp", "input_impedance", "supply_current", "yield"} <= set(record["metrics"])
    assert set(record["transistor"]["model"]) == {"IS", "BF", "NF", "VAF", "RB", "CJE", "CJC", "TF", "KF", "AF"}
    assert record["parts"] and all(part["label"] for part in record["parts"].values())
    assert 0.0 <= record["metrics"]["yield"] <= 1.0
    low, high = record["worst_case"]["gain"]
    assert low <= record["metrics"]["gain"] <= high
    assert record["feasible"] == (not record["violations"])


def test_evaluate_table_shows_cautions(capsys: pytest.CaptureFixture[str]) -> None:
    topology, settings = _hand_settings(SPECS[0])
    assert (
        main(
            ["evaluate", str(SPECS[0]), "--topology", topology, "--samples", "100"]
            + [a for s in settings for a in ("--set", s)]
        )
        == EXIT_OK
    )
    out = capsys.readouterr().out
    assert "caution:" in out and "worst case" in out


@pytest.mark.parametrize(
    ("setting", "named"), [("r_top=12 Q", "r_top"), ("r_nowhere=1k", "r_nowhere"), ("r_top", "ROLE=VALUE")]
)
def test_evaluate_bad_settings_are_bad_input(setting: str, named: str, capsys: pytest.CaptureFixture[str]) -> None:
    code = main(["evaluate", str(SPECS[0]), "--topology", "divider_ce", "--set", setting])
    assert code == EXIT_BAD_INPUT
    assert named in capsys.readouterr().err


def test_a_metric_close_to_its_limit_gets_a_caution() -> None:
    from optimizer.candidates import assess
    from optimizer.spec import parse_spec, spec_to_dict

    path = SPECS[0]
    spec = load_spec(path)
    topology, settings = _hand_settings(path)
    parts = {role: parse_quantity(value) for role, value in (s.split("=") for s in settings)}
    catalog = load_catalog(spec.parts.catalog)
    swing = assess(spec, catalog, topology, parts, samples=50)["metrics"]["swing_vpp"]
    data = spec_to_dict(spec)
    data["limits"] = {
        **{k: v for k, v in data["limits"].items() if v is not None and k != "thd_level"},
        "swing_min": 0.95 * swing,
    }
    near = assess(parse_spec(data), catalog, topology, parts, samples=50)
    assert any("swing_vpp is within" in note for note in near["cautions"])


@pytest.mark.skipif(shutil.which("ngspice") is None, reason="ngspice not installed: apt-get install ngspice")
def test_a_saturated_design_gets_no_rating_cautions_from_its_extrapolated_bias() -> None:
    """A divider too stiff for its collector resistor: ngspice (Debian) finds q1 saturated
    (Vce under 0.2 V, the collector current held by r_collector to a fifth of the model's
    active-region figure), so the model's 'not active' is right and the ratings it would run
    near (r_collector at several times its power rating) are figures of a bias the circuit
    does not have: the design says so instead of cautioning about them."""
    from optimizer.candidates import NOT_ACTIVE_CAUTION, assess, design_from_record
    from spice_harness import spice_operating_point

    spec = load_spec(SPECS[0])
    parts = {"r_top": 27e3, "r_bottom": 18e3, "r_collector": 8.2e3, "r_emitter": 220.0}
    record = assess(spec, load_catalog(spec.parts.catalog), "divider_ce", parts, samples=50)
    _, values, _, conditions = design_from_record(record)
    model = {**record["transistor"]["model"], "polarity": record["transistor"]["polarity"]}
    simulated = spice_operating_point("divider_ce", {r: float(v[0]) for r, v in values.items()}, model, conditions)
    assert simulated["v_collector"] - simulated["v_emitter"] < 0.2  # saturated in the simulator
    assert record["operating_point"]["active"] == 0.0 and record["operating_point"]["ic"] > 3 * simulated["ic"]
    assert NOT_ACTIVE_CAUTION in record["cautions"]
    assert not any("of its rating" in note for note in record["cautions"])


@pytest.mark.parametrize(
    "supply,gain,load,current,r_emitter_dc",
    [
        (12.0, 10.0, 47e3, 1e-3, 0.0),
        (9.0, 3.0, 10e3, 0.5e-3, 470.0),
        (24.0, 40.0, 2.2e3, 2e-3, 1e3),
        (5.0, 1.5, 100e3, 0.1e-3, 0.0),
        (15.0, 20.0, 600.0, 5e-3, 100.0),
    ],
)
def test_centred_collector_resistor_matches_a_bracketing_root_finder(supply, gain, load, current, r_emitter_dc) -> None:
    """The closed-form centre of the AC load line equals the root scipy.optimize.brentq (a
    general-purpose reference library) finds of the same centre condition."""
    from scipy.optimize import brentq

    from optimizer.synthesis import HandRequirements, centred_collector_resistor, parallel

    req = HandRequirements(supply=supply, gain=gain, load_impedance=load, collector_current=current)

    def centre(rc: float) -> float:  # Ic*Rac = Vce_q - Vce_sat, written out again
        rac = parallel(rc, load)
        return current * rac - (supply - current * (rc + rac / gain + r_emitter_dc) - req.vce_sat)

    rc, re_ac = centred_collector_resistor(req, r_emitter_dc)
    expected = brentq(centre, 1.0, supply / current, xtol=1e-9)
    assert rc == pytest.approx(expected, rel=1e-9)
    assert re_ac == pytest.approx(parallel(expected, load) / gain, rel=1e-9)
