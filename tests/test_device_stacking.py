"""Several devices in one model call (devices.stack_devices): each candidate takes its own
device's parameters, and the figures are those of a call per device. A stage model's figures
depend on the batch it is solved in only at the level of its iterations' stopping tests
(1e-12 relative: a Newton or corner loop runs until every candidate of the batch has
settled), so the comparison allows 1e-9; a device's parameters reaching another device's
candidate would be off by far more (the two devices differ by 30-100 % in every parameter)."""

from __future__ import annotations

from dataclasses import fields, replace

import numpy as np
import pytest

from optimizer.devices import JFET, device_columns, device_rows, is_stacked, stack_devices
from optimizer.search import (
    SearchSpace,
    create_search,
    evaluate_designs,
    evaluate_group,
    open_storage,
    run_search,
    study as study_module,
    with_search,
)
from optimizer.search.space import Design
from optimizer.sizing import size_capacitors
from optimizer.spec import load_spec
from optimizer.topologies import base, get_topology
from spice_designs import check_designs, direct_coupled_designs, jfet_check_designs, pair_designs, polarity_designs

RTOL = 1e-9


def _other(device):
    """A second device of the same kind and polarity, every model parameter moved (invented, for the test)."""
    if isinstance(device, JFET):
        return replace(
            device, id="other", BETA=device.BETA * 1.3, LAMBDA=device.LAMBDA * 2 + 1e-3, CGS=device.CGS * 1.5
        )
    return replace(
        device,
        id="other",
        IS=device.IS * 3.0,
        BF=device.BF * 0.6,
        hfe_min=device.hfe_min * 0.6,
        hfe_typ=device.hfe_typ * 0.6,
        hfe_max=device.hfe_max * 0.6,
        VAF=device.VAF * 0.5 if device.VAF else 40.0,
        RB=device.RB * 2.0 + 10.0,
        CJE=device.CJE * 1.5,
        CJC=device.CJC * 2.0,
        TF=device.TF * 1.7,
        vce_sat=device.vce_sat * 1.5,
    )


def _one_per_kind() -> list:
    seen, out = set(), []
    for d in check_designs() + pair_designs() + jfet_check_designs() + polarity_designs() + direct_coupled_designs():
        key = (d.topology, d.device.polarity, d.conditions.below_ground, "r_decouple" in d.parts)
        if key not in seen:
            seen.add(key)
            out.append(d)
    return out


def _close(got, want, what: str) -> None:
    got, want = np.asarray(got), np.asarray(want)
    if got.dtype == bool:
        np.testing.assert_array_equal(got, want, err_msg=what)
    else:
        np.testing.assert_allclose(got, want, rtol=RTOL, atol=0.0, equal_nan=True, err_msg=what)


@pytest.mark.parametrize("design", _one_per_kind(), ids=lambda d: d.name)
def test_stacked_devices_give_each_candidate_its_own_devices_figures(design) -> None:
    """evaluate (full metrics, the quasi-static THD's static transfer, the usable swing) of the
    design built with two devices, alternating, in one call against a call per device."""
    topology = get_topology(design.topology)
    devices = [design.device, _other(design.device)]
    which = np.array([0, 1, 1, 0, 1])
    parts = {role: np.full(which.size, float(v)) for role, v in design.parts.items()}
    stacked = topology.evaluate(parts, stack_devices(devices, which), design.conditions, full=True, thd_solve=True)
    for k, device in enumerate(devices):
        rows = np.flatnonzero(which == k)
        one = topology.evaluate(
            {r: v[rows] for r, v in parts.items()}, device, design.conditions, full=True, thd_solve=True
        )
        for part in ("metrics", "operating_point", "ratings"):
            for key, value in getattr(one, part).items():
                _close(getattr(stacked, part)[key][rows], value, f"{design.name} {part} {key} with {device.id}")
    # the two devices do differ: the comparison means something
    assert not np.allclose(stacked.operating_point["ic"][which == 0][0], stacked.operating_point["ic"][which == 1][0])


def test_a_large_stacked_pair_batch() -> None:
    """The feedback pair's solves go on with their unsettled elements alone once those are few
    (feedback_pair.COMPACT_SHARE): with two devices stacked, each element keeps its own device's
    figures there too (400 designs spread x0.5..x2 around a hand design, devices alternating)."""
    design = pair_designs()[0]
    topology = get_topology(design.topology)
    devices = [design.device, _other(design.device)]
    rng = np.random.default_rng(5)
    which = np.arange(400) % 2
    parts = {r: float(v) * np.exp(rng.uniform(-0.7, 0.7, which.size)) for r, v in design.parts.items()}
    stacked = topology.evaluate(parts, stack_devices(devices, which), design.conditions, thd_solve=True)
    for k, device in enumerate(devices):
        rows = np.flatnonzero(which == k)
        one = topology.evaluate({r: v[rows] for r, v in parts.items()}, device, design.conditions, thd_solve=True)
        for key in ("gain", "swing_vpp", "thd"):
            _close(stacked.metrics[key][rows], one.metrics[key], f"{key} with {device.id}")


