"""The requirements spec: what a designer asks of one transistor stage.

A spec is written in YAML or JSON with engineering notation in every numeric field
("12 V", "47k", "20 kHz", "1 %"). :func:`parse_spec` validates it (pydantic v2) into a
frozen :class:`Spec` holding SI floats (temperatures in °C); every problem found is
reported together in one :class:`~optimizer.errors.InputError` titled "invalid spec",
each naming the dotted field path, the value given and what would be valid.
"""

from __future__ import annotations

import difflib
import hashlib
import json
import math
import re
from pathlib import Path
from typing import Annotated, Any, Callable, Literal

from pydantic import (
    BaseModel,
    BeforeValidator,
    ConfigDict,
    Field,
    ValidationError,
    ValidationInfo,
    WithJsonSchema,
    field_validator,
    model_validator,
)

from optimizer.errors import MISSING, InputError, Problem
from optimizer.eseries import SERIES
from optimizer.limits import MAX_BATCH, MAX_DESCRIPTION, MAX_NAME, MAX_SAMPLES, MAX_TOP, MAX_TRIALS  # noqa: F401 (re-exported)
from optimizer.metrics import METRICS
from optimizer.topologies import TOPOLOGIES
from optimizer.units import format_value, parse_quantity

TOPOLOGY_NAMES = tuple(TOPOLOGIES)  # the registered topologies when the package loads: the default list

#: Each objective metric with the direction that improves it (from the metrics table).
METRIC_DIRECTIONS = {m.key: m.direction for m in METRICS if m.direction}
DIRECTION_ALIASES = {
    "minimise": "minimise",
    "minimize": "minimise",
    "min": "minimise",
    "maximise": "maximise",
    "maximize": "maximise",
    "max": "maximise",
}
NOMINAL_TEMPERATURE_C = 27.0
DEFAULT_SUPPLY_TOLERANCE = 0.05  # a bare supply voltage is taken as +-5 % (common practice for a regulated rail)
ROBUSTNESS_BASES = ("yield", "worst_case", "nominal")
SUPPLY_CURRENT_BOUND = 1.0  # A: far above any small-signal stage; a larger limit is a unit slip ("3 MA")
_TITLE = "invalid spec"
_JSON_SCHEMA_DRAFT = "https://json-schema.org/draft/2020-12/schema"


# --- field types ---------------------------------------------------------------------


def _percent_or_fraction(value: object, where: str) -> float:
    """A fraction given as a number (0.01) or a percentage ("1 %")."""
    if isinstance(value, str) and value.strip().endswith("%"):
        return parse_quantity(value.strip()[:-1], None, where=where) / 100.0
    return parse_quantity(value, None, where=where)


def _quantity(
    unit: str | None,
    *,
    optional: bool = False,
    allow_negative: bool = False,
    allow_zero: bool = False,
    maximum: float | None = None,
    percent: bool = False,
    example: str = "",
    hint: str = "",
) -> Any:
    """An annotated float field read from engineering notation in ``unit``."""

    def parse(value: object) -> float | None:
        if value is None and optional:
            return None
        if isinstance(value, bool) or not isinstance(value, (str, int, float)):
            raise ValueError(f"a number or a quantity such as {example!r}")
        number = (
            _percent_or_fraction(value, "")
            if percent
            else parse_quantity(value, unit, where="", allow_negative=allow_negative, allow_zero=allow_zero)
        )
        if not allow_zero and number == 0:
            raise ValueError(f"a value above 0, such as {example!r}")
        if maximum is not None and number > maximum:
            raise ValueError(f"at most {format_value(maximum, unit or '')}{hint}")
        return number

    what = f"in {unit}" if unit else "a fraction, or a percentage like '1 %'"
    alternatives: list[dict] = [{"type": "number"}, {"type": "string"}]
    if optional:
        alternatives.append({"type": "null"})
    schema = {"anyOf": alternatives, "description": f"{what}; engineering notation accepted, e.g. {example!r}"}
    return Annotated[float | None if optional else float, BeforeValidator(parse), WithJsonSchema(schema)]


def _count(minimum: int, maximum: int, example: str) -> Any:
    """An integer field that also accepts engineering notation ("2k")."""

    def parse(value: object) -> int:
        if isinstance(value, bool) or not isinstance(value, (str, int, float)):
            raise ValueError(f"a whole number from {minimum} to {maximum}")
        number = parse_quantity(value, None, where="", allow_negative=True)
        if number != int(number) or not minimum <= number <= maximum:
            raise ValueError(f"a whole number from {minimum} to {maximum}")
        return int(number)

    schema = {
        "anyOf": [{"type": "integer", "minimum": minimum, "maximum": maximum}, {"type": "string"}],
        "description": f"whole number {minimum}..{maximum}, e.g. {example!r}",
    }
    return Annotated[int, BeforeValidator(parse), WithJsonSchema(schema)]


def _choice(choices: tuple[str, ...] | Callable[[], tuple[str, ...]], label: str) -> Callable[[object], str]:
    """A validator accepting one of ``choices`` (case-insensitive), suggesting the closest;
    ``choices`` may be a function giving them (read at each validation: a registry)."""

    def pick(value: object) -> str:
        allowed = choices() if callable(choices) else choices
        by_key = {a.lower(): a for a in allowed}
        if isinstance(value, str) and value.strip().lower() in by_key:
            return by_key[value.strip().lower()]
        raise ValueError(f"one of {', '.join(allowed)}{_suggestion(value, allowed)}")

    pick.__doc__ = f"Validate a {label}."
    return pick


def _suggestion(value: object, allowed: tuple[str, ...] | list[str]) -> str:
    close = difflib.get_close_matches(str(value), list(allowed), n=1, cutoff=0.5)
    return f" (did you mean {close[0]!r}?)" if close else ""


Ohm = _quantity("ohm", example="47k")
Farad = _quantity("F", allow_zero=True, example="100p")
Hertz = _quantity("Hz", example="20 kHz")
Celsius = _quantity("°C", allow_negative=True, allow_zero=True, example="50 °C")
Series = Annotated[
    str, BeforeValidator(_choice(SERIES, "preferred-number series")), WithJsonSchema({"enum": list(SERIES)})
]


