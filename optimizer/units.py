"""Engineering notation in and out: "4k7", "47k", "2.2u", "10 mA", "20 kHz", "-3 dB".

Parsing accepts plain numbers, SI prefixes, the RKM code of IEC 60062 (the prefix
letter, or R for ohms, stands for the decimal point: "4k7" = 4700, "4R7" = 4.7,
"R47" = 0.47, "2u2" = 2.2e-6) and an optional unit. Formatting writes values the way a
designer does: "68k", "4.7 µF", "10.5 mA".
"""

from __future__ import annotations

import math
import re

from optimizer.errors import InputError

PREFIXES = {
    "p": 1e-12,
    "n": 1e-9,
    "u": 1e-6,
    "µ": 1e-6,
    "μ": 1e-6,
    "m": 1e-3,
    "": 1.0,
    "k": 1e3,
    "K": 1e3,
    "M": 1e6,
    "meg": 1e6,
    "G": 1e9,
}
# unit name -> spellings accepted after the number
UNITS = {
    "V": ("V",),
    "A": ("A",),
    "Hz": ("Hz", "hz"),
    "ohm": ("Ω", "ohm", "ohms", "Ohm", "R"),
    "F": ("F",),
    "W": ("W",),
    "s": ("s",),
    "dB": ("dB", "db"),
    "°C": ("°C", "degC", "C"),
    "V/V": ("V/V",),
    "deg": ("deg", "°"),
}
_KIND = {
    "V": 'a voltage such as "12 V"',
    "A": 'a current such as "10 mA"',
    "Hz": 'a frequency such as "20 kHz"',
    "ohm": 'a resistance such as "4k7", "47k" or "1M"',
    "F": 'a capacitance such as "100n" or "2.2u"',
    "W": 'a power such as "0.25 W"',
    "s": 'a time such as "10 ms"',
    "dB": 'a level in dB such as "-3 dB"',
    "°C": 'a temperature such as "25 °C"',
    "V/V": "a ratio such as 10",
    "deg": 'an angle such as "45 deg"',
}
_PREFIX_RE = "meg|[pnuµμmkKMG]"
# re.ASCII: digits are 0-9 only (float() would also take Arabic-Indic or full-width digits)
_PLAIN = re.compile(rf"^([+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)\s*({_PREFIX_RE})?\s*(.*)$", re.ASCII)
_RKM = re.compile(rf"^([+-]?)(\d*)({_PREFIX_RE}|R)(\d+)\s*(.*)$", re.ASCII)
_FORMAT_PREFIXES = [(1e9, "G"), (1e6, "M"), (1e3, "k"), (1.0, ""), (1e-3, "m"), (1e-6, "µ"), (1e-9, "n"), (1e-12, "p")]
_SYMBOL = {"ohm": "Ω", "°C": "°C"}
_ASCII_SYMBOL = {"ohm": "ohm", "°C": "degC"}


def _expected(unit: str | None) -> str:
    return _KIND.get(unit or "", 'a number such as 4700, "4k7", "2.2u" or "10 mA"')


def _unit_matches(text: str, unit: str | None, rkm_r: bool) -> bool:
    if not text:
        return True
    if unit is None:
        return any(text in spellings for spellings in UNITS.values())
    return text in UNITS.get(unit, (unit,)) and not (rkm_r and unit != "ohm")


MILLI_OHM_HINT = "milli-ohm? write 1M or 1meg for megohm"


