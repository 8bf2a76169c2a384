"""SPICE netlist of a candidate stage, for checking it in any simulator.

The netlist is plain SPICE3 (ngspice dialect for ``.temp``/``.options``). Element names are
the parts' reference designators, the same as the BOM's (:func:`designators`): resistors R1,
R2, ... and capacitors C1, C2, ... numbered in the order the topology's elements are listed
below (its signal path from input to output), transistors Q1, Q2; a part left out (value 0)
gets no designator. A header comment ties each designator to its DESIGN.md role, and values
are written as plain numbers (``repr`` of the float, SI units, no prefixes) so a reader can
check them against the candidate. Each topology's template (its elements, transistor pins and
node voltages) is declared by the topology itself (``Topology.elements``), drawn as NPN on a
positive rail; a PNP stage, a negative rail or a split supply maps its rails (:func:`rail_nodes`:
``vcc`` positive rail, ``vee`` negative rail, ``0`` ground). Nodes: ``vcc``,
``sig`` (ideal signal source), ``src`` (after the source resistance, feeding ``c_in``), the
topology's own nodes, ``out`` (the load), ``0`` (ground), and with a supply decoupling RC
``vloc`` (the stage's local supply, behind ``r_decouple``).
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping, Sequence
from typing import Any

from optimizer.errors import MISSING, InputError, Problem
from optimizer.topologies import Topology, get_topology
from optimizer.topologies.base import SUPPLY_ELEMENTS
from optimizer.units import format_value

MODEL_KEYS: tuple[str, ...] = ("IS", "BF", "NF", "VAF", "RB", "CJE", "CJC", "TF")
OPTIONAL_MODEL_KEYS: tuple[str, ...] = ("KF", "AF")  # flicker noise, written when given
# A JFET stage's device (SPICE NJF level 1): required keys, optional ones (flicker, temperature)
JFET_MODEL_KEYS: tuple[str, ...] = ("BETA", "VTO", "LAMBDA", "CGS", "CGD", "IS")
JFET_OPTIONAL_MODEL_KEYS: tuple[str, ...] = ("KF", "AF", "TCV", "BEX")


def _model_form(stage: Topology) -> tuple[tuple[str, ...], tuple[str, ...], str, str]:
    """(required keys, optional keys, SPICE model type, designator letter) of a stage's device."""
    if stage.device_kind == "jfet":
        return JFET_MODEL_KEYS, JFET_OPTIONAL_MODEL_KEYS, "NJF", "J"
    return MODEL_KEYS, OPTIONAL_MODEL_KEYS, "NPN", "Q"


# Stand-in for a zero source impedance (SPICE needs a finite resistor), ohm.
ZERO_SOURCE_RESISTANCE = 1e-3
# Stand-in for an absent (infinite) load, ohm: keeps the output node's DC path.
OPEN_LOAD_RESISTANCE = 1e12

SUPPLY_ROLES = tuple(role for role, _, _ in SUPPLY_ELEMENTS)


def _elements(topology: Topology, decoupled: bool = True) -> tuple[tuple[str, str, str], ...]:
    """The topology's netlist template (role, node a, node b), then the supply decoupling RC."""
    return topology.elements + (SUPPLY_ELEMENTS if decoupled else ())


def designators(topology: str, parts: Mapping[str, float]) -> dict[str, str]:
    """Reference designator by role of every present part of ``topology`` (value > 0):
    resistors R1.. and capacitors C1.. in netlist element order, then transistors Q1, Q2."""
    model = get_topology(topology)
    out: dict[str, str] = {}
    count = {"R": 0, "C": 0}
    for role, _, _ in _elements(model):
        if float(parts.get(role, 0.0)) > 0:
            letter = role[0].upper()
            count[letter] += 1
            out[role] = f"{letter}{count[letter]}"
    letter = _model_form(model)[3]
    out.update({role: f"{letter}{i}" for i, (role, *_) in enumerate(model.transistor_pins, 1)})
    return out


