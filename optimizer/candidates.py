"""A design judged against a spec: the self-contained candidate record of DESIGN.md.

``assess`` takes a topology, part values and a device, sizes any capacitor not given,
evaluates the stage at nominal temperature, over its worst-case corners and by Monte
Carlo, checks every hard limit and rating, and returns the candidate JSON (plain dict)
with cautions for anything near a limit, made by ``record.candidate_record``. Used by `stagefit evaluate`, the search's
shortlist and the REST service alike.
"""

from __future__ import annotations

import math
from functools import partial
from typing import Any

import numpy as np

from optimizer import eseries, scoring
from optimizer.catalog import Catalog
from optimizer.devices import AnyDevice, device_from_record, device_from_row
from optimizer.errors import MISSING, InputError, Problem
from optimizer.metrics import LIMIT_METRICS
from optimizer.record import candidate_record, part_label, record_conditions
from optimizer.robustness import FINAL_BUILDS, basis_label, judge
from optimizer.sizing import size_capacitors, size_decoupling
from optimizer.spec import NOMINAL_TEMPERATURE_C, Spec
from optimizer.tolerance import worst_case
from optimizer.topologies import get_topology
from optimizer.topologies.base import Conditions, Topology
from optimizer.units import format_value
from optimizer.validation import builds_with, device_traits

DEFAULT_POWER_RATING = 0.125  # W, when a value is not in the catalog (common 0805 rating)
DEFAULT_CAP_VOLTAGE = 16.0  # V, likewise for a capacitor
HIGH_SUPPLY = 30.0  # V: above this, the usual caution about hazardous voltages
NEAR_LIMIT = 0.1  # a metric with less than 10 % margin to a spec limit gets a caution
WORST_CASE_METRICS = (
    "gain",
    "swing_vpp",
    "clip_vpp",
    "input_impedance",
    "output_impedance",
    "supply_current",
    "f_low",
    "f_high",
    "thd",
    "noise_ein_v",
    "psrr_db",
    "ic",
)


def _check_parts(topology: Topology, parts: dict[str, float], split: bool = False) -> None:
    """InputError unless ``parts`` gives every resistor of ``topology`` (r_top absent on a split
    supply) and nothing else."""
    known = set(topology.resistors) | set(topology.capacitors) | set(topology.supply_parts)
    unknown = [role for role in parts if role not in known]
    if unknown:
        raise InputError.single(
            f"--set {unknown[0]}", parts[unknown[0]], f"a part of {topology.name}: " + ", ".join(sorted(known))
        )
    missing = missing_resistors(topology, parts, split)
    if missing:
        raise InputError.single(
            f"--set {missing[0]}", MISSING, f"every resistor of {topology.name} given: " + ", ".join(topology.resistors)
        )
    for role, value in parts.items():
        low, high = PART_VALUE_RANGE["c" if role.startswith("c_") else "r"]
        if value != 0 and not low <= value <= high:
            unit = "F" if role.startswith("c_") else "ohm"
            raise InputError.single(
                f"--set {role}", value, f"a value from {format_value(low, unit)} to {format_value(high, unit)}"
            )


PART_VALUE_RANGE = {"r": (1e-2, 1e9), "c": (1e-13, 10.0)}  # ohm, F: the values a design of ours can take


def missing_resistors(topology: Topology, parts: dict[str, float], split: bool = False) -> list[str]:
    """The resistors of ``topology`` that ``parts`` leaves out and a design needs: every one but
    its optional parts (left out: absent, 0) and, on a split supply, those the stage omits there."""
    return [
        r
        for r in topology.resistors
        if r not in parts and r not in topology.optional_parts and not (split and r in topology.split_omitted())
    ]


def device_for(spec: Spec, catalog: Catalog, topology: Topology, device_id: str | None) -> str:
    """The transistor a design of ``topology`` is built with: ``device_id``, or the first of the
    spec's devices that builds the stage. InputError naming the device and the catalog's that
    would do, where it is of the wrong kind or polarity for the stage (a JFET for a bipolar stage)."""
    fits = [str(d) for d in catalog.transistors["id"] if builds_with(topology, device_traits(catalog, str(d)))]
    if device_id is None:
        device_id = next((d for d in spec.devices if d in fits), None)
        if device_id is None:
            raise InputError.single(
                "device",
                MISSING,
                f"one that builds {topology.name}: the spec lists {', '.join(spec.devices)}; the catalog's that do: "
                + (", ".join(fits) or "none"),
            )
    elif device_id not in fits:
        raise InputError.single(
            "device",
            device_id,
            f"one that builds {topology.name}; the catalog's that do: " + (", ".join(fits) or "none"),
        )
    return device_id


