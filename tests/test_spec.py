"""Tests for the requirements spec layer (optimizer/spec.py)."""

from __future__ import annotations

import math
from pathlib import Path

import pytest

from optimizer.errors import InputError
from optimizer.spec import TOPOLOGY_NAMES, Spec, describe_spec, load_spec, parse_spec, spec_json_schema, spec_to_dict

ROOT = Path(__file__).resolve().parents[1]
EXAMPLES = sorted((ROOT / "specs").glob("*.yaml"))
BASE = {"name": "t", "supply": "12 V", "gain": {"target": -10}, "load_impedance": "47k", "band": ["20 Hz", "20 kHz"]}


def spec_with(**changes) -> dict:
    data = {**BASE, **changes}
    return {k: v for k, v in data.items() if v is not None}


def problems(data: dict) -> dict:
    with pytest.raises(InputError) as info:
        parse_spec(data)
    assert info.value.title.startswith("invalid spec")
    return {p.where: p for p in info.value.problems}


def test_at_least_five_examples_load():
    names = {p.stem for p in EXAMPLES}
    assert {
        "hydrophone_frontend",
        "battery_sensor_3v3",
        "line_driver_24v",
        "contact_pickup_buffer",
        "bench_stock_preamp",
    } <= names
    for path in EXAMPLES:
        spec = load_spec(path)
        assert isinstance(spec, Spec)
        assert 0.5 <= spec.gain.target <= 40  # from a follower buffer (just under 1) to a preamp
        assert spec.name in describe_spec(spec)


def test_engineering_notation_everywhere():
    spec = parse_spec(
        spec_with(
            source_impedance="4k7",
            load_capacitance="100p",
            limits={
                "input_impedance_min": "1M",
                "supply_current_max": "2 mA",
                "noise_ein_max": "2 uV",
                "thd_max": "1 %",
                "swing_min": "4 V",
            },
            parts={"resistor_range": ["100", "470k"], "capacitor_range": ["1n", "220u"]},
            search={"trials": "2k"},
        )
    )
    # "4k7" = 4.7 kohm (IEC 60062 RKM code, common practice)
    assert spec.source_impedance == pytest.approx(4700)
    assert spec.load_impedance == pytest.approx(47e3)
    assert spec.load_capacitance == pytest.approx(100e-12)
    assert spec.band == pytest.approx((20, 20e3))
    assert spec.limits.supply_current_max == pytest.approx(2e-3)
    assert spec.limits.thd_max == pytest.approx(0.01)
    assert spec.limits.thd_level == pytest.approx(2.0)  # default: half of swing_min
    assert spec.parts.capacitor_range == pytest.approx((1e-9, 220e-6))
    assert spec.search.trials == 2000


def test_defaults():
    spec = parse_spec(BASE)
    assert spec.temperature == (0.0, 50.0)
    assert spec.topologies == TOPOLOGY_NAMES
    assert spec.devices == ("npn-general",)
    assert spec.parts.resistor_series == "E24" and spec.parts.capacitor_series == "E6"
    assert spec.objective_directions == [("supply_current", "minimise"), ("swing_vpp", "maximise")]
    assert spec.limits.thd_level == 1.0


def test_gain_forms():
    signed = parse_spec(BASE).gain
    assert (signed.target, signed.inverting, signed.tolerance_db) == (10.0, True, 1.0)
    in_db = parse_spec(spec_with(gain={"target": "20 dB", "tolerance": 0.1})).gain
    # 20 dB = 10 V/V (definition of the decibel for voltage ratios)
    assert in_db.target == pytest.approx(10) and in_db.inverting is None
    assert in_db.tolerance_db == pytest.approx(20 * math.log10(1.1))
    assert parse_spec(spec_with(gain="26 dB")).gain_target_db == pytest.approx(26)


@pytest.mark.parametrize(
    "changes, where",
    [
        ({"band": ["20 kHz", "20 Hz"]}, "band"),
        ({"band": ["20 Hz", "20 V"]}, "band[1]"),
        ({"temperature": [50, 0]}, "temperature"),
        ({"gain": {"target": -10, "tolerance": "25 dB"}}, "gain.tolerance"),
        ({"gain": {"target": -10, "tolerance": 1.5}}, "gain.tolerance"),
        ({"gain": {"target": -10, "inverting": False}}, "gain.inverting"),
        ({"limits": {"swing_min": "15 V"}}, "limits.swing_min"),
        ({"limits": {"swing_min": "4 V", "thd_level": "6 V"}}, "limits.thd_level"),
        ({"parts": {"resistor_range": ["1M", "10"]}}, "parts.resistor_range"),
        ({"load_impedance": "47 V"}, "load_impedance"),
        ({"supply": "120 V"}, "supply"),
        ({"limits": {"swing_mn": "4 V"}}, "limits.swing_mn"),
        ({"topologies": ["divider_cee"]}, "topologies[0]"),
        ({"objectives": ["noise"]}, "objectives[0].metric"),
        ({"search": {"trials": 0}}, "search.trials"),
    ],
)
def test_error_paths(changes, where):
    found = problems(spec_with(**changes))
    assert where in found, found


def test_unknown_key_suggests_closest():
    problem = problems(spec_with(limits={"swing_mn": 4}))["limits.swing_mn"]
    assert "swing_min" in problem.expected and "thd_max" in problem.expected
    top = problems({**BASE, "suply": 12})["suply"]
    assert "'supply'" in top.expected