class _RegisteredTopologies:
    """JSON Schema of a topology name: an enum of the topologies registered when the schema is made."""

    def __get_pydantic_json_schema__(self, core_schema: Any, handler: Any) -> dict:
        return {"enum": list(TOPOLOGIES)}


Topology = Annotated[str, BeforeValidator(_choice(lambda: tuple(TOPOLOGIES), "topology")), _RegisteredTopologies()]


def _ordered(low: float, high: float, label: str, unit: str, strict: bool) -> None:
    """Raise unless low < high (strict) or low <= high."""
    if low > high or (strict and low == high):
        word = "below" if strict else "at most"
        raise ValueError(
            f"[low, high] with low {word} high ({label}, {unit}); "
            f"got {format_value(low, unit)} .. {format_value(high, unit)}"
        )


class _Section(BaseModel):
    """Base of every spec section: frozen, unknown keys forbidden."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    @classmethod
    def input_keys(cls) -> tuple[str, ...]:
        """The keys a user may write in this section."""
        return tuple(cls.model_fields)


# --- sections ------------------------------------------------------------------------


class Gain(_Section):
    """Required voltage gain, source to load: magnitude (V/V), sign and tolerance (dB).

    Users write ``target`` as signed V/V (-10: inverting) or in dB ("20 dB"), with
    ``inverting: true|false|null`` when giving a magnitude (null = either sign), and
    ``tolerance`` in dB ("1 dB") or as a fraction (0.1, "10 %"); default 1 dB. A fraction f
    becomes 20*log10(1+f) dB, the symmetric dB window inside target*(1 +- f).
    """

    target: float = Field(description="gain magnitude, V/V")
    inverting: bool | None = Field(None, description="true: output inverted; null: either")
    tolerance_db: float = Field(1.0, description="allowed gain error, +- dB")

    @classmethod
    def input_keys(cls) -> tuple[str, ...]:
        return ("target", "tolerance", "tolerance_db", "inverting")

    @model_validator(mode="before")
    @classmethod
    def _normalise(cls, data: object) -> object:
        if not isinstance(data, dict):
            data = {"target": data}
        data = dict(data)
        problems: list[Problem] = []
        if "tolerance" in data and "tolerance_db" in data:
            problems.append(Problem("tolerance", data["tolerance"], "either tolerance or tolerance_db, not both"))
        elif "tolerance" in data or "tolerance_db" in data:
            key = "tolerance" if "tolerance" in data else "tolerance_db"
            written = data.pop(key)
            try:
                data["tolerance_db"] = _tolerance_db(written, in_db=key == "tolerance_db")
            except (InputError, ValueError) as exc:
                problems.append(Problem(key, written, _expected(exc)))
        if "target" in data:
            raw = data["target"]
            try:
                signed, in_db = _gain_target(raw)
                if "inverting" not in data:
                    data["inverting"] = None if in_db else signed < 0
                elif signed < 0 and data["inverting"] is not True:
                    problems.append(
                        Problem(
                            "inverting",
                            data["inverting"],
                            "true, or omit it: a negative target already means an inverting stage",
                        )
                    )
                data["target"] = abs(signed)
            except (InputError, ValueError) as exc:
                problems.append(Problem("target", raw, _expected(exc)))
        if problems:
            raise InputError(problems, _TITLE)
        return data

    @classmethod
    def __get_pydantic_json_schema__(cls, core_schema: Any, handler: Any) -> dict:
        number_or_text = {"anyOf": [{"type": "number"}, {"type": "string"}]}
        written = {
            "type": "object",
            "additionalProperties": False,
            "required": ["target"],
            "properties": {
                "target": {**number_or_text, "description": "signed V/V (-10) or dB ('20 dB')"},
                "tolerance": {**number_or_text, "description": "'1 dB', or a fraction (0.1) or '10 %'"},
                "tolerance_db": {"type": "number", "description": "+- dB"},
                "inverting": {"type": ["boolean", "null"]},
            },
        }
        return {
            "title": "Gain",
            "anyOf": [{"type": "number"}, {"type": "string"}, written],
            "description": (cls.__doc__ or "").split("\n")[0],
        }


def _gain_target(raw: object) -> tuple[float, bool]:
    """Signed gain in V/V from a number or text, and whether it was given in dB."""
    if isinstance(raw, bool) or not isinstance(raw, (str, int, float)):
        raise ValueError("a gain in V/V (e.g. -10) or in dB (e.g. '20 dB')")
    in_db = isinstance(raw, str) and raw.strip().lower().endswith("db")
    if in_db:
        signed = 10 ** (parse_quantity(raw, "dB", where="", allow_negative=True) / 20)
    else:
        signed = parse_quantity(raw, "V/V", where="", allow_negative=True)
    if signed == 0:
        raise ValueError("a non-zero gain, e.g. -10 or '20 dB'")
    return signed, in_db


def _tolerance_db(raw: object, *, in_db: bool) -> float:
    """Gain tolerance in dB from '1 dB', a number of dB, or a fraction (0.1, '10 %')."""
    expected = "a tolerance above 0 and below 20 dB ('1 dB'), or a fraction above 0 and below 1 (0.1)"
    if isinstance(raw, bool) or not isinstance(raw, (str, int, float)):
        raise ValueError(expected)
    if in_db or (isinstance(raw, str) and raw.strip().lower().endswith("db")):
        tol = parse_quantity(raw, "dB", where="", allow_negative=True)
    else:
        fraction = _percent_or_fraction(raw, "")
        if fraction <= 0:
            raise ValueError(f"{expected}; a tolerance must be above 0")
        if fraction >= 1:
            raise ValueError(f"{expected}; a fraction of 1 or more lets the gain reach 0")
        tol = 20 * math.log10(1 + fraction)
    if tol <= 0:
        raise ValueError(f"{expected}; a tolerance must be above 0 dB")
    if tol >= 20:
        raise ValueError(f"{expected}; 20 dB or more excludes nothing")
    return tol


class Limits(_Section):
    """Hard limits the built stage must meet; each optional."""

    input_impedance_min: _quantity("ohm", optional=True, example="100k") = None
    output_impedance_max: _quantity("ohm", optional=True, example="1k") = None
    swing_min: _quantity("V", optional=True, example="4 V") = Field(
        None,
        description="V peak-to-peak at the load, judged on the usable swing: the largest sine whose "
        "two peaks stay within 10 % of the linear gain times the drive",
    )
    supply_current_max: _quantity(
        "A",
        optional=True,
        maximum=SUPPLY_CURRENT_BOUND,
        example="2 mA",
        hint=" (a small-signal stage draws mA; M is mega, m is milli)",
    ) = None
    thd_max: _quantity(None, optional=True, percent=True, maximum=1.0, example="1 %") = None
    thd_level: _quantity("V", optional=True, example="2 V") = Field(
        None,
        description="output V peak-to-peak at which THD is judged; "
        "default half of swing_min, else 1 V, and at most half the supply",
    )
    noise_ein_max: _quantity("V", optional=True, example="2 uV") = Field(
        None, description="equivalent input noise, V rms over the band"
    )
    psrr_min_db: _quantity("dB", optional=True, example="40 dB") = Field(
        None, description="least supply rejection (dB, supply ripple to load) at the ripple frequency and at mid-band"
    )
    phase_margin_min_deg: _quantity("deg", optional=True, maximum=180.0, example="45 deg") = Field(
        45.0,
        description="least phase margin (degrees) of a stage's overall feedback loop; 45 degrees is "
        "common practice (little peaking); null: not judged. Stages without such a loop "
        "are not judged",
    )
    yield_min: _quantity(None, percent=True, maximum=1.0, example="95 %") = Field(
        0.95, description="fraction of Monte Carlo builds that must meet every hard limit (robustness: yield)"
    )

    @model_validator(mode="after")
    def _thd_level(self) -> "Limits":
        if self.thd_level is None:
            default = self.swing_min / 2 if self.swing_min is not None else 1.0
            object.__setattr__(self, "thd_level", default)
        elif self.swing_min is not None and self.thd_level > self.swing_min:
            raise InputError.single(
                "thd_level",
                self.thd_level,
                f"at most swing_min ({format_value(self.swing_min, 'V')} peak-to-peak)",
                _TITLE,
            )
        return self


class Ripple(_Section):
    """Ripple on the supply rail: peak-to-peak volts at one frequency (Hz)."""

    vpp: _quantity("V", example="50 mV") = Field(description="V peak-to-peak on the rail")
    frequency: _quantity("Hz", example="100 Hz") = Field(100.0, description="Hz")


class Parts(_Section):
    """Where part values come from: catalog, series, stock and value ranges."""

    catalog: str = "eseries_full"
    resistor_series: Series = "E24"
    capacitor_series: Series = "E6"
    in_stock_only: bool = False
    resistor_range: tuple[Ohm, Ohm] = Field((10.0, 1e6), description="[low, high] ohm")
    capacitor_range: tuple[Farad, Farad] = Field((10e-12, 1000e-6), description="[low, high] F")
    prefer_reuse: bool = False
    allow_class2_coupling: bool = Field(
        False,
        description="true: class-2 ceramics (X7R, X5R, Y5V) may be chosen for capacitors in the signal "
        "path (the BOM then cautions); false: film, C0G or electrolytic only",
    )

    @field_validator("resistor_range", "capacitor_range")
    @classmethod
    def _range_order(cls, value: tuple[float, float], info: ValidationInfo) -> tuple[float, float]:
        unit = "ohm" if info.field_name == "resistor_range" else "F"
        _ordered(*value, str(info.field_name), unit, strict=False)
        return value


def _objective_input(value: object) -> object:
    return {"metric": value} if isinstance(value, str) else value


class Objective(_Section):
    """One objective: a metric name and its direction (implied by the metric if omitted)."""

    metric: Annotated[str, BeforeValidator(_choice(tuple(METRIC_DIRECTIONS), "metric"))]
    direction: Annotated[
        str | None, BeforeValidator(lambda v: v if v is None else _choice(tuple(DIRECTION_ALIASES), "direction")(v))
    ] = None

    @model_validator(mode="after")
    def _direction(self) -> "Objective":
        implied = METRIC_DIRECTIONS[self.metric]
        object.__setattr__(self, "direction", DIRECTION_ALIASES[self.direction or implied])
        return self


ObjectiveItem = Annotated[
    Objective,
    BeforeValidator(_objective_input),
    WithJsonSchema(
        {
            "anyOf": [
                {"enum": list(METRIC_DIRECTIONS)},
                {
                    "type": "object",
                    "additionalProperties": False,
                    "required": ["metric"],
                    "properties": {
                        "metric": {"enum": list(METRIC_DIRECTIONS)},
                        "direction": {"enum": ["minimise", "maximise", "minimize", "maximize"]},
                    },
                },
            ]
        }
    ),
]


class Search(_Section):
    """Search budget, reproducibility, and whether capacitors are searched or sized."""

    trials: _count(1, MAX_TRIALS, "2k") = 2000
    seed: _count(0, 2**32 - 1, "0") = 0
    batch_size: _count(1, MAX_BATCH, "64") = Field(
        64,
        description="designs per model call: a batch asks this many trials for each topology-device "
        "pair the search offers, at most a thirty-second of the trials and never fewer than this",
    )
    capacitors: Literal["sized", "searched"] = Field(
        "sized",
        description="sized: the smallest series values meeting the band's low corner, chosen "
        "after the resistors; searched: capacitor values are search parameters too",
    )


def _unique(values: tuple, label: str) -> tuple:
    if not values:
        raise ValueError(f"at least one {label}")
    keys = [v.metric if isinstance(v, Objective) else v for v in values]
    repeated = sorted({k for k in keys if keys.count(k) > 1})
    if repeated:
        raise ValueError(f"each {label} once; repeated: {', '.join(repeated)}")
    return values


SUPPLY_INTERNAL = ("supply_min", "supply_max", "supply_range_assumed", "supply_arrangement", "supply_negative")
_SUPPLY_FORMS = (
    "a positive rail ('12 V' or {nominal, min, max}), a negative rail ('-12 V' or {nominal: -12 V, "
    "min: -12.6 V, max: -11.4 V}) or a split supply ('+-12 V' or {positive: 12 V, negative: -12 V})"
)


def _rail(raw: object, where: str) -> tuple[float, float | None, float | None]:
    """One rail as written: a voltage or {nominal, min, max}; (nominal, min, max) in true
    (signed) volts, min and max None when not given. InputError naming ``where``."""
    if isinstance(raw, dict):
        unknown = [k for k in raw if k not in ("nominal", "min", "max")]
        if unknown or "nominal" not in raw:
            raise InputError.single(
                where, raw, "a voltage or {nominal, min, max} with nominal given (min and max default to -+5 %)", _TITLE
            )
        values = [raw.get(k) for k in ("nominal", "min", "max")]
    else:
        values = [raw, None, None]
    out: list[float | None] = []
    for key, value in zip(("", ".min", ".max"), values):
        if value is None:
            out.append(None)
            continue
        if isinstance(value, bool) or not isinstance(value, (str, int, float)):
            raise InputError.single(where + key, value, "a voltage such as '12 V' or '-12 V'", _TITLE)
        try:
            out.append(parse_quantity(value, "V", where=where + key, allow_negative=True))
        except InputError as exc:
            raise InputError([Problem(where + key, value, _expected(exc))], _TITLE) from None
    nominal, low, high = out
    if nominal is None:
        raise InputError.single(where, raw, "a voltage, or {nominal, min, max} with a nominal voltage", _TITLE)
    if nominal == 0:
        raise InputError.single(where, raw, "a rail voltage other than 0 V", _TITLE)
    for key, value in ((".min", low), (".max", high)):
        if value is not None and (value > 0) != (nominal > 0):
            raise InputError.single(where + key, value, f"the same sign as the nominal {nominal:g} V", _TITLE)
    if not (low if low is not None else nominal) <= nominal <= (high if high is not None else nominal):
        raise InputError.single(
            where,
            raw,
            "min <= nominal <= max in true volts (for a negative rail min is the "
            "most negative, e.g. {nominal: -12 V, min: -12.6 V, max: -11.4 V})",
            _TITLE,
        )
    return nominal, low, high


class _SupplyProblem:
    """A supply that could not be read, carried to the supply field so that its problem is
    reported together with the spec's others."""

    def __init__(self, error: InputError) -> None:
        self.error = error