def parse_quantity(
    text: object,
    unit: str | None = None,
    *,
    where: str = "value",
    allow_negative: bool = False,
    allow_zero: bool = True,
) -> float:
    """The SI value of ``text`` (e.g. "4k7" -> 4700.0, "10 mA" -> 0.01 with unit "A").

    A unit in the text must be ``unit`` when that is given; dB values come back as the
    dB number. A resistance with the milli prefix ("1m") is refused: no stage part is a
    milliohm, and the writer almost always meant mega. Raises InputError naming ``where``,
    the text and what would be valid.
    """

    def fail(extra: str = "") -> InputError:
        return InputError.single(where, text, _expected(unit) + extra)

    if isinstance(text, bool) or text is None:
        raise fail()
    if isinstance(text, (int, float)):
        try:
            value = float(text)
        except OverflowError:  # an integer beyond any float
            raise fail("; it must be a finite number") from None
    else:
        raw = str(text).strip()
        rkm = _RKM.match(raw)
        if rkm and (rkm.group(2) or rkm.group(3) == "R" or rkm.group(3) in PREFIXES):
            sign, whole, letter, fraction, rest = rkm.groups()
            if not _unit_matches(rest.strip(), unit, letter == "R"):
                raise fail()
            if letter == "m" and unit == "ohm":
                raise fail(f"; {MILLI_OHM_HINT}")
            scale = 1.0 if letter == "R" else PREFIXES[letter]
            value = float(f"{sign}{whole or '0'}.{fraction}") * scale
        else:
            plain = _PLAIN.match(raw)
            if not plain:
                raise fail()
            number, prefix, rest = plain.groups()
            rest = rest.strip()
            if not _unit_matches(rest, unit, False):
                raise fail(f"; the unit {rest!r} is not understood here")
            if prefix == "m" and unit == "ohm":
                raise fail(f"; {MILLI_OHM_HINT}")
            value = float(number) * PREFIXES[prefix or ""]
    if not math.isfinite(value):
        raise fail("; it must be a finite number")
    if value < 0 and not allow_negative:
        raise fail("; it must not be negative")
    if value == 0 and not allow_zero:
        raise fail("; it must be above zero")
    return value


def _mantissa(value: float, digits: int) -> tuple[float, str]:
    magnitude = abs(value)
    for scale, prefix in _FORMAT_PREFIXES:
        if magnitude >= scale * (1 - 1e-12):
            return value / scale, prefix
    return value / 1e-12, "p"


def _digits(number: float, digits: int) -> str:
    text = f"{number:.{digits}g}"
    if "e" in text:
        text = f"{number:.{max(digits - 1, 0)}f}"
    return text.rstrip("0").rstrip(".") if "." in text else text


def format_value(value: float, unit: str = "", *, ascii: bool = False, digits: int = 3) -> str:
    """A value as a designer writes it: 68000 -> "68k", 4.7e-6 F -> "4.7 µF"
    ("4.7 uF" with ascii=True), 0.0105 A -> "10.5 mA"."""
    if value == 0:
        number, prefix = "0", ""
    else:
        mantissa, prefix = _mantissa(float(value), digits)
        mantissa = float(f"{mantissa:.{digits}g}")
        if abs(mantissa) >= 1000 and prefix != "G":  # rounding carried into the next prefix
            return format_value(float(f"{value:.{digits}g}"), unit, ascii=ascii, digits=digits)
        number = _digits(mantissa, digits)
    if ascii and prefix == "µ":
        prefix = "u"
    symbol = (_ASCII_SYMBOL if ascii else _SYMBOL).get(unit, unit)
    return f"{number} {prefix}{symbol}" if symbol else f"{number}{prefix}"


def format_rkm(value: float, digits: int = 3, *, ohms: bool = True) -> str:
    """RKM code of IEC 60062: 4700 -> "4k7", 4.7 -> "4R7", 0.47 -> "R47"; with
    ohms=False (capacitance) only prefix letters: 2.2e-6 -> "2u2", 1e-3 -> "1m"."""
    if value <= 0:
        raise InputError.single("value", value, "a positive value for an RKM code")
    if ohms and 1e-3 <= value < 1.0:  # R47: ohms below one keep R as the decimal point
        mantissa, prefix = value, ""
    else:
        mantissa, prefix = _mantissa(float(value), digits)
    letter = "R" if prefix == "" else ("u" if prefix == "µ" else prefix)
    text = _digits(float(f"{mantissa:.{digits}g}"), digits)
    whole, _, fraction = text.partition(".")
    if whole == "0":
        whole = ""
    if prefix != "" and not fraction:
        return f"{whole}{letter}"
    return f"{whole}{letter}{fraction}"