def test_all_problems_reported_at_once():
    with pytest.raises(InputError) as info:
        load_spec(ROOT / "tests" / "data" / "broken_spec.yaml")
    wheres = {p.where for p in info.value.problems}
    assert {"gain.tolerence", "load_impedance", "band", "limits.swing_min"} <= wheres
    assert "pydantic" not in str(info.value)


def test_bad_yaml_names_line(tmp_path):
    bad = tmp_path / "bad.yaml"
    bad.write_text("name: x\nsupply: [12 V\n")
    with pytest.raises(InputError) as info:
        load_spec(bad)
    assert ":3:" in info.value.problems[0].where or ":2:" in info.value.problems[0].where
    with pytest.raises(InputError):
        load_spec(tmp_path / "missing.yaml")


def test_round_trip():
    for path in EXAMPLES:
        spec = load_spec(path)
        assert parse_spec(spec_to_dict(spec)) == spec


def test_json_schema_accepts_examples():
    jsonschema = pytest.importorskip("jsonschema")
    import yaml

    schema = spec_json_schema()
    jsonschema.Draft202012Validator.check_schema(schema)
    validator = jsonschema.Draft202012Validator(schema)
    for path in EXAMPLES:
        validator.validate(yaml.safe_load(path.read_text()))
    assert not validator.is_valid({**BASE, "unknown": 1})


def test_supply_range_bare_number_assumes_five_percent():
    # +-5 % for an unstated regulated rail: common practice
    spec = parse_spec({**BASE, "supply": "12 V"})
    assert (spec.supply_min, spec.supply, spec.supply_max) == pytest.approx((11.4, 12.0, 12.6))
    assert spec.supply_range_assumed
    assert parse_spec(spec_to_dict(spec)) == spec


def test_supply_range_written_out_round_trips():
    spec = parse_spec(
        {
            **BASE,
            "supply": {"nominal": "9 V", "min": "6.5 V", "max": "9.6 V"},
            "supply_ripple": {"vpp": "20 mV", "frequency": "120 Hz"},
        }
    )
    assert (spec.supply_min, spec.supply, spec.supply_max) == (6.5, 9.0, 9.6)
    assert not spec.supply_range_assumed
    assert spec.supply_ripple.frequency == 120.0
    assert parse_spec(spec_to_dict(spec)) == spec


def test_supply_range_out_of_order_names_the_field():
    with pytest.raises(InputError) as err:
        parse_spec({**BASE, "supply": {"nominal": 12, "min": 13}})
    assert err.value.problems[0].where == "supply"


def test_robustness_defaults_to_yield_at_95_percent():
    spec = parse_spec(BASE)
    assert spec.robustness == "yield" and spec.limits.yield_min == 0.95
    with pytest.raises(InputError) as err:
        parse_spec({**BASE, "robustness": "typical"})
    assert err.value.problems[0].where == "robustness"


# --- supply arrangements (positive, negative, split) --------------------------------------


@pytest.mark.parametrize(
    "written, arrangement, span, rails",
    [
        ("12 V", "positive", (11.4, 12.0, 12.6), (12.0, 0.0)),
        ("-12 V", "negative", (11.4, 12.0, 12.6), (0.0, -12.0)),
        ({"nominal": "-12 V", "min": "-12.6 V", "max": "-11 V"}, "negative", (11.0, 12.0, 12.6), (0.0, -12.0)),
        ("+-12 V", "split", (22.8, 24.0, 25.2), (12.0, -12.0)),
        ("±15 V", "split", (28.5, 30.0, 31.5), (15.0, -15.0)),
        (
            {"positive": "12 V", "negative": {"nominal": -5, "min": -5.5, "max": -4.5}},
            "split",
            (15.9, 17.0, 18.1),
            (12.0, -5.0),
        ),
    ],
)
def test_supply_forms_give_span_arrangement_and_rails(written, arrangement, span, rails):
    # the span's range: both rails at their lowest magnitude together, then at their highest
    spec = parse_spec({**BASE, "supply": written})
    assert spec.supply_arrangement == arrangement
    assert (spec.supply_min, spec.supply, spec.supply_max) == pytest.approx(span)
    assert spec.rails == pytest.approx(rails)
    assert parse_spec(spec_to_dict(spec)) == spec  # the canonical form reads back


@pytest.mark.parametrize(
    "written, where, expected",
    [
        ({"nominal": -12, "min": -11}, "supply", "for a negative rail min is the most negative"),
        ({"positive": -3, "negative": -12}, "supply.positive", "above 0 V"),
        ({"positive": 12, "negative": 5}, "supply.negative", "below 0 V"),
        ({"positive": 12}, "supply", "both rails"),
        ({"positive": 12, "negative": {"nominal": -12, "min": 3}}, "supply.negative.min", "same sign"),
        ("abc", "supply", "a split supply ('+-12 V'"),
        ("0 V", "supply", "a negative rail ('-12 V'"),
    ],
)
def test_supply_form_errors_name_the_field(written, where, expected):
    with pytest.raises(InputError) as err:
        parse_spec({**BASE, "supply": written})
    problem = err.value.problems[0]
    assert problem.where == where and expected in problem.expected


def test_split_supply_below_ground_fraction():
    spec = parse_spec({**BASE, "supply": {"positive": "15 V", "negative": "-5 V"}})
    assert spec.supply_below_ground == pytest.approx(0.25)
    assert parse_spec({**BASE, "supply": "-9 V"}).supply_below_ground == 1.0
    assert parse_spec(BASE).supply_below_ground == 0.0