def element_nodes(topology: str) -> dict[str, tuple[str, ...]]:
    """The nodes of every part by role: (a, b) for a resistor or capacitor, (collector,
    base, emitter) for a transistor."""
    model = get_topology(topology)
    out: dict[str, tuple[str, ...]] = {role: (a, b) for role, a, b in _elements(model)}
    out.update({role: tuple(nodes) for role, *nodes in model.transistor_pins})
    return out


def rail_nodes(supply: float, polarity: str = "npn", below_ground: float = 0.0) -> dict[str, tuple[str, float]]:
    """The true node (name, DC volts) of the template's two rails: ``vcc`` (the top of the stage
    drawn as NPN on a positive rail) and ``0`` (its bottom). A PNP stage is the mirror image, so
    its template ``vcc`` is the lowest rail; a rail at 0 V is ground ``0``, a positive one
    ``vcc``, a negative one ``vee``."""
    top, bottom = float(supply) * (1.0 - below_ground), -float(supply) * below_ground
    name = lambda v: "0" if v == 0 else "vcc" if v > 0 else "vee"  # noqa: E731
    frame_top, frame_bottom = (bottom, top) if polarity == "pnp" else (top, bottom)
    return {"vcc": (name(frame_top), frame_top), "0": (name(frame_bottom), frame_bottom)}


def dc_node_voltages(
    topology: str, operating_point: Mapping[str, float], supply: float, polarity: str = "npn", below_ground: float = 0.0
) -> dict[str, float]:
    """DC voltage (V to ground) of every node of ``topology``'s template from a candidate's
    operating point (true volts, the keys of the topology's ``node_voltages``), the supply span
    (V), the transistor polarity and the supply's below-ground fraction; the template's rails
    ``vcc`` and ``0`` at their true voltages (:func:`rail_nodes`), the source side of c_in and
    the load side of c_out at ground."""
    keys = get_topology(topology).node_voltages
    rails = rail_nodes(supply, polarity, below_ground)
    nodes = {n for pair in element_nodes(topology).values() for n in pair} | {"vcc", "src", "out", "0"}
    return {
        n: (rails[n][1] if n in rails else float(operating_point[keys[n]]) if n in keys else 0.0) for n in sorted(nodes)
    }


def required_parts(topology: str) -> tuple[str, ...]:
    """Part roles a topology's netlist needs (raises InputError for an unknown topology)."""
    return tuple(role for role, _, _ in get_topology(topology).elements)


def _check_parts(topology: str, parts: Mapping[str, float], split: bool = False) -> None:
    """InputError unless ``parts`` holds every role of the template (r_top absent on a split supply)."""
    omitted = get_topology(topology).split_omitted() if split else ()
    needed = tuple(r for r in required_parts(topology) if r not in omitted)
    problems: list[Problem] = []
    for role in needed:
        if role not in parts:
            problems.append(
                Problem(f"parts.{role}", MISSING, f"{topology} needs a value for {role}; needed: {', '.join(needed)}")
            )
            continue
        value = parts[role]
        stage = get_topology(topology)
        # c_in may be left out (a wire) where the stage's base sits at ground: a direct-coupled input
        may_be_zero = role in stage.optional_parts or (split and stage.direct_input and role == "c_in")
        floor_ok = value >= 0 if may_be_zero else value > 0
        if not (isinstance(value, (int, float)) and math.isfinite(value) and floor_ok):
            bound = ">= 0" if may_be_zero else "> 0"
            problems.append(Problem(f"parts.{role}", value, f"a finite number {bound} (SI units)"))
    for role in SUPPLY_ROLES:
        value = parts.get(role, 0.0)
        if not (isinstance(value, (int, float)) and math.isfinite(value) and value >= 0):
            problems.append(Problem(f"parts.{role}", value, "a finite number >= 0 (SI units; 0 = none)"))
    if parts.get("r_decouple", 0.0) > 0 and not parts.get("c_decouple", 0.0) > 0:
        problems.append(Problem("parts.c_decouple", parts.get("c_decouple"), "a capacitance > 0 with r_decouple"))
    for role in parts:
        if role not in needed and role not in SUPPLY_ROLES:
            problems.append(
                Problem(f"parts.{role}", parts[role], f"not a part of {topology}; needed: {', '.join(needed)}")
            )
    if problems:
        raise InputError(problems, title=f"parts do not fit topology {topology}")


