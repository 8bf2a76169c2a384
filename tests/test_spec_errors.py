"""Bad specs found by fuzzing: each is an input error naming the field, the value written and
what would be valid (exit code 2 from `stagefit check`), never an internal error."""

from __future__ import annotations

from pathlib import Path

import pytest

from optimizer.candidates import assess
from optimizer.catalog import load_catalog
from optimizer.cli import EXIT_BAD_INPUT, main
from optimizer.errors import InputError
from optimizer.spec import parse_spec

BASE = {"name": "t", "supply": "12 V", "gain": {"target": -10}, "load_impedance": "47k", "band": ["20 Hz", "20 kHz"]}
BASE_YAML = "name: t\nsupply: 12 V\ngain: {target: -10}\nload_impedance: 47k\nband: [20 Hz, 20 kHz]\n"


def check(tmp_path: Path, text: str, capsys: pytest.CaptureFixture[str], suffix: str = ".yaml") -> str:
    """The error `stagefit check` prints for a spec file holding ``text``; asserts exit code 2."""
    path = tmp_path / f"spec{suffix}"
    path.write_text(text, encoding="utf-8")
    assert main(["check", str(path)]) == EXIT_BAD_INPUT
    return capsys.readouterr().err


def only_problem(data: dict) -> str:
    """The one problem parse_spec finds in ``data``, as printed."""
    with pytest.raises(InputError) as info:
        parse_spec(data)
    assert len(info.value.problems) == 1, info.value
    return str(info.value.problems[0])


def test_integer_of_too_many_digits_is_bad_input(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    err = check(tmp_path, BASE_YAML + "search: {trials: " + "9" * 5000 + "}\n", capsys)
    assert ":6:" in err and "4300 digits" in err  # the line, and what is valid
    assert "internal error" not in err and "9" * 200 not in err  # the value abbreviated


@pytest.mark.parametrize(
    "supply, expected",
    [
        ("5 A", "got '5 A'; a voltage such as \"12 V\"; the unit 'A' is not understood here"),
        ("banana", "got 'banana'; a positive rail ('12 V'"),
        ([9, 12], "got [9, 12]; a positive rail ('12 V'"),
        (
            {"nominal": "9 V", "min": "10 V", "max": "8 V"},
            "got {'nominal': '9 V', 'min': '10 V', 'max': '8 V'}; min <=",
        ),
    ],
)
def test_invalid_supply_shows_the_value_written(supply: object, expected: str) -> None:
    shown = only_problem({**BASE, "supply": supply})
    assert shown.startswith(f"supply: {expected}"), shown


@pytest.mark.parametrize(
    "tolerance, reason",
    [("-1 dB", "must be above 0 dB"), (0, "must be above 0"), ("1000 dB", "20 dB or more excludes nothing")],
)
def test_invalid_gain_tolerance_names_value_and_reason(tolerance: object, reason: str) -> None:
    shown = only_problem({**BASE, "gain": {"target": -10, "tolerance": tolerance}})
    assert shown.startswith(f"gain.tolerance: got {tolerance!r}; ") and shown.endswith(reason), shown


@pytest.mark.parametrize("key", ["band", "supply", "gain"])
def test_missing_required_field_is_named_not_dumped(key: str) -> None:
    shown = only_problem({k: v for k, v in BASE.items() if k != key})
    assert shown.startswith(f"{key}: missing; a value is required here: "), shown
    assert "'name'" not in shown  # not the whole spec


@pytest.mark.parametrize(
    "text, suffix, where",
    [
        (BASE_YAML + "supply: 9 V\n", ".yaml", ":6:"),
        (
            '{"name": "t", "supply": "12 V", "gain": -10, "load_impedance": "47k", "band": [20, 2e4], "supply": 9}',
            ".json",
            "",
        ),
    ],
    ids=["yaml", "json"],
)
def test_key_given_twice_is_bad_input(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], text: str, suffix: str, where: str
) -> None:
    err = check(tmp_path, text, capsys, suffix)
    assert "'supply'" in err and "twice" in err and where in err, err


@pytest.mark.parametrize(
    "name, shown",
    [
        ("bad\u202eman", "U+202E"),
        ("nul\x00here", "U+0000"),
        ("bell\x07", "U+0007"),
        (b"hello", "a YAML or JSON string"),
    ],
)
def test_a_name_that_would_not_print_as_written_is_refused(name: object, shown: str) -> None:
    # a direction override (U+202E) would show other text than the stored one; a NUL is refused by
    # databases; YAML's !!binary gives bytes, no text
    with pytest.raises(InputError) as err:
        parse_spec({**BASE, "name": name})
    assert err.value.problems[0].where == "name" and shown in str(err.value)


def test_a_description_keeps_its_tabs_and_line_breaks() -> None:
    assert parse_spec({**BASE, "description": "two\nlines\tand a tab"}).description == "two\nlines\tand a tab"


def test_a_null_written_reads_null_and_a_part_left_out_reads_missing() -> None:
    # what the user wrote in YAML or JSON (null), and a part not given at all (missing), each named so
    with pytest.raises(InputError) as err:
        parse_spec({**BASE, "supply": None})
    assert "supply: got null;" in str(err.value)
    with pytest.raises(InputError) as err:
        assess(parse_spec(BASE), load_catalog("eseries_full"), "divider_ce", {"r_top": 47e3, "r_bottom": 10e3})
    assert "--set r_collector: missing;" in str(err.value)
