"""When a capacitor's voltage rating is what stops a spec from having an answer, the message says
which part is rated too low, for what voltage, and what rating its value would need: a rating is
not a limit the user can relax."""

from __future__ import annotations

from optimizer.search import SearchSpace, relax_one_limit
from optimizer.spec import parse_spec

SPEC = {
    "name": "thirty",
    "supply": "30 V",  # +5 % by default: 31.5 V, past the shipped 35 V electrolytics' 28 V derated
    "gain": {"target": 5, "tolerance": "1.5 dB"},
    "source_impedance": "47k",
    "load_impedance": "100k",
    "band": ["5 Hz", "10 kHz"],
    "topologies": ["feedback_pair"],
}


def _missed(role: str, value: float, violation: float) -> dict:
    return {
        "topology": "feedback_pair",
        "parts": {role: value},
        "violations": {f"rating:v_{role}": violation},
        "metrics": {},
        "binding": f"rating:v_{role}",
    }


def test_a_capacitor_rated_too_low_names_its_part_and_the_rating_it_would_need() -> None:
    spec = parse_spec(SPEC)
    space = SearchSpace.build(spec)
    # 47 uF in the shipped eseries_full catalog: C-ALU-47u, 35 V; derated 0.8 x 35 = 28 V. A violation
    # of 0.125 is 28 x 1.125 = 31.5 V across it (the rail), which needs 31.5 / 0.8 = 39.375 V rated
    text = relax_one_limit(spec, [_missed("c_emitter2", 47e-6, 0.125)], space.capacitors)["text"]
    assert text.startswith("no design meets every limit; rating:v_c_emitter2 binds; ")
    assert "relax" not in text
    assert "c_emitter2 (47 µF) sees 31.5 V and its part C-ALU-47u is rated 35 V, 28 V at the 80 % derating" in text
    assert "a 47 µF part rated 39.4 V or more in the catalog would give an answer" in text


def test_no_capacitor_hint_for_other_limits_or_without_the_space() -> None:
    spec = parse_spec(SPEC)
    swing = {**_missed("c_out", 47e-6, 0.1), "violations": {"swing_min": 0.1}, "binding": "swing_min"}
    assert "rated" not in relax_one_limit(spec, [swing], SearchSpace.build(spec).capacitors)["text"]
    assert "rated" not in relax_one_limit(spec, [_missed("c_out", 47e-6, 0.125)])["text"]
