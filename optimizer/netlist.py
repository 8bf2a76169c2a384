"""SPICE netlist of a candidate stage, for checking it in any simulator.

The netlist is plain SPICE3 (ngspice dialect for ``.temp``/``.options``). Element names are
tied to the part roles of DESIGN.md (``Rr_top``, ``Cc_in``, ``Qq1``, ...) and values are
written as plain numbers (``repr`` of the float, SI units, no prefixes) so a reader can check
them against the candidate. Nodes: ``vcc``, ``sig`` (ideal signal source), ``src`` (after the
source resistance, feeding ``c_in``), ``base``, ``collector``, ``emitter``, ``e2`` (split
emitter), ``emitter2`` (follower emitter), ``out`` (the load), ``0`` (ground), and with a
supply decoupling RC ``vloc`` (the stage's local supply, behind ``r_decouple``).
"""
from __future__ import annotations

import math
import re
from collections.abc import Mapping
from typing import Any

from optimizer.errors import InputError, Problem
from optimizer.units import format_value

MODEL_KEYS: tuple[str, ...] = ("IS", "BF", "NF", "VAF", "RB", "CJE", "CJC", "TF")
OPTIONAL_MODEL_KEYS: tuple[str, ...] = ("KF", "AF")  # flicker noise, written when given

# Stand-in for a zero source impedance (SPICE needs a finite resistor), ohm.
ZERO_SOURCE_RESISTANCE = 1e-3
# Stand-in for an absent (infinite) load, ohm: keeps the output node's DC path.
OPEN_LOAD_RESISTANCE = 1e12

# Element lines per topology: (part role, SPICE element line without its value).
# ``Q`` lines carry the model name instead of a value and are filled in separately.
_ELEMENTS: dict[str, tuple[tuple[str, str], ...]] = {
    "divider_ce": (
        ("c_in", "Cc_in src base"),
        ("r_top", "Rr_top vcc base"),
        ("r_bottom", "Rr_bottom base 0"),
        ("r_collector", "Rr_collector vcc collector"),
        ("r_emitter", "Rr_emitter emitter 0"),
        ("c_out", "Cc_out collector out"),
    ),
    "divider_ce_split": (
        ("c_in", "Cc_in src base"),
        ("r_top", "Rr_top vcc base"),
        ("r_bottom", "Rr_bottom base 0"),
        ("r_collector", "Rr_collector vcc collector"),
        ("r_emitter", "Rr_emitter emitter e2"),
        ("r_emitter_dc", "Rr_emitter_dc e2 0"),
        ("c_emitter", "Cc_emitter e2 0"),
        ("c_out", "Cc_out collector out"),
    ),
    "feedback_ce": (
        ("c_in", "Cc_in src base"),
        ("r_feedback", "Rr_feedback collector base"),
        ("r_collector", "Rr_collector vcc collector"),
        ("r_emitter", "Rr_emitter emitter 0"),
        ("c_out", "Cc_out collector out"),
    ),
    "ce_follower": (
        ("c_in", "Cc_in src base"),
        ("r_top", "Rr_top vcc base"),
        ("r_bottom", "Rr_bottom base 0"),
        ("r_collector", "Rr_collector vcc collector"),
        ("r_emitter", "Rr_emitter emitter 0"),
        ("r_follower", "Rr_follower emitter2 0"),
        ("c_out", "Cc_out emitter2 out"),
    ),
}

# Transistors per topology: (role, collector, base, emitter).
_TRANSISTORS: dict[str, tuple[tuple[str, str, str, str], ...]] = {
    "divider_ce": (("q1", "collector", "base", "emitter"),),
    "divider_ce_split": (("q1", "collector", "base", "emitter"),),
    "feedback_ce": (("q1", "collector", "base", "emitter"),),
    "ce_follower": (("q1", "collector", "base", "emitter"), ("q2", "vcc", "collector", "emitter2")),
}