def _read_supply(raw: object) -> dict[str, Any]:
    """The spec's supply fields from its written form (see :data:`_SUPPLY_FORMS`): supply,
    supply_min, supply_max (the span, V; None = nominal -+5 %), supply_range_assumed,
    supply_arrangement and, for a split supply, supply_negative (nominal, min, max; V)."""
    text = raw.strip() if isinstance(raw, str) else ""
    prefix = next((p for p in ("+/-", "+-", "±") if text.startswith(p)), None)
    if prefix:
        text = text[len(prefix) :]
        magnitude = _rail(text.strip(), "supply")[0]
        if magnitude <= 0:
            raise InputError.single("supply", raw, "a split supply written '+-12 V' (a positive magnitude)", _TITLE)
        raw = {"positive": magnitude, "negative": -magnitude}
    if isinstance(raw, dict) and ("positive" in raw or "negative" in raw):
        unknown = [k for k in raw if k not in ("positive", "negative")]
        if unknown or not {"positive", "negative"} <= set(raw):
            raise InputError.single(
                "supply",
                raw,
                "a split supply {positive: 12 V, negative: -12 V} with both rails and no other key",
                _TITLE,
            )
        pos, neg = _rail(raw["positive"], "supply.positive"), _rail(raw["negative"], "supply.negative")
        if pos[0] < 0:
            raise InputError.single("supply.positive", raw["positive"], "a voltage above 0 V, e.g. '12 V'", _TITLE)
        if neg[0] > 0:
            raise InputError.single("supply.negative", raw["negative"], "a voltage below 0 V, e.g. '-12 V'", _TITLE)
        assumed = all(r[1] is None and r[2] is None for r in (pos, neg))
        tol = 1.0 - DEFAULT_SUPPLY_TOLERANCE, 1.0 + DEFAULT_SUPPLY_TOLERANCE
        pos_range = (
            pos[1] if pos[1] is not None else pos[0] * tol[0],
            pos[2] if pos[2] is not None else pos[0] * tol[1],
        )
        neg_range = (
            neg[1] if neg[1] is not None else neg[0] * tol[1],
            neg[2] if neg[2] is not None else neg[0] * tol[0],
        )
        return {
            "supply": pos[0] - neg[0],
            "supply_min": pos_range[0] - neg_range[1],
            "supply_max": pos_range[1] - neg_range[0],
            "supply_range_assumed": assumed,
            "supply_arrangement": "split",
            "supply_negative": (neg[0], *neg_range),
        }
    if isinstance(raw, (dict, str, int, float)) and not isinstance(raw, bool):
        try:
            nominal, low, high = _rail(raw, "supply")
        except InputError as exc:
            problem = exc.problems[0]
            # a reason after "; " is the reader's (a unit that is no voltage, a number not
            # finite) and stands; a value not read at all, or 0 V, is told the supply's forms
            if problem.where == "supply" and not isinstance(raw, dict) and "; " not in problem.expected:
                raise InputError.single("supply", raw, _SUPPLY_FORMS, _TITLE) from None
            raise
        if nominal > 0:
            return {
                "supply": nominal,
                "supply_min": low,
                "supply_max": high,
                "supply_range_assumed": low is None and high is None,
                "supply_arrangement": "positive",
            }
        return {
            "supply": -nominal,
            "supply_min": None if high is None else -high,
            "supply_max": None if low is None else -low,
            "supply_range_assumed": low is None and high is None,
            "supply_arrangement": "negative",
        }
    raise InputError.single("supply", raw, _SUPPLY_FORMS, _TITLE)