def _check_model(model: Mapping[str, float], stage: Topology) -> None:
    required, optional, _, _ = _model_form(stage)
    problems = [
        Problem(f"model.{key}", model.get(key), "a finite number")
        for key in required + tuple(k for k in optional if k in model)
        if not isinstance(model.get(key), (int, float)) or not math.isfinite(model[key])
    ]
    if problems:
        raise InputError(problems, title=f"device model needs {', '.join(required)}")


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


def spice_netlist(
    topology: str,
    parts: Mapping[str, float],
    model: Mapping[str, float],
    conditions: Any,
    *,
    device_id: str = "q",
    analyses: str = "",
    title: str | None = None,
    amplitude: float = 0.01,
    frequency: float | None = None,
    cautions: Sequence[str] = (),
    polarity: str = "npn",
) -> str:
    """SPICE netlist of one stage.

    ``parts`` maps role -> value (ohm, F); ``model`` holds the Gummel-Poon keys of MODEL_KEYS
    for an NPN or PNP (``polarity``) transistor (a JFET stage: the NJF level-1 keys of
    JFET_MODEL_KEYS, designator J1); a PNP stage is the NPN template mirrored (its
    ``vcc`` is the lowest rail, its ``0`` the highest, :func:`rail_nodes`), and on a negative
    rail or a split supply (``conditions.below_ground``, 0 when absent) the rails are sources
    ``Vcc`` (positive) and ``Vee`` (negative) against ground ``0``, where the signal source and the
    load return; on a split supply r_top is left out and r_bottom returns the base to ground.
    ``conditions`` has supply (V, the span), source_impedance and load_impedance (ohm; an
    infinite load is written as OPEN_LOAD_RESISTANCE), load_capacitance (F, 0 = none),
    temperature (degC, or a (low, high) range simulated at its midpoint) and band (Hz).
    The signal source ``Vsig`` is AC 1 and SIN with ``amplitude`` (V peak) at ``frequency``
    (Hz, default the band's geometric mean). ``analyses`` is inserted before ``.end``;
    each of ``cautions`` becomes a comment line.
    """
    below = float(getattr(conditions, "below_ground", 0.0))
    split = 0 < below < 1
    stage = get_topology(topology)
    omitted = stage.split_omitted() if split else ()
    _check_parts(topology, {r: v for r, v in parts.items() if not (r in omitted and not v)}, split)
    _check_model(model, get_topology(topology))
    supply = float(conditions.supply)
    source = float(conditions.source_impedance)
    load = float(conditions.load_impedance)
    load_c = float(conditions.load_capacitance)
    temp = nominal_temperature(conditions)
    freq = mid_band_frequency(conditions) if frequency is None else float(frequency)
    model_name = _model_name(device_id)
    decoupled = float(parts.get("r_decouple", 0.0)) > 0
    elements = tuple(e for e in _elements(stage, decoupled) if e[0] not in omitted)
    rails = rail_nodes(supply, polarity, below)
    rails_text = ", ".join(f"{name} {volts!r} V" for name, volts in sorted(set(rails.values())) if name != "0")
    rail = "vloc" if decoupled else rails["vcc"][0]

    def node(role: str, n: str) -> str:
        """The true node of template node ``n`` of element ``role``."""
        if omitted and role == "r_bottom" and n == "0":
            return "0"  # the ground-referenced base
        if n == "vcc" and role not in SUPPLY_ROLES:  # the stage returns to its local supply node
            return rail
        return rails[n][0] if n in rails else n

    names = designators(topology, parts)
    lines = [
        title or f"stagefit {topology} stage, device {device_id}",
        f"* topology: {topology}",
        "* parts (designator role = designer label, netlist value in ohm or F):",
    ]
    for role, _, _ in elements:
        unit = "F" if role.startswith("c_") else "ohm"
        label = format_value(float(parts[role]), unit=unit, ascii=True)
        lines.append(
            f"*   {names.get(role, '(none)'):<4} {role} = {label} ({float(parts[role])!r})"
            + ("" if role in names else ": left out, a short")
        )
    lines += [f"*   {names[role]:<4} {role} = {device_id}" for role, *_ in stage.transistor_pins]
    lines += [
        f"* conditions: supply {supply!r} V, source {source!r} ohm, load {load!r} ohm, "
        f"load capacitance {load_c!r} F, {temp!r} degC, band {conditions.band[0]!r}.."
        f"{conditions.band[1]!r} Hz",
        f"* CAUTION: simulated, not built. Supply {supply!r} V DC"
        + ("" if not below else f" in all (rails {rails_text})")
        + ": check every part's voltage",
        "* and power rating (capacitors against the DC across them, resistors against I^2R,",
        "* the transistor against Vceo and its dissipation) before applying power.",
        *[f"* CAUTION: {note}" for note in cautions],
        f".temp {temp!r}",
        ".options TNOM=27",
        *[f"V{name[1:]} {name} 0 DC {volts!r}" for name, volts in sorted(set(rails.values())) if name != "0"],
        f"Vsig sig 0 DC 0 AC 1 SIN(0 {float(amplitude)!r} {freq!r})",
        f"Rsource sig src {(source if source > 0 else ZERO_SOURCE_RESISTANCE)!r}",
    ]
    for role, a, b in elements:
        value = float(parts[role])
        nodes = f"{node(role, a)} {node(role, b)}"
        if value == 0:  # a zero resistor is a short: a 0 V source keeps the node and its current
            lines.append(f"Vshort_{role} {nodes} DC 0")
        else:
            lines.append(f"{names[role]} {nodes} {value!r}")
    for role, collector, base, emitter in stage.transistor_pins:
        lines.append(f"{names[role]} {' '.join(node(role, n) for n in (collector, base, emitter))} {model_name}")
    lines.append(f"Rload out 0 {(load if math.isfinite(load) else OPEN_LOAD_RESISTANCE)!r}")
    if load_c > 0:
        lines.append(f"Cload out 0 {load_c!r}")
    required, optional, kind, _ = _model_form(stage)
    params = " ".join(f"{key}={float(model[key])!r}" for key in required + optional if key in model)
    lines.append(f".model {model_name} {polarity.upper() if stage.device_kind == 'bjt' else kind}({params})")
    if analyses:
        lines.append(analyses.rstrip("\n"))
    lines.append(".end")
    return "\n".join(lines) + "\n"