# Parts that may be zero (a short) in a topology; all others must be > 0.
_MAY_BE_ZERO: dict[str, frozenset[str]] = {"feedback_ce": frozenset({"r_emitter"})}

# Optional supply decoupling RC of every topology (absent or 0: the stage sits on the rail).
# When r_decouple > 0 every element returning to ``vcc`` moves to the local node ``vloc``.
SUPPLY_ELEMENTS: tuple[tuple[str, str], ...] = (("r_decouple", "Rr_decouple vcc vloc"),
                                                ("c_decouple", "Cc_decouple vloc 0"))

TOPOLOGIES: tuple[str, ...] = tuple(_ELEMENTS)


def required_parts(topology: str) -> tuple[str, ...]:
    """Part roles a topology's netlist needs (raises InputError for an unknown topology)."""
    if topology not in _ELEMENTS:
        raise InputError.single("topology", topology, f"one of {', '.join(TOPOLOGIES)}",
                                title="unknown topology")
    return tuple(role for role, _ in _ELEMENTS[topology])


def _check_parts(topology: str, parts: Mapping[str, float]) -> None:
    needed = required_parts(topology)
    problems: list[Problem] = []
    for role in needed:
        if role not in parts:
            problems.append(Problem(f"parts.{role}", None,
                                    f"{topology} needs a value for {role}; needed: {', '.join(needed)}"))
            continue
        value = parts[role]
        floor_ok = value >= 0 if role in _MAY_BE_ZERO.get(topology, ()) else value > 0
        if not (isinstance(value, (int, float)) and math.isfinite(value) and floor_ok):
            bound = ">= 0" if role in _MAY_BE_ZERO.get(topology, ()) else "> 0"
            problems.append(Problem(f"parts.{role}", value, f"a finite number {bound} (SI units)"))
    for role, _ in SUPPLY_ELEMENTS:
        value = parts.get(role, 0.0)
        if not (isinstance(value, (int, float)) and math.isfinite(value) and value >= 0):
            problems.append(Problem(f"parts.{role}", value, "a finite number >= 0 (SI units; 0 = none)"))
    if parts.get("r_decouple", 0.0) > 0 and not parts.get("c_decouple", 0.0) > 0:
        problems.append(Problem("parts.c_decouple", parts.get("c_decouple"), "a capacitance > 0 with r_decouple"))
    for role in parts:
        if role not in needed and role not in dict(SUPPLY_ELEMENTS):
            problems.append(Problem(f"parts.{role}", parts[role],
                                    f"not a part of {topology}; needed: {', '.join(needed)}"))
    if problems:
        raise InputError(problems, title=f"parts do not fit topology {topology}")


def _check_model(model: Mapping[str, float]) -> None:
    problems = [Problem(f"model.{key}", model.get(key), "a finite number")
                for key in MODEL_KEYS + tuple(k for k in OPTIONAL_MODEL_KEYS if k in model)
                if not isinstance(model.get(key), (int, float)) or not math.isfinite(model[key])]
    if problems:
        raise InputError(problems, title=f"device model needs {', '.join(MODEL_KEYS)}")


def nominal_temperature(conditions: Any) -> float:
    """Simulation temperature in degC: a scalar as given, a (low, high) range's midpoint."""
    temperature = conditions.temperature
    if isinstance(temperature, (int, float)):
        return float(temperature)
    low, high = temperature
    return 0.5 * (float(low) + float(high))


def mid_band_frequency(conditions: Any) -> float:
    """Geometric mean of the band, Hz."""
    low, high = conditions.band
    return math.sqrt(float(low) * float(high))


def _model_name(device_id: str) -> str:
    name = re.sub(r"[^A-Za-z0-9_]", "_", device_id)
    return name if name[:1].isalpha() else f"m_{name}"


