"""When a bipolar follower's input impedance limit binds and the spec lists no JFET, the message
that says why the spec has no answer names the catalog's JFETs that would let jfet_follower
compete (a JFET's gate draws no base current: the megohm input a bipolar follower cannot give)."""

from __future__ import annotations

from optimizer.search import relax_one_limit, search
from optimizer.spec import parse_spec

SPEC = {
    "name": "t",
    "supply": "12 V",
    "gain": {"target": 1, "inverting": False, "tolerance": "3 dB"},
    "source_impedance": "1M",
    "load_impedance": "100k",
    "band": ["20 Hz", "20 kHz"],
    "limits": {"input_impedance_min": "50M"},
    "devices": ["npn-general"],
    "topologies": ["emitter_follower", "jfet_follower"],
    "robustness": "nominal",
}
MISSED = {
    "topology": "emitter_follower",
    "violations": {"input_impedance_min": 0.9},
    "metrics": {"input_impedance": 5e6},
    "binding": "input_impedance_min",
}


def test_a_follower_short_of_input_impedance_points_to_the_catalogs_jfets() -> None:
    text = relax_one_limit(parse_spec(SPEC), [MISSED])["text"]
    assert "input_impedance_min" in text
    assert "list SF-J1 or SF-J2 or SF-J3 in devices to let jfet_follower compete" in text  # eseries_full's JFETs
    assert "it also needs" not in text  # jfet_follower is in the spec and runs on a positive rail


def test_the_hint_says_what_else_the_jfet_follower_needs() -> None:
    spec = parse_spec({**SPEC, "supply": "+-12 V", "topologies": ["emitter_follower", "bootstrap_follower"]})
    text = relax_one_limit(spec, [MISSED])["text"]
    assert "(it also needs jfet_follower in topologies and a positive supply" in text


def test_no_hint_with_a_jfet_listed_another_limit_or_a_common_emitter() -> None:
    listed = parse_spec({**SPEC, "devices": ["npn-general", "SF-J1"]})
    assert "SF-J" not in relax_one_limit(listed, [MISSED])["text"]
    swing = {**MISSED, "violations": {"swing_min": 0.2}, "binding": "swing_min"}
    assert "SF-J" not in relax_one_limit(parse_spec(SPEC), [swing])["text"]
    inverting = parse_spec({**SPEC, "gain": -10, "topologies": ["divider_ce"]})
    assert "SF-J" not in relax_one_limit(inverting, [{**MISSED, "topology": "divider_ce"}])["text"]


def test_a_search_short_of_input_impedance_suggests_a_jfet() -> None:
    # a 50 Mohm input from a bipolar follower with no bootstrap: nothing meets it, the search says why
    spec = parse_spec({**SPEC, "topologies": ["emitter_follower"], "search": {"trials": 64, "seed": 1}})
    result = search(spec, top=1)
    assert not result.candidates[0]["feasible"]
    assert "to let jfet_follower compete (it also needs jfet_follower in topologies)" in result.infeasible["text"]


def test_a_gain_lost_to_a_high_impedance_source_points_to_the_jfet_common_source() -> None:
    # -5 V/V from a 1 Mohm source on 5 V: a bipolar stage's 60 kohm input takes 94 % of the signal
    spec = parse_spec({**SPEC, "supply": "5 V", "gain": -5, "limits": {}, "topologies": ["divider_ce"]})
    lost = {
        "topology": "divider_ce",
        "violations": {"gain": 12.0},
        "metrics": {"input_impedance": 60e3, "gain_db": -1.2},
        "binding": "gain",
    }
    text = relax_one_limit(spec, [lost])["text"]
    assert "the 1 MΩ source against the nearest design's 60 kΩ input impedance costs most of the gain" in text
    assert "to let jfet_common_source compete (it also needs jfet_common_source in topologies)" in text
    # a stage whose input is well above the source: the gain is its own doing, no hint
    stiff = {**lost, "metrics": {"input_impedance": 5e6, "gain_db": -1.2}}
    assert "SF-J" not in relax_one_limit(spec, [stiff])["text"]