def test_stacked_devices_across_chunks(monkeypatch) -> None:
    """A stacked device is cut with the candidates when a call runs in chunks."""
    design = check_designs()[0]
    topology = get_topology(design.topology)
    devices = [design.device, _other(design.device)]
    which = np.array([0, 1, 1, 0, 1, 0, 0])
    parts = {role: np.full(which.size, float(v)) for role, v in design.parts.items()}
    whole = topology.evaluate(parts, stack_devices(devices, which), design.conditions)
    monkeypatch.setattr(base, "CHUNK_FULL", 3)
    chunked = topology.evaluate(parts, stack_devices(devices, which), design.conditions)
    for key, value in whole.metrics.items():
        _close(chunked.metrics[key], value, f"chunked {key}")


def test_sizing_with_stacked_devices() -> None:
    """The capacitor sizing gives each candidate the values of its own device's sizing."""
    design = next(d for d in check_designs() if d.topology == "divider_ce")
    topology = get_topology(design.topology)
    devices = [design.device, _other(design.device)]
    which = np.array([1, 0, 1])
    resistors = {r: np.full(which.size, float(v)) for r, v in design.parts.items() if r.startswith("r_")}
    allowed = np.geomspace(1e-9, 1e-3, 61)
    stacked = size_capacitors(topology, resistors, stack_devices(devices, which), design.conditions, allowed)
    for k, device in enumerate(devices):
        rows = np.flatnonzero(which == k)
        one = size_capacitors(topology, {r: v[rows] for r, v in resistors.items()}, device, design.conditions, allowed)
        for cap, values in one.items():
            np.testing.assert_array_equal(stacked[cap][rows], values, err_msg=f"{cap} with {device.id}")


def test_device_helpers() -> None:
    device = check_designs()[0].device
    other = _other(device)
    stacked = stack_devices([device, other], np.array([1, 0, 1]))
    assert is_stacked(stacked) and not is_stacked(device)
    assert stacked.id == f"{device.id}+other"
    np.testing.assert_array_equal(stacked.RB, [other.RB, device.RB, other.RB])
    np.testing.assert_array_equal(stacked.inv_vaf, [other.inv_vaf, device.inv_vaf, other.inv_vaf])
    assert device_rows(stacked, np.array([1])).RB.tolist() == [device.RB]
    assert device_columns(stacked).CJC.shape == (3, 1)
    assert device_rows(device, np.array([1])) is device and device_columns(device) is device
    assert {f.name for f in fields(stacked)} == {f.name for f in fields(device)}
    for unlike in (replace(other, polarity="pnp"), replace(other, KF=1e-15)):  # another stack_key
        with pytest.raises(ValueError):
            stack_devices([device, unlike], np.array([0, 1]))
    no_early = stack_devices([device, replace(other, VAF=0.0)], np.array([0, 1]))
    assert no_early.inv_vaf.tolist() == [device.inv_vaf, 0.0]


@pytest.mark.parametrize("spec_name", ["contact_pickup_buffer", "geophone_jfet_buffer", "dc_coupled_sensor_split"])
def test_search_records_of_a_mixed_batch(spec_name: str, monkeypatch) -> None:
    """evaluate_designs stacks a topology's devices (one call per topology and kind of device),
    with the robustness screen judged per device: every record of a short search's batches as
    a call per (topology, device) gives it, and each names its own device."""
    spec = with_search(load_spec(f"specs/{spec_name}.yaml"), trials=400, seed=3)
    batches: list[list[Design]] = []

    def capturing(space: SearchSpace, designs: list[Design]) -> list[dict]:
        batches.append(list(designs))
        return evaluate_designs(space, designs)

    monkeypatch.setattr(study_module, "evaluate_designs", capturing)
    storage = open_storage(None)
    run_search(storage, create_search(spec, storage), finish=False)
    space = SearchSpace.build(spec)
    mixed = screened = 0
    for designs in batches:
        records = evaluate_designs(space, designs)
        for topology, device in {(d.topology, d.device) for d in designs}:
            members = [k for k, d in enumerate(designs) if (d.topology, d.device) == (topology, device)]
            mixed += len({d.device for d in designs if d.topology == topology}) > 1
            index = {r: np.array([dict(designs[k].parts)[r] for k in members]) for r, _ in designs[members[0]].parts}
            g = evaluate_group(space, topology, device, index)
            for j, k in enumerate(members):
                record = records[k]
                assert record["device"] == device
                _close(record["score"], g["score"][j], f"{topology} {device} score")
                _close(record["total_violation"], g["total"][j], f"{topology} {device} total violation")
                for name, value in g["metrics"].items():
                    if record["metrics"].get(name) is not None:
                        _close(record["metrics"][name], value[j], f"{topology} {device} {name}")
                for cap, value in g["caps"].items():
                    assert record["parts"][cap] == value[j]
                screened += record["metrics"].get("yield") is not None
    assert mixed and screened  # batches stacked several devices, and the screen judged some designs