def _part_records(catalog: Catalog, spec: Spec, arrays: dict[str, np.ndarray]) -> list[dict[str, dict]]:
    """Each design's part records by role (value, label, catalog part id, tolerance, rating and
    price of the row ``Catalog.parts_for`` picks; the series' customary tolerance and a default
    rating where the value is not in the catalog), for part values as arrays by role. One
    catalog look-up per kind of part for all designs and roles."""
    n = next(iter(arrays.values())).size
    found: dict[str, list[dict]] = {}
    for kind, series, rating_column, default_rating in (
        ("resistor", spec.parts.resistor_series, "power_rating", DEFAULT_POWER_RATING),
        ("capacitor", spec.parts.capacitor_series, "voltage_rating", DEFAULT_CAP_VOLTAGE),
    ):
        roles = [role for role in arrays if role.startswith("c_") == (kind == "capacitor")]
        if not roles:
            continue
        values = np.concatenate([np.asarray(arrays[role], dtype=float) for role in roles])
        rows = catalog.parts_for(
            kind,
            values,
            allow_class2=spec.parts.allow_class2_coupling,
            voltage_min=scoring.capacitor_rating_wanted(spec) if kind == "capacitor" else 0.0,
        )
        part_id = np.asarray(rows["part_id"], dtype=object)  # blank (None or NaN) where none is in stock
        in_catalog = [p is not None and p == p for p in part_id]
        tolerance, rating, price = (
            np.asarray(rows[c], dtype=float) for c in ("tolerance", rating_column, "unit_price")
        )
        customary = eseries.customary_tolerance(series)
        for k, role in enumerate(roles):
            found[role] = []
            for i in range(k * n, (k + 1) * n):
                record = {"value": float(values[i]), "label": part_label(role, float(values[i])), "part_id": None}
                record["tolerance"] = customary
                record["rating"] = default_rating
                if in_catalog[i]:
                    record.update(
                        part_id=part_id[i],
                        tolerance=float(tolerance[i]),
                        rating=float(rating[i]),
                        unit_price=float(price[i]),
                    )
                found[role].append(record)
    return [{role: found[role][j] for role in arrays} for j in range(n)]


def assess(
    spec: Spec,
    catalog: Catalog,
    topology_name: str,
    parts: dict[str, float],
    device_id: str | None = None,
    *,
    samples: int = FINAL_BUILDS,
    seed: int | None = None,
) -> dict:
    """The candidate record (DESIGN.md's candidate JSON plus operating point and its spread,
    ratings, worst case, yield, the basis it meets the spec on, cautions) of one design under
    ``spec``. Capacitors not in ``parts`` are sized."""
    return assess_many(spec, catalog, [(topology_name, parts, device_id)], samples=samples, seed=seed)[0]


Design = tuple[str, dict[str, float], "str | None"]  # (topology, part values by role in ohm or F, device id)


def assess_many(
    spec: Spec, catalog: Catalog, designs: list[Design], *, samples: int = FINAL_BUILDS, seed: int | None = None
) -> list[dict]:
    """:func:`assess` of each of ``designs``, in order. Designs of one topology, device and set
    of parts are judged together, one vectorised model call per step (sizing, nominal, Monte
    Carlo builds, worst-case corners, bias spread) instead of one per design: the figures are
    the same as one at a time, since every step is per design and the Monte Carlo builds are
    common random numbers (tolerance.Builds)."""
    groups: dict[tuple[str, str, tuple[tuple[str, bool], ...]], list[int]] = {}
    given: list[dict[str, float]] = []
    devices: dict[tuple[str, str | None], str] = {}  # (topology, device asked) -> device built with
    for k, (topology_name, parts, device_id) in enumerate(designs):
        topology = get_topology(topology_name)
        _check_parts(topology, parts, spec.supply_arrangement == "split")
        if (topology_name, device_id) not in devices:
            devices[topology_name, device_id] = device_for(spec, catalog, topology, device_id)
        # an optional resistor left out is absent (0)
        parts = {**{r: 0.0 for r in topology.optional_parts if r in topology.resistors}, **parts}
        given.append(parts)
        # the roles evaluated, and which of them are present (an optional part left out is 0)
        roles = tuple((role, float(v) > 0) for role, v in parts.items() if float(v) > 0 or role in topology.resistors)
        groups.setdefault((topology_name, devices[topology_name, device_id], roles), []).append(k)
    out: list[dict] = [{}] * len(designs)
    for (topology_name, device_id, roles), members in groups.items():
        values = {role: np.array([float(given[k][role]) for k in members]) for role, _ in roles}
        for k, record in zip(members, _assess_group(spec, catalog, topology_name, values, device_id, samples, seed)):
            out[k] = record
    return out


