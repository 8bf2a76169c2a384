"""What a search with no answer says about why: it never claims that relaxing one limit would
give an answer when every design misses three or more, a value reached is never shown equal to
the value asked, and an input impedance above every resistor the search may choose is named as
the range's doing, not the stage's."""

from __future__ import annotations

from optimizer.search import SearchSpace, relax_one_limit
from optimizer.spec import parse_spec

SPEC = {
    "name": "pickup",
    "supply": "15 V",
    "gain": {"target": -2, "tolerance": "1 dB"},
    "source_impedance": "10M",
    "load_impedance": "47k",
    "band": ["10 Hz", "50 kHz"],
    "limits": {"swing_min": "2.3 V", "input_impedance_min": "4.7M", "noise_ein_max": "5 uV"},
    "devices": ["SF-J1"],
}


def _missed(violations: dict[str, float], metrics: dict[str, float]) -> dict:
    return {
        "topology": "jfet_common_source",
        "device": "SF-J1",
        "parts": {},
        "feasible": False,
        "violations": violations,
        "total_violation": sum(violations.values()),
        "binding": max(violations, key=lambda k: violations[k]),
        "metrics": metrics,
    }


NEAREST = _missed(
    {"noise_ein_max": 56.6, "input_impedance_min": 0.79, "band_high": 0.9, "yield": 1.0},
    {"noise_ein_v": 288e-6, "input_impedance": 1e6, "f_high": 4.82e3},
)


def test_three_limits_missed_together_are_named_without_claiming_one_would_do() -> None:
    answer = relax_one_limit(parse_spec(SPEC), [NEAREST])
    # the nearest design's misses, the largest first; yield (spread) is left out as nominal misses
    assert answer["binding"] == ["noise_ein_max", "band_high", "input_impedance_min"]
    assert "relaxing it alone" not in answer["text"]
    assert answer["text"].startswith(
        "no design meets every limit, and every design evaluated misses three or more at once: the nearest misses "
        "noise_ein_max (the spec asks 5 µV; the nearest design reaches 288 µV), band_high"
    )


def test_a_value_reached_is_shown_with_the_digits_that_tell_it_from_the_limit() -> None:
    swing = _missed({"swing_min": 0.0003}, {"swing_vpp": 2.2993})
    text = relax_one_limit(parse_spec(SPEC), [swing])["text"]
    assert "swing_min (the spec asks 2.3 V; the nearest design reaches 2.299 V) binds" in text
    far = _missed({"swing_min": 0.5}, {"swing_vpp": 1.15})
    assert "the nearest design reaches 1.15 V)" in relax_one_limit(parse_spec(SPEC), [far])["text"]


def test_an_input_impedance_above_the_largest_resistor_names_the_range() -> None:
    spec = parse_spec(SPEC)  # resistor_range defaults to 10 ohm .. 1 Mohm
    zin = _missed({"input_impedance_min": 0.79}, {"input_impedance": 1e6})
    text = relax_one_limit(spec, [zin], resistors=SearchSpace.build(spec).resistors)["text"]
    assert "the input impedance asked (4.7 MΩ) is above the largest resistor the search may choose (1 MΩ)" in text, text
    assert "parts.resistor_range" in text
    wide = parse_spec({**SPEC, "parts": {"resistor_range": ["10", "10M"]}})
    assert "largest resistor" not in relax_one_limit(wide, [zin], resistors=SearchSpace.build(wide).resistors)["text"]
    # without the search space, the spec's range says the same
    assert "largest resistor the search may choose (1 MΩ)" in relax_one_limit(spec, [zin])["text"]