def spice_netlist(topology: str, parts: Mapping[str, float], model: Mapping[str, float],
                  conditions: Any, *, device_id: str = "q", analyses: str = "",
                  title: str | None = None, amplitude: float = 0.01,
                  frequency: float | None = None) -> str:
    """SPICE netlist of one stage.

    ``parts`` maps role -> value (ohm, F); ``model`` holds the Gummel-Poon NPN keys of
    MODEL_KEYS; ``conditions`` has supply (V), source_impedance and load_impedance (ohm; an
    infinite load is written as OPEN_LOAD_RESISTANCE), load_capacitance (F, 0 = none),
    temperature (degC, or a (low, high) range simulated at its midpoint) and band (Hz).
    The signal source ``Vsig`` is AC 1 and SIN with ``amplitude`` (V peak) at ``frequency``
    (Hz, default the band's geometric mean). ``analyses`` is inserted before ``.end``.
    """
    _check_parts(topology, parts)
    _check_model(model)
    supply = float(conditions.supply)
    source = float(conditions.source_impedance)
    load = float(conditions.load_impedance)
    load_c = float(conditions.load_capacitance)
    temp = nominal_temperature(conditions)
    freq = mid_band_frequency(conditions) if frequency is None else float(frequency)
    model_name = _model_name(device_id)
    decoupled = float(parts.get("r_decouple", 0.0)) > 0
    elements = _ELEMENTS[topology] + (SUPPLY_ELEMENTS if decoupled else ())
    rail = "vloc" if decoupled else "vcc"

    lines = [title or f"stagefit {topology} stage, device {device_id}",
             f"* topology: {topology}",
             "* parts (role = designer label, netlist value in ohm or F):"]
    for role, _ in elements:
        unit = "F" if role.startswith("c_") else "ohm"
        lines.append(f"*   {role} = {format_value(float(parts[role]), unit=unit, ascii=True)} ({float(parts[role])!r})")
    lines += [f"*   q1{', q2' if len(_TRANSISTORS[topology]) > 1 else ''} = {device_id}",
              f"* conditions: supply {supply!r} V, source {source!r} ohm, load {load!r} ohm, "
              f"load capacitance {load_c!r} F, {temp!r} degC, band {conditions.band[0]!r}.."
              f"{conditions.band[1]!r} Hz",
              f"* CAUTION: simulated, not built. Supply {supply!r} V DC: check every part's voltage",
              "* and power rating (capacitors against the DC across them, resistors against I^2R,",
              "* the transistor against Vceo and its dissipation) before applying power.",
              "* Verify before building; observe local electrical codes.",
              *(["* Supply above 30 V: treat it as a shock and energy hazard; follow licensed practice."]
                if supply > 30 else []),
              f".temp {temp!r}",
              ".options TNOM=27",
              f"Vcc vcc 0 DC {supply!r}",
              f"Vsig sig 0 DC 0 AC 1 SIN(0 {float(amplitude)!r} {freq!r})",
              f"Rsource sig src {(source if source > 0 else ZERO_SOURCE_RESISTANCE)!r}"]
    for role, element in elements:
        value = float(parts[role])
        if role not in dict(SUPPLY_ELEMENTS):  # the stage returns to its local supply node
            element = " ".join(rail if node == "vcc" else node for node in element.split())
        if value == 0:  # a zero resistor is a short: a 0 V source keeps the node and its current
            lines.append(f"V{element[1:]} DC 0")
        else:
            lines.append(f"{element} {value!r}")
    for role, collector, base, emitter in _TRANSISTORS[topology]:
        lines.append(f"Q{role} {rail if collector == 'vcc' else collector} {base} {emitter} {model_name}")
    lines.append(f"Rload out 0 {(load if math.isfinite(load) else OPEN_LOAD_RESISTANCE)!r}")
    if load_c > 0:
        lines.append(f"Cload out 0 {load_c!r}")
    params = " ".join(f"{key}={float(model[key])!r}" for key in MODEL_KEYS + OPTIONAL_MODEL_KEYS if key in model)
    lines.append(f".model {model_name} NPN({params})")
    if analyses:
        lines.append(analyses.rstrip("\n"))
    lines.append(".end")
    return "\n".join(lines) + "\n"