class Spec(_Section):
    """A validated requirements spec; SI floats throughout, temperatures in °C."""

    @classmethod
    def input_keys(cls) -> tuple[str, ...]:
        return tuple(k for k in cls.model_fields if k not in SUPPLY_INTERNAL)

    @model_validator(mode="before")
    @classmethod
    def _supply_range(cls, data: object) -> object:
        """``supply`` in one of its written forms (see :func:`_read_supply`) into the span
        magnitude (supply, supply_min, supply_max), the arrangement and, for a split supply, the
        negative rail."""
        if not isinstance(data, dict):
            return data
        data = dict(data)
        for key in SUPPLY_INTERNAL:
            if key in data:
                raise InputError.single(
                    key, data[key], "supply: {nominal, min, max} or {positive, negative} instead", _TITLE
                )
        if data.get("supply") is not None:
            try:
                data.update(_read_supply(data["supply"]))
            except InputError as error:  # reported by the supply field, beside every other problem
                data["supply"] = _SupplyProblem(error)
        return data

    @field_validator("supply", mode="before")
    @classmethod
    def _supply_problem(cls, value: object) -> object:
        if isinstance(value, _SupplyProblem):
            raise InputError(
                [
                    Problem(p.where.removeprefix("supply").lstrip("."), p.value, p.expected)
                    for p in value.error.problems
                ],
                _TITLE,
            )
        return value

    @model_validator(mode="after")
    def _supply_order(self) -> "Spec":
        for key, factor in (
            ("supply_min", 1.0 - DEFAULT_SUPPLY_TOLERANCE),
            ("supply_max", 1.0 + DEFAULT_SUPPLY_TOLERANCE),
        ):
            if getattr(self, key) is None:
                object.__setattr__(self, key, self.supply * factor)
        if not self.supply_min <= self.supply <= self.supply_max:
            raise InputError.single(
                "supply",
                {"nominal": self.supply, "min": self.supply_min, "max": self.supply_max},
                "min <= nominal <= max",
                _TITLE,
            )
        return self

    name: str = Field(min_length=1, max_length=MAX_NAME)
    description: str | None = Field(None, max_length=MAX_DESCRIPTION)
    supply: _quantity("V", maximum=100.0, example="12 V") = Field(
        description="the supply: a positive rail ('12 V', or {nominal, min, max}; +-5 % assumed for a bare "
        "number), a negative rail ('-12 V', or {nominal: -12 V, min: -12.6 V, max: -11.4 V}) or a "
        "split supply ('+-12 V', or {positive: 12 V, negative: -12 V}, each rail a voltage or "
        "{nominal, min, max}). Internally: the span from the lowest to the highest rail, V, "
        "above 0, <= 100"
    )
    supply_min: _quantity("V", optional=True, maximum=100.0, example="11.4 V") = Field(
        None, description="lowest span, V (input: supply.min; default nominal -5 %)"
    )
    supply_max: _quantity("V", optional=True, maximum=100.0, example="12.6 V") = Field(
        None, description="highest span, V (input: supply.max; default nominal +5 %)"
    )
    supply_range_assumed: bool = Field(
        False, description="true when the supply was a bare number and +-5 % was assumed"
    )
    supply_arrangement: Literal["positive", "negative", "split"] = Field(
        "positive",
        description="positive rail and ground, negative rail and ground, or split (+ and - rails "
        "around ground); from the supply's written form",
    )
    supply_negative: tuple[float, float, float] | None = Field(
        None, description="split supply: the negative rail (nominal, min, max), V, true (negative) volts"
    )
    supply_ripple: Ripple | None = None
    robustness: Literal["yield", "worst_case", "nominal"] = Field(
        "yield",
        description="basis on which a design meets the spec: yield (every hard limit in at "
        "least limits.yield_min of Monte Carlo builds), worst_case (at every "
        "corner) or nominal (at nominal values only)",
    )
    mains_powered: bool = Field(
        False,
        description="true when the stage's supply is derived from the mains: "
        "its outputs then carry the high-voltage caution",
    )
    gain: Gain
    source_impedance: _quantity("ohm", allow_zero=True, example="600") = 0.0
    input_coupling: Literal["capacitor", "direct"] = Field(
        "capacitor",
        description="capacitor: the source reaches the stage through c_in (its DC is blocked); direct: the "
        "source is ground-referenced and passes DC (e.g. a DC-coupled sensor or a preceding stage at 0 V), "
        "so on a split supply a stage whose base sits at ground takes it without c_in (the source's "
        "resistance then joins the bias path); other stages keep c_in and `stagefit check` says why",
    )
    load_impedance: Ohm
    load_capacitance: Farad = 0.0
    band: tuple[Hertz, Hertz] = Field(description="[low, high] Hz")
    limits: Limits = Field(default_factory=Limits, validate_default=True)  # defaults checked against the supply
    temperature: tuple[Celsius, Celsius] = Field((0.0, 50.0), description="[low, high] °C")
    parts: Parts = Field(default_factory=Parts)
    devices: tuple[str, ...] = ("npn-general",)
    topologies: tuple[Topology, ...] = TOPOLOGY_NAMES
    objectives: tuple[ObjectiveItem, ...] = (Objective(metric="supply_current"), Objective(metric="swing_vpp"))
    search: Search = Field(default_factory=Search)

    @field_validator("name", "description", mode="before")
    @classmethod
    def _plain_text(cls, value: object, info: ValidationInfo) -> object:
        """Text that prints as written: no control character (a description may hold tabs and
        line breaks) and no direction override, which would make a terminal or a page show
        other text than the stored one; bytes (YAML's !!binary) are no text."""
        if value is None and info.field_name == "description":
            return value
        if not isinstance(value, str):
            raise ValueError("text (a YAML or JSON string)")
        found = _UNPRINTABLE.search(value if info.field_name == "name" else value.replace("\t", "").replace("\n", ""))
        if found:
            raise ValueError(
                f"text without control characters or direction overrides (found U+{ord(found.group()):04X})"
            )
        return value

    @field_validator("band")
    @classmethod
    def _band_order(cls, value: tuple[float, float]) -> tuple[float, float]:
        _ordered(*value, "band", "Hz", strict=True)
        return value

    @field_validator("temperature")
    @classmethod
    def _temperature_order(cls, value: tuple[float, float]) -> tuple[float, float]:
        for t in value:
            if not -55 <= t <= 150:
                raise ValueError("temperatures from -55 °C to 150 °C")
        _ordered(*value, "temperature", "°C", strict=True)
        return value

    @field_validator("devices")
    @classmethod
    def _devices(cls, value: tuple[str, ...]) -> tuple[str, ...]:
        return _unique(value, "device id")

    @field_validator("topologies")
    @classmethod
    def _topologies(cls, value: tuple[str, ...]) -> tuple[str, ...]:
        return _unique(value, "topology")

    @field_validator("objectives")
    @classmethod
    def _objectives(cls, value: tuple[Objective, ...]) -> tuple[Objective, ...]:
        return _unique(value, "objective metric")

    @field_validator("limits")
    @classmethod
    def _limits_within_supply(cls, limits: Limits, info: ValidationInfo) -> Limits:
        supply = info.data.get("supply")
        if supply is None:
            return limits
        if "thd_level" not in limits.model_fields_set and limits.thd_level > supply / 2:
            # the default level (half of swing_min, else 1 V) judged against this supply too:
            # a low-voltage stage is judged at half its supply, never at a level it cannot reach
            object.__setattr__(limits, "thd_level", supply / 2)
        problems = [
            Problem(
                key,
                value,
                f"at most the supply ({format_value(supply, 'V')}): a stage cannot swing more than its supply",
            )
            for key, value in (("swing_min", limits.swing_min), ("thd_level", limits.thd_level))
            if value is not None and value > supply
        ]
        if problems:
            raise InputError(problems, _TITLE)
        return limits

    @property
    def gain_target_db(self) -> float:
        """Target gain magnitude in dB."""
        return 20 * math.log10(self.gain.target)

    @property
    def objective_directions(self) -> list[tuple[str, str]]:
        """(metric, "minimise"|"maximise") for each objective, in order."""
        return [(o.metric, str(o.direction)) for o in self.objectives]  # the validator has set every direction

    @property
    def supply_below_ground(self) -> float:
        """Fraction of the supply span below signal ground: 0 on a positive rail, 1 on a
        negative rail, |V-|/(V+ + |V-|) on a split supply (the models' ``Conditions.below_ground``)."""
        if self.supply_arrangement == "split" and self.supply_negative is not None:
            return -self.supply_negative[0] / self.supply
        return 1.0 if self.supply_arrangement == "negative" else 0.0

    @property
    def supply_spread(self) -> tuple[float, float] | tuple[tuple[float, float], tuple[float, float]]:
        """How the supply moves over builds and corners (tolerance.SupplyRange): the span's
        (min, max), V; on a split supply each rail over its own range, independently:
        ((V+ min, V+ max), (|V-| min, |V-| max)), V."""
        if self.supply_arrangement != "split" or self.supply_negative is None:
            return (self.supply_min, self.supply_max)
        _, neg_low, neg_high = self.supply_negative  # true volts: neg_low the most negative
        return ((self.supply_min + neg_high, self.supply_max + neg_low), (-neg_high, -neg_low))

    @property
    def rails(self) -> tuple[float, float]:
        """(highest rail, lowest rail), nominal, V, true (ground-referenced) volts."""
        below = self.supply_below_ground * self.supply
        return self.supply - below, -below if below else 0.0