def _assess_group(
    spec: Spec,
    catalog: Catalog,
    topology_name: str,
    arrays: dict[str, np.ndarray],
    device_id: str,
    samples: int,
    seed: int | None,
) -> list[dict]:
    """The candidate records of designs of one topology and device, part values as arrays by role."""
    topology = get_topology(topology_name)
    device = device_from_row(catalog.transistor(device_id))
    conditions = scoring.conditions_from_spec(spec)
    n = next(iter(arrays.values())).size
    if topology.couples_directly(spec.supply_arrangement, spec.input_coupling) and "c_in" not in arrays:
        arrays["c_in"] = np.zeros(n)  # a direct-coupled input: the source wired to the base
    decoupled = "r_decouple" in arrays
    missing_caps = [c for c in topology.capacitors + (("c_decouple",) if decoupled else ()) if c not in arrays]
    if missing_caps:
        allowed = catalog.capacitor_values(
            spec.parts.capacitor_series,
            *spec.parts.capacitor_range,
            in_stock_only=spec.parts.in_stock_only,
            allow_class2=spec.parts.allow_class2_coupling,
        )
        cap_tolerances = catalog.parts_for(
            "capacitor",
            allowed,
            allow_class2=spec.parts.allow_class2_coupling,
            voltage_min=scoring.capacitor_rating_wanted(spec),
        )["tolerance"]
        held = {"c_decouple": arrays.get("c_decouple", np.full(n, allowed[-1]))} if decoupled else {}
        held.update({"c_in": arrays["c_in"]} if "c_in" in arrays and not np.any(arrays["c_in"]) else {})
        stage = {r: arrays[r] for r in topology.resistors + topology.supply_parts if r in arrays}
        sized = size_capacitors(
            topology,
            {**stage, **held},
            device,
            conditions,
            allowed,
            f_low_target=scoring.sizing_target(spec, cap_tolerances),
            output_impedance_max=spec.limits.output_impedance_max,
            capacitor_low_edge=scoring.capacitor_low_edge(cap_tolerances),
        )
        arrays.update({c: sized[c] for c in missing_caps if c in sized})
        if "c_decouple" in missing_caps:
            arrays["c_decouple"] = size_decoupling(
                topology, arrays, device, conditions, allowed, scoring.decoupling_target(spec, cap_tolerances)
            )

    records = _part_records(catalog, spec, arrays)

    def column(role: str, key: str) -> np.ndarray:
        return np.array([r[role][key] for r in records])

    limits = scoring.rating_limits(
        spec,
        {r: column(r, "rating") for r in arrays if not r.startswith("c_") and records[0][r]["value"] > 0},
        {c: column(c, "rating") for c in arrays if c.startswith("c_")},
        device,
    )
    result = topology.evaluate(arrays, device, conditions, full=True, thd_solve=True)
    nominal = scoring.limit_violations(spec, result.metrics, result.ratings, limits, result.operating_point["active"])
    tolerances: dict[str, float | np.ndarray] = {role: column(role, "tolerance") for role in arrays}
    judged = judge(
        spec, topology, arrays, device, conditions, tolerances, limits, nominal, full=True, builds=samples, seed=seed
    )
    # every corner's ranges, for the record: those the worst-case basis judged on, or found here
    spread = judged.corners or worst_case(
        topology, arrays, device, conditions, tolerances, tuple(spec.temperature), spec.supply_spread
    )
    violations = judged.violations
    feasible = scoring.total_violation(violations) == 0
    gain_error = scoring.gain_error_db(spec, np.asarray(result.metrics["gain"], dtype=float))
    near = scoring.near_ratings(result.ratings, result.metrics, limits)
    out = []
    for j in range(n):
        at = partial(_entry, j=j)
        metrics: dict[str, float | None] = {k: at(v) for k, v in result.metrics.items()}
        metrics["gain_error_db"] = float(gain_error[j])
        metrics.update(
            {k: None for k, v in metrics.items() if v is None or not math.isfinite(v)}
        )  # no figure (no loop)
        build_yield = float(judged.yield_fraction[j])
        metrics.update(
            {
                "yield": build_yield if np.isfinite(build_yield) else None,
                "ic_spread": float(judged.spread["ic_spread"][j]),
            }
        )
        op = {k: at(v) for k, v in result.operating_point.items()}
        out.append(
            candidate_record(
                topology=topology.name,
                feasible=bool(feasible[j]),
                basis=basis_label(spec, bool(feasible[j]), build_yield, judged.builds),
                conditions=record_conditions(spec),
                parts={role: {k: rec[k] for k in ("value", "label", "part_id")} for role, rec in records[j].items()},
                transistor=device.record(),
                metrics=metrics,
                operating_point=op,
                operating_point_spread={
                    "ic": [float(judged.spread["ic_low"][j]), op["ic"], float(judged.spread["ic_high"][j])],
                    "v_out_q": [
                        float(judged.spread["v_out_low"][j]),
                        op["v_out_q"],
                        float(judged.spread["v_out_high"][j]),
                    ],
                },
                ratings={
                    k: {
                        "value": at(result.metrics["q_power"] if k == "q_power" else result.ratings[k]),
                        "limit": at(limit),
                    }
                    for k, limit in limits.items()
                },
                worst_case={k: [at(spread[k][0]), at(spread[k][1])] for k in WORST_CASE_METRICS if k in spread},
                violations={k: at(v) for k, v in violations.items() if at(v) > 0},
                cautions=_cautions(spec, {k: at(v) for k, v in near.items()}, metrics, op),
            )
        )
    return out