def candidate_netlist(record: dict, *, title: str | None = None) -> str:
    """The netlist of a candidate record for a reader to simulate: the spec's source and
    load, ``.temp`` at the nominal temperature, the record's cautions as comments, and the
    test analyses and an output-impedance test source written commented out (uncomment
    the ones wanted)."""
    from optimizer.candidates import design_from_record  # the record -> design rebuild lives there

    topology, parts, device, conditions = design_from_record(record)
    low, high = conditions.band
    f_mid = mid_band_frequency(conditions)
    tests = "\n".join(
        [
            "* Test analyses and sources (uncomment to run):",
            "* .op",
            f"* .ac dec 20 {low / 10!r} {high * 10!r}",
            f"* .tran {1 / (50 * f_mid)!r} {5 / f_mid!r}",
            f"* .noise v(out) Vsig dec 20 {low!r} {high!r}",
            "* Output impedance: set Vsig's AC to 0, uncomment Itest, run .ac and read v(out) in ohm:",
            "* Itest 0 out AC 1",
        ]
    )
    return spice_netlist(
        topology.name,
        {r: float(v[0]) for r, v in parts.items()},
        record["transistor"]["model"],
        conditions,
        device_id=device.id,
        title=title,
        analyses=tests,
        cautions=[str(c) for c in record.get("cautions", [])],
        polarity=device.polarity,
    )