# --- errors --------------------------------------------------------------------------


def _expected(exc: Exception) -> str:
    if isinstance(exc, InputError):
        return "; ".join(p.expected for p in exc.problems)
    return str(exc)


def _path(loc: tuple) -> str:
    out = ""
    for part in loc:
        out += f"[{part}]" if isinstance(part, int) else (f".{part}" if out else str(part))
    return out


def _section_at(loc: tuple) -> type[_Section] | None:
    """The section model holding the key at ``loc`` (None if it is not a section)."""
    cls: type[_Section] = Spec
    for part in loc:
        if isinstance(part, int):
            continue
        field = cls.model_fields.get(part)
        if field is None:
            return None
        found = _find_section(field.annotation)
        if found is None:
            return None
        cls = found
    return cls


def _find_section(annotation: Any) -> type[_Section] | None:
    if isinstance(annotation, type) and issubclass(annotation, _Section):
        return annotation
    for arg in getattr(annotation, "__args__", ()) + getattr(annotation, "__metadata__", ()):
        found = _find_section(arg)
        if found is not None:
            return found
    return None


#: Characters a name or description may not hold: C0 and C1 controls, DEL, and the Unicode
#: direction overrides and isolates (U+202A..U+202E, U+2066..U+2069).
_UNPRINTABLE = re.compile("[\x00-\x1f\x7f-\x9f\u202a-\u202e\u2066-\u2069]")