def _entry(value: object, j: int) -> float:
    """Entry ``j`` of an array over designs (a scalar is every design's)."""
    return float(np.asarray(value).reshape(-1)[j] if np.ndim(value) else value)  # type: ignore[arg-type]


NOT_ACTIVE_CAUTION = (
    "not active at its bias (a transistor saturated or cut off): the operating point, currents, dissipation and "
    "part stresses shown are the active-region model carried past where it holds, not what the circuit does; "
    "move the bias before reading them"
)


def _cautions(spec: Spec, near: dict[str, float], metrics: dict[str, float | None], op: dict[str, float]) -> list[str]:
    """Cautions of one design: the ratings it runs near (``near``: fraction of each rating,
    scoring.near_ratings; a design not active at its bias gets NOT_ACTIVE_CAUTION instead), the
    limits it meets by less than NEAR_LIMIT, a direct-coupled input's DC at the source (``op``:
    its operating point), and the usual ones."""
    notes = []
    if op.get("active", 1.0) == 0.0:  # the ratings' stresses come from that bias too
        notes.append(NOT_ACTIVE_CAUTION)
    else:
        notes += [
            f"{key} runs at {fraction:.0%} of its rating; check the part before building"
            if np.isfinite(fraction)
            else f"{key}: the part's rating is derated to nothing at the spec's highest ambient, "
            f"{spec.temperature[1]:g} °C; no part of this kind can be used there"
            for key, fraction in near.items()
            if fraction > scoring.NEAR_RATING
        ]
    for limit_name, metric, sign in LIMIT_METRICS:
        limit = getattr(spec.limits, limit_name)
        value = metrics[metric]
        if limit is None or value is None or not np.isfinite(value):
            continue
        margin = sign * (value - limit) / limit
        if 0 <= margin < NEAR_LIMIT:
            notes.append(f"{metric} is within {margin:.0%} of its limit {limit_name} = {limit:g}")
    deviation = metrics.get("midband_deviation")
    if deviation is not None and np.isfinite(deviation) and deviation > scoring.MIDBAND_DEVIATION_MAX:
        notes.append(
            f"the mid-band figures do not hold: |gain| at the band's centre "
            f"({format_value(scoring.conditions_from_spec(spec).band_centre, 'Hz')}) is {deviation:.0%} off the "
            "mid-band gain, which (like the swing, distortion and impedances) takes the coupling and bypass "
            "capacitors as shorts; raise the capacitors (or, if the high corner is near, lower the impedances)"
        )
    notes += direct_input_notes(spec, op)
    notes.append("predicted, not measured: verify the built stage before relying on it")
    return notes + hazard_cautions(spec)


def direct_input_notes(spec: Spec, op: dict[str, float]) -> list[str]:
    """Where the source is wired to the base (a direct-coupled input: op ``i_source`` non-zero),
    the DC the source then sees: the base's voltage (V, at its terminals) and the base current
    through it (A), which shift the bias by that current times the source's resistance."""
    i_source = float(op.get("i_source", 0.0))
    if i_source == 0:
        return []
    v_base = float(op["v_base"])
    return [
        f"direct-coupled input: the base current, {format_value(abs(i_source), 'A')} DC, flows in the source's "
        f"{format_value(spec.source_impedance, 'Ω')}: the source sees {format_value(v_base, 'V')} at its "
        "terminals (the input offset); check the source tolerates it"
    ]


