"""Engineering notation: parsing, RKM codes and designer-style formatting."""

from __future__ import annotations

import math

import pytest

from optimizer import eseries
from optimizer.errors import InputError
from optimizer.units import format_rkm, format_value, parse_quantity

# RKM examples of IEC 60062 (from memory): the letter marks the decimal point.
RKM_EXAMPLES = [
    ("R47", 0.47),
    ("4R7", 4.7),
    ("47R", 47.0),
    ("4k7", 4700.0),
    ("4K7", 4700.0),
    ("47k", 47e3),
    ("1M0", 1e6),
    ("2M2", 2.2e6),
    ("6n8", 6.8e-9),
    ("4u7", 4.7e-6),
    ("1p5", 1.5e-12),
    ("100n", 100e-9),
    ("2u2", 2.2e-6),
]


@pytest.mark.parametrize(("text", "value"), RKM_EXAMPLES)
def test_rkm_codes_of_iec_60062(text: str, value: float) -> None:
    assert parse_quantity(text) == pytest.approx(value, rel=1e-12)


@pytest.mark.parametrize(
    ("text", "unit", "value"),
    [
        ("47k", "ohm", 47e3),
        ("2.2u", "F", 2.2e-6),
        ("1M", "ohm", 1e6),
        ("10 mA", "A", 0.01),
        ("12 V", "V", 12.0),
        ("20 kHz", "Hz", 20e3),
        ("-3 dB", "dB", -3.0),
        ("47 kΩ", "ohm", 47e3),
        ("47kohm", "ohm", 47e3),
        ("4.7 uF", "F", 4.7e-6),
        ("0.25 W", "W", 0.25),
        ("1e3", None, 1e3),
        (4700, "ohm", 4700.0),
        ("1meg", "ohm", 1e6),
        ("50 °C", "°C", 50.0),
    ],
)
def test_si_prefixes_and_units(text: object, unit: str | None, value: float) -> None:
    assert parse_quantity(text, unit, allow_negative=True) == pytest.approx(value, rel=1e-12)


@pytest.mark.parametrize("text", ["12 Q", "k47k", "", None, float("nan"), math.inf, "12 V", "-47k", "4k7k"])
def test_bad_quantities_name_field_and_value(text: object) -> None:
    with pytest.raises(InputError) as caught:
        parse_quantity(text, "ohm", where="load_impedance")
    message = str(caught.value)
    shown = "null" if text is None else repr(text)  # a null written in YAML or JSON reads as null
    assert "load_impedance" in message and shown in message and "resistance" in message


def test_zero_rejected_when_asked() -> None:
    with pytest.raises(InputError):
        parse_quantity("0", "ohm", allow_zero=False)


@pytest.mark.parametrize(
    ("value", "unit", "ascii", "text"),
    [
        (68000, "", False, "68k"),
        (4700, "", False, "4.7k"),
        (1e6, "", False, "1M"),
        (4.7e-6, "F", False, "4.7 µF"),
        (4.7e-6, "F", True, "4.7 uF"),
        (0.0105, "A", False, "10.5 mA"),
        (470, "ohm", False, "470 Ω"),
        (470, "ohm", True, "470 ohm"),
        (0, "", False, "0"),
        (999.9, "", False, "1k"),
    ],
)
def test_format_value(value: float, unit: str, ascii: bool, text: str) -> None:
    assert format_value(value, unit, ascii=ascii) == text


@pytest.mark.parametrize(
    ("value", "text"),
    [(4700, "4k7"), (4.7, "4R7"), (0.47, "R47"), (68e3, "68k"), (1e6, "1M"), (2.2e-6, "2u2"), (47, "47R")],
)
def test_format_rkm(value: float, text: str) -> None:
    assert format_rkm(value) == text


def test_round_trip_over_e24_decades() -> None:
    for value in eseries.series_values("E24", 1.0, 10e6):
        assert parse_quantity(format_value(value)) == pytest.approx(value, rel=1e-9)
        assert parse_quantity(format_rkm(value)) == pytest.approx(value, rel=1e-9)