#: What each required spec key holds, named when the key is missing.
_REQUIRED_FORMS = {
    "name": "a name for the spec, e.g. 'line_driver'",
    "supply": _SUPPLY_FORMS,
    "gain": "a gain in V/V (e.g. -10) or in dB (e.g. '20 dB'), or {target, tolerance, inverting}",
    "load_impedance": "a resistance such as '47k'",
    "band": "[low, high] in Hz, e.g. [20 Hz, 20 kHz]",
}

_BUILTIN_EXPECTED = {
    "missing": "a value is required here",
    "bool_type": "true or false",
    "bool_parsing": "true or false",
    "string_type": "text",
    "string_too_short": "non-empty text",
    "string_too_long": f"text of at most {MAX_NAME} characters (a description: {MAX_DESCRIPTION})",
    "tuple_type": "a list",
    "list_type": "a list",
    "dict_type": "a mapping of keys to values",
    "model_type": "a mapping of keys to values",
    "model_attributes_type": "a mapping of keys to values",
    "too_short": "a list of exactly 2 values [low, high]",
    "too_long": "a list of exactly 2 values [low, high]",
}


def _problems_from(error: ValidationError) -> list[Problem]:
    """Translate pydantic's errors into Problems with dotted paths."""
    problems: list[Problem] = []
    for err in error.errors():
        loc, kind, given = tuple(err["loc"]), err["type"], err.get("input")
        where = _path(loc)
        cause = err.get("ctx", {}).get("error")
        if isinstance(cause, InputError):
            for p in cause.problems:
                sub = f"{where}.{p.where}" if where and p.where else (where or p.where)
                # a supply that could not be read carries the value written in its problem
                written = p.value if p.where or isinstance(given, _SupplyProblem) else given
                problems.append(Problem(sub, written, p.expected))
            continue
        if kind == "extra_forbidden":
            section = _section_at(loc[:-1])
            allowed = list(section.input_keys()) if section else []
            expected = (
                f"unknown key {loc[-1]!r}{_suggestion(loc[-1], allowed)}; allowed keys here: {', '.join(allowed)}"
            )
        elif kind == "missing":
            given = MISSING  # pydantic gives the whole enclosing mapping
            expected = _BUILTIN_EXPECTED[kind] + (f": {_REQUIRED_FORMS[where]}" if where in _REQUIRED_FORMS else "")
        elif cause is not None:
            expected = str(cause)
        elif (
            kind in ("too_short", "too_long")
            and "band" not in where
            and "range" not in where
            and "temperature" not in where
        ):
            expected = "a longer list" if kind == "too_short" else "a shorter list"
        else:
            expected = _BUILTIN_EXPECTED.get(kind, err["msg"][:1].lower() + err["msg"][1:])
        problems.append(Problem(where or "<spec>", given, expected))
    return problems