def hazard_cautions(spec: Spec) -> list[str]:
    """The shock-hazard caution, only where the supply (above HIGH_SUPPLY) or the scenario
    (``mains_powered``) calls for it."""
    notes = []
    highest = max(spec.supply, spec.supply_max)
    if highest > HIGH_SUPPLY:
        top, bottom = spec.rails
        what = {
            "positive": f"supply {highest:g} V",
            "negative": f"negative rail -{highest:g} V",
            "split": f"split supply +{top:g} V / {bottom:g} V spans up to {highest:g} V in total, which",
        }
        notes.append(
            f"{what[spec.supply_arrangement]} is above {HIGH_SUPPLY:g} V: treat it as a shock and energy "
            "hazard; follow local electrical codes and licensed practice"
        )
    if spec.mains_powered:
        notes.append(
            "mains-powered: the supply is derived from the mains; build and test it only under local "
            "electrical codes and licensed practice, with the mains side enclosed and isolated"
        )
    return notes


def design_from_record(record: dict) -> tuple[Topology, dict[str, np.ndarray], AnyDevice, Conditions]:
    """Rebuild a candidate's design from its record alone (no spec, no catalog): the topology,
    its parts as 1-element float arrays by role, the device, and the conditions at the nominal
    temperature. InputError naming the missing or bad key if the record is incomplete."""

    def incomplete(problems: list[Problem]) -> InputError:
        return InputError(problems, title="incomplete candidate record")

    if not isinstance(record, dict):
        raise incomplete([Problem("candidate", type(record).__name__, "a candidate record (a mapping)")])
    blocks = {
        "topology": (str, "a topology name"),
        "parts": (dict, "a mapping role -> {value, ...}"),
        "transistor": (dict, "the transistor block with its model"),
        "conditions": (dict, "supply, source_impedance, load_impedance and band"),
    }
    problems = [
        Problem(key, record.get(key), expected)
        for key, (kind, expected) in blocks.items()
        if not isinstance(record.get(key), kind)
    ]
    if problems:
        raise incomplete(problems)
    topology = get_topology(record["topology"])
    cond = record["conditions"]
    rails = cond.get("rails")
    below = 0.0
    if rails is not None:
        try:
            top, bottom = float(rails[0]), float(rails[1])
            if not (top >= 0 >= bottom and top > bottom):
                raise ValueError
            below = -bottom / (top - bottom)
        except (TypeError, ValueError, IndexError, KeyError):
            problems.append(Problem("conditions.rails", rails, "[highest, lowest] rail in V, highest >= 0 >= lowest"))
    parts: dict[str, np.ndarray] = {}
    for role in topology.resistors + topology.capacitors + topology.supply_parts:
        if role in topology.supply_parts and role not in record["parts"]:
            continue  # no decoupling RC: the stage is on the rail
        if role in topology.split_omitted() and 0 < below < 1 and role not in record["parts"]:
            continue  # a split supply's base returns to ground through r_bottom alone
        entry = record["parts"].get(role)
        value: Any = entry.get("value") if isinstance(entry, dict) else None  # checked by float() below
        try:
            parts[role] = np.array([float(value)])
        except (TypeError, ValueError):
            problems.append(Problem(f"parts.{role}.value", value, f"a number (ohm or F) for {topology.name}"))
    numbers: dict[str, float] = {}
    for key, default in (
        ("supply", None),
        ("source_impedance", None),
        ("load_impedance", None),
        ("load_capacitance", 0.0),
        ("signal_vpp", 1.0),
    ):
        try:
            numbers[key] = float(cond.get(key, default))
        except (TypeError, ValueError):
            problems.append(Problem(f"conditions.{key}", cond.get(key), "a number in SI units"))
    band = cond.get("band")
    try:
        band = (float(band[0]), float(band[1]))
    except (TypeError, ValueError, IndexError, KeyError):
        problems.append(Problem("conditions.band", band, "[low, high] in Hz"))
    if problems:
        raise incomplete(problems)
    device = device_from_record(record["transistor"])
    return (
        topology,
        parts,
        device,
        Conditions(band=band, temperature=NOMINAL_TEMPERATURE_C, below_ground=below, **numbers),
    )
