"""A topology is one module: defining a Topology subclass registers it, and the spec, the
search, the netlist and `stagefit topologies` all take it from the registry."""

from __future__ import annotations

import json
from collections.abc import Iterator

import pytest

from optimizer.cli import EXIT_OK, main
from optimizer.netlist import candidate_netlist, designators, spice_netlist
from optimizer.search import search
from optimizer.spec import parse_spec
from optimizer.topologies import TOPOLOGIES, get_topology, unregister
from optimizer.topologies.base import Topology
from optimizer.topologies.divider_ce import DividerCE

SPEC = {
    "name": "toy",
    "supply": "12 V",
    "gain": {"target": -8, "tolerance": "1 dB"},
    "source_impedance": 600,
    "load_impedance": "47k",
    "band": ["20 Hz", "20 kHz"],
    "limits": {"swing_min": "4 V", "supply_current_max": "2 mA"},
    "parts": {"resistor_series": "E6", "resistor_range": ["1k", "100k"]},
    "robustness": "nominal",
    "search": {"trials": 128, "seed": 5, "batch_size": 64},
}


@pytest.fixture
def toy() -> Iterator[type[Topology]]:
    """A toy stage defined here, in this test module only: the divider_ce models under a new
    name, description and netlist template (nodes renamed), so the existing stage is the
    independent reference for what the search must find."""

    class ToyCE(DividerCE):
        name = "toy_ce"
        description = "toy: divider_ce under another name, for the registry test"
        order = 999
        elements = (
            ("c_in", "src", "b"),
            ("r_top", "vcc", "b"),
            ("r_bottom", "b", "0"),
            ("r_collector", "vcc", "c"),
            ("r_emitter", "e", "0"),
            ("c_out", "c", "out"),
        )
        transistor_pins = (("q1", "c", "b", "e"),)
        node_voltages = {"b": "v_base", "c": "v_collector", "e": "v_emitter"}

    try:
        yield ToyCE
    finally:
        unregister("toy_ce")
    assert "toy_ce" not in TOPOLOGIES


def test_a_topology_defined_in_a_test_is_registered_searched_netlisted_and_listed(
    toy: type[Topology], capsys: pytest.CaptureFixture[str]
) -> None:
    assert isinstance(get_topology("toy_ce"), toy)
    assert list(TOPOLOGIES)[-1] == "toy_ce"  # listed after the others (order 999)

    # searched: the spec accepts it, and the search finds what divider_ce's search finds
    # (same models, same seed): the existing stage is the reference
    ours = search(parse_spec({**SPEC, "topologies": ["toy_ce"]}), top=3)
    reference = search(parse_spec({**SPEC, "topologies": ["divider_ce"]}), top=3)
    assert ours.candidates and {c["topology"] for c in ours.candidates} == {"toy_ce"}
    assert len(ours.candidates) == len(reference.candidates)
    for a, b in zip(ours.candidates, reference.candidates):
        assert {r: p["value"] for r, p in a["parts"].items()} == {r: p["value"] for r, p in b["parts"].items()}
        assert a["metrics"] == b["metrics"] and a["feasible"] == b["feasible"]

    # netlisted: its own template, the same designators as the BOM's
    best = ours.candidates[0]
    text = candidate_netlist(best)
    assert "* topology: toy_ce" in text
    names = designators("toy_ce", {r: p["value"] for r, p in best["parts"].items()})
    assert f"{names['r_top']} vcc b " in text and f"{names['r_emitter']} e 0 " in text
    assert "Q1 c b e " in text
    assert text.replace(" b ", " base ").replace(" c ", " collector ").count("collector") >= 2

    # listed: `stagefit topologies` (table and JSON) reads the registry
    assert main(["topologies", "--format", "json"]) == EXIT_OK
    listed = {t["name"]: t for t in json.loads(capsys.readouterr().out)["topologies"]}
    assert listed["toy_ce"]["description"] == toy.description
    assert [r["name"] for r in listed["toy_ce"]["roles"]] == list(toy.resistors + toy.capacitors)
    assert listed["toy_ce"]["gain_sign"] == "inverting" and listed["toy_ce"]["polarities"] == ["npn", "pnp"]
    assert listed["toy_ce"]["supplies"] == ["positive", "negative", "split"]
    assert main(["topologies"]) == EXIT_OK
    assert "toy_ce: toy: divider_ce under another name" in capsys.readouterr().out


def test_an_unknown_topology_names_the_registered_ones(toy: type[Topology]) -> None:
    from optimizer.errors import InputError

    with pytest.raises(InputError, match="toy_ce"):
        parse_spec({**SPEC, "topologies": ["toy_c"]})
    with pytest.raises(InputError, match="toy_ce"):
        spice_netlist("no_such_stage", {}, {}, None)


def test_a_template_that_misses_a_role_is_refused_when_defined() -> None:
    with pytest.raises(TypeError, match="r_emitter"):

        class Broken(DividerCE):  # noqa: F841 (defining it is the test)
            name = "broken_ce"
            description = "a netlist template without r_emitter"
            elements = tuple(e for e in DividerCE.elements if e[0] != "r_emitter")

    assert "broken_ce" not in TOPOLOGIES


def test_headroom_is_the_least_vce_of_the_stage() -> None:
    import numpy as np

    from optimizer import physics

    op = {"vce": np.array([5.0, 1.0]), "vce2": np.array([2.0, 3.0])}
    # hand-computed: min(5, 2) - 0.2 - margin and min(1, 3) - 0.2 - margin
    expected = np.array([2.0, 1.0]) - 0.2 - physics.ACTIVE_MARGIN
    assert get_topology("ce_follower").headroom(op, 0.2) == pytest.approx(expected)
    assert get_topology("divider_ce").headroom(op, 0.2) == pytest.approx(op["vce"] - 0.2 - physics.ACTIVE_MARGIN)


def test_a_split_supply_needs_a_declared_way_to_bias() -> None:
    # "ground_base" (r_top left out, r_bottom to ground) needs both divider roles; "span" runs the
    # stage across the rails as it is and leaves nothing out (feedback_ce, biased from its collector)
    with pytest.raises(TypeError, match="split_bias"):

        class NoDivider(DividerCE):  # noqa: F841 (defining it is the test)
            name = "no_divider_ce"
            description = "a split supply without a divider"
            resistors = ("r_collector", "r_emitter")
            elements = tuple(e for e in DividerCE.elements if e[0] not in ("r_top", "r_bottom"))

    assert "no_divider_ce" not in TOPOLOGIES
    assert get_topology("feedback_ce").split_bias == "span" and get_topology("feedback_ce").split_omitted() == ()
    assert get_topology("feedback_pair").split_omitted() == ("r_top",)
    assert get_topology("feedback_ce").describe()["split_bias"] == "span"