# --- public API ----------------------------------------------------------------------


def parse_spec(data: dict, *, source: str = "<spec>") -> Spec:
    """Validate a spec mapping into a :class:`Spec`; raise InputError with every problem."""
    if not isinstance(data, dict):
        raise InputError.single(source, type(data).__name__, "a mapping of spec keys (name, supply, gain, ...)", _TITLE)
    try:
        return Spec.model_validate(data)
    except ValidationError as exc:
        raise InputError(_problems_from(exc), f"{_TITLE} ({source})" if source != "<spec>" else _TITLE) from None


def load_spec(path: str | Path) -> Spec:
    """Read a YAML or JSON spec file and validate it (through the bounded loader of
    :mod:`optimizer.documents`, the same one the REST service uses). A bare name that is no
    file but names a bundled example spec (``"contact_pickup_buffer"``) loads that example."""
    from optimizer.bundled import example_names, example_path
    from optimizer.documents import MAX_BYTES, parse_document

    path = Path(path)
    if not path.exists() and (example := example_path(str(path))) is not None:
        path = example
    try:
        if path.stat().st_size > MAX_BYTES:
            raise InputError.single(
                str(path),
                f"{path.stat().st_size} bytes",
                f"a spec file of at most {MAX_BYTES} bytes",
                "cannot read spec",
            )
        text = path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError.single(
            str(path),
            str(path),
            f"a readable UTF-8 spec file ({exc}), or the name of a bundled "
            f"example: {', '.join(example_names()) or '(none installed)'}",
            "cannot read spec",
        ) from None
    data = parse_document(text, str(path), yaml_ok=path.suffix.lower() != ".json")
    return parse_spec(data, source=str(path))


def check_against_catalog(spec: Spec, catalog: Any) -> None:
    """Check the spec's device ids and series exist in ``catalog``; raise InputError."""
    problems: list[Problem] = []
    known = [str(i) for i in catalog.transistors["id"]]
    for i, device in enumerate(spec.devices):
        if device not in known:
            problems.append(
                Problem(
                    f"devices[{i}]",
                    device,
                    f"a transistor id in catalog "
                    f"{spec.parts.catalog!r}: {', '.join(known)}"
                    f"{_suggestion(device, known)}",
                )
            )
    lookups = {
        "resistor_series": catalog.resistor_values,
        "capacitor_series": getattr(catalog, "capacitor_values", None),
    }
    for key, lookup in lookups.items():
        series = getattr(spec.parts, key)
        if lookup is None:
            continue
        try:
            empty = len(lookup(series=series)) == 0
        except (KeyError, ValueError):
            empty = True
        if empty:
            problems.append(Problem(f"parts.{key}", series, f"a series with values in catalog {spec.parts.catalog!r}"))
    if problems:
        raise InputError(problems, "spec does not fit the catalog")


def spec_to_dict(spec: Spec) -> dict:
    """Canonical JSON-ready mapping in SI units (°C for temperature); parse_spec reads it back."""
    data = spec.model_dump(mode="json")
    for key in SUPPLY_INTERNAL:
        data.pop(key)
    if spec.supply_range_assumed and spec.supply_arrangement != "positive":
        top, bottom = spec.rails
        data["supply"] = (
            -spec.supply if spec.supply_arrangement == "negative" else {"positive": top, "negative": bottom}
        )
    elif spec.supply_arrangement == "split" and spec.supply_negative is not None:
        neg = dict(zip(("nominal", "min", "max"), spec.supply_negative))
        pos = {
            "nominal": spec.supply + neg["nominal"],
            "min": spec.supply_min + neg["max"],
            "max": spec.supply_max + neg["min"],
        }
        data["supply"] = {"positive": pos, "negative": neg}
    elif spec.supply_arrangement == "negative":
        data["supply"] = {"nominal": -spec.supply, "min": -spec.supply_max, "max": -spec.supply_min}
    elif not spec.supply_range_assumed:
        data["supply"] = {"nominal": spec.supply, "min": spec.supply_min, "max": spec.supply_max}
    data["gain"] = {
        "target": spec.gain.target,
        "inverting": spec.gain.inverting,
        "tolerance_db": spec.gain.tolerance_db,
    }
    return data


def spec_digest(spec: Spec) -> str:
    """First 10 hex digits of the SHA-256 of the spec's canonical JSON: its identity in
    search ids and on every export (two specs with the same digest ask the same)."""
    canonical = json.dumps(spec_to_dict(spec), sort_keys=True).encode()
    return hashlib.sha256(canonical).hexdigest()[:10]


def spec_json_schema() -> dict:
    """JSON Schema (draft 2020-12) of the spec as users write it."""
    schema = Spec.model_json_schema(mode="validation")
    for key in SUPPLY_INTERNAL:
        schema["properties"].pop(key, None)
    schema["required"] = [k for k in schema.get("required", []) if k not in SUPPLY_INTERNAL]
    voltage = {"anyOf": [{"type": "number"}, {"type": "string"}]}
    rail = {
        "anyOf": [
            *voltage["anyOf"],
            {
                "type": "object",
                "additionalProperties": False,
                "required": ["nominal"],
                "properties": {"nominal": voltage, "min": voltage, "max": voltage},
            },
        ]
    }
    split = {
        "type": "object",
        "additionalProperties": False,
        "required": ["positive", "negative"],
        "properties": {"positive": rail, "negative": rail},
    }
    schema["properties"]["supply"] = {
        "description": schema["properties"]["supply"]["description"],
        "anyOf": [*rail["anyOf"], split],
    }
    return {"$schema": _JSON_SCHEMA_DRAFT, **schema}


def _supply_words(spec: Spec) -> str:
    """The supply as a designer says it: '12 V', '-12 V (negative rail)', '+12 V / -12 V (split, 24 V span)'."""
    top, bottom = spec.rails
    if spec.supply_arrangement == "split":
        return (
            f"+{format_value(top, 'V')} / -{format_value(-bottom, 'V')} (split, {format_value(spec.supply, 'V')} span)"
        )
    if spec.supply_arrangement == "negative":
        return f"-{format_value(spec.supply, 'V')} (negative rail)"
    return format_value(spec.supply, "V")


def describe_spec(spec: Spec) -> str:
    """A readable multi-line listing of the parsed spec, with units."""
    fv = format_value
    g = spec.gain
    sign = {True: "inverting", False: "non-inverting", None: "either sign"}[g.inverting]
    lines = [
        f"spec {spec.name}" + (f": {spec.description.strip()}" if spec.description else ""),
        f"  supply            {_supply_words(spec)} ({fv(spec.supply_min, 'V')} .. "
        f"{fv(spec.supply_max, 'V')}"
        + (" span" if spec.supply_arrangement == "split" else "")
        + (", +-5 % assumed" if spec.supply_range_assumed else "")
        + ")"
        + (
            f", ripple {fv(spec.supply_ripple.vpp, 'V')} p-p at {fv(spec.supply_ripple.frequency, 'Hz')}"
            if spec.supply_ripple
            else ""
        ),
        f"  gain              {g.target:.4g} V/V ({spec.gain_target_db:.2f} dB), {sign}, +-{g.tolerance_db:.2f} dB",
        f"  source impedance  {fv(spec.source_impedance, 'ohm')}",
        f"  load              {fv(spec.load_impedance, 'ohm')} || {fv(spec.load_capacitance, 'F')}",
        f"  band              {fv(spec.band[0], 'Hz')} .. {fv(spec.band[1], 'Hz')}",
        f"  temperature       {fv(spec.temperature[0], '°C')} .. "
        f"{fv(spec.temperature[1], '°C')} (nominal {fv(NOMINAL_TEMPERATURE_C, '°C')})",
    ]
    limit_units = {
        "input_impedance_min": ("ohm", ""),
        "output_impedance_max": ("ohm", ""),
        "swing_min": ("V", " peak-to-peak"),
        "supply_current_max": ("A", ""),
        "thd_max": ("%", ""),
        "thd_level": ("V", " peak-to-peak"),
        "noise_ein_max": ("V", " rms"),
        "psrr_min_db": ("dB", ""),
        "yield_min": ("%", ""),
        "phase_margin_min_deg": ("deg", ""),
    }
    set_limits = [(k, v) for k, v in spec.limits.model_dump().items() if v is not None]
    lines.append("  limits" + ("" if set_limits else "            none"))
    for key, value in set_limits:
        unit, suffix = limit_units[key]
        shown = (
            f"{100 * value:.3g} %"
            if unit == "%"
            else f"{value:.3g} dB"
            if unit == "dB"
            else f"{value:.3g}°"
            if unit == "deg"
            else fv(value, unit) + suffix
        )
        lines.append(f"    {key:<22}{shown}")
    p = spec.parts
    lines += [
        f"  parts             catalog {p.catalog}, resistors {p.resistor_series} "
        f"{fv(p.resistor_range[0], 'ohm')} .. {fv(p.resistor_range[1], 'ohm')}, "
        f"capacitors {p.capacitor_series} {fv(p.capacitor_range[0], 'F')} .. "
        f"{fv(p.capacitor_range[1], 'F')}"
        + (", in stock only" if p.in_stock_only else "")
        + (", prefer reuse" if p.prefer_reuse else ""),
        f"  devices           {', '.join(spec.devices)}",
        f"  topologies        {', '.join(spec.topologies)}",
        "  robustness        "
        + {
            "yield": f"yield: every hard limit in at least {100 * spec.limits.yield_min:.3g} % of Monte Carlo builds",
            "worst_case": "worst case: every hard limit at every corner",
            "nominal": "nominal: limits judged at nominal values only",
        }[spec.robustness],
        "  objectives        " + ", ".join(f"{d} {m}" for m, d in spec.objective_directions),
        f"  search            {spec.search.trials} trials, seed {spec.search.seed}, batch {spec.search.batch_size}",
    ]
    return "\n".join(lines)
